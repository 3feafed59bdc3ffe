"""The draft variable map (YAML) written from a survey report."""

from __future__ import annotations

import json
import re
from typing import Any

from lesprep.errors import ConfigError
from lesprep.raw.survey.hints import CANONICAL
from lesprep.raw.survey.records import InspectReport
from lesprep.raw.varmap import parse_varmap

_SIMPLE = re.compile(r"[A-Za-z_][A-Za-z0-9_.\-]*")
_YAML_WORDS = {"yes", "no", "on", "off", "true", "false", "null", "~"}  # PyYAML's specials


def _scalar(value: str) -> str:
    """A YAML scalar: plain when unambiguous, else a double-quoted (JSON) string."""
    if _SIMPLE.fullmatch(value) and value.lower() not in _YAML_WORDS:
        return value
    return json.dumps(value)


def _flow(items: dict[str, Any]) -> str:
    parts = []
    for k, v in items.items():
        if isinstance(v, dict):
            parts.append(f"{k}: {_flow(v)}")
        elif isinstance(v, (list, tuple)):
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
        ``variables`` (qc, qv, T, p, w, then any of qi, qr, u, v that were found; a
        field on horizontal faces with ``faces: {x: low|high}`` when the face coordinate
        tells). Assumptions are flagged with ``# CHECK`` comments; a required variable
        with no candidate gets ``raw: "<not found>"`` so ingest names it. The text is validated with
        :func:`lesprep.raw.varmap.parse_varmap`.

    Raises
    ------
    ConfigError
        If the archive lacks something every map needs (a dimension for each of time,
        z, y, x), so no valid map can be drafted.

    Examples
    --------
    >>> from lesprep.raw.survey import inspect_files
    >>> report = inspect_files(["resources/demo/sc-ostra-01"])
    >>> print(draft_varmap(report, flavour="ostra"))  # doctest: +ELLIPSIS
    # Variable map drafted by lesprep inspect from 5 file(s), e.g.
    # resources/demo/sc-ostra-01/snap_0000.nc
    ...
    flavour: ostra
    ...
    variables:
      p: {raw: pres, dims: [time, zc, y, x]}  # units in the file: hPa
      qc: {raw: liq, dims: [time, zc, y, x]}  # units in the file: g/kg
      qv: {raw: vap, dims: [time, zc, y, x], quantity: mixing_ratio}  # units in the file: g/kg
      T: {raw: tempc, dims: [time, zc, y, x], quantity: temperature}  # units in the file: degC
      w: {raw: wf, dims: [time, zf, y, x]}  # units in the file: m/s
    <BLANKLINE>
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
    for key in ("time", "z", "z_face", "z_bounds", "y", "x", "y_face", "x_face"):
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
    for name in (*CANONICAL, *(n for n in report.proposals if n not in CANONICAL)):
        p = report.proposals.get(name)
        if p is None or p.raw is None:
            spec = {"raw": "<not found>", "dims": centre_dims}
            lines.append(f"  {name}: {_flow(spec)}  # CHECK: nothing found; fill in by hand")
            continue
        spec = {"raw": p.raw, "dims": list(p.dims)}
        if p.quantity != "direct":
            spec["quantity"] = p.quantity
        if p.faces:
            spec["faces"] = dict(p.faces)
        comment = ""
        if p.assumed_units is not None:
            spec["units"] = p.assumed_units
            comment = "  # CHECK: the file has no units"
        elif p.units is not None:
            comment = f"  # units in the file: {p.units}"
        unstated = [
            roles[d].removesuffix("_face")
            for d in p.dims
            if roles.get(d) in ("x_face", "y_face")
            and roles[d].removesuffix("_face") not in p.faces
        ]
        if unstated:
            sides = ", ".join(f"{a}: low|high" for a in unstated)
            comment += f"  # CHECK: add faces: {{{sides}}}"
        lines.append(f"  {name}: {_flow(spec)}{comment}")
    text = "\n".join(lines) + "\n"
    parse_varmap(text, path="<drafted variable map>")
    return text
