"""NetCDF writers of the two invented file flavours of the demo archives.

Flavour "alpha" writes one file per output time, flavour "beta" one file per
variable; each archive gets a manifest with the files' sha256. An archive is written
into a temporary folder and renamed into place when complete.
"""

from __future__ import annotations

import hashlib
import json
import math
import shutil
import uuid
from pathlib import Path
from typing import Any

import netCDF4
import numpy as np

from lesprep import thermo
from lesprep.demo.cases import BETA_TIME_UNITS, GENERATOR_VERSION, SOURCE, DemoCase
from lesprep.demo.physics import Grid, grid_of, reference_state, state_at
from lesprep.errors import InputError

# --------------------------------------------------------------------------- writing


def _chunks(shape: tuple[int, ...], target_bytes: int = 4 * 2**20) -> tuple[int, ...]:
    """Chunks of a ``(time, a, b, c)`` float32 variable: one time, ``a`` split to ~4 MiB."""
    per_row = 4 * math.prod(shape[2:])
    lead = max(1, min(shape[1], target_bytes // max(per_row, 1)))
    return (1, lead, *shape[2:])


def _new_var(
    ds: netCDF4.Dataset,
    name: str,
    dims: tuple[str, ...],
    attrs: dict[str, str],
    *,
    compress: bool,
    dtype: str = "f4",
    chunks: tuple[int, ...] | None = None,
) -> netCDF4.Variable:
    var = ds.createVariable(
        name,
        dtype,
        dims,
        compression="zlib" if compress else None,
        complevel=4,
        shuffle=compress,
        chunksizes=chunks,
    )
    var.setncatts(attrs)
    return var


def _global_attrs(ds: netCDF4.Dataset, spec: DemoCase) -> None:
    ds.setncatts(
        {
            "title": f"Synthetic demo LES archive, case {spec.case} ({spec.regime}, {spec.kind})",
            "flavour": spec.flavour,
            "source": SOURCE,
            "case": spec.case,
            "regime": spec.regime,
        }
    )


def _horizontal_coords(ds: netCDF4.Dataset, grid: Grid) -> None:
    for name, values in (("x", grid.x), ("y", grid.y)):
        var = ds.createVariable(name, "f8", (name,))
        var.setncatts({"units": "m", "long_name": f"{name} of cell centre", "axis": name.upper()})
        var[:] = values


_ALPHA_VARS = {
    "liq": ("zc", {"units": "g/kg", "long_name": "cloud liquid water mixing ratio"}),
    "vap": ("zc", {"units": "g/kg", "long_name": "water vapour mixing ratio"}),
    "tempc": ("zc", {"units": "degC", "long_name": "air temperature"}),
    "pres": ("zc", {"units": "hPa", "long_name": "air pressure"}),
    "wf": ("zf", {"units": "m/s", "long_name": "vertical velocity on cell faces"}),
}


def _write_alpha(spec: DemoCase, folder: Path, compress: bool) -> list[str]:
    grid = grid_of(spec)
    names = []
    for i in range(spec.ntimes):
        state = state_at(spec, i)
        values = {
            "liq": state["qc"] * 1e3,
            "vap": state["qv"] * 1e3,
            "tempc": state["T"] - thermo.T0,
            "pres": state["p"] / 100.0,
            "wf": state["w_faces"],
        }
        del state
        name = f"snap_{i:04d}.nc"
        with netCDF4.Dataset(folder / name, "w", format="NETCDF4") as ds:
            _global_attrs(ds, spec)
            ds.createDimension("time", None)
            ds.createDimension("zc", spec.nz)
            ds.createDimension("zf", spec.nz + 1)
            ds.createDimension("y", spec.ny)
            ds.createDimension("x", spec.nx)
            tvar = ds.createVariable("time", "f8", ("time",))
            tvar.setncatts({"units": "s", "long_name": "time since start of run", "axis": "T"})
            tvar[0] = spec.output_times_s()[i]
            for zname, zval, what in (
                ("zc", grid.z, "height of cell centre"),
                ("zf", grid.z_faces, "height of cell face"),
            ):
                zvar = ds.createVariable(zname, "f8", (zname,))
                zvar.setncatts({"units": "m", "long_name": what, "positive": "up", "axis": "Z"})
                zvar[:] = zval
            _horizontal_coords(ds, grid)
            for vname, (zdim, attrs) in _ALPHA_VARS.items():
                data = values.pop(vname).astype(np.float32)
                var = _new_var(
                    ds,
                    vname,
                    ("time", zdim, "y", "x"),
                    attrs,
                    compress=compress,
                    chunks=_chunks((1, *data.shape)),
                )
                var[0] = data
        names.append(name)
    return names


_BETA_VARS = {
    "cloudwater": {"units": "kg kg-1", "long_name": "cloud liquid water mixing ratio"},
    "sphum": {"units": "kg kg-1", "long_name": "specific humidity"},
    "theta": {"units": "K", "long_name": "potential temperature (p0 = 1000 hPa)"},
    "wc": {"units": "m s-1", "long_name": "vertical velocity at cell centres"},
}


def _beta_coords(ds: netCDF4.Dataset, spec: DemoCase, grid: Grid, *, with_time: bool) -> None:
    _global_attrs(ds, spec)
    if with_time:
        ds.createDimension("time", spec.ntimes)
    ds.createDimension("x", spec.nx)
    ds.createDimension("y", spec.ny)
    ds.createDimension("z", spec.nz)
    ds.createDimension("nv", 2)
    if with_time:
        tvar = ds.createVariable("time", "f8", ("time",))
        tvar.setncatts(
            {"units": BETA_TIME_UNITS, "calendar": "standard", "long_name": "time", "axis": "T"}
        )
        tvar[:] = spec.output_times_s() / 3600.0
    _horizontal_coords(ds, grid)
    zvar = ds.createVariable("z", "f8", ("z",))
    zvar.setncatts(
        {
            "units": "m",
            "long_name": "height of cell centre",
            "positive": "up",
            "axis": "Z",
            "bounds": "z_bnds",
        }
    )
    zvar[:] = grid.z
    bvar = ds.createVariable("z_bnds", "f8", ("z", "nv"))
    bvar[:] = np.stack([grid.z_faces[:-1], grid.z_faces[1:]], axis=1)


def _write_beta(spec: DemoCase, folder: Path, compress: bool) -> list[str]:
    grid = grid_of(spec)
    ref = reference_state(spec)
    with netCDF4.Dataset(folder / "pref.nc", "w", format="NETCDF4") as ds:
        _beta_coords(ds, spec, grid, with_time=False)
        var = _new_var(
            ds,
            "pref",
            ("z",),
            {"units": "Pa", "long_name": "reference air pressure"},
            compress=compress,
            chunks=(spec.nz,),
        )
        var[:] = ref.p.astype(np.float32)
    datasets: dict[str, netCDF4.Dataset] = {}
    try:
        for name, attrs in _BETA_VARS.items():
            ds = netCDF4.Dataset(folder / f"{name}.nc", "w", format="NETCDF4")
            datasets[name] = ds
            _beta_coords(ds, spec, grid, with_time=True)
            _new_var(
                ds,
                name,
                ("time", "x", "y", "z"),
                attrs,
                compress=compress,
                chunks=_chunks((spec.ntimes, spec.nx, spec.ny, spec.nz)),
            )
        for i in range(spec.ntimes):
            state = state_at(spec, i)
            p = state["p"]
            values = {
                "cloudwater": state["qc"],
                # mass fraction of vapour in moist air that holds cloud water too
                "sphum": state["qv"] / (1.0 + state["qv"] + state["qc"]),
                "theta": state["T"] / thermo.exner(p),
                "wc": state["w"],
            }
            del state, p
            for name, data in values.items():
                datasets[name][name][i] = data.transpose(2, 1, 0).astype(np.float32)
            del values
    finally:
        for ds in datasets.values():
            ds.close()
    return ["pref.nc", *(f"{name}.nc" for name in _BETA_VARS)]


def _sha256(path: Path) -> str:
    digest = hashlib.sha256()
    with path.open("rb") as fh:
        for block in iter(lambda: fh.read(2**20), b""):
            digest.update(block)
    return digest.hexdigest()


def _manifest(spec: DemoCase, folder: Path, names: list[str], compress: bool) -> dict[str, Any]:
    return {
        "generator": "lesprep.demo",
        "generator_version": GENERATOR_VERSION,
        "source": SOURCE,
        "case": spec.case,
        "flavour": spec.flavour,
        "compress": compress,
        "spec": spec.to_dict(),
        "times_s": spec.output_times_s().tolist(),
        "files": [
            {"name": n, "size": (folder / n).stat().st_size, "sha256": _sha256(folder / n)}
            for n in names
        ],
    }


def _replace_dir(tmp: Path, final: Path) -> None:
    """Move ``tmp`` to ``final``, replacing an existing directory."""
    if not final.exists():
        tmp.rename(final)
        return
    old = final.with_name(f".{final.name}.old-{uuid.uuid4().hex[:12]}")
    final.rename(old)
    try:
        tmp.rename(final)
    except BaseException:
        old.rename(final)
        raise
    shutil.rmtree(old, ignore_errors=True)


def write_demo_case(spec: DemoCase, out_root: Path | str, *, compress: bool = False) -> Path:
    """Write the raw archive of one demo case.

    Flavour "alpha" writes ``snap_0000.nc``, ``snap_0001.nc``, ... (one output time
    each; dims ``(time, zc, y, x)`` and ``(time, zf, y, x)`` for ``wf``); flavour "beta"
    writes ``cloudwater.nc``, ``sphum.nc``, ``theta.nc``, ``wc.nc`` (dims
    ``(time, x, y, z)``) and ``pref.nc`` (dims ``(z)``). Both add ``manifest.json``
    listing every file with its size and SHA-256, the spec, the flavour and the
    generator version.

    The archive is written into a hidden temporary sibling directory and renamed into
    place at the end, so an interrupted run never leaves a complete-looking archive;
    an existing archive of the same case is replaced. Fields are generated and written
    one output time at a time.

    Parameters
    ----------
    spec
        The case.
    out_root
        Directory that receives ``<case>/``; created if missing.
    compress
        Store variables zlib-compressed (level 4, with shuffle).

    Returns
    -------
    pathlib.Path
        The case directory ``<out_root>/<case>``.

    Raises
    ------
    InputError
        If ``<out_root>/<case>`` exists and is not a directory.

    Examples
    --------
    >>> import tempfile
    >>> from lesprep.demo import demo_case
    >>> spec = demo_case("sc-ostra-02").with_size(nx=8, ny=8, ntimes=1)
    >>> with tempfile.TemporaryDirectory() as tmp:
    ...     sorted(p.name for p in write_demo_case(spec, tmp).iterdir())
    ['cloudwater.nc', 'manifest.json', 'pref.nc', 'sphum.nc', 'theta.nc', 'wc.nc']
    """
    root = Path(out_root)
    root.mkdir(parents=True, exist_ok=True)
    final = root / spec.case
    if final.exists() and not final.is_dir():
        raise InputError(
            "exists and is not a directory; expected a demo archive directory or nothing",
            case=spec.case,
            file=str(final),
            hint="remove or rename the file",
        )
    tmp = root / f".{spec.case}.partial-{uuid.uuid4().hex[:12]}"
    tmp.mkdir()
    try:
        if spec.flavour == "alpha":
            names = _write_alpha(spec, tmp, compress)
        else:
            names = _write_beta(spec, tmp, compress)
        manifest = _manifest(spec, tmp, names, compress)
        (tmp / "manifest.json").write_text(json.dumps(manifest, indent=2) + "\n")
        _replace_dir(tmp, final)
    except BaseException:
        shutil.rmtree(tmp, ignore_errors=True)
        raise
    return final
