"""Statistics over whole 3-D cells: per-level block moments merged onto target layers.

Coarsening already holds, for every LES level ``k`` and coarse column block, the count
``n = f*f``, the mean ``m_k`` and the central sums ``M2_k, M3_k`` (and the cross sums
``C_k`` of covariance pairs). The statistics of a 3-D cell (one block, one target layer)
are weighted merges of these, never a second pass over the fine data.

Weights
-------
Every fine cell of level ``k`` in a block gets the weight ``w_k / n`` with

* ``mass`` weighting: ``w_k = overlap(k, layer) * rho_d,k``, where ``rho_d,k`` is the
  block's mean dry-air density at level ``k`` (the block mean of ``(p - e) / (Rd T)``,
  :func:`lesprep.thermo.dry_air_density`). Within a block the density's horizontal
  variation is neglected: all cells of a level weigh the same;
* ``thickness`` weighting: ``w_k = overlap(k, layer)``.

``overlap(k, layer)`` is the thickness of fine cell ``k`` inside the layer
(:func:`lesprep.scales.layers.overlap_matrix`): a level that straddles an interface is
split between the two layers by overlap fraction.

Mass weighting is the default because lesprep's water variables are mixing ratios (kg per
kg of dry air): the dry-mass-weighted mean of a mixing ratio is the layer's water mass
over its dry-air mass, the quantity a finite-volume climate model carries in its layer,
and ``sum(weight * mean)`` over layers conserves the water mass of the column.

Merges
------
A level's contribution (weight ``W_B = w_k``, mean ``m_k``, ``M2_B = W_B M2_k / n``,
``M3_B = W_B M3_k / n``, ``C_B = W_B C_k / n``) is merged into a layer's running sums
``(W_A, m_A, M2_A, M3_A, C_A)`` with the exact pairwise update for weighted data
(West 1979 for the mean and the second moment; Pébay, Terriberry, Kolla and Bennett 2016
for the third and the cross moments). With ``W = W_A + W_B`` and ``d = m_B - m_A``::

    m  = m_A + d W_B / W
    M2 = M2_A + M2_B + d^2 W_A W_B / W
    M3 = M3_A + M3_B + d^3 W_A W_B (W_A - W_B) / W^2 + 3 d (W_A M2_B - W_B M2_A) / W
    C  = C_A + C_B + d_x d_y W_A W_B / W

The layer's weighted population variance is ``M2 / W``, its skewness
``(M3 / W) / (M2 / W)**1.5`` (0 where the layer is constant, as for block moments:
:mod:`lesprep.scales.blocks`), its covariance ``C / W``. Levels are merged bottom to top
as the slabs arrive, so a layer that spans two slabs needs no extra memory.

Two engines give the same numbers: a numpy reference (a loop over levels, vectorised over
blocks) and a compiled kernel (parallel over blocks).
"""

from __future__ import annotations

from collections.abc import Iterator, Sequence

import numpy as np

from lesprep import thermo
from lesprep._jit import HAVE_NUMBA, Engine, njit, prange, resolve_engine
from lesprep.scales.blocks import BlockMoments
from lesprep.scales.layers import LayerGrid

_CELL_CHUNK = 512
"""Blocks handled per parallel task of the compiled merges."""


# --------------------------------------------------------------------------------------
# numpy reference
# --------------------------------------------------------------------------------------


def _np_updates(
    wlev: np.ndarray, ov: np.ndarray, first: np.ndarray, stop: np.ndarray, W: np.ndarray
) -> Iterator[tuple[int, int, np.ndarray, np.ndarray, np.ndarray, np.ndarray]]:
    """Every (level, overlapped layer) pair of the reference merges, in merge order:
    ``(i, lay, wa, wb, pos, wsafe)`` with the layer's weight before (``wa``) and the
    level's weight (``wb``); the caller updates its sums, then the layer's weight
    ``W[lay]`` becomes ``wa + wb`` here (``pos``: blocks whose total weight is positive,
    ``wsafe``: the total weight with 1 where it is not)."""
    for i in range(wlev.shape[0]):
        for lay in range(int(first[i]), int(stop[i])):
            o = float(ov[i, lay])
            if o <= 0.0:
                continue
            wb = o * wlev[i]
            wa = W[lay].copy()
            w = wa + wb
            pos = w > 0
            yield i, lay, wa, wb, pos, np.where(pos, w, 1.0)
            W[lay] = w


