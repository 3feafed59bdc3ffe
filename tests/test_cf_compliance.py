"""CF compliance of the stores, judged by an independent checker.

The IOOS compliance-checker (PyPI ``compliance-checker``, its ``cf:1.11`` suite) runs on
NetCDF exports (:func:`lesprep.store.export_netcdf`) of two canonical stores (an archive
whose times are durations since the start of the run, one whose times are dates), a
scale store and a set store built from the demo cases. Its Errors section (the
high-priority checks) must be empty, and its warnings (medium priority) must be exactly
the ones listed in :data:`KEPT_WARNINGS`, each with the reason it is kept.

The export itself is checked against netCDF4 and xarray (typed flag values, no fill value
on coordinates and bounds, the stored numbers unchanged, CF times decoded by xarray to
the dates the archive gave) and the CF time units against cftime.
"""

from __future__ import annotations

import datetime as dt
import json
import os
from pathlib import Path

import cftime
import netCDF4
import numpy as np
import pandas as pd
import pytest
import xarray as xr
from hypothesis import given, settings
from hypothesis import strategies as st

from lesprep.canonical.ingest import ingest_case
from lesprep.catalogue import temperature_metadata
from lesprep.raw.timeaxis import NOMINAL_ORIGIN, cf_time_units
from lesprep.scales.coarsen import coarsen_case
from lesprep.scales.layers import LayerSetSpec
from lesprep.scales.spec import parse_scales
from lesprep.sets.assemble import build_set
from lesprep.store import export_netcdf, open_store
from settings_helpers import coarsen_settings, ingest_settings, set_settings

pytestmark = pytest.mark.filterwarnings(
    "ignore:The ioos_sos checker is deprecated:DeprecationWarning"  # a checker plugin we skip
)

REPO = Path(__file__).resolve().parents[1]
SUITE = "cf:1.11"
CASES = {"sc-ostra-01": "alpha", "sc-ostra-02": "beta"}
"""Flavour alpha writes time as seconds since the start of the run, beta as hours since
a date: both kinds of time origin."""
REGIMES = {"sc-ostra-01": "stratocumulus", "sc-ostra-02": "stratocumulus"}
LAYERS = LayerSetSpec(
    name="cf",
    kind="pressure",
    interfaces=(1.02e5, 1.0e5, 9.6e4, 9.0e4, 8.0e4),
    source="config",
    scales=("400m",),
)
"""A pressure layer set (mapped to heights per case) for the layer store's check."""

PATCH_ORDER = (
    "{}'s spatio-temporal dimensions are not in the recommended order T, Z, Y, X and/or "
    "further dimensions are not located left of T, Z, Y, X. The dimensions (and their "
    "guessed types) are time (T), z (Z), y (Y), x (X), py (U), px (U) (with U: "
    "other/unknown; L: unlimited)."
)
"""Kept on purpose (CF 2.4 recommends, does not require, extra dimensions left of T): a
patch ``<v>_patch (time, z, y, x, py, px)`` keeps each coarse cell's fine patch
contiguous, indexed like every other output of the scale store, and a set stacks it as
``(sample, py, px)``; moving ``py, px`` first would scatter one cell's patch over the
whole store."""

KEPT_WARNINGS: dict[str, set[str]] = {
    "canonical": set(),
    "scale": set(),
    "layer": set(),
    "set": set(),
}
"""Checker warnings kept on purpose, per kind of store (the text the checker prints),
besides :data:`PATCH_ORDER` for each patch variable of a scale store."""


def _checker():
    """The checker's runner: missing is a failure in CI (the test extras install it)."""
    if os.environ.get("CI") == "true":
        from compliance_checker.runner import CheckSuite, ComplianceChecker
    else:
        runner = pytest.importorskip("compliance_checker.runner")
        CheckSuite, ComplianceChecker = runner.CheckSuite, runner.ComplianceChecker
    CheckSuite().load_all_available_checkers()
    return ComplianceChecker


