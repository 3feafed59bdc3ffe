"""Moist thermodynamics used by ingest, the derived fields and the demo generator.

Conventions
-----------
* Saturation vapour pressure over liquid water: Bolton (1980), eq. 10,
  ``e_s = 611.2 Pa * exp(17.67 * Tc / (Tc + 243.5))`` with ``Tc`` in degC. Bolton quotes
  an accuracy of 0.1 % between -30 and 35 degC; it is used for liquid water at all
  temperatures (supercooled below 0 degC), never over ice.
* Relative humidity is the ratio of vapour pressure to saturation vapour pressure,
  ``rh = e / e_s`` with ``e = p * r / (eps + r)`` (the WMO definition), as a fraction
  (1 = saturated), not percent. It is not capped: supersaturation gives rh > 1.
* Mixing ratios are kg of water per kg of dry air. Specific humidity ``q`` converts
  exactly: ``r = q / (1 - q)``.
* Potential temperature uses the Exner function ``(p / p0) ** (Rd / cp)`` with
  ``p0 = 1000 hPa`` and ``Rd / cp = 2/7``.
* Virtual temperature counts vapour only: ``Tv = T * (1 + r / eps) / (1 + r)``;
  air density is ``rho = p / (Rd * Tv)``.

Constants (SI; standard values quoted from memory, matching those used by MetPy):
``Rd = 287.04749`` J kg-1 K-1 (R* / M_d, M_d = 28.96546 g mol-1), ``Rv = 461.52311``
J kg-1 K-1 (M_w = 18.01528 g mol-1), ``cp = Rd / (2/7)``, ``Lv = 2.501e6`` J kg-1
(latent heat of vaporisation at 0 degC, held constant).
"""

from __future__ import annotations

import numpy as np
from numpy.typing import ArrayLike, NDArray

RD: float = 287.04749097718457
"""Gas constant of dry air, J kg-1 K-1."""
RV: float = 461.52311572606084
"""Gas constant of water vapour, J kg-1 K-1."""
EPS: float = RD / RV
"""Ratio of the gas constants (molar mass ratio), about 0.622."""
KAPPA: float = 2.0 / 7.0
"""Rd / cp for dry air."""
CP: float = RD / KAPPA
"""Specific heat of dry air at constant pressure, J kg-1 K-1."""
LV: float = 2.501e6
"""Latent heat of vaporisation, J kg-1 (held constant)."""
P0: float = 1.0e5
"""Reference pressure of potential temperature, Pa."""
T0: float = 273.15
"""0 degC in kelvin."""
G: float = 9.80665
"""Standard gravity, m s-2."""

SATURATION_FORMULA = "Bolton (1980) eq. 10 over liquid water"


def saturation_vapour_pressure(temperature: ArrayLike) -> NDArray[np.float64]:
    """Saturation vapour pressure over liquid water (Bolton 1980).

    Parameters
    ----------
    temperature
        Air temperature in K.

    Returns
    -------
    numpy.ndarray
        Saturation vapour pressure in Pa (float64).

    Examples
    --------
    Bolton's eq. 10 at 20 degC, 611.2 * exp(17.67 * 20 / 263.5) = 2336.95 Pa (worked by hand):

    >>> round(float(saturation_vapour_pressure(293.15)), 2)
    2336.95
    """
    tc = np.asarray(temperature, dtype=np.float64) - T0
    return 611.2 * np.exp(17.67 * tc / (tc + 243.5))


def saturation_mixing_ratio(pressure: ArrayLike, temperature: ArrayLike) -> NDArray[np.float64]:
    """Saturation mixing ratio over liquid water, kg kg-1.

    Parameters
    ----------
    pressure
        Air pressure in Pa.
    temperature
        Air temperature in K.
    """
    es = saturation_vapour_pressure(temperature)
    p = np.asarray(pressure, dtype=np.float64)
    return EPS * es / np.maximum(p - es, 1e-3)


def vapour_pressure(pressure: ArrayLike, mixing_ratio: ArrayLike) -> NDArray[np.float64]:
    """Partial pressure of water vapour, Pa, from pressure (Pa) and mixing ratio (kg kg-1)."""
    r = np.asarray(mixing_ratio, dtype=np.float64)
    return np.asarray(pressure, dtype=np.float64) * r / (EPS + r)


def relative_humidity(
    pressure: ArrayLike, temperature: ArrayLike, mixing_ratio: ArrayLike
) -> NDArray[np.float64]:
    """Relative humidity over liquid water, ``e / e_s`` as a fraction.

    Parameters
    ----------
    pressure
        Air pressure in Pa.
    temperature
        Air temperature in K.
    mixing_ratio
        Water vapour mixing ratio in kg kg-1.

    Returns
    -------
    numpy.ndarray
        Relative humidity (1 = saturated), float64, not capped.
    """
    return vapour_pressure(pressure, mixing_ratio) / saturation_vapour_pressure(temperature)


def mixing_ratio_from_specific_humidity(specific_humidity: ArrayLike) -> NDArray[np.float64]:
    """Exact conversion ``r = q / (1 - q)`` (both kg kg-1)."""
    q = np.asarray(specific_humidity, dtype=np.float64)
    return q / (1.0 - q)


