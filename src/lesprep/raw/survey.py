"""Inspect an unseen raw archive and draft its variable map.

:func:`inspect_files` opens NetCDF files read-only (netCDF4, never modified, values read
only for 1-D coordinates) and reports every dimension, variable, size, unit and the time
axis. It then guesses

* the role of each dimension (time, z, y, x) from CF coordinate attributes (``axis``,
  ``standard_name``, ``positive``, ``"UNIT since DATE"`` units) and common names;
* face staggering: of two dimensions with the same role, one with exactly one more point
  than the other holds the cell faces (``z_face``, ``y_face``, ``x_face``); when both have
  coordinates the report says whether the faces bracket the centres;
* which raw variable gives each canonical variable (qc, qv, T, p, w) and what it
  measures (``quantity``), from the CF ``standard_name``, common short and long names and
  the units' dimensionality.

:func:`draft_varmap` turns the report into a variable map in the format of
``config/varmaps/*.yaml``, validated with :func:`lesprep.raw.varmap.parse_varmap`.

Conventions
-----------
* Every guess is a proposal with a score and the reasons for it; the report lists the
  runners-up. Names only count in favour of a candidate: units are a filter (a candidate
  whose units have the wrong dimensionality is dropped) and never a match by themselves,
  so a lone ``u`` in m/s is not taken for w.
* A raw variable gives at most one canonical variable (greedy by score).
* CF standard names used (from memory of the CF standard name table):
  ``cloud_liquid_water_mixing_ratio``, ``mass_fraction_of_cloud_liquid_water_in_air``,
  ``humidity_mixing_ratio``, ``specific_humidity``,
  ``mass_fraction_of_water_vapor_in_air``, ``air_temperature``,
  ``air_potential_temperature``, ``air_pressure``, ``upward_air_velocity``.
* A bare ``q`` without other hints is taken for specific humidity, the usual meaning of
  the symbol in meteorology (from memory); the report says so.
* Units missing from the file are written to the draft as the canonical units with a
  ``CHECK`` comment: lesprep never converts silently, so the user must confirm them.
"""

from __future__ import annotations

import dataclasses
import json
import re
from collections.abc import Iterable, Sequence
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import netCDF4
import numpy as np
import pandas as pd

from lesprep import catalogue
from lesprep.errors import ConfigError, InputError
from lesprep.raw.archive import parse_time_units
from lesprep.raw.varmap import parse_varmap
from lesprep.units import ureg

__all__ = [
    "CANONICAL",
    "MIN_SCORE",
    "DimInfo",
    "InspectReport",
    "Proposal",
    "TimeAxisInfo",
    "VariableInfo",
    "draft_varmap",
    "inspect_files",
]

CANONICAL = catalogue.required_inputs()
"""The variables a draft proposes (those every variable map must provide)."""
MIN_SCORE = 3.0
"""Name evidence a candidate needs to be proposed (a short-name or long-name match)."""

_STANDARD: dict[str, dict[str, str]] = {
    "qc": {
        "cloud_liquid_water_mixing_ratio": "direct",
        "mass_fraction_of_cloud_liquid_water_in_air": "direct",
    },
    "qv": {
        "humidity_mixing_ratio": "mixing_ratio",
        "specific_humidity": "specific_humidity",
        "mass_fraction_of_water_vapor_in_air": "specific_humidity",
    },
    "T": {"air_temperature": "temperature", "air_potential_temperature": "potential_temperature"},
    "p": {"air_pressure": "direct"},
    "w": {"upward_air_velocity": "direct"},
}


def _words(text: str) -> tuple[str, ...]:
    return tuple(text.split())