def np_layer_merge(
    mean: np.ndarray,
    m2: np.ndarray | None,
    m3: np.ndarray | None,
    wlev: np.ndarray,
    ov: np.ndarray,
    first: np.ndarray,
    stop: np.ndarray,
    inv_n: float,
    acc: Sequence[np.ndarray],
) -> None:
    """Merge ``k`` levels into running layer sums (reference engine).

    Parameters
    ----------
    mean, m2, m3
        ``(k, C)`` level means and central sums of ``C`` blocks; ``m2 = m3 = None``
        merges the means only.
    wlev
        ``(k, C)`` weight per unit overlap of each level and block (density, or 1).
    ov, first, stop
        ``(k, nl)`` overlap thicknesses of the ``k`` levels; the first overlapped layer
        of each level and one past the last.
    inv_n
        ``1 / n`` (``n`` fine cells per block and level).
    acc
        ``(W, mean, M2, M3)`` or ``(W, mean)`` running sums, each ``(nl, C)``; updated.
    """
    M = acc[1]
    for i, lay, wa, wb, pos, wsafe in _np_updates(wlev, ov, first, stop, acc[0]):
        d = mean[i] - M[lay]
        M[lay] = np.where(pos, M[lay] + d * wb / wsafe, M[lay])
        if m2 is None or m3 is None:
            continue
        M2, M3 = acc[2], acc[3]
        m2b = m2[i] * wb * inv_n
        m3b = m3[i] * wb * inv_n
        m2a = M2[lay]
        new3 = (
            M3[lay]
            + m3b
            + d * d * d * wa * wb * (wa - wb) / (wsafe * wsafe)
            + 3.0 * d * (wa * m2b - wb * m2a) / wsafe
        )
        new2 = m2a + m2b + d * d * wa * wb / wsafe
        M3[lay] = np.where(pos, new3, M3[lay])
        M2[lay] = np.where(pos, new2, M2[lay])


def np_layer_comerge(
    mx: np.ndarray,
    my: np.ndarray,
    cs: np.ndarray,
    wlev: np.ndarray,
    ov: np.ndarray,
    first: np.ndarray,
    stop: np.ndarray,
    inv_n: float,
    acc: Sequence[np.ndarray],
) -> None:
    """Merge ``k`` levels' cross sums into running layer sums ``(W, mean_x, mean_y, C)``
    (reference engine; arguments as :func:`np_layer_merge`, ``cs`` the ``(k, C)`` sums
    of cross deviations)."""
    _, MX, MY, CC = acc
    for i, lay, wa, wb, pos, wsafe in _np_updates(wlev, ov, first, stop, acc[0]):
        dx = mx[i] - MX[lay]
        dy = my[i] - MY[lay]
        new = CC[lay] + cs[i] * wb * inv_n + dx * dy * wa * wb / wsafe
        CC[lay] = np.where(pos, new, CC[lay])
        MX[lay] = np.where(pos, MX[lay] + dx * wb / wsafe, MX[lay])
        MY[lay] = np.where(pos, MY[lay] + dy * wb / wsafe, MY[lay])


