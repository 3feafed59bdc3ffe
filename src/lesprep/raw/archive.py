"""The raw archive of one case: which file holds which variable at which time.

LES codes lay their output out in many ways (one file per output time, one file per
variable, a mix). :func:`index_archive` opens every file lazily, checks each mapped raw
variable's dimensions against the variable map, decodes every file's time axis to
seconds since a common origin and builds an index ``(variable, time) -> (file, index)``.
It refuses duplicate or overlapping time steps, non-monotonic time, variables missing
from the archive, variables whose time steps differ, and files on different grids.
"""

from __future__ import annotations

import glob
import os
import re
import time
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any, Literal

import netCDF4
import numpy as np
import pandas as pd

from lesprep.errors import ConfigError, GridError, InputError, TimeAxisError, UnitError
from lesprep.raw.checks import value_extent
from lesprep.raw.chunks import chunk_layout, read_chunked
from lesprep.raw.timeaxis import (
    DuplicateResolver,
    TimeAxisReport,
    check_intervals,
    file_ranks,
)
from lesprep.raw.varmap import VariableMap
from lesprep.units import ureg

_SINCE = re.compile(r"^\s*(?P<unit>\S+)\s+since\s+(?P<ref>.+?)\s*$", re.IGNORECASE)


def resolve_files(pattern: str, *, case: str) -> list[Path]:
    """Expand a case's raw-file glob, sorted; refuse an empty match."""
    files = sorted(Path(p) for p in glob.glob(pattern, recursive=True) if os.path.isfile(p))
    if not files:
        raise InputError(
            f"the raw-file pattern {pattern!r} matches no file",
            case=case,
            hint="check the 'raw' column of the case sheet (a glob relative to the working "
            "directory)",
        )
    return files


class RawVariable:
    """One variable of a raw file: dims, attributes and values (read on demand)."""

    def __init__(self, var: netCDF4.Variable, path: str | None = None) -> None:
        self._var = var
        self._path = path
        self.dims: tuple[str, ...] = tuple(var.dimensions)
        self.attrs: dict[str, Any] = {k: var.getncattr(k) for k in var.ncattrs()}
        self.shape: tuple[int, ...] = tuple(var.shape)
        self.itemsize: int = np.dtype(var.dtype).itemsize

    def _threaded(self, index: dict[str, int] | None) -> np.ndarray | None:
        """Values through :mod:`lesprep.raw.chunks` when the variable is deflate-compressed
        and the selection is the whole variable or one index of its first dimension."""
        if self._path is None or not self.dims:
            return None
        filters = self._var.filters() or {}
        if not filters.get("zlib") or filters.get("fletcher32"):
            return None
        sel = index or {}
        if any(d != self.dims[0] for d in sel):
            return None
        layout = chunk_layout(self._path, self._var.name)
        if layout is None:
            return None
        return read_chunked(self._path, layout, lead=sel.get(self.dims[0]))

    def read(self, index: dict[str, int] | None = None, *, native: bool = False) -> np.ndarray:
        """Values with scale/offset applied and invalid values as NaN, optionally with one
        index fixed per named dimension.

        Invalid values are those netCDF4's masking would hide: the fill value (the
        ``_FillValue`` attribute, or the library default when fill mode is on),
        ``missing_value`` and values outside ``valid_min``/``valid_max``/``valid_range``.

        By default the result is float64. With ``native=True`` an unpacked floating-point
        variable keeps its own dtype (a float32 field is not widened), and the invalid-value
        test reads the values once instead of building a masked array; packed or integer
        variables still come back as float64.
        """
        if native and not self._packed():
            return self.read_with_extent(index)[0]
        sel = self._selection(index)
        raw = self._var[sel] if sel else self._var[...]
        return np.ma.filled(np.ma.asarray(raw).astype(np.float64), np.nan)

    def _selection(self, index: dict[str, int] | None) -> tuple[Any, ...]:
        return tuple((index or {}).get(d, slice(None)) for d in self.dims)

    def _packed(self) -> bool:
        """Scaled, offset or integer data (always read as float64 through netCDF4)."""
        scaled = "scale_factor" in self.attrs or "add_offset" in self.attrs
        return scaled or np.dtype(self._var.dtype).kind != "f"

    def read_with_extent(
        self, index: dict[str, int] | None = None
    ) -> tuple[np.ndarray, tuple[int, float, float]]:
        """:meth:`read` with ``native=True``, and :func:`~lesprep.raw.checks.value_extent` of
        the result (computed on the way, no extra pass over the values)."""
        if self._packed():
            values = self.read(index)
            return values, value_extent(values)
        values = self._threaded(index)
        if values is None:
            sel = self._selection(index)
            self._var.set_auto_maskandscale(False)
            try:
                values = np.asarray(self._var[sel] if sel else self._var[...])
            finally:
                self._var.set_auto_maskandscale(True)
        return self._checked(values)

    def _checked(self, values: np.ndarray) -> tuple[np.ndarray, tuple[int, float, float]]:
        extent = value_extent(values)
        invalid = self._invalid(values, extent[1], extent[2])
        if invalid is not None:
            values = np.array(values, copy=True)
            values[invalid] = np.nan
            extent = value_extent(values)
        return values, extent

    def _invalid(self, values: np.ndarray, lo: float, hi: float) -> np.ndarray | None:
        """Mask of the invalid values, or None when the value range shows there are none."""
        specials = [float(v) for v in np.ravel(self.attrs.get("missing_value", []))]
        fill = self._var.get_fill_value()
        if fill is not None:
            specials.append(float(fill))
        vmin = self.attrs.get("valid_min")
        vmax = self.attrs.get("valid_max")
        if "valid_range" in self.attrs:
            vmin, vmax = np.ravel(self.attrs["valid_range"])[:2]
        hit = [v for v in specials if lo <= v <= hi]
        low = vmin is not None and lo < float(vmin)
        high = vmax is not None and hi > float(vmax)
        if not (hit or low or high):
            return None
        mask = np.zeros(values.shape, dtype=bool)
        for v in hit:
            mask |= values == v
        if low:
            mask |= values < float(vmin)
        if high:
            mask |= values > float(vmax)
        return mask

    @property
    def values(self) -> np.ndarray:
        """All values (see :meth:`read`)."""
        return self.read()


