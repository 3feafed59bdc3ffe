"""Target layers of vertical coarsening: configured layer sets and their overlap with a
case's LES levels.

A layer set is a list of interfaces, bottom to top, given in the config or read from a
small text file (one quantity with units per line, ``#`` starts a comment). Interfaces
with length units are heights above the surface; interfaces with pressure units are
mapped to heights with the case's horizontal-mean pressure profile at its first kept
output time (:func:`pressure_interfaces_to_heights`). That profile is fixed per case: new
output times appended to a case never move its layers.

Against a case's fine cell faces a set is resolved (:func:`resolve_layers`) to a
:class:`LayerGrid`: the interfaces clipped to the LES domain (layers wholly outside are
dropped; a warning names every clipped or dropped layer), and the overlap thickness of
every fine level with every layer (:func:`overlap_matrix`). A fine level that straddles an
interface is split between the two layers by overlap fraction.
"""

from __future__ import annotations

import logging
import re
from collections.abc import Mapping, Sequence
from dataclasses import dataclass, field
from functools import cached_property
from pathlib import Path
from typing import Any, Literal

import numpy as np
from numpy.typing import ArrayLike, NDArray

from lesprep.errors import ConfigError, GridError

log = logging.getLogger(__name__)

Weighting = Literal["mass", "thickness"]
Target = Literal["volume", "projected"]
Kind = Literal["height", "pressure"]

NAME_PATTERN = re.compile(r"^[A-Za-z][A-Za-z0-9]*$")
"""Layer-set names: letters and digits (they become part of store names)."""

LAYER_TAG = "_layers-"
"""Joins a scale label and a layer-set name into a store label: ``400m_layers-low30``."""


def layer_store_label(scale_label: str, layers: str) -> str:
    """Store label of a scale's store on a layer set.

    Examples
    --------
    >>> layer_store_label("500m", "low30")
    '500m_layers-low30'
    """
    return f"{scale_label}{LAYER_TAG}{layers}"


def split_store_label(label: str) -> tuple[str, str | None]:
    """``(scale label, layer-set name or None)`` of a store label.

    Examples
    --------
    >>> split_store_label("500m_layers-low30")
    ('500m', 'low30')
    >>> split_store_label("1000m")
    ('1000m', None)
    """
    scale, tag, name = label.partition(LAYER_TAG)
    return (scale, name) if tag else (label, None)


@dataclass(frozen=True, kw_only=True)
class LayerSetSpec:
    """One configured layer set, before it meets a case.

    Attributes
    ----------
    name
        Name of the set (part of the store labels).
    kind
        ``height`` (interfaces in m) or ``pressure`` (interfaces in Pa).
    interfaces
        Interfaces bottom to top: increasing heights or decreasing pressures.
    source
        Where they came from: ``config`` or the file's path.
    weighting
        ``mass`` (dry-air mass) or ``thickness``.
    scales
        Scale labels that get this set (empty: every scale).
    target
        The cloud fraction stored as ``cloud_fraction`` (the training target):
        ``volume`` or ``projected``.
    """

    name: str
    kind: Kind
    interfaces: tuple[float, ...]
    source: str
    weighting: Weighting = "mass"
    scales: tuple[str, ...] = ()
    target: Target = "volume"

    def __post_init__(self) -> None:
        if not NAME_PATTERN.match(self.name):
            raise ConfigError(
                f"coarsen.layers name {self.name!r} is not allowed; expected letters and "
                "digits, starting with a letter (it becomes part of store names)"
            )
        values = np.asarray(self.interfaces, dtype=np.float64)
        where = f"coarsen.layers {self.name!r} ({self.source})"
        if values.size < 2:
            raise ConfigError(f"{where} lists {values.size} interface(s); a layer needs two")
        if not np.all(np.isfinite(values)):
            raise ConfigError(f"{where} has a non-finite interface: {values.tolist()}")
        steps = np.diff(values) if self.kind == "height" else -np.diff(values)
        if np.any(steps <= 0):
            k = int(np.argmax(steps <= 0))
            order = "increasing heights" if self.kind == "height" else "decreasing pressures"
            raise ConfigError(
                f"{where}: interfaces are not monotonic at {k}-{k + 1} "
                f"({values[k]:g}, {values[k + 1]:g}); expected {order}, bottom to top"
            )
        if self.kind == "pressure" and values[-1] <= 0:
            raise ConfigError(f"{where}: pressure interfaces must be positive")
        if self.weighting not in ("mass", "thickness"):
            raise ConfigError(f"{where}: weighting {self.weighting!r}; expected mass or thickness")
        if self.target not in ("volume", "projected"):
            raise ConfigError(f"{where}: target {self.target!r}; expected volume or projected")
        object.__setattr__(self, "interfaces", tuple(float(v) for v in values))

    def applies_to(self, scale_label: str) -> bool:
        """Whether a scale gets this set."""
        return not self.scales or scale_label in self.scales

    def to_dict(self) -> dict[str, Any]:
        """Plain form (job params, provenance); :meth:`from_dict` inverts it."""
        return {
            "name": self.name,
            "kind": self.kind,
            "interfaces": list(self.interfaces),
            "source": self.source,
            "weighting": self.weighting,
            "scales": list(self.scales),
            "target": self.target,
        }

    @classmethod
    def from_dict(cls, d: Mapping[str, Any]) -> LayerSetSpec:
        """Inverse of :meth:`to_dict`."""
        return cls(
            name=d["name"],
            kind=d["kind"],
            interfaces=tuple(float(v) for v in d["interfaces"]),
            source=d["source"],
            weighting=d["weighting"],
            scales=tuple(d["scales"]),
            target=d["target"],
        )