@pytest.fixture(scope="module")
def stores(tmp_path_factory, demo_root) -> dict[str, Path]:
    """A canonical store per time-origin kind, their scale stores and a set of both."""
    out = tmp_path_factory.mktemp("cf")
    ing = ingest_settings(spinup="1 h", cloud_threshold="1e-5 kg/kg")
    co = coarsen_settings(
        scales=tuple(parse_scales(["400 m"])),
        patch_scales=("400m",),
        patch_size=4,
        covariances=(("qv", "T"),),
        layers=(LAYERS,),
    )
    paths: dict[str, Path] = {}
    scale: dict[str, Path] = {}
    for case, flavour in CASES.items():
        canon = ingest_case(
            case=case,
            raw=str(demo_root / case / "*.nc"),
            varmap=REPO / f"config/varmaps/flavour-{flavour}.yaml",
            settings=ing,
            out=out / case / "canonical.zarr",
            regime=REGIMES[case],
        )
        paths[f"canonical-{flavour}"] = canon
        written = coarsen_case(
            canon,
            {
                "400m": out / case / "scale-400m.zarr",
                "400m_layers-cf": out / case / "scale-400m_layers-cf.zarr",
            },
            co,
        )
        scale[case] = written["400m"]
        paths[f"scale-{flavour}"] = scale[case]
        paths[f"layer-{flavour}"] = written["400m_layers-cf"]
    paths["set"] = build_set(
        scale,
        REGIMES,
        out / "sets" / "train" / "scale-400m.zarr",
        set_settings(shuffle=False, chunk_mib=0.05),
        split="train",
        scale="400m",
    )
    return paths


def check(store: Path, tmp_path: Path) -> dict:
    """The checker's JSON report of ``store`` exported to NetCDF (the suite's part)."""
    nc = export_netcdf(store, tmp_path / f"{store.stem}.nc")
    report = tmp_path / f"{store.stem}.json"
    _checker().run_checker(
        str(nc), [SUITE], 0, "normal", output_filename=str(report), output_format="json"
    )
    return json.loads(report.read_text())[SUITE]


def failed(results: list[dict]) -> set[str]:
    """Messages of the checks that did not score full marks."""
    out = set()
    for r in results:
        scored, possible = r["value"]
        if scored < possible:
            out.update(str(m) for m in r["msgs"])
    return out


@pytest.mark.parametrize(
    "kind", ["canonical-alpha", "canonical-beta", "scale-alpha", "layer-beta", "set"]
)
def test_checker_finds_no_error(stores, tmp_path, kind):
    report = check(stores[kind], tmp_path)
    assert failed(report["high_priorities"]) == set()  # the checker's Errors section
    with open_store(stores[kind]) as ds:
        patches = [
            str(v)
            for v in ds.data_vars
            if ds[v].dims[-2:] == ("py", "px") and ds[v].dims[0] == "time"
        ]
    kept = KEPT_WARNINGS[kind.split("-")[0]] | {PATCH_ORDER.format(v) for v in patches}
    assert failed(report["medium_priorities"]) == kept
    assert failed(report["low_priorities"]) == set()


def test_export_types_fills_and_values(stores, tmp_path):
    nc_path = export_netcdf(stores["canonical-alpha"], tmp_path / "c.nc")
    with netCDF4.Dataset(nc_path) as nc:
        mask = nc["cloud_mask"]
        # CF 3.5: flag_values of the variable's own type (read back by netCDF4)
        assert mask.flag_values.dtype == mask.dtype == np.dtype("int8")
        assert mask.flag_values.tolist() == [0, 1]
        for name in ("time", "z", "y", "x", "z_bounds"):
            assert "_FillValue" not in nc[name].ncattrs(), name  # CF 2.5.1, 7.1
        assert nc["T"].units_metadata == "temperature: on_scale"  # CF 1.11 3.1.2
        assert nc["x"].standard_name == "projection_x_coordinate"
    with (
        xr.open_dataset(nc_path, decode_times=False) as back,
        open_store(stores["canonical-alpha"]) as ds,
    ):
        for name in ds.variables:
            np.testing.assert_array_equal(back[name].values, ds[name].values, err_msg=name)


