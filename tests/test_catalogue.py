"""The variable catalogue: units arithmetic against pint, and a new variable flowing
from a raw file to its moments in a scale store with no code change outside its entry."""

from __future__ import annotations

import shutil

import netCDF4
import numpy as np
import pytest
import yaml
from cf_xarray.units import units as UREG

from conftest import REPO
from lesprep import catalogue
from lesprep.canonical.ingest import ingest_case
from lesprep.errors import ConfigError
from lesprep.scales.coarsen import coarsen_case
from lesprep.scales.spec import parse_scales
from lesprep.store import open_store
from settings_helpers import coarsen_settings, ingest_settings, workflow_settings


@pytest.mark.parametrize("units", ["kg kg-1", "K", "m s-1", "Pa", "kg m-2", "m2 s-2"])
def test_variance_units_are_the_square(units):
    # reference: pint's own unit algebra
    got = UREG.Quantity(1.0, catalogue.variance_units(units))
    ref = UREG.Quantity(1.0, units) ** 2
    assert got.dimensionality == ref.dimensionality
    assert got.to(ref.units).magnitude == pytest.approx(1.0)


def test_product_units_and_dimensionless():
    got = UREG.Quantity(1.0, catalogue.product_units("m s-1", "kg kg-1"))
    ref = UREG.Quantity(1.0, "m s-1") * UREG.Quantity(1.0, "kg kg-1")
    assert got.to(ref.units).magnitude == pytest.approx(1.0)
    assert catalogue.variance_units("1") == "1"


def test_every_builtin_has_what_the_stages_ask():
    for v in catalogue.variables():
        assert v.units and v.long_name and v.label
        if v.kind == "mapped":
            assert "direct" in v.quantities
    assert catalogue.required_inputs() == ("p", "qc", "qv", "T", "w")


def test_unknown_names_are_refused_with_the_known_ones():
    with pytest.raises(ConfigError, match="known"):
        catalogue.get("nonexistent")
    # a name a variable map may add passes the config; the job checks the store has it
    # (tests/test_open_variables.py); a name that cannot be a variable does not
    with pytest.raises(ConfigError, match=r"coarsen\.moments lists '1bogus'"):
        workflow_settings(coarsen={"scales": ["1 km"], "moments": ["qc", "1bogus"]})
    with pytest.raises(ConfigError, match="cannot get moments"):
        workflow_settings(coarsen={"scales": ["1 km"], "moments": ["cloud_mask"]})
    with pytest.raises(ConfigError, match="already"):
        catalogue.register(catalogue.get("qc"))


@pytest.fixture
def tracer():
    """An invented passive scalar, registered through the public interface."""
    var = catalogue.register(
        catalogue.Variable(
            name="tracer_s",
            units="kg kg-1",
            long_name="passive scalar mixing ratio",
            label="passive scalar",
            plausible=(0.0, 1.0),
        )
    )
    yield var
    catalogue.unregister("tracer_s")


def test_a_registered_variable_flows_to_its_moments(tracer, case_copy, tmp_path):
    raw = case_copy("sc-ostra-01")  # flavour alpha: one file per output time
    rng = np.random.default_rng(5)
    for f in sorted(raw.glob("*.nc")):
        with netCDF4.Dataset(f, "a") as nc:
            v = nc.createVariable("scal", "f4", ("time", "zc", "y", "x"))
            v.units = "g kg-1"  # converted to the catalogue's kg kg-1
            v[:] = rng.uniform(0.0, 5.0, size=v.shape).astype("f4")
    vm = yaml.safe_load((REPO / "config/varmaps/flavour-alpha.yaml").read_text())
    vm["variables"]["tracer_s"] = {"raw": "scal", "dims": ["time", "zc", "y", "x"]}
    vm_path = tmp_path / "alpha-with-scalar.yaml"
    vm_path.write_text(yaml.safe_dump(vm))

    canon = ingest_case(
        case="c-tracer",
        raw=str(raw / "*.nc"),
        varmap=vm_path,
        settings=ingest_settings(spinup="0 s"),
        out=tmp_path / "canonical.zarr",
    )
    fine = open_store(canon)
    assert fine["tracer_s"].attrs["units"] == "kg kg-1"
    assert float(fine["tracer_s"].max()) <= 5e-3 * (1 + 1e-6)

    settings = coarsen_settings(
        scales=tuple(parse_scales(["400 m"])), moments=("qc", "tracer_s"), patch_scales=()
    )
    out = coarsen_case(canon, {"400m": tmp_path / "scale-400m.zarr"}, settings)["400m"]
    ds = open_store(out)
    for name in ("tracer_s_mean", "tracer_s_var", "tracer_s_skew"):
        assert name in ds
    assert ds["tracer_s_var"].attrs["units"] == "kg2 kg-2"
    # reference: numpy block mean and population variance of the stored fine field
    f = 8  # 400 m / 50 m
    x = fine["tracer_s"].values.astype(np.float64)
    nt, nz, ny, nx = x.shape
    blocks = x.reshape(nt, nz, ny // f, f, nx // f, f)
    np.testing.assert_allclose(
        ds["tracer_s_mean"].values, blocks.mean(axis=(3, 5)), rtol=1e-6, atol=1e-12
    )
    np.testing.assert_allclose(
        ds["tracer_s_var"].values, blocks.var(axis=(3, 5)), rtol=1e-5, atol=1e-15
    )
    shutil.rmtree(tmp_path / "canonical.zarr")
