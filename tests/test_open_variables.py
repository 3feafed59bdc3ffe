"""The open variable set: any mapped raw field flows through ingest (and coarsening), the
condensate may be given as a mass fraction, and the cloud threshold may be a mass
concentration.

References: the definitions of mixing ratio and mass fraction (kg of water per kg of dry
air, and per kg of moist air including every water species), MetPy's density and vapour
pressure for the dry-air density, pint (through the UDUNITS strings) for the units.
"""

from __future__ import annotations

import glob

import netCDF4
import numpy as np
import pytest
import yaml
from metpy.calc import density, vapor_pressure
from metpy.units import units

from archive_edits import add_rich_fields, rich_varmap
from conftest import REPO
from lesprep.canonical.ingest import ingest_case
from lesprep.errors import ConfigError, InputError, UnitError
from lesprep.provenance import load
from lesprep.raw.varmap import parse_varmap
from lesprep.store import open_store
from settings_helpers import ingest_settings

ALPHA = yaml.safe_load((REPO / "config/varmaps/flavour-alpha.yaml").read_text())
RNG = np.random.default_rng(20261204)


def _varmap(tmp_path, extra: dict, **replace: dict) -> str:
    vm = {**ALPHA, "variables": {**ALPHA["variables"], **replace, **extra}}
    path = tmp_path / "varmap.yaml"
    path.write_text(yaml.safe_dump(vm))
    return str(path)


def _add(raw, name, values_of_file, *, dims=("time", "zc", "y", "x"), attrs=None):
    """Add a raw variable to every snapshot file; ``values_of_file(nc)`` gives its values."""
    for f in sorted(glob.glob(str(raw / "*.nc"))):
        with netCDF4.Dataset(f, "a") as nc:
            v = nc.createVariable(name, "f4", dims)
            for k, a in (attrs or {}).items():
                v.setncattr(k, a)
            v[:] = values_of_file(nc)


def _ingest(raw, out, varmap, **settings):
    return ingest_case(
        case="c1",
        raw=str(raw / "*.nc"),
        varmap=varmap,
        settings=ingest_settings(spinup="0 s", **settings),
        out=out,
    )


def test_ice_as_mass_fraction_rain_a_surface_field_and_a_tracer_flow_through(tmp_path, case_copy):
    raw = case_copy("sc-ostra-01")
    truth: dict[str, list[np.ndarray]] = {"qi": [], "qr": []}

    def ice(nc):  # true mixing ratios first, then the mass fraction by its definition
        shape = nc["liq"].shape
        ri = RNG.uniform(0.0, 2e-4, shape)
        rr = RNG.uniform(0.0, 1e-4, shape)
        rv, rc = (nc[v][:].astype(np.float64) * 1e-3 for v in ("vap", "liq"))  # g/kg
        truth["qi"].append(ri)
        truth["qr"].append(rr)
        return ri / (1.0 + rv + rc + ri + rr)

    _add(raw, "ice", ice, attrs={"units": "kg kg-1"})
    it = iter(range(100))
    _add(raw, "rain", lambda nc: truth["qr"][next(it)] * 1e3, attrs={"units": "g kg-1"})
    _add(
        raw,
        "shf",
        lambda nc: RNG.normal(20.0, 5.0, (1, *nc["liq"].shape[2:])),
        dims=("time", "y", "x"),
        attrs={"units": "W m-2"},
    )
    _add(raw, "dye", lambda nc: RNG.uniform(0, 1, nc["liq"].shape), attrs={"units": "1"})
    vm = _varmap(
        tmp_path,
        {
            "qi": {"raw": "ice", "dims": ["time", "zc", "y", "x"], "quantity": "mass_fraction"},
            "qr": {"raw": "rain", "dims": ["time", "zc", "y", "x"]},
            "shf": {
                "raw": "shf",
                "dims": ["time", "y", "x"],
                "standard_name": "surface_upward_sensible_heat_flux",
                "long_name": "surface sensible heat flux",
            },
            "dye": {"raw": "dye", "dims": ["time", "zc", "y", "x"]},
        },
    )
    ds = open_store(_ingest(raw, tmp_path / "c.zarr", vm))
    # the definition of the mass fraction, undone: the true mixing ratios come back
    # (float32 storage of the raw mass fraction and of the store: rtol 1e-6)
    np.testing.assert_allclose(ds["qi"].values, np.concatenate(truth["qi"]), rtol=1e-6, atol=1e-12)
    np.testing.assert_allclose(ds["qr"].values, np.concatenate(truth["qr"]), rtol=1e-6, atol=1e-12)
    assert ds["qi"].attrs["units"] == "kg kg-1"
    assert ds["qi"].attrs["standard_name"] == "cloud_ice_mixing_ratio"
    assert ds["qr"].attrs["standard_name"] == "rain_water_mixing_ratio"
    # a name the catalogue does not know keeps its own units and the map's attributes
    assert ds["shf"].dims == ("time", "y", "x")
    assert ds["shf"].attrs["units"] == "W m-2"
    assert ds["shf"].attrs["standard_name"] == "surface_upward_sensible_heat_flux"
    assert ds["shf"].attrs["long_name"] == "surface sensible heat flux"
    assert ds["dye"].dims == ("time", "z", "y", "x") and ds["dye"].attrs["units"] == "1"