def test_times_decode_to_the_archive_dates(stores, tmp_path, demo_root):
    """xarray decodes the stored CF times to the dates the beta archive gives (netCDF4's
    num2date of the raw times), and the alpha archive's durations to the nominal origin
    plus the duration."""
    with open_store(stores["canonical-beta"]) as ds:
        kept = ds["time"].size
    raw = []
    for f in sorted((demo_root / "sc-ostra-02").glob("*.nc")):
        with netCDF4.Dataset(f) as nc:
            if "time" in nc.variables:
                t = nc["time"]
                raw.extend(netCDF4.num2date(t[:], t.units, only_use_cftime_datetimes=False))
    want = np.array(sorted(set(raw))[-kept:], dtype="datetime64[ns]")
    with xr.open_zarr(stores["canonical-beta"], consolidated=True) as ds:
        np.testing.assert_array_equal(ds["time"].values, want)
    with (
        open_store(stores["canonical-alpha"]) as plain,
        xr.open_zarr(stores["canonical-alpha"], consolidated=True) as ds,
    ):
        seconds = plain["time"].values
        origin = np.datetime64(pd.Timestamp(NOMINAL_ORIGIN))
        np.testing.assert_array_equal(
            ds["time"].values, origin + (seconds * 1e9).astype("timedelta64[ns]")
        )


def test_set_export(stores, tmp_path):
    """Per-sample coordinates: no fill value, case and regime as strings (the case ids),
    times the per-case stores' numbers (read back with netCDF4)."""
    nc_path = export_netcdf(stores["set"], tmp_path / "set.nc")
    with netCDF4.Dataset(nc_path) as nc:
        for name in ("time", "z", "y", "x", "case", "regime"):
            assert "_FillValue" not in nc[name].ncattrs(), name
            assert "bounds" not in nc[name].ncattrs() and "axis" not in nc[name].ncattrs()
        times = np.asarray(nc["time"][:])
        cases = np.asarray(nc["case"][:]).astype(str)
    assert set(cases) <= set(CASES)
    for case in set(cases):
        with open_store(stores[f"scale-{CASES[case]}"]) as ds:
            assert set(np.unique(times[cases == case])) == set(ds["time"].values)


@settings(max_examples=60, deadline=None)
@given(
    st.datetimes(min_value=dt.datetime(1900, 1, 1), max_value=dt.datetime(2200, 12, 31)),
)
def test_cf_time_units_name_the_origin(when):
    """cftime (the CF reference implementation of time units) reads time zero back as the
    origin; it parses fractional seconds of a reference time as a float, hence 1 us."""
    units = cf_time_units(when.isoformat())
    got = cftime.num2date(0.0, units, calendar="standard", only_use_cftime_datetimes=False)
    assert abs(got - when) <= dt.timedelta(microseconds=1)


def test_durations_use_the_nominal_origin():
    units = cf_time_units("start of run")
    # cftime: time zero of these units is the nominal date
    got = cftime.num2date(0.0, units, calendar="standard")
    assert (got.year, got.month, got.day, got.hour) == (1970, 1, 1, 0)


@pytest.mark.parametrize(
    ("units", "difference", "want"),
    [
        ("K", False, "temperature: on_scale"),  # CF 1.11 3.1.2: a temperature on its scale
        ("K", True, "temperature: difference"),  # a deviation of a temperature
        ("K2", False, "temperature: difference"),  # a variance
        ("K kg kg-1", False, "temperature: difference"),  # a covariance
        ("degC", False, "temperature: on_scale"),
        ("kg kg-1", False, None),
        ("1", False, None),
    ],
)
def test_temperature_units_metadata(units, difference, want):
    got = temperature_metadata(units, difference=difference).get("units_metadata")
    assert got == want


def test_export_command(stores, tmp_path, capsys):
    from lesprep.cli import main

    out = tmp_path / "scale.nc"
    assert main(["export", str(stores["scale-beta"]), str(out)]) == 0
    with netCDF4.Dataset(out) as nc, open_store(stores["scale-beta"]) as ds:
        assert set(nc.variables) == {str(v) for v in ds.variables}
    assert main(["export", str(tmp_path / "absent.zarr"), str(tmp_path / "x.nc")]) == 1
    err = capsys.readouterr().err
    assert "absent.zarr" in err and "zarr.json" in err
    assert not (tmp_path / "x.nc").exists()
