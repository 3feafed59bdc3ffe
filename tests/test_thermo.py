"""Moist thermodynamics against published tables and reference libraries."""

from __future__ import annotations

import numpy as np
import pytest

from lesprep import thermo

# Saturation vapour pressure over liquid water, Pa, from the IAPWS-95 formulation
# (Wagner & Pruss 2002, J. Phys. Chem. Ref. Data 31, 387). Values at 10, 20, 30 degC are
# the published saturation-table values (quoted from memory, rounded to 0.1 Pa, and
# cross-checked with the iapws package below); 0 degC is the metastable-liquid value
# just below the triple point (611.655 Pa at 0.01 degC).
IAPWS95_TABLE = {0.0: 611.2, 10.0: 1228.2, 20.0: 2339.3, 30.0: 4247.0}


@pytest.mark.parametrize("tc, expected", sorted(IAPWS95_TABLE.items()))
def test_bolton_against_iapws95_table(tc: float, expected: float) -> None:
    es = float(thermo.saturation_vapour_pressure(tc + 273.15))
    assert es == pytest.approx(expected, rel=3e-3)


@pytest.mark.parametrize("tc", [0.0, 10.0, 20.0, 30.0])
def test_bolton_against_iapws_package(tc: float) -> None:
    # iapws implements IAPWS-IF97's saturation line (region 4); agreement within 0.3 %.
    from iapws.iapws97 import _PSat_T

    ref = _PSat_T(tc + 273.15) * 1e6  # MPa -> Pa
    assert float(thermo.saturation_vapour_pressure(tc + 273.15)) == pytest.approx(ref, rel=3e-3)


def test_relative_humidity_against_metpy() -> None:
    mpcalc = pytest.importorskip("metpy.calc")
    from metpy.units import units

    rng = np.random.default_rng(1)
    p = rng.uniform(7.0e4, 1.02e5, 200)
    t = rng.uniform(265.0, 305.0, 200)
    r = rng.uniform(0.2, 1.0, 200) * thermo.saturation_mixing_ratio(p, t)
    ours = thermo.relative_humidity(p, t, r)
    ref = (
        mpcalc.relative_humidity_from_mixing_ratio(p * units.Pa, t * units.K, r * units("kg/kg"))
        .to("dimensionless")
        .magnitude
    )
    # MetPy 1.7 uses Ambaum (2020) for e_s, Bolton differs by up to 0.26 % at 30 degC.
    np.testing.assert_allclose(ours, ref, rtol=5e-3)


def test_mixing_ratio_from_specific_humidity_against_metpy() -> None:
    mpcalc = pytest.importorskip("metpy.calc")
    from metpy.units import units

    q = np.array([0.0, 0.001, 0.01, 0.03])
    ref = mpcalc.mixing_ratio_from_specific_humidity(q * units("kg/kg")).magnitude
    np.testing.assert_allclose(thermo.mixing_ratio_from_specific_humidity(q), ref, rtol=1e-12)


def test_exner_hand_value() -> None:
    # (850 / 1000) ** (2/7): 0.85 ** 0.285714... = exp(0.285714 * ln 0.85)
    # ln 0.85 = -0.1625189; times 2/7 = -0.0464340; exp = 0.9546275 (by hand)
    assert float(thermo.exner(85000.0)) == pytest.approx(0.9546275, abs=2e-7)
    assert float(thermo.exner(1.0e5)) == 1.0


def test_potential_temperature_against_metpy() -> None:
    mpcalc = pytest.importorskip("metpy.calc")
    from metpy.units import units

    p = np.array([1.0e5, 9.0e4, 7.0e4])
    theta = np.array([290.0, 295.0, 305.0])
    ref = mpcalc.temperature_from_potential_temperature(p * units.Pa, theta * units.K)
    np.testing.assert_allclose(
        thermo.temperature_from_potential_temperature(theta, p), ref.to("K").magnitude, rtol=1e-4
    )


def test_density_against_metpy() -> None:
    mpcalc = pytest.importorskip("metpy.calc")
    from metpy.units import units

    p, t, r = 9.5e4, 290.0, 0.01
    ref = mpcalc.density(p * units.Pa, t * units.K, r * units("kg/kg")).to("kg/m^3").magnitude
    assert float(thermo.air_density(p, t, r)) == pytest.approx(ref, rel=1e-4)


def test_saturation_adjustment_is_consistent() -> None:
    # After adjustment, cloudy air is exactly saturated (rh = 1) and theta_l, qt are kept.
    rng = np.random.default_rng(0)
    p = rng.uniform(8.0e4, 1.0e5, 500)
    thl = rng.uniform(285.0, 295.0, 500)
    qt = rng.uniform(0.004, 0.016, 500)
    t, qv, qc = thermo.saturation_adjustment(thl, qt, p)
    np.testing.assert_allclose(qv + qc, qt, rtol=1e-12)
    cloudy = qc > 0
    assert cloudy.any() and (~cloudy).any()
    np.testing.assert_allclose(thermo.relative_humidity(p, t, qv)[cloudy], 1.0, atol=1e-9)
    assert np.all(thermo.relative_humidity(p, t, qv)[~cloudy] <= 1.0 + 1e-12)
    # T = Pi * theta_l + Lv/cp * qc (the linearised definition used by the generator)
    np.testing.assert_allclose(t, thermo.exner(p) * thl + thermo.LV / thermo.CP * qc, atol=1e-6)