def parse_interface(text: Any, *, name: str) -> tuple[Kind, float]:
    """One interface with units: ``("height", metres)`` or ``("pressure", pascals)``.

    Examples
    --------
    >>> parse_interface("1.5 km", name="x")
    ('height', 1500.0)
    >>> parse_interface("850 hPa", name="x")
    ('pressure', 85000.0)
    """
    from lesprep.units import ureg

    if isinstance(text, (int, float)) and not isinstance(text, bool):
        raise ConfigError(
            f"{name} = {text!r} has no units; expected a height ('{text} m') or a pressure "
            f"('{text} hPa')",
            hint="write every interface with its units",
        )
    try:
        q = ureg.Quantity(str(text).strip())
    except Exception as exc:  # pint raises several unrelated types here
        raise ConfigError(f"{name} = {text!r} is not a quantity with units: {exc}") from None
    for kind, units in (("height", "m"), ("pressure", "Pa")):
        if q.dimensionality == ureg.Quantity(1, units).dimensionality:
            return kind, float(q.to(units).magnitude)  # type: ignore[return-value]
    raise ConfigError(
        f"{name} = {text!r} has units {q.units}; expected a length (m, km) or a pressure (Pa, hPa)"
    )


def read_interface_file(path: str | Path) -> list[str]:
    """Interfaces listed in a text file: one quantity with units per line, bottom to
    top; blank lines and text after ``#`` are ignored."""
    p = Path(path)
    try:
        text = p.read_text()
    except OSError as exc:
        raise ConfigError(f"cannot read the layer file {p}: {exc.strerror}") from None
    lines = [ln.split("#", 1)[0].strip() for ln in text.splitlines()]
    return [ln for ln in lines if ln]


def parse_layer_sets(
    entries: Sequence[Mapping[str, Any]], scale_labels: Sequence[str], *, base: Path
) -> tuple[LayerSetSpec, ...]:
    """Parse the validated ``coarsen.layers`` list once (files are read here, so their
    contents enter the job parameters and a changed file re-runs the jobs).

    Parameters
    ----------
    entries
        The config's layer sets.
    scale_labels
        Labels of the configured scales (a set may name only these).
    base
        Folder relative file paths are resolved against (the working directory).
    """
    from lesprep.scales.spec import parse_scale

    out: list[LayerSetSpec] = []
    for e in entries:
        name = str(e["name"])
        if ("interfaces" in e) == ("file" in e):
            raise ConfigError(
                f"coarsen.layers {name!r}: give either `interfaces` or `file`, not "
                f"{'both' if 'interfaces' in e else 'neither'}"
            )
        if "file" in e:
            path = Path(e["file"])
            path = path if path.is_absolute() else base / path
            texts, source = read_interface_file(path), str(e["file"])
        else:
            texts, source = list(e["interfaces"]), "config"
        parsed = [
            parse_interface(t, name=f"coarsen.layers {name!r} interface {i}")
            for i, t in enumerate(texts)
        ]
        kinds = {k for k, _ in parsed}
        if len(kinds) > 1:
            raise ConfigError(
                f"coarsen.layers {name!r} ({source}) mixes heights and pressures; expected one kind"
            )
        scales = tuple(parse_scale(v).label for v in e["scales"])
        unknown = [s for s in scales if s not in scale_labels]
        if unknown:
            raise ConfigError(
                f"coarsen.layers {name!r} names scale(s) {unknown}, not in coarsen.scales "
                f"({list(scale_labels)})"
            )
        out.append(
            LayerSetSpec(
                name=name,
                kind=kinds.pop() if kinds else "height",
                interfaces=tuple(v for _, v in parsed),
                source=source,
                weighting=e["weighting"],
                scales=scales,
                target=e["target"],
            )
        )
    names = [s.name for s in out]
    dup = sorted({n for n in names if names.count(n) > 1})
    if dup:
        raise ConfigError(f"coarsen.layers lists the name(s) {dup} twice")
    return tuple(out)


