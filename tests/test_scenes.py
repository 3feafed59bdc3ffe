"""Tests of lesprep.report.scenes against closed-form results, numpy and scipy.stats."""

from __future__ import annotations

import math

import numpy as np
import pytest
import scipy.stats
import xarray as xr

from lesprep.errors import GridError, InputError, NonFiniteError
from lesprep.report.scenes import (
    SceneDescriptors,
    describe_case,
    describe_scene,
    peak_wavelength,
    radial_power_spectrum,
)

DX = 50.0  # m
N = 64
L = N * DX  # 3200 m


def _wave(mx: int, my: int, ny: int = N, nx: int = N, amplitude: float = 1.0) -> np.ndarray:
    """cos(kx x + ky y) with integer mode numbers mx, my along x, y (periodic)."""
    y = np.arange(ny)[:, None] * DX
    x = np.arange(nx)[None, :] * DX
    return amplitude * np.cos(2 * np.pi * (mx * x / (nx * DX) + my * y / (ny * DX)))


# |k| / k0 = sqrt(mx**2 + my**2): (3, 4) -> 5 and (5, 12) -> 13 are Pythagorean triples,
# so the non-axis-aligned waves fall exactly on an integer shell.
@pytest.mark.parametrize(
    ("mx", "my", "shell"),
    [(4, 0, 4), (0, 7, 7), (3, 4, 5), (5, 12, 13), (2, 2, 3), (16, 0, 16)],
)
def test_sinusoid_peak_wavelength(mx: int, my: int, shell: int) -> None:
    # Expected: wavelength of cos(k . r) is 2 pi / |k|; rounded to the shell, L / shell.
    wavelength, at_domain = peak_wavelength(_wave(mx, my), DX)
    assert wavelength == pytest.approx(L / shell, rel=1e-12)
    assert at_domain is False


def test_sinusoid_power_in_one_shell() -> None:
    # A unit cosine has population variance 1/2 (numpy's var as reference); all of it sits
    # in the shell of its wavenumber.
    field = _wave(3, 4, amplitude=2.0)
    k, power = radial_power_spectrum(field, DX)
    assert k[4] == pytest.approx(5 * 2 * np.pi / L, rel=1e-12)
    assert power[4] == pytest.approx(np.var(field), rel=1e-12)
    assert np.delete(power, 4) == pytest.approx(0.0, abs=1e-20)


def test_domain_scale_wave_sets_peak_at_domain() -> None:
    # Lowest resolved wavenumber: one wavelength over the domain, 2 pi / L.
    for mx, my in [(1, 0), (0, 1), (1, 1)]:  # (1, 1) has |k| = sqrt(2) k0 -> shell 1
        wavelength, at_domain = peak_wavelength(_wave(mx, my) + 0.3 * _wave(6, 0), DX)
        assert at_domain is True
        assert wavelength == pytest.approx(L, rel=1e-12)


def test_wavenumbers_are_integer_shells_of_fundamental() -> None:
    k, power = radial_power_spectrum(np.random.default_rng(0).normal(size=(N, N)), DX)
    k0 = 2 * np.pi / L
    assert k == pytest.approx(k0 * np.arange(1, k.size + 1), rel=1e-12)
    # corners of the (N/2, N/2) square: round(sqrt(2) * 32) = 45 shells
    assert k.size == round(math.sqrt(2) * N / 2)
    assert power.shape == k.shape


@pytest.mark.parametrize("shape", [(N, N), (32, 32), (33, 33), (24, 40)])
def test_parseval_sum_equals_variance(shape: tuple[int, int]) -> None:
    # Parseval: sum of the spectrum equals the population variance (numpy.var, ddof=0).
    field = np.random.default_rng(1).gamma(2.0, 0.05, size=shape)
    _, power = radial_power_spectrum(field, DX)
    assert power.sum() == pytest.approx(np.var(field), rel=1e-12)
    assert np.all(power >= 0.0)


def test_rectangular_domain_uses_shorter_side() -> None:
    # ny=32, nx=64: fundamental 2 pi / (32 dx). A wave with 8 periods along x has
    # wavelength 64 dx / 8 = 8 dx, i.e. shell 4 of the shorter side.
    field = _wave(8, 0, ny=32, nx=64)
    k, _ = radial_power_spectrum(field, DX)
    assert k[0] == pytest.approx(2 * np.pi / (32 * DX), rel=1e-12)
    wavelength, at_domain = peak_wavelength(field, DX)
    assert wavelength == pytest.approx(8 * DX, rel=1e-12)
    assert at_domain is False
    # one period over the long side (64 dx) is longer than the short side: shell 1
    wavelength, at_domain = peak_wavelength(_wave(1, 0, ny=32, nx=64), DX)
    assert at_domain is True
    assert wavelength == pytest.approx(32 * DX, rel=1e-12)


