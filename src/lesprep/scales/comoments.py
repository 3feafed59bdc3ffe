"""Sub-grid co-moments and covariances of two fields per horizontal block.

For two fields ``x`` and ``y`` of the same shape ``(..., ny, nx)`` cut into the same
``f x f`` blocks as :mod:`lesprep.scales.moments`, the co-moment of a block is

``C = sum((x - xbar) * (y - ybar))``

over its ``n = f*f`` cells, with the block means ``xbar`` and ``ybar``. The sub-grid
covariance is ``C / n`` (population convention, ``numpy.cov(x, y, bias=True)``), e.g. the
sub-grid flux ``w'qt'`` of a coarse column; ``C(x, x)`` is the ``M2`` of
:class:`~lesprep.scales.blocks.BlockMoments`.

Algorithms
----------
From the fine fields the co-moment is accumulated in two passes about centres ``cx, cy``
(the block means of :class:`BlockMoments` when given, else a first pass computes them),
with the deviations ``dx = x - cx``, ``dy = y - cy``::

    C = sum(dx * dy) - sum(dx) * sum(dy) / n

which is exact for any centres (Chan, Golub & LeVeque 1979). With centres at the block
means the correction is of round-off size and nothing cancels, so offset data (a
temperature near 290 K with a sub-kelvin spread) keep their digits, unlike the one-pass
``mean(x*y) - mean(x)*mean(y)``.

Coarser blocks are merged from ``k x k`` children of equal count ``n_c`` with the exact
pairwise combination (Pebay 2008; Bennett et al. 2009)::

    C = sum(C_i) + n_c * sum((xbar_i - xbar) * (ybar_i - ybar))

evaluated about the first-pass mean of the child means with the same shift correction.
:func:`hierarchical_comoments` follows :func:`~lesprep.scales.moments.plan_hierarchy`
and takes the block means already computed by
:func:`~lesprep.scales.moments.hierarchical_moments` for both fields.

All sums are float64 whatever the input dtype. Two engines give the same numbers to
round-off: ``"numpy"`` (the reference, reducing a reshaped ``(G, ny/f, f, nx/f, f)`` view)
and ``"numba"`` (:mod:`lesprep.scales.comoments_compiled`, fused parallel loops).
"""

from __future__ import annotations

import math
from collections.abc import Iterable, Mapping
from dataclasses import dataclass

import numpy as np

from lesprep._jit import HAVE_NUMBA, Engine
from lesprep._jit import resolve_engine as _resolve_engine
from lesprep.errors import InputError
from lesprep.scales import comoments_compiled as compiled
from lesprep.scales.blocks import (
    BlockMoments,
    as_real_array,
    check_horizontal,
    factor_value,
)
from lesprep.scales.moments import (
    _CHUNK_BYTES,
    _empty,
    _is_numba_native,
    _prepare,
    _run,
    block_mean,
    merge_chain,
    plan_hierarchy,
)

__all__ = [
    "HAVE_NUMBA",
    "BlockComoments",
    "block_comoment",
    "hierarchical_comoments",
    "merge_comoments",
    "np_comerge",
    "np_comoment",
    "subgrid_tke",
]


# --------------------------------------------------------------------------------------
# Result type
# --------------------------------------------------------------------------------------


@dataclass(frozen=True)
class BlockComoments:
    """Co-moments of two fields over ``f x f`` blocks.

    Attributes
    ----------
    count
        Fine cells per block (``f*f``); the same for every block.
    cov_sum
        ``sum((x - xbar) * (y - ybar))`` of each block, float64, shape ``(..., ny/f, nx/f)``.
    """

    count: int
    cov_sum: np.ndarray

    def __post_init__(self) -> None:
        if factor_value(self.count) is None:
            raise InputError(f"BlockComoments.count must be an integer >= 1, found {self.count!r}")

    @property
    def shape(self) -> tuple[int, ...]:
        """Shape of the block array, ``(..., ny/f, nx/f)``."""
        return tuple(np.shape(self.cov_sum))

    def covariance(self) -> np.ndarray:
        """Population covariance ``cov_sum / n`` of each block (``numpy.cov``, bias=True).

        Returns
        -------
        numpy.ndarray
            float64, shape of :attr:`cov_sum`.

        Examples
        --------
        >>> x = np.array([[1.0, 2.0], [3.0, 4.0]])
        >>> BlockComoments(4, block_comoment(x, -x, 2)).covariance()
        array([[-1.25]])
        """
        return np.divide(self.cov_sum, self.count, dtype=np.float64)


