"""Multi-scale coarsening of one case: sub-grid moments, GCM-view inputs, fine patches.

For every kept output time the canonical fine fields are read once, one z-slab (one chunk
height) at a time, and every scale of the job's group is computed from each slab in one
pass: the finest factor from the fine field, each coarser factor from the moments of the
finest computed factor dividing it (:func:`lesprep.scales.moments.hierarchical_moments`). Only
``drh_dz`` and the column quantities need the whole column; they are added when a time
step's last slab is done (:class:`StepCoarsener`). Per coarse cell ``(time, z, y, x)``:

``<v>_mean``, ``<v>_var``, ``<v>_skew``
    block mean, population variance (``M2 / n``) and skewness ``g1 = (M3/n) / var**1.5``
    (0 where the block is constant, see :mod:`lesprep.scales.moments`) of each moment variable.
``cloud_fraction``
    block mean of the fine cloud mask (the training target).
``rh_of_means``
    relative humidity computed from the coarse means of qv, T and p (what a coarse model
    knows), beside ``rh_mean``, the block mean of the fine relative humidity.
``drh_dz``
    vertical derivative of ``rh_of_means`` on the (possibly stretched) z grid: second-order
    differences for non-uniform spacing inside, second-order one-sided at the ends
    (``numpy.gradient(..., edge_order=2)``).
``cf_sundqvist``
    the Sundqvist et al. (1989) cloud fraction from ``rh_of_means`` (a classical baseline).
``lwp_mean``, ``lwp_var``, ``cloud_cover``
    column quantities: block mean and population variance of the liquid water path, and
    the fraction of fine columns with any cloudy cell.
``<v>_patch``
    the fine field under each coarse cell (:mod:`lesprep.scales.patches`).

Arithmetic is float64; stored values are float32 unless the config says otherwise.
"""

from __future__ import annotations

import contextlib
import logging
from collections.abc import Iterator, Mapping, Sequence
from concurrent.futures import Future, ThreadPoolExecutor
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import numpy as np
import numpy.typing as npt
import xarray as xr
import zarr

from lesprep import provenance
from lesprep._memory import retain_freed_memory
from lesprep.canonical import derived
from lesprep.errors import ConfigError, ScaleError
from lesprep.scales.moments import (
    block_mean,
    hierarchical_fractions,
    hierarchical_moments,
    plan_hierarchy,
)
from lesprep.scales.patches import extract_patches, patch_geometry
from lesprep.scales.spec import Scale, ScaleSpec, parse_scales
from lesprep.schemes import sundqvist_cloud_fraction
from lesprep.store import (
    ArraySpec,
    TimeWriter,
    atomic_path,
    compressors,
    consolidate,
    create_store,
    open_store,
)

log = logging.getLogger(__name__)

WRITE_BUFFER_BYTES = 256 * 2**20
"""Time steps buffered for writing, over all scales of a job (one large step is never
split)."""

UNITS = {"qc": "kg kg-1", "qv": "kg kg-1", "T": "K", "w": "m s-1", "rh": "1", "p": "Pa"}
VAR_UNITS = {"qc": "kg2 kg-2", "qv": "kg2 kg-2", "T": "K2", "w": "m2 s-2", "rh": "1", "p": "Pa2"}
NAMES = {
    "qc": "cloud liquid water mixing ratio",
    "qv": "water vapour mixing ratio",
    "T": "air temperature",
    "w": "vertical velocity",
    "rh": "relative humidity",
    "p": "air pressure",
}
STANDARD = {
    "qc": "cloud_liquid_water_mixing_ratio",
    "qv": "humidity_mixing_ratio",
    "T": "air_temperature",
    "w": "upward_air_velocity",
    "rh": "relative_humidity",
    "p": "air_pressure",
}


