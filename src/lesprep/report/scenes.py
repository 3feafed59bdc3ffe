"""Scene descriptors of a liquid-water-path (LWP) field.

One :class:`SceneDescriptors` summarises one horizontal LWP field (one case, one kept
output time): its moments, its cloud cover and the wavelength at which its variance
peaks, a simple measure of the scale of mesoscale organisation.

Conventions
-----------
* All statistics accumulate in float64. The field must be finite (NaN or infinite
  values raise :class:`~lesprep.errors.NonFiniteError`).
* ``lwp_std`` is the population standard deviation (``ddof=0``).
* ``lwp_skew`` is the moment coefficient of skewness ``g1 = m3 / m2**1.5`` with
  population central moments ``m2``, ``m3`` (the same as ``scipy.stats.skew`` with
  ``bias=True``). A constant field (all values equal, e.g. a clear sky with LWP = 0)
  has ``lwp_std = 0.0`` and, by this module's convention, ``lwp_skew = 0.0`` (g1 is
  undefined there).
* ``cloud_cover`` is the fraction of columns flagged cloudy, the mean of the boolean
  column mask.
* Power spectrum (:func:`radial_power_spectrum`): the field is doubly periodic with
  isotropic spacing ``dx`` on a grid of ``ny`` x ``nx`` points, so ``Ly = ny * dx`` and
  ``Lx = nx * dx``. The mean is removed, the 2-D discrete Fourier transform ``F`` is
  taken and each mode gets the power ``|F|**2 / (ny * nx)**2``. With this normalisation
  the powers of all modes other than the mean sum to the population variance of the
  field (Parseval's theorem). Modes are binned into integer shells of
  ``|k| / k0`` with the fundamental ``k0 = 2 pi / L``: shell ``n`` collects the modes with
  ``n - 1/2 <= |k| / k0 < n + 1/2``. The spectrum value of a shell is the *sum* of its
  modes' powers (not their average), so the spectrum sums to the variance. Shells run
  from 1 to the largest occupied one (the corners of the wavenumber square reach
  ``|k| / k0`` of about ``sqrt(2) * N / 2``, beyond the Nyquist circle; they are kept
  so the variance is complete). Shell 0 holds only the removed mean and is dropped.
* Rectangular domains (``ny != nx``) are accepted: the fundamental is that of the
  shorter side, ``L = min(Lx, Ly)``. The longer side then resolves wavenumbers below
  ``k0``; every non-mean mode with ``|k| < 1.5 k0`` is put into shell 1, so shell 1 means
  "wavelengths of the shorter domain side or longer".
* The spectral peak is the shell with the largest power; on ties the lowest wavenumber
  (longest wavelength) wins. Its wavelength is ``L / n``. ``peak_at_domain`` is True when
  the peak is shell 1, i.e. the variance is concentrated at the domain scale and the
  organisation is as large as or larger than the domain can show. A constant field has
  no spectral peak: the wavelength is NaN and ``peak_at_domain`` is False.
"""

from __future__ import annotations

import dataclasses
from dataclasses import dataclass

import numpy as np
import pandas as pd
import xarray as xr
from numpy.typing import ArrayLike, NDArray

from lesprep.errors import GridError, InputError, NonFiniteError

__all__ = [
    "SceneDescriptors",
    "describe_case",
    "describe_scene",
    "peak_wavelength",
    "radial_power_spectrum",
]


@dataclass(frozen=True, kw_only=True)
class SceneDescriptors:
    """Descriptors of one LWP scene (see the module docstring for the conventions).

    Attributes
    ----------
    lwp_mean
        Mean LWP, in the units of the input field (kg m-2 by convention).
    lwp_std
        Population standard deviation of LWP (ddof=0).
    lwp_skew
        Skewness g1 of LWP; 0.0 for a constant field.
    cloud_cover
        Fraction of cloudy columns, in [0, 1].
    peak_wavelength_m
        Wavelength (m) of the peak of the radial power spectrum; NaN for a constant field.
    peak_at_domain
        True when the spectral peak is at the lowest resolved wavenumber (domain scale).
    """

    lwp_mean: float
    lwp_std: float
    lwp_skew: float
    cloud_cover: float
    peak_wavelength_m: float
    peak_at_domain: bool


def _check_dx(dx: float) -> float:
    try:
        value = float(dx)
    except (TypeError, ValueError):
        value = float("nan")
    if not np.isfinite(value) or value <= 0.0:
        raise GridError(
            f"grid spacing dx is {dx!r}; expected a finite positive number of metres",
            hint="pass the horizontal grid spacing in m",
        )
    return value


