"""The Gaussian (statistical) cloud scheme against hand-worked points and Monte Carlo.

References: the linearization of Sommeria and Deardorff (1977) and Mellor (1977) written
out below in plain Python floats with Bolton's (1980) eq. 10; ``scipy.stats.norm.cdf`` for
the Gaussian integral; seeded Monte Carlo draws of jointly Gaussian ``(q_t, theta_l)`` for
the variance of the saturation excess, and per-draw saturation adjustment for the exact
(nonlinear) cloud condition.
"""

from __future__ import annotations

import math

import numpy as np
import pytest
from scipy.stats import norm

from lesprep import schemes, thermo

# Constants derived independently (see tests/test_conserved.py for their sources).
R_STAR = 8.314462618
RD = R_STAR / 28.96546e-3
RV = R_STAR / 18.015268e-3
EPS = RD / RV
CP = 3.5 * RD
LV = 2.501e6

# (qt kg/kg, theta_l K, p Pa): supersaturated, subsaturated, cold
HAND_POINTS = [(9.5e-3, 290.0, 90000.0), (6.0e-3, 285.0, 95000.0), (4.0e-3, 275.0, 80000.0)]


def _hand_linearization(qt: float, thl: float, p: float) -> tuple[float, float, float, float]:
    """a, b, s, dqs/dT written out from the papers' definitions, with Bolton's e_s."""
    pi = (p / 1.0e5) ** (RD / CP)
    tl = thl * pi
    tc = tl - 273.15
    es = 611.2 * math.exp(17.67 * tc / (tc + 243.5))
    qs = EPS * es / (p - es)
    # d/dT of eps e_s / (p - e_s) = eps p e_s' / (p - e_s)**2, e_s' from Bolton's formula
    des = es * 17.67 * 243.5 / (tc + 243.5) ** 2
    dqs = EPS * p * des / (p - es) ** 2
    a = 1.0 / (1.0 + LV / CP * dqs)
    b = a * (tl / thl) * dqs
    s = a * (qt - qs)
    return a, b, s, dqs


@pytest.mark.parametrize("qt, thl, p", HAND_POINTS)
def test_linearization_hand_points(qt: float, thl: float, p: float) -> None:
    a, b, s, dqs = _hand_linearization(qt, thl, p)
    lin = schemes.gaussian_linearization(qt, thl, p)
    assert float(lin.a) == pytest.approx(a, rel=1e-9)
    assert float(lin.b) == pytest.approx(b, rel=1e-9)
    assert float(lin.s) == pytest.approx(s, rel=1e-9)
    assert float(lin.dqs_dT) == pytest.approx(dqs, rel=1e-9)
    assert float(lin.liquid_water_temperature) == pytest.approx(
        thl * (p / 1.0e5) ** (RD / CP), rel=1e-12
    )
    assert 0.0 < float(lin.a) < 1.0


def test_linearization_signs() -> None:
    sup, sub = HAND_POINTS[0], HAND_POINTS[1]
    assert float(schemes.gaussian_linearization(*sup).s) > 0.0
    assert float(schemes.gaussian_linearization(*sub).s) < 0.0


@pytest.mark.parametrize("p, t", [(9.0e4, 281.0), (1.0e5, 300.0), (7.0e4, 260.0)])
def test_saturation_slope_against_finite_difference_and_clausius_clapeyron(
    p: float, t: float
) -> None:
    h = 1e-3
    fd = (
        float(thermo.saturation_mixing_ratio(p, t + h))
        - float(thermo.saturation_mixing_ratio(p, t - h))
    ) / (2 * h)
    got = float(thermo.saturation_mixing_ratio_slope(p, t))
    assert got == pytest.approx(fd, rel=1e-7)  # central difference, error O(h**2)
    # Clausius-Clapeyron with constant Lv, dq_s/dT ~ Lv q_s / (Rv T**2), drops the
    # p/(p - e_s) factor and Bolton's implied L(T): within 3 % (common approximation).
    cc = LV * float(thermo.saturation_mixing_ratio(p, t)) / (RV * t * t)
    assert got == pytest.approx(cc, rel=3e-2)


def test_sigma_s_hand_point() -> None:
    qt, thl, p = HAND_POINTS[0]
    a, b, _, _ = _hand_linearization(qt, thl, p)
    var_qt, var_thl, cov = 4.0e-7, 0.09, -1.2e-4
    expected = math.sqrt(a * a * var_qt - 2 * a * b * cov + b * b * var_thl)  # no factor 1/2
    assert float(schemes.saturation_excess_std(a, b, var_qt, var_thl, cov)) == pytest.approx(
        expected, rel=1e-12
    )


