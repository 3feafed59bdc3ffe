"""Tests of lesprep.scales.moments against outside references.

References used (named beside each check): numpy (``mean``, ``var`` with ``ddof=0``),
``scipy.stats.skew(bias=True)`` (the Fisher--Pearson g1), xarray's own
``DataArray.coarsen(...).mean()/.var()``, and the law of total variance (a textbook
identity). Hierarchical results are checked against the direct computation.
"""

from __future__ import annotations

import pickle

import numpy as np
import pytest
import scipy.stats
import xarray as xr
from hypothesis import given, settings
from hypothesis import strategies as st

from lesprep.errors import ConfigError, InputError, ScaleError
from lesprep.scales.moments import (
    HAVE_NUMBA,
    TINY_RELATIVE_STD,
    ZERO_VARIANCE_SKEWNESS,
    BlockMoments,
    block_mean,
    block_moments,
    check_factor,
    divisors,
    hierarchical_moments,
    merge_blocks,
    plan_hierarchy,
)

ENGINES = ["numpy", pytest.param("numba", marks=pytest.mark.skipif(not HAVE_NUMBA, reason="numba"))]


# ------------------------------------------------------------------------------------
# helpers (reference side: plain numpy/scipy on explicit blocks)
# ------------------------------------------------------------------------------------


