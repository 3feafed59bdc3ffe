"""Horizontal block statistics and their exact hierarchical combination.

A field of shape ``(..., ny, nx)`` (horizontal dimensions last) is cut into ``f x f``
non-overlapping blocks aligned at index 0; ``f`` must divide both ``ny`` and ``nx``, so a
block never straddles the edge of the doubly periodic domain. For every block this module
returns the count ``n = f*f``, the mean and the central sums

``M2 = sum((x - mean)**2)`` and ``M3 = sum((x - mean)**3)``,

from which :class:`BlockMoments` derives the population variance and the skewness.

Conventions
-----------
- **Population variance**: ``var = M2 / n`` (``ddof=0``, as ``numpy.var`` by default and
  ``xarray``'s ``coarsen(...).var()``). A block is the whole population of the sub-grid
  cells it describes, not a sample of it.
- **Skewness** is the Fisher--Pearson coefficient ``g1 = (M3/n) / var**1.5``, the same as
  ``scipy.stats.skew(..., bias=True)``.
- **Zero variance**: where a block is constant (common: cloud water is exactly zero over
  most of the domain) the skewness is set to :data:`ZERO_VARIANCE_SKEWNESS` ``= 0.0``. The
  distribution of such a block is a single point mass, which is symmetric, so 0 is the
  natural limit; NaN (what ``0/0`` gives) would poison every loss it touches in training.
- **Round-off variance**: a variance with ``var <= (TINY_RELATIVE_STD * |mean|)**2``, where
  ``TINY_RELATIVE_STD = 64 * eps(float64) ~ 1.4e-14``, is also treated as zero for the
  skewness. A standard deviation below 64 units in the last place of the mean can only come
  from round-off of a constant block (or from float64 data whose values differ by a handful
  of ulps, whose skewness is not resolvable either). No float32 input can reach the bound
  with a genuine spread: two distinct float32 values differ by at least ``2**-24`` of their
  size, so one odd cell in ``n`` gives ``std/|mean| >= 2**-24 / sqrt(n)``, which is above
  the bound for any ``n < 1e13``. The variance itself is returned unchanged.
- **Precision**: all sums are accumulated in float64 whatever the input dtype; results are
  float64.

Algorithms
----------
Block moments from the fine field use the *corrected two-pass* algorithm (Chan, Golub &
LeVeque 1983): a first pass gives ``m0 = sum(x)/n``; the second pass accumulates the
deviations ``d = x - m0`` as ``S1 = sum(d)``, ``S2 = sum(d**2)``, ``S3 = sum(d**3)``; then
with ``delta = S1/n`` (the round-off left in ``m0``)::

    mean = m0 + delta
    M2   = S2 - S1*delta
    M3   = S3 - 3*delta*S2 + 2*n*delta**3

These are exact identities; because ``d`` are deviations from the block's own mean, the
correction terms are of round-off size and nothing cancels (unlike raw or arbitrarily shifted
power sums). For a constant block the deviations are exact multiples of an ulp, so mean,
``M2 = 0`` and ``M3 = 0`` come out exactly.

Coarser blocks are merged from ``k x k`` children of count ``n_c`` with the exact
combination of central moments (Chan, Golub & LeVeque 1979; Pebay 2008). With
``N = k*k*n_c``, the merged mean ``m`` and ``d_i = m_i - m``::

    M2 = sum(M2_i) + n_c * sum(d_i**2)
    M3 = sum(M3_i + 3*d_i*M2_i + n_c*d_i**3)

The code evaluates these about the first-pass mean ``m0 = mean(m_i)`` and adds the same
exact shift correction as above, which is identical in exact arithmetic and removes the
error of ``m0`` from ``M2`` and ``M3``.

:func:`hierarchical_moments` computes each requested factor either from the fine field or
from the moments of an already computed factor that divides it, as chosen by
:func:`plan_hierarchy`. Two engines give the same numbers: ``"numpy"`` (a clear
reference that adds strided slices ``x[..., i::f, j::f]`` for small factors and reduces a
reshaped view for large ones) and ``"numba"`` (fused, parallel loops). Both work on groups
of ``(ny, nx)`` planes, so the extra memory is a few planes of float64 beyond the outputs.
"""