@dataclass(frozen=True, kw_only=True)
class CoarsenSettings:
    """Resolved coarsening settings of one job."""

    scales: tuple[ScaleSpec, ...]
    moments: tuple[str, ...] = ("qc", "w", "qv", "T", "rh")
    patch_variables: tuple[str, ...] = ("qc", "w")
    patch_scales: tuple[str, ...] = ()
    patch_size: int = 16
    patch_halo: int = 0
    on_misfit: str = "error"
    rh_critical: float = 0.8
    dtype: str = "float32"
    chunk_mib: float = 8.0
    store: dict[str, Any] = field(default_factory=dict)

    def to_dict(self) -> dict[str, Any]:
        """Record for provenance."""
        return {
            "scales": [s.text for s in self.scales],
            "moments": list(self.moments),
            "patch_variables": list(self.patch_variables),
            "patch_scales": list(self.patch_scales),
            "patch_size": self.patch_size,
            "patch_halo": self.patch_halo,
            "on_misfit": self.on_misfit,
            "rh_critical": self.rh_critical,
            "dtype": self.dtype,
            "chunk_mib": self.chunk_mib,
            "store": self.store,
        }


def settings_from_config(cfg: Mapping[str, Any], labels: Sequence[str]) -> CoarsenSettings:
    """Coarsening settings for the scales ``labels`` of a validated config."""
    c = cfg["coarsen"]
    specs = [s for s in parse_scales(c["scales"]) if s.label in labels]
    missing = sorted(set(labels) - {s.label for s in specs})
    if missing:
        raise ConfigError(f"scale label(s) {missing} are not in coarsen.scales")
    pt = c.get("patches", {})
    patch_labels = tuple(s.label for s in parse_scales(pt.get("scales", []) or []))
    return CoarsenSettings(
        scales=tuple(specs),
        moments=tuple(c.get("moments", ("qc", "w", "qv", "T", "rh"))),
        patch_variables=tuple(pt.get("variables", ("qc", "w"))),
        patch_scales=patch_labels,
        patch_size=int(pt.get("size", 16)),
        patch_halo=int(pt.get("halo", 0)),
        on_misfit=c.get("on_misfit", "error"),
        rh_critical=float(c.get("baseline_rh_critical", 0.8)),
        dtype=cfg["ingest"].get("dtype", "float32"),
        chunk_mib=float(c.get("chunk_mib", 8)),
        store=dict(cfg.get("store", {})),
    )


def vertical_derivative(values: np.ndarray, z: np.ndarray, *, axis: int = 0) -> np.ndarray:
    """d(values)/dz on a non-uniform grid: second order inside and at the ends."""
    return np.gradient(np.asarray(values, dtype=np.float64), z, axis=axis, edge_order=2)


