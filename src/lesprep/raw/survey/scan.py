"""Scanning raw NetCDF files (read-only) and guessing the role of each dimension."""

from __future__ import annotations

from collections.abc import Iterable, Sequence
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import netCDF4
import numpy as np
import pandas as pd

from lesprep.errors import InputError
from lesprep.raw.archive import parse_time_units
from lesprep.raw.survey.records import DimInfo, TimeAxisInfo

_TIME_NAMES = {"time", "t", "times"}
_Z_NAMES = {"height", "hgt", "lev", "level", "levels", "alt", "altitude", "nz"}
_BOUNDS_DIMS = {"nv", "bnds", "bounds", "nb", "nbnd", "two", "vertices"}


# --------------------------------------------------------------------------- reading


def attr_text(value: Any) -> str | None:
    """An attribute value as stripped text, or None when empty or absent."""
    if value is None:
        return None
    if isinstance(value, bytes):
        value = value.decode("utf-8", "replace")
    text = str(value).strip()
    return text or None


def expand_paths(paths: Iterable[str | Path]) -> list[Path]:
    """Files and shell globs expanded to a sorted list of files (InputError if none)."""
    out: list[Path] = []
    for p in paths:
        path = Path(p)
        if path.is_dir():
            out.extend(sorted(q for q in path.glob("*.nc") if q.is_file()))
        else:
            out.append(path)
    if not out:
        raise InputError(
            "no file to inspect",
            hint="pass NetCDF files or a folder holding *.nc files",
        )
    missing = [str(p) for p in out if not p.is_file()]
    if missing:
        raise InputError(
            f"not a file: {missing[:3]}{' ...' if len(missing) > 3 else ''}",
            file=missing[0],
            hint="check the paths",
        )
    return out


@dataclass
class Scan:
    """Everything read from the files: variables, dimension sizes, 1-D coordinate values."""

    vars: dict[str, dict[str, Any]] = field(default_factory=dict)
    dim_sizes: dict[str, set[int]] = field(default_factory=dict)
    unlimited: set[str] = field(default_factory=set)
    coord_values: dict[str, np.ndarray] = field(default_factory=dict)
    notes: list[str] = field(default_factory=list)


def scan_files(files: Sequence[Path]) -> Scan:
    """Read the metadata (and 1-D coordinate values) of every file, read-only."""
    scan = Scan()
    for path in files:
        try:
            nc = netCDF4.Dataset(str(path), mode="r")
        except Exception as exc:  # netCDF4 raises OSError, RuntimeError, ...
            raise InputError(
                f"cannot be read as NetCDF ({type(exc).__name__}: {exc})",
                file=str(path),
                hint="the file may be truncated, corrupt or not NetCDF",
            ) from None
        try:
            nc.set_auto_maskandscale(True)
            for name, dim in nc.dimensions.items():
                scan.dim_sizes.setdefault(str(name), set()).add(len(dim))
                if dim.isunlimited():
                    scan.unlimited.add(str(name))
            for name, var in nc.variables.items():
                name = str(name)
                attrs = {k: var.getncattr(k) for k in var.ncattrs()}
                dims = tuple(map(str, var.dimensions))
                entry = scan.vars.setdefault(
                    name,
                    {
                        "files": [],
                        "dims": dims,
                        "shape": tuple(var.shape),
                        "dtype": str(var.dtype),
                        "attrs": attrs,
                        "values": [],
                    },
                )
                if entry["dims"] != dims:
                    scan.notes.append(
                        f"{name!r} has dims {list(dims)} in {path.name} but "
                        f"{list(entry['dims'])} in {Path(entry['files'][0]).name}"
                    )
                entry["files"].append(str(path))
                if len(dims) == 1 and dims[0] in nc.dimensions:
                    values = np.ma.filled(np.ma.asarray(var[...]).astype(np.float64), np.nan)
                    entry["values"].append(values.reshape(-1))
                    scan.coord_values.setdefault(name, values.reshape(-1))
        finally:
            nc.close()
    return scan


# --------------------------------------------------------------------------- dims


