"""Ingest: every demo flavour to the same canonical conventions; bad inputs refused."""

from __future__ import annotations

import hashlib
from pathlib import Path

import netCDF4
import numpy as np
import pytest
from metpy.calc import vapor_pressure
from metpy.units import units

from lesprep.canonical.ingest import ingest_case
from lesprep.demo import demo_fields
from lesprep.errors import (
    ConfigError,
    GridError,
    InputError,
    NonFiniteError,
    RangeError,
    TimeAxisError,
    UnitError,
)
from lesprep.provenance import load
from lesprep.store import open_store, stale_temporaries
from settings_helpers import ingest_settings

REPO = Path(__file__).resolve().parents[1]
VARMAPS = {f: REPO / f"config/varmaps/flavour-{f}.yaml" for f in ("alpha", "beta")}

SETTINGS = ingest_settings(
    spinup="1 h",
    cloud_threshold="1e-5 kg/kg",
)


def run(case, raw_dir, flavour, out, **kw):
    settings = kw.pop("settings", SETTINGS)
    return ingest_case(
        case=case,
        raw=str(raw_dir / "*.nc"),
        varmap=VARMAPS[flavour],
        settings=settings,
        out=out,
        **kw,
    )


@pytest.fixture(scope="module")
def ingested(tmp_path_factory, demo_root, small_specs):
    out = tmp_path_factory.mktemp("canonical")
    stores = {}
    for case, spec in small_specs.items():
        stores[case] = run(case, demo_root / case, spec.flavour, out / case / "canonical.zarr")
    return stores


@pytest.mark.parametrize("case", ["sc-ostra-01", "sc-ostra-02", "cu-marro-01", "cu-marro-02"])
def test_flavours_share_canonical_conventions(ingested, small_specs, case):
    ds = open_store(ingested[case])
    spec = small_specs[case]
    assert ds["qc"].dims == ("time", "z", "y", "x")
    assert ds["w"].shape[1] == spec.nz  # w interpolated to centres, not nz + 1 faces
    units = {v: ds[v].attrs["units"] for v in ("qc", "qv", "T", "p", "w", "rh", "lwp")}
    assert units == {
        "qc": "kg kg-1",
        "qv": "kg kg-1",
        "T": "K",
        "p": "Pa",
        "w": "m s-1",
        "rh": "1",
        "lwp": "kg m-2",
    }
    assert ds["qc"].attrs["standard_name"] == "cloud_liquid_water_mixing_ratio"
    assert ds.attrs["Conventions"] == "CF-1.11, ACDD-1.3"
    # values equal the generator's own truth after the flavour's units, order and grid
    # are undone (float32 storage in the raw file and in the store: rtol 1e-5)
    times = spec.output_times_s()
    kept = np.nonzero(times >= times[0] + 3600.0 - 1e-6)[0]
    assert ds.sizes["time"] == kept.size
    j, ti = 1, int(kept[1])
    truth = demo_fields(spec, ti)
    for v in ("qc", "qv", "T", "w"):
        np.testing.assert_allclose(
            ds[v].isel(time=j).values,
            truth[v],
            rtol=2e-5,
            atol={"qc": 1e-8, "qv": 1e-8, "T": 1e-3, "w": 1e-5}[v],
        )
    p = ds["p"].values if ds["p"].dims == ("z",) else ds["p"].isel(time=j).values
    np.testing.assert_allclose(
        np.broadcast_to(p if p.ndim == 3 else p[:, None, None], truth["p"].shape),
        truth["p"],
        rtol=1e-6,
    )


def test_rh_and_lwp_against_metpy(ingested):
    mpcalc = pytest.importorskip("metpy.calc")
    from metpy.units import units

    ds = open_store(ingested["sc-ostra-01"]).isel(time=2)
    p, t, qv, qc = (ds[v].values.astype(np.float64) for v in ("p", "T", "qv", "qc"))
    ref = mpcalc.relative_humidity_from_mixing_ratio(
        p * units.Pa, t * units.K, qv * units("kg/kg")
    ).magnitude
    # MetPy uses Ambaum (2020) e_s; Bolton (1980) differs by < 0.3 % in this range
    np.testing.assert_allclose(ds["rh"].values, ref, rtol=5e-3)
    # dry-air density: MetPy's density of the dry air's partial pressure p - e
    pa = p * units.Pa
    e = mpcalc.vapor_pressure(pa, qv * units("kg/kg"))
    rho = mpcalc.density(pa - e, t * units.K, 0 * units("kg/kg")).to("kg/m^3").magnitude
    dz = np.diff(np.r_[ds.z_bounds.values[:, 0], ds.z_bounds.values[-1, 1]])
    lwp = (rho * qc * dz[:, None, None]).sum(axis=0)
    np.testing.assert_allclose(ds["lwp"].values, lwp, rtol=1e-4, atol=1e-9)


