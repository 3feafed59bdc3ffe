"""One output time of one case, coarsened slab by slab to every scale of a job.

:class:`StepCoarsener` takes the canonical fine fields one z-slab (one canonical chunk
height) at a time and computes, for every scale, the block moments of the moment
variables (hierarchically, coarser factors from finer ones), the cloud fraction, the
GCM-view inputs and the patches; :func:`coarse_fields` does the same for fields in memory.
Arithmetic is float64; outputs are rounded once to the stored dtype.
"""

from __future__ import annotations

from collections.abc import Mapping, Sequence
from typing import Any

import numpy as np
import numpy.typing as npt

from lesprep.canonical import derived
from lesprep.scales.comoments import hierarchical_comoments, subgrid_tke
from lesprep.scales.conserved import PER_SLAB, conserved_fields, inputs_of
from lesprep.scales.layers import LayerGrid, layer_store_label
from lesprep.scales.moments import (
    block_mean,
    hierarchical_fractions,
    hierarchical_moments,
    plan_hierarchy,
    quantized_count,
)
from lesprep.scales.patches import extract_patches, patch_geometry
from lesprep.scales.settings import CoarsenSettings
from lesprep.scales.spec import Scale
from lesprep.scales.vertical import LayerStatistics, dry_density_means, projected_cover_update
from lesprep.schemes import gaussian_cloud_fraction_from_sums, sundqvist_cloud_fraction


def vertical_derivative(values: np.ndarray, z: np.ndarray, *, axis: int = 0) -> np.ndarray:
    """d(values)/dz on a non-uniform grid.

    Three or more levels: second order inside and at the ends. Two levels: the one
    finite difference, at both levels. One level: NaN (a vertical derivative is not
    defined by one level).

    Examples
    --------
    >>> vertical_derivative(np.array([1.0, 3.0]), np.array([0.0, 100.0])).tolist()
    [0.02, 0.02]
    >>> vertical_derivative(np.array([[1.0, 2.0]]), np.array([50.0])).tolist()
    [[nan, nan]]
    """
    a = np.asarray(values, dtype=np.float64)
    n = a.shape[axis]
    if n == 1:
        return np.full(a.shape, np.nan)
    return np.gradient(a, z, axis=axis, edge_order=2 if n >= 3 else 1)