# short names (lower case) -> quantity; an exact match scores 6
_SHORT: dict[str, dict[str, str]] = {
    "qc": dict.fromkeys(
        _words("qc ql qcl qlc clw liq qliq cloudwater cloud_water qcloud q_c q_l lwc"), "direct"
    ),
    "qv": {
        **dict.fromkeys(_words("qv vap qvap q_v rv mixr vapour vapor"), "mixing_ratio"),
        **dict.fromkeys(_words("q sphum shum spechum hus sh"), "specific_humidity"),
    },
    "T": {
        **dict.fromkeys(
            _words("t ta temp tabs tempc tempk tk tc temperature air_temperature"), "temperature"
        ),
        **dict.fromkeys(
            _words("theta th pt pot_temp potential_temperature tpot"), "potential_temperature"
        ),
    },
    "p": dict.fromkeys(_words("p pres pressure pref p_ref prs press pa air_pressure"), "direct"),
    "w": dict.fromkeys(
        _words("w wc wf wa ww wwind w_wind wz w_c w_f upward_velocity vertical_velocity"),
        "direct",
    ),
}

# words that rule a candidate out: in the short name's tokens (split at "_", "-", ...)
_EXCLUDE_NAME: dict[str, tuple[str, ...]] = {
    "qc": _words(
        "ice rain snow graupel hail frac fraction cf cover mask lwp path number nc flux var "
        "variance tend rate precip reff qi qr qs qg qt tot total rh"
    ),
    "qv": _words("rh relh qt qsat qs tot total liq ice rain flux var variance tend sat def path"),
    "T": _words(
        "thl thv the thetal thetav thetae theta_l theta_v theta_e thli td dew dewpoint sfc surf "
        "skin sst ts soil tsoil flux var variance tend pert anom prime tv tb mse"
    ),
    "p": _words("pp pert prime anom dyn ps psfc sfc surf tend grad pv e pr prec precip prob var"),
    "w": _words("var variance w2 wvar wskew skew std flux tend max min ls subs wls prime u v"),
}
# ... and in the long name's words
_EXCLUDE_LONG: dict[str, tuple[str, ...]] = {
    "qc": _words(
        "ice rain snow graupel hail fraction cover mask path number concentration flux variance "
        "tendency rate precipitation drizzle radius total relative vapour vapor"
    ),
    "qv": _words(
        "relative total liquid cloud ice rain flux variance tendency saturation deficit path"
    ),
    "T": _words(
        "liquid virtual equivalent dew dewpoint surface skin soil flux variance tendency "
        "perturbation anomaly deviation ice static brightness"
    ),
    "p": _words(
        "perturbation anomaly dynamic deviation surface tendency gradient vapour vapor partial "
        "precipitation probability variance"
    ),
    "w": _words(
        "variance flux tendency subsidence large skewness standard maximum minimum horizontal"
    ),
}

_LONG: dict[str, tuple[tuple[str, float], ...]] = {
    "qc": (("liquid", 3.0), ("cloud", 2.0), ("condensate", 2.0), ("mixing ratio", 1.0)),
    "qv": (("vapour", 3.0), ("vapor", 3.0), ("humidity", 3.0), ("mixing ratio", 1.0)),
    "T": (("potential temperature", 4.0), ("temperature", 3.0)),
    "p": (("pressure", 4.0),),
    "w": (("vertical velocity", 4.0), ("vertical wind", 4.0), ("upward", 3.0)),
}

_TIME_NAMES = {"time", "t", "times"}
_Z_NAMES = {"height", "hgt", "lev", "level", "levels", "alt", "altitude", "nz"}
_BOUNDS_DIMS = {"nv", "bnds", "bounds", "nb", "nbnd", "two", "vertices"}
_SIMPLE = re.compile(r"[A-Za-z_][A-Za-z0-9_.\-]*")
_YAML_WORDS = {"yes", "no", "on", "off", "true", "false", "null", "~"}  # PyYAML's specials


# --------------------------------------------------------------------------- report


@dataclass(frozen=True, kw_only=True)
class VariableInfo:
    """One raw variable as found in the files.

    Attributes
    ----------
    name
        Raw name.
    files
        Files holding it.
    dims, shape
        Dimensions in file order and sizes (the time size counted over all files).
    dtype
        NumPy dtype name.
    units, standard_name, long_name, axis, positive, bounds
        The CF attributes (None when absent).
    """

    name: str
    files: tuple[str, ...]
    dims: tuple[str, ...]
    shape: tuple[int, ...]
    dtype: str
    units: str | None = None
    standard_name: str | None = None
    long_name: str | None = None
    axis: str | None = None
    positive: str | None = None
    bounds: str | None = None