def test_erf_formula_against_scipy_norm_cdf() -> None:
    q = np.linspace(-8.0, 8.0, 321)
    sigma = np.full_like(q, 2.5e-4)
    got = schemes.gaussian_cloud_fraction(q * sigma, sigma)
    # relative tolerance holds in the far lower tail too (computed with erfc)
    np.testing.assert_allclose(got, norm.cdf(q), rtol=1e-13, atol=0.0)


def test_zero_sigma_limit_and_nan() -> None:
    s = np.array([1e-4, -1e-4, 0.0, np.nan, 1e-4, np.nan, 1e-4])
    sig = np.array([0.0, 0.0, 0.0, 0.0, np.nan, 1e-4, -1e-4])
    got = schemes.gaussian_cloud_fraction(s, sig)
    np.testing.assert_array_equal(got[:3], [1.0, 0.0, 0.0])
    assert np.all(np.isnan(got[3:]))
    # the limit is approached continuously away from s == 0
    assert float(schemes.gaussian_cloud_fraction(1e-4, 1e-12)) == 1.0
    assert float(schemes.gaussian_cloud_fraction(-1e-4, 1e-12)) == 0.0


def test_from_moments_nan_and_invalid_statistics() -> None:
    base = [9.0e-3, 290.0, 9.0e4, 4.0e-7, 0.09, -1.0e-4]
    for i in range(6):
        args = list(base)
        args[i] = np.nan
        assert np.isnan(schemes.gaussian_cloud_fraction_from_moments(*args)), i
    # negative variance, and correlations beyond -1 and +1 (not a covariance): NaN
    assert np.isnan(schemes.gaussian_cloud_fraction_from_moments(*base[:3], -1e-7, 0.09, 0.0))
    assert np.isnan(schemes.gaussian_cloud_fraction_from_moments(*base[:3], 4e-7, 0.09, -1e-3))
    assert np.isnan(schemes.gaussian_cloud_fraction_from_moments(*base[:3], 4e-7, 0.09, 1e-3))
    # perfectly correlated fluctuations that cancel in s: sigma_s is 0 (or round-off), not NaN
    lin = schemes.gaussian_linearization(*base[:3])
    k = float(lin.b / lin.a)  # q_t' = k theta_l' gives s' = 0
    sig = schemes.saturation_excess_std(lin.a, lin.b, k * k * 0.09, 0.09, k * 0.09)
    assert float(sig) == pytest.approx(0.0, abs=1e-15)
    # no variability: all-or-nothing
    assert float(schemes.gaussian_cloud_fraction_from_moments(9.5e-3, 290.0, 9e4, 0, 0, 0)) == 1
    assert float(schemes.gaussian_cloud_fraction_from_moments(6e-3, 290.0, 9e4, 0, 0, 0)) == 0


def test_from_moments_vectorized_float64() -> None:
    qt = np.linspace(5e-3, 1.1e-2, 12, dtype=np.float32).reshape(3, 4)
    c = schemes.gaussian_cloud_fraction_from_moments(qt, 290.0, 9.0e4, 4e-7, 0.09, 0.0)
    assert c.shape == (3, 4) and c.dtype == np.float64
    assert np.all(np.diff(c.ravel()) >= 0.0) and np.all((c >= 0) & (c <= 1))


# --- Monte Carlo -------------------------------------------------------------------------

N_DRAWS = 200_000
TARGETS = np.linspace(0.05, 0.95, 10)


def _blocks(sd_qt: float, sd_thl: float, seed: int):
    """Yield (block statistics, draws) with the target fractions, correlation alternating."""
    rng = np.random.default_rng(seed)
    p, thl = 9.0e4, 290.0
    lin = schemes.gaussian_linearization(0.0, thl, p)  # a, b, q_s do not depend on q_t
    for k, target in enumerate(TARGETS):
        corr = (-0.6, 0.3)[k % 2]
        cov = corr * sd_qt * sd_thl
        sigma = float(schemes.saturation_excess_std(lin.a, lin.b, sd_qt**2, sd_thl**2, cov))
        qt_mean = float(lin.saturation_mixing_ratio) + norm.ppf(target) * sigma / float(lin.a)
        draws = rng.multivariate_normal(
            [qt_mean, thl], [[sd_qt**2, cov], [cov, sd_thl**2]], size=N_DRAWS
        )
        stats = (qt_mean, thl, p, sd_qt**2, sd_thl**2, cov)
        yield stats, draws[:, 0], draws[:, 1]