class RawFile:
    """A raw NetCDF file opened read-only with the netCDF4 library."""

    def __init__(self, nc: netCDF4.Dataset) -> None:
        self._nc = nc
        path = nc.filepath() if nc.file_format.startswith("NETCDF4") else None
        self.variables = {str(k): RawVariable(v, path) for k, v in nc.variables.items()}
        self.attrs: dict[str, Any] = {k: nc.getncattr(k) for k in nc.ncattrs()}

    def close(self) -> None:
        """Close the file."""
        self._nc.close()


def open_raw(path: str | Path, *, case: str) -> RawFile:
    """Open one raw NetCDF file read-only (never modified).

    Raises
    ------
    InputError
        If the file cannot be read as NetCDF (truncated, corrupt, not NetCDF).
    """
    try:
        nc = netCDF4.Dataset(str(path), mode="r")
        nc.set_auto_maskandscale(True)
        return RawFile(nc)
    except Exception as exc:  # netCDF4 raises OSError, RuntimeError, ...
        raise incomplete_file_error(path, exc, case=case) from None


def incomplete_file_error(
    path: str | Path, exc: BaseException, *, case: str, variable: str | None = None
) -> InputError:
    """The error for a raw file that cannot be read completely.

    Says what the library reported, the file's size and how long ago it was modified: a
    file modified in the last hour is most likely still being written by a running
    simulation (leave it out until the run has written it), an older one truncated or
    corrupt (copy it again).
    """
    path = Path(path)
    try:
        st = path.stat()
        age = max(0.0, time.time() - st.st_mtime)
        facts = f"{st.st_size} bytes, modified {age:.0f} s ago"
    except OSError:
        age, facts = float("inf"), "no longer readable"
    if age < 3600.0:
        hint = (
            "it was modified recently: a running simulation may still be writing it; "
            "leave it out of the archive until the run has finished writing it"
        )
    else:
        hint = "the file may be truncated or corrupt; copy it again from the archive"
    return InputError(
        f"cannot be read completely ({facts}; the NetCDF library says {type(exc).__name__}: {exc})",
        case=case,
        file=str(path),
        variable=variable,
        hint=hint,
    )