@dataclass(frozen=True, kw_only=True)
class DimInfo:
    """One dimension, its size and its guessed role.

    Attributes
    ----------
    name, size
        Raw name and size (for time, the number of distinct output times of all files).
    role
        ``time``, ``z``, ``y``, ``x``, ``z_face``, ``y_face``, ``x_face`` or None.
    coordinate
        The raw variable holding its values, if any.
    reason
        Why the role was chosen.
    unlimited
        True if the dimension is unlimited in some file.
    """

    name: str
    size: int
    role: str | None
    coordinate: str | None
    reason: str
    unlimited: bool = False


@dataclass(frozen=True, kw_only=True)
class TimeAxisInfo:
    """The archive's time axis.

    Attributes
    ----------
    variable, dim
        Time coordinate and its dimension.
    units
        Its units attribute.
    origin
        ISO date of the reference date, or ``"start of run"`` for duration units.
    times_s
        Distinct output times of all files, s since ``origin``, sorted.
    """

    variable: str
    dim: str
    units: str | None
    origin: str
    times_s: tuple[float, ...]

    @property
    def step_s(self) -> float:
        """Median output interval (s); NaN with fewer than two times."""
        t = np.asarray(self.times_s, dtype=np.float64)
        return float(np.median(np.diff(t))) if t.size > 1 else float("nan")


@dataclass(frozen=True, kw_only=True)
class Proposal:
    """The raw variable proposed for one canonical variable.

    Attributes
    ----------
    canonical
        ``qc``, ``qv``, ``T``, ``p`` or ``w``.
    raw
        Raw variable name, or None when nothing fits.
    dims
        Its dims in file order.
    quantity
        What it measures (a variable map ``quantity``).
    units
        Units found in the file (None if missing).
    assumed_units
        Units the draft declares because the file has none (else None).
    score
        Name evidence (higher is surer).
    reasons
        What the score is made of.
    alternatives
        Other candidates, best first, as ``"name (score)"``.
    """

    canonical: str
    raw: str | None
    dims: tuple[str, ...] = ()
    quantity: str = "direct"
    units: str | None = None
    assumed_units: str | None = None
    score: float = 0.0
    reasons: tuple[str, ...] = ()
    alternatives: tuple[str, ...] = ()


