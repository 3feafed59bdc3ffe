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
from dataclasses import dataclass

import numpy as np
import numpy.typing as npt

from lesprep._jit import HAVE_NUMBA, Engine, njit, prange
from lesprep._jit import resolve_engine as _resolve_engine
from lesprep.errors import InputError, ScaleError

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
]

ZERO_VARIANCE_SKEWNESS: float = 0.0
"""Skewness reported for a block whose variance is zero (or round-off of zero)."""

TINY_RELATIVE_STD: float = 64.0 * float(np.finfo(np.float64).eps)
"""A block whose standard deviation is at most this fraction of ``|mean|`` counts as
constant for the skewness (round-off of a constant block; see the module docstring)."""

_SLICE_MAX = 8
"""numpy engine: factors up to this add ``f*f`` strided slices, larger ones reduce a
reshaped view (many tiny slices cost per-call overhead, a tiny reduced axis costs more)."""

_ROWWISE_MAX = 32
"""numba engine: factors up to this loop row-wise across blocks, larger ones block by block."""

_CHUNK_BYTES = 8 * 2**20
"""Target float64 size of one group of planes handled at a time."""

_NUMPY_THREADS = max(1, min(2, os.cpu_count() or 1))


# --------------------------------------------------------------------------------------
# Validation helpers
# --------------------------------------------------------------------------------------