def _coordinate_of(dim: str, scan: Scan) -> str | None:
    if dim in scan.vars and scan.vars[dim]["dims"] == (dim,):
        return dim
    for name, v in scan.vars.items():
        attrs = v["attrs"]
        if v["dims"] == (dim,) and (
            "axis" in attrs or "standard_name" in attrs or "positive" in attrs
        ):
            return name
    return None


def _dim_base(dim: str, coord: str | None, scan: Scan) -> tuple[str | None, str]:
    """Role without staggering (time, z, y, x) and why, or (None, why)."""
    attrs = scan.vars[coord]["attrs"] if coord else {}
    axis = (attr_text(attrs.get("axis")) or "").upper()
    std = (attr_text(attrs.get("standard_name")) or "").lower()
    units = (attr_text(attrs.get("units")) or "").lower()
    where = f"coordinate {coord}" if coord else "no coordinate variable"
    if axis in ("T", "Z", "Y", "X"):
        return {"T": "time", "Z": "z", "Y": "y", "X": "x"}[axis], f"{where}, axis {axis}"
    if std == "time" or " since " in f" {units} ":
        return "time", f"{where}, " + (f"units {units!r}" if "since" in units else "standard_name")
    if std in ("height", "altitude", "model_level_number") or std.startswith("height_above"):
        return "z", f"{where}, standard_name {std}"
    if std in ("projection_x_coordinate", "grid_longitude", "longitude"):
        return "x", f"{where}, standard_name {std}"
    if std in ("projection_y_coordinate", "grid_latitude", "latitude"):
        return "y", f"{where}, standard_name {std}"
    if attr_text(attrs.get("positive")):
        return "z", f"{where}, positive {attrs['positive']!r}"
    low = dim.lower()
    if low in _BOUNDS_DIMS:
        return None, "bounds dimension"
    if low in _TIME_NAMES:
        return "time", f"{where}, name"
    if low.startswith("z") or low in _Z_NAMES or "height" in low:
        return "z", f"{where}, name"
    if low.startswith("x") or low.startswith("lon"):
        return "x", f"{where}, name"
    if low.startswith("y") or low.startswith("lat"):
        return "y", f"{where}, name"
    if dim in scan.unlimited:
        return "time", f"{where}, unlimited dimension"
    return None, f"{where}; role not recognised"


def _brackets(faces: np.ndarray | None, centres: np.ndarray | None) -> bool | None:
    if faces is None or centres is None or faces.size != centres.size + 1:
        return None
    f, c = np.asarray(faces, dtype=np.float64), np.asarray(centres, dtype=np.float64)
    if f[0] > f[-1]:
        f, c = f[::-1], c[::-1]
    return bool(np.all(f[:-1] < c) and np.all(c < f[1:]))


def _half_cell_apart(a: np.ndarray | None, b: np.ndarray | None) -> bool:
    """Same size, uniform, same spacing and offset by half a cell (1 % of dx)."""
    if a is None or b is None or a.size != b.size or a.size < 2:
        return False
    da, db = np.diff(a), np.diff(b)
    dx = float(np.mean(da))
    tol = 0.01 * abs(dx)
    return bool(
        dx > 0
        and np.all(np.abs(da - dx) <= tol)
        and np.all(np.abs(db - dx) <= tol)
        and abs(abs(float(b[0] - a[0])) - 0.5 * dx) <= tol
    )


def _periodic_faces(
    group: list[str], coords: dict[str, str | None], scan: Scan, used: dict[str, int]
) -> list[tuple[str, str]]:
    """(centres, faces) for two horizontal dims of one size half a cell apart: n faces of
    a periodic axis. The dim more fields use holds the centres; a tie decides nothing."""
    if len(group) != 2:
        return []
    a, b = group
    va, vb = (scan.coord_values.get(coords[d] or "") for d in (a, b))
    if not _half_cell_apart(va, vb) or used.get(a, 0) == used.get(b, 0):
        return []
    return [(a, b)] if used.get(a, 0) > used.get(b, 0) else [(b, a)]


def _usage(scan: Scan) -> dict[str, int]:
    used: dict[str, int] = {}
    for v in scan.vars.values():
        if len(v["dims"]) >= 3:
            for d in v["dims"]:
                used[d] = used.get(d, 0) + 1
    return used


