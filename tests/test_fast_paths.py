"""The compiled (numba) fast paths give the numbers of their numpy references.

Every fast path of ingest and coarsening is checked twice: against its own numpy
reference (which the other test modules check against MetPy, pint, scipy.stats and
published tables), and, where a library computes the same thing, against that library
directly. The inputs are random fields of realistic magnitude; they are test inputs, not
demo data.
"""

from __future__ import annotations

import hashlib
from pathlib import Path

import netCDF4
import numpy as np
import pint
import pytest
import scipy.stats
import xarray as xr

from lesprep import thermo
from lesprep._jit import HAVE_NUMBA
from lesprep.canonical.derived import cell_diagnostics, relative_humidity
from lesprep.provenance import FileRecords, file_record
from lesprep.raw.archive import RawFile
from lesprep.raw.checks import value_extent
from lesprep.raw.grid import destagger_vertical
from lesprep.scales.moments import (
    block_mean,
    block_moments,
    hierarchical_fractions,
    hierarchical_moments,
)
from lesprep.scales.patches import extract_patches
from lesprep.schemes import sundqvist_cloud_fraction
from lesprep.units import conversion

pytestmark = pytest.mark.skipif(not HAVE_NUMBA, reason="numba not importable")

F32_ULP = float(np.finfo(np.float32).eps)


def atmosphere(shape: tuple[int, int, int], seed: int = 0) -> dict[str, np.ndarray]:
    """Random boundary-layer-like float32 fields (p decreasing with height)."""
    rng = np.random.default_rng(seed)
    nz = shape[0]
    p = np.linspace(1.01e5, 8.0e4, nz)[:, None, None] * (1 + 1e-3 * rng.standard_normal(shape))
    t = np.linspace(295.0, 280.0, nz)[:, None, None] + rng.normal(0.0, 0.5, shape)
    qs = thermo.saturation_mixing_ratio(p, t)
    qv = qs * rng.uniform(0.6, 1.02, shape)
    qc = np.where(rng.random(shape) > 0.7, rng.gamma(0.5, 2e-4, shape), 0.0)
    return {k: v.astype(np.float32) for k, v in {"p": p, "T": t, "qv": qv, "qc": qc}.items()}


@pytest.mark.parametrize("profile", [False, True])
def test_cell_diagnostics_match_reference_and_metpy(profile: bool) -> None:
    f = atmosphere((12, 10, 14))
    p = f["p"][:, 0, 0].astype(np.float64) if profile else f["p"]
    dz = np.linspace(20.0, 40.0, 12)
    fast = cell_diagnostics(p, f["T"], f["qv"], f["qc"], dz, 1e-5, dtype=np.float32)
    ref = cell_diagnostics(p, f["T"], f["qv"], f["qc"], dz, 1e-5, dtype=np.float32, engine="numpy")
    assert fast.rh.dtype == np.float32 and fast.cloud_mask.dtype == np.int8
    # float64 arithmetic, one rounding to float32: at most one float32 ulp apart
    np.testing.assert_allclose(fast.rh, ref.rh, rtol=F32_ULP, atol=0)
    np.testing.assert_array_equal(fast.cloud_mask, ref.cloud_mask)
    np.testing.assert_allclose(fast.lwp, ref.lwp, rtol=1e-12)
    # the mask is qc > threshold on the values as given
    np.testing.assert_array_equal(fast.cloud_mask, (f["qc"] > 1e-5).astype(np.int8))
    # a mass-concentration threshold: the compiled and reference engines agree
    kw = {"threshold_units": "kg m-3", "dtype": np.float32}
    by_conc = cell_diagnostics(p, f["T"], f["qv"], f["qc"], dz, 1e-5, **kw)
    by_conc_ref = cell_diagnostics(p, f["T"], f["qv"], f["qc"], dz, 1e-5, engine="numpy", **kw)
    np.testing.assert_array_equal(by_conc.cloud_mask, by_conc_ref.cloud_mask)

    mpcalc = pytest.importorskip("metpy.calc")
    from metpy.units import units

    p64 = np.asarray(p, dtype=np.float64)
    p3 = np.broadcast_to(p64[:, None, None] if profile else p64, f["T"].shape)
    t = f["T"].astype(np.float64)
    r = f["qv"].astype(np.float64)
    e = mpcalc.vapor_pressure(p3 * units.Pa, r * units("kg/kg")).m_as("Pa")
    # Bolton (1980) eq. 10 written out here (MetPy 1.7 uses Ambaum 2020 for e_s)
    tc = t - 273.15
    es = 611.2 * np.exp(17.67 * tc / (tc + 243.5))
    np.testing.assert_allclose(fast.rh, e / es, rtol=1e-6)
    # dry-air density: MetPy's density of the dry air's partial pressure p - e
    rho = mpcalc.density((p3 - e) * units.Pa, t * units.K, 0 * units("kg/kg")).m_as("kg/m^3")
    lwp = np.tensordot(dz, f["qc"].astype(np.float64) * rho, axes=(0, 0))
    np.testing.assert_allclose(fast.lwp, lwp, rtol=1e-6, atol=1e-12)
    amount = f["qc"].astype(np.float64) * rho  # kg m-3, away from round-off at the threshold
    clear_cut = np.abs(amount - 1e-5) > 1e-6 * 1e-5
    np.testing.assert_array_equal(by_conc.cloud_mask[clear_cut], (amount > 1e-5)[clear_cut])