def test_constant_field_has_no_peak() -> None:
    _, power = radial_power_spectrum(np.full((16, 16), 0.1), DX)
    assert np.all(power == 0.0)
    wavelength, at_domain = peak_wavelength(np.full((16, 16), 0.1), DX)
    assert math.isnan(wavelength)
    assert at_domain is False


def test_two_valued_field_skewness_closed_form() -> None:
    # A 0/1 field with a fraction p of ones is a Bernoulli sample: g1 = (1 - 2p) / sqrt(p q)
    # (textbook Bernoulli skewness); mean p, population std sqrt(p q).
    lwp = np.zeros((16, 16))
    lwp[:4, :] = 0.2  # p = 1/4, scaled by 0.2 (skewness is scale-free)
    p = 0.25
    d = describe_scene(lwp, lwp > 0.0, DX)
    assert d.lwp_skew == pytest.approx((1 - 2 * p) / math.sqrt(p * (1 - p)), rel=1e-12)
    assert d.lwp_skew == pytest.approx(scipy.stats.skew(lwp, axis=None, bias=True), rel=1e-12)
    assert d.lwp_mean == pytest.approx(0.2 * p, rel=1e-12)
    assert d.lwp_std == pytest.approx(0.2 * math.sqrt(p * (1 - p)), rel=1e-12)


def test_random_field_moments_match_numpy_and_scipy() -> None:
    rng = np.random.default_rng(2)
    lwp = rng.exponential(0.08, size=(N, N))
    cloudy = lwp > 0.05
    d = describe_scene(lwp, cloudy, DX)
    assert isinstance(d, SceneDescriptors)
    assert d.lwp_mean == pytest.approx(np.mean(lwp), rel=1e-12)
    assert d.lwp_std == pytest.approx(np.std(lwp, ddof=0), rel=1e-12)
    assert d.lwp_skew == pytest.approx(scipy.stats.skew(lwp, axis=None, bias=True), rel=1e-10)
    # exponential distribution has skewness 2 (textbook); a 4096-point sample is near it
    assert d.lwp_skew == pytest.approx(2.0, abs=0.3)
    assert d.cloud_cover == pytest.approx(np.mean(cloudy), rel=1e-15)
    assert isinstance(d.peak_at_domain, bool)


def test_clear_sky_conventions() -> None:
    lwp = np.zeros((16, 16))
    d = describe_scene(lwp, lwp > 0.0, DX)
    assert (d.lwp_mean, d.lwp_std, d.lwp_skew, d.cloud_cover) == (0.0, 0.0, 0.0, 0.0)
    assert math.isnan(d.peak_wavelength_m)
    assert d.peak_at_domain is False


def test_describe_case_one_row_per_time() -> None:
    rng = np.random.default_rng(3)
    data = np.stack([_wave(4, 0) + 2.0, rng.gamma(2.0, 0.05, (N, N)), np.zeros((N, N))])
    times = np.array(["2001-01-01T01", "2001-01-01T02", "2001-01-01T03"], dtype="datetime64[ns]")
    lwp = xr.DataArray(data, dims=("time", "y", "x"), coords={"time": times}, name="lwp")
    cloudy = lwp > 0.1
    frame = describe_case(lwp, cloudy, DX)
    assert list(frame.columns) == [
        "time",
        "lwp_mean",
        "lwp_std",
        "lwp_skew",
        "cloud_cover",
        "peak_wavelength_m",
        "peak_at_domain",
    ]
    assert len(frame) == 3
    assert (frame["time"].to_numpy() == times).all()
    assert frame["peak_wavelength_m"].iloc[0] == pytest.approx(L / 4, rel=1e-12)
    for i in range(3):
        expected = describe_scene(data[i], cloudy.values[i], DX)
        assert frame["lwp_std"].iloc[i] == pytest.approx(expected.lwp_std, rel=1e-15)
        assert frame["cloud_cover"].iloc[i] == pytest.approx(np.mean(cloudy.values[i]))
    # dims in another order are transposed to (time, y, x); a dask-backed mask works too
    again = describe_case(lwp.transpose("y", "time", "x"), cloudy.chunk({"time": 1}), DX)
    assert again.drop(columns="time").equals(frame.drop(columns="time"))


def test_input_errors() -> None:
    field = np.zeros((8, 8))
    with pytest.raises(GridError, match="dx"):
        radial_power_spectrum(field, 0.0)
    with pytest.raises(GridError, match="2-D"):
        radial_power_spectrum(np.zeros(8), DX)
    bad = field.copy()
    bad[0, 0] = np.nan
    with pytest.raises(NonFiniteError, match="1 NaN"):
        peak_wavelength(bad, DX)
    with pytest.raises(InputError, match="boolean"):
        describe_scene(field, field.astype(int), DX)
    with pytest.raises(GridError, match="shape"):
        describe_scene(field, np.zeros((8, 4), dtype=bool), DX)
    lwp = xr.DataArray(np.zeros((2, 8, 8)), dims=("time", "y", "x"))
    with pytest.raises(GridError, match="dims"):
        describe_case(lwp, lwp.isel(time=0) > 0, DX)