def np_dry_density_means(p: np.ndarray, t: np.ndarray, r: np.ndarray, f: int) -> np.ndarray:
    """Block means of the dry-air density (reference engine): ``p`` ``(k,)`` or
    ``(k, ny, nx)``, ``t``, ``r`` ``(k, ny, nx)``; returns ``(k, ny/f, nx/f)``."""
    k, ny, nx = t.shape
    pp = np.asarray(p, dtype=np.float64)
    if pp.ndim == 1:
        pp = pp[:, None, None]
    rho = thermo.dry_air_density(pp, t, r)
    return rho.reshape(k, ny // f, f, nx // f, f).mean(axis=(2, 4))


# --------------------------------------------------------------------------------------
# compiled engine
# --------------------------------------------------------------------------------------

if HAVE_NUMBA:
    # The updates below are the pairwise formulas of the module docstring with one
    # division per merge: r = W_B / W, W_A / W = 1 - r, W_A W_B / W = W_A r and
    # (W_A - W_B) / W = 1 - 2 r. Weights are positive (densities, thicknesses), so W > 0.

    @njit(parallel=True, cache=True, fastmath=False, error_model="numpy")
    def _nb_layer_merge(  # pragma: no cover - compiled
        mean, m2, m3, wlev, ov, first, stop, inv_n, W, M, M2, M3, order
    ):
        k, ncell = mean.shape
        nchunk = (ncell + _CELL_CHUNK - 1) // _CELL_CHUNK
        for ch in prange(nchunk):
            c0 = ch * _CELL_CHUNK
            c1 = min(ncell, c0 + _CELL_CHUNK)
            for i in range(k):
                for lay in range(first[i], stop[i]):
                    o = ov[i, lay]
                    if o <= 0.0:
                        continue
                    if order == 3:
                        _merge3(
                            mean[i, c0:c1],
                            m2[i, c0:c1],
                            m3[i, c0:c1],
                            wlev[i, c0:c1],
                            o,
                            inv_n,
                            W[lay, c0:c1],
                            M[lay, c0:c1],
                            M2[lay, c0:c1],
                            M3[lay, c0:c1],
                        )
                    else:
                        _merge1(mean[i, c0:c1], wlev[i, c0:c1], o, W[lay, c0:c1], M[lay, c0:c1])

    @njit(inline="always", fastmath=False, error_model="numpy")
    def _merge3(mean, m2, m3, wlev, o, inv_n, W, M, M2, M3):  # pragma: no cover - compiled
        for c in range(mean.size):
            wb = o * wlev[c]
            wa = W[c]
            r = wb / (wa + wb)
            d = mean[c] - M[c]
            m2b = m2[c] * wb * inv_n
            m2a = M2[c]
            war = wa * r
            M3[c] += (
                m3[c] * wb * inv_n
                + d * d * d * war * (1.0 - 2.0 * r)
                + 3.0 * d * ((1.0 - r) * m2b - r * m2a)
            )
            M2[c] = m2a + m2b + d * d * war
            M[c] += d * r
            W[c] = wa + wb

    @njit(inline="always", fastmath=False, error_model="numpy")
    def _merge1(mean, wlev, o, W, M):  # pragma: no cover - compiled
        for c in range(mean.size):
            wb = o * wlev[c]
            wa = W[c]
            M[c] += (mean[c] - M[c]) * (wb / (wa + wb))
            W[c] = wa + wb

    @njit(parallel=True, cache=True, fastmath=False, error_model="numpy")
    def _nb_layer_comerge(  # pragma: no cover - compiled
        mx, my, cs, wlev, ov, first, stop, inv_n, W, MX, MY, CC
    ):
        k, ncell = mx.shape
        nchunk = (ncell + _CELL_CHUNK - 1) // _CELL_CHUNK
        for ch in prange(nchunk):
            c0 = ch * _CELL_CHUNK
            c1 = min(ncell, c0 + _CELL_CHUNK)
            for i in range(k):
                for lay in range(first[i], stop[i]):
                    o = ov[i, lay]
                    if o <= 0.0:
                        continue
                    _comerge(
                        mx[i, c0:c1],
                        my[i, c0:c1],
                        cs[i, c0:c1],
                        wlev[i, c0:c1],
                        o,
                        inv_n,
                        W[lay, c0:c1],
                        MX[lay, c0:c1],
                        MY[lay, c0:c1],
                        CC[lay, c0:c1],
                    )

    @njit(inline="always", fastmath=False, error_model="numpy")
    def _comerge(mx, my, cs, wlev, o, inv_n, W, MX, MY, CC):  # pragma: no cover - compiled
        for c in range(mx.size):
            wb = o * wlev[c]
            wa = W[c]
            r = wb / (wa + wb)
            dx = mx[c] - MX[c]
            dy = my[c] - MY[c]
            CC[c] += cs[c] * wb * inv_n + dx * dy * wa * r
            MX[c] += dx * r
            MY[c] += dy * r
            W[c] = wa + wb

    @njit(parallel=True, cache=True, fastmath=False, error_model="numpy")
    def _nb_dry_density_means(p, t, r, f, eps, rd, out):  # pragma: no cover - compiled
        # p is (k, ny, nx) or (k, 1, 1) (a profile); one block row per task. Each fine
        # row is turned into densities in a contiguous (vectorisable) pass, then summed
        # into the blocks in the order of the fine cells.
        k, ny, nx = t.shape
        by, bx = ny // f, nx // f
        prof = p.shape[1] == 1
        inv = 1.0 / (f * f)
        for task in prange(k * by):
            i = task // by
            jb = task % by
            row = np.empty(nx)
            acc = np.zeros(bx)
            for jj in range(jb * f, jb * f + f):
                if prof:
                    pv = p[i, 0, 0] * eps / rd
                    for ii in range(nx):
                        row[ii] = pv / ((eps + r[i, jj, ii]) * t[i, jj, ii])
                else:
                    for ii in range(nx):
                        row[ii] = p[i, jj, ii] * eps / ((eps + r[i, jj, ii]) * rd * t[i, jj, ii])
                for ib in range(bx):
                    s = 0.0
                    for ii in range(ib * f, ib * f + f):
                        s += row[ii]
                    acc[ib] += s
            for ib in range(bx):
                out[i, jb, ib] = acc[ib] * inv


def dry_density_means(
    p: np.ndarray, t: np.ndarray, r: np.ndarray, f: int, *, engine: Engine = "auto"
) -> np.ndarray:
    """Block means ``(k, ny/f, nx/f)`` of the dry-air density ``(p - e) / (Rd T)`` of a
    slab (float64; :func:`lesprep.thermo.dry_air_density` per fine cell).

    Parameters
    ----------
    p
        Pressure (Pa), a ``(k,)`` profile or ``(k, ny, nx)``.
    t, r
        Temperature (K) and vapour mixing ratio (kg kg-1), ``(k, ny, nx)``.
    f
        Block factor.
    engine
        ``"auto"``, ``"numba"`` or ``"numpy"``.
    """
    if resolve_engine(engine) == "numpy":
        return np_dry_density_means(p, t, r, f)
    k, ny, nx = np.shape(t)
    pp = np.asarray(p)
    p3 = pp.reshape(k, 1, 1) if pp.ndim == 1 else pp
    out = np.empty((k, ny // f, nx // f))
    _nb_dry_density_means(p3, np.asarray(t), np.asarray(r), int(f), thermo.EPS, thermo.RD, out)
    return out


# --------------------------------------------------------------------------------------
# Running statistics of one scale on one layer set
# --------------------------------------------------------------------------------------


class LayerStatistics:
    """Running weighted statistics of one scale's blocks on one layer set.

    Feed it the per-level block statistics of each slab, bottom to top
    (:meth:`add_moments`, :meth:`add_mean`, :meth:`add_comoment`); read the layer
    statistics after the last slab (:meth:`moments`, :meth:`mean`, :meth:`covariance`).

    Parameters
    ----------
    grid
        The resolved layer set.
    blocks
        ``(ny/f, nx/f)``: blocks of the scale.
    count
        Fine cells per block and level (``f*f``).
    engine
        ``"auto"``, ``"numba"`` or ``"numpy"``.
    """

    def __init__(
        self, grid: LayerGrid, blocks: tuple[int, int], count: int, *, engine: Engine = "auto"
    ) -> None:
        self.grid = grid
        self.blocks = tuple(int(b) for b in blocks)
        self.ncell = int(np.prod(self.blocks))
        self.inv_n = 1.0 / float(count)
        self.engine = resolve_engine(engine)
        first, stop = grid.level_span
        self._first, self._stop = first, stop
        self._acc: dict[object, list[np.ndarray]] = {}

    def reset(self) -> None:
        """Forget the sums (a new output time). The arrays are zeroed in place and reused:
        fresh memory costs far more to touch than memory already mapped."""
        for acc in self._acc.values():
            for a in acc:
                a.fill(0.0)

    def _sums(self, key: object, n: int) -> list[np.ndarray]:
        acc = self._acc.get(key)
        if acc is None:
            acc = self._acc[key] = [np.zeros((self.grid.nl, self.ncell)) for _ in range(n)]
        return acc

    def _rows(self, z0: int, k: int) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
        sl = slice(z0, z0 + k)
        return (
            np.ascontiguousarray(self.grid.overlap[sl]),
            np.ascontiguousarray(self._first[sl]),
            np.ascontiguousarray(self._stop[sl]),
        )

    def _flat(self, a: np.ndarray | None, k: int) -> np.ndarray:
        if a is None:
            return np.ones((k, self.ncell))
        arr = np.asarray(a, dtype=np.float64)
        if arr.ndim == 1:  # one value per level
            arr = np.broadcast_to(arr[:, None], (k, self.ncell))
        return np.ascontiguousarray(arr.reshape(k, self.ncell))

    def add_moments(
        self,
        name: str,
        z0: int,
        bm: BlockMoments,
        wlev: np.ndarray | None,
        *,
        offset: np.ndarray | None = None,
    ) -> None:
        """Merge the block moments of levels ``z0 : z0 + k`` of ``name``.

        ``wlev`` is the ``(k, ny/f, nx/f)`` density (None: thickness weighting);
        ``offset`` a ``(k,)`` value added to each level's means (the reference of a field
        coarsened from its deviation).
        """
        k = int(np.shape(bm.mean)[0])
        mean = np.asarray(bm.mean, np.float64)
        if offset is not None:
            mean = mean + np.asarray(offset, np.float64)[:, None, None]
        self._merge(name, z0, k, mean, bm.m2, bm.m3, wlev)

    def add_mean(self, name: str, z0: int, mean: np.ndarray, wlev: np.ndarray | None) -> None:
        """Merge level means (a ``(k, ny/f, nx/f)`` array or a ``(k,)`` profile)."""
        k = int(np.shape(mean)[0])
        self._merge(name, z0, k, mean, None, None, wlev)

    def _merge(self, name, z0, k, mean, m2, m3, wlev) -> None:
        order = 1 if m2 is None else 3
        acc = self._sums(name, 2 if order == 1 else 4)
        ov, first, stop = self._rows(z0, k)
        args = [self._flat(mean, k)]
        args += [self._flat(m2, k), self._flat(m3, k)] if order == 3 else [None, None]
        w = self._flat(wlev, k)
        if self.engine == "numba":
            m2f = args[1] if order == 3 else args[0]
            m3f = args[2] if order == 3 else args[0]
            a2 = acc[2] if order == 3 else acc[0]
            a3 = acc[3] if order == 3 else acc[0]
            _nb_layer_merge(
                args[0], m2f, m3f, w, ov, first, stop, self.inv_n, acc[0], acc[1], a2, a3, order
            )
        else:
            np_layer_merge(args[0], args[1], args[2], w, ov, first, stop, self.inv_n, acc)

    def add_comoment(
        self,
        pair: tuple[str, str],
        z0: int,
        mean_x: np.ndarray,
        mean_y: np.ndarray,
        cov_sum: np.ndarray,
        wlev: np.ndarray | None,
    ) -> None:
        """Merge the cross sums of a pair for levels ``z0 : z0 + k`` (``mean_x``,
        ``mean_y``: the level means including any reference offsets)."""
        k = int(np.shape(cov_sum)[0])
        acc = self._sums(("cov", pair), 4)
        ov, first, stop = self._rows(z0, k)
        a = [self._flat(x, k) for x in (mean_x, mean_y, cov_sum)]
        w = self._flat(wlev, k)
        if self.engine == "numba":
            _nb_layer_comerge(*a, w, ov, first, stop, self.inv_n, *acc)
        else:
            np_layer_comerge(*a, w, ov, first, stop, self.inv_n, acc)

    def _shape(self, a: np.ndarray) -> np.ndarray:
        return a.reshape(self.grid.nl, *self.blocks)

    def weight(self, name: str) -> np.ndarray:
        """Total weight ``W`` of each layer and block (kg m-2 with mass weighting, m with
        thickness weighting) accumulated for ``name``."""
        return self._shape(self._acc[name][0])

    def mean(self, name: str) -> np.ndarray:
        """Weighted layer means, ``(nl, ny/f, nx/f)``."""
        return self._shape(self._acc[name][1])

    def moments(self, name: str) -> BlockMoments:
        """Layer moments as a :class:`BlockMoments` of count 1 whose ``m2`` and ``m3`` are
        the weight-normalised central moments ``M2 / W`` and ``M3 / W`` (so its
        ``variance()`` and ``skewness()`` are the weighted population ones).

        The sums are normalised in place (no new arrays): call it once per output time,
        after the last slab and before :meth:`reset`. Every layer overlaps a fine level
        with a positive weight, so ``W > 0``.
        """
        W, M, M2, M3 = (self._shape(a) for a in self._acc[name])
        np.divide(M2, W, out=M2)
        np.maximum(M2, 0.0, out=M2)
        np.divide(M3, W, out=M3)
        return BlockMoments(count=1, mean=M, m2=M2, m3=M3)

    def covariance(self, pair: tuple[str, str]) -> np.ndarray:
        """Weighted population covariance of a pair, ``(nl, ny/f, nx/f)`` (normalised in
        place, like :meth:`moments`)."""
        W, _, _, CC = (self._shape(a) for a in self._acc[("cov", pair)])
        return np.divide(CC, W, out=CC)


def projected_cover_update(cover: np.ndarray, mask: np.ndarray, z0: int, grid: LayerGrid) -> None:
    """OR each fine level's cloud mask into the fine-column flags of the layers it
    overlaps: ``cover[l, y, x]`` is 1 when any fine level overlapping layer ``l`` is
    cloudy in column ``(y, x)``."""
    first, stop = grid.level_span
    m = np.asarray(mask)
    m = m.view(np.int8) if m.dtype == np.bool_ else m.astype(np.int8, copy=False)
    for i in range(m.shape[0]):
        for lay in range(int(first[z0 + i]), int(stop[z0 + i])):
            if grid.overlap[z0 + i, lay] > 0:
                np.bitwise_or(cover[lay], m[i], out=cover[lay])
