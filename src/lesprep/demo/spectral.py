"""Doubly periodic Gaussian random fields with a prescribed horizontal spectrum (private).

Used only by the synthetic demo generator. A field is white Gaussian noise filtered in
Fourier space so that its shell-summed (isotropic) power spectrum follows the von Karman
(1948) form ``E(k) ~ x**4 / (1 + x**2) ** (17/6)`` with ``x = k / k_peak`` -- ``k**4`` at
large scales and the Kolmogorov (1941) ``k**(-5/3)`` inertial range at small scales --
times a Gaussian roll-off ``exp(-(k / k_cut)**2)`` near the grid scale. Wavenumbers are in
cycles per metre.

Time evolution keeps the field Gaussian and its spectrum unchanged: each Fourier mode
rotates between two fixed noise realisations, ``cos(omega t) N1 + sin(omega t) N2``, with a
frequency that grows with wavenumber like the inverse eddy-turnover time
(``omega ~ k**(2/3)``, Kolmogorov scaling) times a random factor, so small scales
decorrelate faster than large ones; the whole field is translated by a uniform velocity
(exact periodic advection by a Fourier phase shift).
"""

from __future__ import annotations

import numpy as np
from numpy.typing import NDArray


def wavenumbers(
    nx: int, ny: int, dx: float, dy: float
) -> tuple[NDArray[np.float64], NDArray[np.float64]]:
    """Wavenumbers (cycles per metre) of the real 2-D FFT layout ``(ny, nx // 2 + 1)``.

    Parameters
    ----------
    nx, ny
        Grid points along x and y.
    dx, dy
        Grid spacing in m.

    Returns
    -------
    kx, ky
        Broadcastable arrays of shape ``(1, nx // 2 + 1)`` and ``(ny, 1)``.

    Examples
    --------
    >>> kx, ky = wavenumbers(4, 4, 1.0, 1.0)
    >>> kx.ravel().tolist(), ky.ravel().tolist()
    ([0.0, 0.25, 0.5], [0.0, 0.25, -0.5, -0.25])
    """
    kx = np.fft.rfftfreq(nx, d=dx)[None, :]
    ky = np.fft.fftfreq(ny, d=dy)[:, None]
    return kx, ky


def von_karman_amplitude(
    k: NDArray[np.float64], *, k_peak: float, k_cut: float
) -> NDArray[np.float64]:
    """Fourier amplitude filter whose shell-summed power follows the von Karman form.

    In two dimensions the number of modes in a wavenumber shell grows like ``k``, so the
    per-mode amplitude is ``sqrt(E(k) / k)``. The mean (``k = 0``) gets zero amplitude.

    Parameters
    ----------
    k
        Horizontal wavenumber magnitude, cycles per metre.
    k_peak
        Scale wavenumber of the spectrum (the shell spectrum peaks at about
        ``1.55 * k_peak``).
    k_cut
        Wavenumber of the Gaussian roll-off near the grid scale.

    Returns
    -------
    numpy.ndarray
        Non-negative amplitudes, same shape as ``k``.

    Examples
    --------
    >>> von_karman_amplitude(np.array([0.0]), k_peak=1.0, k_cut=10.0).tolist()
    [0.0]
    """
    x = k / k_peak
    spectrum = x**4 / (1.0 + x**2) ** (17.0 / 6.0) * np.exp(-((k / k_cut) ** 2))
    with np.errstate(divide="ignore", invalid="ignore"):
        amp = np.where(k > 0.0, np.sqrt(spectrum / np.where(k > 0.0, k, 1.0)), 0.0)
    return amp


def evolving_field(
    entropy: tuple[int, ...],
    *,
    nx: int,
    ny: int,
    dx: float,
    dy: float,
    t: float,
    velocity: tuple[float, float],
    tau_large: float,
    k_peak: float,
    k_cut: float,
) -> NDArray[np.float64]:
    """One unit-variance, zero-mean, doubly periodic Gaussian field at time ``t``.

    The same ``entropy`` gives the same field history; ``t`` selects the moment. Nothing
    is carried between calls, so any time can be generated on its own.

    Parameters
    ----------
    entropy
        Seed material for :func:`numpy.random.default_rng` (e.g. ``(seed, stream)``).
    nx, ny, dx, dy
        Grid size and spacing (m).
    t
        Time in s.
    velocity
        Uniform translation ``(u, v)`` in m s-1.
    tau_large
        Decorrelation time (s) of the modes at ``k_peak``; smaller scales decorrelate
        faster, like ``(k / k_peak) ** (-2/3)``.
    k_peak, k_cut
        Spectrum parameters, see :func:`von_karman_amplitude`.

    Returns
    -------
    numpy.ndarray
        Array of shape ``(ny, nx)``, float64, population mean 0 and population
        standard deviation 1 over the grid.

    Examples
    --------
    >>> f = evolving_field((1, 2), nx=16, ny=16, dx=50.0, dy=50.0, t=0.0,
    ...                    velocity=(1.0, 0.0), tau_large=3600.0, k_peak=1e-3, k_cut=5e-3)
    >>> f.shape, round(float(f.std()), 12)
    ((16, 16), 1.0)
    """
    rng = np.random.default_rng(list(entropy))
    n1 = np.fft.rfft2(rng.standard_normal((ny, nx)))
    n2 = np.fft.rfft2(rng.standard_normal((ny, nx)))
    factor = rng.uniform(0.5, 1.5, size=n1.shape)
    # modes with kx = 0 pair up as (ky, -ky); their frequencies must agree to keep the
    # field real (Hermitian symmetry of the spectrum)
    mirror = (-np.arange(ny)) % ny
    factor[:, 0] = 0.5 * (factor[:, 0] + factor[mirror, 0])
    kx, ky = wavenumbers(nx, ny, dx, dy)
    k = np.hypot(kx, ky)
    amp = von_karman_amplitude(k, k_peak=k_peak, k_cut=k_cut)
    # drop Nyquist modes: a phase shift there cannot stay real
    if nx % 2 == 0:
        amp[:, -1] = 0.0
    if ny % 2 == 0:
        amp[ny // 2, :] = 0.0
    omega = factor / tau_large * (np.maximum(k, 1e-12) / k_peak) ** (2.0 / 3.0)
    shift = np.exp(-2j * np.pi * (kx * velocity[0] + ky * velocity[1]) * t)
    coef = amp * (np.cos(omega * t) * n1 + np.sin(omega * t) * n2) * shift
    field = np.fft.irfft2(coef, s=(ny, nx))
    field -= field.mean()
    std = field.std()
    return field / std if std > 0.0 else field