def parse_time_units(
    units: str | None, *, case: str, file: str, variable: str
) -> tuple[float, pd.Timestamp | None]:
    """Split CF time units into (seconds per unit, reference date or None).

    ``"hours since 2031-06-01 00:00:00"`` gives ``(3600.0, Timestamp(...))``; a plain
    duration unit such as ``"s"`` or ``"seconds"`` gives ``(1.0, None)`` (time since the
    start of the run).
    """
    if units is None or not str(units).strip():
        raise UnitError(
            "time has no units; expected e.g. 'seconds since 2000-01-01' or 's'",
            case=case,
            file=file,
            variable=variable,
            hint="add 'units:' to the time coordinate in the variable map",
        )
    m = _SINCE.match(str(units))
    unit_text = m.group("unit") if m else str(units)
    try:
        q = ureg.Quantity(1.0, unit_text).to("s")
    except Exception:
        raise UnitError(
            f"time units {units!r} are not a duration or 'UNIT since DATE'",
            case=case,
            file=file,
            variable=variable,
        ) from None
    ref = None
    if m:
        try:
            ref = pd.Timestamp(m.group("ref"))
        except Exception:
            raise UnitError(
                f"time units {units!r}: cannot read the reference date {m.group('ref')!r}",
                case=case,
                file=file,
                variable=variable,
            ) from None
        if ref.tzinfo is not None:
            ref = ref.tz_convert("UTC").tz_localize(None)
    return float(q.magnitude), ref


@dataclass
class RawGrid:
    """Coordinates read from the archive (raw units already converted to m)."""

    x: np.ndarray
    y: np.ndarray
    z: np.ndarray
    z_face: np.ndarray | None = None
    z_bounds: np.ndarray | None = None
    y_face: np.ndarray | None = None
    x_face: np.ndarray | None = None


@dataclass
class ArchiveIndex:
    """Index of one case's raw archive.

    Attributes
    ----------
    files
        The raw files, sorted.
    times
        Sorted output times in seconds since ``origin`` (float64).
    origin
        ISO date of the time origin, or ``"start of run"`` for duration units.
    where
        ``where[var][i] = (file index, index in file)`` for the i-th output time; for a
        variable without a time axis, a single entry used for every time.
    grid
        Coordinates in metres.
    time_report
        The usual output interval, missing times and irregular steps.
    overlaps
        Output times found in two files, with the file kept (``duplicate_times:
        keep_later``).
    """

    case: str
    files: list[Path]
    varmap: VariableMap
    times: np.ndarray
    origin: str
    where: dict[str, list[tuple[int, int]]]
    grid: RawGrid
    attrs: dict[str, Any] = field(default_factory=dict)
    warnings: list[str] = field(default_factory=list)
    time_report: TimeAxisReport | None = None
    overlaps: list[dict[str, Any]] = field(default_factory=list)
    _open: tuple[Path, RawFile] | None = field(default=None, repr=False)

    def raw_file(self, path: Path) -> RawFile:
        """The raw file ``path``, opened read-only; the last one opened stays open, so the
        variables of one file at one time cost one open."""
        if self._open is not None and self._open[0] == path:
            return self._open[1]
        self.close()
        ds = open_raw(path, case=self.case)
        self._open = (path, ds)
        return ds

    def time_step_bytes(self) -> int:
        """Uncompressed bytes of the raw values read for one output time.

        Every mapped variable at one time (a variable without a time axis whole, as it is
        read again at every time), in the type stored in the file (a packed int16 field
        counts 2 bytes a value), taken from the first file that holds it. The input of an
        ingest's time step, for its progress lines (:mod:`lesprep.progress`).
        """
        time_dim = self.varmap.raw_dim("time")
        total = 0
        for name, spec in self.varmap.variables.items():
            path = self.files[self.where[name][0][0]]
            var = self.raw_file(path).variables[spec.raw]
            sizes = [n for d, n in zip(var.dims, var.shape, strict=True) if d != time_dim]
            total += int(np.prod(sizes)) * var.itemsize
        return total

    def close(self) -> None:
        """Close the raw file kept open by :meth:`raw_file`."""
        if self._open is not None:
            self._open[1].close()
            self._open = None