def test_mask_threshold_and_spinup(ingested, small_specs):
    ds = open_store(ingested["cu-marro-01"])
    np.testing.assert_array_equal(ds["cloud_mask"].values == 1, ds["qc"].values > 1e-5)
    times = small_specs["cu-marro-01"].output_times_s()
    np.testing.assert_allclose(ds.time.values, times[times >= times[0] + 3600.0])
    prov = load(ds.attrs)["steps"][0]
    assert prov["times_dropped_s"] == [float(t) for t in times[times < times[0] + 3600.0]]


def test_provenance_records_files_and_conversions(ingested, demo_root):
    ds = open_store(ingested["sc-ostra-01"])
    step = load(ds.attrs)["steps"][0]
    for rec in step["raw_files"]:
        with open(rec["path"], "rb") as fh:
            assert rec["sha256"] == hashlib.sha256(fh.read()).hexdigest()
    conv = {c["variable"]: c for c in step["conversions"] if "factor" in c}
    assert conv["qc"]["from_units"] == "g/kg" and conv["qc"]["factor"] == pytest.approx(1e-3)
    assert conv["T"]["offset"] == pytest.approx(273.15)
    assert conv["p"]["factor"] == pytest.approx(100.0)
    assert step["settings"]["spinup_s"] == 3600.0
    assert step["environment"]["packages"]["zarr"]
    assert "ingest" in ds.attrs["history"]


# ---------------------------------------------------------------------- bad inputs


def _set_attr(path, var, name, value):
    with netCDF4.Dataset(path, "a") as nc:
        if value is None:
            nc[var].delncattr(name)
        else:
            nc[var].setncattr(name, value)


def _expect_failure(tmp_path, case, raw, flavour, exc, match, **kw):
    out = tmp_path / "out" / case / "canonical.zarr"
    with pytest.raises(exc, match=match) as err:
        run(case, raw, flavour, out, **kw)
    assert not out.exists()
    assert stale_temporaries(out) == []
    return str(err.value)


def test_wrong_units_dimension(tmp_path, case_copy):
    raw = case_copy("sc-ostra-01")
    _set_attr(raw / "snap_0003.nc", "tempc", "units", "m s-1")
    msg = _expect_failure(tmp_path, "sc-ostra-01", raw, "alpha", UnitError, "m s-1")
    assert "snap_0003.nc" in msg and "tempc" in msg and "'K'" in msg


def test_missing_units(tmp_path, case_copy):
    raw = case_copy("sc-ostra-02")
    _set_attr(raw / "wc.nc", "wc", "units", None)
    msg = _expect_failure(tmp_path, "sc-ostra-02", raw, "beta", UnitError, "no units")
    assert "wc.nc" in msg


def test_gram_per_kg_labelled_kg_per_kg(tmp_path, case_copy):
    raw = case_copy("sc-ostra-01")
    for f in sorted(raw.glob("snap_*.nc")):
        _set_attr(f, "liq", "units", "kg/kg")
    msg = _expect_failure(tmp_path, "sc-ostra-01", raw, "alpha", RangeError, "qc spans")
    assert "g/kg" in msg


def test_nan_reports_count_and_location(tmp_path, case_copy):
    raw = case_copy("cu-marro-01")
    with netCDF4.Dataset(raw / "snap_0004.nc", "a") as nc:
        nc["vap"][0, 3, 5, 7] = np.nan
        nc["vap"][0, 4, 5, 7] = np.inf
    msg = _expect_failure(tmp_path, "cu-marro-01", raw, "alpha", NonFiniteError, "2 NaN/Inf")
    assert "zc=3, y=5, x=7" in msg and "snap_0004.nc" in msg


def test_spinup_longer_than_run(tmp_path, demo_root):
    long = ingest_settings(spinup="30 h", cloud_threshold="1e-5 kg/kg", ranges=SETTINGS.ranges)
    _expect_failure(
        tmp_path,
        "sc-pelle-01",
        demo_root / "sc-pelle-01",
        "alpha",
        TimeAxisError,
        "beyond the end",
        settings=long,
    )


