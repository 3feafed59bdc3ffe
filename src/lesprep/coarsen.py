"""Multi-scale coarsening of one case: sub-grid moments, GCM-view inputs, fine patches.

For every kept output time the canonical fine fields are read once and every scale of
the job's group is computed from them in one pass: the finest factor from the fine
field, each coarser factor from the moments of the finest computed factor dividing it
(:func:`lesprep.moments.hierarchical_moments`). Per coarse cell ``(time, z, y, x)``:

``<v>_mean``, ``<v>_var``, ``<v>_skew``
    block mean, population variance (``M2 / n``) and skewness ``g1 = (M3/n) / var**1.5``
    (0 where the block is constant, see :mod:`lesprep.moments`) of each moment variable.
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
    the fine field under each coarse cell (:mod:`lesprep.patches`).

Arithmetic is float64; stored values are float32 unless the config says otherwise.
"""

from __future__ import annotations

import contextlib
import logging
from collections.abc import Mapping, Sequence
from concurrent.futures import Future, ThreadPoolExecutor
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import numpy as np
import numpy.typing as npt
import xarray as xr
import zarr

from . import derived, provenance
from ._memory import retain_freed_memory
from .baseline import sundqvist_cloud_fraction
from .errors import ConfigError, ScaleError
from .moments import block_mean, hierarchical_moments, plan_hierarchy
from .patches import extract_patches, patch_geometry
from .scales import Scale, ScaleSpec, parse_scales
from .store import (
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
    chunk_mib: float = 32.0
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
        chunk_mib=float(cfg["ingest"].get("chunk_mib", 32)),
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


def coarse_fields(
    fine: Mapping[str, np.ndarray],
    z: np.ndarray,
    scales: Sequence[Scale],
    settings: CoarsenSettings,
    *,
    dtype: npt.DTypeLike = np.float64,
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
    """
    dt = np.dtype(dtype)
    factors = sorted({s.factor for s in scales})
    need = list(dict.fromkeys([*settings.moments, "qv", "T"]))
    moments = {v: hierarchical_moments(fine[v], factors) for v in need}
    mask = np.asarray(fine["cloud_mask"]).astype(np.float32)  # 0/1: exact in float32
    cf = hierarchical_means(mask, factors)
    column = np.any(np.asarray(fine["cloud_mask"]) > 0, axis=0).astype(np.float32)
    cover = hierarchical_means(column, factors)
    lwp = hierarchical_moments(fine["lwp"], factors)
    p = np.asarray(fine["p"])
    p_means = hierarchical_means(p, factors) if p.ndim == 3 else None
    p = p.astype(np.float64)

    def cast(a: np.ndarray) -> np.ndarray:
        return np.asarray(a).astype(dt, copy=False)

    uses = {f: sum(s.factor == f for s in scales) for f in factors}
    out: dict[str, dict[str, np.ndarray]] = {}
    for s in scales:
        f = s.factor
        d: dict[str, np.ndarray] = {}
        for v in need:
            m = moments[v][f]
            d[f"{v}_mean"] = cast(m.mean)
            if v in settings.moments:
                d[f"{v}_var"], d[f"{v}_skew"] = m.variance_and_skewness(dt)
        t_mean, qv_mean = moments["T"][f].mean, moments["qv"][f].mean
        if p_means is not None:
            p3 = p_means[f]
        else:  # a 1-D profile: the same at every coarse cell of a level
            p3 = np.broadcast_to(p[:, None, None], t_mean.shape)
        d["p_mean"] = cast(p3)
        d["cloud_fraction"] = cast(cf[f])
        rh = derived.relative_humidity(p3, t_mean, qv_mean)
        d["rh_of_means"] = cast(rh)
        d["drh_dz"] = cast(vertical_derivative(rh, z, axis=0))
        d["cf_sundqvist"] = cast(sundqvist_cloud_fraction(rh, settings.rh_critical))
        del rh
        d["lwp_mean"] = cast(lwp[f].mean)
        d["lwp_var"] = cast(lwp[f].variance())
        d["cloud_cover"] = cast(cover[f])
        if s.label in settings.patch_scales:
            for v in settings.patch_variables:
                src = mask if v == "cloud_mask" else fine[v]
                d[f"{v}_patch"] = extract_patches(
                    src, f, settings.patch_size, settings.patch_halo, dtype=dt
                )
        out[s.label] = d
        uses[f] -= 1
        if uses[f] == 0:  # float64 moments of this factor are no longer needed
            for v in need:
                moments[v].pop(f, None)
    return out


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


def _dims(name: str, arr: np.ndarray) -> tuple[str, ...]:
    if name.endswith("_patch"):
        return ("time", "z", "y", "x", "py", "px")
    return {3: ("time", "z", "y", "x"), 2: ("time", "y", "x"), 1: ("z",)}[arr.ndim]


def _layout(
    canon: xr.Dataset,
    s: Scale,
    sample: Mapping[str, np.ndarray],
    settings: CoarsenSettings,
    threshold: float,
) -> dict[str, ArraySpec]:
    nt = canon.sizes["time"]
    dtype = np.dtype(settings.dtype)
    out: dict[str, ArraySpec] = {}
    for name, arr in sample.items():
        dims = _dims(name, arr)
        if dims == ("z",):
            shape, chunks = arr.shape, arr.shape
        else:
            shape = (nt, *arr.shape)
            per_level = int(np.prod(arr.shape[1:])) * dtype.itemsize if arr.ndim >= 3 else 0
            zc = arr.shape[0]
            if per_level:
                zc = int(max(1, min(arr.shape[0], settings.chunk_mib * 2**20 // per_level)))
            chunks = (1, zc, *arr.shape[1:]) if arr.ndim >= 3 else (1, *arr.shape)
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


FINE_INPUTS = ("qc", "qv", "T", "w", "rh", "cloud_mask", "lwp", "p")
"""Canonical arrays coarsening reads."""


class FineReader:
    """Read the fine fields of one output time after another, one time ahead.

    The arrays of a time step are read concurrently straight from the canonical Zarr
    store in their stored dtype (float32 fields stay float32, the mask int8). While the
    caller computes time ``j`` the arrays of ``j + 1`` are read on a background thread,
    so at most two time steps of input are in memory.
    """

    def __init__(self, path: str | Path, names: Sequence[str] = FINE_INPUTS) -> None:
        self.group = zarr.open_group(str(path), mode="r")
        self.names = tuple(names)
        self.ntimes = int(self.group["time"].shape[0])
        self._io = ThreadPoolExecutor(max_workers=len(self.names))
        self._ahead = ThreadPoolExecutor(max_workers=1)
        self._next: tuple[int, Future[dict[str, np.ndarray]]] | None = None

    def _read(self, j: int) -> dict[str, np.ndarray]:
        def one(name: str) -> np.ndarray:
            arr = self.group[name]
            timed = "time" in (arr.metadata.dimension_names or ())
            return np.asarray(arr[j] if timed else arr[...])

        return dict(zip(self.names, self._io.map(one, self.names), strict=True))

    def get(self, j: int) -> dict[str, np.ndarray]:
        """The fine fields of time ``j``; starts reading ``j + 1``."""
        if self._next is not None and self._next[0] == j:
            fields = self._next[1].result()
        else:
            fields = self._read(j)
        self._next = None
        if j + 1 < self.ntimes:
            self._next = (j + 1, self._ahead.submit(self._read, j + 1))
        return fields

    def close(self) -> None:
        """Wait for a pending read and stop the threads."""
        if self._next is not None:
            with contextlib.suppress(Exception):
                self._next[1].result()
            self._next = None
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
    nt = canon.sizes["time"]
    written: dict[str, Path] = {}
    with _AtomicGroup({lab: Path(p) for lab, p in outputs.items()}) as tmps:
        groups: dict[str, zarr.Group] = {}
        writers: dict[str, TimeWriter] = {}
        codecs = compressors(settings.store)
        # One buffer budget shared by all scales: memory does not grow with their number.
        limit = WRITE_BUFFER_BYTES // max(1, len(scales))
        with FineReader(canonical) as reader:
            for j in range(nt):
                fine = reader.get(j)
                fields = coarse_fields(fine, z, scales, settings, dtype=settings.dtype)
                del fine
                for s in scales:
                    d = fields.pop(s.label)
                    if j == 0:
                        layout = _layout(canon, s, d, settings, threshold)
                        groups[s.label] = create_store(tmps[s.label], layout, codecs=codecs)
                        writers[s.label] = TimeWriter(groups[s.label], limit_bytes=limit)
                        for name, arr in d.items():
                            if arr.ndim == 1:
                                groups[s.label][name][:] = arr
                    writers[s.label].add(j, {n: a for n, a in d.items() if a.ndim > 1})
                    del d
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
    from .scales import parse_scale

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
