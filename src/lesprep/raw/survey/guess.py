"""Scoring raw variables as catalogue variables and proposing the best assignment."""

from __future__ import annotations

import dataclasses
import re
from collections.abc import Sequence
from pathlib import Path

import numpy as np

from lesprep import catalogue
from lesprep.errors import GridError
from lesprep.raw.grid import face_offset
from lesprep.raw.survey.hints import (
    _EXCLUDE_LONG,
    _EXCLUDE_NAME,
    _LONG,
    _PARTIAL,
    _SHORT,
    _STANDARD,
    CANONICAL,
    MIN_SCORE,
    OPTIONAL,
    OPTIONAL_MIN_SCORE,
    PROPOSED,
)
from lesprep.raw.survey.records import DimInfo, InspectReport, Proposal, VariableInfo
from lesprep.raw.survey.scan import (
    attr_text,
    dimension_roles,
    expand_paths,
    scan_files,
    time_axis_of,
)
from lesprep.units import ureg

# --------------------------------------------------------------------------- matching


def _tokens(name: str) -> set[str]:
    low = name.lower()
    return {low, *(t for t in re.split(r"[^a-z0-9]+", low) if t)}


def _units_ok(canonical: str, units: str | None) -> bool | None:
    """True/False for (in)compatible units, None when the file has none or unparsable."""
    if units is None:
        return None
    if canonical in ("qc", "qv", "qi", "qr") and units.strip() in ("%", "percent"):
        return False
    try:
        found = ureg.Unit(units.strip())
    except Exception:  # pint raises several unrelated types
        return None
    return found.dimensionality == ureg.Unit(catalogue.get(canonical).units).dimensionality


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
    if canonical in ("qi", "qr") and "mass fraction" in long:
        return "mass_fraction"
    return from_names or "direct"


def _score(canonical: str, v: VariableInfo) -> tuple[float, str, list[str]] | None:
    """Evidence for ``v`` as ``canonical``: (score, quantity, reasons), or None."""
    if _excluded(canonical, v):
        return None
    score, from_names, reasons = _evidence(canonical, v)
    if score < (OPTIONAL_MIN_SCORE if canonical in OPTIONAL else MIN_SCORE):
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


_OWN_FACE = {"w": "z_face", "u": "x_face", "v": "y_face"}
"""The staggered dimension a velocity component is usually stored on (C-grid)."""


def _staggered_velocity(
    canonical: str, v: VariableInfo, axes: tuple[str, ...]
) -> tuple[float, str, list[str]] | None:
    """A field in velocity units on the staggered dimension of one axis alone is almost
    always the velocity component along that axis (w on z faces, u on x faces, v on y
    faces), whatever its name: evidence just above :data:`MIN_SCORE` (a named candidate
    wins)."""
    own = _OWN_FACE.get(canonical)
    faces = {a for a in axes if a.endswith("_face")}
    if (
        own is None
        or own not in faces
        or _excluded(canonical, v)
        or not _units_ok(canonical, v.units)
    ):
        return None
    if canonical != "w" and faces != {own}:
        return None  # on the faces of two axes: not a plain C-grid component
    where = "vertical" if canonical == "w" else own.removesuffix("_face")
    reasons = [f"units {v.units!r} (a velocity) on the staggered {where} dimension"]
    return MIN_SCORE + 1.0, "direct", reasons


def _candidates(
    variables: dict[str, VariableInfo], dims: dict[str, DimInfo], skip: set[str]
) -> dict[str, list[_Scored]]:
    """Every fitting raw variable of each canonical one, best first."""
    scored: dict[str, list[_Scored]] = {c: [] for c in PROPOSED}
    for v in variables.values():
        axes = None if v.name in skip else _axes(v, dims)
        if axes is None:
            continue
        for c in PROPOSED:
            found = _score(c, v) if _fits(c, axes) else None
            if found is None and c in _OWN_FACE and _fits(c, axes):
                found = _staggered_velocity(c, v, axes)
            if found is None:
                continue
            score, quantity, reasons = found
            if c == "p" and len(axes) >= 3:
                score, reasons = score + 0.5, [*reasons, "full 3-D field"]
            if c == "w" and not any(a.endswith("_face") for a in axes):
                score, reasons = score + 0.5, [*reasons, "at cell centres"]
            scored[c].append((score, v.name, quantity, reasons))
    for c in PROPOSED:
        scored[c].sort(key=lambda s: (-s[0], s[1]))
    return scored


