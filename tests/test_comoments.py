"""Tests of lesprep.scales.comoments against outside references.

References used (named beside each check): ``numpy.cov(x, y, bias=True)`` per block
(population covariance), xarray's own ``DataArray.coarsen(...).construct(...)`` and
``coarsen(...).mean()``, ``scipy.stats.pearsonr`` (a correlation computed independently of
numpy.cov), and the variance of the existing ``block_moments`` (``cov(x, x) = var(x)``).
Hierarchical results are checked against the direct computation.
"""

from __future__ import annotations

import numpy as np
import pytest
import scipy.stats
import xarray as xr
from hypothesis import given, settings
from hypothesis import strategies as st

from lesprep.errors import ConfigError, InputError, ScaleError
from lesprep.scales.comoments import (
    HAVE_NUMBA,
    BlockComoments,
    block_comoment,
    hierarchical_comoments,
    merge_comoments,
    subgrid_tke,
)
from lesprep.scales.moments import (
    block_moments,
    divisors,
    hierarchical_moments,
    plan_hierarchy,
)

ENGINES = ["numpy", pytest.param("numba", marks=pytest.mark.skipif(not HAVE_NUMBA, reason="numba"))]


# ------------------------------------------------------------------------------------
# helpers (reference side: plain numpy on explicit blocks)
# ------------------------------------------------------------------------------------