def _coord_values(
    ds: RawFile, spec: dict[str, str], *, axis: str, case: str, file: str
) -> np.ndarray:
    name = spec["raw"]
    if name not in ds.variables:
        raise InputError(
            f"coordinate {name!r} for axis {axis!r} is not in the file "
            f"(variables: {sorted(map(str, ds.variables))})",
            case=case,
            file=file,
            variable=name,
            hint="fix 'coords:' in the variable map",
        )
    var = ds.variables[name]
    values = np.asarray(var.values, dtype=np.float64)
    if axis == "time":
        return values
    from lesprep.units import conversion

    conv = conversion(
        variable=axis,
        raw_variable=name,
        found=var.attrs.get("units"),
        expected="m",
        assumed=spec.get("units"),
        case=case,
        file=file,
    )
    return np.asarray(conv.apply(values), dtype=np.float64)


def index_archive(
    files: list[Path],
    varmap: VariableMap,
    *,
    case: str,
    time_gaps: Literal["warn", "error"],
    duplicate_times: Literal["error", "keep_later"],
    restart_order: Literal["mtime", "name"],
    check_gaps: bool = True,
) -> ArchiveIndex:
    """Index a case's raw files against its variable map.

    Parameters
    ----------
    files
        The case's raw NetCDF files (see :func:`resolve_files`).
    varmap
        The flavour's variable map.
    case
        Case id, for messages.
    time_gaps
        A missing output time or an irregular interval warns (and is recorded) or is
        refused (:mod:`lesprep.raw.timeaxis`).
    duplicate_times, restart_order
        An output time in two files is refused, or the later file's copy is kept (later
        by modification time or by file name), with a warning naming times and files.
    check_gaps
        False: the files are a chosen subset of the archive (a time segment and the
        case's first files, whose axis was checked whole when the segments were
        planned), so the intervals between their times are not checked
        (``time_report`` is None).

    Returns
    -------
    ArchiveIndex

    Raises
    ------
    InputError, ConfigError, GridError, TimeAxisError
        Any of the problems listed in the module docstring.
    """
    time_spec = varmap.coords["time"]
    time_dim = varmap.raw_dim("time")
    entries: dict[str, list[tuple[float, int, int]]] = {v: [] for v in varmap.variables}
    static: dict[str, int] = {}
    grid: RawGrid | None = None
    grid_file = ""
    origin: pd.Timestamp | None = None
    origin_kind: str | None = None
    attrs: dict[str, Any] = {}
    notes: list[str] = []
    seen_vars: set[str] = set()
    per_file_times: list[tuple[np.ndarray, pd.Timestamp | None]] = []
    opened: list[RawFile] = []
    try:
        for fi, path in enumerate(files):
            ds = open_raw(path, case=case)
            opened.append(ds)
            seen_vars.update(ds.variables)
            if not attrs:
                attrs = {k: str(v) for k, v in ds.attrs.items()}
            secs: np.ndarray | None = None
            ref: pd.Timestamp | None = None
            if time_spec["raw"] in ds.variables:
                tvar = ds.variables[time_spec["raw"]]
                factor, ref = parse_time_units(
                    tvar.attrs.get("units", time_spec.get("units")),
                    case=case,
                    file=str(path),
                    variable=time_spec["raw"],
                )
                secs = np.asarray(tvar.values, dtype=np.float64).reshape(-1) * factor
                if secs.size > 1 and np.any(np.diff(secs) <= 0):
                    bad = int(np.argmax(np.diff(secs) <= 0))
                    raise TimeAxisError(
                        f"time is not strictly increasing within the file (index {bad}: "
                        f"{secs[bad]} s, index {bad + 1}: {secs[bad + 1]} s)",
                        case=case,
                        file=str(path),
                        variable=time_spec["raw"],
                        hint="remove or reorder the duplicated output times",
                    )
                kind = "date" if ref is not None else "duration"
                if origin_kind is None:
                    origin_kind = kind
                elif origin_kind != kind:
                    raise TimeAxisError(
                        "files mix calendar time units ('since DATE') with plain durations",
                        case=case,
                        file=str(path),
                        variable=time_spec["raw"],
                    )
                if ref is not None and (origin is None or ref < origin):
                    origin = ref
            per_file_times.append((secs if secs is not None else np.empty(0), ref))
            # grid
            fgrid = _read_grid(ds, varmap, case=case, file=str(path))
            if fgrid is not None:
                if grid is None:
                    grid, grid_file = fgrid, str(path)
                else:
                    _same_grid(grid, fgrid, case=case, file=str(path), ref_file=grid_file)
            for name, spec in varmap.variables.items():
                if spec.raw not in ds.variables:
                    continue
                dims = tuple(map(str, ds.variables[spec.raw].dims))
                if dims != spec.dims:
                    missing = [d for d in spec.dims if d not in dims]
                    raise ConfigError(
                        f"variable map says {spec.raw!r} has dims {list(spec.dims)} but the file "
                        f"has {list(dims)}" + (f" (the file lacks {missing})" if missing else ""),
                        case=case,
                        file=str(path),
                        variable=spec.raw,
                        hint="fix 'dims:' of this variable in the variable map",
                    )
                if time_dim in dims:
                    if secs is None:
                        raise InputError(
                            f"has a time dimension but the file has no time coordinate "
                            f"{time_spec['raw']!r}",
                            case=case,
                            file=str(path),
                            variable=spec.raw,
                        )
                    entries[name].extend((0.0, fi, k) for k in range(len(secs)))
                else:
                    static.setdefault(name, fi)
        # convert per-file times to seconds since the common origin
        for name in entries:
            fixed = []
            for _, fi, k in entries[name]:
                secs, ref = per_file_times[fi]
                shift = (ref - origin).total_seconds() if ref is not None and origin else 0.0
                fixed.append((float(secs[k] + shift), fi, k))
            entries[name] = fixed
    finally:
        for ds in opened:
            ds.close()
    if grid is None:
        raise InputError(
            "no file holds the grid coordinates named in the variable map",
            case=case,
            file=str(files[0]),
            hint="fix 'coords:' in the variable map",
        )
    mapped = {v.raw for v in varmap.variables.values()} | {c["raw"] for c in varmap.coords.values()}
    bounds = {str(ds_name) for ds_name in seen_vars if ds_name.endswith(("_bnds", "_bounds"))}
    extra = sorted(seen_vars - mapped - set(varmap.dims) - bounds)
    if extra:
        notes.append(
            f"case {case!r}: raw variable(s) {extra} are not in the variable map and are ignored"
        )
    for optional in ("z_face", "z_bounds"):
        spec = varmap.coords.get(optional)
        if spec and spec["raw"] not in seen_vars:
            notes.append(
                f"case {case!r}: optional coordinate {spec['raw']!r} ({optional}) is in "
                "no raw file; cell faces are derived from the cell centres"
            )
    missing = [
        f"{n} (raw {varmap.variables[n].raw!r})"
        for n in varmap.variables
        if not entries[n] and n not in static
    ]
    if missing:
        raise InputError(
            f"variable(s) {', '.join(missing)} are in none of the {len(files)} raw files",
            case=case,
            file=str(files[0].parent),
            hint="check the variable map's 'raw:' names against the files (lesprep inspect)",
        )
    times: np.ndarray | None = None
    where: dict[str, list[tuple[int, int]]] = {}
    resolver = DuplicateResolver(files, file_ranks(files, restart_order))
    for name, items in entries.items():
        if name in static and not items:
            continue
        items.sort()
        t = np.array([it[0] for it in items])
        tol = 1e-6 * max(1.0, float(np.abs(t).max()))
        if duplicate_times == "keep_later":
            items = resolver.resolve(items, tol)
            t = np.array([it[0] for it in items])
        dup = np.nonzero(np.diff(t) <= tol)[0]
        if dup.size:
            a, b = items[dup[0]], items[dup[0] + 1]
            raise TimeAxisError(
                f"output time {t[dup[0]]:g} s appears in two files "
                f"({files[a[1]].name} and {files[b[1]].name}): duplicate or overlapping time steps",
                case=case,
                file=str(files[b[1]]),
                variable=varmap.variables[name].raw,
                hint="remove the duplicate file or the restart overlap from the archive, or "
                "set ingest.duplicate_times: keep_later to keep the later file's copy",
            )
        if times is None:
            times = t
        elif t.shape != times.shape or not np.allclose(t, times, rtol=0, atol=1e-3):
            extra = sorted(set(np.round(t, 3)) ^ set(np.round(times, 3)))[:5]
            raise TimeAxisError(
                f"{name!r} (raw {varmap.variables[name].raw!r}) has {t.size} output times but "
                f"other variables have {times.size}; times not shared: {extra} s",
                case=case,
                file=str(files[0].parent),
                variable=varmap.variables[name].raw,
                hint="every time-dependent variable must be present at every output time",
            )
        where[name] = [(fi, k) for _, fi, k in items]
    assert times is not None
    for name, fi in static.items():
        if name not in where:
            where[name] = [(fi, -1)]
    if resolver.overlaps:
        notes.append(f"case {case!r}: " + resolver.describe(restart_order))
    report = check_intervals(times) if check_gaps else None
    if report is not None and not report.regular:
        if time_gaps == "error":
            raise TimeAxisError(
                report.describe(),
                case=case,
                file=str(files[0].parent),
                variable=time_spec["raw"],
                hint="add the missing output files, or set ingest.time_gaps: warn to accept",
            )
        notes.append(f"case {case!r}: {report.describe()}")
    return ArchiveIndex(
        case=case,
        files=list(files),
        varmap=varmap,
        times=times,
        origin=origin.isoformat() if origin is not None else "start of run",
        where=where,
        grid=grid,
        attrs=attrs,
        warnings=notes,
        time_report=report,
        overlaps=[vars(o) for o in resolver.overlaps.values()],
    )


