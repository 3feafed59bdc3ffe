"""Coarsening against numpy, scipy.stats and xarray's own coarsen; patches; scales."""

from __future__ import annotations

from pathlib import Path

import numpy as np
import pytest
import scipy.stats
import xarray as xr

from lesprep import thermo
from lesprep.canonical.ingest import ingest_case
from lesprep.errors import ScaleError
from lesprep.provenance import load
from lesprep.scales.coarsen import coarsen_case
from lesprep.scales.patches import extract_patches, reassemble
from lesprep.scales.spec import Scale, parse_scale, parse_scales
from lesprep.scales.step import coarse_fields, vertical_derivative
from lesprep.store import open_store
from settings_helpers import coarsen_settings, ingest_settings

REPO = Path(__file__).resolve().parents[1]


def scales_for(factors, dx=50.0):
    return [Scale(label=f"f{f}", factor=f, length_m=f * dx, dx=dx, text=str(f)) for f in factors]


def random_fine(rng, nz=4, n=24):
    qc = np.maximum(rng.normal(0, 1e-4, (nz, n, n)), 0.0)
    t = 285.0 + rng.normal(0, 0.5, (nz, n, n))
    p = np.linspace(1.0e5, 9.0e4, nz)
    qv = (
        0.8
        * thermo.saturation_mixing_ratio(p[:, None, None], t)
        * (1 + rng.normal(0, 0.02, t.shape))
    )
    rh = thermo.relative_humidity(p[:, None, None], t, qv)
    return {
        "qc": qc,
        "qv": qv,
        "T": t,
        "w": rng.normal(0, 1, (nz, n, n)),
        "rh": rh,
        "cloud_mask": (qc > 1e-5).astype(np.int8),
        "lwp": qc.sum(axis=0) * 50.0,
        "p": p,
    }


SETTINGS = coarsen_settings(scales=(), moments=("qc", "w", "qv", "T", "rh"))


@pytest.fixture(scope="module")
def fine():
    return random_fine(np.random.default_rng(42))


def test_moments_against_numpy_and_scipy(fine):
    f = 6
    out = coarse_fields(fine, np.arange(4.0) * 100 + 50, scales_for([f]), SETTINGS)["f6"]
    w = fine["w"]
    blocks = w.reshape(4, 4, f, 4, f).transpose(0, 1, 3, 2, 4).reshape(4, 4, 4, f * f)
    np.testing.assert_allclose(out["w_mean"], blocks.mean(-1), rtol=1e-12)
    np.testing.assert_allclose(out["w_var"], blocks.var(-1), rtol=1e-12)  # ddof=0
    np.testing.assert_allclose(
        out["w_skew"], scipy.stats.skew(blocks, axis=-1, bias=True), rtol=1e-9, atol=1e-12
    )


def test_against_xarray_coarsen(fine):
    da = xr.DataArray(fine["T"], dims=("z", "y", "x"))
    for f in (2, 3, 4, 8, 12):
        out = coarse_fields(fine, np.arange(4.0), scales_for([f]), SETTINGS)[f"f{f}"]
        ref = da.coarsen(y=f, x=f)
        np.testing.assert_allclose(out["T_mean"], ref.mean().values, rtol=1e-13)
        np.testing.assert_allclose(out["T_var"], ref.var().values, rtol=1e-9)


