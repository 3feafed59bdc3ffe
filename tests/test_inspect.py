"""Inspecting unseen archives: the report against netCDF4, the drafted map against ingest.

The decisive check: for each demo flavour the drafted variable map, unedited, ingests to
exactly the arrays the shipped hand-written map gives. The listing itself is checked
against what the netCDF4 library reports for the same files, and time decoding against
``netCDF4.num2date``.
"""

from __future__ import annotations

from pathlib import Path

import netCDF4
import numpy as np
import pytest
import yaml

from lesprep.canonical.ingest import ingest_case
from lesprep.demo import demo_case, write_demo_case
from lesprep.errors import ConfigError, InputError
from lesprep.raw.survey import draft_varmap, inspect_files
from lesprep.raw.varmap import parse_varmap
from lesprep.store import open_store
from settings_helpers import ingest_settings

REPO = Path(__file__).resolve().parents[1]
SIZE = {"nx": 16, "ny": 16, "nz": 16, "ntimes": 4}
CASES = {"alpha": "sc-ostra-01", "beta": "sc-ostra-02"}
SETTINGS = ingest_settings(
    spinup="1 h",
    cloud_threshold="1e-5 kg/kg",
)


@pytest.fixture(scope="module")
def archives(tmp_path_factory):
    root = tmp_path_factory.mktemp("raw")
    return {
        flavour: sorted(write_demo_case(demo_case(c).with_size(**SIZE), root).glob("*.nc"))
        for flavour, c in CASES.items()
    }


def assert_same_stores(a: Path, b: Path) -> None:
    """Every array (data and coordinates) of two stores is identical."""
    da, db = open_store(a), open_store(b)
    assert sorted(da.variables) == sorted(db.variables)
    for name in da.variables:
        assert da[name].dims == db[name].dims, name
        np.testing.assert_array_equal(da[name].values, db[name].values, err_msg=name)


@pytest.mark.parametrize("flavour", ["alpha", "beta"])
def test_draft_ingests_like_the_shipped_map(archives, tmp_path, flavour):
    files = archives[flavour]
    text = draft_varmap(inspect_files(files), flavour=f"drafted-{flavour}")
    path = tmp_path / "draft.yaml"
    path.write_text(text)
    kw = {"case": CASES[flavour], "raw": files, "settings": SETTINGS}
    drafted = ingest_case(varmap=path, out=tmp_path / "drafted.zarr", **kw)
    shipped = ingest_case(
        varmap=REPO / f"config/varmaps/flavour-{flavour}.yaml", out=tmp_path / "shipped.zarr", **kw
    )
    assert_same_stores(drafted, shipped)


@pytest.mark.parametrize("flavour", ["alpha", "beta"])
def test_draft_has_the_shipped_layout(archives, flavour):
    text = draft_varmap(inspect_files(archives[flavour]))
    parse_varmap(text)  # the project's own schema check
    draft = yaml.safe_load(text)
    shipped = yaml.safe_load((REPO / f"config/varmaps/flavour-{flavour}.yaml").read_text())
    assert list(draft) == list(shipped)  # flavour, description, dims, coords, variables
    assert draft["dims"] == shipped["dims"]
    assert draft["coords"] == shipped["coords"]
    for name, spec in shipped["variables"].items():
        assert draft["variables"][name]["raw"] == spec["raw"]
        assert draft["variables"][name]["dims"] == spec["dims"]
        # quantity "direct" and the canonical quantity itself read the same
        same = {None, "direct", "mixing_ratio", "temperature"}
        q_draft, q_ship = draft["variables"][name].get("quantity"), spec.get("quantity")
        assert q_draft == q_ship or {q_draft, q_ship} <= same


@pytest.mark.parametrize("flavour", ["alpha", "beta"])
def test_listing_matches_netcdf4(archives, flavour):
    files = archives[flavour]
    report = inspect_files(files)
    assert report.files == tuple(str(f) for f in files)
    for f in files:
        with netCDF4.Dataset(f) as nc:
            for name, var in nc.variables.items():
                info = report.variables[name]
                assert info.dims == var.dimensions
                assert info.units == getattr(var, "units", None)
                assert info.long_name == getattr(var, "long_name", None)
                assert str(f) in info.files
            for name, dim in nc.dimensions.items():
                if name != "time":
                    assert report.dims[name].size == len(dim)
    summary = report.summary()
    for name in report.variables:
        assert name in summary


@pytest.mark.parametrize("flavour", ["alpha", "beta"])
def test_time_axis_decoded_like_num2date(archives, flavour):
    report = inspect_files(archives[flavour])
    expected: set[float] = set()
    for f in archives[flavour]:
        with netCDF4.Dataset(f) as nc:
            if "time" not in nc.variables:
                continue
            t = nc.variables["time"]
            if " since " in t.units:
                dates = netCDF4.num2date(t[:], t.units, only_use_cftime_datetimes=False)
                ref = netCDF4.num2date(0.0, t.units, only_use_cftime_datetimes=False)
                expected |= {round((d - ref).total_seconds(), 3) for d in dates}
            else:
                expected |= {round(float(v), 3) for v in t[:]}  # units "s"
    assert report.time is not None
    np.testing.assert_allclose(report.time.times_s, sorted(expected), atol=1e-3)
    assert report.dims["time"].size == SIZE["ntimes"]
    assert report.time.origin == {"alpha": "start of run", "beta": "2031-06-01T00:00:00"}[flavour]