def as_blocks(a: np.ndarray, f: int) -> np.ndarray:
    """(..., ny, nx) -> (..., ny/f, nx/f, f*f) float64 copy holding each block's cells."""
    *lead, ny, nx = a.shape
    b = np.asarray(a, dtype=np.float64).reshape(*lead, ny // f, f, nx // f, f)
    b = np.moveaxis(b, -3, -2)
    return b.reshape(*lead, ny // f, nx // f, f * f)


def numpy_cov_per_block(x: np.ndarray, y: np.ndarray, f: int) -> np.ndarray:
    """``numpy.cov(xb, yb, bias=True)[0, 1]`` for every block, looped."""
    xb, yb = as_blocks(x, f), as_blocks(y, f)
    out = np.empty(xb.shape[:-1])
    for index in np.ndindex(*out.shape):
        out[index] = np.cov(xb[index], yb[index], bias=True)[0, 1]
    return out


def pair(shape, dtype=np.float64, seed=0, offset=(0.0, 0.0), scale=(1.0, 1.0), rho=0.6):
    """Two correlated random fields (gamma-skewed x, y = rho*x + noise), offset and scaled."""
    rng = np.random.default_rng(seed)
    x = rng.gamma(2.0, 1.0, size=shape) - 2.0
    y = rho * x + rng.standard_normal(shape)
    return (
        (offset[0] + scale[0] * x).astype(dtype),
        (offset[1] + scale[1] * y).astype(dtype),
    )


def assert_cov_sums_close(got, ref, x, y, f, rtol):
    """``got`` equals ``ref`` to ``rtol`` of the Cauchy--Schwarz scale sqrt(Mxx * Myy).

    A block covariance can be near zero while its round-off is set by the spreads of x and
    y, so a relative tolerance on the covariance alone would be meaningless there.
    """
    mxx = block_moments(x, f, engine="numpy").m2
    myy = block_moments(y, f, engine="numpy").m2
    scale = np.sqrt(mxx * myy)
    np.testing.assert_array_less(np.abs(got - ref), rtol * scale + 1e-300)


# ------------------------------------------------------------------------------------
# single scale against numpy / xarray / scipy
# ------------------------------------------------------------------------------------


@pytest.mark.parametrize("engine", ENGINES)
@pytest.mark.parametrize("dtype", [np.float32, np.float64])
@pytest.mark.parametrize("factor", [1, 2, 3, 4, 5, 6, 10, 15, 30])
@pytest.mark.parametrize("with_means", [False, True])
def test_block_covariance_matches_numpy_cov(engine, dtype, factor, with_means):
    x, y = pair((1, 60, 120), dtype=dtype, seed=factor)
    kw = {}
    if with_means:
        kw = {"mean_x": block_moments(x, factor).mean, "mean_y": block_moments(y, factor).mean}
    c = block_comoment(x, y, factor, engine=engine, **kw)
    assert c.dtype == np.float64 and c.shape == (1, 60 // factor, 120 // factor)
    cov = BlockComoments(factor * factor, c).covariance()
    # numpy.cov with bias=True is the population covariance (divides by n)
    ref = numpy_cov_per_block(x, y, factor)  # the same (float32) values, in float64
    np.testing.assert_allclose(cov, ref, rtol=1e-12, atol=1e-14)


@pytest.mark.parametrize("engine", ENGINES)
def test_large_factor_block_by_block_loop(engine):
    # factors above the row-wise limit of the numba kernels (32) take the block loop
    x, y = pair((2, 64, 128), dtype=np.float32, seed=3)
    c = block_comoment(x, y, 64, engine=engine)
    np.testing.assert_allclose(c / 64**2, numpy_cov_per_block(x, y, 64), rtol=1e-12)  # numpy
    c = block_comoment(x, y, 64, mean_x=block_moments(x, 64).mean, mean_y=block_moments(y, 64).mean)
    np.testing.assert_allclose(c / 64**2, numpy_cov_per_block(x, y, 64), rtol=1e-12)  # numpy


@pytest.mark.parametrize("factor", [3, 5])
def test_matches_xarray_coarsen(factor):
    x, y = pair((3, 15, 45), seed=11)
    dx = xr.DataArray(x, dims=("time", "y", "x"))
    dy = xr.DataArray(y, dims=("time", "y", "x"))
    c = block_comoment(x, y, factor)
    # xarray's coarsen(...).construct: explicit blocks, two-pass deviations, summed
    win = {"y": ("by", "wy"), "x": ("bx", "wx")}
    bx = dx.coarsen(y=factor, x=factor).construct(win)
    by = dy.coarsen(y=factor, x=factor).construct(win)
    ref = ((bx - bx.mean(("wy", "wx"))) * (by - by.mean(("wy", "wx")))).sum(("wy", "wx"))
    np.testing.assert_allclose(c, ref.transpose("time", "by", "bx").values, rtol=1e-12)
    # xarray's coarsen(...).mean(): mean of products minus product of means (fine here:
    # the data are well conditioned, mean ~ spread)
    coarse = (dx * dy).coarsen(y=factor, x=factor).mean() - (
        dx.coarsen(y=factor, x=factor).mean() * dy.coarsen(y=factor, x=factor).mean()
    )
    np.testing.assert_allclose(c / factor**2, coarse.values, rtol=1e-10, atol=1e-13)


@pytest.mark.parametrize("engine", ENGINES)
@pytest.mark.parametrize("dtype", [np.float32, np.float64])
def test_cov_of_a_field_with_itself_is_its_variance(engine, dtype):
    x, _ = pair((2, 24, 36), dtype=dtype, seed=5, offset=(290.0, 0.0))
    for f in (2, 3, 12):
        c = block_comoment(x, x, f, engine=engine)
        bm = block_moments(x, f, engine=engine)  # the existing M2 (corrected two-pass)
        np.testing.assert_allclose(c, bm.m2, rtol=1e-12, atol=1e-12 * bm.m2.max())
        np.testing.assert_allclose(c / f**2, bm.variance(), rtol=1e-12, atol=1e-16)


@pytest.mark.parametrize("engine", ENGINES)
def test_correlation_matches_scipy_pearsonr(engine):
    x, y = pair((1, 16, 16), seed=2)
    c = block_comoment(x, y, 16, engine=engine)[0, 0, 0]
    mxx = block_moments(x, 16).m2[0, 0, 0]
    myy = block_moments(y, 16).m2[0, 0, 0]
    r = scipy.stats.pearsonr(x.ravel(), y.ravel()).statistic  # scipy
    np.testing.assert_allclose(c / np.sqrt(mxx * myy), r, rtol=1e-12)


@pytest.mark.parametrize("engine", ENGINES)
@pytest.mark.parametrize("with_means", [False, True])
def test_accurate_for_offset_data(engine, with_means):
    # T ~ 1e4 with a spread of ~1e-2: the one-pass mean(x*y) - mean(x)*mean(y) loses
    # about 8 of its 16 digits here; the two-pass co-moment must not.
    base_x, base_y = pair((2, 32, 48), seed=9, scale=(1e-2, 1e-2))
    x, y = base_x + 1e4, base_y + 1e4
    for f in (2, 4, 16):
        kw = {}
        if with_means:
            kw = {"mean_x": block_moments(x, f).mean, "mean_y": block_moments(y, f).mean}
        cov = block_comoment(x, y, f, engine=engine, **kw) / f**2
        ref = numpy_cov_per_block(x, y, f)  # numpy.cov(bias=True) subtracts the mean first
        assert_cov_sums_close(cov, ref, x, y, f, 1e-11 / f**2)
        naive = (as_blocks(x * y, f).mean(-1)) - as_blocks(x, f).mean(-1) * as_blocks(y, f).mean(-1)
        assert np.abs(naive - ref).max() > 1e3 * np.abs(cov - ref).max()


@pytest.mark.parametrize("engine", ENGINES)
def test_float32_temperature_and_humidity(engine):
    # a float32 temperature near 290 K with a 0.1 K spread and a humidity near 1e-2
    x, y = pair((2, 64, 64), dtype=np.float32, seed=4, offset=(290.0, 1e-2), scale=(0.1, 1e-4))
    f = 8
    mx, my = hierarchical_moments(x, [f]), hierarchical_moments(y, [f])
    got = hierarchical_comoments(x, y, [f], mx, my, engine=engine)[f].covariance()
    ref = numpy_cov_per_block(x, y, f)  # numpy.cov on the same float32 values in float64
    np.testing.assert_allclose(got, ref, rtol=1e-10)


@pytest.mark.parametrize("engine", ENGINES)
def test_mixed_dtypes_and_one_given_mean(engine):
    x, y = pair((2, 12, 18), seed=6)
    x32 = x.astype(np.float32)
    ref = numpy_cov_per_block(x32, y, 3) * 9  # numpy.cov(bias=True) times n
    np.testing.assert_allclose(block_comoment(x32, y, 3, engine=engine), ref, rtol=1e-12)
    mx = block_moments(x32, 3).mean
    got = block_comoment(x32, y, 3, mean_x=mx, engine=engine)
    np.testing.assert_allclose(got, ref, rtol=1e-12)
    got = block_comoment(x32, y, 3, mean_y=block_moments(y, 3).mean, engine=engine)
    np.testing.assert_allclose(got, ref, rtol=1e-12)


@pytest.mark.parametrize("engine", ENGINES)
def test_constant_block_has_zero_covariance(engine):
    x = np.full((2, 8, 8), 300.15, dtype=np.float32)
    _, y = pair((2, 8, 8), seed=1)
    for f in (2, 8):
        assert np.all(block_comoment(x, y, f, engine=engine) == 0.0)  # numpy.cov: exactly 0


def test_subgrid_tke_is_half_the_trace():
    rng = np.random.default_rng(0)
    u, v, w = rng.standard_normal((3, 2, 16, 16)) * np.array([2.0, 1.5, 0.5])[:, None, None, None]
    var = [block_moments(c, 4).variance() for c in (u, v, w)]
    tke = subgrid_tke(*var)
    # numpy.var per block, population (ddof=0)
    ref = 0.5 * sum(as_blocks(c, 4).var(axis=-1) for c in (u, v, w))
    np.testing.assert_allclose(tke, ref, rtol=1e-13)
    assert subgrid_tke(np.float32(1.0), 2.0, 3.0).dtype == np.float64


# ------------------------------------------------------------------------------------
# merges and hierarchy
# ------------------------------------------------------------------------------------


@pytest.mark.parametrize(
    ("shape", "factors"),
    [
        ((2, 48, 96), [2, 4, 8, 16]),
        ((2, 36, 72), [3, 6, 12]),
        ((3, 36, 24), [2, 3, 6]),
        ((2, 64, 128), [2, 4, 8, 16, 32, 64]),
        ((2, 60, 60), [4, 10, 20, 60]),
    ],
)
@pytest.mark.parametrize("dtype", [np.float32, np.float64])
@pytest.mark.parametrize("engine", ENGINES)
def test_hierarchical_equals_direct(engine, dtype, shape, factors):
    x, y = pair(shape, dtype=dtype, seed=sum(factors), offset=(290.0, 0.01), scale=(1.0, 1e-3))
    mx = hierarchical_moments(x, factors, engine=engine)
    my = hierarchical_moments(y, factors, engine=engine)
    res = hierarchical_comoments(x, y, factors, mx, my, engine=engine)
    assert list(res) == sorted(factors)
    assert plan_hierarchy(factors)[max(factors)] is not None  # something was merged
    for f in factors:
        assert res[f].count == f * f
        direct = block_comoment(x, y, f, engine=engine)
        assert_cov_sums_close(res[f].cov_sum, direct, x, y, f, 1e-12)
        np.testing.assert_allclose(res[f].covariance(), numpy_cov_per_block(x, y, f), rtol=1e-9)


@pytest.mark.parametrize("engine", ENGINES)
@pytest.mark.parametrize("k", [2, 3, 12])
def test_merge_comoments_equals_direct(engine, k):
    x, y = pair((3, 36, 72), dtype=np.float32, seed=k)
    child = BlockComoments(9, block_comoment(x, y, 3, engine=engine))
    mx, my = block_moments(x, 3).mean, block_moments(y, 3).mean
    merged = merge_comoments(child, mx, my, k, engine=engine)
    assert merged.count == 9 * k * k
    assert_cov_sums_close(merged.cov_sum, block_comoment(x, y, 3 * k), x, y, 3 * k, 1e-12)
    # k larger than the row-wise limit of the numba kernel (merging factor-1 blocks)
    fine = BlockComoments(1, np.zeros(x.shape))
    big = merge_comoments(fine, x, y, 36, engine=engine)
    np.testing.assert_allclose(big.covariance(), numpy_cov_per_block(x, y, 36), rtol=1e-12)


SIZES = [12, 24, 30, 36, 40, 48, 60]


@settings(max_examples=30, deadline=None)
@given(
    size=st.sampled_from(SIZES),
    widen=st.sampled_from([1, 2]),
    lead=st.lists(st.integers(1, 3), max_size=2),
    picks=st.lists(st.integers(0, 20), min_size=1, max_size=5),
    kind=st.sampled_from(["normal", "sparse", "offset"]),
    seed=st.integers(0, 2**31 - 1),
    engine=st.sampled_from(["numba", "numpy"] if HAVE_NUMBA else ["numpy"]),
)
def test_property_hierarchical_equals_direct(size, widen, lead, picks, kind, seed, engine):
    divs = divisors(size)
    factors = sorted({divs[i % len(divs)] for i in picks})
    shape = (*lead, size, size * widen)
    rng = np.random.default_rng(seed)
    x = rng.standard_normal(shape)
    y = 0.5 * x + rng.standard_normal(shape)
    if kind == "sparse":  # mostly zero, like cloud water: many constant blocks
        y = np.where(rng.random(shape) < 0.1, rng.exponential(1e-4, shape), 0.0)
    elif kind == "offset":
        x, y = x + 1e3, y - 1e3
    mx = hierarchical_moments(x, factors, engine=engine)
    my = hierarchical_moments(y, factors, engine=engine)
    res = hierarchical_comoments(x, y, factors, mx, my, engine=engine)
    assert list(res) == factors
    for f in factors:
        direct = block_comoment(x, y, f, engine=engine)
        assert_cov_sums_close(res[f].cov_sum, direct, x, y, f, 1e-11)
        # Cauchy--Schwarz: |cov| <= sqrt(var_x var_y), up to round-off
        bound = np.sqrt(mx[f].m2 * my[f].m2)
        assert np.all(np.abs(res[f].cov_sum) <= bound * (1 + 1e-12) + 1e-300)


@pytest.mark.skipif(not HAVE_NUMBA, reason="numba not importable")
@pytest.mark.parametrize("dtype", [np.float32, np.float64])
def test_numba_engine_equals_numpy_engine(dtype):
    x, y = pair((2, 3, 60, 120), dtype=dtype, seed=21, offset=(2.0, -1.0))
    factors = [2, 3, 4, 12, 20, 60]
    mx, my = hierarchical_moments(x, factors), hierarchical_moments(y, factors)
    fast = hierarchical_comoments(x, y, factors, mx, my, engine="numba")
    ref = hierarchical_comoments(x, y, factors, mx, my, engine="numpy")
    for f in factors:
        assert_cov_sums_close(fast[f].cov_sum, ref[f].cov_sum, x, y, f, 1e-13)
    for f in (2, 5, 60):  # direct, fused first pass, including the block-by-block loop
        d_fast = block_comoment(x, y, f, engine="numba")
        d_ref = block_comoment(x, y, f, engine="numpy")
        assert_cov_sums_close(d_fast, d_ref, x, y, f, 1e-13)


# ------------------------------------------------------------------------------------
# input layouts and errors
# ------------------------------------------------------------------------------------


@pytest.mark.parametrize("engine", ENGINES)
def test_non_contiguous_and_foreign_inputs(engine):
    x, y = pair((3, 2, 24, 24), dtype=np.float32, seed=8)
    xt, yt = x.transpose(1, 0, 2, 3), y.transpose(1, 0, 2, 3)  # leading axes swapped
    ref = block_comoment(np.ascontiguousarray(xt), np.ascontiguousarray(yt), 4, engine="numpy")
    np.testing.assert_allclose(block_comoment(xt, yt, 4, engine=engine), ref, rtol=1e-13)
    mx = block_moments(xt, 4).mean
    my = block_moments(yt, 4).mean
    res = hierarchical_comoments(
        xt,
        yt,
        [4, 8],
        {4: block_moments(xt, 4), 8: block_moments(xt, 8)},
        {4: block_moments(yt, 4), 8: block_moments(yt, 8)},
        engine=engine,
    )
    np.testing.assert_allclose(res[4].cov_sum, ref, rtol=1e-12)
    got = block_comoment(xt, yt, 4, mean_x=mx, mean_y=my, engine=engine)
    np.testing.assert_allclose(got, ref, rtol=1e-12)
    swapped = x.astype(x.dtype.newbyteorder(">"))  # big-endian, as netCDF may give
    np.testing.assert_allclose(
        block_comoment(swapped, y, 6, engine=engine), block_comoment(x, y, 6), rtol=1e-13
    )


def test_invalid_inputs():
    x = np.zeros((2, 8, 8))
    with pytest.raises(InputError):
        block_comoment(x, np.zeros((2, 8, 4)), 2)
    with pytest.raises(ScaleError):
        block_comoment(x, x, 3)
    with pytest.raises(InputError):
        block_comoment(x, x, 2, mean_x=np.zeros((2, 8, 8)))
    with pytest.raises(InputError):
        block_comoment(x, np.zeros((2, 8, 8), dtype=complex), 2)
    with pytest.raises(ConfigError):
        block_comoment(x, x, 2, engine="gpu")
    with pytest.raises(InputError):
        merge_comoments(np.zeros((4, 4)), np.zeros((4, 4)), np.zeros((4, 4)), 2)
    child = BlockComoments(4, np.zeros((2, 4, 4)))
    with pytest.raises(ScaleError):
        merge_comoments(child, np.zeros((2, 4, 4)), np.zeros((2, 4, 4)), 3)
    with pytest.raises(InputError):
        merge_comoments(child, np.zeros((2, 4, 4)), np.zeros((2, 2, 2)), 2)
    with pytest.raises(InputError):
        BlockComoments(0, np.zeros(2))
    mom = hierarchical_moments(x, [2])
    with pytest.raises(InputError, match="factor 4"):  # the moments lack a factor
        hierarchical_comoments(x, x, [2, 4], mom, mom)
    with pytest.raises(InputError, match="count"):  # moments of other blocks
        hierarchical_comoments(x, x, [4], {4: mom[2]}, {4: mom[2]})
    assert hierarchical_comoments(x, x, [], {}, {}) == {}
    # factor 1: single cells have no deviations (numpy.cov of one point, bias=True, is 0)
    x, y = pair((2, 8, 8), seed=0)
    res = hierarchical_comoments(x, y, [1, 4], {4: block_moments(x, 4)}, {4: block_moments(y, 4)})
    assert res[1].count == 1 and np.all(res[1].cov_sum == 0.0) and res[1].shape == x.shape
    np.testing.assert_allclose(res[4].covariance(), numpy_cov_per_block(x, y, 4), rtol=1e-12)
    assert block_comoment(np.zeros((0, 4, 4)), np.zeros((0, 4, 4)), 2).shape == (0, 2, 2)


@pytest.mark.skipif(not HAVE_NUMBA, reason="numba is not importable")
@pytest.mark.parametrize(
    ("shape", "factors"),
    [
        ((3, 72, 144), [2, 3, 4, 6, 12, 36]),
        ((2, 81, 81), [1, 3, 9, 27, 81]),
        ((4, 64, 64), [2, 64]),
    ],
)
def test_comerge_chain_equals_one_merge_per_level(shape, factors) -> None:
    # hierarchical_comoments merges every level in one compiled call (plane by plane);
    # the per-level kernel (compared with the numpy reference above) gives the same bits
    from lesprep.scales import comoments_compiled as cc
    from lesprep.scales.moments import plan_hierarchy

    rng = np.random.default_rng(6)
    x = rng.normal(280.0, 3.0, shape).astype(np.float32)
    y = (rng.normal(0.01, 1e-3, shape) + 1e-4 * x).astype(np.float32)
    mx, my = hierarchical_moments(x, factors), hierarchical_moments(y, factors)
    got = hierarchical_comoments(x, y, factors, mx, my, engine="numba")
    levels: dict[int, np.ndarray] = {}
    for f, parent in plan_hierarchy(factors).items():
        if f == 1:
            continue
        out = np.empty((shape[0], shape[1] // f, shape[2] // f))
        if parent is None:
            cc.nb_comoment(x, y, f, mx[f].mean, my[f].mean, True, out)
        else:
            cm = (levels[parent], mx[parent].mean, my[parent].mean)
            cc.nb_comerge(*cm, parent * parent, f // parent, out)
        levels[f] = out
    for f, want in levels.items():
        np.testing.assert_array_equal(got[f].cov_sum.view(np.int64), want.view(np.int64))
