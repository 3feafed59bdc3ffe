"""Benchmark suite of lesprep's performance targets, in one run.

Run from the repository root::

    /tmp/venv/bin/python benchmarks/run.py                 # 512 x 512 x 160, 12 times
    /tmp/venv/bin/python benchmarks/run.py --quick         # 256 x 256 x 80, 6 times

Every measured step runs in a fresh worker process (this script, re-run with ``--worker``), so
the peak resident memory of one step (the kernel's high-water mark ``VmHWM`` of the worker,
read from ``/proc/self/status`` when the step ends) is not polluted by another. Before each
timed step the page cache is warmed with the step's inputs and dirty pages are flushed
(``os.sync``), so the numbers are warm-cache numbers and a step does not pay for the previous
step's write-back. Each comparison is wrapped so a failure is printed and the run goes on; each
worker has a timeout. See ``benchmarks/README.md`` for what is compared and why.
"""

from __future__ import annotations

import argparse
import contextlib
import json
import math
import operator
import os
import platform
import shutil
import subprocess
import sys
import time
import traceback
from collections.abc import Callable, Iterable, Mapping, Sequence
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

HERE = Path(__file__).resolve().parent
ROOT = HERE.parent
CASE = "sc-ostra-01"  # an invented demo case (flavour alpha: one file per output time)
VARMAP = ROOT / "config" / "varmaps" / "flavour-alpha.yaml"
STORE = {"codec": "blosc-lz4", "clevel": 5}  # the workflow's default store settings
SPINUP = "0 s"  # keep every generated time, so "ntimes" is what each step processes
THRESHOLD = "1e-5 kg/kg"
PATCH_LENGTHS_M = (1600.0, 6400.0)
PATCH_SIZE = 16
CANON_READ = ("qc", "qv", "T", "w", "rh", "cloud_mask", "lwp", "p")  # what coarsening reads
RAW_VARS = ("liq", "vap", "tempc", "pres", "wf")
TARGETS = {
    "xarray_speedup": 20.0,  # xarray script time / lesprep time >= this
    "coarsen_floor": 1.5,  # lesprep coarsen time / I/O floor time <= this
    "ingest_floor": 1.5,  # lesprep ingest time / I/O floor time <= this
    "memory_growth": 0.20,  # 4x more times -> peak RSS grows by less than this fraction
}
MIB = 2**20


# =============================================================================== helpers


def _status_kib(key: str) -> int:
    """A ``kB`` field of ``/proc/self/status`` (e.g. VmHWM, VmRSS); -1 if unavailable."""
    with contextlib.suppress(OSError), open("/proc/self/status") as fh:
        for line in fh:
            if line.startswith(key + ":"):
                return int(line.split()[1])
    return -1


def dir_bytes(path: str | Path) -> int:
    """Bytes of the files under ``path`` (a store or an archive)."""
    from lesprep.store import dir_size_bytes

    return dir_size_bytes(path)


def file_count(path: str | Path) -> int:
    """Number of files under ``path``."""
    return sum(len(files) for _, _, files in os.walk(path))


def warm(paths: Iterable[str | Path]) -> float:
    """Read every file under ``paths`` once (fills the page cache); returns seconds."""
    t0 = time.perf_counter()
    buf = bytearray(8 * MIB)
    for path in paths:
        p = Path(path)
        files = [p] if p.is_file() else [Path(r) / f for r, _, fs in os.walk(p) for f in fs]
        for f in files:
            with contextlib.suppress(OSError), open(f, "rb", buffering=0) as fh:
                while fh.readinto(buf):
                    pass
    return time.perf_counter() - t0


def remove(path: str | Path) -> None:
    """Remove a file or directory tree if present."""
    p = Path(path)
    if p.is_dir():
        shutil.rmtree(p, ignore_errors=True)
    elif p.exists():
        p.unlink()


def power_factors(nx: int, ny: int) -> list[int]:
    """Block factors 2, 4, 8, ... that divide both horizontal sizes."""
    g = math.gcd(nx, ny)
    out, f = [], 2
    while g % f == 0:
        out.append(f)
        f *= 2
    return out


def scale_texts(nx: int, ny: int, dx: float) -> list[str]:
    """Configured scale lengths ("100 m", ...) for every power-of-two factor of the grid."""
    return [f"{f * dx:g} m" for f in power_factors(nx, ny)]


def label_of(length_m: float) -> str:
    """Store label of a length, as lesprep writes it (``1600m``)."""
    return f"{length_m:.6g}m".replace("+", "")


def _import_lesprep() -> None:
    try:
        import lesprep  # noqa: F401
    except ImportError:  # a checkout without an installed package
        sys.path.insert(0, str(ROOT / "src"))


# =============================================================================== workers
# Each worker runs in its own process, returns a JSON-able dict and times its own work.


def w_info() -> dict[str, Any]:
    """Versions of the libraries that matter."""
    _import_lesprep()
    import importlib

    out: dict[str, Any] = {"python": sys.version.split()[0]}
    for mod in ("lesprep", "numpy", "scipy", "xarray", "zarr", "numcodecs", "dask", "numba"):
        with contextlib.suppress(Exception):
            out[mod] = importlib.import_module(mod).__version__
    with contextlib.suppress(Exception):
        import netCDF4

        out["netCDF4"] = netCDF4.__version__
        out["hdf5"] = netCDF4.__hdf5libversion__
        out["netcdf-c"] = netCDF4.__netcdf4libversion__
    with contextlib.suppress(Exception):
        import numba

        out["numba_threads"] = numba.config.NUMBA_NUM_THREADS
    return out