def test_cloud_water_as_a_mass_fraction_is_converted_with_total_water(tmp_path, case_copy):
    raw = case_copy("sc-ostra-01")
    kept: list[np.ndarray] = []
    for f in sorted(glob.glob(str(raw / "*.nc"))):
        with netCDF4.Dataset(f, "a") as nc:
            rc = nc["liq"][:].astype(np.float64) * 1e-3
            rv = nc["vap"][:].astype(np.float64) * 1e-3
            kept.append(rc)
            nc["liq"][:] = rc / (1.0 + rv + rc) * 1e3  # mass fraction in g/kg, by definition
    vm = _varmap(
        tmp_path,
        {},
        qc={"raw": "liq", "dims": ["time", "zc", "y", "x"], "quantity": "mass_fraction"},
    )
    ds = open_store(_ingest(raw, tmp_path / "c.zarr", vm))
    np.testing.assert_allclose(ds["qc"].values, np.concatenate(kept), rtol=2e-6, atol=1e-12)
    ops = [c.get("operation", "") for c in load(ds.attrs)["steps"][-1]["conversions"]]
    assert any("mass fraction" in o for o in ops)


def test_threshold_as_mass_concentration_uses_dry_air_density(tmp_path, case_copy):
    raw = case_copy("sc-ostra-01")
    out = _ingest(
        raw,
        tmp_path / "c.zarr",
        REPO / "config/varmaps/flavour-alpha.yaml",
        cloud_threshold="0.05 g m-3",
    )
    ds = open_store(out).isel(time=1)
    p, t, r, qc = (ds[v].values.astype(np.float64) for v in ("p", "T", "qv", "qc"))
    pa = p * units.Pa
    e = vapor_pressure(pa, r * units("kg/kg"))
    rho_d = density(pa - e, t * units.K, 0 * units("kg/kg")).to("kg/m^3").magnitude
    expected = rho_d * qc > 0.05e-3
    got = ds["cloud_mask"].values == 1
    # cells within round-off of the threshold may fall either way
    near = np.abs(rho_d * qc - 0.05e-3) < 1e-6 * 0.05e-3
    assert np.array_equal(got[~near], expected[~near])
    assert got.sum() > 0 and (qc[got] > 0).all()
    assert "kg m-3" in ds["cloud_mask"].attrs["long_name"]
    assert open_store(out).attrs["cloud_threshold_units"] == "kg m-3"


def test_a_mapped_field_without_units_is_refused_naming_it(tmp_path, case_copy):
    raw = case_copy("sc-ostra-01")
    _add(raw, "dye", lambda nc: np.ones(nc["liq"].shape))
    vm = _varmap(tmp_path, {"dye": {"raw": "dye", "dims": ["time", "zc", "y", "x"]}})
    out = tmp_path / "c.zarr"
    with pytest.raises(UnitError, match="dye") as err:
        _ingest(raw, out, vm)
    assert "units" in str(err.value) and not out.exists()


def test_variable_map_refusals():
    text = (REPO / "config/varmaps/flavour-alpha.yaml").read_text()
    vm = yaml.safe_load(text)

    def parse(extra):
        data = {**vm, "variables": {**vm["variables"], **extra}}
        return parse_varmap(yaml.safe_dump(data))

    with pytest.raises(ConfigError, match="derives itself"):
        parse({"rh": {"raw": "x", "dims": ["time", "zc", "y", "x"]}})
    with pytest.raises(ConfigError, match="must have axes time, z, y, x;"):
        parse({"qi": {"raw": "x", "dims": ["time", "y", "x"]}})  # a known 3-D variable
    with pytest.raises(ConfigError, match="quantity 'mass_fraction' does not fit 'dye'"):
        parse({"dye": {"raw": "x", "dims": ["time", "y", "x"], "quantity": "mass_fraction"}})
    with pytest.raises(ConfigError, match="no dimension mapped to x_face"):
        parse({"u": {"raw": "x", "dims": ["time", "zc", "y", "x"], "faces": {"x": "low"}}})
    ok = parse({"shf": {"raw": "x", "dims": ["time", "y", "x"]}})
    assert ok.is_2d("shf") and not ok.is_2d("qc")