def _as_field(field: ArrayLike, *, variable: str = "field") -> NDArray[np.float64]:
    arr = np.asarray(field, dtype=np.float64)
    if arr.ndim != 2:
        raise GridError(
            f"field has {arr.ndim} dimension(s) with shape {arr.shape}; "
            "expected a 2-D (y, x) field",
            variable=variable,
        )
    if min(arr.shape) < 2:
        raise GridError(
            f"field has shape {arr.shape}; expected at least 2 points along y and x",
            variable=variable,
        )
    if not np.all(np.isfinite(arr)):
        bad = int(np.count_nonzero(~np.isfinite(arr)))
        raise NonFiniteError(
            f"field holds {bad} NaN or infinite value(s) out of {arr.size}; expected all finite",
            variable=variable,
            hint="fill or drop missing columns before describing the scene",
        )
    return arr


def _is_constant(arr: NDArray[np.float64]) -> bool:
    return bool(arr.max() == arr.min())


def _fundamental(shape: tuple[int, ...], dx: float) -> float:
    return 2.0 * np.pi / (min(shape) * dx)


def radial_power_spectrum(
    field: ArrayLike, dx: float
) -> tuple[NDArray[np.float64], NDArray[np.float64]]:
    """Shell-summed power spectrum of a doubly periodic 2-D field.

    Parameters
    ----------
    field
        2-D array ``(y, x)``, doubly periodic, finite; its mean is removed first.
    dx
        Grid spacing in m, the same along x and y.

    Returns
    -------
    wavenumber
        Shell-centre wavenumbers ``n * k0`` in rad m-1 for ``n = 1, 2, ...``, with
        ``k0 = 2 pi / L`` and ``L`` the shorter domain side (float64).
    power
        Power of each shell, the sum of ``|F|**2 / N**2`` over its modes, in the units of
        the field squared; it sums to the population variance of the field (float64).
        All zeros for a constant field.

    Raises
    ------
    GridError
        If the field is not 2-D, has fewer than 2 points along a side, or ``dx`` is not
        a positive finite number.
    NonFiniteError
        If the field holds NaN or infinite values.

    Examples
    --------
    >>> import numpy as np
    >>> x = np.arange(16) * 100.0
    >>> field = np.cos(2 * np.pi * 4 * x / 1600.0)[None, :] * np.ones((16, 1))
    >>> k, power = radial_power_spectrum(field, 100.0)
    >>> int(np.argmax(power)) + 1, round(float(power.sum()), 12)
    (4, 0.5)
    """
    step = _check_dx(dx)
    arr = _as_field(field)
    ny, nx = arr.shape
    k0 = _fundamental(arr.shape, step)
    # integer mode indices along each axis, converted to rad m-1
    ky = 2.0 * np.pi * np.fft.fftfreq(ny, d=1.0 / ny) / (ny * step)
    kx = 2.0 * np.pi * np.fft.fftfreq(nx, d=1.0 / nx) / (nx * step)
    kmag = np.hypot(ky[:, None], kx[None, :])
    shell = np.floor(kmag / k0 + 0.5).astype(np.int64)
    shell[(shell == 0) & (kmag > 0.0)] = 1  # longer side of a rectangle: below k0
    shell[0, 0] = 0
    n_shells = int(shell.max())
    wavenumber = k0 * np.arange(1, n_shells + 1, dtype=np.float64)
    if _is_constant(arr):
        return wavenumber, np.zeros(n_shells, dtype=np.float64)
    spectrum = np.fft.fft2(arr - arr.mean())
    mode_power = (spectrum.real**2 + spectrum.imag**2) / float(arr.size) ** 2
    summed = np.bincount(shell.ravel(), weights=mode_power.ravel(), minlength=n_shells + 1)
    return wavenumber, summed[1:].astype(np.float64)


def peak_wavelength(field: ArrayLike, dx: float) -> tuple[float, bool]:
    """Wavelength of the peak of the radial power spectrum.

    Parameters
    ----------
    field
        2-D array ``(y, x)``, doubly periodic, finite.
    dx
        Grid spacing in m, the same along x and y.

    Returns
    -------
    wavelength
        ``2 pi / k`` (m) of the shell with the largest power (the lowest such wavenumber
        on ties); NaN for a constant field.
    at_domain
        True when the peak is the lowest resolved shell (wavelength of the domain side),
        False otherwise and for a constant field.

    Raises
    ------
    GridError, NonFiniteError
        As :func:`radial_power_spectrum`.

    Examples
    --------
    >>> import numpy as np
    >>> x = np.arange(32) * 50.0
    >>> field = np.sin(2 * np.pi * x / 1600.0)[None, :] * np.ones((32, 1))
    >>> peak_wavelength(field, 50.0)
    (1600.0, True)
    """
    arr = _as_field(field)
    _, power = radial_power_spectrum(arr, dx)
    if not np.any(power > 0.0):
        return float("nan"), False
    index = int(np.argmax(power))
    # 2 pi / (n k0) = L / n, computed directly to avoid rounding through pi
    return min(arr.shape) * _check_dx(dx) / (index + 1), index == 0