def _assign(scored: dict[str, list[_Scored]]) -> dict[str, str]:
    """Canonical -> raw, greedily by score; each raw variable used once. The required
    variables are assigned first, so an optional one never takes their raw variable."""
    chosen: dict[str, str] = {}
    for group in (CANONICAL, OPTIONAL):
        pairs = sorted(
            ((s[0], c, s[1]) for c in group for s in scored[c]), key=lambda p: (-p[0], p[1], p[2])
        )
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


def face_sides(
    dims: dict[str, DimInfo],
    staggered: dict[str, str],
    coord_values: dict[str, np.ndarray],
    notes: list[str],
) -> dict[str, str]:
    """Side (``low``/``high``) of each horizontal face dimension whose coordinate tells.

    A face dimension with a coordinate that is not at half-cell offsets from the centres
    gets no side and a note (:func:`lesprep.raw.grid.face_offset` says what is wrong).
    """
    out: dict[str, str] = {}
    for f, c in staggered.items():
        role = dims[f].role
        if role not in ("x_face", "y_face"):
            continue
        axis = role.removesuffix("_face")
        fc, cc = dims[f].coordinate, dims[c].coordinate
        if fc is None or cc is None or fc not in coord_values or cc not in coord_values:
            notes.append(
                f"dimension {f!r} holds {axis} faces but the files do not say where they "
                f"lie; state 'faces: {{{axis}: low}}' or 'faces: {{{axis}: high}}' on the "
                "variables that use it -- CHECK"
            )
            continue
        try:
            out[f] = face_offset(coord_values[fc], coord_values[cc], axis_name=axis, variable=fc)
        except GridError as exc:
            notes.append(f"face coordinate {fc!r}: {exc.message} -- CHECK")
    return out


def _propose(
    variables: dict[str, VariableInfo],
    dims: dict[str, DimInfo],
    skip: set[str],
    notes: list[str],
    sides: dict[str, str] | None = None,
) -> dict[str, Proposal]:
    scored = _candidates(variables, dims, skip)
    chosen = _assign(scored)
    out: dict[str, Proposal] = {}
    for c in PROPOSED:
        raw = chosen.get(c)
        if raw is None and c in OPTIONAL:
            continue  # optional: proposed only when found
        if raw is None:
            notes.append(f"no raw variable looks like {c}; fill in 'variables: {c}:' by hand")
            out[c] = Proposal(canonical=c, raw=None)
            continue
        score, _, quantity, reasons = next(s for s in scored[c] if s[1] == raw)
        v = variables[raw]
        notes.extend(_proposal_notes(c, v))
        faces = {
            dims[d].role.removesuffix("_face"): (sides or {})[d]  # type: ignore[union-attr]
            for d in v.dims
            if d in (sides or {})
        }
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
            faces=faces,
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
    >>> report = inspect_files(["resources/demo/sc-ostra-01"])
    >>> len(report.files), report.time.times_s
    (5, (0.0, 1800.0, 3600.0, 5400.0, 7200.0))
    >>> report.proposals["qc"].raw, report.proposals["w"].raw
    ('liq', 'wf')
    >>> report.staggered
    {'zf': 'zc'}
    """
    files = expand_paths(paths)
    scan = scan_files(files)
    notes = list(scan.notes)
    sizes = {d: max(s) for d, s in scan.dim_sizes.items()}
    for d, s in scan.dim_sizes.items():
        if len(s) > 1 and d not in scan.unlimited:
            notes.append(f"dimension {d!r} has different sizes in different files: {sorted(s)}")
    dims, staggered, role_notes = dimension_roles(scan, sizes)
    notes += role_notes
    time, ntimes = time_axis_of(scan, dims, notes)
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
            units=attr_text(attrs.get("units")),
            standard_name=attr_text(attrs.get("standard_name")),
            long_name=attr_text(attrs.get("long_name")),
            axis=attr_text(attrs.get("axis")),
            positive=attr_text(attrs.get("positive")),
            bounds=attr_text(attrs.get("bounds")),
        )
    coords: dict[str, str] = {}
    coord_units: dict[str, str] = {}
    for d in dims.values():
        if d.role is None:
            continue
        key = d.role
        if key in ("y_face", "x_face") and d.coordinate is None:
            continue  # the note on where the faces lie comes from face_sides
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
    sides = face_sides(dims, staggered, scan.coord_values, notes)
    proposals = _propose(variables, dims, {s for s in skip if s}, notes, sides)
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
