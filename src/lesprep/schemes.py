"""Classical relative-humidity cloud-fraction scheme, the baseline of the report.

The baseline is the diagnostic scheme of Sundqvist et al. (1989): cloud fraction grows
from zero at a critical relative humidity ``RHc`` to one at saturation,

    C = 1 - sqrt((1 - RH) / (1 - RHc))   for RH > RHc,   C = 0 otherwise,

capped to [0, 1], so supersaturated air (RH >= 1) gives C = 1.

Conventions
-----------
* RH is a fraction (1 = saturated), not percent, as elsewhere in lesprep.
* The default ``rh_critical = 0.8`` is common practice; operational models use values
  roughly between 0.6 and 0.9 that often depend on height and on grid resolution (from
  memory). ``rh_critical`` must lie in [0, 1).
* NaN relative humidity gives NaN cloud fraction.
"""

from __future__ import annotations

from typing import Any, overload

import numpy as np
import xarray as xr
from numpy.typing import ArrayLike, NDArray

from lesprep._jit import HAVE_NUMBA, Engine, njit, prange, resolve_engine
from lesprep.errors import ConfigError, GridError

__all__ = ["sundqvist_cloud_fraction"]

CLOUD_FRACTION_ATTRS: dict[str, str] = {
    "standard_name": "cloud_area_fraction_in_atmosphere_layer",
    "units": "1",
    "long_name": "cloud fraction diagnosed from relative humidity (Sundqvist et al. 1989)",
}
"""CF attributes put on a DataArray result of :func:`sundqvist_cloud_fraction`."""


def _check_rh_critical(rh_critical: float) -> float:
    if isinstance(rh_critical, bool):
        value = float("nan")
    else:
        try:
            value = float(rh_critical)
        except (TypeError, ValueError):
            value = float("nan")
    if not (0.0 <= value < 1.0):
        raise ConfigError(
            f"rh_critical is {rh_critical!r}; expected a fraction in [0, 1)",
            variable="rh_critical",
            hint="give the critical relative humidity as a fraction, e.g. 0.8 (not percent)",
        )
    return value


if HAVE_NUMBA:

    @njit(inline="always")
    def _nb_clip(x, lo, hi):  # pragma: no cover - compiled
        """np.minimum(np.maximum(x, lo), hi): NaN stays NaN."""
        if x != x:
            return x
        return hi if x > hi else (lo if x < lo else x)

    @njit(parallel=True, cache=True, fastmath=False, error_model="numpy")
    def _nb_sundqvist(rh, rhc, out):  # pragma: no cover - compiled
        """The numpy path's operations, in the same order, per element."""
        for i in prange(rh.size):
            c = _nb_clip(np.float64(rh[i]), rhc, 1.0)
            out[i] = _nb_clip(1.0 - np.sqrt((1.0 - c) / (1.0 - rhc)), 0.0, 1.0)


@overload
def sundqvist_cloud_fraction(
    rh: xr.DataArray, rh_critical: float = ..., *, out: None = ..., engine: Engine = ...
) -> xr.DataArray: ...
@overload
def sundqvist_cloud_fraction(
    rh: ArrayLike, rh_critical: float = ..., *, out: np.ndarray | None = ..., engine: Engine = ...
) -> NDArray[np.floating]: ...


def sundqvist_cloud_fraction(
    rh: ArrayLike | xr.DataArray,
    rh_critical: float = 0.8,
    *,
    out: np.ndarray | None = None,
    engine: Engine = "auto",
) -> Any:
    """Cloud fraction from relative humidity after Sundqvist et al. (1989).

    Parameters
    ----------
    rh
        Relative humidity as a fraction (1 = saturated). A NumPy array or anything
        array-like; an :class:`xarray.DataArray` or a dask array is kept lazy and its
        type is kept.
    rh_critical
        Critical relative humidity ``RHc`` in [0, 1) below which no cloud forms;
        0.8 by default (common practice).
    out
        For a NumPy ``rh``: an array of its shape to write the result into (rounded once
        to the dtype of ``out``).
    engine
        With ``out``: ``"numba"`` (one compiled pass), ``"numpy"`` (the reference) or
        ``"auto"``; both give the same numbers.

    Returns
    -------
    numpy.ndarray or xarray.DataArray or dask.array.Array
        Cloud fraction in [0, 1], float64, the same shape (and, for a DataArray or dask
        array, the same type) as ``rh``. A DataArray result is named ``cloud_fraction``
        and carries CF attributes (``units = "1"``). NaN where ``rh`` is NaN.

    Raises
    ------
    ConfigError
        If ``rh_critical`` is not in [0, 1).

    Examples
    --------
    >>> import numpy as np
    >>> sundqvist_cloud_fraction(np.array([0.5, 0.8, 0.9, 1.02])).round(6).tolist()
    [0.0, 0.0, 0.292893, 1.0]
    """
    rhc = _check_rh_critical(rh_critical)
    if out is not None:
        values = np.asarray(rh)
        if values.shape != out.shape:
            raise GridError(f"out has shape {out.shape}; rh has shape {values.shape}")
        compiled = resolve_engine(engine) == "numba" and out.flags.c_contiguous
        if compiled and values.dtype.char in "fd" and out.dtype.char in "fd":
            _nb_sundqvist(np.ascontiguousarray(values).reshape(-1), rhc, out.reshape(-1))
        else:
            out[...] = sundqvist_cloud_fraction(values, rhc)
        return out
    if isinstance(rh, xr.DataArray) or hasattr(rh, "__dask_graph__"):
        values = rh.astype(np.float64)  # type: ignore[union-attr]
    else:
        values = np.asarray(rh, dtype=np.float64)
    # Clipping RH to [RHc, 1] gives C = 0 at and below RHc and C = 1 at and above
    # saturation without a branch; np.maximum/np.minimum propagate NaN.
    if isinstance(values, np.ndarray) and values.ndim:  # same operations, in one buffer
        fraction = np.maximum(values, rhc)
        np.minimum(fraction, 1.0, out=fraction)
        np.subtract(1.0, fraction, out=fraction)
        np.divide(fraction, 1.0 - rhc, out=fraction)
        np.sqrt(fraction, out=fraction)
        np.subtract(1.0, fraction, out=fraction)
        np.maximum(fraction, 0.0, out=fraction)
        np.minimum(fraction, 1.0, out=fraction)
        return fraction
    capped = np.minimum(np.maximum(values, rhc), 1.0)
    fraction = 1.0 - np.sqrt((1.0 - capped) / (1.0 - rhc))
    fraction = np.minimum(np.maximum(fraction, 0.0), 1.0)
    if isinstance(fraction, xr.DataArray):
        fraction = fraction.rename("cloud_fraction")
        fraction.attrs = dict(CLOUD_FRACTION_ATTRS)
        fraction.attrs["rh_critical"] = rhc
    return fraction
