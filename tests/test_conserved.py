"""Conserved variables, condensate bookkeeping and ice saturation against outside references.

References used here:
* MetPy 1.7 (``metpy.calc``) for theta, saturation mixing ratio, density, virtual
  temperature and virtual potential temperature;
* the ``iapws`` package's IAPWS 2011 sublimation-pressure release for ice saturation;
* formulas written out from the papers (Betts 1973; Tripoli and Cotton 1981; Murphy and
  Koop 2005) and evaluated in plain Python floats, with constants derived below.
"""

from __future__ import annotations

import math

import numpy as np
import pytest

from lesprep import thermo

# Constants for the hand-worked points, derived independently of lesprep.thermo:
# R* = 8.314462618 J mol-1 K-1 (CODATA 2018, exact); molar masses of dry air 28.96546 and
# of water 18.015268 g mol-1 (the IAPWS-95 value; both from memory); cp = 7/2 Rd (ideal
# diatomic gas); Lv = 2.501e6 and Ls = 2.834e6 J kg-1 at 0 degC (from memory).
R_STAR = 8.314462618
RD = R_STAR / 28.96546e-3
RV = R_STAR / 18.015268e-3
EPS = RD / RV
CP = 3.5 * RD
LV = 2.501e6
LS = 2.834e6
P0 = 100000.0

# (p Pa, T K, qv, qc, qi) -- mixing ratios, kg kg-1
POINTS = [
    (90000.0, 285.0, 9.0e-3, 5.0e-4, 0.0),
    (85000.0, 280.0, 7.0e-3, 1.0e-3, 0.0),
    (70000.0, 265.0, 2.0e-3, 2.0e-4, 3.0e-4),
]


def _theta(p: float, t: float) -> float:
    return t * (P0 / p) ** (RD / CP)


def test_constants_match_independent_derivation() -> None:
    assert thermo.RD == pytest.approx(RD, rel=1e-12)
    assert thermo.EPS == pytest.approx(EPS, rel=1e-12)
    assert thermo.CP == pytest.approx(CP, rel=1e-12)
    assert thermo.LS == LS


# --- total water and species conversion -------------------------------------------------


def test_total_water_excludes_precipitation_and_broadcasts() -> None:
    qv = np.array([[0.008], [0.009]])
    qc = np.array([0.0, 5e-4, 1e-3])
    qt = thermo.total_water(qv, qc)
    assert qt.shape == (2, 3) and qt.dtype == np.float64
    assert qt[1, 2] == pytest.approx(0.009 + 0.001, rel=1e-15)
    assert float(thermo.total_water(0.008, 4e-4, 1e-4)) == pytest.approx(0.0085, rel=1e-15)


def test_mixing_ratio_from_specific_vapour_only_against_metpy() -> None:
    mpcalc = pytest.importorskip("metpy.calc")
    from metpy.units import units

    q = np.array([0.0, 0.001, 0.01, 0.03])
    ref = mpcalc.mixing_ratio_from_specific_humidity(q * units("kg/kg")).m_as("kg/kg")
    np.testing.assert_allclose(
        thermo.mixing_ratios_from_mass_fractions({"qv": q})["qv"], ref, rtol=1e-12
    )


def test_mixing_ratios_from_mass_fractions_exact_with_condensate() -> None:
    # A parcel of 1 kg: 10 g vapour, 2 g liquid, 1 g ice, 0.5 g rain, so 986.5 g dry air.
    r = thermo.mixing_ratios_from_mass_fractions(
        {"qv": 0.010, "qc": 0.002, "qi": 0.001, "qr": 0.0005}
    )
    dry = 1.0 - 0.010 - 0.002 - 0.001 - 0.0005
    for name, grams in [("qv", 10.0), ("qc", 2.0), ("qi", 1.0), ("qr", 0.5)]:
        assert float(r[name]) == pytest.approx(grams * 1e-3 / dry, rel=1e-14)
    # Inverse: q_x = r_x / (1 + sum r) recovers the mass fractions.
    rsum = sum(float(v) for v in r.values())
    assert float(r["qc"]) / (1.0 + rsum) == pytest.approx(0.002, rel=1e-14)
    # the same parcel with cloud water and rain given as mixing ratios (per kg dry air)
    mixed = thermo.mixing_ratios_from_mass_fractions(
        {"qv": 0.010, "qi": 0.001}, {"qc": 2.0e-3 / dry, "qr": 0.5e-3 / dry}
    )
    for name, grams in [("qv", 10.0), ("qi", 1.0)]:
        assert float(mixed[name]) == pytest.approx(grams * 1e-3 / dry, rel=1e-13)