def test_relative_humidity_fast_matches_thermo() -> None:
    f = atmosphere((6, 8, 8), seed=3)
    p, t, r = (f[k].astype(np.float64) for k in ("p", "T", "qv"))
    got = relative_humidity(p, t, r)
    np.testing.assert_allclose(got, thermo.relative_humidity(p, t, r), rtol=4e-16, atol=0)
    got32 = relative_humidity(p[:, 0, 0], t, r, dtype=np.float32)
    ref = thermo.relative_humidity(p[:, :1, :1], t, r).astype(np.float32)
    np.testing.assert_allclose(got32, ref, rtol=F32_ULP, atol=0)


def test_relative_humidity_into_out_equals_the_returned_array() -> None:
    f = atmosphere((4, 8, 8), seed=4)
    p, t, r = (f[k].astype(np.float64) for k in ("p", "T", "qv"))
    for engine in ("numba", "numpy"):
        out = np.empty(t.shape)
        got = relative_humidity(p, t, r, out=out, engine=engine)
        assert got is out
        np.testing.assert_allclose(out, thermo.relative_humidity(p, t, r), rtol=4e-16, atol=0)


def test_sundqvist_compiled_pass_equals_numpy_reference() -> None:
    # The reference is the closed form of Sundqvist et al. (1989) in baseline.py, checked
    # against values worked by hand in test_baseline.py; here the compiled pass must
    # give its numbers bit for bit, NaN, clipping at RHc and at saturation included.
    rng = np.random.default_rng(23)
    rh = rng.uniform(0.5, 1.1, size=(3, 16, 16))
    rh[0, 0, :5] = [np.nan, 0.8, 1.0, 0.7999999999, 1.0000001]
    ref = sundqvist_cloud_fraction(rh, 0.8)
    out = np.empty_like(rh)
    assert sundqvist_cloud_fraction(rh, 0.8, out=out) is out
    np.testing.assert_array_equal(out, ref)  # NaN where rh is NaN, in both
    out32 = np.empty(rh.shape, np.float32)
    sundqvist_cloud_fraction(rh, 0.8, out=out32)
    np.testing.assert_array_equal(out32, ref.astype(np.float32))
    ref_np = np.empty_like(rh)
    sundqvist_cloud_fraction(rh, 0.8, out=ref_np, engine="numpy")
    np.testing.assert_array_equal(ref_np, ref)
    # the formula written out: C = 1 - sqrt((1 - RH) / (1 - RHc)) inside (RHc, 1)
    inside = (rh > 0.8) & (rh < 1.0)
    np.testing.assert_allclose(out[inside], 1 - np.sqrt((1 - rh[inside]) / (1 - 0.8)), rtol=1e-15)


@pytest.mark.parametrize("dtype", [np.int8, bool])
def test_mask_fractions_from_counts_match_xarray_coarsen(dtype) -> None:
    # xarray's own coarsen(...).mean() of the 0/1 mask is the reference
    rng = np.random.default_rng(29)
    mask = (rng.random((3, 24, 48)) > 0.75).astype(dtype)
    factors = [2, 3, 4, 6, 12, 24]  # 2 and k = 2: constant-stride loops; 3, 6: general
    fast = hierarchical_fractions(mask, factors)
    ref = hierarchical_fractions(mask, factors, engine="numpy")
    da = xr.DataArray(mask.astype(np.float64), dims=("z", "y", "x"))
    for f in factors:
        np.testing.assert_array_equal(fast[f], ref[f])
        coarse = da.coarsen(y=f, x=f).mean().values
        np.testing.assert_allclose(fast[f], coarse, rtol=1e-15, atol=0)
        np.testing.assert_allclose(fast[f], block_mean(mask, f), rtol=1e-15, atol=0)