def hierarchical_means(a: np.ndarray, factors: Sequence[int]) -> dict[int, np.ndarray]:
    """Block means for several factors, coarser ones from finer ones (exact for means)."""
    out: dict[int, np.ndarray] = {}
    for f, parent in plan_hierarchy(factors).items():
        out[f] = block_mean(a, f) if parent is None else block_mean(out[parent], f // parent)
    return out


SLAB_INPUTS = ("qc", "qv", "T", "w", "rh", "cloud_mask")
"""Canonical 3-D fields read one z-slab at a time (with ``p`` when it is 3-D)."""


def slab_bounds(nz: int, levels: int) -> list[tuple[int, int]]:
    """``(z0, z1)`` of consecutive slabs of at most ``levels`` levels covering ``nz``."""
    step = max(1, int(levels))
    return [(z0, min(nz, z0 + step)) for z0 in range(0, nz, step)]


def z_chunk_levels(shape: Sequence[int], itemsize: int, chunk_mib: float, slab: int) -> int:
    """Levels per z-chunk of a coarse ``(nz, ...)`` output array.

    About ``chunk_mib`` MiB, as a whole multiple of the slab height ``slab`` (the
    canonical chunk height coarsening reads at a time) or, for levels so large that a
    slab exceeds the budget, one slab: every chunk row is then finished by one slab and
    can be written while the next is computed. A column that fits is one chunk.
    """
    nz = int(shape[0])
    per_level = max(1, int(np.prod(shape[1:])) * int(itemsize))
    budget = int(chunk_mib * 2**20 // per_level)
    if budget >= nz:
        return nz
    return max(1, min(nz, int(slab) * max(1, budget // int(slab))))


class ZPieces:
    """A ``(nz, ...)`` output kept as one array per z-chunk row, each allocated when a
    slab first writes into it and handed on (:meth:`take_complete`) once it is full."""

    def __init__(self, shape: tuple[int, ...], dtype: npt.DTypeLike, rows: int) -> None:
        self.shape = tuple(shape)
        self.ndim = len(self.shape)
        self.dtype = np.dtype(dtype)
        self.rows = int(rows)
        self.pieces: dict[int, np.ndarray] = {}

    def __getitem__(self, sl: slice) -> np.ndarray:
        z0, z1 = int(sl.start), int(sl.stop)
        start = (z0 // self.rows) * self.rows
        end = min(self.shape[0], start + self.rows)
        if z1 > end:
            raise ValueError(f"levels {z0}:{z1} cross the z-chunk boundary at {end}")
        piece = self.pieces.get(start)
        if piece is None:
            piece = self.pieces[start] = np.empty((end - start, *self.shape[1:]), self.dtype)
        return piece[z0 - start : z1 - start]

    def __setitem__(self, sl: slice, value: Any) -> None:
        self[sl][...] = value

    def take_complete(self, upto: int) -> list[tuple[int, np.ndarray]]:
        """Pop the pieces that end at or below level ``upto``: ``(first level, array)``."""
        done = [z for z, a in self.pieces.items() if z + a.shape[0] <= upto]
        return [(z, self.pieces.pop(z)) for z in sorted(done)]


class StepCoarsener:
    """Coarse fields of one output time, built from z-slabs of the fine fields.

    Every statistic except ``drh_dz`` and the column quantities is horizontal, so each
    slab of levels is coarsened on its own and written into the step's output arrays:
    the float64 work arrays are sized by the slab, not the column. :meth:`finish` adds
    the column quantities and the vertical derivative (from float64 ``rh_of_means``).

    Parameters
    ----------
    z
        Cell-centre heights (m), ``(nz,)``.
    shape
        Fine ``(nz, ny, nx)``.
    scales, settings
        Resolved scales and the coarsening settings.
    dtype
        dtype of the outputs (arithmetic is float64).
    p_profile
        The ``(nz,)`` pressure profile when pressure is 1-D, else None (then every slab
        carries ``p``).
    stream
        None: every output is a whole column, returned by :meth:`finish`. Else
        ``(chunk_mib, slab)``: 3-D and patch outputs whose column needs more than one
        z-chunk (:func:`z_chunk_levels`) are kept as :class:`ZPieces` and each finished
        chunk row is handed out by :meth:`take_rows` as soon as a slab completes it
        (``drh_dz``, which needs the whole column, is always returned by :meth:`finish`).
    """

    def __init__(
        self,
        z: np.ndarray,
        shape: tuple[int, int, int],
        scales: Sequence[Scale],
        settings: CoarsenSettings,
        *,
        dtype: npt.DTypeLike = np.float64,
        p_profile: np.ndarray | None = None,
        stream: tuple[float, int] | None = None,
    ) -> None:
        self.stream = stream
        self.rows: list[tuple[str, int, dict[str, np.ndarray]]] = []
        self.z = np.asarray(z, dtype=np.float64)
        self.shape = tuple(int(n) for n in shape)
        self.scales = list(scales)
        self.settings = settings
        self.dtype = np.dtype(dtype)
        self.p_profile = None if p_profile is None else np.asarray(p_profile, np.float64)
        self.factors = sorted({s.factor for s in self.scales})
        self.need = list(dict.fromkeys([*settings.moments, "qv", "T"]))

    def begin(self) -> None:
        """Allocate the output arrays of a new time step."""
        nz, ny, nx = self.shape
        dt = self.dtype
        st = self.settings
        self.out: dict[str, dict[str, np.ndarray]] = {}
        self.rh64 = {f: np.empty((nz, ny // f, nx // f)) for f in self.factors}
        self.column = np.zeros((ny, nx), dtype=bool)
        for s in self.scales:
            f = s.factor
            c3 = (nz, ny // f, nx // f)
            names = []
            for v in self.need:
                names.append(f"{v}_mean")
                if v in st.moments:
                    names += [f"{v}_var", f"{v}_skew"]
            names += ["p_mean", "cloud_fraction", "rh_of_means", "drh_dz", "cf_sundqvist"]
            d: dict[str, Any] = {n: self._column(n, c3) for n in names}
            for n in ("lwp_mean", "lwp_var", "cloud_cover"):
                d[n] = np.empty(c3[1:], dtype=dt)
            if s.label in st.patch_scales:
                _, edge = patch_geometry(f, st.patch_size, st.patch_halo)
                for v in st.patch_variables:
                    d[f"{v}_patch"] = self._column(f"{v}_patch", (*c3, edge, edge))
            self.out[s.label] = d

    def _column(self, name: str, shape: tuple[int, ...]) -> Any:
        if self.stream is not None and name != "drh_dz":
            rows = z_chunk_levels(shape, self.dtype.itemsize, *self.stream)
            if rows < shape[0]:
                return ZPieces(shape, self.dtype, rows)
        return np.empty(shape, dtype=self.dtype)

    def take_rows(self) -> list[tuple[str, int, dict[str, np.ndarray]]]:
        """Finished z-chunk rows of streamed outputs: ``(scale label, first level,
        {name: array})``, each given out once."""
        rows, self.rows = self.rows, []
        return rows

    def add_slab(self, z0: int, fine: Mapping[str, np.ndarray]) -> None:
        """Coarsen the levels ``z0 : z0 + k`` (``fine`` holds ``SLAB_INPUTS`` and, for 3-D
        pressure, ``p``, each ``(k, ny, nx)``)."""
        st = self.settings
        factors = self.factors
        k = int(np.shape(fine["qc"])[0])
        sl = slice(z0, z0 + k)
        moments = {v: hierarchical_moments(fine[v], factors) for v in self.need}
        mask = np.asarray(fine["cloud_mask"])
        self.column |= np.any(mask, axis=0)
        cf = hierarchical_fractions(mask, factors)
        p_means = None if self.p_profile is not None else hierarchical_means(fine["p"], factors)
        for s in self.scales:
            f = s.factor
            d = self.out[s.label]
            for v in self.need:
                m = moments[v][f]
                if v in st.moments:
                    m.variance_and_skewness(
                        out=(d[f"{v}_var"][sl], d[f"{v}_skew"][sl]), mean_out=d[f"{v}_mean"][sl]
                    )
                else:
                    d[f"{v}_mean"][sl] = m.mean
            t_mean, qv_mean = moments["T"][f].mean, moments["qv"][f].mean
            if p_means is not None:
                p3 = p_means[f]
            else:  # a 1-D profile: the same at every coarse cell of a level
                assert self.p_profile is not None
                p3 = np.broadcast_to(self.p_profile[sl, None, None], t_mean.shape)
            d["p_mean"][sl] = p3
            d["cloud_fraction"][sl] = cf[f]
            rh = derived.relative_humidity(p3, t_mean, qv_mean, out=self.rh64[f][sl])
            d["rh_of_means"][sl] = rh
            sundqvist_cloud_fraction(rh, st.rh_critical, out=d["cf_sundqvist"][sl])
            if s.label in st.patch_scales:
                ds, _ = patch_geometry(f, st.patch_size, st.patch_halo)
                for v in st.patch_variables:
                    means = None  # the downsampled patch is a block mean computed above
                    if ds > 1 and ds in factors and v in moments:
                        means = moments[v][ds].mean
                    elif ds > 1 and ds in factors and v == "cloud_mask":
                        means = cf[ds]
                    src = mask if v == "cloud_mask" else fine[v]
                    extract_patches(
                        src, f, st.patch_size, st.patch_halo, means=means, out=d[f"{v}_patch"][sl]
                    )
        for s in self.scales:
            ready: dict[int, dict[str, np.ndarray]] = {}
            for name, arr in self.out[s.label].items():
                if isinstance(arr, ZPieces):
                    for zs, piece in arr.take_complete(z0 + k):
                        ready.setdefault(zs, {})[name] = piece
            self.rows.extend((s.label, zs, part) for zs, part in sorted(ready.items()))

    def finish(self, lwp: np.ndarray) -> dict[str, dict[str, np.ndarray]]:
        """Column quantities and ``drh_dz``; returns the step's outputs per scale label."""
        factors = self.factors
        cover = hierarchical_fractions(self.column, factors)
        lwp_m = hierarchical_moments(lwp, factors)
        for s in self.scales:
            f = s.factor
            d = self.out[s.label]
            d["drh_dz"][...] = vertical_derivative(self.rh64[f], self.z, axis=0)
            d["lwp_mean"][...] = lwp_m[f].mean
            d["lwp_var"][...] = lwp_m[f].variance()
            d["cloud_cover"][...] = cover[f]
        out = {
            lab: {n: a for n, a in d.items() if not isinstance(a, ZPieces)}
            for lab, d in self.out.items()
        }
        self.out = {}
        self.rh64 = {}
        return out


def coarse_fields(
    fine: Mapping[str, np.ndarray],
    z: np.ndarray,
    scales: Sequence[Scale],
    settings: CoarsenSettings,
    *,
    dtype: npt.DTypeLike = np.float64,
    slab_levels: int | None = None,
) -> dict[str, dict[str, np.ndarray]]:
    """All coarse fields of one output time, per scale label.

    Parameters
    ----------
    fine
        Canonical fine fields of one time: ``qc, qv, T, w, rh`` (z, y, x, float32 or
        float64), ``cloud_mask`` (z, y, x, bool or 0/1), ``lwp`` (y, x) and ``p`` as
        (z, y, x) or (z,).
    z
        Cell-centre heights (m).
    scales
        Resolved scales.
    settings
        Coarsening settings.
    dtype
        dtype of the returned arrays. The arithmetic is float64 whatever it is: moments
        are accumulated in float64, and the GCM-view inputs (``rh_of_means``,
        ``drh_dz``, ``cf_sundqvist``) are computed from the float64 means before rounding.
    slab_levels
        Levels coarsened at a time (default: all); the result does not depend on it.
    """
    shape = tuple(np.shape(fine["qc"]))
    p = np.asarray(fine["p"])
    step = StepCoarsener(
        z, shape, scales, settings, dtype=dtype, p_profile=p if p.ndim == 1 else None
    )
    step.begin()
    for z0, z1 in slab_bounds(shape[0], slab_levels or shape[0]):
        slab = {v: np.asarray(fine[v])[z0:z1] for v in SLAB_INPUTS}
        if p.ndim == 3:
            slab["p"] = p[z0:z1]
        step.add_slab(z0, slab)
    return step.finish(np.asarray(fine["lwp"]))


def _attrs(name: str, s: Scale, threshold: float) -> dict[str, str]:
    base, _, kind = name.rpartition("_")
    if kind == "mean" and base in UNITS:
        return {
            "standard_name": STANDARD[base],
            "long_name": f"block mean of {NAMES[base]}",
            "units": UNITS[base],
            "cell_methods": "area: mean",
        }
    if kind == "var" and base in UNITS:
        a = {
            "long_name": f"sub-grid (population) variance of {NAMES[base]}",
            "units": VAR_UNITS[base],
            "cell_methods": "area: variance",
        }
        if base == "T":
            a["units_metadata"] = "temperature: difference"
        return a
    if kind == "skew" and base in UNITS:
        return {
            "long_name": f"sub-grid skewness of {NAMES[base]} (g1 = m3 / m2**1.5; 0 "
            "where the block is constant)",
            "units": "1",
        }
    if kind == "patch":
        return {
            "long_name": f"fine-grid {NAMES.get(base, base)} under the coarse cell "
            f"({s.factor} x {s.factor} fine cells)",
            "units": UNITS.get(base, "1"),
        }
    table = {
        "cloud_fraction": {
            "standard_name": "cloud_area_fraction_in_atmosphere_layer",
            "long_name": f"fraction of fine cells with qc > {threshold:g} kg kg-1",
            "units": "1",
            "cell_methods": "area: mean",
        },
        "rh_of_means": {
            "long_name": "relative humidity of the coarse means of qv, T and p (Bolton 1980)",
            "units": "1",
        },
        "drh_dz": {"long_name": "vertical derivative of rh_of_means", "units": "m-1"},
        "cf_sundqvist": {
            "long_name": "Sundqvist et al. (1989) cloud fraction from rh_of_means",
            "units": "1",
        },
        "lwp_mean": {
            "standard_name": "atmosphere_mass_content_of_cloud_liquid_water",
            "long_name": "block mean of liquid water path",
            "units": "kg m-2",
            "cell_methods": "area: mean",
        },
        "lwp_var": {
            "long_name": "sub-grid variance of liquid water path",
            "units": "kg2 m-4",
            "cell_methods": "area: variance",
        },
        "cloud_cover": {
            "standard_name": "cloud_area_fraction",
            "long_name": "fraction of fine columns with any cloudy cell",
            "units": "1",
            "cell_methods": "area: mean",
        },
        "p_mean": {
            "standard_name": "air_pressure",
            "long_name": "block mean of air pressure",
            "units": "Pa",
            "cell_methods": "area: mean",
        },
    }
    return table[name]


def _dims(name: str, arr: Any) -> tuple[str, ...]:
    if name.endswith("_patch"):
        return ("time", "z", "y", "x", "py", "px")
    return {3: ("time", "z", "y", "x"), 2: ("time", "y", "x")}[arr.ndim]


def _layout(
    canon: xr.Dataset,
    s: Scale,
    sample: Mapping[str, Any],
    settings: CoarsenSettings,
    threshold: float,
    slab: int,
) -> dict[str, ArraySpec]:
    nt = canon.sizes["time"]
    dtype = np.dtype(settings.dtype)
    out: dict[str, ArraySpec] = {}
    for name, arr in sample.items():
        dims = _dims(name, arr)
        shape = (nt, *arr.shape)
        if arr.ndim >= 3:
            zc = z_chunk_levels(arr.shape, dtype.itemsize, settings.chunk_mib, slab)
            chunks = (1, zc, *arr.shape[1:])
        else:
            chunks = (1, *arr.shape)
        zero_fill = name.startswith("qc_") or name in ("cloud_fraction", "lwp_mean", "lwp_var")
        out[name] = ArraySpec(
            dims=dims,
            shape=shape,
            chunks=chunks,
            dtype=dtype,
            attrs=_attrs(name, s, threshold),
            fill_value=0.0 if zero_fill else None,
        )
    ny, nx = canon.sizes["y"] // s.factor, canon.sizes["x"] // s.factor
    L = s.length_m
    x0 = float(canon.x.values[0]) - s.dx / 2
    y0 = float(canon.y.values[0]) - s.dx / 2
    xb = x0 + L * np.stack([np.arange(nx), np.arange(1, nx + 1)], axis=1)
    yb = y0 + L * np.stack([np.arange(ny), np.arange(1, ny + 1)], axis=1)

    def coord(dims: tuple[str, ...], values: np.ndarray, attrs: Mapping[str, Any]) -> ArraySpec:
        values = np.asarray(values, dtype=np.float64)
        return ArraySpec(
            dims=dims,
            shape=values.shape,
            chunks=values.shape,
            dtype="float64",
            data=values,
            attrs=dict(attrs),
        )

    out["time"] = coord(("time",), canon.time.values, canon.time.attrs)
    out["z"] = coord(("z",), canon.z.values, canon.z.attrs)
    out["z_bounds"] = coord(("z", "nv"), canon.z_bounds.values, canon.z_bounds.attrs)
    out["y"] = coord(
        ("y",),
        yb.mean(axis=1),
        {"units": "m", "long_name": "y of coarse-cell centres", "axis": "Y", "bounds": "y_bounds"},
    )
    out["x"] = coord(
        ("x",),
        xb.mean(axis=1),
        {"units": "m", "long_name": "x of coarse-cell centres", "axis": "X", "bounds": "x_bounds"},
    )
    out["y_bounds"] = coord(("y", "nv"), yb, {"units": "m"})
    out["x_bounds"] = coord(("x", "nv"), xb, {"units": "m"})
    return out


class FineReader:
    """Read the canonical store's fine fields slab by slab, one slab ahead.

    A slab is ``levels`` levels (default: the store's chunk height, so each read
    decodes whole chunks) of every 3-D input at one time. The arrays of a slab are read
    concurrently in their stored dtype (float32 stays float32, the mask int8); while the
    caller coarsens one slab the next is read on a background thread. Memory is two
    slabs, whatever the column height or the number of times.
    """

    def __init__(self, path: str | Path, *, levels: int | None = None) -> None:
        self.group = zarr.open_group(str(path), mode="r")
        qc = self.group["qc"]
        self.ntimes, self.nz, self.ny, self.nx = (int(n) for n in qc.shape)
        self.levels = int(levels or qc.chunks[1])
        p = self.group["p"]
        self.p_profile = np.asarray(p[...], dtype=np.float64) if p.ndim == 1 else None
        self.names = SLAB_INPUTS if self.p_profile is not None else (*SLAB_INPUTS, "p")
        self.bounds = slab_bounds(self.nz, self.levels)
        self._io = ThreadPoolExecutor(max_workers=len(self.names))
        self._ahead = ThreadPoolExecutor(max_workers=1)

    def _read(self, j: int, z0: int, z1: int) -> dict[str, np.ndarray]:
        def one(name: str) -> np.ndarray:
            return np.asarray(self.group[name][j, z0:z1])

        return dict(zip(self.names, self._io.map(one, self.names), strict=True))

    def slabs(self) -> Iterator[tuple[int, int, dict[str, np.ndarray]]]:
        """Yield ``(time index, z0, fields)`` for every slab of every time, in order."""
        keys = [(j, z0, z1) for j in range(self.ntimes) for z0, z1 in self.bounds]
        pending: Future[dict[str, np.ndarray]] | None = None
        try:
            for n, key in enumerate(keys):
                fields = pending.result() if pending is not None else self._read(*key)
                pending = None
                if n + 1 < len(keys):
                    pending = self._ahead.submit(self._read, *keys[n + 1])
                yield key[0], key[1], fields
                del fields
        finally:
            if pending is not None:
                with contextlib.suppress(Exception):
                    pending.result()

    def lwp(self, j: int) -> np.ndarray:
        """Liquid water path of time ``j``."""
        return np.asarray(self.group["lwp"][j])

    def close(self) -> None:
        """Stop the reader threads."""
        self._ahead.shutdown(wait=True)
        self._io.shutdown(wait=True)

    def __enter__(self) -> FineReader:
        return self

    def __exit__(self, *exc: Any) -> None:
        self.close()


def resolve_for_case(
    settings: CoarsenSettings, dx: float, nx: int, ny: int, *, case: str
) -> tuple[list[Scale], list[dict[str, str]]]:
    """Resolve the settings' scales for a grid; misfits raise or are skipped (recorded)."""
    scales: list[Scale] = []
    skipped: list[dict[str, str]] = []
    for spec in settings.scales:
        try:
            s = spec.resolve(dx, nx, ny, case=case)
        except ScaleError as exc:
            if settings.on_misfit != "skip":
                raise
            skipped.append({"scale": spec.text, "reason": str(exc)})
            continue
        assert s is not None
        if s.label in settings.patch_scales:
            patch_geometry(s.factor, settings.patch_size, settings.patch_halo, scale=spec.text)
        scales.append(s)
    return scales, skipped


def coarsen_case(
    canonical: str | Path,
    outputs: Mapping[str, str | Path],
    settings: CoarsenSettings,
    *,
    config_record: Mapping[str, Any] | None = None,
) -> dict[str, Path]:
    """Coarsen one case's canonical store to every scale of ``outputs`` in one pass.

    Parameters
    ----------
    canonical
        The case's canonical store.
    outputs
        Scale label -> store path to write. A skipped scale (``on_misfit: skip``) gets a
        store with no data variables whose provenance records why.
    settings
        Coarsening settings (their scales must cover the labels of ``outputs``).
    config_record
        Resolved config, hashed into provenance.

    Returns
    -------
    dict
        Scale label -> written store.
    """
    retain_freed_memory()
    canon = open_store(canonical)
    case = str(canon.attrs.get("case", Path(canonical).parent.name))
    dx = float(canon.attrs["dx"])
    threshold = float(canon.attrs["cloud_threshold"])
    nx, ny = canon.sizes["x"], canon.sizes["y"]
    scales, skipped = resolve_for_case(settings, dx, nx, ny, case=case)
    scales = [s for s in scales if s.label in outputs]
    z = canon.z.values.astype(np.float64)
    written: dict[str, Path] = {}
    codecs = compressors(settings.store)

    def create_all(shapes: Mapping[str, Mapping[str, Any]], slab: int) -> dict[str, zarr.Group]:
        return {
            s.label: create_store(
                tmps[s.label],
                _layout(canon, s, shapes[s.label], settings, threshold, slab),
                codecs=codecs,
            )
            for s in scales
        }

    # The pool is left (and a pending store creation finished) before the outputs are
    # published or removed.
    with (
        _AtomicGroup({lab: Path(p) for lab, p in outputs.items()}) as tmps,
        ThreadPoolExecutor(max_workers=1) as creator,
    ):
        groups: dict[str, zarr.Group] = {}
        writers: dict[str, TimeWriter] = {}
        creating: Future[dict[str, zarr.Group]] | None = None
        # One buffer budget shared by all scales: memory does not grow with their number.
        limit = WRITE_BUFFER_BYTES // max(1, len(scales))
        with FineReader(canonical) as reader:
            step = StepCoarsener(
                z,
                (reader.nz, reader.ny, reader.nx),
                scales,
                settings,
                dtype=settings.dtype,
                p_profile=reader.p_profile,
                stream=(settings.chunk_mib, reader.levels),
            )
            last = reader.bounds[-1][0]
            rows: list[tuple[int, str, int, dict[str, np.ndarray]]] = []
            for j, z0, slab in reader.slabs():
                if z0 == 0:
                    step.begin()
                    if j == 0:  # create the stores (shapes known) while the first step runs
                        creating = creator.submit(create_all, step.out, reader.levels)
                step.add_slab(z0, slab)
                del slab
                # finished z-chunk rows are written now (held until the stores exist)
                rows.extend((j, lab, zs, part) for lab, zs, part in step.take_rows())
                if creating is not None and (z0 == last or creating.done()):
                    groups = creating.result()
                    creating = None
                    writers = {lab: TimeWriter(g, limit_bytes=limit) for lab, g in groups.items()}
                if writers:
                    for jr, lab, zs, part in rows:
                        writers[lab].write_rows(jr, zs, part)
                    rows.clear()
                if z0 != last:
                    continue
                fields = step.finish(reader.lwp(j))
                for s in scales:
                    writers[s.label].add(j, fields.pop(s.label))
        for w in writers.values():
            w.flush()
        for lab, tmp in tmps.items():
            s = next((x for x in scales if x.label == lab), None)
            if s is None:
                g = create_store(tmp, {})
                reason = next(
                    (k["reason"] for k in skipped if _label(k["scale"]) == lab), "not computed"
                )
                info = {"scale": lab, "skip_reason": reason}
            else:
                g = groups[lab]
                info = {"scale": lab, "factor": s.factor, "length_m": s.length_m, "dx": dx}
            step = provenance.new_step(
                "coarsen",
                case=case,
                canonical=str(canonical),
                settings=settings.to_dict(),
                skipped=skipped,
                **info,
                config_sha256=None
                if config_record is None
                else provenance.config_sha(config_record),
            )
            attrs = dict(canon.attrs)
            attrs.update(
                {
                    "title": f"lesprep coarse fields of case {case} at scale {lab}",
                    "summary": "Block statistics of the canonical fine fields on coarse "
                    "cells, GCM-view inputs and fine patches.",
                }
            )
            if s is not None:
                attrs.update(
                    {
                        "scale": lab,
                        "factor": s.factor,
                        "length_m": s.length_m,
                        "patch_size": settings.patch_size if lab in settings.patch_scales else 0,
                        "patch_halo": settings.patch_halo,
                        "zero_variance_skewness": 0.0,
                        "variance_convention": "population (M2 / n)",
                    }
                )
            else:
                attrs["skipped"] = info["skip_reason"]
            g.attrs.update(provenance.extend(attrs, step, f"coarsened case {case} to {lab}"))
            consolidate(tmp)
            written[lab] = Path(outputs[lab])
    canon.close()
    return written


def _label(text: str) -> str:
    from lesprep.scales.spec import parse_scale

    return parse_scale(int(text) if text.isdigit() else text).label


class _AtomicGroup:
    """Several atomic outputs published together, only if all succeed."""

    def __init__(self, finals: Mapping[str, Path]) -> None:
        self.finals = dict(finals)
        self._ctx = {k: atomic_path(p) for k, p in self.finals.items()}

    def __enter__(self) -> dict[str, Path]:
        return {k: c.__enter__() for k, c in self._ctx.items()}

    def __exit__(self, *exc: Any) -> None:
        for c in self._ctx.values():
            c.__exit__(*exc)