def test_mixing_ratios_from_mass_fractions_broadcasts() -> None:
    r = thermo.mixing_ratios_from_mass_fractions({"qv": np.full((2, 3), 0.01), "qc": 0.0})
    assert r["qv"].shape == (2, 3)
    np.testing.assert_allclose(r["qv"], 0.01 / 0.99, rtol=1e-14)


# --- theta, saturation, density, virtual temperature against MetPy ----------------------


def test_potential_temperature_against_metpy() -> None:
    mpcalc = pytest.importorskip("metpy.calc")
    from metpy.units import units

    p = np.array([1.0e5, 9.0e4, 7.0e4, 5.0e4])
    t = np.array([290.0, 285.0, 270.0, 250.0])
    ref = mpcalc.potential_temperature(p * units.Pa, t * units.K).m_as("K")
    # same p0 and kappa = 2/7 in both; only round-off differs
    np.testing.assert_allclose(thermo.potential_temperature(p, t), ref, rtol=1e-12)


def test_saturation_mixing_ratio_against_metpy() -> None:
    mpcalc = pytest.importorskip("metpy.calc")
    from metpy.units import units

    t = np.linspace(265.0, 305.0, 21)
    p = np.linspace(1.02e5, 7.0e4, 21)
    ref = mpcalc.saturation_mixing_ratio(p * units.Pa, t * units.K).m_as("kg/kg")
    # MetPy 1.7 uses Ambaum (2020) for e_s; Bolton differs by up to 0.32 % here (measured)
    np.testing.assert_allclose(thermo.saturation_mixing_ratio(p, t), ref, rtol=5e-3)


def test_dry_air_density_against_metpy() -> None:
    mpcalc = pytest.importorskip("metpy.calc")
    from metpy.units import units

    p = np.array([1.0e5, 9.0e4, 7.0e4])
    t = np.array([295.0, 285.0, 270.0])
    r = np.array([0.015, 0.009, 0.003])
    moist = mpcalc.density(p * units.Pa, t * units.K, r * units("kg/kg")).m_as("kg/m^3")
    # 1 m3 of moist air holds rho_d of dry air and rho_d * r of vapour: rho = rho_d (1 + r).
    # MetPy uses the same R_d and eps; the tolerance allows for its different operation order.
    np.testing.assert_allclose(thermo.dry_air_density(p, t, r), moist / (1.0 + r), rtol=1e-7)
    np.testing.assert_allclose(thermo.air_density(p, t, r), moist, rtol=1e-7)


def test_dry_air_density_hand_point_and_water_path() -> None:
    p, t, r = 90000.0, 285.0, 9.0e-3
    e = p * r / (EPS + r)
    rho_d = (p - e) / (RD * t)
    assert float(thermo.dry_air_density(p, t, r)) == pytest.approx(rho_d, rel=1e-12)
    # Liquid water path of a 200 m cloud layer, 20 levels of 10 m at 0.5 g/kg: sum rho_d r dz
    lwp = float(np.sum(thermo.dry_air_density(p, t, np.full(20, r)) * 5e-4 * 10.0))
    assert lwp == pytest.approx(rho_d * 5e-4 * 200.0, rel=1e-12)


def test_virtual_temperature_against_metpy() -> None:
    mpcalc = pytest.importorskip("metpy.calc")
    from metpy.units import units

    t = np.array([300.0, 285.0, 260.0])
    r = np.array([0.02, 0.009, 0.001])
    ref = mpcalc.virtual_temperature(t * units.K, r * units("kg/kg")).m_as("K")
    np.testing.assert_allclose(thermo.virtual_temperature(t, r), ref, rtol=1e-7)


def test_virtual_potential_temperature_vapour_only_against_metpy() -> None:
    mpcalc = pytest.importorskip("metpy.calc")
    from metpy.units import units

    p = np.array([1.0e5, 9.0e4, 7.0e4])
    t = np.array([300.0, 285.0, 265.0])
    r = np.array([0.02, 0.009, 0.002])
    ref = mpcalc.virtual_potential_temperature(p * units.Pa, t * units.K, r * units("kg/kg")).m_as(
        "K"
    )
    np.testing.assert_allclose(thermo.virtual_potential_temperature(p, t, r), ref, rtol=1e-7)
    np.testing.assert_allclose(thermo.virtual_potential_temperature(p, t, r, 0.0), ref, rtol=1e-7)


# --- conserved variables against the papers' formulas -----------------------------------


@pytest.mark.parametrize("p, t, qv, qc, qi", POINTS)
def test_theta_l_hand_points(p: float, t: float, qv: float, qc: float, qi: float) -> None:
    # Betts (1973): theta_l = theta - (theta / T) (L / cp) q_l
    theta = _theta(p, t)
    expected = theta - (theta / t) * (LV / CP) * qc
    got = float(thermo.liquid_water_potential_temperature(p, t, qc))
    assert got == pytest.approx(expected, rel=1e-9)
    # Within the second-order term of the exponential form theta exp(-L q_l / (cp T)).
    x = LV * qc / (CP * t)
    assert abs(got - theta * math.exp(-x)) <= 0.51 * theta * x * x