@pytest.mark.parametrize("factors", [[2, 4, 12, 24], [3, 6], [2, 3, 8, 24]])
def test_conservation_and_whole_domain(fine, factors):
    out = coarse_fields(fine, np.arange(4.0), scales_for(factors), SETTINGS)
    for f in factors:
        d = out[f"f{f}"]
        for v in ("qc", "w", "T"):
            np.testing.assert_allclose(
                d[f"{v}_mean"].mean(axis=(1, 2)), fine[v].mean(axis=(1, 2)), rtol=1e-12
            )
        np.testing.assert_allclose(
            d["cloud_fraction"].mean(axis=(1, 2)), fine["cloud_mask"].mean(axis=(1, 2)), rtol=1e-12
        )
        np.testing.assert_allclose(d["lwp_mean"].mean(), fine["lwp"].mean(), rtol=1e-12)
    d = out["f24"] if 24 in factors else None
    if d is not None:  # one cell: domain statistics (numpy, scipy)
        for v in ("w", "qv"):
            flat = fine[v].reshape(4, -1)
            np.testing.assert_allclose(d[f"{v}_var"][:, 0, 0], flat.var(axis=1), rtol=1e-10)
            np.testing.assert_allclose(
                d[f"{v}_skew"][:, 0, 0], scipy.stats.skew(flat, axis=1, bias=True), rtol=1e-8
            )
        np.testing.assert_allclose(
            d["cloud_cover"][0, 0], np.any(fine["cloud_mask"] > 0, axis=0).mean(), rtol=1e-12
        )


def test_cloud_fraction_on_constructed_masks(fine):
    f = dict(fine)
    n = 24
    checker = (np.add.outer(np.arange(n), np.arange(n)) % 2).astype(np.int8)
    quarter = np.zeros((n, n), np.int8)
    quarter[:12, :12] = 1
    f["cloud_mask"] = np.stack(
        [checker, quarter, np.ones((n, n), np.int8), np.zeros((n, n), np.int8)]
    )
    out = coarse_fields(f, np.arange(4.0), scales_for([2, 24]), SETTINGS)
    np.testing.assert_array_equal(out["f2"]["cloud_fraction"][0], 0.5)  # checkerboard
    assert out["f24"]["cloud_fraction"][1, 0, 0] == 0.25
    np.testing.assert_array_equal(out["f2"]["cloud_fraction"][2], 1.0)
    np.testing.assert_array_equal(out["f2"]["cloud_fraction"][3], 0.0)
    # column cover: any cloudy level in the column
    np.testing.assert_array_equal(out["f2"]["cloud_cover"], 1.0)


def test_zero_variance_convention(fine):
    f = dict(fine)
    f["qc"] = np.zeros_like(fine["qc"])
    out = coarse_fields(f, np.arange(4.0), scales_for([4]), SETTINGS)["f4"]
    assert np.all(out["qc_var"] == 0.0) and np.all(out["qc_skew"] == 0.0)


def test_rh_of_means_is_rh_of_the_coarse_means(fine):
    mpcalc = pytest.importorskip("metpy.calc")
    from metpy.units import units

    d = coarse_fields(fine, np.arange(4.0), scales_for([6]), SETTINGS)["f6"]
    ref = mpcalc.relative_humidity_from_mixing_ratio(
        d["p_mean"] * units.Pa, d["T_mean"] * units.K, d["qv_mean"] * units("kg/kg")
    ).magnitude
    np.testing.assert_allclose(d["rh_of_means"], ref, rtol=5e-3)  # Bolton vs Ambaum (2020)
    # the mean of the fine rh is not the rh of the means (Jensen): both are kept
    assert not np.allclose(d["rh_mean"], d["rh_of_means"], rtol=1e-6)


def test_vertical_derivative_on_stretched_grid():
    # f(z) = sin(z / 400 m); df/dz = cos(z / 400 m) / 400 m (analytic). Second-order
    # differences: the error is bounded by h**2 * max|d3f/dz3| (one-sided ends, Taylor),
    # and it falls by 4 when the stretched grid is refined by 2.
    def max_error(n: int) -> tuple[float, float]:
        s = np.linspace(0.0, 1.0, n + 1)
        z = 20.0 + 2500.0 * (0.3 * s + 0.7 * s**2)
        f = np.broadcast_to(np.sin(z / 400.0)[:, None, None], (z.size, 2, 2))
        d = vertical_derivative(f, z)
        h = np.diff(z).max()
        return float(np.abs(d[:, 0, 0] - np.cos(z / 400.0) / 400.0).max()), h

    e1, h1 = max_error(120)
    e2, _ = max_error(240)
    assert e1 < h1**2 / 400.0**3
    assert 3.5 < e1 / e2 < 4.5
    # one-sided ends are second order too: a quadratic is differentiated exactly
    z = 20.0 + 2500.0 * np.linspace(0.0, 1.0, 50) ** 1.7
    q = 3.0 + 2e-3 * z + 4e-6 * z**2
    np.testing.assert_allclose(vertical_derivative(q, z), 2e-3 + 8e-6 * z, rtol=1e-9)