def divisors(n: int) -> list[int]:
    """Return the positive divisors of ``n`` in increasing order.

    Parameters
    ----------
    n
        A positive integer (a grid size).

    Returns
    -------
    list of int
        Every ``f`` with ``n % f == 0``, smallest first.

    Examples
    --------
    >>> divisors(12)
    [1, 2, 3, 4, 6, 12]
    """
    n = _as_int(n, what="grid size")
    if n < 1:
        raise ScaleError(f"grid size must be a positive integer, found {n}")
    small = [d for d in range(1, math.isqrt(n) + 1) if n % d == 0]
    large = [n // d for d in reversed(small) if d * d != n]
    return small + large


def check_factor(n: int, factor: int, *, axis_name: str) -> None:
    """Check that a block factor is a positive integer dividing an axis of size ``n``.

    Parameters
    ----------
    n
        Size of the axis (number of grid cells).
    factor
        Block edge length in grid cells.
    axis_name
        Name of the axis for the message, e.g. ``"nx"``.

    Raises
    ------
    ScaleError
        If ``factor`` is not an integer ``>= 1`` or does not divide ``n``; the message names
        the size, the factor and the factors that would fit.

    Examples
    --------
    >>> check_factor(100, 20, axis_name="nx")
    >>> check_factor(100, 30, axis_name="nx")
    Traceback (most recent call last):
    ...
    lesprep.errors.ScaleError: block factor 30 does not divide nx = 100; factors that fit: \
1, 2, 4, 5, 10, 20, 25, 50, 100 -- choose one of the listed factors
    """
    n = _as_int(n, what=f"size of {axis_name}")
    if n < 1:
        raise ScaleError(f"{axis_name} must be a positive size, found {n}")
    f = _factor_value(factor)
    if f is None or n % f != 0:
        raise ScaleError(
            f"block factor {factor!r} does not divide {axis_name} = {n}; "
            f"factors that fit: {_join(divisors(n))}",
            hint="choose one of the listed factors",
        )


def _as_int(value: object, *, what: str) -> int:
    """Return ``value`` as a Python int, refusing bools, floats and strings."""
    if isinstance(value, bool | np.bool_):
        raise ScaleError(f"{what} must be an integer, found {value!r}")
    try:
        return int(value.__index__())  # type: ignore[attr-defined]
    except (AttributeError, TypeError):
        raise ScaleError(f"{what} must be an integer, found {value!r}") from None


def _factor_value(factor: object) -> int | None:
    """Return the factor as int if it is an integer >= 1, else None."""
    if isinstance(factor, bool | np.bool_):
        return None
    try:
        f = int(factor.__index__())  # type: ignore[attr-defined]
    except (AttributeError, TypeError):
        return None
    return f if f >= 1 else None


def _join(values: Iterable[int]) -> str:
    return ", ".join(str(v) for v in values)


def _check_horizontal(shape: tuple[int, ...], factor: object, *, what: str = "field") -> int:
    """Validate ``factor`` against the last two sizes of ``shape``; return it as int."""
    if len(shape) < 2:
        raise ScaleError(
            f"a {what} needs at least 2 dimensions (..., ny, nx), found shape {shape}",
            hint="pass an array whose last two axes are the horizontal ones",
        )
    ny, nx = shape[-2], shape[-1]
    if ny < 1 or nx < 1:
        raise ScaleError(f"the horizontal sizes of the {what} must be positive, found {shape}")
    f = _factor_value(factor)
    if f is None or ny % f or nx % f:
        common = sorted(set(divisors(ny)) & set(divisors(nx)))
        raise ScaleError(
            f"block factor {factor!r} does not divide the horizontal sizes ny = {ny}, "
            f"nx = {nx} of the {what}; factors that fit both: {_join(common)}",
            hint="choose one of the listed factors",
        )
    return f


def _as_real_array(a: object) -> np.ndarray:
    arr = np.asarray(a)
    if arr.dtype.kind not in "biuf":
        raise InputError(
            f"expected a real numeric array (float32 or float64), found dtype {arr.dtype}",
            hint="convert the field to a real floating-point array",
        )
    return arr


# --------------------------------------------------------------------------------------
# Result type
# --------------------------------------------------------------------------------------


@dataclass(frozen=True)
class BlockMoments:
    """Moments of ``f x f`` blocks of a field.

    Attributes
    ----------
    count
        Fine cells per block (``f*f``); the same for every block.
    mean
        Block means, float64, shape ``(..., ny/f, nx/f)``.
    m2
        Sums of squared deviations from the block mean, float64, same shape (``>= 0``).
    m3
        Sums of cubed deviations from the block mean, float64, same shape.
    """

    count: int
    mean: np.ndarray
    m2: np.ndarray
    m3: np.ndarray

    def __post_init__(self) -> None:
        if _factor_value(self.count) is None:
            raise InputError(f"BlockMoments.count must be an integer >= 1, found {self.count!r}")
        shapes = {np.shape(self.mean), np.shape(self.m2), np.shape(self.m3)}
        if len(shapes) != 1:
            raise InputError(f"BlockMoments arrays differ in shape: {sorted(shapes)}")

    @property
    def shape(self) -> tuple[int, ...]:
        """Shape of the block arrays, ``(..., ny/f, nx/f)``."""
        return tuple(np.shape(self.mean))

    def variance(self) -> np.ndarray:
        """Population variance ``M2 / n`` of each block.

        Returns
        -------
        numpy.ndarray
            float64, shape of :attr:`mean`.

        Examples
        --------
        >>> bm = block_moments(np.array([[1.0, 2.0], [3.0, 4.0]]), 2)
        >>> float(bm.variance()[0, 0])
        1.25
        """
        return np.divide(self.m2, self.count, dtype=np.float64)

    def skewness(self) -> np.ndarray:
        """Skewness ``g1 = (M3/n) / var**1.5`` of each block (``scipy.stats.skew``, bias=True).

        Blocks with zero variance, or a variance at round-off level of a constant block
        (``var <= (TINY_RELATIVE_STD * |mean|)**2``), get :data:`ZERO_VARIANCE_SKEWNESS`.

        Returns
        -------
        numpy.ndarray
            float64, shape of :attr:`mean`.

        Examples
        --------
        >>> bm = block_moments(np.array([[0.0, 0.0], [0.0, 4.0]]), 2)
        >>> round(float(bm.skewness()[0, 0]), 6)
        1.154701
        >>> float(block_moments(np.full((2, 2), 0.1), 2).skewness()[0, 0])
        0.0
        """
        var = self.variance()
        denom = np.sqrt(var)
        denom *= var  # var * sqrt(var): much faster than var**1.5
        tiny = np.multiply(self.mean, TINY_RELATIVE_STD, dtype=np.float64)
        np.multiply(tiny, tiny, out=tiny)
        degenerate = var <= tiny
        degenerate |= denom == 0.0  # underflow of var*sqrt(var) for absurdly small data
        del tiny
        np.divide(self.m3, self.count, out=var, dtype=np.float64)
        with np.errstate(divide="ignore", invalid="ignore"):
            np.divide(var, denom, out=var)
        var[degenerate] = ZERO_VARIANCE_SKEWNESS
        return var

    def variance_and_skewness(
        self,
        dtype: npt.DTypeLike = np.float64,
        *,
        out: tuple[np.ndarray, np.ndarray] | None = None,
        mean_out: np.ndarray | None = None,
        engine: Engine = "auto",
    ) -> tuple[np.ndarray, np.ndarray]:
        """:meth:`variance` and :meth:`skewness` in one pass, stored as ``dtype``.

        The arithmetic is float64 whatever ``dtype`` is; only the results are rounded to
        it. The numba engine fuses both into one loop without float64 temporaries; the
        numpy engine (the reference) calls :meth:`variance` and :meth:`skewness`.

        ``out`` may give two C-contiguous arrays of the shape of :attr:`mean` to write into
        (their dtype then wins over ``dtype``). ``mean_out``, an array of that shape, also
        receives :attr:`mean` rounded to its dtype in the same pass.

        Returns
        -------
        variance, skewness
            Arrays of ``dtype`` and the shape of :attr:`mean`.
        """
        eng = _resolve_engine(engine)
        shape = self.shape
        if out is None:
            dt = np.dtype(dtype)
            var = np.empty(shape, dtype=dt)
            skew = np.empty(shape, dtype=dt)
        else:
            var, skew = out
            if var.shape != shape or skew.shape != shape:
                raise InputError(f"out arrays must have shape {shape}")
        if mean_out is not None and mean_out.shape != shape:
            raise InputError(f"mean_out must have shape {shape}, found {mean_out.shape}")
        targets = (var, skew) if mean_out is None else (var, skew, mean_out)
        fast = all(a.flags.c_contiguous and a.dtype.char in "fd" for a in targets)
        if eng == "numpy" or not fast or (mean_out is not None and mean_out.dtype != var.dtype):
            var[...] = self.variance()
            skew[...] = self.skewness()
            if mean_out is not None:
                mean_out[...] = self.mean
            return var, skew
        flat = [np.ascontiguousarray(a, dtype=np.float64).reshape(-1) for a in self._arrays()]
        _nb_var_skew(
            *flat,
            float(self.count),
            TINY_RELATIVE_STD,
            ZERO_VARIANCE_SKEWNESS,
            var.reshape(-1),
            skew.reshape(-1),
            (var if mean_out is None else mean_out).reshape(-1),
            mean_out is not None,
        )
        return var, skew

    def _arrays(self) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
        return np.asarray(self.mean), np.asarray(self.m2), np.asarray(self.m3)


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
# numpy engine (reference)
# --------------------------------------------------------------------------------------


def _np_finish(m0, s1, s2, s3, n):
    """Shift correction of the corrected two-pass algorithm (see module docstring)."""
    delta = s1 / n
    mean = m0 + delta
    m2 = s2 - s1 * delta
    np.maximum(m2, 0.0, out=m2)
    m3 = s3 - 3.0 * delta * s2 + 2.0 * n * delta * delta * delta
    return mean, m2, m3


def _np_block_sum(x: np.ndarray, f: int) -> np.ndarray:
    """Sum of each ``f x f`` block of ``x`` (G, ny, nx), float64."""
    if f <= _SLICE_MAX:
        s = np.array(x[:, 0::f, 0::f], dtype=np.float64)
        for i in range(f):
            for j in range(f):
                if i or j:
                    s += x[:, i::f, j::f]
        return s
    g, ny, nx = x.shape
    return x.reshape(g, ny // f, f, nx // f, f).sum(axis=(2, 4), dtype=np.float64)


def _np_moments(x: np.ndarray, f: int):
    """Block mean, M2, M3 of float64 planes ``x`` (G, ny, nx)."""
    n = f * f
    m0 = _np_block_sum(x, f)
    m0 /= n
    if f <= _SLICE_MAX:
        s1 = np.zeros_like(m0)
        s2 = np.zeros_like(m0)
        s3 = np.zeros_like(m0)
        for i in range(f):
            for j in range(f):
                d = x[:, i::f, j::f] - m0
                s1 += d
                d2 = d * d
                s2 += d2
                d2 *= d
                s3 += d2
    else:
        g, ny, nx = x.shape
        xr = x.reshape(g, ny // f, f, nx // f, f)
        d = xr - m0[:, :, None, :, None]
        s1 = d.sum(axis=(2, 4))
        d2 = d * d
        s2 = d2.sum(axis=(2, 4))
        d2 *= d
        s3 = d2.sum(axis=(2, 4))
    return _np_finish(m0, s1, s2, s3, n)


def _np_mean(x: np.ndarray, f: int) -> np.ndarray:
    """Corrected two-pass block mean of float64 planes ``x`` (G, ny, nx)."""
    n = f * f
    m0 = _np_block_sum(x, f)
    m0 /= n
    if f <= _SLICE_MAX:
        s1 = np.zeros_like(m0)
        for i in range(f):
            for j in range(f):
                s1 += x[:, i::f, j::f] - m0
    else:
        g, ny, nx = x.shape
        s1 = (x.reshape(g, ny // f, f, nx // f, f) - m0[:, :, None, :, None]).sum(axis=(2, 4))
    s1 /= n
    m0 += s1
    return m0


def _np_merge(cmean: np.ndarray, cm2: np.ndarray, cm3: np.ndarray, nc: int, k: int):
    """Merge ``k x k`` children (G, nyc, nxc) of count ``nc``; return mean, M2, M3."""
    kk = k * k
    m0 = _np_block_sum(cmean, k)
    m0 /= kk
    if k <= _SLICE_MAX:
        s1 = np.zeros_like(m0)
        a2 = np.zeros_like(m0)
        a3 = np.zeros_like(m0)
        for i in range(k):
            for j in range(k):
                d = cmean[:, i::k, j::k] - m0
                c2 = cm2[:, i::k, j::k]
                s1 += d
                t = d * d
                t *= nc  # n_c * d**2
                a2 += c2
                a2 += t
                t *= d  # n_c * d**3
                a3 += t
                a3 += cm3[:, i::k, j::k]
                t = 3.0 * d
                t *= c2
                a3 += t
    else:
        g, nyc, nxc = cmean.shape
        shape5 = (g, nyc // k, k, nxc // k, k)
        c2 = cm2.reshape(shape5)
        d = cmean.reshape(shape5) - m0[:, :, None, :, None]
        s1 = d.sum(axis=(2, 4))
        a2 = (c2 + nc * d * d).sum(axis=(2, 4))
        a3 = (cm3.reshape(shape5) + 3.0 * d * c2 + nc * d**3).sum(axis=(2, 4))
    # The fine-cell sum of deviations from m0 is nc*s1 = N*delta with delta = s1/kk.
    return _np_finish(m0, nc * s1, a2, a3, nc * kk)


# --------------------------------------------------------------------------------------
# numba engine (fused loops, parallel over (plane, block row))
# --------------------------------------------------------------------------------------

if HAVE_NUMBA:
    # Each kernel runs in parallel over (plane, block row). Within a block row the loops go
    # either row-wise (the innermost loop runs across the blocks of the row, which LLVM can
    # vectorise without reordering any sum) for small factors, or block by block for large
    # ones (few blocks per row). Both add each block's cells in the same (row, column)
    # order, so they give bit-identical results; only the speed differs.

    @njit(inline="always")
    def _nb_finish(m0, s1, s2, s3, n):  # pragma: no cover - compiled
        """Shift correction of the corrected two-pass algorithm (see module docstring)."""
        delta = s1 / n
        v = s2 - s1 * delta
        m3 = s3 - 3.0 * delta * s2 + 2.0 * n * delta * delta * delta
        return m0 + delta, (v if v > 0.0 else 0.0), m3

    @njit(inline="always")
    def _nb_mean4(x0, x1, x2, x3, n):  # pragma: no cover - compiled
        """First-pass mean of four cells, summed in the order of the row-wise loops."""
        s = 0.0
        s += x0
        s += x1
        s += x2
        s += x3
        return s / n

    @njit(inline="always")
    def _nb_dev4(x0, x1, x2, x3, m0):  # pragma: no cover - compiled
        """Second-pass sums of four cells, in the order of the row-wise loops."""
        s1 = 0.0
        s2 = 0.0
        s3 = 0.0
        for x in (x0, x1, x2, x3):
            d = x - m0
            d2 = d * d
            s1 += d
            s2 += d2
            s3 += d2 * d
        return s1, s2, s3

    @njit(inline="always")
    def _nb_merge1(cm, c2, c3, m0, nc, s1, a2, a3):  # pragma: no cover - compiled
        """Add one child (mean, M2, M3) to the merge sums, as the row-wise loop does."""
        d = cm - m0
        return s1 + d, a2 + (c2 + nc * d * d), a3 + (c3 + 3.0 * d * c2 + nc * d * d * d)

    @njit(parallel=True, cache=True, fastmath=False, error_model="numpy")
    def _nb_moments(a, f, mean, m2, m3):  # pragma: no cover - compiled
        planes, ny, nx = a.shape
        nby = ny // f
        nbx = nx // f
        n = f * f
        for t in prange(planes * nby):
            p = t // nby
            bi = t - p * nby
            r0 = bi * f
            o1 = mean[p, bi]
            o2 = m2[p, bi]
            o3 = m3[p, bi]
            if f == 2:  # the same sums with a constant stride, which LLVM vectorises
                ra = a[p, r0]
                rb = a[p, r0 + 1]
                for bj in range(nbx):
                    x0, x1 = ra[2 * bj], ra[2 * bj + 1]
                    x2, x3 = rb[2 * bj], rb[2 * bj + 1]
                    m0 = _nb_mean4(x0, x1, x2, x3, n)
                    s1b, s2b, s3b = _nb_dev4(x0, x1, x2, x3, m0)
                    o1[bj], o2[bj], o3[bj] = _nb_finish(m0, s1b, s2b, s3b, n)
            elif f <= _ROWWISE_MAX:
                s1 = np.zeros(nbx)
                o1[:] = 0.0
                o2[:] = 0.0
                o3[:] = 0.0
                for r in range(r0, r0 + f):
                    row = a[p, r]
                    for c in range(f):
                        for bj in range(nbx):
                            o1[bj] += row[bj * f + c]
                for bj in range(nbx):
                    o1[bj] = o1[bj] / n  # first-pass mean m0
                for r in range(r0, r0 + f):
                    row = a[p, r]
                    for c in range(f):
                        for bj in range(nbx):
                            d = row[bj * f + c] - o1[bj]
                            d2 = d * d
                            s1[bj] += d
                            o2[bj] += d2
                            o3[bj] += d2 * d
                for bj in range(nbx):
                    o1[bj], o2[bj], o3[bj] = _nb_finish(o1[bj], s1[bj], o2[bj], o3[bj], n)
            else:
                for bj in range(nbx):
                    c0 = bj * f
                    s = 0.0
                    for r in range(r0, r0 + f):
                        for c in range(c0, c0 + f):
                            s += a[p, r, c]
                    m0 = s / n
                    s1b = 0.0
                    s2b = 0.0
                    s3b = 0.0
                    for r in range(r0, r0 + f):
                        for c in range(c0, c0 + f):
                            d = a[p, r, c] - m0
                            d2 = d * d
                            s1b += d
                            s2b += d2
                            s3b += d2 * d
                    o1[bj], o2[bj], o3[bj] = _nb_finish(m0, s1b, s2b, s3b, n)

    @njit(parallel=True, cache=True, fastmath=False, error_model="numpy")
    def _nb_mean(a, f, mean):  # pragma: no cover - compiled
        """The mean of _nb_moments (same sums in the same order), without M2 and M3."""
        planes, ny, nx = a.shape
        nby = ny // f
        nbx = nx // f
        n = f * f
        for t in prange(planes * nby):
            p = t // nby
            bi = t - p * nby
            r0 = bi * f
            o1 = mean[p, bi]
            if f == 2:
                ra = a[p, r0]
                rb = a[p, r0 + 1]
                for bj in range(nbx):
                    x0, x1 = ra[2 * bj], ra[2 * bj + 1]
                    x2, x3 = rb[2 * bj], rb[2 * bj + 1]
                    m0 = _nb_mean4(x0, x1, x2, x3, n)
                    s1b = _nb_dev4(x0, x1, x2, x3, m0)[0]  # (the unused sums compile away)
                    o1[bj] = m0 + s1b / n
            elif f <= _ROWWISE_MAX:
                s1 = np.zeros(nbx)
                o1[:] = 0.0
                for r in range(r0, r0 + f):
                    row = a[p, r]
                    for c in range(f):
                        for bj in range(nbx):
                            o1[bj] += row[bj * f + c]
                for bj in range(nbx):
                    o1[bj] = o1[bj] / n
                for r in range(r0, r0 + f):
                    row = a[p, r]
                    for c in range(f):
                        for bj in range(nbx):
                            s1[bj] += row[bj * f + c] - o1[bj]
                for bj in range(nbx):
                    o1[bj] = o1[bj] + s1[bj] / n
            else:
                for bj in range(nbx):
                    c0 = bj * f
                    sm = 0.0
                    for r in range(r0, r0 + f):
                        for c in range(c0, c0 + f):
                            sm += a[p, r, c]
                    m0 = sm / n
                    s1b = 0.0
                    for r in range(r0, r0 + f):
                        for c in range(c0, c0 + f):
                            s1b += a[p, r, c] - m0
                    o1[bj] = m0 + s1b / n

    @njit(parallel=True, cache=True, fastmath=False, error_model="numpy")
    def _nb_merge(cmean, cm2, cm3, nc, k, mean, m2, m3):  # pragma: no cover - compiled
        planes, nyc, nxc = cmean.shape
        nyp = nyc // k
        nxp = nxc // k
        kk = k * k
        n = nc * kk
        for t in prange(planes * nyp):
            p = t // nyp
            bi = t - p * nyp
            r0 = bi * k
            o1 = mean[p, bi]
            o2 = m2[p, bi]
            o3 = m3[p, bi]
            if k == 2:  # constant stride, as in _nb_moments
                ma, mb = cmean[p, r0], cmean[p, r0 + 1]
                va, vb = cm2[p, r0], cm2[p, r0 + 1]
                wa, wb = cm3[p, r0], cm3[p, r0 + 1]
                for bj in range(nxp):
                    i0 = 2 * bj
                    i1 = i0 + 1
                    s = 0.0
                    s += ma[i0]
                    s += ma[i1]
                    s += mb[i0]
                    s += mb[i1]
                    m0 = s / kk
                    s1b = 0.0
                    a2 = 0.0
                    a3 = 0.0
                    s1b, a2, a3 = _nb_merge1(ma[i0], va[i0], wa[i0], m0, nc, s1b, a2, a3)
                    s1b, a2, a3 = _nb_merge1(ma[i1], va[i1], wa[i1], m0, nc, s1b, a2, a3)
                    s1b, a2, a3 = _nb_merge1(mb[i0], vb[i0], wb[i0], m0, nc, s1b, a2, a3)
                    s1b, a2, a3 = _nb_merge1(mb[i1], vb[i1], wb[i1], m0, nc, s1b, a2, a3)
                    o1[bj], o2[bj], o3[bj] = _nb_finish(m0, nc * s1b, a2, a3, n)
            elif k <= _ROWWISE_MAX:
                s1 = np.zeros(nxp)
                o1[:] = 0.0
                o2[:] = 0.0
                o3[:] = 0.0
                for r in range(r0, r0 + k):
                    row = cmean[p, r]
                    for c in range(k):
                        for bj in range(nxp):
                            o1[bj] += row[bj * k + c]
                for bj in range(nxp):
                    o1[bj] = o1[bj] / kk  # first-pass mean m0
                for r in range(r0, r0 + k):
                    row = cmean[p, r]
                    row2 = cm2[p, r]
                    row3 = cm3[p, r]
                    for c in range(k):
                        for bj in range(nxp):
                            i = bj * k + c
                            d = row[i] - o1[bj]
                            c2 = row2[i]
                            s1[bj] += d
                            o2[bj] += c2 + nc * d * d
                            o3[bj] += row3[i] + 3.0 * d * c2 + nc * d * d * d
                for bj in range(nxp):
                    # nc*s1 is the fine-cell sum of deviations from m0
                    o1[bj], o2[bj], o3[bj] = _nb_finish(o1[bj], nc * s1[bj], o2[bj], o3[bj], n)
            else:
                for bj in range(nxp):
                    c0 = bj * k
                    s = 0.0
                    for r in range(r0, r0 + k):
                        for c in range(c0, c0 + k):
                            s += cmean[p, r, c]
                    m0 = s / kk
                    s1b = 0.0
                    a2 = 0.0
                    a3 = 0.0
                    for r in range(r0, r0 + k):
                        for c in range(c0, c0 + k):
                            d = cmean[p, r, c] - m0
                            c2 = cm2[p, r, c]
                            s1b += d
                            a2 += c2 + nc * d * d
                            a3 += cm3[p, r, c] + 3.0 * d * c2 + nc * d * d * d
                    o1[bj], o2[bj], o3[bj] = _nb_finish(m0, nc * s1b, a2, a3, n)

    @njit(parallel=True, cache=True, fastmath=False, error_model="numpy")
    def _nb_count(a, f, nonzero, out):  # pragma: no cover - compiled
        """Per f x f block of the integer planes ``a``: the number of nonzero cells
        (``nonzero``) or the sum of the values (counts of finer blocks)."""
        planes, ny, nx = a.shape
        nby = ny // f
        nbx = nx // f
        for t in prange(planes * nby):
            p = t // nby
            bi = t - p * nby
            o = out[p, bi]
            if f == 2:  # constant stride, which LLVM vectorises
                ra = a[p, 2 * bi]
                rb = a[p, 2 * bi + 1]
                if nonzero:
                    for bj in range(nbx):
                        o[bj] = (
                            np.int64(ra[2 * bj] != 0)
                            + np.int64(ra[2 * bj + 1] != 0)
                            + np.int64(rb[2 * bj] != 0)
                            + np.int64(rb[2 * bj + 1] != 0)
                        )
                else:
                    for bj in range(nbx):
                        o[bj] = ra[2 * bj] + ra[2 * bj + 1] + rb[2 * bj] + rb[2 * bj + 1]
                continue
            o[:] = 0
            for r in range(bi * f, bi * f + f):
                row = a[p, r]
                for c in range(f):
                    if nonzero:
                        for bj in range(nbx):
                            o[bj] += row[bj * f + c] != 0
                    else:
                        for bj in range(nbx):
                            o[bj] += row[bj * f + c]

    @njit(parallel=True, cache=True, fastmath=False, error_model="numpy")
    def _nb_var_skew(mean, m2, m3, n, tiny_rel, zero, var, skew, mean_out, with_mean):
        """Same operations as BlockMoments.variance/skewness, per element (and the mean
        rounded into ``mean_out`` when ``with_mean``)."""  # pragma: no cover - compiled
        for i in prange(mean.size):
            m = mean[i]
            v = m2[i] / n
            var[i] = v
            tiny = m * tiny_rel
            tiny = tiny * tiny
            denom = np.sqrt(v) * v
            g = (m3[i] / n) / denom
            skew[i] = zero if (v <= tiny or denom == 0.0) else g
            if with_mean:
                mean_out[i] = m


# --------------------------------------------------------------------------------------
# Public functions
# --------------------------------------------------------------------------------------


def _first_level(x: np.ndarray, f: int, engine: str, mean, m2, m3) -> None:
    """Block moments of planes ``x`` into the output views ``mean``, ``m2``, ``m3``."""
    if engine == "numba":
        _nb_moments(x, f, mean, m2, m3)
    else:
        mean[...], m2[...], m3[...] = _np_moments(x, f)


def _merge_level(cmean, cm2, cm3, nc: int, k: int, engine: str, mean, m2, m3) -> None:
    """Merge ``k x k`` children of count ``nc`` into the output views."""
    if engine == "numba":
        _nb_merge(cmean, cm2, cm3, nc, k, mean, m2, m3)
    else:
        mean[...], m2[...], m3[...] = _np_merge(cmean, cm2, cm3, nc, k)


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
    arr = _as_real_array(a)
    f = _check_horizontal(arr.shape, factor)
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
    arr = _as_real_array(a)
    f = _check_horizontal(arr.shape, factor)
    eng = _resolve_engine(engine)
    lead = arr.shape[:-2]
    ny, nx = arr.shape[-2:]
    out = _empty(math.prod(lead), ny // f, nx // f)

    def work(offset: int, chunk: np.ndarray) -> None:
        x = _prepare(chunk, eng)
        view = out[offset : offset + chunk.shape[0]]
        if eng == "numba":  # the first pass and shift correction of the moments kernel
            _nb_mean(x, f, view)
        else:
            view[...] = _np_mean(x, f)

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
        _check_horizontal(arr.shape, factor)
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
            _nb_count(src, k, parent is None, c)
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
    k = _check_horizontal(child.shape, k, what="child block grid")
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
        f = _factor_value(factor)
        if f is None:
            raise ScaleError(f"block factors must be integers >= 1, found {factor!r}")
        values.append(f)
    plan: dict[int, int | None] = {}
    for f in sorted(set(values)):
        parents = [p for p in plan if p > 1 and f % p == 0]
        plan[f] = max(parents) if parents else None
    return plan


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
    arr = _as_real_array(a)
    factor_list = list(factors)
    for factor in factor_list:
        _check_horizontal(arr.shape, factor)
    plan = plan_hierarchy(factor_list)
    eng = _resolve_engine(engine)
    if not plan:
        return {}
    lead = arr.shape[:-2]
    ny, nx = arr.shape[-2:]
    planes = math.prod(lead)
    out = {f: [_empty(planes, ny // f, nx // f) for _ in range(3)] for f in plan}

    def work(offset: int, chunk: np.ndarray) -> None:
        sl = slice(offset, offset + chunk.shape[0])
        x = _prepare(chunk, eng)
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