@pytest.mark.parametrize("p, t, qv, qc, qi", POINTS)
def test_theta_il_hand_points(p: float, t: float, qv: float, qc: float, qi: float) -> None:
    # Tripoli and Cotton (1981), first order: theta (1 - (Lv q_l + Ls q_i) / (cp T))
    theta = _theta(p, t)
    expected = theta * (1.0 - (LV * qc + LS * qi) / (CP * t))
    got = float(thermo.liquid_ice_potential_temperature(p, t, qc, qi))
    assert got == pytest.approx(expected, rel=1e-9)
    # Their bracket-inverse form with T floored at 253 K (from memory) agrees to first order;
    # here the floor is not reached (T >= 265 K), the difference is second order.
    inverse = theta / (1.0 + (LV * qc + LS * qi) / (CP * max(t, 253.0)))
    x = (LV * qc + LS * qi) / (CP * t)
    assert abs(got - inverse) <= 1.01 * theta * x * x
    # No ice: theta_il is theta_l exactly.
    assert float(thermo.liquid_ice_potential_temperature(p, t, qc, 0.0)) == float(
        thermo.liquid_water_potential_temperature(p, t, qc)
    )


@pytest.mark.parametrize("p, t, qv, qc, qi", POINTS)
def test_theta_v_with_condensate_hand_points(
    p: float, t: float, qv: float, qc: float, qi: float
) -> None:
    # Definition: dry air at theta_v has the density of vapour + dry air + condensate.
    # rho_total = rho_d (1 + r_v + r_cond) = p / (Rd Pi theta_v)
    e = p * qv / (EPS + qv)
    rho_total = (p - e) / (RD * t) * (1.0 + qv + qc + qi)
    pi = (p / P0) ** (RD / CP)
    expected = p / (RD * pi * rho_total)
    got = float(thermo.virtual_potential_temperature(p, t, qv, qc + qi))
    assert got == pytest.approx(expected, rel=1e-9)
    # Mixing-ratio form written out: theta (1 + r_v / eps) / (1 + r_t)
    theta = _theta(p, t)
    assert got == pytest.approx(theta * (1 + qv / EPS) / (1 + qv + qc + qi), rel=1e-12)
    # The common linear approximation theta (1 + 0.608 q_v - q_l) (specific humidities)
    # agrees to about 0.1 K at these moisture levels (common practice, not a reference).
    rt = qv + qc + qi
    approx = theta * (1.0 + 0.608 * qv / (1 + rt) - (qc + qi) / (1 + rt))
    assert got == pytest.approx(approx, abs=0.1)


def test_theta_l_inverts_saturation_adjustment() -> None:
    rng = np.random.default_rng(3)
    p = rng.uniform(8.0e4, 1.0e5, 300)
    thl = rng.uniform(285.0, 295.0, 300)
    qt = rng.uniform(0.006, 0.016, 300)
    t, qv, qc = thermo.saturation_adjustment(thl, qt, p)
    assert (qc > 0).any()
    np.testing.assert_allclose(thermo.liquid_water_potential_temperature(p, t, qc), thl, atol=1e-9)
    np.testing.assert_allclose(thermo.total_water(qv, qc), qt, rtol=1e-14)


def test_conserved_variables_are_float64_and_propagate_nan() -> None:
    out = thermo.liquid_ice_potential_temperature(
        np.float32(9e4), np.array([280.0, np.nan], dtype=np.float32), 1e-4, 0.0
    )
    assert out.dtype == np.float64 and np.isnan(out[1]) and np.isfinite(out[0])
    assert np.isnan(thermo.virtual_potential_temperature(9e4, 280.0, np.nan, 0.0))


# --- ice saturation ----------------------------------------------------------------------

ICE_TEMPERATURES = [190.0, 200.0, 210.0, 220.0, 235.0, 250.0, 260.0, 270.0, 273.15]


@pytest.mark.parametrize("t", ICE_TEMPERATURES)
def test_ice_saturation_against_iapws(t: float) -> None:
    from iapws._iapws import _Sublimation_Pressure

    ref = _Sublimation_Pressure(t) * 1e6  # MPa -> Pa, IAPWS 2011 sublimation release
    # Murphy and Koop eq. 7 vs IAPWS 2011: 0.069 % at 190 K falling to 0.002 % at 270 K
    # (measured); allow 0.1 %.
    assert float(thermo.saturation_vapour_pressure_ice(t)) == pytest.approx(ref, rel=1e-3)