@dataclass(frozen=True, kw_only=True)
class InspectReport:
    """What :func:`inspect_files` found and proposes.

    Attributes
    ----------
    files
        The inspected files.
    dims
        Dimension name -> :class:`DimInfo`.
    variables
        Variable name -> :class:`VariableInfo`.
    time
        The time axis, or None if none was found.
    staggered
        Face dimension -> the centre dimension it is staggered against.
    coords
        Variable-map coordinate key (``time``, ``z``, ``z_face``, ``z_bounds``, ``y``,
        ``x``) -> raw variable.
    coord_units
        Coordinate key -> units to declare because the file has none.
    proposals
        Canonical name -> :class:`Proposal`.
    notes
        Things the user should check.
    """

    files: tuple[str, ...]
    dims: dict[str, DimInfo]
    variables: dict[str, VariableInfo]
    time: TimeAxisInfo | None
    staggered: dict[str, str]
    coords: dict[str, str]
    coord_units: dict[str, str] = field(default_factory=dict)
    proposals: dict[str, Proposal] = field(default_factory=dict)
    notes: tuple[str, ...] = ()

    def summary(self) -> str:
        """A readable multi-line account of the archive and the proposed mapping.

        Returns
        -------
        str
            Files, dimensions with roles, the time axis, every variable with dims, units
            and names, the proposed mapping with its reasons and alternatives, and notes.

        Examples
        --------
        >>> print(inspect_files(["snap_0000.nc"]).summary())  # doctest: +SKIP
        """
        lines = [f"{len(self.files)} file(s):"]
        shown = list(self.files[:5])
        lines += [f"  {f}" for f in shown]
        if len(self.files) > len(shown):
            lines.append(f"  ... and {len(self.files) - len(shown)} more")
        lines.append("dimensions:")
        width = max([len(d) for d in self.dims] + [4])
        for d in self.dims.values():
            role = d.role or "-"
            unl = ", unlimited" if d.unlimited else ""
            lines.append(f"  {d.name:<{width}}  {d.size:>7}  {role:<7} ({d.reason}{unl})")
        if self.time is not None:
            t = self.time
            span = (
                f"{len(t.times_s)} output time(s) from {t.times_s[0]:g} s to {t.times_s[-1]:g} s"
                if t.times_s
                else "no output time"
            )
            step = f", every {t.step_s:g} s" if np.isfinite(t.step_s) else ""
            since = "the start of the run" if t.origin == "start of run" else t.origin
            lines.append(
                f"time axis: {t.variable} ({t.dim}): {span}{step}, counted from {since}; "
                f"units {t.units!r}"
            )
        else:
            lines.append("time axis: none found")
        lines.append("variables:")
        vwidth = max([len(v) for v in self.variables] + [4])
        for v in self.variables.values():
            dims = ", ".join(f"{d}={s}" for d, s in zip(v.dims, v.shape, strict=True))
            desc = v.standard_name or v.long_name or ""
            units = v.units if v.units is not None else "(no units)"
            lines.append(f"  {v.name:<{vwidth}}  ({dims})  {units}  {desc}".rstrip())
        if self.staggered:
            lines.append(
                "staggering: "
                + ", ".join(f"{f} holds the faces of {c}" for f, c in self.staggered.items())
            )
        lines.append("proposed mapping:")
        for name in CANONICAL:
            p = self.proposals.get(name)
            if p is None or p.raw is None:
                lines.append(f"  {name:<2} <- (nothing found)")
                continue
            extra = f", quantity {p.quantity}" if p.quantity != "direct" else ""
            units = p.units if p.units is not None else f"(no units; assumed {p.assumed_units})"
            lines.append(
                f"  {name:<2} <- {p.raw} ({', '.join(p.dims)}) {units}{extra}; score "
                f"{p.score:g}: {'; '.join(p.reasons)}"
            )
            if p.alternatives:
                lines.append(f"        alternatives: {', '.join(p.alternatives)}")
        if self.notes:
            lines.append("notes:")
            lines += [f"  - {n}" for n in self.notes]
        return "\n".join(lines)


# --------------------------------------------------------------------------- reading


def _text(value: Any) -> str | None:
    if value is None:
        return None
    if isinstance(value, bytes):
        value = value.decode("utf-8", "replace")
    text = str(value).strip()
    return text or None


def _expand(paths: Iterable[str | Path]) -> list[Path]:
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
class _Scan:
    vars: dict[str, dict[str, Any]] = field(default_factory=dict)
    dim_sizes: dict[str, set[int]] = field(default_factory=dict)
    unlimited: set[str] = field(default_factory=set)
    coord_values: dict[str, np.ndarray] = field(default_factory=dict)
    notes: list[str] = field(default_factory=list)


def _scan(files: Sequence[Path]) -> _Scan:
    scan = _Scan()
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


def _coordinate_of(dim: str, scan: _Scan) -> str | None:
    if dim in scan.vars and scan.vars[dim]["dims"] == (dim,):
        return dim
    for name, v in scan.vars.items():
        attrs = v["attrs"]
        if v["dims"] == (dim,) and (
            "axis" in attrs or "standard_name" in attrs or "positive" in attrs
        ):
            return name
    return None


def _dim_base(dim: str, coord: str | None, scan: _Scan) -> tuple[str | None, str]:
    """Role without staggering (time, z, y, x) and why, or (None, why)."""
    attrs = scan.vars[coord]["attrs"] if coord else {}
    axis = (_text(attrs.get("axis")) or "").upper()
    std = (_text(attrs.get("standard_name")) or "").lower()
    units = (_text(attrs.get("units")) or "").lower()
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
    if _text(attrs.get("positive")):
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


def _usage(scan: _Scan) -> dict[str, int]:
    used: dict[str, int] = {}
    for v in scan.vars.values():
        if len(v["dims"]) >= 3:
            for d in v["dims"]:
                used[d] = used.get(d, 0) + 1
    return used


def _roles(
    scan: _Scan, sizes: dict[str, int]
) -> tuple[dict[str, DimInfo], dict[str, str], list[str]]:
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
            reason[f] += f"; one more point than {c} ({sizes[f]} vs {sizes[c]}): faces{tail}"
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