def test_face_staggering(archives):
    alpha = inspect_files(archives["alpha"])
    assert alpha.staggered == {"zf": "zc"}
    assert alpha.dims["zf"].role == "z_face" and alpha.dims["zc"].role == "z"
    assert "bracket the centres" in alpha.dims["zf"].reason
    assert "zf holds the faces of zc" in alpha.summary()
    beta = inspect_files(archives["beta"])
    assert beta.staggered == {}
    assert beta.dims["nv"].role is None
    assert beta.coords["z_bounds"] == "z_bnds"


def test_quantities_of_the_beta_flavour(archives):
    p = inspect_files(archives["beta"]).proposals
    assert (p["qv"].raw, p["qv"].quantity) == ("sphum", "specific_humidity")
    assert (p["T"].raw, p["T"].quantity) == ("theta", "potential_temperature")
    assert (p["p"].raw, p["p"].dims) == ("pref", ("z",))


# --------------------------------------------------------------------------- unseen names


def write_archive(path: Path, *, nt: int = 3, nz: int = 10, n: int = 8) -> Path:
    """An invented layout: dims recognised only by CF attributes, CF standard names,
    w on faces, and distractors that must not be taken for the required five (rain, RH
    in %, liquid-water potential temperature, a pressure perturbation, u and v, w
    variance, cloud fraction); rain, u and v are the optional qr, u and v.
    """
    rng = np.random.default_rng(7)
    dz = 50.0
    zf = np.arange(nz + 1) * dz
    zc = 0.5 * (zf[1:] + zf[:-1])
    p_profile = 101500.0 * np.exp(-zc / 8000.0)  # scale height 8 km, a rough profile
    with netCDF4.Dataset(path, "w") as nc:
        for name, size in (("t", nt), ("k", nz), ("kw", nz + 1), ("j", n), ("i", n)):
            nc.createDimension(name, size)

        def coord(name, dims, values, **attrs):
            v = nc.createVariable(name, "f8", dims)
            v.setncatts(attrs)
            v[:] = values

        coord("t", ("t",), 600.0 * np.arange(nt), units="seconds since 2030-01-01", axis="T")
        coord("k", ("k",), zc, units="m", axis="Z")
        coord("kw", ("kw",), zf, units="m", axis="Z")
        coord("j", ("j",), (np.arange(n) + 0.5) * 40.0, units="m", axis="Y")
        coord("i", ("i",), (np.arange(n) + 0.5) * 40.0, units="m", axis="X")

        def field(name, dims, values, **attrs):
            v = nc.createVariable(name, "f4", dims)
            v.setncatts(attrs)
            v[:] = values

        shape = (nt, nz, n, n)
        d4, d4w = ("t", "k", "j", "i"), ("t", "kw", "j", "i")
        qc = np.clip(rng.normal(0.0, 2e-4, shape), 0.0, None)
        field("qcl", d4, qc, units="kg kg-1", standard_name="cloud_liquid_water_mixing_ratio")
        field(
            "hus",
            d4,
            0.008 + rng.normal(0, 1e-4, shape),
            units="1",
            standard_name="specific_humidity",
        )
        field(
            "ta",
            d4,
            290.0 - 0.006 * zc[None, :, None, None] + rng.normal(0, 0.1, shape),
            units="K",
            standard_name="air_temperature",
        )
        field(
            "pa",
            d4,
            np.broadcast_to(p_profile[None, :, None, None], shape),
            units="Pa",
            standard_name="air_pressure",
        )
        wa = rng.normal(0.0, 0.5, (nt, nz + 1, n, n))
        wa[:, 0] = 0.0
        field("wa", d4w, wa, units="m s-1", standard_name="upward_air_velocity")
        # distractors
        field("qr", d4, qc * 0.1, units="kg kg-1", long_name="rain water mixing ratio")
        field("rh", d4, np.full(shape, 80.0), units="%", long_name="relative humidity")
        field(
            "thl",
            d4,
            np.full(shape, 300.0),
            units="K",
            long_name="liquid water potential temperature",
        )
        field(
            "p_pert", d4, rng.normal(0, 5.0, shape), units="Pa", long_name="pressure perturbation"
        )
        field("u", d4, np.full(shape, 5.0), units="m s-1", long_name="eastward wind")
        field("v", d4, np.full(shape, 1.0), units="m s-1", long_name="northward wind")
        field("w2", d4, np.full(shape, 0.2), units="m2 s-2", long_name="w variance")
        field("cloud_fraction", d4, np.zeros(shape), units="1", long_name="cloud fraction")
    return path