def test_mean_rounded_in_the_variance_pass() -> None:
    x = np.random.default_rng(31).normal(1.0, 0.1, size=(2, 16, 16))
    bm = block_moments(x, 4)
    for engine in ("numba", "numpy"):
        v, g, m = (np.empty(bm.shape, np.float32) for _ in range(3))
        bm.variance_and_skewness(out=(v, g), mean_out=m, engine=engine)
        np.testing.assert_array_equal(m, bm.mean.astype(np.float32))
        np.testing.assert_array_equal(v, bm.variance().astype(np.float32))


@pytest.mark.parametrize("factor, size, halo", [(8, 4, 0), (8, 4, 2), (16, 4, 4)])
def test_patches_from_known_block_means(factor, size, halo) -> None:
    x = np.random.default_rng(37).normal(size=(2, 32, 32)).astype(np.float32)
    d = factor // size
    ref = extract_patches(x, factor, size, halo, dtype=np.float32)
    means = hierarchical_moments(x, [2, d])[d].mean
    out = np.full(ref.shape, np.nan, np.float32)
    got = extract_patches(x[:0], factor, size, halo, means=means, out=out)  # x is not read
    assert got is out
    np.testing.assert_array_equal(out, ref)


def test_value_extent_matches_masked_numpy() -> None:
    rng = np.random.default_rng(5)
    a = rng.normal(size=(7, 33, 65)).astype(np.float32)
    assert value_extent(a) == (0, a.min(), a.max())
    a[1, 2, 3] = np.nan
    a[4, 0, 0] = np.inf
    a[6, 32, 64] = -np.inf
    finite = a[np.isfinite(a)]
    assert value_extent(a) == (3, finite.min(), finite.max())
    view = a[:, ::2, 1::3]  # not contiguous
    vf = view[np.isfinite(view)]
    assert value_extent(view) == (view.size - vf.size, vf.min(), vf.max())
    assert value_extent(np.full(3, np.nan)) == (3, np.inf, -np.inf)
    assert value_extent(np.zeros(0)) == (0, np.inf, -np.inf)


@pytest.mark.parametrize(
    "found, expected", [("degC", "K"), ("g/kg", "kg kg-1"), ("hPa", "Pa"), ("K", "K")]
)
def test_unit_conversion_fast_matches_pint(found: str, expected: str) -> None:
    rng = np.random.default_rng(7)
    raw = rng.uniform(-30.0, 1000.0, size=(5, 6, 7)).astype(np.float32)
    conv = conversion(
        variable="v",
        raw_variable="v",
        found=found,
        expected=expected,
        assumed=None,
        case="c",
        file="f",
    )
    fast = conv.convert(raw, np.float32)
    ref = conv.convert(raw, np.float32, engine="numpy")
    np.testing.assert_array_equal(fast, ref)  # same float64 operations, one rounding
    plain = pint.UnitRegistry()
    spell = {"kg kg-1": "kg/kg"}
    want = plain.Quantity(raw.astype(np.float64), found).to(spell.get(expected, expected)).m
    np.testing.assert_allclose(fast, want.astype(np.float32), rtol=F32_ULP, atol=1e-30)
    if conv.is_identity:
        assert conv.convert(raw, np.float32) is raw
    inplace = raw.copy()
    assert conv.convert(inplace, out=inplace) is inplace
    np.testing.assert_array_equal(inplace, fast)


def test_destagger_fast_matches_reference() -> None:
    rng = np.random.default_rng(9)
    faces = np.cumsum(rng.uniform(10.0, 40.0, 9))
    z = 0.5 * (faces[1:] + faces[:-1]) + rng.uniform(-2.0, 2.0, 8)
    a = rng.normal(size=(9, 5, 6)).astype(np.float32)
    fast = destagger_vertical(a, faces, z, dtype=np.float32)
    ref = destagger_vertical(a, faces, z, dtype=np.float32, engine="numpy")
    np.testing.assert_array_equal(fast, ref)
    # a field linear in height is interpolated exactly (to float32 rounding)
    lin = np.broadcast_to((2.0 + 0.01 * faces)[:, None, None], (9, 5, 6)).astype(np.float32)
    out = destagger_vertical(np.ascontiguousarray(lin), faces, z, dtype=np.float32)
    np.testing.assert_allclose(out[:, 0, 0], 2.0 + 0.01 * z, rtol=2 * F32_ULP)