def _time_axis(
    scan: _Scan, dims: dict[str, DimInfo], notes: list[str]
) -> tuple[TimeAxisInfo | None, int | None]:
    tdim = next((d for d in dims.values() if d.role == "time"), None)
    if tdim is None or tdim.coordinate is None:
        if tdim is not None:
            notes.append(f"time dimension {tdim.name!r} has no coordinate variable")
        return None, None
    var = scan.vars[tdim.coordinate]
    units = _text(var["attrs"].get("units"))
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


# --------------------------------------------------------------------------- matching


def _tokens(name: str) -> set[str]:
    low = name.lower()
    return {low, *(t for t in re.split(r"[^a-z0-9]+", low) if t)}


def _units_ok(canonical: str, units: str | None) -> bool | None:
    """True/False for (in)compatible units, None when the file has none or unparsable."""
    if units is None:
        return None
    if canonical in ("qc", "qv") and units.strip() in ("%", "percent"):
        return False
    try:
        found = ureg.Unit(units.strip())
    except Exception:  # pint raises several unrelated types
        return None
    return found.dimensionality == ureg.Unit(catalogue.get(canonical).units).dimensionality


_PARTIAL: dict[str, tuple[str, ...]] = {
    "qc": ("liq", "cloud", "qc", "ql"),
    "qv": ("vap", "hum", "qv"),
    "T": ("temp", "theta"),
    "p": ("pres",),
    "w": (),
}
"""Substrings of a short name that count as weaker evidence (score 3)."""


def _excluded(canonical: str, v: VariableInfo) -> bool:
    """True if ``v`` is ruled out as ``canonical`` by its CF name, its names or units."""
    std = (v.standard_name or "").lower()
    if std in _STANDARD[canonical]:
        return False
    if std and any(std in table for table in _STANDARD.values()):
        return True  # the CF name of another canonical variable
    long_words = set(re.split(r"[^a-z0-9]+", (v.long_name or "").lower()))
    if any(w in _tokens(v.name) for w in _EXCLUDE_NAME[canonical]):
        return True
    if any(w in long_words for w in _EXCLUDE_LONG[canonical]):
        return True
    return _units_ok(canonical, v.units) is False


def _evidence(canonical: str, v: VariableInfo) -> tuple[float, str | None, list[str]]:
    """Score, quantity implied by the names (or None) and reasons, before units."""
    std = (v.standard_name or "").lower()
    low = v.name.lower()
    long = (v.long_name or "").lower()
    score, quantity, reasons = 0.0, None, []
    if std in _STANDARD[canonical]:
        score += 10.0
        quantity = _STANDARD[canonical][std]
        reasons.append(f"standard_name {std}")
    if low in _SHORT[canonical]:
        score += 6.0
        quantity = quantity or _SHORT[canonical][low]
        reasons.append(f"name {v.name!r}")
    elif hit := next((s for s in _PARTIAL[canonical] if s in low), None):
        score += 3.0
        reasons.append(f"name contains {hit!r}")
        if canonical == "T" and hit == "theta":
            quantity = quantity or "potential_temperature"
    for phrase, weight in _LONG[canonical]:
        if phrase in long:
            score += weight
            reasons.append(f"long_name has {phrase!r}")
            break
    return score, quantity, reasons


def _quantity(canonical: str, v: VariableInfo, from_names: str | None) -> str:
    """What ``v`` measures: the long name decides, then the names, then the default."""
    long = (v.long_name or "").lower()
    if canonical == "qv":
        if "specific" in long:
            return "specific_humidity"
        if "mixing ratio" in long:
            return "mixing_ratio"
        return from_names or "mixing_ratio"
    if canonical == "T":
        if "potential" in long:
            return "potential_temperature"
        return from_names or "temperature"
    return from_names or "direct"


def _score(canonical: str, v: VariableInfo) -> tuple[float, str, list[str]] | None:
    """Evidence for ``v`` as ``canonical``: (score, quantity, reasons), or None."""
    if _excluded(canonical, v):
        return None
    score, from_names, reasons = _evidence(canonical, v)
    if score < MIN_SCORE:
        return None
    if _units_ok(canonical, v.units):
        score += 1.0
        reasons.append(f"units {v.units!r}")
    else:
        score -= 1.0
        reasons.append("no usable units attribute")
    return score, _quantity(canonical, v, from_names), reasons