# --------------------------------------------------------------------------------------
# Resolution against a case
# --------------------------------------------------------------------------------------


def centres_and_bounds(
    faces: ArrayLike,
) -> tuple[NDArray[np.float64], NDArray[np.float64]]:
    """The z and z_bounds of layers with interfaces ``faces`` (m): each layer's midpoint
    and its ``(nl, 2)`` lower and upper interface (CF bounds).

    Examples
    --------
    >>> z, bounds = centres_and_bounds([0.0, 100.0, 300.0])
    >>> z.tolist(), bounds.tolist()
    ([50.0, 200.0], [[0.0, 100.0], [100.0, 300.0]])
    """
    f = np.asarray(faces, dtype=np.float64)
    return 0.5 * (f[:-1] + f[1:]), np.stack([f[:-1], f[1:]], axis=1)


@dataclass(frozen=True, kw_only=True)
class LayerGrid:
    """A layer set resolved for one case's LES levels.

    Attributes
    ----------
    spec
        The configured set.
    faces
        Layer interfaces in m, ``(nl + 1,)``, inside the LES domain.
    overlap
        Overlap thickness (m) of fine level ``k`` with layer ``l``, ``(nz, nl)``; each
        row sums to the part of the fine cell inside the layers.
    notes
        Clipping and dropping messages (also logged as warnings).
    pressure_faces
        The configured pressure interfaces of the kept layers (Pa), for a pressure set.
    """

    spec: LayerSetSpec
    faces: NDArray[np.float64]
    overlap: NDArray[np.float64]
    notes: tuple[str, ...] = ()
    pressure_faces: NDArray[np.float64] | None = field(default=None)

    @property
    def nl(self) -> int:
        """Number of layers."""
        return int(self.faces.size - 1)

    @property
    def centres(self) -> NDArray[np.float64]:
        """Layer centre heights (m): the midpoints of the interfaces."""
        return centres_and_bounds(self.faces)[0]

    @property
    def bounds(self) -> NDArray[np.float64]:
        """``(nl, 2)`` lower and upper interface of each layer (CF bounds)."""
        return centres_and_bounds(self.faces)[1]

    @cached_property
    def level_span(self) -> tuple[NDArray[np.int64], NDArray[np.int64]]:
        """For each fine level, the first layer it overlaps and one past the last
        (``first == stop`` for a level outside every layer); computed once per grid."""
        touched = self.overlap > 0
        anyl = touched.any(axis=1)
        first = np.where(anyl, touched.argmax(axis=1), 0)
        last = np.where(anyl, self.nl - touched[:, ::-1].argmax(axis=1), 0)
        return first.astype(np.int64), last.astype(np.int64)


def overlap_matrix(fine_faces: ArrayLike1D, layer_faces: ArrayLike1D) -> NDArray[np.float64]:
    """Overlap thickness of every fine cell with every layer.

    Parameters
    ----------
    fine_faces
        ``(nz + 1,)`` increasing fine-cell faces (m).
    layer_faces
        ``(nl + 1,)`` increasing layer interfaces (m).

    Returns
    -------
    numpy.ndarray
        ``(nz, nl)``: ``max(0, min(top_k, top_l) - max(bottom_k, bottom_l))``.

    Examples
    --------
    >>> overlap_matrix([0.0, 10.0, 30.0], [0.0, 20.0, 30.0]).tolist()
    [[10.0, 0.0], [10.0, 10.0]]
    """
    f = np.asarray(fine_faces, dtype=np.float64)
    g = np.asarray(layer_faces, dtype=np.float64)
    lo = np.maximum(f[:-1, None], g[None, :-1])
    hi = np.minimum(f[1:, None], g[None, 1:])
    return np.maximum(hi - lo, 0.0)


ArrayLike1D = Sequence[float] | NDArray[np.float64]