def w_touch(*, gib: float = 1.0) -> dict[str, Any]:
    """First touch of fresh memory vs touching memory again (a VM's lazily backed pages)."""
    import numpy as np

    n = int(gib * 2**30 // 8)
    out = {}
    for name in ("first_touch_gbps", "second_touch_gbps"):
        t0 = time.perf_counter()
        a = np.ones(n)
        out[name] = a.nbytes / 1e9 / (time.perf_counter() - t0)
        a[:] = 2.0
        del a
    b = np.ones(n)
    t0 = time.perf_counter()
    b *= 2.0
    out["rewrite_gbps"] = b.nbytes / 1e9 / (time.perf_counter() - t0)
    out["time_s"] = 0.0
    return out


def w_generate(*, nx: int, ny: int, nz: int, ntimes: int, root: str, skip: bool) -> dict:
    """Write the demo archive unless ``root/<case>/manifest.json`` has the same spec."""
    _import_lesprep()
    from lesprep.demo import GENERATOR_VERSION, demo_case, write_demo_case

    spec = demo_case(CASE).with_size(nx=nx, ny=ny, nz=nz, ntimes=ntimes)
    folder = Path(root) / CASE
    manifest = folder / "manifest.json"
    if manifest.exists():
        m = json.loads(manifest.read_text())
        same = m.get("spec") == spec.to_dict() and m.get("generator_version") == GENERATOR_VERSION
        complete = all(
            (folder / f["name"]).exists() and (folder / f["name"]).stat().st_size == f["size"]
            for f in m.get("files", [])
        )
        if (same and complete) or skip:
            return {"cached": True, "time_s": 0.0, "spec_matches": same and complete}
    if skip:
        raise FileNotFoundError(f"--skip-generate given but {manifest} does not exist")
    t0 = time.perf_counter()
    write_demo_case(spec, root)
    return {"cached": False, "time_s": time.perf_counter() - t0}


def raw_files(folder: str | Path) -> list[str]:
    """The archive's NetCDF files in time order."""
    return sorted(str(p) for p in Path(folder).glob("snap_*.nc"))


def _raw_bytes(files: Sequence[str]) -> int:
    import netCDF4

    total = 0
    for f in files:
        with netCDF4.Dataset(f) as ds:
            for v in ds.variables.values():
                total += v.size * v.dtype.itemsize
    return total


def _canonical_bytes(canonical: str, names: Sequence[str] = CANON_READ) -> int:
    import zarr

    g = zarr.open_group(canonical, mode="r")
    return sum(g[n].nbytes for n in names)


def w_extend(*, files: list[str], out: str, copies: int) -> dict[str, Any]:
    """A longer archive: ``copies`` rounds of the files with times shifted (netCDF4 edit).

    Round ``k`` shifts every time by ``k`` run lengths (``n`` output intervals).
    """
    import netCDF4

    folder = Path(out)
    remove(folder)
    folder.mkdir(parents=True)
    t0 = time.perf_counter()
    n = len(files)
    times = []
    for f in files[:2]:
        with netCDF4.Dataset(f) as ds:
            times.append(float(ds["time"][0]))
    interval_s = times[1] - times[0] if n > 1 else 1800.0
    written = []
    for k in range(copies):
        for i, f in enumerate(files):
            dst = folder / f"snap_{k * n + i:04d}.nc"
            shutil.copyfile(f, dst)
            if k:
                with netCDF4.Dataset(dst, "a") as ds:
                    ds["time"][0] = float(ds["time"][0]) + k * n * interval_s
            written.append(str(dst))
    return {"time_s": time.perf_counter() - t0, "files": written}


def _settings(scales: Sequence[str], patch_scales: Sequence[str]) -> Any:
    """The workflow's settings for the benchmark case, built as the workflow builds them."""
    from lesprep.jobs.settings import WorkflowSettings

    return WorkflowSettings.from_config(
        {
            "cases": "unused.tsv",
            "ingest": {"spinup": SPINUP, "cloud_threshold": THRESHOLD},
            "coarsen": {
                "scales": list(scales),
                "patches": {
                    "variables": ["qc", "w"],
                    "scales": list(patch_scales),
                    "size": PATCH_SIZE,
                },
            },
            "store": dict(STORE),
        }
    )


def _ingest_settings() -> Any:
    return _settings(["1 km"], []).ingest


def _coarsen_settings(scales: Sequence[str], patch_scales: Sequence[str]) -> Any:
    return _settings(scales, patch_scales).coarsen.for_group("all")


def w_jit_warm() -> dict[str, Any]:
    """Compile (or load from numba's cache) every kernel coarsening uses, on tiny arrays."""
    _import_lesprep()
    import numpy as np

    from lesprep.scales.spec import parse_scales
    from lesprep.scales.step import coarse_fields

    t0 = time.perf_counter()
    rng = np.random.default_rng(0)
    shape = (4, 32, 32)
    fine = {v: rng.random(shape) + 1.0 for v in ("qc", "qv", "w", "rh")}
    fine["qv"] = fine["qv"] * 1e-2
    fine["T"] = 280.0 + rng.random(shape)
    fine["p"] = np.full(shape, 9e4)
    fine["cloud_mask"] = (rng.random(shape) > 0.5).astype(np.int8)
    fine["lwp"] = rng.random(shape[1:])
    settings = _coarsen_settings(["100 m", "200 m", "800 m"], ["800 m"])
    scales = [s.resolve(50.0, 32, 32, case="warm") for s in parse_scales(["100m", "200m", "800m"])]
    coarse_fields(fine, np.arange(4.0) * 50 + 25, scales, settings)
    coarse_fields(fine, np.arange(4.0) * 50 + 25, scales, settings, dtype=np.float32)
    _warm_ingest_kernels(np)
    return {"time_s": time.perf_counter() - t0}


def _warm_ingest_kernels(np: Any) -> None:
    """Compile (or load) the kernels ingest uses, for float32 raw data."""
    from lesprep.canonical.derived import cell_diagnostics
    from lesprep.raw.grid import destagger_vertical
    from lesprep.units import Conversion

    a = np.ones((4, 8, 8), dtype=np.float32)
    conv = Conversion(
        variable="T", raw_variable="t", from_units="degC", to_units="K", factor=1.0, offset=1.0
    )
    conv.convert(a, np.float32)
    destagger_vertical(a, np.arange(5.0), np.arange(4.0) + 0.5, dtype=np.float32)
    cell_diagnostics(a * 9e4, a * 280, a * 1e-3, a * 1e-4, np.ones(4), 1e-5, dtype=np.float32)


def w_ingest(*, files: list[str], out: str) -> dict[str, Any]:
    """lesprep.canonical.ingest.ingest_case on the archive."""
    _import_lesprep()
    from lesprep.canonical.ingest import ingest_case

    settings = _ingest_settings()
    t0 = time.perf_counter()
    ingest_case(case=CASE, raw=[Path(f) for f in files], varmap=VARMAP, settings=settings, out=out)
    dt = time.perf_counter() - t0
    return {"time_s": dt, "bytes": _raw_bytes(files), "out_bytes": dir_bytes(out)}


def _clone_layout(src: Any, dst_path: str | Path) -> tuple[Any, dict[str, Any], float]:
    """An empty group with the arrays of ``src`` (same shape, chunks, dtype, codecs, fill).

    Arrays without a time dimension are copied at once. Returns the group, its arrays with a
    time dimension by name and the seconds spent writing (metadata and small arrays).
    """
    import zarr

    items = sorted(src.arrays(), key=lambda kv: kv[0])
    static = {n: a[...] for n, a in items if "time" not in (a.metadata.dimension_names or ())}
    t0 = time.perf_counter()
    root = zarr.open_group(str(dst_path), mode="w", zarr_format=3)
    timed = {}
    for name, a in items:
        arr = root.create_array(
            name,
            shape=a.shape,
            chunks=a.chunks,
            dtype=a.dtype,
            serializer=a.serializer,
            filters=a.filters,
            compressors=a.compressors,
            fill_value=a.fill_value,
            dimension_names=a.metadata.dimension_names,
            attributes=dict(a.attrs),
            chunk_key_encoding=a.metadata.chunk_key_encoding,
        )
        if name in static:
            arr[...] = static[name]
        else:
            timed[name] = arr
    root.attrs.update(dict(src.attrs))
    return root, timed, time.perf_counter() - t0


def _floor_allocator() -> str:
    """Give a floor the allocator tuning lesprep's steps use, when lesprep has one."""
    _import_lesprep()
    try:
        from lesprep._memory import retain_freed_memory
    except ImportError:
        return "glibc default"
    return "freed memory retained (lesprep._memory)" if retain_freed_memory() else "default"


def _consolidate(path: str | Path) -> float:
    import warnings

    import zarr

    t0 = time.perf_counter()
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        zarr.consolidate_metadata(str(path))
    return time.perf_counter() - t0


def _write_slabs(pool: Any, targets: Sequence[tuple[Any, Any]], j: int) -> float:
    """Write time ``j`` of every (array, values) pair concurrently; returns seconds."""

    def write(item: tuple[Any, Any]) -> None:
        arr, slab = item
        arr[j] = slab

    t0 = time.perf_counter()
    list(pool.map(write, targets))
    return time.perf_counter() - t0


def w_ingest_floor(*, files: list[str], canonical: str, out: str) -> dict[str, Any]:
    """Read every raw variable once (netCDF4, no masking) and write lesprep's canonical bytes.

    The written arrays are those of lesprep's canonical store (read from it, untimed), into a
    store with identical shape, chunks, dtype, codecs and fill values.
    """
    from concurrent.futures import ThreadPoolExecutor

    import netCDF4
    import zarr

    allocator = _floor_allocator()
    src = zarr.open_group(canonical, mode="r")
    remove(out)
    read_s = 0.0
    nbytes = 0
    with ThreadPoolExecutor(max_workers=8) as pool:
        _, timed, write_s = _clone_layout(src, out)
        sources = {n: src[n] for n in timed}
        for j, f in enumerate(files):
            t0 = time.perf_counter()
            with netCDF4.Dataset(f) as ds:
                ds.set_auto_maskandscale(False)
                for v in ds.variables.values():
                    a = v[...]
                    nbytes += a.nbytes
                del a
            read_s += time.perf_counter() - t0
            slabs = [(d, sources[n][j]) for n, d in timed.items()]  # untimed: lesprep's
            write_s += _write_slabs(pool, slabs, j)
            del slabs
    write_s += _consolidate(out)
    return {
        "time_s": read_s + write_s,
        "read_s": read_s,
        "write_s": write_s,
        "bytes": nbytes,
        "out_bytes": dir_bytes(out),
        "allocator": allocator,
    }


def w_coarsen(
    *, canonical: str, outdir: str, scales: list[str], patch_scales: list[str]
) -> dict[str, Any]:
    """lesprep.scales.coarsen.coarsen_case for every scale of the case in one call."""
    _import_lesprep()
    from lesprep.scales.coarsen import coarsen_case
    from lesprep.scales.spec import parse_scale

    settings = _coarsen_settings(scales, patch_scales)
    outputs = {
        parse_scale(s).label: str(Path(outdir) / f"scale-{parse_scale(s).label}.zarr")
        for s in scales
    }
    for p in outputs.values():
        remove(p)
    Path(outdir).mkdir(parents=True, exist_ok=True)
    t0 = time.perf_counter()
    coarsen_case(canonical, outputs, settings)
    dt = time.perf_counter() - t0
    return {
        "time_s": dt,
        "bytes": _canonical_bytes(canonical),
        "out_bytes": sum(dir_bytes(p) for p in outputs.values()),
    }


def w_coarsen_floor(
    *, canonical: str, lesprep_dir: str, labels: list[str], out: str
) -> dict[str, Any]:
    """Read the canonical inputs once, and write lesprep's scale stores' bytes once.

    Reading: every variable coarsening reads, one time at a time, the variables read
    concurrently. Writing: each of lesprep's scale stores is cloned (same arrays, chunks,
    codecs) and filled chunk row by chunk row with the values lesprep wrote (read untimed).
    """
    from concurrent.futures import ThreadPoolExecutor

    import zarr

    allocator = _floor_allocator()
    src = zarr.open_group(canonical, mode="r")
    nt = src["time"].shape[0]
    read_s = write_s = 0.0
    remove(out)
    Path(out).mkdir(parents=True)
    inputs = [src[n] for n in CANON_READ]
    with ThreadPoolExecutor(max_workers=8) as pool:
        for j in range(nt):
            t0 = time.perf_counter()
            got = list(pool.map(operator.itemgetter(j), inputs))
            read_s += time.perf_counter() - t0
            del got
        pairs = []
        for lab in labels:
            s = zarr.open_group(str(Path(lesprep_dir) / f"scale-{lab}.zarr"), mode="r")
            _, timed, dt = _clone_layout(s, Path(out) / f"scale-{lab}.zarr")
            write_s += dt
            pairs.extend((s[n], arr) for n, arr in timed.items())
        for j in range(nt):
            slabs = [(arr, source[j]) for source, arr in pairs]
            write_s += _write_slabs(pool, slabs, j)
            del slabs
    for lab in labels:
        write_s += _consolidate(Path(out) / f"scale-{lab}.zarr")
    return {
        "time_s": read_s + write_s,
        "read_s": read_s,
        "write_s": write_s,
        "bytes": _canonical_bytes(canonical),
        "out_bytes": dir_bytes(out),
        "allocator": allocator,
    }


def w_coarsen_xarray(
    *, canonical: str, outdir: str, scales: list[str], patch_scales: list[str], ntimes: int
) -> dict[str, Any]:
    """The hand-written xarray script a scientist would write, on the first ``ntimes`` times.

    Same numbers as lesprep per scale: float64 arithmetic, population variance, skewness by
    ``scipy.stats.skew(bias=True)`` (NaN of constant blocks filled with 0, lesprep's
    convention), cloud fraction as the block mean of the mask, relative humidity of the means
    by Bolton (1980), its z derivative by ``differentiate(edge_order=2)`` (second order at the
    ends, as ``numpy.gradient(edge_order=2)``), the Sundqvist et al. (1989) cloud fraction,
    fine patches by ``coarsen(...).construct``. Each scale is one ``to_zarr`` call.
    """
    import warnings

    import dask.array as da
    import numpy as np
    import scipy.stats
    import xarray as xr
    from zarr.codecs import BloscCodec

    _import_lesprep()
    from lesprep.thermo import EPS, T0  # the same constants as lesprep (Rd/Rv, 273.15 K)

    warnings.filterwarnings("ignore")

    def skew(x: Any, axis: Any) -> Any:  # per dask block: scipy would load the whole array
        if isinstance(x, da.Array):
            return x.map_blocks(
                scipy.stats.skew, axis=axis, bias=True, drop_axis=axis, dtype=np.float64
            )
        return scipy.stats.skew(x, axis=axis, bias=True)

    rhc = 0.8
    codec = (BloscCodec(cname="lz4", clevel=5, shuffle="shuffle"),)
    t0 = time.perf_counter()
    ds = xr.open_zarr(canonical, chunks={"time": 1, "z": -1}, decode_times=False)
    ds = ds.isel(time=slice(0, ntimes))
    dx = float(ds.attrs["dx"])
    written = []
    for text in scales:
        f = round(float(text.split()[0]) / dx)
        label = label_of(f * dx)
        out: dict[str, xr.DataArray] = {}
        for v in ("qc", "w", "qv", "T", "rh"):
            c = ds[v].astype("float64").coarsen(x=f, y=f)
            out[f"{v}_mean"] = c.mean()
            out[f"{v}_var"] = c.var()
            out[f"{v}_skew"] = c.reduce(skew).fillna(0.0)
        p = ds["p"].astype("float64").coarsen(x=f, y=f).mean()
        out["p_mean"] = p
        out["cloud_fraction"] = ds["cloud_mask"].astype("float64").coarsen(x=f, y=f).mean()
        tc = out["T_mean"] - T0
        e = p * out["qv_mean"] / (EPS + out["qv_mean"])
        es = 611.2 * np.exp(17.67 * tc / (tc + 243.5))
        rh = e / es
        out["rh_of_means"] = rh
        out["drh_dz"] = rh.differentiate("z", edge_order=2)
        capped = rh.clip(rhc, 1.0)
        out["cf_sundqvist"] = (1.0 - np.sqrt((1.0 - capped) / (1.0 - rhc))).clip(0.0, 1.0)
        lwp = ds["lwp"].astype("float64").coarsen(x=f, y=f)
        out["lwp_mean"] = lwp.mean()
        out["lwp_var"] = lwp.var()
        cover = (ds["cloud_mask"] > 0).any("z").astype("float64")
        out["cloud_cover"] = cover.coarsen(x=f, y=f).mean()
        if text in patch_scales:
            d = f // PATCH_SIZE
            for v in ("qc", "w"):
                a = ds[v].astype("float64")
                if d > 1:
                    a = a.coarsen(x=d, y=d).mean()
                a = a.drop_vars(["x", "y"]).coarsen(x=PATCH_SIZE, y=PATCH_SIZE)
                patch = a.construct(x=("x", "px"), y=("y", "py"))
                out[f"{v}_patch"] = patch.transpose("time", "z", "y", "x", "py", "px")
        res = xr.Dataset({k: a.astype("float32") for k, a in out.items()})
        path = Path(outdir) / f"scale-{label}.zarr"
        remove(path)
        res.to_zarr(
            path,
            mode="w",
            zarr_format=3,
            consolidated=True,
            encoding={k: {"compressors": codec} for k in res.data_vars},
        )
        written.append(str(path))
    dt = time.perf_counter() - t0
    nbytes = _canonical_bytes(canonical)
    total_t = ds.sizes["time"]  # after isel
    full_t = xr.open_zarr(canonical, decode_times=False).sizes["time"]
    return {
        "time_s": dt,
        "ntimes": int(total_t),
        "ntimes_case": int(full_t),
        "bytes": int(nbytes * total_t / full_t),
        "out_bytes": sum(dir_bytes(p) for p in written),
    }


def _compare(a: Any, b: Any, *, rtol: float, atol_rel: float, mask: Any = None) -> dict:
    import numpy as np

    a = np.asarray(a, dtype=np.float64)
    b = np.asarray(b, dtype=np.float64)
    if a.shape != b.shape:
        return {"ok": False, "error": f"shapes differ: {a.shape} vs {b.shape}"}
    scale = float(np.nanmax(np.abs(a))) if a.size else 0.0
    atol = atol_rel * scale
    sel = np.ones(a.shape, bool) if mask is None else np.asarray(mask, bool)
    diff = np.abs(a - b)[sel]
    bad = diff > atol + rtol * np.abs(a[sel])
    nan_mismatch = int(np.sum(np.isnan(a[sel]) != np.isnan(b[sel])))
    rel = diff / np.maximum(np.abs(a[sel]), atol if atol > 0 else 1e-300)
    return {
        "ok": bool(not bad.any() and nan_mismatch == 0),
        "compared": int(sel.sum()),
        "mismatched": int(bad.sum()),
        "max_abs": float(np.nanmax(diff)) if diff.size else 0.0,
        "max_rel": float(np.nanmax(rel)) if rel.size else 0.0,
        "rtol": rtol,
        "atol": atol,
    }


def w_check(*, lesprep_dir: str, xarray_dir: str, labels: list[str], ntimes: int) -> dict:
    """lesprep's scale stores vs the xarray script's, variable by variable, first times."""
    import numpy as np
    import zarr

    t0 = time.perf_counter()
    out: dict[str, Any] = {}
    for lab in labels:
        gl = zarr.open_group(str(Path(lesprep_dir) / f"scale-{lab}.zarr"), mode="r")
        gx = zarr.open_group(str(Path(xarray_dir) / f"scale-{lab}.zarr"), mode="r")
        res: dict[str, Any] = {}
        for name in sorted(gx.array_keys()):
            dims = tuple(gl[name].metadata.dimension_names or ()) if name in gl else ()
            if name == "time" or not dims or dims[0] != "time":
                continue
            a = gl[name][:ntimes]
            b = gx[name][:ntimes]
            if name.endswith("_skew"):
                base = name[: -len("_skew")]
                mean = gl[f"{base}_mean"][:ntimes].astype(np.float64)
                var = gl[f"{base}_var"][:ntimes].astype(np.float64)
                # looser tolerance for g1; every cell is compared, and the near-constant
                # blocks (0 < std <= 1e-6 |mean|, where g1 is most sensitive) are counted
                std = np.sqrt(var)
                r = _compare(a, b, rtol=1e-4, atol_rel=1e-6)
                r["near_constant"] = int(np.sum((var > 0) & (std <= 1e-6 * np.abs(mean))))
                r["constant"] = int(np.sum(var == 0))
            else:
                r = _compare(a, b, rtol=1e-5, atol_rel=1e-6)
            res[name] = r
        out[lab] = res
    ok = all(r.get("ok") for res in out.values() for r in res.values())
    return {"time_s": time.perf_counter() - t0, "ok": ok, "scales": out, "ntimes": ntimes}


_CODECS: tuple[tuple[str, dict[str, Any]], ...] = (
    ("none", {"codec": "none"}),
    ("blosc-lz4 1", {"codec": "blosc-lz4", "clevel": 1}),
    ("blosc-lz4 3", {"codec": "blosc-lz4", "clevel": 3}),
    ("blosc-lz4 5", {"codec": "blosc-lz4", "clevel": 5}),
    ("blosc-zstd 1", {"codec": "blosc-zstd", "clevel": 1}),
    ("blosc-zstd 3", {"codec": "blosc-zstd", "clevel": 3}),
    ("blosc-zstd 5", {"codec": "blosc-zstd", "clevel": 5}),
    ("zstd 0", {"codec": "zstd", "clevel": 0}),
    ("zstd 3", {"codec": "zstd", "clevel": 3}),
)


def _store_trial(
    data: Any,
    path: Path,
    *,
    chunks: tuple[int, ...],
    store_cfg: Mapping[str, Any],
    shards: tuple[int, ...] | None = None,
    windows: Sequence[tuple[int, int]] = (),
    level: int | None = None,
    repeat: int = 3,
) -> dict[str, Any]:
    """Write ``data`` to a fresh array and read it back, ``repeat`` times each (fastest kept)."""
    import numpy as np
    import zarr

    _import_lesprep()
    from lesprep.store import StoreSettings, compressors

    writes, reads = [], []
    for _ in range(repeat):
        remove(path)
        t0 = time.perf_counter()
        arr = zarr.create_array(
            store=str(path),
            shape=data.shape,
            chunks=chunks,
            shards=shards,
            dtype=data.dtype,
            compressors=compressors(StoreSettings.from_dict(store_cfg)),
            fill_value=0,
            zarr_format=3,
        )
        arr[...] = data
        writes.append(time.perf_counter() - t0)
    size = dir_bytes(path)
    for _ in range(repeat):
        t0 = time.perf_counter()
        back = zarr.open_array(str(path), mode="r")[...]
        reads.append(time.perf_counter() - t0)
    write_s, read_s = min(writes), min(reads)
    row: dict[str, Any] = {
        "write_s": write_s,
        "read_s": read_s,
        "bytes": int(data.nbytes),
        "stored_bytes": size,
        "ratio": data.nbytes / max(size, 1),
        "files": file_count(path),
        "write_gbps": data.nbytes / 1e9 / write_s,
        "read_gbps": data.nbytes / 1e9 / read_s,
        "lossless": bool(np.array_equal(back, data)),
    }
    del back
    a = zarr.open_array(str(path), mode="r")
    if level is not None:
        times = []
        for _ in range(repeat):
            t0 = time.perf_counter()
            a[0, level]
            times.append(time.perf_counter() - t0)
        row["read_level_s"] = min(times)
    if windows:
        times = []
        for _ in range(repeat):
            t0 = time.perf_counter()
            for lo, hi in windows:
                a[lo:hi]
            times.append(time.perf_counter() - t0)
        row["read_batches_s"] = min(times)
        row["batches"] = len(windows)
    remove(path)
    return row


def w_storage(
    *, canonical: str, scale_store: str, tmp: str, n_samples: int, chunk_mib: float
) -> dict[str, Any]:
    """Codecs, chunk shapes and sharding on the case's own fields and a sample array."""
    import numpy as np
    import zarr

    t0 = time.perf_counter()
    tmpdir = Path(tmp)
    remove(tmpdir)
    tmpdir.mkdir(parents=True)
    g = zarr.open_group(canonical, mode="r")
    nt, nz, ny, nx = g["qc"].shape
    j = nt // 2
    fields = {n: g[n][j : j + 1] for n in ("qc", "w", "T")}
    canon_chunk = g["qc"].chunks
    sc = zarr.open_group(scale_store, mode="r")
    rng = np.random.default_rng(7)
    samples: dict[str, Any] = {}
    for name in ("w_var", "qc_mean", "T_mean"):
        flat = sc[name][...].reshape(-1)
        samples[f"sample {name}"] = flat[rng.integers(0, flat.size, min(n_samples, flat.size))]
    del flat
    codec_rows = []
    for fname, data in {**fields, **samples}.items():
        chunks = canon_chunk if data.ndim == 4 else (min(data.size, int(chunk_mib * MIB) // 4),)
        for cname, cfg in _CODECS:
            row = _store_trial(data, tmpdir / "c.zarr", chunks=chunks, store_cfg=cfg)
            row.update({"field": fname, "codec": cname, "chunks": list(chunks)})
            codec_rows.append(row)
    chunk_rows = []
    default = dict(STORE)
    zc = canon_chunk[1]
    variants = {
        "(1, nz, ny, nx)": (1, nz, ny, nx),
        f"(1, {zc}, ny, nx) lesprep 32 MiB": (1, zc, ny, nx),
        "(1, nz/4, ny, nx)": (1, max(1, nz // 4), ny, nx),
        "(1, 1, ny, nx)": (1, 1, ny, nx),
    }
    for fname in ("qc", "T"):
        for vname, chunks in variants.items():
            row = _store_trial(
                fields[fname], tmpdir / "k.zarr", chunks=chunks, store_cfg=default, level=nz // 2
            )
            row.update({"stage": "canonical", "field": fname, "chunks": vname})
            chunk_rows.append(row)
    coarse = sc["T_mean"][...]
    cnt, cnz, cny, cnx = coarse.shape
    czc = sc["T_mean"].chunks[1]
    cvariants = {
        "(1, nz, ny, nx)": (1, cnz, cny, cnx),
        f"(1, {czc}, ny, nx) lesprep 32 MiB": (1, czc, cny, cnx),
        "(1, nz/4, ny, nx)": (1, max(1, cnz // 4), cny, cnx),
        "(nt, 1, ny, nx)": (cnt, 1, cny, cnx),
    }
    for vname, chunks in cvariants.items():
        row = _store_trial(
            coarse, tmpdir / "k.zarr", chunks=chunks, store_cfg=default, level=cnz // 2
        )
        row.update({"stage": f"coarse {Path(scale_store).name} T_mean", "chunks": vname})
        chunk_rows.append(row)
    del coarse
    shard_rows = []
    small = 8192  # what sets.py picks with 16 x 16 float32 patches in the store (8 MiB / 1 KiB)
    big = int(chunk_mib * MIB) // 4  # what it picks for 1-D features alone
    data = samples["sample w_var"]
    n = data.size
    windows = [(int(lo), int(lo) + small) for lo in rng.integers(0, max(1, n - small), 256)]
    for vname, chunks, shards in (
        (f"chunks {small}", (min(small, n),), None),
        (f"chunks {big}", (min(big, n),), None),
        (f"chunks {small}, shards of 64", (min(small, n),), (min(64 * small, n),)),
        (f"chunks {small}, shards of 256", (min(small, n),), (min(256 * small, n),)),
    ):
        if shards is not None and shards[0] % chunks[0]:
            continue
        row = _store_trial(
            data,
            tmpdir / "s.zarr",
            chunks=chunks,
            store_cfg=default,
            shards=shards,
            windows=windows,
        )
        row.update({"stage": "sample w_var", "layout": vname})
        shard_rows.append(row)
    remove(tmpdir)
    return {
        "time_s": time.perf_counter() - t0,
        "codecs": codec_rows,
        "chunks": chunk_rows,
        "sharding": shard_rows,
        "field_time_index": j,
    }


def w_profile(*, kind: str, params: dict[str, Any], top: int = 25) -> dict[str, Any]:
    """cProfile of ingest_case or coarsen_case (outputs to a scratch place, removed)."""
    import cProfile
    import io
    import pstats

    prof = cProfile.Profile()
    fn = {"ingest": w_ingest, "coarsen": w_coarsen}[kind]
    prof.enable()
    res = fn(**params)
    prof.disable()
    texts = {}
    for key in ("cumulative", "tottime"):
        buf = io.StringIO()
        pstats.Stats(prof, stream=buf).strip_dirs().sort_stats(key).print_stats(top)
        texts[key] = buf.getvalue()
    stats = pstats.Stats(prof)
    phases: dict[str, float] = {}
    wanted = {
        "ingest": (
            "canonical_step",
            "read_field",
            "open_raw",
            "catalogue",
            "check_finite",
            "check_range",
            "cell_diagnostics",
            "value_extent",
            "convert",
            "temperature_from_potential_temperature",
            "destagger_vertical",
            "cloud_mask",
            "apply",
            "add",
            "flush",
            "create_store",
            "file_record",
            "consolidate",
        ),
        "coarsen": (
            "slabs",
            "add_slab",
            "finish",
            "hierarchical_moments",
            "hierarchical_means",
            "extract_patches",
            "relative_humidity",
            "sundqvist_cloud_fraction",
            "vertical_derivative",
            "variance_and_skewness",
            "_layout",
            "create_store",
            "add",
            "flush",
            "consolidate",
        ),
    }[kind]
    for (file, _, func), (_, _, _, ct, _) in stats.stats.items():  # type: ignore[attr-defined]
        if func in wanted and "lesprep" in file:
            key = f"{func} ({Path(file).name})"
            phases[key] = phases.get(key, 0.0) + ct
    astype = sum(
        v[2]
        for (f, _, func), v in stats.stats.items()
        if "astype" in func  # type: ignore
    )
    phases["numpy astype (self)"] = astype
    return {**res, "profile": texts, "phases_cumulative_s": phases}


WORKERS: dict[str, Callable[..., dict[str, Any]]] = {
    "info": w_info,
    "touch": w_touch,
    "generate": w_generate,
    "extend": w_extend,
    "jit_warm": w_jit_warm,
    "ingest": w_ingest,
    "ingest_floor": w_ingest_floor,
    "coarsen": w_coarsen,
    "coarsen_floor": w_coarsen_floor,
    "coarsen_xarray": w_coarsen_xarray,
    "check": w_check,
    "storage": w_storage,
    "profile": w_profile,
}


def worker_main(name: str, params_file: str, result_file: str) -> int:
    """Entry of a worker process: run one step, write its result (with peak memory)."""
    params = json.loads(Path(params_file).read_text())
    base = _status_kib("VmRSS")
    cpu0 = os.times()
    try:
        res = WORKERS[name](**params)
        rc = 0
    except BaseException as exc:  # reported to the parent, which carries on
        res = {"error": f"{type(exc).__name__}: {exc}", "traceback": traceback.format_exc()}
        rc = 1
    cpu1 = os.times()
    import resource

    res["cpu_s"] = (cpu1.user - cpu0.user) + (cpu1.system - cpu0.system)
    res["user_s"] = cpu1.user - cpu0.user
    res["system_s"] = cpu1.system - cpu0.system
    res["peak_rss_mib"] = _status_kib("VmHWM") / 1024
    res["start_rss_mib"] = base / 1024
    ru = resource.getrusage(resource.RUSAGE_SELF)
    res["ru_maxrss_mib"] = ru.ru_maxrss / 1024
    res["minor_faults"] = ru.ru_minflt
    res["major_faults"] = ru.ru_majflt
    Path(result_file).write_text(json.dumps(res, default=str))
    return rc


# =============================================================================== parent


class Runner:
    """Runs workers in fresh processes, keeps every result, writes the JSON as it goes."""

    def __init__(
        self, out: Path, json_path: Path, timeout: float, env: Mapping[str, str] | None = None
    ) -> None:
        self.env = {**os.environ, **dict(env or {})}
        self.out = out
        self.json_path = json_path
        self.timeout = timeout
        self.results: dict[str, Any] = {"steps": {}, "comparisons": {}, "errors": {}}
        self.ipc = out / "ipc"
        self.ipc.mkdir(parents=True, exist_ok=True)

    def save(self) -> None:
        """Write the JSON results (after every step, so a killed run leaves its numbers)."""
        self.json_path.parent.mkdir(parents=True, exist_ok=True)
        self.json_path.write_text(json.dumps(self.results, indent=1, default=str) + "\n")

    def step(
        self,
        key: str,
        worker: str,
        params: Mapping[str, Any],
        *,
        warm_paths: Iterable[str | Path] = (),
        timeout: float | None = None,
        record: bool = True,
    ) -> dict[str, Any]:
        """Run one worker; raise RuntimeError if it fails. The result is kept under ``key``."""
        warm_s = warm(warm_paths)
        t0 = time.perf_counter()
        os.sync()
        sync_before = time.perf_counter() - t0
        pfile = self.ipc / f"{key}.params.json"
        rfile = self.ipc / f"{key}.result.json"
        pfile.write_text(json.dumps(dict(params), default=str))
        remove(rfile)
        cmd = [sys.executable, str(Path(__file__).resolve()), "--worker", worker]
        cmd += ["--params", str(pfile), "--result", str(rfile)]
        print(f"  .. {key} ({worker})", flush=True)
        load0 = os.getloadavg()
        t0 = time.perf_counter()
        try:
            proc = subprocess.run(
                cmd,
                capture_output=True,
                text=True,
                timeout=timeout or self.timeout,
                cwd=ROOT,
                env=self.env,
            )
        except subprocess.TimeoutExpired:
            msg = f"{key}: worker timed out after {timeout or self.timeout:g} s"
            raise RuntimeError(msg) from None
        wall = time.perf_counter() - t0
        if not rfile.exists():
            raise RuntimeError(f"{key}: worker died (rc {proc.returncode}): {proc.stderr[-2000:]}")
        res = json.loads(rfile.read_text())
        res["process_wall_s"] = wall
        res["loadavg_1min_before_after"] = [load0[0], os.getloadavg()[0]]
        res["warm_s"] = warm_s
        res["sync_before_s"] = sync_before
        t0 = time.perf_counter()
        os.sync()
        res["sync_after_s"] = time.perf_counter() - t0
        if record:
            self.results["steps"][key] = res
            self.save()
        if "error" in res:
            raise RuntimeError(f"{key}: {res['error']}\n{res.get('traceback', '')}")
        print(
            f"     {res.get('time_s', float('nan')):9.2f} s   peak RSS "
            f"{res['peak_rss_mib']:8.0f} MiB   (process {wall:.1f} s, user "
            f"{res['user_s']:.1f} s, system {res['system_s']:.1f} s, load "
            f"{load0[0]:.1f})",
            flush=True,
        )
        return res

    def attempt(self, name: str, fn: Callable[[], None]) -> None:
        """Run one comparison; print and keep a failure, then carry on."""
        print(f"\n== {name}", flush=True)
        try:
            fn()
        except Exception as exc:
            msg = f"{type(exc).__name__}: {exc}"
            print(f"!! {name} failed: {msg}", flush=True)
            self.results["errors"][name] = msg
            self.save()


def disk_write_gbps(folder: Path, nbytes: int = 2**30) -> dict[str, float]:
    """Sequential write of ``nbytes`` to ``folder``: into the page cache, and with fsync."""
    folder.mkdir(parents=True, exist_ok=True)
    path = folder / "disk-probe.bin"
    block = os.urandom(8 * MIB)
    t0 = time.perf_counter()
    with open(path, "wb") as fh:
        for _ in range(nbytes // len(block)):
            fh.write(block)
        t_cache = time.perf_counter() - t0
        fh.flush()
        os.fsync(fh.fileno())
    t_sync = time.perf_counter() - t0
    remove(path)
    return {
        "page_cache_write_gbps": nbytes / 1e9 / t_cache,
        "fsync_write_gbps": nbytes / 1e9 / t_sync,
    }


def code_identity() -> dict[str, Any]:
    """Which lesprep code is measured: git HEAD, changed files, a hash of the package source."""
    import hashlib

    digest = hashlib.sha256()
    src = ROOT / "src" / "lesprep"
    for f in sorted(src.glob("*.py")):
        digest.update(f.name.encode() + b"\0" + f.read_bytes())
    out: dict[str, Any] = {"src_sha256": digest.hexdigest()}
    with contextlib.suppress(Exception):
        out["git_head"] = subprocess.run(
            ["git", "rev-parse", "--short", "HEAD"], capture_output=True, text=True, cwd=ROOT
        ).stdout.strip()
        status = subprocess.run(
            ["git", "status", "--porcelain", "--", "src"],
            capture_output=True,
            text=True,
            cwd=ROOT,
        ).stdout
        out["src_uncommitted"] = [line[3:] for line in status.splitlines()]
    return out


def machine_info(out: Path) -> dict[str, Any]:
    """nproc, RAM, CPU model, OS, free disk, disk write speed."""
    info: dict[str, Any] = {"nproc": os.cpu_count(), "platform": platform.platform()}
    with contextlib.suppress(OSError):
        info.update(disk_write_gbps(out))
    info["disk_free_gb"] = shutil.disk_usage(out).free / 1e9
    with contextlib.suppress(OSError):
        for line in Path("/proc/meminfo").read_text().splitlines():
            if line.startswith("MemTotal:"):
                info["ram_gib"] = round(int(line.split()[1]) / 2**20, 1)
    with contextlib.suppress(OSError):
        for line in Path("/proc/cpuinfo").read_text().splitlines():
            if line.startswith("model name"):
                info["cpu"] = line.split(":", 1)[1].strip()
                break
    with contextlib.suppress(Exception):
        info["affinity"] = len(os.sched_getaffinity(0))
    return info


def _fmt(x: Any, spec: str) -> str:
    if x is None or (isinstance(x, float) and not math.isfinite(x)):
        return "-"
    return format(x, spec)


def print_table(headers: Sequence[str], rows: Sequence[Sequence[Any]]) -> str:
    """A plain fixed-width table (also returned as text)."""
    cells = [[str(c) for c in r] for r in rows]
    widths = [
        max(len(h), *(len(r[i]) for r in cells)) if cells else len(h) for i, h in enumerate(headers)
    ]
    lines = [" | ".join(h.ljust(w) for h, w in zip(headers, widths, strict=True))]
    lines.append("-+-".join("-" * w for w in widths))
    for r in cells:
        lines.append(" | ".join(c.ljust(w) for c, w in zip(r, widths, strict=True)))
    text = "\n".join(lines)
    print(text, flush=True)
    return text


# ------------------------------------------------------------------------------- comparisons


@dataclass
class Job:
    """One measured worker run: result key, worker, parameters, inputs to warm, scratch."""

    key: str
    worker: str
    params: dict[str, Any]
    warm: list[Path]
    cleanup: list[Path] = field(default_factory=list)


RUN_FIELDS = ("time_s", "peak_rss_mib", "user_s", "system_s", "minor_faults", "process_wall_s")


class Suite:
    """The comparisons of one run, sharing paths and results."""

    def pair(self, a: Job, b: Job) -> tuple[dict[str, Any], dict[str, Any]]:
        """Run ``a`` and ``b`` side by side ``--repeat`` times (order a b, b a, a b, ...).

        Each side keeps its fastest run, with every run's numbers under ``runs``.
        """
        runs: dict[str, list[dict[str, Any]]] = {a.key: [], b.key: []}
        for i in range(max(1, self.args.repeat)):
            for job in (a, b) if i % 2 == 0 else (b, a):
                res = self.r.step(
                    job.key, job.worker, job.params, warm_paths=job.warm, record=False
                )
                for path in job.cleanup:
                    remove(path)
                runs[job.key].append(res)
        out = []
        for job in (a, b):
            best = dict(min(runs[job.key], key=lambda x: x["time_s"]))
            best["runs"] = [{k: x.get(k) for k in RUN_FIELDS} for x in runs[job.key]]
            self.r.results["steps"][job.key] = best
            out.append(best)
        self.r.save()
        return out[0], out[1]

    def __init__(self, args: argparse.Namespace) -> None:
        self.args = args
        key = f"{args.nx}x{args.ny}x{args.nz}x{args.ntimes}"
        self.data = Path(args.out) / "data" / key
        self.raw_root = self.data / "raw"
        self.raw_dir = self.raw_root / CASE
        self.canonical = self.data / "canonical.zarr"
        self.lesprep_dir = self.data / "lesprep"
        env = dict(kv.split("=", 1) for kv in args.worker_env)
        self.r = Runner(Path(args.out), Path(args.json), args.step_timeout, env)
        self.dx = 50.0  # the demo cases' spacing (lesprep.demo.DemoCase.dx)
        self.scales = scale_texts(args.nx, args.ny, self.dx)
        self.labels = [label_of(float(s.split()[0])) for s in self.scales]
        factors = power_factors(args.nx, args.ny)
        self.patch_scales = [
            f"{L:g} m"
            for L in PATCH_LENGTHS_M
            if round(L / self.dx) in factors and round(L / self.dx) % PATCH_SIZE == 0
        ]
        self.r.results["config"] = {
            "case": CASE,
            "size": {"nx": args.nx, "ny": args.ny, "nz": args.nz, "ntimes": args.ntimes},
            "float32_3d_variable_gb": args.nx * args.ny * args.nz * args.ntimes * 4 / 1e9,
            "scales": self.scales,
            "patch_scales": self.patch_scales,
            "patch_size": PATCH_SIZE,
            "store": STORE,
            "spinup": SPINUP,
            "cloud_threshold": THRESHOLD,
            "data": str(self.data),
            "argv": sys.argv[1:],
            "worker_env": env,
            "repeat": args.repeat,
        }

    # ------------------------------------------------------------------ setup
    def setup(self) -> None:
        a = self.args
        self.r.results["machine"] = machine_info(Path(a.out))
        self.r.results["code"] = code_identity()
        c = self.r.results["code"]
        print(
            f"lesprep code: git {c.get('git_head', '?')}, src sha256 {c['src_sha256'][:12]}, "
            f"uncommitted in src: {c.get('src_uncommitted') or 'none'}"
        )
        info = self.r.step("info", "info", {}, record=False)
        self.r.results["versions"] = {k: v for k, v in info.items() if isinstance(v, str)}
        self.r.results["machine"]["numba_threads"] = info.get("numba_threads")
        time.sleep(20)  # let freed pages go back to the host, as between real jobs
        touch = self.r.step("touch", "touch", {"gib": 2.0}, record=False)
        for k in ("first_touch_gbps", "second_touch_gbps", "rewrite_gbps"):
            self.r.results["machine"][f"memory_{k}"] = touch[k]
        m, v = self.r.results["machine"], self.r.results["versions"]
        print(
            f"machine: {m.get('nproc')} CPUs ({m.get('cpu', '?')}), {m.get('ram_gib')} GiB RAM, "
            f"disk {m.get('disk_free_gb', 0):.0f} GB free, sequential write "
            f"{m.get('page_cache_write_gbps', 0):.2f} GB/s to the page cache, "
            f"{m.get('fsync_write_gbps', 0):.2f} GB/s with fsync; fresh memory first touched at "
            f"{m.get('memory_first_touch_gbps', 0):.2f} GB/s, touched again at "
            f"{m.get('memory_second_touch_gbps', 0):.2f} GB/s"
        )
        print("versions: " + ", ".join(f"{k} {val}" for k, val in v.items()), flush=True)
        res = self.r.step(
            "generate",
            "generate",
            {
                "nx": a.nx,
                "ny": a.ny,
                "nz": a.nz,
                "ntimes": a.ntimes,
                "root": str(self.raw_root),
                "skip": a.skip_generate,
            },
            timeout=max(3600.0, 80.0 * a.ntimes * (a.nx * a.ny * a.nz) / (512 * 512 * 160)),
        )
        print(f"     archive {'reused' if res.get('cached') else 'generated'}: {self.raw_dir}")
        self.files = raw_files(self.raw_dir)
        self.raw_size = sum(Path(f).stat().st_size for f in self.files)
        self.r.results["config"]["raw_files"] = len(self.files)
        self.r.results["config"]["raw_gb"] = self.raw_size / 1e9
        self.r.step("jit_warm", "jit_warm", {})

    # ------------------------------------------------------------------ 3: ingest
    def ingest(self) -> None:
        r = self.r
        floor_out = self.data / "floor-canonical.zarr"
        les, floor = self.pair(
            Job(
                "ingest_lesprep",
                "ingest",
                {"files": self.files, "out": str(self.canonical)},
                [self.raw_dir],
            ),
            Job(
                "ingest_floor",
                "ingest_floor",
                {"files": self.files, "canonical": str(self.canonical), "out": str(floor_out)},
                [self.raw_dir],
                cleanup=[floor_out],
            ),
        )
        r.results["comparisons"]["ingest_vs_floor"] = {
            "ratio": les["time_s"] / floor["time_s"],
            "target": f"<= {TARGETS['ingest_floor']}",
            "met": les["time_s"] / floor["time_s"] <= TARGETS["ingest_floor"],
        }
        r.save()

    # ------------------------------------------------------------------ 1, 2: coarsen
    def coarsen(self) -> None:
        r = self.r
        if not (self.canonical / "zarr.json").exists():
            raise RuntimeError(f"no canonical store at {self.canonical}; run the ingest step")
        floor_dir = self.data / "floor-scales"
        les, floor = self.pair(
            Job(
                "coarsen_lesprep",
                "coarsen",
                {
                    "canonical": str(self.canonical),
                    "outdir": str(self.lesprep_dir),
                    "scales": self.scales,
                    "patch_scales": self.patch_scales,
                },
                [self.canonical],
            ),
            Job(
                "coarsen_floor",
                "coarsen_floor",
                {
                    "canonical": str(self.canonical),
                    "lesprep_dir": str(self.lesprep_dir),
                    "labels": self.labels,
                    "out": str(floor_dir),
                },
                [self.canonical],
                cleanup=[floor_dir],
            ),
        )
        r.results["comparisons"]["coarsen_vs_floor"] = {
            "ratio": les["time_s"] / floor["time_s"],
            "target": f"<= {TARGETS['coarsen_floor']}",
            "met": les["time_s"] / floor["time_s"] <= TARGETS["coarsen_floor"],
        }
        r.save()

    def xarray(self) -> None:
        r = self.r
        a = self.args
        les = r.results["steps"].get("coarsen_lesprep")
        if les is None or "error" in les:
            raise RuntimeError("needs the lesprep coarsening step of this run")
        xdir = self.data / "xarray"
        params = {
            "canonical": str(self.canonical),
            "outdir": str(xdir),
            "scales": self.scales,
            "patch_scales": self.patch_scales,
        }
        nt = a.ntimes
        k = min(nt, a.xr_times or 1)
        key = "coarsen_xarray" if a.xr_times or k == nt else "coarsen_xarray_pilot"
        runs = [
            r.step(key, "coarsen_xarray", {**params, "ntimes": k}, warm_paths=[self.canonical])
            for _ in range(max(1, a.repeat) if k < nt else 1)
        ]
        res = dict(min(runs, key=lambda x: x["time_s"]))
        if len(runs) > 1:
            res["runs"] = [{f: x.get(f) for f in RUN_FIELDS} for x in runs]
        r.results["steps"][key] = res
        if key == "coarsen_xarray_pilot":
            if res["time_s"] * nt / k <= a.xr_budget:
                res = r.step(
                    "coarsen_xarray",
                    "coarsen_xarray",
                    {**params, "ntimes": nt},
                    warm_paths=[self.canonical],
                )
            else:
                r.results["steps"]["coarsen_xarray"] = res
        k = res["ntimes"]
        full = res["time_s"] * nt / k
        res["time_full_s"] = full
        res["extrapolated"] = k < nt
        res["note"] = (
            f"measured on {k} of {nt} times, scaled x{nt / k:g}" if k < nt else "all times"
        )
        chk = r.step(
            "check_xarray_vs_lesprep",
            "check",
            {
                "lesprep_dir": str(self.lesprep_dir),
                "xarray_dir": str(xdir),
                "labels": sorted(
                    {
                        self.labels[0],
                        self.labels[-1],
                        *(label_of(float(s.split()[0])) for s in self.patch_scales),
                    },
                    key=lambda s: float(s[:-1]),
                ),
                "ntimes": k,
            },
        )
        if not a.keep:
            remove(xdir)
        speedup = full / les["time_s"]
        r.results["comparisons"]["xarray_vs_lesprep"] = {
            "ratio": speedup,
            "target": f">= {TARGETS['xarray_speedup']}",
            "met": speedup >= TARGETS["xarray_speedup"],
            "same_numbers": chk["ok"],
            "note": res["note"],
        }
        r.save()
        self._print_check(chk)

    def _print_check(self, chk: Mapping[str, Any]) -> None:
        by_var: dict[str, list[tuple[str, dict[str, Any]]]] = {}
        for lab, res in chk["scales"].items():
            for name, c in res.items():
                by_var.setdefault(name, []).append((lab, c))
        rows = []
        for name, items in sorted(by_var.items()):
            cs = [c for _, c in items]
            bad = [lab for lab, c in items if not c.get("ok")]
            rows.append(
                [
                    name,
                    " ".join(lab for lab, _ in items),
                    "yes" if not bad else "NO at " + " ".join(bad),
                    sum(c.get("compared", 0) for c in cs),
                    sum(c.get("mismatched", 0) for c in cs),
                    _fmt(max(c.get("max_abs", 0.0) for c in cs), ".2e"),
                    _fmt(max(c.get("max_rel", 0.0) for c in cs), ".2e"),
                    f"rtol {cs[0].get('rtol')}"
                    + (
                        f"; incl. {sum(c['constant'] for c in cs)} constant and "
                        f"{sum(c['near_constant'] for c in cs)} near-constant blocks"
                        if "constant" in cs[0]
                        else ""
                    ),
                ]
            )
        print(f"\nlesprep vs xarray script on the first {chk.get('ntimes', '?')} time(s):")
        text = print_table(
            ["variable", "scales", "same", "cells", "differ", "max |diff|", "max rel", "test"],
            rows,
        )
        self.r.results["check_table"] = text

    # ------------------------------------------------------------------ 4: memory
    def memory(self) -> None:
        r = self.r
        a = self.args
        mode = a.memory_mode
        if mode == "auto":
            free = shutil.disk_usage(self.data).free
            extra = 3 * self.raw_size
            mode = "extend" if extra <= a.mem_extend_max_gb * 1e9 and 4 * extra < free else "subset"
        mdir = self.data / "memory"
        remove(mdir)
        mdir.mkdir(parents=True)
        steps = r.results["steps"]
        if "ingest_lesprep" not in steps or "coarsen_lesprep" not in steps:
            raise RuntimeError("needs the ingest and coarsening steps of this run")
        cparams = {"scales": self.scales, "patch_scales": self.patch_scales}
        if mode == "extend":
            ext = r.step(
                "memory_extend_archive",
                "extend",
                {
                    "files": self.files,
                    "out": str(mdir / "raw"),
                    "copies": 4,
                },
            )
            other_files = ext["files"]
        else:
            other_files = self.files[: max(1, len(self.files) // 4)]
        canon2 = mdir / "canonical.zarr"
        ing = r.step(
            "memory_ingest",
            "ingest",
            {"files": other_files, "out": str(canon2)},
            warm_paths=other_files,
        )
        co = r.step(
            "memory_coarsen",
            "coarsen",
            {"canonical": str(canon2), "outdir": str(mdir / "scales"), **cparams},
            warm_paths=[canon2],
        )
        n_main, n_other = len(self.files), len(other_files)
        out = {}
        for what, main, other in (
            ("ingest", steps["ingest_lesprep"], ing),
            ("coarsen", steps["coarsen_lesprep"], co),
        ):
            small, big = (main, other) if n_other > n_main else (other, main)
            nsmall, nbig = (n_main, n_other) if n_other > n_main else (n_other, n_main)
            growth = big["peak_rss_mib"] / small["peak_rss_mib"] - 1
            out[what] = {
                "ntimes": [nsmall, nbig],
                "peak_rss_mib": [small["peak_rss_mib"], big["peak_rss_mib"]],
                "time_s": [small["time_s"], big["time_s"]],
                "growth": growth,
                "ratio": 1 + growth,
                "target": f"< {1 + TARGETS['memory_growth']:.2f} for 4x times",
                "met": growth < TARGETS["memory_growth"],
                "mode": mode,
                "note": f"{nsmall} vs {nbig} times ({mode})",
            }
            r.results["comparisons"][f"memory_{what}"] = out[what]
            steps[f"memory_{what}"]["note"] = f"{n_other} times (main runs: {n_main})"
        r.save()
        if not a.keep:
            remove(mdir)

    # ------------------------------------------------------------------ 5: storage
    def storage(self) -> None:
        r = self.r
        finest = self.lesprep_dir / f"scale-{self.labels[0]}.zarr"
        res = r.step(
            "storage",
            "storage",
            {
                "canonical": str(self.canonical),
                "scale_store": str(finest),
                "tmp": str(self.data / "storage-tmp"),
                "n_samples": self.args.samples,
                "chunk_mib": 8.0,
            },
            warm_paths=[self.canonical],
        )
        self._print_storage(res)

    def _print_storage(self, res: Mapping[str, Any]) -> None:
        print("\nCodecs (chunks as the stage writes them; GB/s of uncompressed bytes)")
        rows = [
            [
                c["field"],
                c["codec"],
                _fmt(c["ratio"], ".2f"),
                _fmt(c["stored_bytes"] / MIB, ".1f"),
                _fmt(c["write_s"], ".3f"),
                _fmt(c["read_s"], ".3f"),
                _fmt(c["write_gbps"], ".2f"),
                _fmt(c["read_gbps"], ".2f"),
            ]
            for c in res["codecs"]
        ]
        t1 = print_table(
            ["field", "codec", "ratio", "MiB", "write s", "read s", "write GB/s", "read GB/s"],
            rows,
        )
        print("\nChunk shapes (blosc-lz4 5)")
        rows = [
            [
                c["stage"] + (f" {c['field']}" if "field" in c else ""),
                c["chunks"],
                _fmt(c["ratio"], ".2f"),
                c["files"],
                _fmt(c["write_s"], ".3f"),
                _fmt(c["read_s"], ".3f"),
                _fmt(c.get("read_level_s"), ".4f"),
            ]
            for c in res["chunks"]
        ]
        t2 = print_table(
            ["stage", "chunks", "ratio", "files", "write s", "read all s", "read 1 level s"],
            rows,
        )
        print("\nSample store layouts (1-D, blosc-lz4 5, random 8192-sample batches)")
        rows = [
            [
                c["layout"],
                c["files"],
                _fmt(c["ratio"], ".2f"),
                _fmt(c["write_s"], ".3f"),
                _fmt(c["read_s"], ".3f"),
                _fmt(c.get("read_batches_s"), ".3f"),
                c.get("batches", "-"),
            ]
            for c in res["sharding"]
        ]
        t3 = print_table(
            ["layout", "files", "ratio", "write s", "read all s", "batches s", "batches"], rows
        )
        self.r.results["storage_tables"] = "\n\n".join((t1, t2, t3))
        self.r.save()

    # ------------------------------------------------------------------ profiles
    def profile(self) -> None:
        r = self.r
        pdir = self.data / "profile"
        remove(pdir)
        for kind, params, warm_paths in (
            ("ingest", {"files": self.files, "out": str(pdir / "canonical.zarr")}, [self.raw_dir]),
            (
                "coarsen",
                {
                    "canonical": str(self.canonical),
                    "outdir": str(pdir / "scales"),
                    "scales": self.scales,
                    "patch_scales": self.patch_scales,
                },
                [self.canonical],
            ),
        ):
            res = r.step(
                f"profile_{kind}",
                "profile",
                {"kind": kind, "params": params},
                warm_paths=warm_paths,
                timeout=2 * self.r.timeout,
            )
            text = res["profile"]["cumulative"]
            (Path(self.args.out) / f"profile-{kind}.txt").write_text(
                text + "\n\n" + res["profile"]["tottime"]
            )
            print(f"\nprofile of {kind}_case under cProfile ({res['time_s']:.1f} s):")
            phases = sorted(res["phases_cumulative_s"].items(), key=lambda kv: -kv[1])
            print_table(
                ["function (cumulative, main thread)", "s", "share"],
                [[k, _fmt(v, ".2f"), _fmt(v / res["time_s"], ".0%")] for k, v in phases],
            )
            remove(pdir)

    # ------------------------------------------------------------------ summary
    def summary(self) -> None:
        r = self.r
        steps = r.results["steps"]
        comps = r.results["comparisons"]

        def row(key: str, label: str, ref: str | None, time_key: str = "time_s") -> list:
            s = steps.get(key)
            if not s or "error" in s:
                return [label, "failed" if s else "not run", "-", "-", "-", "-", "-", ""]
            t = s.get(time_key, s["time_s"])
            ratio = "1.00"
            if ref and ref in steps and "error" not in steps[ref]:
                ratio = _fmt(t / steps[ref]["time_s"], ".2f")
            gbps = s["bytes"] / 1e9 / s["time_s"] if s.get("bytes") else None
            parts = [s["note"]] if s.get("note") else []
            if "read_s" in s:
                parts.append(f"read {s['read_s']:.1f} s + write {s['write_s']:.1f} s")
            if len(s.get("runs", [])) > 1:
                times = ", ".join(f"{x['time_s']:.1f}" for x in s["runs"])
                peaks = ", ".join(f"{x['peak_rss_mib']:.0f}" for x in s["runs"])
                parts.append(f"fastest of {len(s['runs'])} runs: {times} s; peaks {peaks} MiB")
            note = "; ".join(parts)
            return [
                label,
                _fmt(t, ".1f"),
                ratio,
                _fmt(s["peak_rss_mib"], ".0f"),
                _fmt(gbps, ".3f"),
                _fmt(s.get("user_s"), ".0f"),
                _fmt(s.get("system_s"), ".0f"),
                note,
            ]

        nt = self.args.ntimes
        rows = [
            row("generate", "generate demo archive", None),
            row("ingest_lesprep", "ingest: lesprep ingest_case", None),
            row("ingest_floor", "ingest: I/O floor", "ingest_lesprep"),
            row("coarsen_lesprep", f"coarsen: lesprep ({len(self.scales)} scales)", None),
            row("coarsen_floor", "coarsen: I/O floor", "coarsen_lesprep"),
            row("coarsen_xarray", "coarsen: xarray script", "coarsen_lesprep", "time_full_s"),
            row("memory_ingest", "memory: ingest, other length", "ingest_lesprep"),
            row("memory_coarsen", "memory: coarsen, other length", "coarsen_lesprep"),
            row("storage", "storage trials", None),
            row("profile_ingest", "ingest under cProfile", "ingest_lesprep"),
            row("profile_coarsen", "coarsen under cProfile", "coarsen_lesprep"),
        ]
        c = r.results["config"]
        print(
            f"\n==== Results: {c['size']['nx']} x {c['size']['ny']} x {c['size']['nz']}, "
            f"{nt} times ({c['float32_3d_variable_gb']:.2f} GB per float32 3-D variable; raw "
            f"archive {c.get('raw_gb', float('nan')):.2f} GB)"
        )
        print("ratio = time / time of the lesprep step of the same group; GB/s = uncompressed")
        print("input bytes (raw variables for ingest, canonical variables read for coarsening)")
        print("per second; user/sys = CPU seconds of the worker (all threads) in user code and in")
        print("the kernel (mostly page faults of freshly allocated memory).")
        t1 = print_table(
            ["step", "time s", "ratio", "peak RSS MiB", "GB/s", "user s", "sys s", "note"], rows
        )
        trows = []
        names = {
            "xarray_vs_lesprep": "xarray script time / lesprep coarsen time",
            "coarsen_vs_floor": "lesprep coarsen / coarsen I/O floor",
            "ingest_vs_floor": "lesprep ingest / ingest I/O floor",
            "memory_ingest": "ingest peak RSS, 4x times / 1x",
            "memory_coarsen": "coarsen peak RSS, 4x times / 1x",
        }
        for key, label in names.items():
            cmp_ = comps.get(key)
            if cmp_ is None:
                trows.append([label, "-", "-", "not measured", ""])
                continue
            note = cmp_.get("note", "")
            if key == "xarray_vs_lesprep":
                note += "; same numbers: " + ("yes" if cmp_.get("same_numbers") else "NO")
            if key.startswith("memory"):
                p = cmp_["peak_rss_mib"]
                note += f"; {p[0]:.0f} -> {p[1]:.0f} MiB"
                if cmp_["ntimes"][1] != 4 * cmp_["ntimes"][0]:
                    note += f" (times x{cmp_['ntimes'][1] / cmp_['ntimes'][0]:g})"
            trows.append(
                [
                    label,
                    _fmt(cmp_["ratio"], ".2f"),
                    cmp_["target"],
                    "MET" if cmp_["met"] else "MISSED",
                    note,
                ]
            )
        print()
        t2 = print_table(["target", "ratio", "target", "result", "note"], trows)
        if r.results["errors"]:
            print(
                "\nfailures: "
                + "; ".join(f"{k}: {v[:200]}" for k, v in r.results["errors"].items())
            )
        r.results["tables"] = {"steps": t1, "targets": t2}
        r.save()
        print(f"\nJSON: {r.json_path}")


# =============================================================================== main


def parse_args(argv: Sequence[str] | None = None) -> argparse.Namespace:
    p = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    p.add_argument("--nx", type=int, default=None)
    p.add_argument("--ny", type=int, default=None)
    p.add_argument("--nz", type=int, default=None)
    p.add_argument("--ntimes", type=int, default=None)
    p.add_argument("--quick", action="store_true", help="256 x 256 x 80, 6 times")
    p.add_argument("--out", default=str(HERE / "out"), help="data, profiles and results")
    p.add_argument("--json", default=None, help="results JSON (default: <out>/results.json)")
    p.add_argument("--skip-generate", action="store_true", help="use the archive as it is")
    p.add_argument(
        "--only",
        default="ingest,coarsen,xarray,memory,storage,profile",
        help="comma-separated subset of: ingest, coarsen, xarray, memory, storage, profile",
    )
    p.add_argument("--step-timeout", type=float, default=1200.0, help="seconds per worker")
    p.add_argument(
        "--repeat",
        type=int,
        default=2,
        help="runs of each side of the ingest and coarsening pairs (fastest kept)",
    )
    p.add_argument(
        "--xr-budget",
        type=float,
        default=600.0,
        help="run the xarray script on all times only if 1 time x ntimes fits in this (s)",
    )
    p.add_argument("--xr-times", type=int, default=0, help="force the xarray script's times")
    p.add_argument(
        "--memory-mode",
        choices=("auto", "extend", "subset"),
        default="auto",
        help="extend: a 4x longer archive of copied files; subset: ntimes/4 of the files",
    )
    p.add_argument("--mem-extend-max-gb", type=float, default=8.0)
    p.add_argument(
        "--worker-env",
        action="append",
        default=[],
        metavar="KEY=VALUE",
        help="extra environment of the worker processes (e.g. glibc MALLOC_* tunables)",
    )
    p.add_argument("--samples", type=int, default=2**24, help="values of the 1-D sample array")
    p.add_argument("--keep", action="store_true", help="keep the xarray and memory outputs")
    p.add_argument("--worker", default=None, help=argparse.SUPPRESS)
    p.add_argument("--params", default=None, help=argparse.SUPPRESS)
    p.add_argument("--result", default=None, help=argparse.SUPPRESS)
    a = p.parse_args(argv)
    base = (256, 256, 80, 6) if a.quick else (512, 512, 160, 12)
    for name, default in zip(("nx", "ny", "nz", "ntimes"), base, strict=True):
        if getattr(a, name) is None:
            setattr(a, name, default)
    if a.json is None:
        a.json = str(Path(a.out) / "results.json")
    return a


def main(argv: Sequence[str] | None = None) -> int:
    args = parse_args(argv)
    if args.worker:
        return worker_main(args.worker, args.params, args.result)
    Path(args.out).mkdir(parents=True, exist_ok=True)
    gi = Path(args.out) / ".gitignore"
    if not gi.exists():
        gi.write_text("*\n")
    suite = Suite(args)
    t0 = time.perf_counter()
    print(
        f"lesprep benchmarks: {args.nx} x {args.ny} x {args.nz}, {args.ntimes} times -> "
        f"{suite.data}",
        flush=True,
    )
    try:
        suite.setup()
    except Exception as exc:
        print(f"!! setup failed: {exc}")
        suite.r.results["errors"]["setup"] = str(exc)
        suite.r.save()
        return 1
    only = {s.strip() for s in args.only.split(",") if s.strip()}
    plan = [
        ("ingest", "3. ingest vs its I/O floor", suite.ingest),
        ("coarsen", "2. coarsening vs its I/O floor", suite.coarsen),
        ("xarray", "1. coarsening vs a hand-written xarray script", suite.xarray),
        ("memory", "4. peak memory vs run length", suite.memory),
        ("storage", "5. storage choices", suite.storage),
        ("profile", "profiles (cProfile) of ingest_case and coarsen_case", suite.profile),
    ]
    for key, title, fn in plan:
        if key in only:
            suite.r.attempt(title, fn)
    suite.r.results["total_s"] = time.perf_counter() - t0
    end = code_identity()
    if end["src_sha256"] != suite.r.results.get("code", {}).get("src_sha256"):
        print("!! lesprep's source changed during the run: the steps measured mixed versions")
        suite.r.results["code_at_end"] = end
    suite.summary()
    print(f"total {suite.r.results['total_s'] / 60:.1f} min")
    return 0


if __name__ == "__main__":
    sys.exit(main())
