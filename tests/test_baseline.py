"""Tests of lesprep.schemes against hand-computed values of the Sundqvist et al. (1989)
formula C = 1 - sqrt((1 - RH) / (1 - RHc)) and numpy hand computations."""

from __future__ import annotations

import math

import dask.array as da
import numpy as np
import pytest
import xarray as xr

from lesprep.errors import ConfigError, GridError, NonFiniteError
from lesprep.report.skill import baseline_errors
from lesprep.schemes import sundqvist_cloud_fraction


@pytest.mark.parametrize(
    ("rh", "rhc", "expected"),
    [
        (0.9, 0.8, 1 - math.sqrt(0.5)),  # 0.292893...; (1-0.9)/(1-0.8) = 0.5
        (0.8, 0.8, 0.0),  # at RHc: no cloud
        (0.96, 0.8, 1 - math.sqrt(0.2)),  # 0.552786...; 0.04/0.2 = 0.2
        (1.0, 0.8, 1.0),  # saturation
        (1.02, 0.8, 1.0),  # supersaturation capped to 1
        (0.5, 0.8, 0.0),  # below RHc
        (0.0, 0.8, 0.0),
        (0.85, 0.7, 1 - math.sqrt(0.5)),  # 0.15/0.3 = 0.5
        (0.75, 0.0, 1 - math.sqrt(0.25)),  # RHc = 0: C = 1 - sqrt(1 - RH) = 0.5
    ],
)
def test_hand_computed_values(rh: float, rhc: float, expected: float) -> None:
    assert float(sundqvist_cloud_fraction(rh, rh_critical=rhc)) == pytest.approx(
        expected, rel=1e-12, abs=1e-15
    )


def test_quoted_decimals() -> None:
    # decimals of 1 - sqrt(0.5) and 1 - sqrt(0.2), from a hand calculator
    c = sundqvist_cloud_fraction(np.array([0.9, 0.96]))
    assert c == pytest.approx([0.2928932188, 0.5527864045], abs=1e-10)


def test_default_rh_critical_is_08() -> None:
    rh = np.array([0.79, 0.8, 0.81, 0.9])
    assert np.array_equal(sundqvist_cloud_fraction(rh), sundqvist_cloud_fraction(rh, 0.8))
    assert sundqvist_cloud_fraction(0.8) == 0.0
    assert sundqvist_cloud_fraction(0.81) > 0.0


def test_monotonic_in_rh_and_bounded() -> None:
    rh = np.linspace(0.0, 1.2, 2401)
    for rhc in (0.0, 0.6, 0.8, 0.9, 0.99):
        c = sundqvist_cloud_fraction(rh, rhc)
        assert c.dtype == np.float64
        assert np.all(np.diff(c) >= 0.0)
        assert np.all((c >= 0.0) & (c <= 1.0))
        assert np.all(c[rh <= rhc] == 0.0)
        assert np.all(c[rh >= 1.0] == 1.0)
        assert np.all(np.diff(c[(rh > rhc) & (rh < 1.0)]) > 0.0)  # strictly inside


def test_nan_propagates() -> None:
    c = sundqvist_cloud_fraction(np.array([np.nan, 0.9]))
    assert math.isnan(c[0])
    assert c[1] == pytest.approx(1 - math.sqrt(0.5))


def test_xarray_and_dask_keep_type() -> None:
    rh_np = np.array([[0.5, 0.9], [0.96, 1.02]])
    expected = sundqvist_cloud_fraction(rh_np)
    rh = xr.DataArray(rh_np, dims=("y", "x"), attrs={"units": "1"}, name="rh")
    out = sundqvist_cloud_fraction(rh)
    assert isinstance(out, xr.DataArray)
    assert out.dims == ("y", "x")
    assert out.name == "cloud_fraction"
    assert out.attrs["units"] == "1"
    np.testing.assert_allclose(out.values, expected, rtol=1e-15)

    lazy = sundqvist_cloud_fraction(rh.chunk({"y": 1}))
    assert isinstance(lazy, xr.DataArray)
    assert lazy.chunks is not None  # still dask-backed, not computed
    np.testing.assert_allclose(lazy.values, expected, rtol=1e-15)

    rh32 = rh_np.astype(np.float32)  # float32 input is promoted to float64
    raw = sundqvist_cloud_fraction(da.from_array(rh32, chunks=1))
    assert isinstance(raw, da.Array)
    assert raw.dtype == np.float64
    np.testing.assert_allclose(raw.compute(), sundqvist_cloud_fraction(rh32), rtol=1e-15)


@pytest.mark.parametrize("rhc", [-0.1, 1.0, 1.5, 80.0, float("nan"), "high", True])
def test_invalid_rh_critical(rhc: object) -> None:
    with pytest.raises(ConfigError, match="rh_critical"):
        sundqvist_cloud_fraction(0.9, rh_critical=rhc)  # type: ignore[arg-type]


def test_errors_against_numpy_hand_computation() -> None:
    rng = np.random.default_rng(4)
    target = rng.uniform(0.0, 1.0, 500)
    predicted = target + rng.normal(0.05, 0.1, 500)
    predicted[::7] = np.nan  # skipped pairs
    target[3::11] = np.nan
    keep = ~np.isnan(predicted) & ~np.isnan(target)
    diff = predicted[keep] - target[keep]
    got = baseline_errors(predicted, target)
    assert got["n"] == int(keep.sum())
    assert got["rmse"] == pytest.approx(np.sqrt(np.mean(diff**2)), rel=1e-12)
    assert got["bias"] == pytest.approx(np.mean(diff), rel=1e-12)
    assert got["mae"] == pytest.approx(np.mean(np.abs(diff)), rel=1e-12)
    assert got["bias"] > 0.0  # prediction too high on average -> positive bias


def test_errors_small_hand_example() -> None:
    # diffs (+0.3, -0.1): rmse = sqrt((0.09 + 0.01) / 2) = sqrt(0.05), bias 0.1, mae 0.2
    got = baseline_errors([0.5, 0.1, np.nan], [0.2, 0.2, 0.4])
    assert got["rmse"] == pytest.approx(math.sqrt(0.05), rel=1e-12)
    assert got["bias"] == pytest.approx(0.1, rel=1e-12)
    assert got["mae"] == pytest.approx(0.2, rel=1e-12)
    assert got["n"] == 2


def test_errors_edge_cases() -> None:
    got = baseline_errors([np.nan, 1.0], [0.0, np.nan])
    assert got["n"] == 0
    assert all(math.isnan(got[key]) for key in ("rmse", "bias", "mae"))
    with pytest.raises(GridError, match="shape"):
        baseline_errors(np.zeros(3), np.zeros(4))
    with pytest.raises(NonFiniteError, match="infinite"):
        baseline_errors([np.inf, 0.0], [0.0, 0.0])