def test_monte_carlo_linearized_excess() -> None:
    for stats, qt, thl in _blocks(sd_qt=5e-4, sd_thl=0.4, seed=20240601):
        c = float(schemes.gaussian_cloud_fraction_from_moments(*stats))
        lin = schemes.gaussian_linearization(*stats[:3])
        # s_i = s + a q_t' - b theta_l' for each draw (fluctuations about the block means)
        s_i = float(lin.s) + float(lin.a) * (qt - stats[0]) - float(lin.b) * (thl - stats[1])
        frac = float(np.mean(s_i > 0.0))
        se = math.sqrt(c * (1.0 - c) / N_DRAWS)
        assert abs(frac - c) <= 4.0 * se, (stats, frac, c)  # 4 binomial standard errors
    assert 0.04 < TARGETS[0] and TARGETS[-1] < 0.96


def test_monte_carlo_exact_condition_small_variance() -> None:
    """Without linearizing: a draw is cloudy iff saturation adjustment leaves liquid."""
    sd_qt, sd_thl = 2e-4, 0.15
    p = 9.0e4
    pi = float(thermo.exner(p))
    for stats, qt, thl in _blocks(sd_qt=sd_qt, sd_thl=sd_thl, seed=7):
        c = float(schemes.gaussian_cloud_fraction_from_moments(*stats))
        _, _, qc = thermo.saturation_adjustment(thl, qt, p)
        cloudy = qc > 0.0
        # the exact condition is q_t > q_s(T_l) of the draw (at the cloud edge T = T_l)
        edge = np.abs(qt - thermo.saturation_mixing_ratio(p, thl * pi)) < 1e-12
        np.testing.assert_array_equal(
            cloudy[~edge], (qt > thermo.saturation_mixing_ratio(p, thl * pi))[~edge]
        )
        frac = float(np.mean(cloudy))
        se = math.sqrt(c * (1.0 - c) / N_DRAWS)
        # Allowance for the neglected curvature of q_s: the mean of
        # (1/2) q_s'' (Pi theta_l')**2, times a, over sigma_s, times the largest Gaussian
        # density 0.4, doubled for margin.
        lin = schemes.gaussian_linearization(*stats[:3])
        tl = float(lin.liquid_water_temperature)
        h = 0.01
        d2 = (
            float(thermo.saturation_mixing_ratio_slope(p, tl + h))
            - float(thermo.saturation_mixing_ratio_slope(p, tl - h))
        ) / (2 * h)
        sigma = float(schemes.saturation_excess_std(lin.a, lin.b, stats[3], stats[4], stats[5]))
        curvature = 2.0 * 0.4 * float(lin.a) * 0.5 * d2 * pi * pi * sd_thl**2 / sigma
        assert abs(frac - c) <= 4.0 * se + curvature, (stats, frac, c, curvature)


def test_compiled_chain_from_sums_matches_the_reference() -> None:
    # the compiled per-cell chain against the numpy chain above (same formulas)
    from lesprep.schemes import gaussian_cloud_fraction_from_sums

    rng = np.random.default_rng(8)
    shape = (4, 6, 5)
    n = 16
    qt = rng.uniform(6e-3, 1.4e-2, shape)
    thl = rng.uniform(283.0, 292.0, shape)
    p = rng.uniform(85000.0, 100000.0, shape)
    sq, st = rng.uniform(0.0, 2e-3, shape), rng.uniform(0.0, 0.6, shape)
    rho = rng.uniform(-0.9, 0.9, shape)
    m2q, m2t = n * sq**2, n * st**2
    c = n * rho * sq * st
    m2q[0, 0, 0] = 0.0  # sigma_s may be 0 where both variances are
    m2t[0, 0, 0] = 0.0
    c[0, 0, 0] = 0.0
    c[1, 1, 1] = 2.0 * np.sqrt(m2q[1, 1, 1] * m2t[1, 1, 1])  # not a covariance: NaN
    fast = np.empty(shape, dtype=np.float64)
    ref = np.empty(shape, dtype=np.float64)
    args = (qt, thl, p, m2q, m2t, c, n)
    gaussian_cloud_fraction_from_sums(*args, out=fast, engine="numba")
    gaussian_cloud_fraction_from_sums(*args, out=ref, engine="numpy")
    assert np.isnan(fast[1, 1, 1]) and np.isnan(ref[1, 1, 1])
    np.testing.assert_allclose(fast, ref, rtol=1e-10, atol=1e-14)
    assert fast[0, 0, 0] in (0.0, 1.0)