def test_glob_matching_nothing(tmp_path):
    _expect_failure(
        tmp_path, "sc-ostra-01", tmp_path / "nowhere", "alpha", InputError, "matches no file"
    )


def test_duplicate_time_across_files(tmp_path, case_copy):
    raw = case_copy("sc-ostra-01")
    (raw / "snap_0009.nc").write_bytes((raw / "snap_0002.nc").read_bytes())
    _expect_failure(tmp_path, "sc-ostra-01", raw, "alpha", TimeAxisError, "duplicate")


def test_truncated_file(tmp_path, case_copy):
    raw = case_copy("sc-ostra-02")
    data = (raw / "theta.nc").read_bytes()
    (raw / "theta.nc").write_bytes(data[: len(data) // 3])
    _expect_failure(
        tmp_path, "sc-ostra-02", raw, "beta", InputError, "truncated or corrupt|cannot be read"
    )


def test_non_uniform_dx(tmp_path, case_copy):
    raw = case_copy("sc-ostra-01")
    for f in sorted(raw.glob("snap_*.nc")):
        with netCDF4.Dataset(f, "a") as nc:
            x = nc["x"][:]
            x[5:] += 7.0
            nc["x"][:] = x
    _expect_failure(tmp_path, "sc-ostra-01", raw, "alpha", GridError, "not uniform")


def test_files_on_different_grids(tmp_path, case_copy):
    raw = case_copy("sc-ostra-01")
    with netCDF4.Dataset(raw / "snap_0002.nc", "a") as nc:
        nc["x"][:] = nc["x"][:] * 2.0
    _expect_failure(tmp_path, "sc-ostra-01", raw, "alpha", GridError, "different grids")


def test_varmap_naming_missing_dimension(tmp_path, demo_root):
    text = (
        VARMAPS["beta"]
        .read_text()
        .replace("wc, dims: [time, x, y, z]", "wc, dims: [time, y, x, z]")
    )
    vm = tmp_path / "bad.yaml"
    vm.write_text(text)
    out = tmp_path / "o" / "canonical.zarr"
    with pytest.raises(ConfigError, match="dims"):
        ingest_case(
            case="sc-ostra-02",
            raw=str(demo_root / "sc-ostra-02" / "*.nc"),
            varmap=vm,
            settings=SETTINGS,
            out=out,
        )
    assert not out.exists()


def test_missing_variable(tmp_path, case_copy):
    raw = case_copy("sc-ostra-02")
    (raw / "wc.nc").unlink()
    _expect_failure(tmp_path, "sc-ostra-02", raw, "beta", InputError, "in none of")


def test_ingest_replaces_existing_output_atomically(tmp_path, demo_root):
    out = tmp_path / "c" / "canonical.zarr"
    run("sc-pelle-01", demo_root / "sc-pelle-01", "alpha", out)
    first = open_store(out)["qc"].values
    run("sc-pelle-01", demo_root / "sc-pelle-01", "alpha", out)
    np.testing.assert_array_equal(open_store(out)["qc"].values, first)
    assert stale_temporaries(out) == []


def test_stored_rh_against_metpy(ingested):
    # the stored rh field against e / e_s from the stored p, T, qv: the vapour pressure e
    # from MetPy, e_s from Bolton (1980) eq. 10 written out here, 611.2 Pa *
    # exp(17.67 (T - 273.15) / (T - 29.65)); saturated cells (the generator
    # saturation-adjusts) have rh = 1
    ds = open_store(ingested["sc-ostra-01"]).isel(time=-1)
    stored = ds["rh"].values.astype(np.float64)
    p = ds["p"].values.astype(np.float64) * units.Pa
    t = ds["T"].values.astype(np.float64) * units.K
    r = ds["qv"].values.astype(np.float64) * units("kg/kg")
    e = vapor_pressure(p, r).to("Pa").magnitude
    tk = t.magnitude
    ref = e / (611.2 * np.exp(17.67 * (tk - 273.15) / (tk - 29.65)))
    np.testing.assert_allclose(stored, ref, rtol=2e-6, atol=1e-6)
    np.testing.assert_allclose(stored[ds["qc"].values > 1e-6], 1.0, atol=2e-4)