def test_native_patches_reassemble_exactly(fine):
    for f, halo in ((4, 0), (6, 0), (4, 2), (8, 3)):
        p = extract_patches(fine["qc"], f, 16, halo)
        assert p.shape == (4, 24 // f, 24 // f, f + 2 * halo, f + 2 * halo)
        np.testing.assert_array_equal(reassemble(p, halo), fine["qc"])
    # the halo wraps periodically: left halo of the first patch is the domain's last column
    p = extract_patches(fine["w"], 6, 16, 1)
    np.testing.assert_array_equal(p[:, 0, 0, 1:-1, 0], fine["w"][:, 0:6, -1])


def test_downsampled_patches_are_block_means(fine):
    p = extract_patches(fine["w"], 12, 4)  # d = 3
    assert p.shape == (4, 2, 2, 4, 4)
    ref = xr.DataArray(fine["w"], dims=("z", "y", "x")).coarsen(y=3, x=3).mean().values
    np.testing.assert_allclose(reassemble(p), ref, rtol=1e-13)


def test_patch_size_must_divide_factor():
    with pytest.raises(ScaleError, match=r"patch sizes that divide it: \[1, 2, 3, 4, 6\]"):
        extract_patches(np.zeros((24, 24)), 12, 5)


def test_scale_resolution_messages():
    assert parse_scale("2 km").resolve(50.0, 600, 600, case="c").factor == 40
    assert parse_scale(5).resolve(50.0, 500, 500, case="c").length_m == 250.0
    with pytest.raises(ScaleError) as err:
        parse_scale("700 m").resolve(50.0, 60, 60, case="c9")
    msg = str(err.value)
    assert "c9" in msg and "60 x 60" in msg and "500 m" in msg and "3000 m" in msg
    with pytest.raises(ScaleError, match="not a whole number"):
        parse_scale("125 m").resolve(50.0, 60, 60, case="c")
    assert [s.label for s in parse_scales(["400 m", "2 km", 8])] == ["400m", "2000m", "f8"]


# ------------------------------------------------------------- the per-case stores


@pytest.fixture(scope="module")
def scale_stores(tmp_path_factory, demo_root):
    out = tmp_path_factory.mktemp("coarse")
    canon = ingest_case(
        case="sc-ostra-02",
        raw=str(demo_root / "sc-ostra-02" / "*.nc"),
        varmap=REPO / "config/varmaps/flavour-beta.yaml",
        settings=ingest_settings(
            spinup="1 h",
            cloud_threshold="1e-5 kg/kg",
        ),
        out=out / "canonical.zarr",
    )
    settings = coarsen_settings(
        scales=tuple(parse_scales(["100 m", "400 m", "1200 m", "7 km"])),
        patch_scales=("400m",),
        patch_size=4,
        on_misfit="skip",
    )
    labels = ["100m", "400m", "1200m", "7000m"]
    coarsen_case(canon, {lab: out / f"scale-{lab}.zarr" for lab in labels}, settings)
    return canon, {lab: out / f"scale-{lab}.zarr" for lab in labels}


def test_store_matches_xarray_coarsen_of_canonical(scale_stores):
    canon, stores = scale_stores
    fine = open_store(canon)
    for lab, f in (("100m", 2), ("400m", 8), ("1200m", 24)):
        ds = open_store(stores[lab])
        assert ds.attrs["factor"] == f and ds.attrs["length_m"] == f * 50.0
        ref = fine["qc"].astype("float64").coarsen(y=f, x=f)
        np.testing.assert_allclose(ds["qc_mean"].values, ref.mean().values, rtol=1e-6, atol=1e-12)
        np.testing.assert_allclose(ds["qc_var"].values, ref.var().values, rtol=2e-5, atol=1e-15)
        assert ds["qc_mean"].dtype == np.float32
        np.testing.assert_allclose(ds["x"].values, fine["x"].values.reshape(-1, f).mean(1))
        np.testing.assert_allclose(
            ds["x_bounds"].values[:, 1] - ds["x_bounds"].values[:, 0], f * 50.0
        )


def test_store_cf_attributes(scale_stores):
    _, stores = scale_stores
    ds = open_store(stores["400m"])
    assert ds["T_var"].attrs["units"] == "K2"
    assert ds["T_var"].attrs["units_metadata"] == "temperature: difference"
    assert ds["w_var"].attrs["units"] == "m2 s-2"
    assert ds["qc_mean"].attrs["cell_methods"] == "area: mean"
    assert ds["w_var"].attrs["cell_methods"] == "area: variance"
    assert ds["cloud_fraction"].attrs["standard_name"] == "cloud_area_fraction_in_atmosphere_layer"
    assert ds["qc_patch"].dims == ("time", "z", "y", "x", "py", "px")
    assert ds["qc_patch"].shape[-2:] == (4, 4)  # f = 8 downsampled to P = 4
    steps = [s["step"] for s in load(ds.attrs)["steps"]]
    assert steps == ["ingest", "coarsen"]


def test_misfit_scale_skipped_and_recorded(scale_stores):
    _, stores = scale_stores
    ds = open_store(stores["7000m"])
    assert len(ds.data_vars) == 0
    assert "does not divide" in ds.attrs["skipped"]
    step = load(ds.attrs)["steps"][-1]
    assert step["skipped"] and step["skipped"][0]["scale"] == "7 km"


@pytest.mark.parametrize("profile", [True, False])
def test_slabs_and_output_dtype_do_not_change_the_numbers(profile: bool) -> None:
    # Coarsening z-slab by z-slab gives exactly the whole-column result, and float32
    # outputs are the float64 results rounded once (the arithmetic stays float64).
    fine = random_fine(np.random.default_rng(7), nz=7)
    if not profile:
        fine["p"] = np.broadcast_to(fine["p"][:, None, None], fine["qc"].shape).copy()
    settings = coarsen_settings(
        scales=(),
        moments=("qc", "w", "qv", "T", "rh"),
        patch_variables=("qc", "w"),
        patch_scales=("f6", "f12"),
        patch_size=6,
    )
    scales = scales_for([2, 6, 12, 24])
    whole = coarse_fields(fine, np.arange(7.0) * 40 + 20, scales, settings)
    for levels in (1, 3):
        sliced = coarse_fields(fine, np.arange(7.0) * 40 + 20, scales, settings, slab_levels=levels)
        for lab, d in whole.items():
            assert sliced[lab].keys() == d.keys()
            for name, a in d.items():
                np.testing.assert_array_equal(sliced[lab][name], a, err_msg=f"{lab} {name}")
    f32 = coarse_fields(fine, np.arange(7.0) * 40 + 20, scales, settings, dtype=np.float32)
    for lab, d in whole.items():
        for name, a in d.items():
            assert f32[lab][name].dtype == np.float32
            np.testing.assert_array_equal(f32[lab][name], a.astype(np.float32), err_msg=name)


def test_streamed_chunk_rows_equal_whole_columns(tmp_path, demo_root):
    # A canonical store with several z-chunks, coarsened once with whole-column output
    # chunks and once with chunks of a few levels, which coarsening writes row by row
    # while it computes: the stored numbers are the same, only the chunking differs.
    canon = ingest_case(
        case="sc-ostra-02",
        raw=str(demo_root / "sc-ostra-02" / "*.nc"),
        varmap=REPO / "config/varmaps/flavour-beta.yaml",
        settings=ingest_settings(spinup="1 h", cloud_threshold="1e-5 kg/kg", chunk_mib=0.02),
        out=tmp_path / "canonical.zarr",
    )
    fine = open_store(canon)
    nz, slab = fine.sizes["z"], fine["qc"].encoding["chunks"][1]
    assert slab < nz
    labels = ["100m", "400m"]
    stores = {}
    for mib in (1000.0, 0.001):
        settings = coarsen_settings(
            scales=tuple(parse_scales(["100 m", "400 m"])),
            patch_scales=("400m",),
            patch_size=4,
            chunk_mib=mib,
        )
        outs = {lab: tmp_path / f"{mib}-{lab}.zarr" for lab in labels}
        coarsen_case(canon, outs, settings)
        stores[mib] = {lab: open_store(p) for lab, p in outs.items()}
    for lab in labels:
        whole, rows = stores[1000.0][lab], stores[0.001][lab]
        assert set(whole.data_vars) == set(rows.data_vars)
        for name in whole.data_vars:
            np.testing.assert_array_equal(rows[name].values, whole[name].values, err_msg=name)
            if whole[name].ndim >= 4:
                assert whole[name].encoding["chunks"][1] == nz
        for name in rows.data_vars:
            if rows[name].ndim >= 4:  # whole multiples of the canonical chunk height
                zc = rows[name].encoding["chunks"][1]
                assert zc == nz or zc % slab == 0, name
    assert stores[0.001]["100m"]["qc_mean"].encoding["chunks"][1] < nz  # rows were streamed


def test_z_chunks_are_whole_slabs_near_the_budget():
    from lesprep.scales.step import ZPieces, z_chunk_levels

    # 256 x 256 float32 levels are 256 KiB: 8 MiB is 32 levels, one 32-level slab
    assert z_chunk_levels((160, 256, 256), 4, 8.0, 32) == 32
    assert z_chunk_levels((160, 128, 128), 4, 8.0, 32) == 128  # 4 slabs
    assert z_chunk_levels((160, 64, 64), 4, 8.0, 32) == 160  # the column fits
    assert z_chunk_levels((160, 1024, 1024), 4, 1.0, 32) == 32  # never below one slab
    assert z_chunk_levels((100, 256, 256), 4, 24.0, 32) == 96  # 3 slabs; last row is short
    pieces = ZPieces((10, 2, 2), np.float32, 4)
    pieces[0:4] = 1.0
    pieces[4:6] = 2.0
    with pytest.raises(ValueError, match="cross the z-chunk boundary"):
        pieces[6:9]
    done = pieces.take_complete(6)
    assert [z for z, _ in done] == [0] and np.all(done[0][1] == 1.0)
    pieces[6:8] = 3.0
    pieces[8:10] = 4.0
    assert [(z, a.shape[0]) for z, a in pieces.take_complete(10)] == [(4, 4), (8, 2)]


# ------------------------------------------------------------- small grids, short columns


@pytest.mark.parametrize("nz", [1, 2, 3])
def test_short_columns_and_a_one_cell_domain(nz):
    # a 1 x 1 coarse domain (the factor is the whole domain), one time, one to three levels
    fine = random_fine(np.random.default_rng(3), nz=nz, n=12)
    z = 25.0 + 50.0 * np.arange(nz)
    out = coarse_fields(fine, z, scales_for([12]), SETTINGS)["f12"]
    for name, arr in out.items():
        assert arr.shape[-2:] == (1, 1), name
    # block means and variance against numpy over the whole domain
    np.testing.assert_allclose(out["qc_mean"][:, 0, 0], fine["qc"].mean(axis=(1, 2)), rtol=1e-12)
    np.testing.assert_allclose(out["w_var"][:, 0, 0], fine["w"].var(axis=(1, 2)), rtol=1e-10)
    rh = out["rh_of_means"][:, 0, 0]
    if nz == 1:
        assert np.isnan(out["drh_dz"]).all()  # undefined with one level (documented)
    elif nz == 2:  # the one finite difference (numpy), at both levels
        np.testing.assert_allclose(out["drh_dz"][:, 0, 0], np.repeat(np.diff(rh) / 50.0, 2))
    else:  # second order on three levels: numpy's gradient with edge_order=2
        ref = np.gradient(rh, z, edge_order=2)
        np.testing.assert_allclose(out["drh_dz"][:, 0, 0], ref, rtol=1e-12)
    assert np.isfinite(out["cf_sundqvist"]).all() and np.isfinite(out["lwp_mean"]).all()
