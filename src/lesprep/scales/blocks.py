"""Blocks of a field: factor checks and the block-moments record.

:class:`BlockMoments` holds the count, mean and central sums M2, M3 of every block and
derives the population variance ``M2 / n`` and the skewness ``g1 = (M3 / n) / var**1.5``
(``ZERO_VARIANCE_SKEWNESS`` where a block is constant to rounding, see
``TINY_RELATIVE_STD``).
"""

from __future__ import annotations

import math
from collections.abc import Iterable
from dataclasses import dataclass

import numpy as np
import numpy.typing as npt

from lesprep._jit import Engine
from lesprep._jit import resolve_engine as _resolve_engine
from lesprep.errors import InputError, ScaleError
from lesprep.scales import moments_compiled as compiled

ZERO_VARIANCE_SKEWNESS: float = 0.0
"""Skewness reported for a block whose variance is zero (or round-off of zero)."""

TINY_RELATIVE_STD: float = 64.0 * float(np.finfo(np.float64).eps)
"""A block whose standard deviation is at most this fraction of ``|mean|`` counts as
constant for the skewness (round-off of a constant block; see the module docstring)."""


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
    f = factor_value(factor)
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


def factor_value(factor: object) -> int | None:
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


def check_horizontal(shape: tuple[int, ...], factor: object, *, what: str = "field") -> int:
    """Validate ``factor`` against the last two sizes of ``shape``; return it as int."""
    if len(shape) < 2:
        raise ScaleError(
            f"a {what} needs at least 2 dimensions (..., ny, nx), found shape {shape}",
            hint="pass an array whose last two axes are the horizontal ones",
        )
    ny, nx = shape[-2], shape[-1]
    if ny < 1 or nx < 1:
        raise ScaleError(f"the horizontal sizes of the {what} must be positive, found {shape}")
    f = factor_value(factor)
    if f is None or ny % f or nx % f:
        common = sorted(set(divisors(ny)) & set(divisors(nx)))
        raise ScaleError(
            f"block factor {factor!r} does not divide the horizontal sizes ny = {ny}, "
            f"nx = {nx} of the {what}; factors that fit both: {_join(common)}",
            hint="choose one of the listed factors",
        )
    return f


def as_real_array(a: object) -> np.ndarray:
    """``a`` as an array of a real (bool, integer or floating) dtype, else InputError."""
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
        if factor_value(self.count) is None:
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
        >>> from lesprep.scales.moments import block_moments
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
        >>> from lesprep.scales.moments import block_moments
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
        compiled.nb_var_skew(
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
