"""Diagnostic cloud-fraction schemes: the baselines of the report.

Relative-humidity scheme
------------------------
The diagnostic scheme of Sundqvist et al. (1989): cloud fraction grows from zero at a
critical relative humidity ``RHc`` to one at saturation,

    C = 1 - sqrt((1 - RH) / (1 - RHc))   for RH > RHc,   C = 0 otherwise,

capped to [0, 1], so supersaturated air (RH >= 1) gives C = 1.

Statistical (Gaussian) scheme
-----------------------------
After Sommeria and Deardorff (1977) and Mellor (1977): within a grid cell, total water
``q_t`` and liquid-water potential temperature ``theta_l`` fluctuate about their means;
linearizing the saturation mixing ratio about the cell's liquid-water temperature gives a
saturation excess ``s`` that is Gaussian if ``(q_t, theta_l)`` are jointly Gaussian, and
the cloud fraction is the probability that ``s > 0``:

    T_l    = Pi(p) * mean(theta_l)                     liquid-water temperature
    q_s    = q_s(p, T_l),   q_s' = dq_s/dT at (p, T_l)
    a      = 1 / (1 + (Lv / cp) q_s')
    b      = a * Pi(p) * q_s'          (Pi = T_l / mean(theta_l))
    s      = a * (mean(q_t) - q_s)                       mean saturation excess
    s_i    = s + a q_t' - b theta_l'                     excess of one realisation
    sigma_s**2 = a**2 var(q_t) - 2 a b cov(q_t, theta_l) + b**2 var(theta_l)
    C      = 0.5 * (1 + erf(Q / sqrt(2))),   Q = s / sigma_s

Conventions
-----------
* RH is a fraction (1 = saturated), not percent, as elsewhere in lesprep.
* The default ``rh_critical = 0.8`` is common practice; operational models use values
  roughly between 0.6 and 0.9 that often depend on height and on grid resolution (from
  memory). ``rh_critical`` must lie in [0, 1).
* NaN relative humidity gives NaN cloud fraction.
* Gaussian scheme: ``q_t`` is the total non-precipitating water mixing ratio (kg kg-1, per
  kg of dry air), ``theta_l`` the first-order liquid-water potential temperature of
  :mod:`lesprep.thermo` (so ``Pi * theta_l`` is exactly the liquid-water temperature),
  ``p`` in Pa, variances and the covariance in the squared / product units (kg2 kg-2,
  K2, kg kg-1 K). Warm phase only: saturation over liquid (Bolton 1980) at all
  temperatures, ``Lv`` constant.
* ``q_s'`` is the analytic derivative of Bolton's ``e_s`` carried through
  ``q_s = eps e_s / (p - e_s)`` (:func:`lesprep.thermo.saturation_mixing_ratio_slope`),
  not the Clausius-Clapeyron estimate ``Lv q_s / (Rv T**2)``, so that the linearization is
  the exact tangent of the ``q_s`` the rest of lesprep uses.
* ``s`` is positive when supersaturated. ``sigma_s**2`` carries no factor 1/2 (some
  authors define the variance of ``s`` with one); it is the plain variance of ``s_i``.
* The second moments must be a covariance: ``var(q_t) >= 0``, ``var(theta_l) >= 0`` and
  ``cov**2 <= var(q_t) var(theta_l) * (1 + 1e-6)`` (the slack admits round-off, also of
  statistics accumulated in float32); otherwise ``sigma_s`` and the cloud fraction are NaN.
  ``sigma_s**2`` is then non-negative up to round-off, and a round-off negative is taken
  as 0.
* ``sigma_s == 0`` (no sub-grid variability) is the all-or-nothing limit: C = 1 where
  ``s > 0``, C = 0 where ``s <= 0``. At ``s == 0`` the value 0 is chosen to agree with
  :func:`lesprep.thermo.saturation_adjustment`, which forms cloud only where
  ``q_t > q_s`` strictly; ``s == 0`` exactly is a set of measure zero.
* The erf formula is evaluated as ``0.5 * erfc(-Q / sqrt(2))``, the same function, which
  keeps full relative precision for small fractions. NaN in any input gives NaN. The
  compiled path stores 0 and 1 without calling erfc where erfc is exactly 0 or 2 in
  float64 (:data:`ERFC_ZERO_BEYOND`, :data:`ERFC_TWO_BEYOND`): the same values.
* All arithmetic in float64.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Any, overload

import numpy as np
import xarray as xr
from numpy.typing import ArrayLike, NDArray
from scipy.special import erfc

from lesprep import thermo
from lesprep._jit import HAVE_NUMBA, Engine, njit, prange, resolve_engine
from lesprep.errors import ConfigError, GridError

__all__ = [
    "GaussianLinearization",
    "gaussian_cloud_fraction",
    "gaussian_cloud_fraction_from_moments",
    "gaussian_cloud_fraction_from_sums",
    "gaussian_linearization",
    "saturation_excess_std",
    "sundqvist_cloud_fraction",
]

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


ERFC_ZERO_BEYOND = 28.0
"""Above this argument erfc is below 1e-340, which rounds to 0.0 in float64 (the
smallest subnormal is 4.9e-324; erfc(27.3) is already about 4e-326): the compiled
Gaussian scheme stores 0.0 there without calling erfc. In clear air most coarse cells
are that far from saturation (about 80 % of the 100 m cells of the benchmark case)."""

ERFC_TWO_BEYOND = 6.5
"""Below minus this argument erfc is 2 - erfc(|x|) with erfc(|x|) < 4e-20, which rounds
to 2.0 in float64 (half the spacing of float64 just below 2 is 1.1e-16): the compiled
scheme stores 1.0 there without calling erfc."""


if HAVE_NUMBA:
    import math as _math

    _LV_CP = thermo.LV / thermo.CP
    _P0, _KAPPA, _T0, _EPS = thermo.P0, thermo.KAPPA, thermo.T0, thermo.EPS

    _GAUSS_BLOCK = 512
    """Cells per block of the compiled Gaussian scheme (work arrays of a few KiB)."""

    _USE_X = -1.0
    """Marker of the compiled Gaussian scheme: the fraction comes from erfc of ``x``."""

    @njit(parallel=True, cache=True, fastmath=False, error_model="numpy")
    def _nb_gaussian(qt, thl, p, m2q, m2t, cqt, n, out):  # pragma: no cover - compiled
        """The Gaussian scheme per cell, in blocks of cells: the libm calls (``pow``,
        ``exp``, ``erfc``) in loops of their own, so that the divisions and square roots
        between them run in vector registers. Every value is the same IEEE operation on
        the same operands as in a plain per-cell loop (no fast-math), so the results are
        the same bits (tests/test_gaussian_scheme.py checks this)."""
        size = out.size
        nblk = (size + _GAUSS_BLOCK - 1) // _GAUSS_BLOCK
        for blk in prange(nblk):
            i0 = blk * _GAUSS_BLOCK
            m = min(_GAUSS_BLOCK, size - i0)
            pi = np.empty(m)
            w = np.empty(m)
            x = np.empty(m)
            for j in range(m):
                pi[j] = p[i0 + j] / _P0
            for j in range(m):
                pi[j] = pi[j] ** _KAPPA  # Exner function
            for j in range(m):
                tc = thl[i0 + j] * pi[j] - _T0
                w[j] = 17.67 * tc / (tc + 243.5)
            for j in range(m):
                w[j] = np.exp(w[j])
            for j in range(m):
                i = i0 + j
                tc = thl[i] * pi[j] - _T0
                es = 611.2 * w[j]
                dry = max(p[i] - es, 1e-3)
                qs = _EPS * es / dry
                dqs = qs * p[i] / dry * (17.67 * 243.5 / (tc + 243.5) ** 2)
                a = 1.0 / (1.0 + _LV_CP * dqs)
                b = a * pi[j] * dqs
                s = a * (qt[i] - qs)
                vq = m2q[i] / n
                vt = m2t[i] / n
                cv = cqt[i] / n
                bad = vq < 0.0 or vt < 0.0 or cv * cv > vq * vt * (1.0 + 1e-6)
                var_s = a * a * vq - 2.0 * a * b * cv + b * b * vt
                sig = _math.sqrt(max(var_s, 0.0))
                x[j] = -(s / sig) / _math.sqrt(2.0)
                # the fraction where it needs no erfc: NaN (not a covariance), or the
                # all-or-nothing limit sigma_s == 0 (1 where s > 0, 0 where s <= 0)
                whole = 1.0 if s > 0.0 else (0.0 if s <= 0.0 else np.nan)
                w[j] = np.nan if bad else (whole if sig == 0.0 else _USE_X)
            for j in range(m):
                v = w[j]
                xj = x[j]
                if v != _USE_X:  # (NaN differs from the marker too)
                    out[i0 + j] = v
                elif xj > ERFC_ZERO_BEYOND:  # erfc(x) < 1e-340: 0.0 in float64
                    out[i0 + j] = 0.0
                elif xj < -ERFC_TWO_BEYOND:  # erfc(x) = 2 - 4e-20: 2.0 in float64
                    out[i0 + j] = 1.0
                else:  # (NaN x gives NaN)
                    out[i0 + j] = 0.5 * _math.erfc(xj)

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


@dataclass(frozen=True)
class GaussianLinearization:
    """Linearization of the saturation condition about a cell's mean state.

    All arrays are float64 of the broadcast shape of the inputs of
    :func:`gaussian_linearization`; the equations are in the module docstring.

    Attributes
    ----------
    liquid_water_temperature
        ``T_l = Pi * mean(theta_l)``, K.
    saturation_mixing_ratio
        ``q_s(p, T_l)`` over liquid, kg kg-1.
    dqs_dT
        ``dq_s/dT`` at ``(p, T_l)``, kg kg-1 K-1.
    a
        ``1 / (1 + (Lv / cp) dq_s/dT)``, dimensionless.
    b
        ``a * Pi * dq_s/dT``, kg kg-1 K-1.
    s
        Mean saturation excess ``a * (mean(q_t) - q_s)``, kg kg-1, positive when
        supersaturated.
    """

    liquid_water_temperature: NDArray[np.float64]
    saturation_mixing_ratio: NDArray[np.float64]
    dqs_dT: NDArray[np.float64]
    a: NDArray[np.float64]
    b: NDArray[np.float64]
    s: NDArray[np.float64]


def gaussian_linearization(
    qt_mean: ArrayLike, thl_mean: ArrayLike, p_mean: ArrayLike
) -> GaussianLinearization:
    """Coefficients ``a``, ``b`` and the mean saturation excess ``s`` of a grid cell.

    Sommeria and Deardorff (1977); Mellor (1977). See the module docstring for the
    equations and conventions.

    Parameters
    ----------
    qt_mean
        Cell-mean total water mixing ratio, kg kg-1.
    thl_mean
        Cell-mean liquid-water potential temperature, K.
    p_mean
        Cell-mean pressure, Pa.

    Returns
    -------
    GaussianLinearization
        ``T_l``, ``q_s``, ``dq_s/dT``, ``a``, ``b`` and ``s`` (float64 arrays).
    """
    qt = np.asarray(qt_mean, dtype=np.float64)
    thl = np.asarray(thl_mean, dtype=np.float64)
    p = np.asarray(p_mean, dtype=np.float64)
    qt, thl, p = np.broadcast_arrays(qt, thl, p)
    pi = thermo.exner(p)
    tl = thl * pi
    qs = thermo.saturation_mixing_ratio(p, tl)
    dqs = thermo.saturation_mixing_ratio_slope(p, tl)
    a = 1.0 / (1.0 + (thermo.LV / thermo.CP) * dqs)
    b = a * pi * dqs
    return GaussianLinearization(
        liquid_water_temperature=tl,
        saturation_mixing_ratio=qs,
        dqs_dT=dqs,
        a=a,
        b=b,
        s=a * (qt - qs),
    )


def saturation_excess_std(
    a: ArrayLike,
    b: ArrayLike,
    var_qt: ArrayLike,
    var_thl: ArrayLike,
    cov_qt_thl: ArrayLike,
) -> NDArray[np.float64]:
    """Standard deviation of the saturation excess, ``sigma_s``, kg kg-1.

    ``sigma_s**2 = a**2 var(q_t) - 2 a b cov(q_t, theta_l) + b**2 var(theta_l)``, with no
    factor 1/2. Statistics that are not a covariance (a negative variance, or
    ``cov**2 > var(q_t) var(theta_l) (1 + 1e-6)``) give NaN; a round-off negative
    ``sigma_s**2`` becomes 0.

    Parameters
    ----------
    a, b
        Coefficients from :func:`gaussian_linearization` (dimensionless; kg kg-1 K-1).
    var_qt
        Variance of total water in the cell, kg2 kg-2.
    var_thl
        Variance of theta_l in the cell, K2.
    cov_qt_thl
        Covariance of q_t and theta_l in the cell, kg kg-1 K.

    Returns
    -------
    numpy.ndarray
        ``sigma_s`` (float64, >= 0 or NaN).
    """
    a = np.asarray(a, dtype=np.float64)
    b = np.asarray(b, dtype=np.float64)
    vq = np.asarray(var_qt, dtype=np.float64)
    vt = np.asarray(var_thl, dtype=np.float64)
    cv = np.asarray(cov_qt_thl, dtype=np.float64)
    var_s = a * a * vq - 2.0 * a * b * cv + b * b * vt
    invalid = (vq < 0.0) | (vt < 0.0) | (cv * cv > vq * vt * (1.0 + 1e-6))
    return np.where(invalid, np.nan, np.sqrt(np.maximum(var_s, 0.0)))


def gaussian_cloud_fraction(s: ArrayLike, sigma_s: ArrayLike) -> NDArray[np.float64]:
    """Cloud fraction of a Gaussian saturation excess, ``0.5 * (1 + erf(s / (sqrt(2) sigma_s)))``.

    Parameters
    ----------
    s
        Mean saturation excess, kg kg-1 (positive when supersaturated).
    sigma_s
        Its standard deviation, kg kg-1, >= 0. At 0 the result is 1 where ``s > 0`` and 0
        where ``s <= 0`` (see the module's Conventions); negative gives NaN.

    Returns
    -------
    numpy.ndarray
        Cloud fraction in [0, 1] (float64, broadcast shape); NaN where an input is NaN.

    Examples
    --------
    >>> gaussian_cloud_fraction([0.0, 1e-4, -1e-4, 1e-4], [1e-4, 1e-4, 0.0, 0.0]).round(6)
    array([0.5     , 0.841345, 0.      , 1.      ])
    """
    s_arr = np.asarray(s, dtype=np.float64)
    sig = np.asarray(sigma_s, dtype=np.float64)
    s_arr, sig = np.broadcast_arrays(s_arr, sig)
    with np.errstate(divide="ignore", invalid="ignore"):
        q = s_arr / sig
    fraction = 0.5 * erfc(-q / np.sqrt(2.0))
    # sigma_s == 0: s/0 is +-inf (erfc handles it) or NaN at s == 0, set to 0 here
    fraction = np.where((sig == 0.0) & (s_arr == 0.0), 0.0, fraction)
    return np.where(sig < 0.0, np.nan, fraction)


def gaussian_cloud_fraction_from_moments(
    qt_mean: ArrayLike,
    thl_mean: ArrayLike,
    p_mean: ArrayLike,
    var_qt: ArrayLike,
    var_thl: ArrayLike,
    cov_qt_thl: ArrayLike,
) -> NDArray[np.float64]:
    """Gaussian (statistical) cloud fraction from a cell's first and second moments.

    :func:`gaussian_linearization`, :func:`saturation_excess_std` and
    :func:`gaussian_cloud_fraction` in one call; all inputs broadcast against each other.

    Parameters
    ----------
    qt_mean
        Mean total water mixing ratio, kg kg-1.
    thl_mean
        Mean liquid-water potential temperature, K.
    p_mean
        Mean pressure, Pa.
    var_qt
        Variance of q_t, kg2 kg-2.
    var_thl
        Variance of theta_l, K2.
    cov_qt_thl
        Covariance of q_t and theta_l, kg kg-1 K.

    Returns
    -------
    numpy.ndarray
        Cloud fraction in [0, 1] (float64); NaN where any input is NaN or the second
        moments are not a covariance.
    """
    lin = gaussian_linearization(qt_mean, thl_mean, p_mean)
    sigma = saturation_excess_std(lin.a, lin.b, var_qt, var_thl, cov_qt_thl)
    return gaussian_cloud_fraction(lin.s, sigma)


def gaussian_cloud_fraction_from_sums(
    qt_mean: np.ndarray,
    thl_mean: np.ndarray,
    p_mean: np.ndarray,
    m2_qt: np.ndarray,
    m2_thl: np.ndarray,
    c_qt_thl: np.ndarray,
    count: int,
    *,
    out: np.ndarray,
    engine: Engine = "auto",
) -> np.ndarray:
    """:func:`gaussian_cloud_fraction_from_moments` from block sums, into ``out``.

    The second moments come as sums of squared (cross) deviations over ``count`` cells
    (``M2 / count`` is the population variance), as coarsening holds them. The numba
    engine computes the whole chain per cell in one compiled loop with float64 arithmetic
    (no temporaries); the numpy engine is the reference
    (:func:`gaussian_cloud_fraction_from_moments`). Both agree to round-off.

    Parameters
    ----------
    qt_mean, thl_mean, p_mean
        Cell means of q_t (kg kg-1), theta_l (K) and p (Pa), the shape of ``out``.
    m2_qt, m2_thl, c_qt_thl
        Sums of squared deviations of q_t and theta_l and of their cross products.
    count
        Fine cells per coarse cell.
    out
        Array to write the cloud fraction into (its dtype wins).
    engine
        ``"auto"``, ``"numba"`` or ``"numpy"``.

    Returns
    -------
    numpy.ndarray
        ``out``.
    """
    args = [np.asarray(a) for a in (qt_mean, thl_mean, p_mean, m2_qt, m2_thl, c_qt_thl)]
    if any(a.shape != out.shape for a in args):
        raise GridError(f"inputs must have the shape of out {out.shape}")
    if resolve_engine(engine) == "numba" and out.flags.c_contiguous and out.dtype.char in "fd":
        flat = [np.ascontiguousarray(a, dtype=np.float64).reshape(-1) for a in args]
        _nb_gaussian(*flat, float(count), out.reshape(-1))
        return out
    n = float(count)
    out[...] = gaussian_cloud_fraction_from_moments(
        args[0], args[1], args[2], args[3] / n, args[4] / n, args[5] / n
    )
    return out