def subgrid_tke(var_u: np.ndarray, var_v: np.ndarray, var_w: np.ndarray) -> np.ndarray:
    """Sub-grid turbulent kinetic energy ``0.5 * (var_u + var_v + var_w)`` of each block.

    Parameters
    ----------
    var_u, var_v, var_w
        Population block variances (``M2 / n``, e.g. :meth:`BlockMoments.variance`) of the
        three velocity components in m2 s-2, on the same blocks (so the components must be
        on the same grid points before blocking). Broadcast against each other.

    Returns
    -------
    numpy.ndarray
        float64 kinetic energy per unit mass, m2 s-2.

    Examples
    --------
    >>> subgrid_tke(np.array([1.0]), np.array([2.0]), np.array([0.5]))
    array([1.75])
    """
    tke = np.add(var_u, var_v, dtype=np.float64)
    tke += var_w
    tke *= 0.5
    return tke


# --------------------------------------------------------------------------------------
# numpy engine (reference)
# --------------------------------------------------------------------------------------


def _blocks5(a: np.ndarray, f: int) -> np.ndarray:
    g, ny, nx = a.shape
    return a.reshape(g, ny // f, f, nx // f, f)


def np_comoment(
    x: np.ndarray,
    y: np.ndarray,
    f: int,
    mx: np.ndarray | None = None,
    my: np.ndarray | None = None,
) -> np.ndarray:
    """Co-moments of the ``f x f`` blocks of float64 planes ``x``, ``y`` (G, ny, nx).

    ``mx``, ``my`` (G, ny/f, nx/f) are the centres; ``None`` computes the block means.
    """
    n = f * f
    xr = _blocks5(x, f)
    yr = _blocks5(y, f)
    cx = xr.sum(axis=(2, 4)) / n if mx is None else mx
    cy = yr.sum(axis=(2, 4)) / n if my is None else my
    dx = xr - cx[:, :, None, :, None]
    dy = yr - cy[:, :, None, :, None]
    s1x = dx.sum(axis=(2, 4))
    s1y = dy.sum(axis=(2, 4))
    dx *= dy
    sxy = dx.sum(axis=(2, 4))
    return sxy - s1x * (s1y / n)


def np_comerge(cc: np.ndarray, cmx: np.ndarray, cmy: np.ndarray, nc: int, k: int) -> np.ndarray:
    """Merge ``k x k`` children (G, nyc, nxc) of count ``nc``; return the parents' ``C``."""
    kk = k * k
    mxr = _blocks5(cmx, k)
    myr = _blocks5(cmy, k)
    dx = mxr - (mxr.sum(axis=(2, 4)) / kk)[:, :, None, :, None]
    dy = myr - (myr.sum(axis=(2, 4)) / kk)[:, :, None, :, None]
    s1x = nc * dx.sum(axis=(2, 4))  # fine-cell sums of deviations from the first-pass means
    s1y = nc * dy.sum(axis=(2, 4))
    acc = (_blocks5(cc, k) + nc * dx * dy).sum(axis=(2, 4))
    return acc - s1x * (s1y / (nc * kk))


# --------------------------------------------------------------------------------------
# Driver: pairs of planes, chunks, outputs
# --------------------------------------------------------------------------------------


def _pair_views(x: np.ndarray, y: np.ndarray) -> list[tuple[int, np.ndarray, np.ndarray]]:
    """Split ``x`` and ``y`` (..., ny, nx) into matching 3-D views (offset, xv, yv)."""
    ny, nx = x.shape[-2:]
    try:
        return [
            (0, np.reshape(x, (-1, ny, nx), copy=False), np.reshape(y, (-1, ny, nx), copy=False))
        ]
    except ValueError:  # some leading axes cannot be merged without a copy (ndim >= 4)
        pass
    views = []
    offset = 0
    for index in np.ndindex(*x.shape[:-3]):
        views.append((offset, x[index], y[index]))
        offset += x[index].shape[0]
    return views


def _pair_items(
    x: np.ndarray, y: np.ndarray, engine: str
) -> list[tuple[int, np.ndarray, np.ndarray]]:
    """Groups of planes for one kernel call each (whole views for direct numba input)."""
    ny, nx = x.shape[-2:]
    chunked = max(1, _CHUNK_BYTES // (8 * ny * nx))
    items = []
    for offset, xv, yv in _pair_views(x, y):
        direct = engine == "numba" and all(
            _is_numba_native(v) and v.flags.c_contiguous for v in (xv, yv)
        )
        group = xv.shape[0] if direct else chunked
        for start in range(0, xv.shape[0], max(1, group)):
            stop = start + group
            items.append((offset + start, xv[start:stop], yv[start:stop]))
    return items


def _as_planes(a: np.ndarray, planes: int, what: str, shape: tuple[int, ...]) -> np.ndarray:
    """``a`` as C-contiguous float64 ``(planes, *shape[-2:])``, checking its shape."""
    arr = as_real_array(a)
    if arr.shape != shape:
        raise InputError(f"{what} must have shape {shape}, found {arr.shape}")
    return np.ascontiguousarray(arr, dtype=np.float64).reshape(planes, *shape[-2:])


def _check_pair(x: object, y: object) -> tuple[np.ndarray, np.ndarray]:
    xa = as_real_array(x)
    ya = as_real_array(y)
    if xa.shape != ya.shape:
        raise InputError(f"x and y must have the same shape, found {xa.shape} and {ya.shape}")
    return xa, ya


def _first_level(x, y, f, engine, mx, my, out) -> None:
    """Co-moments of the plane group ``x``, ``y`` into ``out`` (centres ``mx``, ``my``)."""
    if engine == "numba":
        given = mx is not None
        dummy = np.empty((1, 1, 1))
        compiled.nb_comoment(x, y, f, mx if given else dummy, my if given else dummy, given, out)
    else:
        out[...] = np_comoment(x, y, f, mx, my)


def _merge_level(cc, cmx, cmy, nc, k, engine, out) -> None:
    if engine == "numba":
        compiled.nb_comerge(cc, cmx, cmy, nc, k, out)
    else:
        out[...] = np_comerge(cc, cmx, cmy, nc, k)


# --------------------------------------------------------------------------------------
# Public functions
# --------------------------------------------------------------------------------------


def block_comoment(
    x: np.ndarray,
    y: np.ndarray,
    factor: int,
    *,
    mean_x: np.ndarray | None = None,
    mean_y: np.ndarray | None = None,
    engine: Engine = "auto",
) -> np.ndarray:
    """Co-moment ``sum((x - xbar) * (y - ybar))`` of every ``factor x factor`` block.

    Parameters
    ----------
    x, y
        Real arrays of the same shape ``(..., ny, nx)``, horizontal dimensions last
        (float32 or float64, possibly different; integers and booleans are converted).
    factor
        Block edge in grid cells; must divide ``ny`` and ``nx``.
    mean_x, mean_y
        Block means of ``x`` and ``y`` (shape ``(..., ny/factor, nx/factor)``), e.g.
        ``block_moments(x, factor).mean``, to skip the first pass. Either or both may be
        given. Any values give the same result in exact arithmetic (the shift correction
        removes their error); only the block means give it to full precision.
    engine
        ``"numba"`` (fused parallel loops), ``"numpy"`` (reference) or ``"auto"``.

    Returns
    -------
    numpy.ndarray
        float64, shape ``(..., ny/factor, nx/factor)``; divide by ``factor**2`` for the
        population covariance (or use :class:`BlockComoments`).

    Raises
    ------
    ScaleError
        If ``factor`` does not divide the horizontal sizes.
    InputError
        If the shapes of ``x``, ``y`` or the means do not match.

    Examples
    --------
    >>> x = np.arange(16.0).reshape(4, 4)
    >>> block_comoment(x, x % 2, 2)
    array([[1., 1.],
           [1., 1.]])
    """
    xa, ya = _check_pair(x, y)
    f = check_horizontal(xa.shape, factor)
    eng = _resolve_engine(engine)
    lead = xa.shape[:-2]
    ny, nx = xa.shape[-2:]
    planes = math.prod(lead)
    shape = (*lead, ny // f, nx // f)
    centres = [
        None if mean is None else _as_planes(mean, planes, name, shape)
        for name, mean in (("mean_x", mean_x), ("mean_y", mean_y))
    ]
    if eng == "numba" and (centres[0] is None) != (centres[1] is None):
        # the fused kernel takes both centres or neither: supply the missing means
        i = 0 if centres[0] is None else 1
        centres[i] = block_mean((xa, ya)[i], f, engine=eng).reshape(planes, ny // f, nx // f)
    out = _empty(planes, ny // f, nx // f)

    def work(offset: int, xc: np.ndarray, yc: np.ndarray) -> None:
        sl = slice(offset, offset + xc.shape[0])
        mx = None if centres[0] is None else centres[0][sl]
        my = None if centres[1] is None else centres[1][sl]
        _first_level(_prepare(xc, eng), _prepare(yc, eng), f, eng, mx, my, out[sl])

    _run(_pair_items(xa, ya, eng), work, eng)  # type: ignore[arg-type]  # (offset, x, y)
    return out.reshape(shape)


def merge_comoments(
    child: BlockComoments,
    child_mean_x: np.ndarray,
    child_mean_y: np.ndarray,
    k: int,
    *,
    engine: Engine = "auto",
) -> BlockComoments:
    """Merge ``k x k`` neighbouring blocks into one (exact pairwise co-moment combination).

    ``C = sum(C_i) + n_c * sum((xbar_i - xbar) * (ybar_i - ybar))`` over the children
    ``i`` of each parent, all of count ``n_c`` (Pebay 2008; Bennett et al. 2009).

    Parameters
    ----------
    child
        Co-moments of the children, ``count = n_c``, shape ``(..., nyc, nxc)``.
    child_mean_x, child_mean_y
        Block means of ``x`` and ``y`` over the same children (e.g. the ``mean`` of
        :class:`BlockMoments`), shape ``(..., nyc, nxc)``.
    k
        Children per parent along each horizontal axis; must divide ``nyc`` and ``nxc``.
    engine
        ``"auto"``, ``"numba"`` or ``"numpy"``.

    Returns
    -------
    BlockComoments
        Parent co-moments, ``count = k*k*n_c``, shape ``(..., nyc/k, nxc/k)``.

    Examples
    --------
    >>> x = np.arange(16.0).reshape(4, 4)
    >>> y = x**2
    >>> child = BlockComoments(4, block_comoment(x, y, 2))
    >>> means = [a.reshape(2, 2, 2, 2).mean(axis=(1, 3)) for a in (x, y)]
    >>> merged = merge_comoments(child, *means, 2)
    >>> merged.count, bool(np.isclose(merged.cov_sum[0, 0], block_comoment(x, y, 4)[0, 0]))
    (16, True)
    """
    if not isinstance(child, BlockComoments):
        raise InputError(f"merge_comoments needs BlockComoments, found {type(child).__name__}")
    k = check_horizontal(child.shape, k, what="child block grid")
    eng = _resolve_engine(engine)
    lead = child.shape[:-2]
    nyc, nxc = child.shape[-2:]
    planes = math.prod(lead)
    cc = _as_planes(child.cov_sum, planes, "child.cov_sum", child.shape)
    cmx = _as_planes(child_mean_x, planes, "child_mean_x", child.shape)
    cmy = _as_planes(child_mean_y, planes, "child_mean_y", child.shape)
    out = _empty(planes, nyc // k, nxc // k)
    group = planes if eng == "numba" else max(1, _CHUNK_BYTES // (8 * nyc * nxc))

    def work(offset: int, chunk: np.ndarray) -> None:
        sl = slice(offset, offset + chunk.shape[0])
        _merge_level(cc[sl], cmx[sl], cmy[sl], child.count, k, eng, out[sl])

    _run([(p0, cc[p0 : p0 + group]) for p0 in range(0, planes, group)], work, eng)
    return BlockComoments(child.count * k * k, out.reshape((*lead, nyc // k, nxc // k)))


def hierarchical_comoments(
    x: np.ndarray,
    y: np.ndarray,
    factors: Iterable[int],
    moments_x: Mapping[int, BlockMoments],
    moments_y: Mapping[int, BlockMoments],
    *,
    engine: Engine = "auto",
) -> dict[int, BlockComoments]:
    """Block co-moments for several factors, coarse ones merged from finer ones.

    Each factor is computed from the fine fields about the block means of ``moments_x``
    and ``moments_y``, or merged from the factor
    :func:`~lesprep.scales.moments.plan_hierarchy` picks (exact pairwise combination,
    Pebay 2008; Bennett et al. 2009). The results equal :func:`block_comoment` per factor
    to round-off.

    Parameters
    ----------
    x, y
        Real arrays of the same shape ``(..., ny, nx)``, horizontal dimensions last.
    factors
        Block factors; every one must divide ``ny`` and ``nx``.
    moments_x, moments_y
        ``{factor: BlockMoments}`` of ``x`` and ``y`` holding at least every factor in
        ``factors`` except 1 (what :func:`~lesprep.scales.moments.hierarchical_moments`
        returns). Only the means are read.
    engine
        ``"auto"``, ``"numba"`` or ``"numpy"``.

    Returns
    -------
    dict
        ``{factor: BlockComoments}`` in increasing order of factor; ``.covariance()``
        gives the population covariance.

    Raises
    ------
    ScaleError
        If any factor does not divide the horizontal sizes.
    InputError
        If the shapes differ or a factor is missing from ``moments_x`` or ``moments_y``.

    Examples
    --------
    >>> from lesprep.scales.moments import hierarchical_moments
    >>> rng = np.random.default_rng(0)
    >>> w, q = rng.normal(size=(2, 3, 8, 8))
    >>> fs = [2, 4, 8]
    >>> res = hierarchical_comoments(
    ...     w, q, fs, hierarchical_moments(w, fs), hierarchical_moments(q, fs)
    ... )
    >>> sorted(res), res[8].cov_sum.shape, res[8].count
    ([2, 4, 8], (3, 1, 1), 64)
    >>> bool(np.allclose(res[8].cov_sum, block_comoment(w, q, 8), rtol=1e-12))
    True
    """
    xa, ya = _check_pair(x, y)
    factor_list = list(factors)
    for factor in factor_list:
        check_horizontal(xa.shape, factor)
    plan = plan_hierarchy(factor_list)
    eng = _resolve_engine(engine)
    if not plan:
        return {}
    lead = xa.shape[:-2]
    ny, nx = xa.shape[-2:]
    planes = math.prod(lead)
    means = [
        {
            f: _as_planes(
                _block_moments_of(moments, f, what).mean,
                planes,
                f"{what}[{f}].mean",
                (*lead, ny // f, nx // f),
            )
            for f in plan
            if f > 1  # (1 x 1 blocks have no deviations: their co-moments are zero)
        }
        for what, moments in (("moments_x", moments_x), ("moments_y", moments_y))
    ]
    out = {f: _empty(planes, ny // f, nx // f) for f in plan}
    chain = merge_chain(plan)

    def work(offset: int, xc: np.ndarray, yc: np.ndarray) -> None:
        sl = slice(offset, offset + xc.shape[0])
        if eng == "numba":  # every level in one compiled call, plane by plane
            co = tuple(out[f][sl] for f in plan)
            # (factor 1 has no means and is never a parent: its slot holds a stand-in)
            mx, my = (tuple(m.get(f, out[f])[sl] for f in plan) for m in means)
            compiled.nb_cohierarchy(_prepare(xc, eng), _prepare(yc, eng), co, mx, my, *chain)
            return
        xp = yp = None
        for f, parent in plan.items():
            if f == 1:
                out[f][sl] = 0.0
            elif parent is None:
                if xp is None:
                    xp, yp = _prepare(xc, eng), _prepare(yc, eng)
                _first_level(xp, yp, f, eng, means[0][f][sl], means[1][f][sl], out[f][sl])
            else:
                src = (out[parent][sl], means[0][parent][sl], means[1][parent][sl])
                _merge_level(*src, parent * parent, f // parent, eng, out[f][sl])

    _run(_pair_items(xa, ya, eng), work, eng)  # type: ignore[arg-type]  # (offset, x, y)
    return {f: BlockComoments(f * f, out[f].reshape((*lead, ny // f, nx // f))) for f in plan}


def _block_moments_of(moments: Mapping[int, BlockMoments], f: int, what: str) -> BlockMoments:
    """``moments[f]``, checked to be the BlockMoments of ``f x f`` blocks."""
    bm = moments.get(f) if isinstance(moments, Mapping) else None
    if not isinstance(bm, BlockMoments):
        raise InputError(
            f"{what} has no BlockMoments for factor {f}",
            hint="pass the result of hierarchical_moments for the same factors",
        )
    if bm.count != f * f:
        raise InputError(f"{what}[{f}] has count {bm.count}, expected {f * f}")
    return bm