def test_variance_and_skewness_fast_match_reference_and_scipy() -> None:
    rng = np.random.default_rng(11)
    x = rng.gamma(0.4, 1e-3, size=(3, 24, 24))
    x[:, :6, :6] = 0.0  # constant blocks: skewness 0 by convention
    bm = block_moments(x, 6)
    v32, s32 = bm.variance_and_skewness(np.float32)
    v64, s64 = bm.variance_and_skewness(np.float64)
    np.testing.assert_array_equal(v64, bm.variance())
    np.testing.assert_array_equal(s64, bm.skewness())
    np.testing.assert_array_equal(v32, bm.variance().astype(np.float32))
    np.testing.assert_array_equal(s32, bm.skewness().astype(np.float32))
    assert np.all(s64[:, 0, 0] == 0.0)
    blocks = x.reshape(3, 4, 6, 4, 6).transpose(0, 1, 3, 2, 4).reshape(3, 4, 4, 36)
    ref = scipy.stats.skew(blocks[:, 1:, 1:], axis=-1, bias=True)
    np.testing.assert_allclose(s64[:, 1:, 1:], ref, rtol=1e-9)
    np.testing.assert_allclose(v64, blocks.var(axis=-1), rtol=1e-12, atol=0)


def test_moments_of_float32_input_equal_float64_input() -> None:
    x = np.random.default_rng(13).normal(size=(2, 16, 16)).astype(np.float32)
    a = hierarchical_moments(x, [2, 4, 16])
    b = hierarchical_moments(x.astype(np.float64), [2, 4, 16])
    for f in a:
        np.testing.assert_array_equal(a[f].mean, b[f].mean)
        np.testing.assert_array_equal(a[f].m2, b[f].m2)


@pytest.mark.parametrize("factor, size, halo", [(4, 4, 0), (8, 4, 0), (4, 4, 2)])
def test_patches_in_float32_are_rounded_float64_patches(factor, size, halo) -> None:
    x = np.random.default_rng(17).normal(size=(2, 16, 16)).astype(np.float32)
    p32 = extract_patches(x, factor, size, halo, dtype=np.float32)
    p64 = extract_patches(x, factor, size, halo)
    assert p32.dtype == np.float32 and p64.dtype == np.float64
    np.testing.assert_array_equal(p32, p64.astype(np.float32))


def _nc(path: Path, values: np.ndarray, **attrs: object) -> RawFile:
    with netCDF4.Dataset(path, "w") as ds:
        ds.createDimension("z", values.shape[0])
        ds.createDimension("x", values.shape[1])
        fill = attrs.pop("_FillValue", None)
        v = ds.createVariable("v", values.dtype, ("z", "x"), fill_value=fill)
        for k, a in attrs.items():
            v.setncattr(k, a)
        v[:] = values
    return RawFile(netCDF4.Dataset(path))


@pytest.mark.parametrize(
    "attrs",
    [
        {},
        {"_FillValue": np.float32(-999.0)},
        {"missing_value": np.float32(-888.0)},
        {"valid_range": np.array([-100.0, 100.0], dtype=np.float32)},
        {"valid_min": np.float32(-100.0)},
        {"scale_factor": 0.5, "add_offset": 1.0},
    ],
)
def test_native_read_masks_like_netcdf4(tmp_path: Path, attrs: dict) -> None:
    values = np.arange(24, dtype=np.float32).reshape(4, 6)
    values[0, 1] = -999.0
    values[1, 2] = -888.0
    values[2, 3] = -500.0
    values[3, 4] = 500.0
    raw = _nc(tmp_path / "a.nc", values, **attrs)
    try:
        native = raw.variables["v"].read(native=True)
        masked = raw.variables["v"].read()  # netCDF4's own masking and scaling, float64
        np.testing.assert_array_equal(np.isnan(native), np.isnan(masked))
        np.testing.assert_allclose(native, masked, rtol=F32_ULP, equal_nan=True)
        if "scale_factor" not in attrs:
            assert native.dtype == np.float32
    finally:
        raw.close()


def test_file_records_in_background(tmp_path: Path) -> None:
    files = []
    for i in range(3):
        f = tmp_path / f"f{i}.bin"
        f.write_bytes(bytes(range(256)) * (1000 + i))
        files.append(f)
    with FileRecords(files) as rec:
        got = rec.result()
    assert got == [file_record(f) for f in files]
    assert got[1]["sha256"] == hashlib.sha256(files[1].read_bytes()).hexdigest()
    with pytest.raises(RuntimeError), FileRecords(files) as rec:
        raise RuntimeError("stop")
    with FileRecords([tmp_path / "missing.bin"]) as rec, pytest.raises(FileNotFoundError):
        rec.result()