def test_a_moment_variable_the_store_lacks_is_named(tmp_path, case_copy):
    from lesprep.scales.coarsen import coarsen_case
    from lesprep.scales.spec import parse_scales
    from settings_helpers import coarsen_settings

    raw = case_copy("sc-ostra-01")
    canon = _ingest(raw, tmp_path / "c.zarr", REPO / "config/varmaps/flavour-alpha.yaml")
    settings = coarsen_settings(tuple(parse_scales(["400 m"])), moments=("qc", "qi"))
    with pytest.raises(InputError, match=r"coarsen\.moments lists 'qi'") as err:
        coarsen_case(canon, {"400m": tmp_path / "s.zarr"}, settings)
    assert "variable map" in str(err.value) and not (tmp_path / "s.zarr").exists()


# ------------------------------------------------------------ coarsening of the open set


@pytest.fixture
def rich_case(tmp_path, case_copy):
    """A demo case with u on x faces (low side, from the face coordinate), v on y faces
    (high side, stated in the map), cloud ice, rain and a surface field, ingested."""
    raw = case_copy("sc-ostra-01")
    add_rich_fields(raw, RNG)
    path = tmp_path / "rich.yaml"
    path.write_text(yaml.safe_dump(rich_varmap()))
    return raw, _ingest(raw, tmp_path / "canonical.zarr", str(path))


def test_winds_on_faces_are_averaged_to_centres_from_their_side(rich_case):
    raw, canon = rich_case
    ds = open_store(canon)
    with netCDF4.Dataset(sorted(glob.glob(str(raw / "*.nc")))[1]) as nc:
        t1 = float(nc["time"][0])
        uf = nc["uf"][0].astype(np.float64)
        vf = nc["vf"][0].astype(np.float64)
    j = int(np.argmin(np.abs(ds["time"].values - t1)))
    # low faces: centre i between faces i and i + 1 (periodic); high: faces i - 1 and i
    np.testing.assert_allclose(
        ds["u"].values[j], 0.5 * (uf + np.roll(uf, -1, axis=2)), rtol=2e-7, atol=1e-6
    )
    np.testing.assert_allclose(
        ds["v"].values[j], 0.5 * (vf + np.roll(vf, 1, axis=1)), rtol=2e-7, atol=1e-6
    )


