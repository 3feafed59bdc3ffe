"""Moist thermodynamics used by ingest, the derived fields and the demo generator.

Conventions
-----------
* Saturation vapour pressure over liquid water: Bolton (1980), eq. 10,
  ``e_s = 611.2 Pa * exp(17.67 * Tc / (Tc + 243.5))`` with ``Tc`` in degC. Bolton quotes
  an accuracy of 0.1 % between -30 and 35 degC; it is used for liquid water at all
  temperatures (supercooled below 0 degC), never over ice.
* Saturation vapour pressure over ice: Murphy and Koop (2005), eq. 7,
  ``ln(e_i / Pa) = 9.550426 - 5723.265 / T + 3.53068 ln(T) - 0.00728332 T``, stated by
  the authors for T > 110 K; used only where a function says "ice".
* Saturation mixing ratio (either phase) is ``eps * e_s / (p - e_s)``, the denominator
  floored at 1e-3 Pa so that e_s >= p gives a large finite value, not a division by zero.
* Relative humidity is the ratio of vapour pressure to saturation vapour pressure,
  ``rh = e / e_s`` with ``e = p * r / (eps + r)`` (the WMO definition), as a fraction
  (1 = saturated), not percent. It is not capped: supersaturation gives rh > 1.
* Mixing ratios are kg of water per kg of dry air. Specific humidity ``q`` alone converts
  exactly as ``r = q / (1 - q)``. With condensate present, species given as mass
  fractions of moist air (vapour + condensate + dry air) convert exactly together with
  those given as mixing ratios: ``r_x = q_x (1 + R) / (1 - S)``, ``S`` the sum of the
  mass fractions, ``R`` that of the mixing ratios (:func:`mixing_ratios_from_mass_fractions`).
* Total water ``q_t = q_v + q_c (+ q_i)`` is the non-precipitating water: rain, snow and
  graupel are not part of it (:func:`total_water`).
* Potential temperature uses the Exner function ``Pi = (p / p0) ** (Rd / cp)`` with
  ``p0 = 1000 hPa`` and ``Rd / cp = 2/7``; ``theta = T / Pi`` (dry-air kappa also in moist
  air).
* Liquid-water potential temperature (Betts 1973), first-order form:
  ``theta_l = theta * (1 - Lv q_c / (cp T)) = (T - (Lv / cp) q_c) / Pi``. Betts' form
  ``theta - (theta / T)(Lv / cp) q_c`` is the same expression. It is the first-order
  expansion of ``theta * exp(-Lv q_c / (cp T))``; the two differ by about
  ``theta / 2 * (Lv q_c / (cp T))**2``, 0.01 K at q_c = 1 g kg-1. The first-order form is
  used because ``Pi * theta_l`` is then exactly the liquid-water temperature
  ``T_l = T - (Lv / cp) q_c`` that :func:`saturation_adjustment` inverts and that the
  statistical cloud scheme linearizes about, so all three agree to round-off.
* Liquid-ice potential temperature (Tripoli and Cotton 1981), the same first-order form:
  ``theta_il = theta * (1 - (Lv q_c + Ls q_i) / (cp T))``. Tripoli and Cotton write it as
  ``theta * (1 + (Lv q_c + Ls q_i) / (cp max(T, 253 K)))**-1`` (from memory); here
  neither the inverse nor the 253 K floor is used, so that with ``q_i = 0`` it equals
  ``theta_l`` above. The two agree to first order in the latent-heat term.
* Virtual temperature without condensate counts vapour only:
  ``Tv = T * (1 + r / eps) / (1 + r)``; air density is ``rho = p / (Rd * Tv)`` (moist air
  without condensate). Dry-air density is ``rho_d = (p - e) / (Rd * T)``, so that
  ``rho = rho_d * (1 + r)``; a column of condensate mixing ratio ``r_c`` holds
  ``sum rho_d * r_c * dz`` kg m-2 (liquid water path).
* Virtual potential temperature with condensate loading uses the exact mixing-ratio form
  ``theta_v = theta * (1 + r_v / eps) / (1 + r_v + r_cond)`` (density of the gas plus
  suspended condensate, condensate volume neglected), not the linear approximation
  ``theta * (1 + 0.608 q_v - q_l)``; with ``r_cond = 0`` it is ``Tv / Pi``.

Constants (SI; standard values quoted from memory, matching those used by MetPy):
``Rd = 287.04749`` J kg-1 K-1 (R* / M_d, M_d = 28.96546 g mol-1), ``Rv = 461.52311``
J kg-1 K-1 (M_w = 18.015268 g mol-1), ``cp = Rd / (2/7)``, ``Lv = 2.501e6`` J kg-1
(latent heat of vaporisation at 0 degC, held constant), ``Ls = 2.834e6`` J kg-1 (latent
heat of sublimation at 0 degC, held constant; from memory, about ``Lv`` plus a latent
heat of fusion of 3.33e5 J kg-1).
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
LS: float = 2.834e6
"""Latent heat of sublimation at 0 degC, J kg-1 (held constant; value from memory)."""
P0: float = 1.0e5
"""Reference pressure of potential temperature, Pa."""
T0: float = 273.15
"""0 degC in kelvin."""
G: float = 9.80665
"""Standard gravity, m s-2."""

SATURATION_FORMULA = "Bolton (1980) eq. 10 over liquid water"
SATURATION_FORMULA_ICE = "Murphy and Koop (2005) eq. 7 over ice"


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


def saturation_mixing_ratio_slope(
    pressure: ArrayLike, temperature: ArrayLike
) -> NDArray[np.float64]:
    """Temperature derivative of the saturation mixing ratio over liquid water, kg kg-1 K-1.

    The analytic derivative of :func:`saturation_mixing_ratio` with Bolton's (1980)
    ``e_s``, not the Clausius-Clapeyron estimate ``Lv q_s / (Rv T**2)``, so that it is the
    exact tangent of the ``q_s`` used everywhere in lesprep:

        dq_s/dT = q_s * p / (p - e_s) * d ln(e_s)/dT,
        d ln(e_s)/dT = 17.67 * 243.5 / (Tc + 243.5)**2,

    at constant pressure, with ``p - e_s`` floored at 1e-3 Pa as in
    :func:`saturation_mixing_ratio`.

    Parameters
    ----------
    pressure
        Air pressure in Pa.
    temperature
        Air temperature in K.

    Returns
    -------
    numpy.ndarray
        ``dq_s/dT`` in kg kg-1 K-1 (float64).
    """
    t = np.asarray(temperature, dtype=np.float64)
    p = np.asarray(pressure, dtype=np.float64)
    es = saturation_vapour_pressure(t)
    qs = EPS * es / np.maximum(p - es, 1e-3)
    dlnes = 17.67 * 243.5 / (t - T0 + 243.5) ** 2
    return qs * p / np.maximum(p - es, 1e-3) * dlnes


def saturation_vapour_pressure_ice(temperature: ArrayLike) -> NDArray[np.float64]:
    """Saturation vapour pressure over ice (Murphy and Koop 2005, eq. 7).

    ``ln(e_i / Pa) = 9.550426 - 5723.265 / T + 3.53068 ln(T) - 0.00728332 T``, given by the
    authors for T > 110 K. Above the melting point the value is an extrapolation of the
    formula (ice is not stable there); no cap or switch to liquid is applied.

    Parameters
    ----------
    temperature
        Air temperature in K.

    Returns
    -------
    numpy.ndarray
        Saturation vapour pressure over ice in Pa (float64).

    Examples
    --------
    At the triple point, 273.16 K, the formula reproduces the triple-point pressure,
    611.657 Pa (from memory):

    >>> round(float(saturation_vapour_pressure_ice(273.16)), 2)
    611.66
    """
    t = np.asarray(temperature, dtype=np.float64)
    return np.exp(9.550426 - 5723.265 / t + 3.53068 * np.log(t) - 0.00728332 * t)


def saturation_mixing_ratio_ice(pressure: ArrayLike, temperature: ArrayLike) -> NDArray[np.float64]:
    """Saturation mixing ratio over ice, kg kg-1 (per kg of dry air).

    ``eps * e_i / (p - e_i)`` with :func:`saturation_vapour_pressure_ice` and the
    denominator floored at 1e-3 Pa.

    Parameters
    ----------
    pressure
        Air pressure in Pa.
    temperature
        Air temperature in K.

    Returns
    -------
    numpy.ndarray
        Saturation mixing ratio over ice (float64).
    """
    ei = saturation_vapour_pressure_ice(temperature)
    p = np.asarray(pressure, dtype=np.float64)
    return EPS * ei / np.maximum(p - ei, 1e-3)


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


def total_water(qv: ArrayLike, qc: ArrayLike, qi: ArrayLike | None = None) -> NDArray[np.float64]:
    """Total (non-precipitating) water ``q_t = q_v + q_c (+ q_i)``.

    Rain, snow, graupel and any other precipitating water are not part of ``q_t`` here;
    add them explicitly if a definition that includes them is wanted. The inputs must share
    one basis (all mixing ratios, or all mass fractions); the result has that basis.

    Parameters
    ----------
    qv
        Water vapour, kg kg-1.
    qc
        Cloud liquid water, kg kg-1.
    qi
        Cloud ice, kg kg-1; ``None`` (the default) for a warm-phase model.

    Returns
    -------
    numpy.ndarray
        Total water, kg kg-1 (float64, the broadcast shape of the inputs).
    """
    total = np.asarray(qv, dtype=np.float64) + np.asarray(qc, dtype=np.float64)
    if qi is not None:
        total = total + np.asarray(qi, dtype=np.float64)
    return total


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


def potential_temperature(pressure: ArrayLike, temperature: ArrayLike) -> NDArray[np.float64]:
    """Potential temperature ``theta = T / Pi`` (K) from pressure (Pa) and temperature (K)."""
    return np.asarray(temperature, dtype=np.float64) / exner(pressure)


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
    """Density of the dry air alone, kg m-3: ``rho_d = (p - e) / (Rd T)``.

    ``e = p r / (eps + r)`` is the vapour pressure. ``rho_d * r_x`` is the mass of water
    species ``x`` per m3 for a mixing ratio ``r_x``; the liquid water path of a column is
    ``sum(rho_d * r_c * dz)``. For vapour-only air ``air_density = rho_d * (1 + r)``.

    Parameters
    ----------
    pressure
        Air pressure in Pa (total, including the vapour's partial pressure).
    temperature
        Air temperature in K.
    mixing_ratio
        Water vapour mixing ratio in kg kg-1.

    Returns
    -------
    numpy.ndarray
        Dry-air density in kg m-3 (float64).
    """
    p = np.asarray(pressure, dtype=np.float64)
    return (p - vapour_pressure(p, mixing_ratio)) / (RD * np.asarray(temperature, dtype=np.float64))


def liquid_water_potential_temperature(
    pressure: ArrayLike, temperature: ArrayLike, qc: ArrayLike
) -> NDArray[np.float64]:
    """Liquid-water potential temperature (Betts 1973), first-order form, K.

    ``theta_l = theta * (1 - Lv q_c / (cp T)) = (T - (Lv / cp) q_c) / Pi``, with constant
    ``Lv`` and the dry-air ``cp`` (see the module's Conventions for why the first-order
    form and not the exponential one). It inverts :func:`saturation_adjustment`.

    Parameters
    ----------
    pressure
        Air pressure in Pa.
    temperature
        Air temperature in K.
    qc
        Cloud liquid water mixing ratio in kg kg-1 (rain excluded unless the caller adds
        it).

    Returns
    -------
    numpy.ndarray
        theta_l in K (float64).
    """
    t = np.asarray(temperature, dtype=np.float64)
    return (t - (LV / CP) * np.asarray(qc, dtype=np.float64)) / exner(pressure)


def liquid_ice_potential_temperature(
    pressure: ArrayLike, temperature: ArrayLike, qc: ArrayLike, qi: ArrayLike
) -> NDArray[np.float64]:
    """Liquid-ice potential temperature (Tripoli and Cotton 1981), first-order form, K.

    ``theta_il = theta * (1 - (Lv q_c + Ls q_i) / (cp T))
    = (T - (Lv q_c + Ls q_i) / cp) / Pi`` with constant ``Lv``, ``Ls`` and the dry-air
    ``cp``. Tripoli and Cotton's own expression inverts the bracket and floors T at 253 K
    (from memory); this form is used instead so that ``q_i = 0`` gives exactly
    :func:`liquid_water_potential_temperature`.

    Parameters
    ----------
    pressure
        Air pressure in Pa.
    temperature
        Air temperature in K.
    qc
        Cloud liquid water mixing ratio in kg kg-1.
    qi
        Cloud ice mixing ratio in kg kg-1.

    Returns
    -------
    numpy.ndarray
        theta_il in K (float64).
    """
    t = np.asarray(temperature, dtype=np.float64)
    latent = LV * np.asarray(qc, dtype=np.float64) + LS * np.asarray(qi, dtype=np.float64)
    return (t - latent / CP) / exner(pressure)


def virtual_potential_temperature(
    pressure: ArrayLike, temperature: ArrayLike, qv: ArrayLike, q_cond: ArrayLike = 0.0
) -> NDArray[np.float64]:
    """Virtual potential temperature with condensate loading, K.

    Exact mixing-ratio form ``theta_v = theta * (1 + r_v / eps) / (1 + r_v + r_cond)``:
    the temperature dry air would need to have the density of the gas plus its suspended
    condensate at the same pressure (condensate volume neglected). Not the linear
    approximation ``theta * (1 + 0.608 q_v - q_l)``.

    Parameters
    ----------
    pressure
        Air pressure in Pa.
    temperature
        Air temperature in K.
    qv
        Water vapour mixing ratio in kg kg-1.
    q_cond
        Total condensate mixing ratio in kg kg-1 that loads the air (cloud liquid + ice,
        and precipitation if the caller wants it counted); 0 gives the vapour-only
        ``Tv / Pi``.

    Returns
    -------
    numpy.ndarray
        theta_v in K (float64).
    """
    r = np.asarray(qv, dtype=np.float64)
    rc = np.asarray(q_cond, dtype=np.float64)
    theta = potential_temperature(pressure, temperature)
    return theta * (1.0 + r / EPS) / (1.0 + r + rc)


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
        dqs = saturation_mixing_ratio_slope(p, t)
        cloudy = qt > qs
        f = t - tl - (LV / CP) * np.where(cloudy, qt - qs, 0.0)
        df = 1.0 + np.where(cloudy, (LV / CP) * dqs, 0.0)
        t = t - f / df
    qs = saturation_mixing_ratio(p, t)
    qc = np.maximum(qt - qs, 0.0)
    qv = qt - qc
    return t, qv, qc