from __future__ import annotations

import math
import os
from collections.abc import Callable, Iterable
from concurrent.futures import ThreadPoolExecutor

import numpy as np

from lesprep._jit import HAVE_NUMBA, Engine
from lesprep._jit import resolve_engine as _resolve_engine
from lesprep.errors import InputError, ScaleError
from lesprep.scales import moments_compiled as compiled
from lesprep.scales.blocks import (
    TINY_RELATIVE_STD,
    ZERO_VARIANCE_SKEWNESS,
    BlockMoments,
    as_real_array,
    check_factor,
    check_horizontal,
    divisors,
    factor_value,
)
from lesprep.scales.moments_reference import np_mean, np_merge, np_moments, np_quantized_count

__all__ = [
    "HAVE_NUMBA",
    "TINY_RELATIVE_STD",
    "ZERO_VARIANCE_SKEWNESS",
    "BlockMoments",
    "Engine",
    "block_mean",
    "block_moments",
    "check_factor",
    "divisors",
    "hierarchical_fractions",
    "hierarchical_moments",
    "merge_blocks",
    "plan_hierarchy",
    "quantized_count",
]

_CHUNK_BYTES = 8 * 2**20
"""Target float64 size of one group of planes handled at a time."""

_NUMPY_THREADS = max(1, min(2, os.cpu_count() or 1))


# --------------------------------------------------------------------------------------
# Driver: planes, chunks, outputs
# --------------------------------------------------------------------------------------


def _plane_views(a: np.ndarray) -> list[tuple[int, np.ndarray]]:
    """Split ``a`` (..., ny, nx) into 3-D views (planes, ny, nx) without copying.

    Returns ``(offset, view)`` pairs, where ``offset`` is the flat (C-order) index of the
    view's first plane among all leading indices.
    """
    ny, nx = a.shape[-2:]
    try:
        return [(0, np.reshape(a, (-1, ny, nx), copy=False))]
    except ValueError:  # leading axes cannot be merged without a copy (ndim >= 4 here)
        pass
    views = []
    offset = 0
    for index in np.ndindex(*a.shape[:-3]):
        view = a[index]
        views.append((offset, view))
        offset += view.shape[0]
    return views


def _is_numba_native(arr: np.ndarray) -> bool:
    return arr.dtype.char in "fd" and arr.dtype.isnative