def _per_cell_chain():
    """The compiled chain written one cell at a time, erfc called for every cell: the
    plain form of the blocked kernel (the same operations on the same operands)."""
    numba = pytest.importorskip("numba")
    lv_cp, eps = thermo.LV / thermo.CP, thermo.EPS
    p0, kappa, t0 = thermo.P0, thermo.KAPPA, thermo.T0

    @numba.njit(error_model="numpy")
    def chain(qt, thl, p, m2q, m2t, cqt, n, out, qs_out):
        for i in range(out.size):
            pi = (p[i] / p0) ** kappa
            tc = thl[i] * pi - t0
            es = 611.2 * np.exp(17.67 * tc / (tc + 243.5))
            dry = max(p[i] - es, 1e-3)
            qs = eps * es / dry
            qs_out[i] = qs
            dqs = qs * p[i] / dry * (17.67 * 243.5 / (tc + 243.5) ** 2)
            a = 1.0 / (1.0 + lv_cp * dqs)
            b = a * pi * dqs
            s = a * (qt[i] - qs)
            vq, vt, cv = m2q[i] / n, m2t[i] / n, cqt[i] / n
            if vq < 0.0 or vt < 0.0 or cv * cv > vq * vt * (1.0 + 1e-6):
                out[i] = np.nan
                continue
            sig = math.sqrt(max(a * a * vq - 2.0 * a * b * cv + b * b * vt, 0.0))
            if sig == 0.0:
                out[i] = 1.0 if s > 0.0 else (0.0 if s <= 0.0 else np.nan)
            else:
                out[i] = 0.5 * math.erfc(-(s / sig) / math.sqrt(2.0))

    return chain


def test_blocked_kernel_equals_the_per_cell_chain_bit_for_bit() -> None:
    # spreads over twelve decades put -s/sigma_s on both sides of the arguments where
    # the kernel stores 0 or 1 without erfc; plus sigma_s = 0 with s > 0, s < 0 and s = 0
    # exactly, NaN inputs, a non-covariance, and a size that is not a whole number of blocks
    pytest.importorskip("numba")
    chain = _per_cell_chain()
    rng = np.random.default_rng(11)
    size = 3 * 512 + 77
    n = 16.0
    qt = rng.uniform(2e-3, 1.6e-2, size)
    thl = rng.uniform(280.0, 295.0, size)
    p = rng.uniform(80000.0, 101000.0, size)
    sq = 10.0 ** rng.uniform(-14.0, -2.0, size)
    st = 10.0 ** rng.uniform(-10.0, 0.0, size)
    rho = rng.uniform(-0.95, 0.95, size)
    m2q, m2t, c = n * sq**2, n * st**2, n * rho * sq * st
    m2q[:6] = m2t[:6] = c[:6] = 0.0  # sigma_s = 0
    qs = np.empty(size)
    chain(qt, thl, p, m2q, m2t, c, n, np.empty(size), qs)
    qt[0], qt[1], qt[2] = qs[0] * 1.01, qs[1] * 0.99, qs[2]  # s > 0, s < 0, s = 0 exactly
    qt[3], p[7], thl[8] = np.nan, np.nan, np.nan
    c[9] = 3.0 * np.sqrt(m2q[9] * m2t[9])  # not a covariance
    ref = np.empty(size)
    chain(qt, thl, p, m2q, m2t, c, n, ref, qs)
    fast = np.empty(size)
    schemes.gaussian_cloud_fraction_from_sums(qt, thl, p, m2q, m2t, c, 16, out=fast, engine="numba")
    x = ~np.isnan(ref)
    np.testing.assert_array_equal(np.isnan(fast), ~x)
    np.testing.assert_array_equal(fast[x].view(np.int64), ref[x].view(np.int64))  # same bits
    assert (ref[0], ref[1], ref[2]) == (1.0, 0.0, 0.0)
    assert np.isnan(ref[[3, 7, 8, 9]]).all()
    # both skipped ranges and the erfc range are exercised
    assert (ref[x] == 0.0).sum() > 50 and (ref[x] == 1.0).sum() > 50
    assert ((ref[x] > 0.0) & (ref[x] < 1.0)).sum() > 50


def test_erfc_is_exactly_0_and_2_where_the_kernel_skips_it() -> None:
    # scipy.special.erfc (Cephes) and Python's math.erfc: outside references for the two
    # cut-offs of lesprep.schemes (the float64 value there is exactly 0 or 2)
    from scipy.special import erfc

    far = np.linspace(schemes.ERFC_ZERO_BEYOND, 60.0, 100001)
    assert np.all(erfc(far) == 0.0) and all(math.erfc(v) == 0.0 for v in far[::97])
    near = np.linspace(-60.0, -schemes.ERFC_TWO_BEYOND, 100001)
    assert np.all(erfc(near) == 2.0) and all(math.erfc(v) == 2.0 for v in near[::97])