def mixing_ratios_from_mass_fractions(
    mass_fractions: dict[str, ArrayLike], mixing_ratios: dict[str, ArrayLike] | None = None
) -> dict[str, NDArray[np.float64]]:
    """Mixing ratios of water species given as mass fractions, exactly.

    A mass fraction ``q_x`` is per kg of moist air (dry air plus every water species), a
    mixing ratio ``r_x`` per kg of dry air: ``q_x = r_x / (1 + r_t)`` with ``r_t`` the sum
    of all species' mixing ratios. With ``S`` the sum of the species given as mass
    fractions and ``R`` the sum of those given as mixing ratios (``mixing_ratios``),
    ``r_t = (R + S) / (1 - S)`` and

        ``r_x = q_x (1 + R) / (1 - S)``.

    Only vapour gives ``r = q / (1 - q)``; leaving out condensate of 1 g/kg changes the
    vapour by about 0.1 %, and a condensate mass fraction taken as a mixing ratio is off
    by ``r_t`` (1-2 %).

    Examples
    --------
    >>> r = mixing_ratios_from_mass_fractions({"qv": 0.01}, {"qc": 0.001})
    >>> round(float(r["qv"]), 12)
    0.010111111111
    """
    s = sum(np.asarray(q, dtype=np.float64) for q in mass_fractions.values())
    r = sum(np.asarray(v, dtype=np.float64) for v in (mixing_ratios or {}).values())
    scale = (1.0 + r) / (1.0 - s)
    return {k: np.asarray(q, dtype=np.float64) * scale for k, q in mass_fractions.items()}


def exner(pressure: ArrayLike) -> NDArray[np.float64]:
    """Exner function ``(p / 1000 hPa) ** (Rd / cp)`` for pressure in Pa."""
    return (np.asarray(pressure, dtype=np.float64) / P0) ** KAPPA


def temperature_from_potential_temperature(
    potential_temperature: ArrayLike, pressure: ArrayLike
) -> NDArray[np.float64]:
    """Air temperature (K) from potential temperature (K) and pressure (Pa)."""
    return np.asarray(potential_temperature, dtype=np.float64) * exner(pressure)


def virtual_temperature(temperature: ArrayLike, mixing_ratio: ArrayLike) -> NDArray[np.float64]:
    """Virtual temperature (K), vapour only: ``T (1 + r/eps) / (1 + r)``."""
    r = np.asarray(mixing_ratio, dtype=np.float64)
    return np.asarray(temperature, dtype=np.float64) * (1.0 + r / EPS) / (1.0 + r)


def air_density(
    pressure: ArrayLike, temperature: ArrayLike, mixing_ratio: ArrayLike
) -> NDArray[np.float64]:
    """Moist-air density (kg m-3) from the ideal-gas law with virtual temperature."""
    return np.asarray(pressure, dtype=np.float64) / (
        RD * virtual_temperature(temperature, mixing_ratio)
    )


def dry_air_density(
    pressure: ArrayLike, temperature: ArrayLike, mixing_ratio: ArrayLike
) -> NDArray[np.float64]:
    """Dry-air density (kg m-3): ``rho_d = (p - e) / (Rd T)`` with ``e = p r / (eps + r)``.

    A mixing ratio is mass of water per mass of dry air, so ``rho_d * r`` is the mass of
    water per volume (the moist density would count the vapour twice).
    """
    p = np.asarray(pressure, dtype=np.float64)
    r = np.asarray(mixing_ratio, dtype=np.float64)
    return p * EPS / ((EPS + r) * RD * np.asarray(temperature, dtype=np.float64))


def saturation_adjustment(
    liquid_water_potential_temperature: ArrayLike,
    total_water: ArrayLike,
    pressure: ArrayLike,
    *,
    iterations: int = 8,
) -> tuple[NDArray[np.float64], NDArray[np.float64], NDArray[np.float64]]:
    """Split total water into vapour and cloud liquid in thermodynamic equilibrium.

    Solves ``T = Pi * theta_l + (Lv / cp) * qc`` with ``qc = max(0, qt - qs(p, T))``
    by Newton iteration, with the linearised liquid-water potential temperature
    ``theta_l = theta - (Lv / cp) * qc / Pi`` and the saturation formula of this
    module (Bolton 1980).

    Parameters
    ----------
    liquid_water_potential_temperature
        theta_l in K.
    total_water
        Total water mixing ratio qt in kg kg-1.
    pressure
        Air pressure in Pa (broadcast against the others).
    iterations
        Newton steps; 8 converge to well below 1e-6 K in the atmosphere's range.

    Returns
    -------
    temperature, vapour, liquid
        T (K), qv and qc (kg kg-1), float64 arrays of the broadcast shape.
    """
    thl = np.asarray(liquid_water_potential_temperature, dtype=np.float64)
    qt = np.asarray(total_water, dtype=np.float64)
    p = np.asarray(pressure, dtype=np.float64)
    thl, qt, p = np.broadcast_arrays(thl, qt, p)
    tl = thl * exner(p)
    t = tl.copy()
    for _ in range(iterations):
        qs = saturation_mixing_ratio(p, t)
        tc = t - T0
        # d ln(es)/dT for Bolton's formula, and dqs/dT = qs * p/(p - es) * dln(es)/dT
        dlnes = 17.67 * 243.5 / (tc + 243.5) ** 2
        es = saturation_vapour_pressure(t)
        dqs = qs * p / np.maximum(p - es, 1e-3) * dlnes
        cloudy = qt > qs
        f = t - tl - (LV / CP) * np.where(cloudy, qt - qs, 0.0)
        df = 1.0 + np.where(cloudy, (LV / CP) * dqs, 0.0)
        t = t - f / df
    qs = saturation_mixing_ratio(p, t)
    qc = np.maximum(qt - qs, 0.0)
    qv = qt - qc
    return t, qv, qc