def _axes(v: VariableInfo, dims: dict[str, DimInfo]) -> tuple[str, ...] | None:
    roles = []
    for d in v.dims:
        role = dims[d].role if d in dims else None
        if role is None:
            return None
        roles.append(role)
    return tuple(roles)


def _fits(canonical: str, axes: tuple[str, ...]) -> bool:
    base = sorted(a.removesuffix("_face") for a in axes)
    if len(set(base)) != len(base):
        return False
    if canonical == "p":
        return base in (["time", "x", "y", "z"], ["x", "y", "z"], ["z"])
    return base == ["time", "x", "y", "z"]


_Scored = tuple[float, str, str, list[str]]  # score, raw name, quantity, reasons


def _candidates(
    variables: dict[str, VariableInfo], dims: dict[str, DimInfo], skip: set[str]
) -> dict[str, list[_Scored]]:
    """Every fitting raw variable of each canonical one, best first."""
    scored: dict[str, list[_Scored]] = {c: [] for c in CANONICAL}
    for v in variables.values():
        axes = None if v.name in skip else _axes(v, dims)
        if axes is None:
            continue
        for c in CANONICAL:
            found = _score(c, v) if _fits(c, axes) else None
            if found is None:
                continue
            score, quantity, reasons = found
            if c == "p" and len(axes) >= 3:
                score, reasons = score + 0.5, [*reasons, "full 3-D field"]
            if c == "w" and not any(a.endswith("_face") for a in axes):
                score, reasons = score + 0.5, [*reasons, "at cell centres"]
            scored[c].append((score, v.name, quantity, reasons))
    for c in CANONICAL:
        scored[c].sort(key=lambda s: (-s[0], s[1]))
    return scored


def _assign(scored: dict[str, list[_Scored]]) -> dict[str, str]:
    """Canonical -> raw, greedily by score; each raw variable used once."""
    pairs = sorted(
        ((s[0], c, s[1]) for c in CANONICAL for s in scored[c]), key=lambda p: (-p[0], p[1], p[2])
    )
    chosen: dict[str, str] = {}
    for _, c, raw in pairs:
        if c not in chosen and raw not in chosen.values():
            chosen[c] = raw
    return chosen


def _proposal_notes(c: str, v: VariableInfo) -> list[str]:
    notes = []
    if v.units is None:
        notes.append(
            f"{v.name!r} (proposed for {c}) has no units attribute; the draft assumes "
            f"{catalogue.get(c).units!r} -- CHECK"
        )
    elif _units_ok(c, v.units) is None:
        notes.append(
            f"{v.name!r} (proposed for {c}) has units {v.units!r}, which are not a UDUNITS/CF "
            "unit; fix the attribute in the files (a map's units are used only when the "
            "file has none)"
        )
    if c == "qv" and v.name.lower() == "q" and not v.long_name and not v.standard_name:
        notes.append(
            "'q' has no long_name or standard_name; taken for specific humidity (the usual "
            "meaning of q) -- CHECK the quantity"
        )
    if (v.standard_name or "") == "mass_fraction_of_cloud_liquid_water_in_air":
        notes.append(
            f"{v.name!r} is a mass fraction (per kg of moist air), read as a mixing ratio "
            "(per kg of dry air); they differ by the total water content, about 1-2 %"
        )
    return notes


def _propose(
    variables: dict[str, VariableInfo],
    dims: dict[str, DimInfo],
    skip: set[str],
    notes: list[str],
) -> dict[str, Proposal]:
    scored = _candidates(variables, dims, skip)
    chosen = _assign(scored)
    out: dict[str, Proposal] = {}
    for c in CANONICAL:
        raw = chosen.get(c)
        if raw is None:
            notes.append(f"no raw variable looks like {c}; fill in 'variables: {c}:' by hand")
            out[c] = Proposal(canonical=c, raw=None)
            continue
        score, _, quantity, reasons = next(s for s in scored[c] if s[1] == raw)
        v = variables[raw]
        notes.extend(_proposal_notes(c, v))
        out[c] = Proposal(
            canonical=c,
            raw=raw,
            dims=v.dims,
            quantity=quantity,
            units=v.units,
            assumed_units=catalogue.get(c).units if v.units is None else None,
            score=score,
            reasons=tuple(reasons),
            alternatives=tuple(f"{s[1]} ({s[0]:g})" for s in scored[c] if s[1] != raw),
        )
    return out