def hierarchical_means(a: np.ndarray, factors: Sequence[int]) -> dict[int, np.ndarray]:
    """Block means for several factors, coarser ones from finer ones (exact for means)."""
    out: dict[int, np.ndarray] = {}
    for f, parent in plan_hierarchy(factors).items():
        out[f] = block_mean(a, f) if parent is None else block_mean(out[parent], f // parent)
    return out


SLAB_INPUTS = ("qc", "qv", "T", "w", "rh", "cloud_mask")
"""Canonical 3-D fields every coarsening reads one z-slab at a time (with ``p`` when it
is 3-D, and any further variable that gets moments, covariances or patches)."""

GAUSSIAN_INPUTS = ("qt", "theta_l")
"""Variables whose block means, variances and covariance the Gaussian-PDF baseline takes
(:func:`lesprep.schemes.gaussian_cloud_fraction_from_moments`)."""

WINDS = ("u", "v", "w")
"""Wind components: with all three in a store, the sub-grid TKE is computed."""

LAYER_FRACTIONS = ("cloud_volume_fraction", "cloud_area_fraction")
"""Cloud fractions of a layer store: the cloudy fine cells' share of the layer's weight,
and the projected cover (fine columns with any cloudy cell in the layer)."""


def statistic_variables(settings: CoarsenSettings, stored: Sequence[str]) -> tuple[str, ...]:
    """Every 3-D variable whose block moments a job computes: the moment variables, the
    covariance pairs' members, ``qv`` and ``T`` (GCM-view relative humidity), the Gaussian
    baseline's inputs and, where the store has ``u`` and ``v``, the wind components."""
    names = [*settings.moments, *(v for pair in settings.covariances for v in pair)]
    names += ["qv", "T", *GAUSSIAN_INPUTS]
    if all(w in stored for w in WINDS):
        names += list(WINDS)
    return tuple(dict.fromkeys(names))


def slab_inputs(
    settings: CoarsenSettings, *, p_is_3d: bool, stored: Sequence[str] = ()
) -> tuple[str, ...]:
    """Every canonical 3-D field a job reads per slab: :data:`SLAB_INPUTS`, the stored
    moment, covariance and patch variables, the inputs of the per-slab conserved variables
    (:mod:`lesprep.scales.conserved`) and ``p`` when it is 3-D.

    ``stored`` lists the store's 3-D fields (optional species such as ``qi`` are read when
    a conserved variable uses them).
    """
    wanted = [*statistic_variables(settings, stored), *settings.patch_variables]
    names = [*SLAB_INPUTS, *(n for n in wanted if n not in PER_SLAB)]
    names += inputs_of(wanted, stored)
    if p_is_3d:
        names.append("p")
    return tuple(n for n in dict.fromkeys(names) if n != "p" or p_is_3d)


QUANTUM_STEPS_BLOCK = 4
"""A block whose standard deviation is below this many float32 steps of its mean has a
quantized spread (counted per variable at the finest factor of a job)."""


def covariance_name(a: str, b: str) -> str:
    """Output name of the sub-grid covariance of ``a`` and ``b``: ``cov_<a>_<b>``."""
    return f"cov_{a}_{b}"


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
    stored, surface
        The canonical store's 3-D and 2-D (surface) fields.
    stream
        None: every output is a whole column, returned by :meth:`finish`. Else
        ``(chunk_mib, slab)``: 3-D and patch outputs whose column needs more than one
        z-chunk (:func:`z_chunk_levels`) are kept as :class:`ZPieces` and each finished
        chunk row is handed out by :meth:`take_rows` as soon as a slab completes it
        (``drh_dz``, which needs the whole column, is always returned by :meth:`finish`).
    layers
        Resolved target layer sets (:mod:`lesprep.scales.layers`): every scale a set
        applies to also gets its statistics on the set's layers
        (:mod:`lesprep.scales.vertical`), returned by :meth:`finish` under the store label
        :func:`~lesprep.scales.layers.layer_store_label`.
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
        stored: Sequence[str] = (),
        surface: Sequence[str] = (),
        layers: Sequence[LayerGrid] = (),
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
        self.need = list(statistic_variables(settings, stored))
        self.surface = [v for v in settings.moments if v in surface]
        self.need = [v for v in self.need if v not in self.surface]
        self.pairs = list(dict.fromkeys([*settings.covariances, GAUSSIAN_INPUTS]))
        self.tke = all(w in self.need for w in WINDS)
        self.quantized: dict[str, int] = {}
        self.blocks: dict[str, int] = {}
        self.layer_stores = [
            (s, g, layer_store_label(s.label, g.spec.name))
            for s in self.scales
            for g in layers
            if g.spec.applies_to(s.label)
        ]
        self.layers = {g.spec.name: g for _, g, _ in self.layer_stores}
        self.stats: dict[str, LayerStatistics] = {}
        self.density_factors = sorted(
            {s.factor for s, g, _ in self.layer_stores if g.spec.weighting == "mass"}
        )
        full = [*settings.moments, *GAUSSIAN_INPUTS, *(WINDS if self.tke else ())]
        self.layer_full = [v for v in self.need if v in full]

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
            d: dict[str, Any] = {n: self._column(n, c3) for n in self._level_names()}
            d.update(self._column_outputs(c3[1:]))
            if s.label in st.patch_scales:
                _, edge = patch_geometry(f, st.patch_size, st.patch_halo)
                for v in st.patch_variables:
                    d[f"{v}_patch"] = self._column(f"{v}_patch", (*c3, edge, edge))
            self.out[s.label] = d
        for s, g, lab in self.layer_stores:
            f = s.factor
            c3 = (g.nl, ny // f, nx // f)
            names = [*self._level_names(), *LAYER_FRACTIONS]
            self.out[lab] = {n: np.empty(c3, dtype=dt) for n in names}
            self.out[lab].update(self._column_outputs(c3[1:]))
            if lab not in self.stats:  # the running sums are reused from step to step
                self.stats[lab] = LayerStatistics(g, c3[1:], f * f)
        self.cover = {n: np.zeros((g.nl, ny, nx), np.int8) for n, g in self.layers.items()}

    def _level_names(self) -> list[str]:
        """Names of the per-level (or per-layer) outputs of a scale, patches aside."""
        names = []
        for v in self.need:
            names.append(f"{v}_mean")
            if v in self.settings.moments:
                names += [f"{v}_var", f"{v}_skew"]
        names += [covariance_name(a, b) for a, b in self.pairs]
        names += ["tke_sgs"] if self.tke else []
        names += ["p_mean", "cloud_fraction", "cloud_fraction_zero", "rh_of_means"]
        names += ["drh_dz", "cf_sundqvist", "cf_gaussian"]
        return names

    def _column_outputs(self, shape: tuple[int, ...]) -> dict[str, np.ndarray]:
        """Empty column (2-D) outputs: liquid water path, cover, surface-field moments."""
        names = ["lwp_mean", "lwp_var", "cloud_cover"]
        names += [f"{v}_{kind}" for v in self.surface for kind in ("mean", "var", "skew")]
        return {n: np.empty(shape, dtype=self.dtype) for n in names}

    def _column(self, name: str, shape: tuple[int, ...]) -> Any:
        if self.stream is not None and name != "drh_dz":
            rows = z_chunk_levels(shape, self.dtype.itemsize, *self.stream)
            if rows < shape[0]:
                return ZPieces(shape, self.dtype, rows)
        return np.empty(shape, dtype=self.dtype)

    def _count_quantized(self, v: str, var: np.ndarray, mean: np.ndarray) -> None:
        """Count blocks of a non-zero mean whose spread is within a few float32 steps of
        that mean (zero included: values that all rounded to one float32 number): their
        variance and skewness describe rounding, not the field. Blocks of mean zero (clear
        air in ``qc``) are not counted."""
        noisy = quantized_count(mean, var, QUANTUM_STEPS_BLOCK)
        self.quantized[v] = self.quantized.get(v, 0) + noisy
        self.blocks[v] = self.blocks.get(v, 0) + int(np.size(var))

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
        # a near-constant field is coarsened from its deviation from the level mean
        # (``<v>_dev``, ``<v>_ref``; see lesprep.canonical.nearconstant.quantized_levels)
        refs = {
            v: np.asarray(fine[f"{v}_ref"], np.float64) for v in self.need if f"{v}_ref" in fine
        }
        p_fine = self.p_profile[sl] if self.p_profile is not None else fine["p"]
        fine = {**fine, **conserved_fields(fine, self.need + list(st.patch_variables), p_fine)}
        moments = {
            v: hierarchical_moments(fine[f"{v}_dev"] if v in refs else fine[v], factors)
            for v in self.need
        }
        cov = {
            (a, b): hierarchical_comoments(
                fine[f"{a}_dev"] if a in refs else fine[a],
                fine[f"{b}_dev"] if b in refs else fine[b],
                factors,
                moments[a],
                moments[b],
            )
            for a, b in self.pairs
        }
        mask = np.asarray(fine["cloud_mask"])
        self.column |= np.any(mask, axis=0)
        cf = hierarchical_fractions(mask, factors)
        cf0 = hierarchical_fractions(np.asarray(fine["qc"]) > 0, factors)
        p_means = None if self.p_profile is not None else hierarchical_means(fine["p"], factors)
        for s in self.scales:
            f = s.factor
            d = self.out[s.label]
            means: dict[str, np.ndarray] = {}
            for v in self.need:
                m = moments[v][f]
                if v in refs:
                    means[v] = m.mean + refs[v][:, None, None]
                    if v in st.moments:
                        m.variance_and_skewness(out=(d[f"{v}_var"][sl], d[f"{v}_skew"][sl]))
                    d[f"{v}_mean"][sl] = means[v]
                elif v in st.moments:
                    m.variance_and_skewness(
                        out=(d[f"{v}_var"][sl], d[f"{v}_skew"][sl]), mean_out=d[f"{v}_mean"][sl]
                    )
                else:
                    d[f"{v}_mean"][sl] = m.mean
                counted = v in st.moments and v not in refs and v not in PER_SLAB
                if counted and f == factors[0]:  # per-slab variables are never rounded
                    self._count_quantized(v, d[f"{v}_var"][sl], m.mean)
            t_mean = means["T"] if "T" in means else moments["T"][f].mean
            qv_mean = means["qv"] if "qv" in means else moments["qv"][f].mean
            if p_means is not None:
                p3 = p_means[f]
            else:  # a 1-D profile: the same at every coarse cell of a level
                assert self.p_profile is not None
                p3 = np.broadcast_to(self.p_profile[sl, None, None], t_mean.shape)
            d["p_mean"][sl] = p3
            d["cloud_fraction"][sl] = cf[f]
            d["cloud_fraction_zero"][sl] = cf0[f]
            rh = derived.relative_humidity(p3, t_mean, qv_mean, out=self.rh64[f][sl])
            d["rh_of_means"][sl] = rh
            sundqvist_cloud_fraction(rh, st.rh_critical, out=d["cf_sundqvist"][sl])
            for a, b in self.pairs:
                d[covariance_name(a, b)][sl] = cov[(a, b)][f].covariance()
            if self.tke:
                d["tke_sgs"][sl] = subgrid_tke(*(moments[w][f].variance() for w in WINDS))
            qt_m, thl_m = (means.get(v, moments[v][f].mean) for v in GAUSSIAN_INPUTS)
            gaussian_cloud_fraction_from_sums(
                qt_m,
                thl_m,
                p3,
                moments["qt"][f].m2,
                moments["theta_l"][f].m2,
                cov[GAUSSIAN_INPUTS][f].cov_sum,
                f * f,
                out=d["cf_gaussian"][sl],
            )
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
        if self.layer_stores:
            self._add_layers(z0, fine, moments, cov, cf, cf0, p_fine, p_means, refs, mask)
        for s in self.scales:
            ready: dict[int, dict[str, np.ndarray]] = {}
            for name, arr in self.out[s.label].items():
                if isinstance(arr, ZPieces):
                    for zs, piece in arr.take_complete(z0 + k):
                        ready.setdefault(zs, {})[name] = piece
            self.rows.extend((s.label, zs, part) for zs, part in sorted(ready.items()))

    def _add_layers(
        self,
        z0: int,
        fine: Mapping[str, np.ndarray],
        moments: Mapping[str, Mapping[int, Any]],
        cov: Mapping[tuple[str, str], Mapping[int, Any]],
        cf: Mapping[int, np.ndarray],
        cf0: Mapping[int, np.ndarray],
        p_fine: np.ndarray,
        p_means: Mapping[int, np.ndarray] | None,
        refs: Mapping[str, np.ndarray],
        mask: np.ndarray,
    ) -> None:
        """Merge this slab's per-level block statistics into every layer store's sums
        (:mod:`lesprep.scales.vertical`) and its cloud mask into the projected covers."""
        for name, g in self.layers.items():
            projected_cover_update(self.cover[name], mask, z0, g)
        rho: dict[int, np.ndarray] = {}
        for f, parent in plan_hierarchy(self.density_factors).items():
            if parent is None:
                rho[f] = dry_density_means(p_fine, fine["T"], fine["qv"], f)
            else:
                rho[f] = block_mean(rho[parent], f // parent)

        def level_mean(v: str, f: int) -> np.ndarray:
            m = moments[v][f].mean
            return m + refs[v][:, None, None] if v in refs else m

        for s, g, lab in self.layer_stores:
            f = s.factor
            acc = self.stats[lab]
            w = rho[f] if g.spec.weighting == "mass" else None
            for v in self.need:
                if v in self.layer_full:
                    acc.add_moments(v, z0, moments[v][f], w, offset=refs.get(v))
                else:
                    acc.add_mean(v, z0, level_mean(v, f), w)
            for a, b in self.pairs:
                acc.add_comoment(
                    (a, b), z0, level_mean(a, f), level_mean(b, f), cov[(a, b)][f].cov_sum, w
                )
            acc.add_mean("p", z0, p_means[f] if p_means is not None else p_fine, w)
            acc.add_mean("cloud_volume_fraction", z0, cf[f], w)
            acc.add_mean("cloud_fraction_zero", z0, cf0[f], w)

    def _finish_layers(self) -> None:
        """Layer statistics of the time step into the layer stores' outputs."""
        st = self.settings
        covers: dict[str, dict[int, np.ndarray]] = {}
        for name, cover in self.cover.items():
            factors = sorted({s.factor for s, g, _ in self.layer_stores if g.spec.name == name})
            covers[name] = hierarchical_fractions(cover, factors)
        for s, g, lab in self.layer_stores:
            f = s.factor
            d = self.out[lab]
            acc = self.stats[lab]
            means: dict[str, np.ndarray] = {}
            full = {}
            for v in self.need:
                if v in self.layer_full:
                    full[v] = bm = acc.moments(v)
                    means[v] = bm.mean
                    if v in st.moments:
                        bm.variance_and_skewness(
                            out=(d[f"{v}_var"], d[f"{v}_skew"]), mean_out=d[f"{v}_mean"]
                        )
                        continue
                else:
                    means[v] = acc.mean(v)
                d[f"{v}_mean"][...] = means[v]
            p3 = acc.mean("p")
            d["p_mean"][...] = p3
            vol = acc.mean("cloud_volume_fraction")
            proj = covers[g.spec.name][f]
            d["cloud_volume_fraction"][...] = vol
            d["cloud_area_fraction"][...] = proj
            d["cloud_fraction"][...] = vol if g.spec.target == "volume" else proj
            d["cloud_fraction_zero"][...] = acc.mean("cloud_fraction_zero")
            rh = derived.relative_humidity(p3, means["T"], means["qv"])
            d["rh_of_means"][...] = rh
            sundqvist_cloud_fraction(rh, st.rh_critical, out=d["cf_sundqvist"])
            d["drh_dz"][...] = vertical_derivative(rh, g.centres, axis=0)
            covs = {pair: acc.covariance(pair) for pair in self.pairs}  # once each (in place)
            for a, b in self.pairs:
                d[covariance_name(a, b)][...] = covs[(a, b)]
            if self.tke:
                d["tke_sgs"][...] = subgrid_tke(*(full[w].variance() for w in WINDS))
            qt, thl = (full[v] for v in GAUSSIAN_INPUTS)
            gaussian_cloud_fraction_from_sums(
                qt.mean,
                thl.mean,
                p3,
                qt.m2,
                thl.m2,
                covs[GAUSSIAN_INPUTS],
                1,
                out=d["cf_gaussian"],
            )
            for n, a in self.out[s.label].items():  # the column outputs of the scale
                if a.ndim == 2:
                    d[n][...] = a
            acc.reset()

    def finish(
        self, lwp: np.ndarray, surface: Mapping[str, np.ndarray] | None = None
    ) -> dict[str, dict[str, np.ndarray]]:
        """Column quantities, surface-field moments and ``drh_dz``; returns the step's
        outputs per scale label (``surface``: the 2-D fields of the time, by name)."""
        factors = self.factors
        cover = hierarchical_fractions(self.column, factors)
        lwp_m = hierarchical_moments(lwp, factors)
        surf = {v: hierarchical_moments((surface or {})[v], factors) for v in self.surface}
        for s in self.scales:
            f = s.factor
            d = self.out[s.label]
            d["drh_dz"][...] = vertical_derivative(self.rh64[f], self.z, axis=0)
            d["lwp_mean"][...] = lwp_m[f].mean
            d["lwp_var"][...] = lwp_m[f].variance()
            d["cloud_cover"][...] = cover[f]
            for v in self.surface:
                surf[v][f].variance_and_skewness(
                    out=(d[f"{v}_var"], d[f"{v}_skew"]), mean_out=d[f"{v}_mean"]
                )
        self._finish_layers()
        out = {
            lab: {n: a for n, a in d.items() if not isinstance(a, ZPieces)}
            for lab, d in self.out.items()
        }
        self.out = {}
        self.rh64 = {}
        self.cover = {}
        return out


def coarse_fields(
    fine: Mapping[str, np.ndarray],
    z: np.ndarray,
    scales: Sequence[Scale],
    settings: CoarsenSettings,
    *,
    dtype: npt.DTypeLike = np.float64,
    slab_levels: int | None = None,
    layers: Sequence[LayerGrid] = (),
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
    layers
        Resolved target layer sets; their stores are returned under their store labels.
    """
    shape = tuple(np.shape(fine["qc"]))
    p = np.asarray(fine["p"])
    stored = [v for v in fine if np.ndim(fine[v]) == 3]
    surface = [v for v in fine if np.ndim(fine[v]) == 2 and v != "lwp"]
    step = StepCoarsener(
        z,
        shape,
        scales,
        settings,
        dtype=dtype,
        p_profile=p if p.ndim == 1 else None,
        stored=stored,
        surface=surface,
        layers=layers,
    )
    step.begin()
    names = slab_inputs(settings, p_is_3d=p.ndim == 3, stored=stored)
    for z0, z1 in slab_bounds(shape[0], slab_levels or shape[0]):
        step.add_slab(z0, {v: np.asarray(fine[v])[z0:z1] for v in names})
    return step.finish(np.asarray(fine["lwp"]), {v: np.asarray(fine[v]) for v in surface})