def pressure_interfaces_to_heights(
    p_interfaces: ArrayLike1D, z: ArrayLike1D, p_profile: ArrayLike1D, *, case: str = ""
) -> NDArray[np.float64]:
    """Heights of pressure interfaces on a case's mean pressure profile.

    ``z`` is linear in ``ln p`` between the profile's levels (exact for an isothermal
    hydrostatic atmosphere, and within a few metres for the lapse rates of a boundary
    layer at LES level spacing); outside the profile the end segments are extended.

    Parameters
    ----------
    p_interfaces
        Pressures (Pa).
    z, p_profile
        Cell-centre heights (m) and the horizontal-mean pressure there (Pa), decreasing.

    Examples
    --------
    >>> z = np.array([0.0, 1000.0])
    >>> p = 1e5 * np.exp(-z / 8000.0)
    >>> pressure_interfaces_to_heights([1e5 * np.exp(-0.0625)], z, p).round(6).tolist()
    [500.0]
    """
    zz = np.asarray(z, dtype=np.float64)
    pp = np.asarray(p_profile, dtype=np.float64)
    if zz.size < 2 or np.any(~np.isfinite(pp)) or np.any(pp <= 0) or np.any(np.diff(pp) >= 0):
        raise GridError(
            "the horizontal-mean pressure profile at the first kept output time must be "
            f"positive and decrease with height at every level (found {pp[:3].tolist()}...)",
            case=case or None,
            variable="p",
        )
    x = -np.log(pp)  # increasing with height
    q = -np.log(np.asarray(p_interfaces, dtype=np.float64))
    out = np.interp(q, x, zz)
    below, above = q < x[0], q > x[-1]
    slope0 = (zz[1] - zz[0]) / (x[1] - x[0])
    slope1 = (zz[-1] - zz[-2]) / (x[-1] - x[-2])
    out[below] = zz[0] + (q[below] - x[0]) * slope0
    out[above] = zz[-1] + (q[above] - x[-1]) * slope1
    return out


def resolve_layers(
    spec: LayerSetSpec,
    fine_faces: ArrayLike1D,
    *,
    z: ArrayLike1D | None = None,
    p_profile: ArrayLike1D | None = None,
    case: str = "",
) -> LayerGrid:
    """Resolve a layer set against a case's fine cell faces.

    Interfaces outside the domain ``[fine_faces[0], fine_faces[-1]]`` are clipped to it;
    a layer wholly outside is dropped. Each is named in a warning and in
    :attr:`LayerGrid.notes`.

    Parameters
    ----------
    spec
        The layer set.
    fine_faces
        The case's fine cell faces (m), ``(nz + 1,)``.
    z, p_profile
        Cell centres and the horizontal-mean pressure at the first kept output time
        (needed for a pressure set).
    case
        Case name, for messages.

    Raises
    ------
    GridError
        When no layer is left inside the domain, or a layer overlaps no fine level.
    """
    ff = np.asarray(fine_faces, dtype=np.float64)
    given = np.asarray(spec.interfaces, dtype=np.float64)
    if spec.kind == "pressure":
        if z is None or p_profile is None:
            raise GridError(
                f"layer set {spec.name!r} is given in pressure; its mapping to heights "
                "needs the case's pressure profile",
                case=case or None,
            )
        heights = pressure_interfaces_to_heights(given, z, p_profile, case=case)
    else:
        heights = given.copy()
    bottom, top = float(ff[0]), float(ff[-1])
    notes: list[str] = []
    keep: list[int] = []
    for i in range(heights.size - 1):
        lo, hi = heights[i], heights[i + 1]
        what = f"layer {i} [{lo:.6g} m, {hi:.6g} m] of set {spec.name!r}"
        if hi <= bottom or lo >= top:
            notes.append(f"{what} lies outside the LES domain [{bottom:g} m, {top:g} m]: dropped")
            continue
        if lo < bottom or hi > top:
            notes.append(
                f"{what} reaches outside the LES domain [{bottom:g} m, {top:g} m]: clipped to "
                f"[{max(lo, bottom):.6g} m, {min(hi, top):.6g} m]"
            )
        keep.append(i)
    if not keep:
        raise GridError(
            f"no layer of set {spec.name!r} ({spec.source}) lies inside the LES domain "
            f"[{bottom:g} m, {top:g} m] (interfaces {np.round(heights, 3).tolist()} m)",
            case=case or None,
            hint="check the interfaces' units and the case's vertical extent",
        )
    if keep != list(range(keep[0], keep[-1] + 1)):  # pragma: no cover - monotonic input
        raise GridError(f"layer set {spec.name!r}: kept layers are not contiguous")
    faces = np.clip(heights[keep[0] : keep[-1] + 2], bottom, top)
    ov = overlap_matrix(ff, faces)
    empty = np.flatnonzero(ov.sum(axis=0) <= 0)
    if empty.size:
        raise GridError(
            f"layer(s) {empty.tolist()} of set {spec.name!r} overlap no fine level",
            case=case or None,
        )
    for n in notes:
        log.warning("case %s: %s", case, n)
    pfaces = given[keep[0] : keep[-1] + 2] if spec.kind == "pressure" else None
    return LayerGrid(spec=spec, faces=faces, overlap=ov, notes=tuple(notes), pressure_faces=pfaces)