# --------------------------------------------------------------------------- public


def inspect_files(paths: Sequence[str | Path]) -> InspectReport:
    """Inspect raw NetCDF files (read-only) and propose how they map to lesprep.

    Parameters
    ----------
    paths
        Raw NetCDF files of one case (folders are expanded to their ``*.nc`` files).
        Only 1-D coordinate values are read; data variables are never loaded.

    Returns
    -------
    InspectReport
        Dimensions with roles and staggering, variables, the time axis, the coordinate
        variables for a variable map, the proposed mapping and notes.

    Raises
    ------
    InputError
        No file, a path that is not a file, or a file that is not NetCDF.

    Examples
    --------
    >>> report = inspect_files(["resources/demo/sc-ostra-01"])  # doctest: +SKIP
    >>> report.proposals["qc"].raw  # doctest: +SKIP
    'liq'
    """
    files = _expand(paths)
    scan = _scan(files)
    notes = list(scan.notes)
    sizes = {d: max(s) for d, s in scan.dim_sizes.items()}
    for d, s in scan.dim_sizes.items():
        if len(s) > 1 and d not in scan.unlimited:
            notes.append(f"dimension {d!r} has different sizes in different files: {sorted(s)}")
    dims, staggered, role_notes = _roles(scan, sizes)
    notes += role_notes
    time, ntimes = _time_axis(scan, dims, notes)
    if time is not None and ntimes is not None:
        sizes[time.dim] = ntimes
        dims[time.dim] = dataclasses.replace(dims[time.dim], size=ntimes)
    variables: dict[str, VariableInfo] = {}
    for name, v in scan.vars.items():
        attrs = v["attrs"]
        shape = tuple(sizes.get(d, s) for d, s in zip(v["dims"], v["shape"], strict=True))
        variables[name] = VariableInfo(
            name=name,
            files=tuple(v["files"]),
            dims=v["dims"],
            shape=shape,
            dtype=v["dtype"],
            units=_text(attrs.get("units")),
            standard_name=_text(attrs.get("standard_name")),
            long_name=_text(attrs.get("long_name")),
            axis=_text(attrs.get("axis")),
            positive=_text(attrs.get("positive")),
            bounds=_text(attrs.get("bounds")),
        )
    coords: dict[str, str] = {}
    coord_units: dict[str, str] = {}
    for d in dims.values():
        if d.role is None or d.role in ("y_face", "x_face"):
            continue
        key = d.role
        if d.coordinate is None:
            notes.append(
                f"dimension {d.name!r} ({d.role}) has no coordinate variable; lesprep needs "
                "one for 'coords:'"
            )
            continue
        coords.setdefault(key, d.coordinate)
        if key != "time" and variables[d.coordinate].units is None:
            coord_units[key] = "m"
            notes.append(
                f"coordinate {d.coordinate!r} has no units; the draft assumes 'm' -- CHECK"
            )
    zc = coords.get("z")
    if zc and variables[zc].bounds and variables[zc].bounds in variables:
        coords["z_bounds"] = str(variables[zc].bounds)
    skip = set(coords.values()) | {v.bounds for v in variables.values() if v.bounds}
    skip |= {d.coordinate for d in dims.values() if d.coordinate}
    proposals = _propose(variables, dims, {s for s in skip if s}, notes)
    return InspectReport(
        files=tuple(str(f) for f in files),
        dims=dims,
        variables=variables,
        time=time,
        staggered=staggered,
        coords=coords,
        coord_units=coord_units,
        proposals=proposals,
        notes=tuple(dict.fromkeys(notes)),
    )