HAND_MAP = """
dims: {t: time, k: z, kw: z_face, j: y, i: x}
coords: {time: {raw: t}, z: {raw: k}, z_face: {raw: kw}, y: {raw: j}, x: {raw: i}}
variables:
  qc: {raw: qcl, dims: [t, k, j, i]}
  qv: {raw: hus, dims: [t, k, j, i], quantity: specific_humidity}
  T: {raw: ta, dims: [t, k, j, i], quantity: temperature}
  p: {raw: pa, dims: [t, k, j, i]}
  w: {raw: wa, dims: [t, kw, j, i]}
  qr: {raw: qr, dims: [t, k, j, i]}
  u: {raw: u, dims: [t, k, j, i]}
  v: {raw: v, dims: [t, k, j, i]}
"""


def test_unseen_layout_by_cf_attributes(tmp_path):
    f = write_archive(tmp_path / "out.nc")
    report = inspect_files([f])
    roles = {d.name: d.role for d in report.dims.values()}
    assert roles == {"t": "time", "k": "z", "kw": "z_face", "j": "y", "i": "x"}
    got = {c: (p.raw, p.quantity) for c, p in report.proposals.items()}
    assert got == {
        "qc": ("qcl", "direct"),
        "qv": ("hus", "specific_humidity"),
        "T": ("ta", "temperature"),
        "p": ("pa", "direct"),
        "w": ("wa", "direct"),
        # the optional ones, found by short name and long name
        "qr": ("qr", "direct"),
        "u": ("u", "direct"),
        "v": ("v", "direct"),
    }
    assert report.time is not None and report.time.origin == "2030-01-01T00:00:00"
    hand = tmp_path / "hand.yaml"
    hand.write_text(HAND_MAP)
    draft = tmp_path / "draft.yaml"
    draft.write_text(draft_varmap(report))
    settings = ingest_settings(
        spinup="0 s",
        cloud_threshold="1e-5 kg/kg",
    )
    kw = {"case": "invented-1", "raw": [f], "settings": settings}
    a = ingest_case(varmap=draft, out=tmp_path / "a.zarr", **kw)
    b = ingest_case(varmap=hand, out=tmp_path / "b.zarr", **kw)
    assert_same_stores(a, b)


def test_velocity_on_the_staggered_vertical_is_proposed_as_w(tmp_path):
    # 'wvel' in m s-1 on the face dimension, with no long_name or standard_name: nothing in
    # its name says w, but a velocity on the staggered vertical almost always is
    f = tmp_path / "anon.nc"
    write_archive(f)
    with netCDF4.Dataset(f, "a") as nc:
        nc.renameVariable("wa", "wvel")
        nc["wvel"].delncattr("standard_name")
    report = inspect_files([f])
    w = report.proposals["w"]
    assert (w.raw, w.quantity) == ("wvel", "direct")
    assert any("staggered vertical" in r for r in w.reasons)
    # u and v (velocities at cell centres) are not taken for it
    assert (report.proposals["u"].raw, report.proposals["v"].raw) == ("u", "v")


def test_bare_q_without_units_is_flagged(tmp_path):
    f = write_archive(tmp_path / "out.nc")
    with netCDF4.Dataset(f, "a") as nc:
        nc.renameVariable("hus", "q")
        for attr in ("units", "standard_name"):
            nc.variables["q"].delncattr(attr)
    report = inspect_files([f])
    p = report.proposals["qv"]
    assert (p.raw, p.quantity, p.units, p.assumed_units) == (
        "q",
        "specific_humidity",
        None,
        "kg kg-1",
    )
    assert any("'q' has no long_name" in n for n in report.notes)
    text = draft_varmap(report)
    line = next(ln for ln in text.splitlines() if ln.startswith("  qv:"))
    assert 'units: "kg kg-1"' in line and "CHECK" in line
    assert parse_varmap(text).variables["qv"].units == "kg kg-1"


def test_missing_variable_gets_a_placeholder_ingest_names(tmp_path):
    f = write_archive(tmp_path / "out.nc")
    with netCDF4.Dataset(f, "a") as nc:
        nc.renameVariable("wa", "some_thing")
        nc.variables["some_thing"].delncattr("standard_name")
        nc.variables["some_thing"].units = "1"  # not a velocity: nothing is w
    report = inspect_files([f])
    assert report.proposals["w"].raw is None  # u and v (m s-1) are not taken for w
    text = draft_varmap(report)
    path = tmp_path / "draft.yaml"
    path.write_text(text)
    with pytest.raises(InputError, match="<not found>"):
        ingest_case(case="c", raw=[f], varmap=path, settings=SETTINGS, out=tmp_path / "x.zarr")


def test_bad_inputs(tmp_path):
    with pytest.raises(InputError, match="no file to inspect"):
        inspect_files([])
    junk = tmp_path / "junk.nc"
    junk.write_bytes(b"not a netcdf file")
    with pytest.raises(InputError, match="cannot be read as NetCDF"):
        inspect_files([junk])
    flat = tmp_path / "flat.nc"
    with netCDF4.Dataset(flat, "w") as nc:
        nc.createDimension("n", 4)
        nc.createVariable("values", "f4", ("n",))[:] = 1.0
    with pytest.raises(ConfigError, match="cannot draft a variable map"):
        draft_varmap(inspect_files([flat]))