def as_blocks(a: np.ndarray, f: int) -> np.ndarray:
    """(..., ny, nx) -> (..., ny/f, nx/f, f*f) float64 copy holding each block's cells."""
    *lead, ny, nx = a.shape
    b = np.asarray(a, dtype=np.float64).reshape(*lead, ny // f, f, nx // f, f)
    b = np.moveaxis(b, -3, -2)  # (..., ny/f, nx/f, f, f)
    return b.reshape(*lead, ny // f, nx // f, f * f)


def skewed_field(shape, dtype=np.float64, seed=0, offset=0.0) -> np.ndarray:
    """Positively skewed random field (gamma noise, shape parameter 2) plus an offset."""
    rng = np.random.default_rng(seed)
    return (offset + rng.gamma(2.0, 1.5, size=shape) - 3.0).astype(dtype)


def not_tiny(bm: BlockMoments) -> np.ndarray:
    """Blocks whose variance is well above round-off (where skewness is meaningful)."""
    return bm.variance() > (1e6 * TINY_RELATIVE_STD * np.abs(bm.mean)) ** 2 + 1e-300


def assert_moments_close(got: BlockMoments, ref: BlockMoments, rtol: float, skew_atol: float):
    assert got.count == ref.count
    assert got.mean.shape == ref.mean.shape
    scale = max(1.0, float(np.abs(ref.mean).max()))
    # Absolute floor for means near zero: round-off of a sum of n values is ~ eps * n * scale.
    np.testing.assert_allclose(got.mean, ref.mean, rtol=rtol, atol=rtol * 1e-2 * scale)
    np.testing.assert_allclose(got.variance(), ref.variance(), rtol=rtol, atol=0.0)
    ok = not_tiny(ref)
    np.testing.assert_allclose(got.skewness()[ok], ref.skewness()[ok], rtol=0.0, atol=skew_atol)


# ------------------------------------------------------------------------------------
# single-scale statistics against numpy / scipy / xarray
# ------------------------------------------------------------------------------------


@pytest.mark.parametrize("engine", ENGINES)
@pytest.mark.parametrize("dtype", [np.float32, np.float64])
@pytest.mark.parametrize("factor", [2, 3, 5, 6, 10, 15, 30])
def test_block_statistics_match_numpy_and_scipy(engine, dtype, factor):
    a = skewed_field((2, 30, 60), dtype=dtype, seed=factor)
    bm = block_moments(a, factor, engine=engine)
    blocks = as_blocks(a, factor)  # reference works on the same (float32) values in float64
    assert bm.count == factor * factor
    assert bm.mean.dtype == bm.m2.dtype == bm.m3.dtype == np.float64
    assert bm.mean.shape == (2, 30 // factor, 60 // factor)
    # numpy.mean / numpy.var(ddof=0) (population variance)
    np.testing.assert_allclose(bm.mean, blocks.mean(axis=-1), rtol=1e-13, atol=1e-14)
    np.testing.assert_allclose(bm.variance(), blocks.var(axis=-1, ddof=0), rtol=1e-12)
    # scipy.stats.skew(bias=True) is g1 = m3 / m2**1.5
    ref_skew = scipy.stats.skew(blocks, axis=-1, bias=True)
    np.testing.assert_allclose(bm.skewness(), ref_skew, rtol=0.0, atol=1e-10)
    # block_mean is the same corrected two-pass mean
    np.testing.assert_array_equal(block_mean(a, factor, engine=engine), bm.mean)


@pytest.mark.parametrize("engine", ENGINES)
def test_factor_one_is_the_field_itself(engine):
    a = skewed_field((3, 4, 6), seed=1)
    bm = block_moments(a, 1, engine=engine)
    np.testing.assert_array_equal(bm.mean, a)  # numpy: the mean of one value is itself
    assert np.all(bm.m2 == 0.0) and np.all(bm.m3 == 0.0)
    assert np.all(bm.skewness() == ZERO_VARIANCE_SKEWNESS)


@pytest.mark.parametrize("factor", [4, 5])
def test_matches_xarray_coarsen_mean_and_var(factor):
    a = skewed_field((3, 20, 40), seed=7, offset=290.0)
    da = xr.DataArray(a, dims=("time", "y", "x"))
    coarse = da.coarsen(y=factor, x=factor)
    bm = block_moments(a, factor)
    # xarray's coarsen reductions; var uses ddof=0 (population) by default
    np.testing.assert_allclose(bm.mean, coarse.mean().values, rtol=1e-13)
    np.testing.assert_allclose(bm.variance(), coarse.var().values, rtol=1e-10)


@pytest.mark.parametrize("engine", ENGINES)
@pytest.mark.parametrize("factor", [2, 8, 16])
def test_conservation_and_law_of_total_variance(engine, factor):
    a = skewed_field((2, 3, 32, 48), dtype=np.float32, seed=3, offset=1.0)
    bm = block_moments(a, factor, engine=engine)
    fine = a.astype(np.float64)
    # the mean of the coarse means is the fine domain mean (numpy.mean in float64)
    np.testing.assert_allclose(bm.mean.mean(axis=(-2, -1)), fine.mean(axis=(-2, -1)), rtol=1e-13)
    # law of total variance: Var(x) = E[Var(x|block)] + Var(E[x|block])
    total = bm.variance().mean(axis=(-2, -1)) + bm.mean.var(axis=(-2, -1))
    np.testing.assert_allclose(total, fine.var(axis=(-2, -1)), rtol=1e-12)


@pytest.mark.parametrize("engine", ENGINES)
@pytest.mark.parametrize("dtype", [np.float32, np.float64])
def test_factor_equal_to_domain_gives_domain_statistics(engine, dtype):
    a = skewed_field((2, 48, 48), dtype=dtype, seed=11)
    bm = block_moments(a, 48, engine=engine)
    fine = a.astype(np.float64).reshape(2, -1)
    assert bm.mean.shape == (2, 1, 1)
    np.testing.assert_allclose(bm.mean[:, 0, 0], fine.mean(axis=-1), rtol=1e-14)  # numpy
    np.testing.assert_allclose(bm.variance()[:, 0, 0], fine.var(axis=-1), rtol=1e-12)  # numpy
    ref_skew = scipy.stats.skew(fine, axis=-1, bias=True)  # scipy
    np.testing.assert_allclose(bm.skewness()[:, 0, 0], ref_skew, rtol=0.0, atol=1e-11)


@pytest.mark.parametrize("engine", ENGINES)
def test_float32_input_is_accumulated_in_float64(engine):
    # 65536 float32 values: a float32 running sum would be off by ~1e-4 relative here.
    rng = np.random.default_rng(5)
    a = (0.1 + 1e-3 * rng.standard_normal((256, 256))).astype(np.float32)
    bm = block_moments(a, 256, engine=engine)
    ref = a.astype(np.float64)
    np.testing.assert_allclose(bm.mean[0, 0], ref.mean(), rtol=1e-14)  # numpy, float64
    np.testing.assert_allclose(bm.variance()[0, 0], ref.var(), rtol=1e-11)  # numpy, float64


@pytest.mark.parametrize("engine", ENGINES)
def test_skewness_survives_a_large_offset(engine):
    # Raw power sums would lose every digit of M3 here (offset 1e6, spread ~1).
    a = skewed_field((2, 40, 40), seed=2, offset=1.0e6)
    bm = block_moments(a, 20, engine=engine)
    ref = scipy.stats.skew(as_blocks(a, 20), axis=-1, bias=True)  # scipy (two-pass)
    np.testing.assert_allclose(bm.skewness(), ref, rtol=0.0, atol=1e-8)
    assert np.all(np.abs(bm.skewness()) > 0.5)  # gamma(2) has skewness sqrt(2)


# ------------------------------------------------------------------------------------
# zero-variance convention
# ------------------------------------------------------------------------------------


@pytest.mark.parametrize("engine", ENGINES)
@pytest.mark.parametrize("value", [0.0, 0.1, 300.15, -7.3e-9])
def test_constant_blocks_have_zero_variance_and_skewness(engine, value):
    for dtype in (np.float32, np.float64):
        a = np.full((2, 64, 64), value, dtype=dtype)
        direct = block_moments(a, 64, engine=engine)
        res = hierarchical_moments(a, [2, 4, 8, 16, 32, 64], engine=engine)
        for bm in [direct, *res.values()]:
            c = np.float64(dtype(value))
            np.testing.assert_array_equal(bm.mean, c)
            var = bm.variance()
            if dtype is np.float32:
                # float64 sums of float32 values are exact here, so the result is exact
                assert np.all(var == 0.0)
            else:
                assert np.all(var <= (TINY_RELATIVE_STD * abs(c)) ** 2)
            assert np.all(bm.skewness() == ZERO_VARIANCE_SKEWNESS)


def test_round_off_variance_gives_zero_skewness_but_real_spread_does_not():
    # A block at mean 0.1 whose "spread" is 1e-17 (well under one float64 ulp of 0.1):
    # this is round-off of a constant block, so the convention applies.
    n = 16
    mean = np.array([[0.1]])
    fake = BlockMoments(n, mean, np.array([[n * 1e-34]]), np.array([[n * 1e-51]]))
    assert fake.skewness()[0, 0] == ZERO_VARIANCE_SKEWNESS
    # One float32 ulp of difference in a 16-cell block is real data; g1 must match scipy.
    a = np.full((4, 4), 0.1, dtype=np.float32)
    a[0, 0] = np.nextafter(np.float32(0.1), np.float32(1.0))
    bm = block_moments(a, 4)
    ref = scipy.stats.skew(a.astype(np.float64).ravel(), bias=True)  # scipy
    np.testing.assert_allclose(bm.skewness()[0, 0], ref, rtol=1e-6)
    # two-point (Bernoulli) distribution, p = 1/16: g1 = (1 - 2p) / sqrt(p (1 - p)) = 14/sqrt(15)
    np.testing.assert_allclose(bm.skewness()[0, 0], 14.0 / np.sqrt(15.0), rtol=1e-6)


def test_sparse_field_with_constant_blocks_matches_scipy_elsewhere():
    rng = np.random.default_rng(9)
    a = np.where(rng.random((40, 40)) < 0.05, rng.exponential(1e-3, (40, 40)), 0.0)
    bm = block_moments(a, 4)
    blocks = as_blocks(a, 4)
    constant = blocks.min(axis=-1) == blocks.max(axis=-1)
    assert constant.any() and (~constant).any()
    assert np.all(bm.skewness()[constant] == ZERO_VARIANCE_SKEWNESS)
    ref = scipy.stats.skew(blocks[~constant], axis=-1, bias=True)
    np.testing.assert_allclose(bm.skewness()[~constant], ref, rtol=0.0, atol=1e-10)
    assert np.all(np.isfinite(bm.skewness()))


# ------------------------------------------------------------------------------------
# hierarchy
# ------------------------------------------------------------------------------------


@pytest.mark.parametrize(
    ("size", "factors", "plan"),
    [
        (200, [2, 4, 20, 100], {2: None, 4: 2, 20: 4, 100: 20}),
        (100, [5, 25], {5: None, 25: 5}),
        (60, [4, 10, 20, 60], {4: None, 10: None, 20: 10, 60: 20}),
    ],
)
@pytest.mark.parametrize("engine", ENGINES)
def test_hierarchical_equals_direct(engine, size, factors, plan):
    assert plan_hierarchy(factors) == plan
    a = skewed_field((2, size, size), seed=size)
    res = hierarchical_moments(a, factors, engine=engine)
    assert list(res) == sorted(factors)
    for f in factors:
        assert_moments_close(res[f], block_moments(a, f, engine=engine), 1e-10, 1e-10)


def test_plan_hierarchy_picks_the_largest_computed_divisor():
    assert plan_hierarchy([6, 2, 3]) == {2: None, 3: None, 6: 3}
    assert plan_hierarchy([2, 4, 8, 16]) == {2: None, 4: 2, 8: 4, 16: 8}
    assert plan_hierarchy([12, 4, 6, 4]) == {4: None, 6: None, 12: 6}
    assert plan_hierarchy([1, 2, 7]) == {1: None, 2: None, 7: None}  # 1 is never a parent
    assert plan_hierarchy([]) == {}
    assert hierarchical_moments(np.zeros((4, 4)), []) == {}
    with pytest.raises(ScaleError):
        plan_hierarchy([2, 0])


@pytest.mark.parametrize("engine", ENGINES)
def test_merge_blocks_equals_direct(engine):
    a = skewed_field((3, 36, 24), dtype=np.float32, seed=4)
    merged = merge_blocks(block_moments(a, 3, engine=engine), 4, engine=engine)
    assert merged.count == 144
    assert_moments_close(merged, block_moments(a, 12, engine=engine), 1e-11, 1e-10)
    # k larger than the slice threshold of the numpy engine (reshape path)
    big = merge_blocks(block_moments(a, 1, engine=engine), 12, engine=engine)
    assert_moments_close(big, block_moments(a, 12, engine=engine), 1e-11, 1e-10)


SIZES = [12, 24, 30, 36, 40, 48, 60]


@settings(max_examples=40, deadline=None)
@given(
    size=st.sampled_from(SIZES),
    widen=st.sampled_from([1, 2]),
    lead=st.lists(st.integers(1, 3), max_size=2),
    picks=st.lists(st.integers(0, 20), min_size=1, max_size=5),
    kind=st.sampled_from(["normal", "skewed", "sparse", "offset"]),
    seed=st.integers(0, 2**31 - 1),
    engine=st.sampled_from(["numba", "numpy"] if HAVE_NUMBA else ["numpy"]),
)
def test_property_hierarchical_equals_direct(size, widen, lead, picks, kind, seed, engine):
    divs = divisors(size)
    factors = sorted({divs[i % len(divs)] for i in picks})
    shape = (*lead, size, size * widen)
    rng = np.random.default_rng(seed)
    if kind == "normal":
        a = rng.standard_normal(shape)
    elif kind == "skewed":
        a = rng.exponential(2.0, shape)
    elif kind == "sparse":  # mostly zero, like cloud water: many constant blocks
        a = np.where(rng.random(shape) < 0.1, rng.exponential(1e-4, shape), 0.0)
    else:
        a = 1.0e3 + rng.standard_normal(shape)
    res = hierarchical_moments(a, factors, engine=engine)
    assert list(res) == factors
    for f in factors:
        got, ref = res[f], block_moments(a, f, engine=engine)
        assert_moments_close(got, ref, 1e-10, 1e-10)
        assert np.all(np.isfinite(got.skewness()))


@pytest.mark.skipif(not HAVE_NUMBA, reason="numba not importable")
@pytest.mark.parametrize("dtype", [np.float32, np.float64])
def test_numba_engine_equals_numpy_engine(dtype):
    a = skewed_field((2, 3, 60, 120), dtype=dtype, seed=21, offset=2.0)
    factors = [2, 3, 4, 12, 20, 60]
    fast = hierarchical_moments(a, factors, engine="numba")
    ref = hierarchical_moments(a, factors, engine="numpy")
    for f in factors:
        np.testing.assert_allclose(fast[f].mean, ref[f].mean, rtol=1e-12)
        np.testing.assert_allclose(fast[f].m2, ref[f].m2, rtol=1e-12)
        ok = not_tiny(ref[f])
        np.testing.assert_allclose(fast[f].skewness()[ok], ref[f].skewness()[ok], atol=1e-9)
    for f in (5, 60):  # direct, including the block-by-block loop of large factors
        d_fast, d_ref = block_moments(a, f, engine="numba"), block_moments(a, f, engine="numpy")
        np.testing.assert_allclose(d_fast.mean, d_ref.mean, rtol=1e-12)
        np.testing.assert_allclose(d_fast.m2, d_ref.m2, rtol=1e-12)
        np.testing.assert_allclose(d_fast.skewness(), d_ref.skewness(), atol=1e-9)


# ------------------------------------------------------------------------------------
# input layouts and dtypes
# ------------------------------------------------------------------------------------


@pytest.mark.parametrize("engine", ENGINES)
def test_non_contiguous_and_foreign_inputs(engine):
    base = skewed_field((3, 2, 24, 24), dtype=np.float32, seed=8)
    ref = block_moments(np.ascontiguousarray(base.transpose(1, 0, 2, 3)), 4, engine="numpy")
    got = block_moments(base.transpose(1, 0, 2, 3), 4, engine=engine)  # leading axes swapped
    assert_moments_close(got, ref, 1e-13, 1e-12)
    strided = base[..., ::2, ::2]
    assert_moments_close(
        block_moments(strided, 3, engine=engine),
        block_moments(np.ascontiguousarray(strided), 3, engine="numpy"),
        1e-13,
        1e-12,
    )
    swapped = base.astype(base.dtype.newbyteorder(">"))  # big-endian, as netCDF may give
    assert_moments_close(
        block_moments(swapped, 6, engine=engine), block_moments(base, 6), 1e-13, 1e-12
    )


@pytest.mark.parametrize("engine", ENGINES)
def test_block_mean_of_a_mask_is_the_cover_fraction(engine):
    rng = np.random.default_rng(3)
    mask = rng.random((2, 20, 30)) < 0.3
    frac = block_mean(mask, 5, engine=engine)
    np.testing.assert_allclose(frac, as_blocks(mask, 5).mean(axis=-1), rtol=1e-15)  # numpy
    counts = block_mean(mask.astype(np.int16), 10, engine=engine)
    np.testing.assert_allclose(counts, as_blocks(mask, 10).mean(axis=-1), rtol=1e-15)


def test_leading_axes_of_size_zero():
    bm = block_moments(np.zeros((0, 4, 4)), 2)
    assert bm.mean.shape == (0, 2, 2)


# ------------------------------------------------------------------------------------
# validation and errors
# ------------------------------------------------------------------------------------


def test_divisors_match_the_definition():
    for n in [1, 2, 12, 36, 97, 100, 512, 720]:
        assert divisors(n) == [d for d in range(1, n + 1) if n % d == 0]
    with pytest.raises(ScaleError):
        divisors(0)


def test_non_dividing_factor_names_size_factor_and_valid_factors():
    with pytest.raises(ScaleError) as info:
        block_moments(np.zeros((2, 100, 100)), 30)
    text = str(info.value)
    assert "30" in text and "100" in text
    assert "1, 2, 4, 5, 10, 20, 25, 50, 100" in text
    assert isinstance(info.value, ValueError)
    assert str(pickle.loads(pickle.dumps(info.value))) == text

    with pytest.raises(ScaleError) as info:  # non-square: the factors that fit both sizes
        block_mean(np.zeros((12, 18)), 4)
    assert "ny = 12" in str(info.value) and "nx = 18" in str(info.value)
    assert "1, 2, 3, 6" in str(info.value)

    with pytest.raises(ScaleError) as info:
        check_factor(48, 7, axis_name="nx")
    assert "nx = 48" in str(info.value) and "1, 2, 3, 4, 6, 8, 12, 16, 24, 48" in str(info.value)
    check_factor(48, 16, axis_name="nx")  # fits: no error


@pytest.mark.parametrize("bad", [0, -2, 2.0, 2.5, "2", True, None])
def test_bad_factor_values_are_scale_errors(bad):
    with pytest.raises(ScaleError):
        block_moments(np.zeros((4, 4)), bad)
    with pytest.raises(ScaleError):
        check_factor(4, bad, axis_name="ny")


def test_other_invalid_inputs():
    with pytest.raises(ScaleError, match="at least 2 dimensions"):
        block_moments(np.zeros(8), 2)
    with pytest.raises(ScaleError):  # one bad factor stops the whole set before any work
        hierarchical_moments(np.zeros((8, 8)), [2, 3])
    with pytest.raises(ScaleError):
        merge_blocks(block_moments(np.zeros((8, 8)), 2), 3)
    with pytest.raises(InputError):
        block_moments(np.zeros((4, 4), dtype=complex), 2)
    with pytest.raises(ConfigError):
        block_moments(np.zeros((4, 4)), 2, engine="gpu")
    with pytest.raises(InputError):
        BlockMoments(4, np.zeros((2, 2)), np.zeros((2, 3)), np.zeros((2, 2)))
    # a numpy integer factor is accepted as the int it is: one 4 x 4 block of 16 cells
    bm = block_moments(np.arange(16.0).reshape(4, 4), np.int64(4))
    assert bm.count == 16 and bm.mean.shape == (1, 1)
    assert float(bm.mean[0, 0]) == pytest.approx(7.5)  # numpy: arange(16).mean()


def test_quantized_count_engines_agree_with_numpy_spacing() -> None:
    # the reference is numpy.spacing of the float32 mean; edge cases: zero and NaN means,
    # subnormal and tiny means (float32 spacing 2**-149), powers of two, negative means
    from lesprep.scales.moments import quantized_count

    rng = np.random.default_rng(11)
    mean = np.concatenate(
        [
            rng.uniform(250.0, 300.0, 400),
            -rng.uniform(1e-9, 1e-3, 200),
            np.array([0.0, np.nan, 1e-45, 3e-39, 1.0, 2.0, 0.5, 2.0**-126, 1e-40, 1e30, 3e38]),
        ]
    )
    step = np.spacing(np.abs(mean).astype(np.float32)).astype(np.float64)
    var = (rng.uniform(0.0, 8.0, mean.size) * np.nan_to_num(step)) ** 2
    expected = int(np.count_nonzero((mean != 0) & (var < (4 * step) ** 2)))
    assert 0 < expected < mean.size
    for engine in ("numpy", "numba"):
        assert quantized_count(mean, var, 4, engine=engine) == expected, engine
        assert quantized_count(mean.astype(np.float32), var, 4, engine=engine) == int(
            np.count_nonzero((mean.astype(np.float32) != 0) & (var < (4 * step) ** 2))
        ), engine


@pytest.mark.skipif(not HAVE_NUMBA, reason="numba is not importable")
@pytest.mark.parametrize(
    ("shape", "factors"),
    [((3, 72, 144), [2, 3, 4, 6, 12, 36]), ((2, 81, 81), [3, 9, 27, 81]), ((4, 64, 64), [2, 64])],
)
def test_merge_chain_equals_one_merge_per_level(shape, factors) -> None:
    # hierarchical_moments merges every level in one compiled call (plane by plane);
    # the same merges one level at a time (the per-level kernel, whose sums are those of
    # the numpy reference, see test_numba_engine_equals_numpy_engine) give the same bits
    from lesprep.scales import moments_compiled as mc
    from lesprep.scales.moments import plan_hierarchy

    x = np.random.default_rng(5).normal(280.0, 3.0, shape).astype(np.float32)
    got = hierarchical_moments(x, factors, engine="numba")
    levels: dict[int, list[np.ndarray]] = {}
    for f, parent in plan_hierarchy(factors).items():
        out = [np.empty((shape[0], shape[1] // f, shape[2] // f)) for _ in range(3)]
        if parent is None:
            mc.nb_moments(x, f, *out)
        else:
            mc.nb_merge(*levels[parent], parent * parent, f // parent, *out)
        levels[f] = out
    for f, (mean, m2, m3) in levels.items():
        for a, b in ((got[f].mean, mean), (got[f].m2, m2), (got[f].m3, m3)):
            np.testing.assert_array_equal(a.view(np.int64), b.view(np.int64))