def _scalar(value: str) -> str:
    """A YAML scalar: plain when unambiguous, else a double-quoted (JSON) string."""
    if _SIMPLE.fullmatch(value) and value.lower() not in _YAML_WORDS:
        return value
    return json.dumps(value)


def _flow(items: dict[str, Any]) -> str:
    parts = []
    for k, v in items.items():
        if isinstance(v, (list, tuple)):
            parts.append(f"{k}: [{', '.join(_scalar(str(x)) for x in v)}]")
        else:
            parts.append(f"{k}: {_scalar(str(v))}")
    return "{" + ", ".join(parts) + "}"


def draft_varmap(report: InspectReport, *, flavour: str = "draft") -> str:
    """A variable map (YAML text) drafted from an inspection report.

    Parameters
    ----------
    report
        From :func:`inspect_files`.
    flavour
        Name written to ``flavour:``.

    Returns
    -------
    str
        YAML in the layout of ``config/varmaps/*.yaml``: comment lines, ``flavour``,
        ``description``, ``dims`` (every raw dimension with a role), ``coords`` and
        ``variables`` (qc, qv, T, p, w). Assumptions are flagged with ``# CHECK``
        comments; a canonical variable with no candidate gets ``raw: "<not found>"`` so
        ingest names it. The text is validated with
        :func:`lesprep.raw.varmap.parse_varmap`.

    Raises
    ------
    ConfigError
        If the archive lacks something every map needs (a dimension for each of time,
        z, y, x), so no valid map can be drafted.

    Examples
    --------
    >>> print(draft_varmap(inspect_files(["snap_0000.nc"])))  # doctest: +SKIP
    """
    roles = {d.name: d.role for d in report.dims.values() if d.role is not None}
    missing = [a for a in ("time", "z", "y", "x") if a not in roles.values()]
    if missing:
        raise ConfigError(
            f"cannot draft a variable map: no dimension recognised as {missing} "
            f"(dimensions: {sorted(report.dims)})",
            file=report.files[0] if report.files else None,
            hint="write the map by hand; see config/varmaps/*.yaml",
        )
    first = report.files[0] if report.files else "?"
    lines = [
        f"# Variable map drafted by lesprep inspect from {len(report.files)} file(s), e.g.",
        f"# {first}",
        "# Check every line (names, dims, quantity, units) before ingesting.",
    ]
    lines += [f"# note: {n}" for n in report.notes]
    lines += [
        f"flavour: {_scalar(flavour)}",
        f"description: {_scalar(f'drafted from {len(report.files)} raw file(s)')}",
        "dims:",
    ]
    lines += [f"  {_scalar(name)}: {role}" for name, role in roles.items()]
    lines.append("coords:")
    for key in ("time", "z", "z_face", "z_bounds", "y", "x"):
        raw = report.coords.get(key)
        if raw is None:
            if key in ("time", "z", "y", "x"):
                dim = next(d for d, r in roles.items() if r == key)
                lines.append(f"  {key}: {_flow({'raw': dim})}  # CHECK: no coordinate found")
            continue
        spec = {"raw": raw}
        comment = ""
        if key in report.coord_units:
            spec["units"] = report.coord_units[key]
            comment = "  # CHECK: the file has no units"
        lines.append(f"  {key}: {_flow(spec)}{comment}")
    lines.append("variables:")
    centre_dims = [next(d for d, r in roles.items() if r == a) for a in ("time", "z", "y", "x")]
    for name in CANONICAL:
        p = report.proposals.get(name)
        if p is None or p.raw is None:
            spec = {"raw": "<not found>", "dims": centre_dims}
            lines.append(f"  {name}: {_flow(spec)}  # CHECK: nothing found; fill in by hand")
            continue
        spec = {"raw": p.raw, "dims": list(p.dims)}
        if p.quantity != "direct":
            spec["quantity"] = p.quantity
        comment = ""
        if p.assumed_units is not None:
            spec["units"] = p.assumed_units
            comment = "  # CHECK: the file has no units"
        elif p.units is not None:
            comment = f"  # units in the file: {p.units}"
        lines.append(f"  {name}: {_flow(spec)}{comment}")
    text = "\n".join(lines) + "\n"
    parse_varmap(text, path="<drafted variable map>")
    return text
