"""What a survey finds: variables, dimensions, the time axis, proposals and the report."""

from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np

from lesprep.raw.survey.hints import CANONICAL

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
        ``qc``, ``qv``, ``T``, ``p`` or ``w`` (required), or ``qi``, ``qr``, ``u`` or
        ``v`` (optional, proposed only when found).
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
    faces
        For a field on horizontal faces, the side of each face axis the face coordinate
        shows (``{"x": "low"}``); empty when not staggered or when the files do not tell.
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
    faces: dict[str, str] = field(default_factory=dict)


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
        ``x``, ``y_face``, ``x_face``) -> raw variable.
    coord_units
        Coordinate key -> units to declare because the file has none.
    proposals
        Canonical name -> :class:`Proposal`: every required variable (``raw`` None when
        nothing fits), then the optional ones that were found.
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
        >>> from lesprep.raw.survey import inspect_files
        >>> report = inspect_files(["resources/demo/sc-ostra-01/snap_0000.nc"])
        >>> print(report.summary())  # doctest: +ELLIPSIS
        1 file(s):
          resources/demo/sc-ostra-01/snap_0000.nc
        dimensions:
          time        1  time    (coordinate time, axis T, unlimited)
          zc         16  z       (coordinate zc, axis Z)
          zf         17  z_face  (coordinate zf, axis Z; one more point than zc (17 vs 16): ...)
          y          16  y       (coordinate y, axis Y)
          x          16  x       (coordinate x, axis X)
        time axis: time (time): 1 output time(s) from 0 s to 0 s, counted from the start of ...
        variables:
        ...
          liq    (time=1, zc=16, y=16, x=16)  g/kg  cloud liquid water mixing ratio
        ...
        staggering: zf holds the faces of zc
        proposed mapping:
          p  <- pres (time, zc, y, x) hPa; score ...
          qc <- liq (time, zc, y, x) g/kg; score ...
          qv <- vap (time, zc, y, x) g/kg, quantity mixing_ratio; score ...
          T  <- tempc (time, zc, y, x) degC, quantity temperature; score ...
          w  <- wf (time, zf, y, x) m/s; score ...
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
        for name in (*CANONICAL, *(n for n in self.proposals if n not in CANONICAL)):
            p = self.proposals.get(name)
            if p is None or p.raw is None:
                lines.append(f"  {name:<2} <- (nothing found)")
                continue
            extra = f", quantity {p.quantity}" if p.quantity != "direct" else ""
            extra += "".join(f", {a} faces on the {side} side" for a, side in p.faces.items())
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