def dimension_roles(
    scan: Scan, sizes: dict[str, int]
) -> tuple[dict[str, DimInfo], dict[str, str], list[str]]:
    """Role of every dimension (time, z, y, x or a face axis), the staggered pairs and notes."""
    notes: list[str] = []
    coords = {d: _coordinate_of(d, scan) for d in scan.dim_sizes}
    base = {d: _dim_base(d, coords[d], scan) for d in scan.dim_sizes}
    role: dict[str, str | None] = {d: b for d, (b, _) in base.items()}
    reason = {d: why for d, (_, why) in base.items()}
    staggered: dict[str, str] = {}
    used = _usage(scan)
    for axis in ("time", "z", "y", "x"):
        group = [d for d in scan.dim_sizes if role[d] == axis]
        if len(group) < 2:
            continue
        pairs = [(c, f) for c in group for f in group if sizes[f] == sizes[c] + 1]
        if axis in ("y", "x") and not pairs:
            pairs = _periodic_faces(group, coords, scan, used)
        if axis != "time" and len(pairs) == 1:
            c, f = pairs[0]
            role[f] = f"{axis}_face"
            staggered[f] = c
            check = _brackets(
                scan.coord_values.get(coords[f] or ""), scan.coord_values.get(coords[c] or "")
            )
            tail = {
                True: "; its points bracket the centres",
                False: "; CHECK: its points do not bracket the centres",
                None: "",
            }[check]
            if sizes[f] == sizes[c] + 1:
                reason[f] += f"; one more point than {c} ({sizes[f]} vs {sizes[c]}): faces{tail}"
            else:
                reason[f] += (
                    f"; as many points as {c} ({sizes[f]}), half a cell off, used by fewer "
                    "fields: the faces of a periodic axis"
                )
            rest = [d for d in group if d not in (c, f)]
        else:
            keep = max(group, key=lambda d: (used.get(d, 0), -group.index(d)))
            rest = [d for d in group if d != keep]
        for d in rest:
            role[d] = None
            reason[d] += f"; another {axis} dimension was chosen"
            notes.append(
                f"dimensions {group} all look like {axis}; {d!r} was left unmapped (no "
                f"{axis} variable may use it)"
            )
    dims = {
        d: DimInfo(
            name=d,
            size=sizes[d],
            role=role[d],
            coordinate=coords[d],
            reason=reason[d],
            unlimited=d in scan.unlimited,
        )
        for d in scan.dim_sizes
    }
    for axis in ("time", "z", "y", "x"):
        if not any(di.role == axis for di in dims.values()):
            notes.append(f"no dimension was recognised as {axis}; map it by hand in 'dims:'")
    return dims, staggered, notes


# --------------------------------------------------------------------------- time


def time_axis_of(
    scan: Scan, dims: dict[str, DimInfo], notes: list[str]
) -> tuple[TimeAxisInfo | None, int | None]:
    """The time axis: its variable, units, origin and the output times across the files."""
    tdim = next((d for d in dims.values() if d.role == "time"), None)
    if tdim is None or tdim.coordinate is None:
        if tdim is not None:
            notes.append(f"time dimension {tdim.name!r} has no coordinate variable")
        return None, None
    var = scan.vars[tdim.coordinate]
    units = attr_text(var["attrs"].get("units"))
    per_file: list[tuple[np.ndarray, pd.Timestamp | None]] = []
    try:
        factor, _ = parse_time_units(units, case="", file=var["files"][0], variable=tdim.coordinate)
        for f, values in zip(var["files"], var["values"], strict=True):
            _, ref = parse_time_units(units, case="", file=f, variable=tdim.coordinate)
            per_file.append((values * factor, ref))
    except InputError as exc:
        notes.append(f"time coordinate {tdim.coordinate!r}: {exc.message}")
        return None, None
    refs = [r for _, r in per_file if r is not None]
    origin = min(refs) if refs else None
    times = np.concatenate(
        [
            v + ((r - origin).total_seconds() if r is not None and origin is not None else 0.0)
            for v, r in per_file
        ]
    )
    distinct = np.unique(np.round(times, 3))
    return (
        TimeAxisInfo(
            variable=tdim.coordinate,
            dim=tdim.name,
            units=units,
            origin=origin.isoformat() if origin is not None else "start of run",
            times_s=tuple(float(t) for t in distinct),
        ),
        int(distinct.size),
    )