def test_covariances_tke_conserved_and_gaussian_outputs(rich_case, tmp_path):
    from lesprep import schemes, thermo
    from lesprep.scales.coarsen import coarsen_case
    from lesprep.scales.spec import parse_scales
    from settings_helpers import coarsen_settings

    _, canon = rich_case
    settings = coarsen_settings(
        tuple(parse_scales(["400 m"])),
        moments=("qc", "w", "qt", "theta_l", "theta_il", "theta_v", "shf", "qi"),
        covariances=(("w", "qt"), ("u", "w"), ("w", "theta_v")),
        patch_scales=(),
    )
    out = coarsen_case(canon, {"400m": tmp_path / "s.zarr"}, settings)["400m"]
    ds, fine = open_store(out), open_store(canon)
    f = 8  # 400 m over 50 m cells
    g = {
        v: fine[v].values.astype(np.float64)
        for v in ("qc", "qv", "qi", "qr", "T", "p", "u", "v", "w")
    }
    nt, nz, ny, nx = g["qc"].shape

    def blocks(a):
        return a.reshape(nt, nz, ny // f, f, nx // f, f).transpose(0, 1, 2, 4, 3, 5)

    def block_cov(a, b):  # numpy.cov with bias=True (population) per block
        A = blocks(a).reshape(nt, nz, ny // f, nx // f, f * f)
        B = blocks(b).reshape(nt, nz, ny // f, nx // f, f * f)
        out = np.empty(A.shape[:-1])
        for idx in np.ndindex(*out.shape):
            out[idx] = np.cov(A[idx], B[idx], bias=True)[0, 1]
        return out

    # conserved variables from the stored fields, with the published formulas written
    # out: qt = qv + qc + qi; theta = T (p0/p)^(Rd/cp); theta_l = theta (1 - Lv qc/(cp T))
    # (Betts 1973, first order); theta_v = theta (1 + qv/eps) / (1 + qv + qc + qi + qr),
    # every water species loading the air; rain is not part of qt
    theta = g["T"] * (1e5 / g["p"]) ** (2.0 / 7.0)
    qt = g["qv"] + g["qc"] + g["qi"]
    thl = theta * (1.0 - thermo.LV * g["qc"] / (thermo.CP * g["T"]))
    thv = theta * (1.0 + g["qv"] / thermo.EPS) / (1.0 + qt + g["qr"])
    mean = {k: blocks(a).mean(axis=(4, 5)) for k, a in (("qt", qt), ("theta_l", thl))}
    np.testing.assert_allclose(ds["qt_mean"].values, mean["qt"], rtol=1e-6)
    np.testing.assert_allclose(ds["theta_l_mean"].values, mean["theta_l"], rtol=1e-6)
    np.testing.assert_allclose(ds["cov_w_qt"].values, block_cov(g["w"], qt), rtol=1e-4, atol=1e-12)
    np.testing.assert_allclose(
        ds["cov_u_w"].values, block_cov(g["u"], g["w"]), rtol=1e-4, atol=1e-9
    )
    np.testing.assert_allclose(
        ds["cov_w_theta_v"].values, block_cov(g["w"], thv), rtol=1e-3, atol=1e-7
    )
    var = {k: blocks(g[k]).var(axis=(4, 5)) for k in ("u", "v", "w")}
    np.testing.assert_allclose(
        ds["tke_sgs"].values, 0.5 * (var["u"] + var["v"] + var["w"]), rtol=1e-5
    )
    # surface field: 2-D block moments
    shf = fine["shf"].values.astype(np.float64).reshape(nt, ny // f, f, nx // f, f)
    np.testing.assert_allclose(ds["shf_mean"].values, shf.mean(axis=(2, 4)), rtol=1e-6)
    np.testing.assert_allclose(ds["shf_var"].values, shf.var(axis=(2, 4)), rtol=1e-5)
    assert ds["shf_mean"].dims == ("time", "y", "x") and ds["shf_mean"].attrs["units"] == "W m-2"
    # zero-threshold cloud fraction, and the Gaussian baseline from the stored statistics
    np.testing.assert_allclose(
        ds["cloud_fraction_zero"].values, (blocks(g["qc"]) > 0).mean(axis=(4, 5)), rtol=1e-6
    )
    cov_qt_thl = block_cov(qt, thl)
    c = schemes.gaussian_cloud_fraction_from_moments(
        mean["qt"],
        mean["theta_l"],
        blocks(g["p"]).mean(axis=(4, 5)),
        blocks(qt).var(axis=(4, 5)),
        blocks(thl).var(axis=(4, 5)),
        cov_qt_thl,
    )
    np.testing.assert_allclose(ds["cov_qt_theta_l"].values, cov_qt_thl, rtol=1e-3, atol=1e-10)
    np.testing.assert_allclose(ds["cf_gaussian"].values, c, atol=2e-3)
    assert float(ds["cf_gaussian"].max()) > 0.0
    # CF: cell_methods only with methods CF lists; units of covariances the products
    for name, v in ds.data_vars.items():
        cm = v.attrs.get("cell_methods")
        assert cm is None or cm in ("area: mean", "area: variance"), (name, cm)
    assert ds["cov_w_qt"].attrs["units"] == "m s-1 kg kg-1"
    assert ds["cov_w_theta_v"].attrs["units_metadata"] == "temperature: difference"
    assert (
        "cell_methods" not in ds["cov_u_w"].attrs
        and "covariance" in ds["cov_u_w"].attrs["long_name"]
    )


def test_threshold_units():
    from lesprep.canonical.mask import parse_threshold

    # conversions checked by hand: 0.01 g/kg = 1e-5 kg/kg; 0.001 g m-3 = 1e-6 kg m-3
    assert parse_threshold("0.01 g/kg") == (pytest.approx(1e-5), "kg kg-1")
    assert parse_threshold("0.001 g m-3") == (pytest.approx(1e-6), "kg m-3")
    with pytest.raises(ConfigError, match="mass concentration"):
        parse_threshold("1 K")
    with pytest.raises(ConfigError, match="no units"):
        parse_threshold(1e-5)