def _read_grid(ds: RawFile, varmap: VariableMap, *, case: str, file: str) -> RawGrid | None:
    specs = varmap.coords
    if not all(specs[a]["raw"] in ds.variables for a in ("x", "y", "z")):
        return None
    vals = {a: _coord_values(ds, specs[a], axis=a, case=case, file=file) for a in ("x", "y", "z")}
    zf = zb = None
    if "z_face" in specs and specs["z_face"]["raw"] in ds.variables:
        zf = _coord_values(ds, specs["z_face"], axis="z_face", case=case, file=file)
    if "z_bounds" in specs and specs["z_bounds"]["raw"] in ds.variables:
        bspec = dict(specs["z_bounds"])
        if "units" not in bspec and "units" not in ds.variables[bspec["raw"]].attrs:
            bspec["units"] = str(ds.variables[specs["z"]["raw"]].attrs.get("units", "m"))
        zb = _coord_values(ds, bspec, axis="z_bounds", case=case, file=file)
    hf: dict[str, np.ndarray | None] = {"y_face": None, "x_face": None}
    for key in hf:
        if key in specs and specs[key]["raw"] in ds.variables:
            hf[key] = _coord_values(ds, specs[key], axis=key, case=case, file=file)
    return RawGrid(x=vals["x"], y=vals["y"], z=vals["z"], z_face=zf, z_bounds=zb, **hf)