def _skewness(arr: NDArray[np.float64]) -> tuple[float, float, float]:
    """Mean, population std and g1 skewness, with g1 = 0 for a constant field."""
    mean = float(arr.mean(dtype=np.float64))
    if _is_constant(arr):
        return float(arr.flat[0]), 0.0, 0.0
    dev = arr - mean
    m2 = float(np.mean(dev**2))
    m3 = float(np.mean(dev**3))
    return mean, float(np.sqrt(m2)), m3 / m2**1.5


def describe_scene(lwp: ArrayLike, column_cloudy: ArrayLike, dx: float) -> SceneDescriptors:
    """Descriptors of one LWP field.

    Parameters
    ----------
    lwp
        2-D liquid water path ``(y, x)``, finite, doubly periodic.
    column_cloudy
        Boolean mask of cloudy columns, same shape as ``lwp``.
    dx
        Grid spacing in m, the same along x and y.

    Returns
    -------
    SceneDescriptors
        Mean, population std, g1 skewness (0.0 for a constant field), cloud cover and
        spectral peak of the scene.

    Raises
    ------
    GridError
        If the shapes differ or the field or ``dx`` is unusable.
    InputError
        If the mask is not boolean.
    NonFiniteError
        If ``lwp`` holds NaN or infinite values.

    Examples
    --------
    >>> import numpy as np
    >>> lwp = np.zeros((8, 8))
    >>> lwp[:, :2] = 0.1
    >>> d = describe_scene(lwp, lwp > 0.05, 100.0)
    >>> d.cloud_cover, d.peak_wavelength_m, d.peak_at_domain
    (0.25, 800.0, True)
    """
    arr = _as_field(lwp, variable="lwp")
    mask = np.asarray(column_cloudy)
    if mask.dtype != np.bool_:
        raise InputError(
            f"column_cloudy has dtype {mask.dtype}; expected a boolean mask",
            variable="column_cloudy",
            hint="pass a comparison such as lwp > threshold",
        )
    if mask.shape != arr.shape:
        raise GridError(
            f"column_cloudy has shape {mask.shape}; expected the shape of lwp {arr.shape}",
            variable="column_cloudy",
        )
    mean, std, skew = _skewness(arr)
    wavelength, at_domain = peak_wavelength(arr, dx)
    return SceneDescriptors(
        lwp_mean=mean,
        lwp_std=std,
        lwp_skew=skew,
        cloud_cover=float(np.mean(mask, dtype=np.float64)),
        peak_wavelength_m=wavelength,
        peak_at_domain=at_domain,
    )


def describe_case(lwp: xr.DataArray, column_cloudy: xr.DataArray, dx: float) -> pd.DataFrame:
    """Scene descriptors of every output time of one case.

    Parameters
    ----------
    lwp
        Liquid water path with dims ``(time, y, x)``; the two horizontal dims may have any
        names, in the order (y, x) after ``time``. Dask-backed arrays are loaded one time
        at a time.
    column_cloudy
        Boolean mask of cloudy columns with the same dims and sizes as ``lwp``.
    dx
        Grid spacing in m, the same along x and y.

    Returns
    -------
    pandas.DataFrame
        One row per time, columns ``time`` followed by the fields of
        :class:`SceneDescriptors`, in time order of ``lwp``.

    Raises
    ------
    GridError
        If the dims or sizes do not fit.
    InputError, NonFiniteError
        As :func:`describe_scene`.

    Examples
    --------
    >>> import numpy as np, xarray as xr
    >>> lwp = xr.DataArray(np.zeros((2, 4, 4)), dims=("time", "y", "x"))
    >>> describe_case(lwp, lwp > 0.0, 50.0)["cloud_cover"].tolist()
    [0.0, 0.0]
    """
    name = str(lwp.name) if lwp.name is not None else "lwp"
    if lwp.ndim != 3 or "time" not in lwp.dims:
        raise GridError(
            f"lwp has dims {lwp.dims}; expected three dims (time, y, x)",
            variable=name,
        )
    lwp = lwp.transpose("time", ...)
    if set(column_cloudy.dims) != set(lwp.dims):
        raise GridError(
            f"column_cloudy has dims {column_cloudy.dims}; expected the dims of lwp {lwp.dims}",
            variable="column_cloudy",
        )
    column_cloudy = column_cloudy.transpose(*lwp.dims)
    if column_cloudy.shape != lwp.shape:
        raise GridError(
            f"column_cloudy has shape {column_cloudy.shape}; expected the shape of lwp "
            f"{lwp.shape} (dims {lwp.dims})",
            variable="column_cloudy",
        )
    rows = []
    for i in range(lwp.sizes["time"]):
        scene = describe_scene(lwp[i].values, column_cloudy[i].values, dx)
        rows.append(dataclasses.asdict(scene))
    columns = [f.name for f in dataclasses.fields(SceneDescriptors)]
    frame = pd.DataFrame(rows, columns=columns)
    frame.insert(0, "time", lwp["time"].values)
    return frame