def test_ice_saturation_hand_point() -> None:
    # Murphy and Koop (2005) eq. 7 written out at 240 K
    t = 240.0
    ln_p = 9.550426 - 5723.265 / t + 3.53068 * math.log(t) - 0.00728332 * t
    assert float(thermo.saturation_vapour_pressure_ice(t)) == pytest.approx(
        math.exp(ln_p), rel=1e-13
    )
    p = 50000.0
    ei = math.exp(ln_p)
    assert float(thermo.saturation_mixing_ratio_ice(p, t)) == pytest.approx(
        EPS * ei / (p - ei), rel=1e-12
    )


def test_ice_below_liquid_saturation_when_supercooled() -> None:
    t = np.linspace(235.0, 272.0, 12)
    assert np.all(
        thermo.saturation_mixing_ratio_ice(6e4, t) < thermo.saturation_mixing_ratio(6e4, t)
    )


def test_ice_saturation_mixing_ratio_against_metpy() -> None:
    mpcalc = pytest.importorskip("metpy.calc")
    from metpy.units import units

    t = np.linspace(240.0, 273.0, 12)
    p = np.full_like(t, 6.0e4)
    ref = mpcalc.saturation_mixing_ratio(p * units.Pa, t * units.K, phase="solid").m_as("kg/kg")
    # MetPy 1.7's ice formula (Ambaum 2020) is itself off IAPWS 2011 by up to 0.11 % in
    # 240-273 K and by 3 % at 190 K (measured), so only this range, at 0.2 %.
    np.testing.assert_allclose(thermo.saturation_mixing_ratio_ice(p, t), ref, rtol=2e-3)


def _warm_slab(rng: np.random.Generator, shape: tuple[int, ...]) -> dict[str, np.ndarray]:
    """float32 T, qv and qc of a warm slab, drawn in the same order as before."""
    return {
        "T": rng.uniform(270.0, 295.0, shape).astype(np.float32),
        "qv": rng.uniform(2e-3, 1.2e-2, shape).astype(np.float32),
        "qc": rng.uniform(0.0, 1e-3, shape).astype(np.float32),
    }


@pytest.mark.parametrize("species", [(), ("qi",), ("qi", "qr")])
@pytest.mark.parametrize("profile", [False, True])
def test_per_slab_conserved_engines_agree(species, profile) -> None:
    # the compiled pass against the thermo functions above (the numpy engine)
    from lesprep.scales.conserved import conserved_fields

    rng = np.random.default_rng(4)
    shape = (3, 5, 6)
    fine = _warm_slab(rng, shape)
    for s in species:
        fine[s] = rng.uniform(0.0, 2e-4, shape).astype(np.float32)
    p = np.array([95000.0, 90000.0, 85000.0])
    if not profile:
        p = p[:, None, None] + rng.normal(0.0, 20.0, shape)
    names = ["qt", "theta_l", "theta_v"] + (["theta_il"] if "qi" in species else [])
    fast = conserved_fields(fine, names, p, engine="numba")
    ref = conserved_fields(fine, names, p, engine="numpy")
    assert set(fast) == set(ref) == set(names)
    for n in names:
        np.testing.assert_allclose(fast[n], ref[n], rtol=1e-14, err_msg=n)


def test_exner_table_gives_the_per_cell_values(monkeypatch) -> None:
    # float32 3-D pressure: the Exner function of a level's distinct values is tabulated;
    # a level whose range exceeds the table size is computed per cell. Both must equal the
    # per-cell computation bit for bit, and the thermo functions (numpy engine) to round-off
    import lesprep.scales.conserved as conserved

    rng = np.random.default_rng(5)
    shape = (3, 6, 7)
    fine = _warm_slab(rng, shape)
    spread = np.array([0.05, 0.2, 30.0])[:, None, None]  # Pa: narrow, medium, wide
    p = np.array([95000.0, 90000.0, 85000.0])[:, None, None] + spread * rng.normal(size=shape)
    p = p.astype(np.float32)
    names = ["qt", "theta_l", "theta_v"]
    monkeypatch.setattr(conserved, "TABLE_MAX", 64)
    _, _, width = conserved._exner_tables(p)
    assert width[0] > 0 and width[2] == 0  # one tabulated level, one left per cell
    tabulated = conserved.conserved_fields(fine, names, p, engine="numba")
    monkeypatch.setattr(conserved, "TABLE_MAX", 0)
    per_cell = conserved.conserved_fields(fine, names, p, engine="numba")
    ref = conserved.conserved_fields(fine, names, p, engine="numpy")
    for n in names:
        np.testing.assert_array_equal(tabulated[n], per_cell[n], err_msg=n)
        np.testing.assert_allclose(tabulated[n], ref[n], rtol=1e-14, err_msg=n)