def _same_grid(a: RawGrid, b: RawGrid, *, case: str, file: str, ref_file: str) -> None:
    for axis in ("x", "y", "z"):
        va, vb = getattr(a, axis), getattr(b, axis)
        if va.shape != vb.shape or not np.allclose(va, vb, rtol=1e-6, atol=1e-6):
            raise GridError(
                f"axis {axis} differs from the one in {ref_file} "
                f"({va.size} points {va[0]:g}..{va[-1]:g} m vs {vb.size} points "
                f"{vb[0]:g}..{vb[-1]:g} m): files of one case on different grids",
                case=case,
                file=file,
                hint="a case's files must share one grid; split them into separate cases",
            )


def read_field(
    cat: ArchiveIndex, name: str, time_index: int
) -> tuple[np.ndarray, str, str | None, tuple[int, float, float]]:
    """Read one canonical variable's raw values at one output time.

    Returns
    -------
    values, file, units, extent
        The raw array (its own float dtype, float64 if packed or integer; raw dim order
        without the time dim; invalid values as NaN), the file it came from, its
        ``units`` attribute (None if missing) and ``(nonfinite, min, max)`` of the values
        (:func:`lesprep.raw.checks.value_extent`).
    """
    spec = cat.varmap.variables[name]
    locs = cat.where[name]
    fi, k = locs[0] if len(locs) == 1 and locs[0][1] == -1 else locs[time_index]
    path = cat.files[fi]
    ds = cat.raw_file(path)
    try:
        var = ds.variables[spec.raw]
        time_dim = cat.varmap.raw_dim("time")
        values, extent = var.read_with_extent({time_dim: k} if k >= 0 else None)
        units = var.attrs.get("units")
    except Exception as exc:
        cat.close()
        raise incomplete_file_error(path, exc, case=cat.case, variable=spec.raw) from None
    return values, str(path), units, extent