def _work_items(a: np.ndarray, engine: str, *, whole: bool = True) -> list[tuple[int, np.ndarray]]:
    """Groups of planes ``(offset, view)`` to hand to one kernel call each.

    numba reads C-contiguous float32/float64 views directly, so it gets whole views (unless
    ``whole`` is False); otherwise a group holds about ``_CHUNK_BYTES`` of float64 (at least
    one plane), since :func:`_prepare` converts or copies it.
    """
    ny, nx = a.shape[-2:]
    chunked = max(1, _CHUNK_BYTES // (8 * ny * nx))
    items = []
    for offset, view in _plane_views(a):
        direct = whole and engine == "numba" and _is_numba_native(view)
        group = view.shape[0] if direct and view.flags.c_contiguous else chunked
        for start in range(0, view.shape[0], max(1, group)):
            items.append((offset + start, view[start : start + group]))
    return items


def _prepare(chunk: np.ndarray, engine: str) -> np.ndarray:
    """The chunk as the kernels want it: float64 for numpy, C-ordered native float for numba.

    (Copying a non-contiguous chunk keeps numba to one compiled layout per dtype.)
    """
    if engine == "numba" and _is_numba_native(chunk):
        return np.ascontiguousarray(chunk)
    return np.asarray(chunk, dtype=np.float64)


def _run(
    items: list[tuple[int, np.ndarray]], work: Callable[[int, np.ndarray], None], engine: str
) -> None:
    """Call ``work(offset, chunk)`` for each item (numpy engine: on a few threads)."""
    if engine == "numpy" and _NUMPY_THREADS > 1 and len(items) > 1:
        with ThreadPoolExecutor(max_workers=_NUMPY_THREADS) as pool:
            for _ in pool.map(lambda item: work(*item), items):
                pass
    else:
        for item in items:
            work(*item)


def _empty(planes: int, ny: int, nx: int) -> np.ndarray:
    return np.empty((planes, ny, nx), dtype=np.float64)


# --------------------------------------------------------------------------------------
# Public functions
# --------------------------------------------------------------------------------------


def _first_level(x: np.ndarray, f: int, engine: str, mean, m2, m3) -> None:
    """Block moments of planes ``x`` into the output views ``mean``, ``m2``, ``m3``."""
    if engine == "numba":
        compiled.nb_moments(x, f, mean, m2, m3)
    else:
        mean[...], m2[...], m3[...] = np_moments(x, f)


def _merge_level(cmean, cm2, cm3, nc: int, k: int, engine: str, mean, m2, m3) -> None:
    """Merge ``k x k`` children of count ``nc`` into the output views."""
    if engine == "numba":
        compiled.nb_merge(cmean, cm2, cm3, nc, k, mean, m2, m3)
    else:
        mean[...], m2[...], m3[...] = np_merge(cmean, cm2, cm3, nc, k)


def block_moments(a: np.ndarray, factor: int, *, engine: Engine = "auto") -> BlockMoments:
    """Count, mean, M2 and M3 of the ``factor x factor`` blocks of a field.

    Parameters
    ----------
    a
        Real array of shape ``(..., ny, nx)``, horizontal dimensions last (float32 or
        float64; integers and booleans are converted). Must be finite.
    factor
        Block edge in grid cells; must divide ``ny`` and ``nx``.
    engine
        ``"numba"`` (fused parallel loops), ``"numpy"`` (reference) or ``"auto"`` (numba
        when importable).

    Returns
    -------
    BlockMoments
        float64 arrays of shape ``(..., ny/factor, nx/factor)``, ``count = factor**2``.

    Raises
    ------
    ScaleError
        If ``factor`` does not divide the horizontal sizes or ``a`` has fewer than 2 dims.

    Examples
    --------
    >>> x = np.arange(16.0).reshape(4, 4)
    >>> bm = block_moments(x, 2)
    >>> bm.mean
    array([[ 2.5,  4.5],
           [10.5, 12.5]])
    >>> bm.variance()
    array([[4.25, 4.25],
           [4.25, 4.25]])
    """
    arr = as_real_array(a)
    f = check_horizontal(arr.shape, factor)
    eng = _resolve_engine(engine)
    lead = arr.shape[:-2]
    ny, nx = arr.shape[-2:]
    planes = math.prod(lead)
    out = [_empty(planes, ny // f, nx // f) for _ in range(3)]

    def work(offset: int, chunk: np.ndarray) -> None:
        sl = slice(offset, offset + chunk.shape[0])
        _first_level(_prepare(chunk, eng), f, eng, *(o[sl] for o in out))

    _run(_work_items(arr, eng), work, eng)
    shape = (*lead, ny // f, nx // f)
    return BlockMoments(f * f, *(o.reshape(shape) for o in out))


def block_mean(a: np.ndarray, factor: int, *, engine: Engine = "auto") -> np.ndarray:
    """Float64 mean of the ``factor x factor`` blocks of a field.

    Uses the same corrected two-pass sum as :func:`block_moments`, so the result equals
    ``block_moments(a, factor).mean``. Boolean masks give block fractions.

    Parameters
    ----------
    a
        Real or boolean array of shape ``(..., ny, nx)``.
    factor
        Block edge in grid cells; must divide ``ny`` and ``nx``.
    engine
        ``"auto"``, ``"numba"`` or ``"numpy"``.

    Returns
    -------
    numpy.ndarray
        float64, shape ``(..., ny/factor, nx/factor)``.

    Examples
    --------
    >>> block_mean(np.array([[True, False], [False, False]]), 2)
    array([[0.25]])
    """
    arr = as_real_array(a)
    f = check_horizontal(arr.shape, factor)
    eng = _resolve_engine(engine)
    lead = arr.shape[:-2]
    ny, nx = arr.shape[-2:]
    out = _empty(math.prod(lead), ny // f, nx // f)

    def work(offset: int, chunk: np.ndarray) -> None:
        x = _prepare(chunk, eng)
        view = out[offset : offset + chunk.shape[0]]
        if eng == "numba":  # the first pass and shift correction of the moments kernel
            compiled.nb_mean(x, f, view)
        else:
            view[...] = np_mean(x, f)

    _run(_work_items(arr, eng), work, eng)
    return out.reshape((*lead, ny // f, nx // f))


def hierarchical_fractions(
    mask: np.ndarray, factors: Iterable[int], *, engine: Engine = "auto"
) -> dict[int, np.ndarray]:
    """Fraction of nonzero cells in each block, for several factors, from exact counts.

    The cells of a mask (boolean or integer, e.g. the canonical 0/1 ``int8`` cloud mask)
    are counted per block as integers, coarser factors by adding the counts of the
    factor :func:`plan_hierarchy` picks; each fraction is ``count / f**2`` rounded once.
    It equals ``block_mean(mask != 0, f)`` to float64 round-off.

    Parameters
    ----------
    mask
        Boolean or integer array ``(..., ny, nx)``, horizontal dimensions last.
    factors
        Block factors dividing ``ny`` and ``nx``.
    engine
        ``"auto"``, ``"numba"`` or ``"numpy"``.

    Returns
    -------
    dict
        ``{factor: float64 fractions of shape (..., ny/f, nx/f)}`` in increasing order.

    Examples
    --------
    >>> m = np.array([[1, 0, 0, 0], [1, 1, 0, 0]], dtype=np.int8)
    >>> {f: v.tolist() for f, v in hierarchical_fractions(m, [1, 2]).items()}
    {1: [[1.0, 0.0, 0.0, 0.0], [1.0, 1.0, 0.0, 0.0]], 2: [[0.75, 0.0]]}
    """
    arr = np.asarray(mask)
    if arr.dtype.kind not in "biu":
        raise InputError(f"a mask must be boolean or integer, found dtype {arr.dtype}")
    factor_list = list(factors)
    for factor in factor_list:
        check_horizontal(arr.shape, factor)
    plan = plan_hierarchy(factor_list)
    eng = _resolve_engine(engine)
    lead = arr.shape[:-2]
    ny, nx = arr.shape[-2:]
    cells = np.ascontiguousarray(arr.view(np.uint8) if arr.dtype == bool else arr)
    cells = cells.reshape(-1, ny, nx)
    counts: dict[int, np.ndarray] = {}
    for f, parent in plan.items():
        src, k = (cells, f) if parent is None else (counts[parent], f // parent)
        if eng == "numba":
            c = np.empty((src.shape[0], src.shape[1] // k, src.shape[2] // k), np.int64)
            compiled.nb_count(src, k, parent is None, c)
        else:
            nz = src if parent is not None else (src != 0)
            c = nz.reshape(src.shape[0], src.shape[1] // k, k, src.shape[2] // k, k).sum(
                axis=(2, 4), dtype=np.int64
            )
        counts[f] = c
    return {f: (c / float(f * f)).reshape((*lead, ny // f, nx // f)) for f, c in counts.items()}


def merge_blocks(child: BlockMoments, k: int, *, engine: Engine = "auto") -> BlockMoments:
    """Merge ``k x k`` neighbouring blocks into one (exact central-moment combination).

    Parameters
    ----------
    child
        Moments of blocks of count ``n_c``; shape ``(..., nyc, nxc)``.
    k
        Children per parent along each horizontal axis; must divide ``nyc`` and ``nxc``.
    engine
        ``"auto"``, ``"numba"`` or ``"numpy"``.

    Returns
    -------
    BlockMoments
        Parent moments, ``count = k*k*n_c``, shape ``(..., nyc/k, nxc/k)``.

    Examples
    --------
    >>> x = np.arange(16.0).reshape(4, 4)
    >>> merged = merge_blocks(block_moments(x, 2), 2)
    >>> float(merged.mean[0, 0]), float(merged.variance()[0, 0]), merged.count
    (7.5, 21.25, 16)
    """
    if not isinstance(child, BlockMoments):
        raise InputError(f"merge_blocks needs BlockMoments, found {type(child).__name__}")
    k = check_horizontal(child.shape, k, what="child block grid")
    eng = _resolve_engine(engine)
    lead = child.shape[:-2]
    nyc, nxc = child.shape[-2:]
    planes = math.prod(lead)
    src = [
        np.ascontiguousarray(v, dtype=np.float64).reshape(planes, nyc, nxc)
        for v in (child.mean, child.m2, child.m3)
    ]
    out = [_empty(planes, nyc // k, nxc // k) for _ in range(3)]
    group = planes if eng == "numba" else max(1, _CHUNK_BYTES // (8 * nyc * nxc))
    items = [(p0, src[0][p0 : p0 + group]) for p0 in range(0, planes, group)]

    def work(offset: int, chunk: np.ndarray) -> None:
        sl = slice(offset, offset + chunk.shape[0])
        _merge_level(*(s[sl] for s in src), child.count, k, eng, *(o[sl] for o in out))

    _run(items, work, eng)
    shape = (*lead, nyc // k, nxc // k)
    return BlockMoments(child.count * k * k, *(o.reshape(shape) for o in out))


def plan_hierarchy(factors: Iterable[int]) -> dict[int, int | None]:
    """Choose, for each factor, the already computed factor to merge it from.

    Factors are handled in increasing order. A factor's parent is the **largest** smaller
    requested factor that divides it (it has the fewest cells to combine, ``(f/p)**2`` per
    block); ``None`` means "compute from the fine field". Factor 1 (the fine field itself)
    is never used as a parent, because merging ``1 x 1`` blocks costs more than the fused
    first pass.

    Parameters
    ----------
    factors
        Requested block factors (integers >= 1; duplicates are ignored).

    Returns
    -------
    dict
        ``{factor: parent or None}`` in increasing order of factor.

    Examples
    --------
    >>> plan_hierarchy([60, 4, 20, 10])
    {4: None, 10: None, 20: 10, 60: 20}
    >>> plan_hierarchy([2, 4, 8])
    {2: None, 4: 2, 8: 4}
    """
    values = []
    for factor in factors:
        f = factor_value(factor)
        if f is None:
            raise ScaleError(f"block factors must be integers >= 1, found {factor!r}")
        values.append(f)
    plan: dict[int, int | None] = {}
    for f in sorted(set(values)):
        parents = [p for p in plan if p > 1 and f % p == 0]
        plan[f] = max(parents) if parents else None
    return plan


def merge_chain(
    plan: dict[int, int | None],
) -> tuple[np.ndarray, np.ndarray, np.ndarray, np.ndarray]:
    """The compiled hierarchy of a :func:`plan_hierarchy` plan: per level (in the plan's
    order) its factor, the index of its parent level (-1 for a level computed from the
    fine field), the children per parent along each axis and the fine cells per child.

    Examples
    --------
    >>> [a.tolist() for a in merge_chain(plan_hierarchy([2, 4, 12]))]
    [[2, 4, 12], [-1, 0, 1], [1, 2, 3], [1, 4, 16]]
    """
    levels = list(plan)
    return (
        np.array(levels, np.int64),
        np.array([-1 if p is None else levels.index(p) for p in plan.values()], np.int64),
        np.array([f // (p or f) for f, p in plan.items()], np.int64),
        np.array([(p or 1) ** 2 for p in plan.values()], np.int64),
    )


def hierarchical_moments(
    a: np.ndarray, factors: Iterable[int], *, engine: Engine = "auto"
) -> dict[int, BlockMoments]:
    """Block moments for several factors, coarse ones merged from finer ones.

    Each factor is computed from the fine field or merged from the moments of the factor
    :func:`plan_hierarchy` picks, with the exact combination of central moments (Chan,
    Golub & LeVeque 1979; Pebay 2008). The results equal :func:`block_moments` per factor
    to round-off.

    Parameters
    ----------
    a
        Real array of shape ``(..., ny, nx)``, horizontal dimensions last.
    factors
        Block factors; every one must divide ``ny`` and ``nx`` (all are checked first).
    engine
        ``"auto"``, ``"numba"`` or ``"numpy"``.

    Returns
    -------
    dict
        ``{factor: BlockMoments}`` in increasing order of factor.

    Raises
    ------
    ScaleError
        If any factor does not divide the horizontal sizes.

    Examples
    --------
    >>> x = np.random.default_rng(0).normal(size=(3, 8, 8))
    >>> res = hierarchical_moments(x, [2, 4, 8])
    >>> sorted(res), res[8].mean.shape, res[8].count
    ([2, 4, 8], (3, 1, 1), 64)
    >>> bool(np.allclose(res[8].variance(), block_moments(x, 8).variance(), rtol=1e-12))
    True
    """
    arr = as_real_array(a)
    factor_list = list(factors)
    for factor in factor_list:
        check_horizontal(arr.shape, factor)
    plan = plan_hierarchy(factor_list)
    eng = _resolve_engine(engine)
    if not plan:
        return {}
    lead = arr.shape[:-2]
    ny, nx = arr.shape[-2:]
    planes = math.prod(lead)
    out = {f: [_empty(planes, ny // f, nx // f) for _ in range(3)] for f in plan}

    chain = merge_chain(plan)

    def work(offset: int, chunk: np.ndarray) -> None:
        sl = slice(offset, offset + chunk.shape[0])
        x = _prepare(chunk, eng)
        if eng == "numba":  # every level in one compiled call, plane by plane
            views = [tuple(out[f][j][sl] for f in plan) for j in range(3)]
            compiled.nb_hierarchy(x, *views, *chain)
            return
        for f, parent in plan.items():
            target = [o[sl] for o in out[f]]
            if parent is None:
                _first_level(x, f, eng, *target)
            else:
                source = [o[sl] for o in out[parent]]
                _merge_level(*source, parent * parent, f // parent, eng, *target)

    _run(_work_items(arr, eng), work, eng)
    return {
        f: BlockMoments(f * f, *(o.reshape((*lead, ny // f, nx // f)) for o in out[f]))
        for f in plan
    }


def quantized_count(
    mean: np.ndarray, var: np.ndarray, steps: float, *, engine: Engine = "auto"
) -> int:
    """Number of blocks whose spread is within ``steps`` float32 steps of their mean.

    A block counts when its mean is non-zero and its variance is below
    ``(steps * spacing)**2``, ``spacing`` being the distance between adjacent float32
    numbers at ``|mean|`` (``numpy.spacing``): its variance and skewness then describe the
    rounding of the stored fine values, not the field. Blocks of mean zero (clear air in
    ``qc``) and NaN means are not counted.

    Parameters
    ----------
    mean, var
        Block means and variances, any shape (same size).
    steps
        The bound in float32 steps.
    engine
        ``"numba"`` (one pass), ``"numpy"`` (the reference) or ``"auto"``.

    Examples
    --------
    >>> quantized_count(np.array([290.0, 290.0, 0.0]), np.array([0.0, 1.0, 0.0]), 4)
    1
    """
    m = np.ascontiguousarray(mean).reshape(-1)
    v = np.ascontiguousarray(var).reshape(-1)
    if _resolve_engine(engine) == "numba":
        return int(compiled.nb_quantized_count(m, v, float(steps)))
    return np_quantized_count(m, v, steps)
