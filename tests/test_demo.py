"""Sanity of the synthetic demo archives (invented data, used only for the demo).

Checks use outside references: the Bolton (1980) eq. 10 saturation formula written out
here, MetPy (density, potential temperature, specific humidity, virtual potential
temperature, moist adiabat), numpy's FFT and scipy.stats, hashlib and the netCDF4
library reading the files back. Regime thresholds (cloud cover, inversion strength,
lapse rates) are the design ranges of the demo brief -- common practice for
stratocumulus and shallow-cumulus cases, not measured values.
"""

from __future__ import annotations

import dataclasses
import hashlib
import json
from pathlib import Path

import netCDF4
import numpy as np
import pytest
from scipy import stats

from lesprep import demo, thermo
from lesprep.demo import cases, physics, writers
from lesprep.errors import ConfigError, InputError

mpcalc = pytest.importorskip("metpy.calc")
from metpy.constants import nounit as mpconst  # noqa: E402
from metpy.units import units  # noqa: E402

CASES = {spec.case: spec for spec in demo.DEMO_CASES}
G = 9.80665  # standard gravity, m s-2 (CGPM 1901, exact)


def _bolton_es(temperature: np.ndarray) -> np.ndarray:
    """Saturation vapour pressure over water, Bolton (1980) eq. 10, Pa."""
    tc = temperature - 273.15
    return 611.2 * np.exp(17.67 * tc / (tc + 243.5))


def _cover(fields: dict[str, np.ndarray]) -> float:
    """Fraction of columns with any qc > 1e-5 kg/kg."""
    return float(np.mean((fields["qc"] > 1e-5).any(axis=0)))


def _mixed_layer(spec: demo.DemoCase, z: np.ndarray) -> np.ndarray:
    """Levels between 25 % and 75 % of the mixed-layer depth (first interface)."""
    zi = cases._REGIMES[spec.kind].interfaces[0][0]
    return (z > 0.25 * zi) & (z < 0.75 * zi)


@pytest.fixture(scope="module")
def last_fields() -> dict[str, dict[str, np.ndarray]]:
    return {case: demo.demo_fields(spec, spec.ntimes - 1) for case, spec in CASES.items()}


@pytest.fixture(scope="module")
def first_fields() -> dict[str, dict[str, np.ndarray]]:
    return {case: demo.demo_fields(spec, 0) for case, spec in CASES.items()}


@pytest.fixture(scope="module")
def archives(tmp_path_factory: pytest.TempPathFactory) -> Path:
    root = tmp_path_factory.mktemp("demo")
    for spec in demo.DEMO_CASES:
        demo.write_demo_case(spec, root)
    return root


# --------------------------------------------------------------------------- specs


def test_default_cases_match_the_brief() -> None:
    assert sorted(CASES) == [
        "cu-marro-01",
        "cu-marro-02",
        "cu-varnix-01",
        "sc-ostra-01",
        "sc-ostra-02",
        "sc-pelle-01",
    ]
    kinds = {c: s.kind for c, s in CASES.items()}
    assert kinds == {
        "sc-ostra-01": "overcast",
        "sc-ostra-02": "overcast",
        "sc-pelle-01": "broken",
        "cu-marro-01": "cumulus",
        "cu-marro-02": "cumulus",
        "cu-varnix-01": "cumulus",
    }
    for case, spec in CASES.items():
        assert spec.regime == ("stratocumulus" if case.startswith("sc-") else "cumulus")
        assert (spec.nx, spec.ny, spec.dx) == (60, 60, 50.0)
        assert 40 <= spec.nz <= 56 and 2500.0 <= spec.ztop <= 3000.0
        assert 7 <= spec.ntimes <= 9 and 1200.0 <= spec.interval_s <= 1800.0
    assert {s.flavour for s in CASES.values()} == {"alpha", "beta"}
    assert len({(s.nz, s.ztop, s.ntimes, s.interval_s) for s in CASES.values()}) == 6


def test_unknown_case_lists_valid_ids() -> None:
    with pytest.raises(InputError) as info:
        demo.demo_case("sc-nowhere-99")
    for case in CASES:
        assert case in str(info.value)


def test_with_size_overrides_and_rejects() -> None:
    spec = demo.demo_case("cu-marro-01").with_size(nx=512, ny=512, nz=160, ntimes=12)
    assert (spec.nx, spec.ny, spec.nz, spec.ntimes, spec.case) == (512, 512, 160, 12, "cu-marro-01")
    with pytest.raises(ConfigError):
        spec.with_size(nlevels=3)
    with pytest.raises(ConfigError):
        spec.with_size(nx=0)
    with pytest.raises(ConfigError):
        spec.with_size(ztop=1000.0)  # below the trade inversion


def test_time_index_out_of_range() -> None:
    spec = demo.demo_case("sc-ostra-01")
    with pytest.raises(InputError):
        demo.demo_fields(spec, spec.ntimes)


def test_fields_are_deterministic_and_seeded() -> None:
    spec = demo.demo_case("cu-marro-01").with_size(nx=24, ny=24)
    a = demo.demo_fields(spec, 5)
    b = demo.demo_fields(spec, 5)
    assert set(a) == {"qc", "qv", "T", "p", "w", "z", "z_faces"}
    for key in a:
        assert a[key].dtype == np.float64
        np.testing.assert_array_equal(a[key], b[key])
    other = demo.demo_fields(spec.with_size(seed=spec.seed + 1), 5)
    assert not np.array_equal(a["w"], other["w"])


def test_output_times_differ_and_evolve() -> None:
    spec = demo.demo_case("sc-ostra-01")
    w = [demo.demo_fields(spec, i)["w"] for i in (spec.ntimes - 2, spec.ntimes - 1)]
    assert not np.array_equal(w[0], w[1])
    assert abs(stats.pearsonr(w[0].ravel(), w[1].ravel())[0]) < 0.99


# --------------------------------------------------------------------------- physics


@pytest.mark.parametrize("case", sorted(CASES))
def test_saturation_split(case: str, last_fields, first_fields) -> None:
    for fields in (first_fields[case], last_fields[case]):
        p, t, qv, qc = fields["p"], fields["T"], fields["qv"], fields["qc"]
        assert np.all(np.isfinite(t)) and np.all(qv > 0) and np.all(qc >= 0)
        rh = thermo.relative_humidity(p, t, qv)
        # independent: e = p r / (eps + r) (WMO), e_s from Bolton (1980) eq. 10, MetPy's eps
        e = p * qv / (mpconst.epsilon + qv)
        rh_ref = e / _bolton_es(t)
        np.testing.assert_allclose(rh, rh_ref, rtol=1e-9)
        cloudy = qc > 0
        np.testing.assert_allclose(rh_ref[cloudy], 1.0, atol=1e-6)
        assert np.all(rh_ref[~cloudy] <= 1.0 + 1e-9)


def test_cloud_cover_by_regime(last_fields, first_fields) -> None:
    cover = {case: _cover(f) for case, f in last_fields.items()}
    assert cover["sc-ostra-01"] > 0.9 and cover["sc-ostra-02"] > 0.9
    assert 0.3 < cover["sc-pelle-01"] < 0.9
    assert 0.0 < cover["cu-marro-01"] < 0.4 and 0.0 < cover["cu-marro-02"] < 0.4
    assert 0.0 < cover["cu-varnix-01"] < 0.4
    for case, fields in first_fields.items():  # spin-up: little cloud at the first output
        assert _cover(fields) < min(0.1, cover[case]), case


@pytest.mark.parametrize("case", sorted(CASES))
def test_updrafts_moist_and_buoyant(case: str, last_fields) -> None:
    f = last_fields[case]
    ml = _mixed_layer(CASES[case], f["z"])
    qt = f["qv"] + f["qc"]
    thv = mpcalc.virtual_potential_temperature(
        f["p"] * units.Pa, f["T"] * units.K, f["qv"] * units("kg/kg")
    ).magnitude
    w = f["w"][ml].ravel()
    for scalar in (qt, thv):
        anomaly = scalar - scalar.mean(axis=(1, 2), keepdims=True)
        assert stats.pearsonr(w, anomaly[ml].ravel())[0] > 0.2


@pytest.mark.parametrize("case", sorted(CASES))
def test_w_spectrum_slope(case: str, last_fields) -> None:
    # Kolmogorov (1941) inertial range: E(k) ~ k^(-5/3); accept -2.5 .. -1.0 (brief).
    f = last_fields[case]
    w = f["w"][_mixed_layer(CASES[case], f["z"])]
    ny, nx = w.shape[1:]
    power = (np.abs(np.fft.fft2(w, axes=(1, 2))) ** 2).mean(axis=0)
    kx = np.fft.fftfreq(nx) * nx
    ky = np.fft.fftfreq(ny) * ny
    shell = np.rint(np.hypot(kx[None, :], ky[:, None])).astype(int)
    spectrum = np.bincount(shell.ravel(), power.ravel())
    k = np.arange(4, 13)  # wavelengths 750 m .. 250 m on the 3 km domain
    slope = np.polyfit(np.log(k), np.log(spectrum[k]), 1)[0]
    assert -2.5 < slope < -1.0


@pytest.mark.parametrize("case", ["sc-ostra-01", "cu-marro-02"])
def test_pressure_is_hydrostatic(case: str, last_fields) -> None:
    f = last_fields[case]
    z = f["z"]
    p = f["p"].mean(axis=(1, 2))
    rho = (
        mpcalc.density(f["p"] * units.Pa, f["T"] * units.K, f["qv"] * units("kg/kg"))
        .to("kg/m^3")
        .magnitude.mean(axis=(1, 2))
    )
    # surface pressure 1015 hPa: extrapolate the lowest half level with its density
    assert p[0] + G * rho[0] * z[0] == pytest.approx(101500.0, abs=30.0)
    # dp/dz = -g rho, trapezoidal between centres, level by level and in total
    dp = -np.diff(p)
    integral = G * 0.5 * (rho[1:] + rho[:-1]) * np.diff(z)
    np.testing.assert_allclose(dp, integral, rtol=0.02)
    assert dp.sum() == pytest.approx(integral.sum(), rel=3e-3)


@pytest.mark.parametrize("case", ["sc-ostra-01", "sc-ostra-02", "sc-pelle-01"])
def test_stratocumulus_profile(case: str, last_fields) -> None:
    f = last_fields[case]
    z = f["z"]
    exner = thermo.exner(f["p"])
    # linearised liquid-water potential temperature (Betts 1973)
    thl = (f["T"] / exner - thermo.LV / thermo.CP * f["qc"] / exner).mean(axis=(1, 2))
    qt = (f["qv"] + f["qc"]).mean(axis=(1, 2))
    zi = cases._REGIMES[CASES[case].kind].interfaces[0][0]

    def at(profile: np.ndarray, height: float) -> float:
        return float(np.interp(height, z, profile))

    assert 6.0 < at(thl, zi + 100) - at(thl, zi - 100) < 10.0  # jump ~8 K
    assert 3.0e-3 < at(qt, zi - 100) - at(qt, zi + 100) < 5.0e-3  # drop ~4 g/kg
    lapse = (at(thl, zi + 800) - at(thl, zi + 300)) / 500.0
    assert 5.0e-3 < lapse < 7.0e-3  # free troposphere ~6 K/km
    ml = (z > 0.1 * zi) & (z < 0.6 * zi)
    assert np.ptp(thl[ml]) < 0.1  # well mixed
    cloudy = np.flatnonzero((f["qc"] > 1e-5).any(axis=(1, 2)))
    assert z[cloudy[-1]] < zi + 150.0  # cloud capped by the inversion


@pytest.mark.parametrize("case", ["cu-marro-01", "cu-marro-02", "cu-varnix-01"])
def test_cumulus_layer(case: str) -> None:
    spec = CASES[case]
    tops, bases = [], []
    for i in range(spec.ntimes):
        f = demo.demo_fields(spec, i)
        frac = (f["qc"] > 1e-5).mean(axis=(1, 2))
        levels = np.flatnonzero(frac > 0)
        if levels.size:
            bases.append(f["z"][levels[0]])
            tops.append(f["z"][levels[-1]])
    assert 500.0 < np.median(bases) < 850.0  # cloud base ~600-800 m
    assert 1500.0 < max(tops) < 2600.0  # deeper, sparse cloud layer
    # conditionally unstable between 800 and 1800 m: the mean potential temperature
    # rises (dry-stable) but less than along MetPy's moist adiabat (moist-unstable)
    z = f["z"]
    k0, k1 = int(np.argmin(abs(z - 800.0))), int(np.argmin(abs(z - 1800.0)))
    p = f["p"].mean(axis=(1, 2))[k0 : k1 + 1]
    t = f["T"].mean(axis=(1, 2))[k0 : k1 + 1]
    theta = mpcalc.potential_temperature(p * units.Pa, t * units.K).magnitude
    parcel = mpcalc.moist_lapse(p * units.Pa, t[0] * units.K).to("K").magnitude
    theta_parcel = mpcalc.potential_temperature(p * units.Pa, parcel * units.K).magnitude
    assert 0.0 < theta[-1] - theta[0] < theta_parcel[-1] - theta_parcel[0]


def test_larger_non_square_grid() -> None:
    spec = demo.demo_case("sc-pelle-01").with_size(nx=64, ny=40, nz=20, ntimes=2)
    f = demo.demo_fields(spec, 1)
    assert f["qc"].shape == (20, 40, 64) and f["z_faces"].shape == (21,)
    assert all(np.all(np.isfinite(f[k])) for k in ("qc", "qv", "T", "p", "w"))
    assert f["z_faces"][0] == 0.0 and f["z_faces"][-1] == spec.ztop


# --------------------------------------------------------------------------- files


def _attrs(var: netCDF4.Variable) -> dict[str, str]:
    return {k: var.getncattr(k) for k in var.ncattrs()}


@pytest.mark.parametrize("case", ["sc-ostra-01", "sc-pelle-01", "cu-marro-01"])
def test_alpha_layout(case: str, archives: Path) -> None:
    spec = CASES[case]
    folder = archives / case
    names = [f"snap_{i:04d}.nc" for i in range(spec.ntimes)]
    assert sorted(p.name for p in folder.iterdir()) == sorted([*names, "manifest.json"])
    expected_units = {"liq": "g/kg", "vap": "g/kg", "tempc": "degC", "pres": "hPa", "wf": "m/s"}
    for i in (0, spec.ntimes - 1):
        truth = demo.demo_fields(spec, i)
        with netCDF4.Dataset(folder / names[i]) as ds:
            ds.set_auto_mask(False)
            assert ds.getncattr("flavour") == "alpha"
            assert ds.getncattr("source") == "lesprep synthetic demo (not a real simulation)"
            assert "title" in ds.ncattrs()
            assert ds.dimensions["time"].isunlimited() and len(ds.dimensions["time"]) == 1
            sizes = {n: len(d) for n, d in ds.dimensions.items()}
            assert sizes == {"time": 1, "zc": spec.nz, "zf": spec.nz + 1, "y": 60, "x": 60}
            t = ds["time"]
            assert t.dtype == np.float64
            assert (t.units, t.long_name) == ("s", "time since start of run")
            assert t[0] == pytest.approx(i * spec.interval_s)
            for name in ("zc", "zf", "y", "x"):
                assert ds[name].units == "m"
            np.testing.assert_allclose(ds["x"][:], (np.arange(60) + 0.5) * 50.0)
            zf = ds["zf"][:]
            assert zf[0] == 0.0
            np.testing.assert_allclose(np.diff(zf), spec.ztop / spec.nz)  # uniform
            np.testing.assert_allclose(ds["zc"][:], truth["z"])
            for name, unit in expected_units.items():
                var = ds[name]
                assert var.dtype == np.float32 and var.units == unit
                zdim = "zf" if name == "wf" else "zc"
                assert var.dimensions == ("time", zdim, "y", "x")
            wf = ds["wf"][0].astype(np.float64)
            assert np.all(wf[0] == 0.0) and np.all(wf[-1] == 0.0)
            np.testing.assert_allclose(0.5 * (wf[1:] + wf[:-1]), truth["w"], atol=1e-5)
            np.testing.assert_allclose(ds["liq"][0], truth["qc"] * 1e3, rtol=1e-6, atol=1e-9)
            np.testing.assert_allclose(ds["vap"][0], truth["qv"] * 1e3, rtol=1e-6)
            np.testing.assert_allclose(ds["tempc"][0] + 273.15, truth["T"], atol=2e-5)
            np.testing.assert_allclose(ds["pres"][0] * 100.0, truth["p"], rtol=1e-6)
            nonhydro = truth["p"] - truth["p"].mean(axis=(1, 2), keepdims=True)
            assert 0.0 < np.abs(nonhydro).max() < 20.0  # a few Pa


@pytest.mark.parametrize("case", ["sc-ostra-02", "cu-marro-02"])
def test_beta_layout(case: str, archives: Path) -> None:
    spec = CASES[case]
    folder = archives / case
    files = ["cloudwater.nc", "pref.nc", "sphum.nc", "theta.nc", "wc.nc"]
    assert sorted(p.name for p in folder.iterdir()) == sorted([*files, "manifest.json"])
    with netCDF4.Dataset(folder / "pref.nc") as ds:
        ds.set_auto_mask(False)
        assert ds.getncattr("flavour") == "beta"
        assert "time" not in ds.dimensions
        assert ds["pref"].dimensions == ("z",) and ds["pref"].units == "Pa"
        assert ds["pref"].dtype == np.float32
        pref = ds["pref"][:].astype(np.float64)
        z = ds["z"][:]
        bounds = ds["z_bnds"][:]
        assert ds["z"].bounds == "z_bnds" and ds["z_bnds"].dimensions == ("z", "nv")
    assert bounds[0, 0] == 0.0 and bounds[-1, 1] == pytest.approx(spec.ztop)
    np.testing.assert_array_equal(bounds[1:, 0], bounds[:-1, 1])  # contiguous cells
    np.testing.assert_allclose(z, bounds.mean(axis=1))
    dz = np.diff(bounds, axis=1)[:, 0]
    assert np.all(np.diff(dz) >= 0) and dz[-1] > 3.0 * dz[0]  # stretched
    units_of = {"cloudwater": "kg kg-1", "sphum": "kg kg-1", "theta": "K", "wc": "m s-1"}
    for i in (0, spec.ntimes - 1):
        truth = demo.demo_fields(spec, i)
        # the 3-D thermodynamics used exactly the written pref in every column
        np.testing.assert_array_equal(
            truth["p"], np.broadcast_to(pref[:, None, None], truth["p"].shape)
        )
        values = {}
        for name, unit in units_of.items():
            with netCDF4.Dataset(folder / f"{name}.nc") as ds:
                ds.set_auto_mask(False)
                assert ds.getncattr("flavour") == "beta"
                var = ds[name]
                assert var.dimensions == ("time", "x", "y", "z")
                assert var.dtype == np.float32 and var.units == unit
                assert len(ds.dimensions["time"]) == spec.ntimes
                t = ds["time"]
                assert t.dtype == np.float64
                assert t.units == "hours since 2031-06-01 00:00:00"
                assert t[0] == pytest.approx(0.25)
                assert t[i] == pytest.approx(0.25 + i * spec.interval_s / 3600.0)
                values[name] = var[i].astype(np.float64).transpose(2, 1, 0)  # -> (z, y, x)
        # the mass fraction of vapour in moist air holding cloud water too (by definition,
        # q_v = r_v / (1 + r_v + r_c)); without cloud water it is MetPy's specific humidity
        q_ref = truth["qv"] / (1.0 + truth["qv"] + truth["qc"])
        np.testing.assert_allclose(values["sphum"], q_ref, rtol=1e-6)
        clear = truth["qc"] == 0
        q_metpy = mpcalc.specific_humidity_from_mixing_ratio(truth["qv"] * units("kg/kg"))
        np.testing.assert_allclose(values["sphum"][clear], q_metpy.magnitude[clear], rtol=1e-6)
        theta_ref = mpcalc.potential_temperature(
            pref[:, None, None] * units.Pa, truth["T"] * units.K
        )
        np.testing.assert_allclose(values["theta"], theta_ref.magnitude, rtol=1e-6)
        np.testing.assert_allclose(values["cloudwater"], truth["qc"], rtol=1e-6, atol=1e-12)
        np.testing.assert_allclose(values["wc"], truth["w"], rtol=1e-6, atol=1e-6)


@pytest.mark.parametrize("case", sorted(CASES))
def test_manifest_matches_files(case: str, archives: Path) -> None:
    folder = archives / case
    manifest = json.loads((folder / "manifest.json").read_text())
    assert manifest["generator_version"] == "1"
    assert manifest["flavour"] == CASES[case].flavour
    assert manifest["spec"] == dataclasses.asdict(CASES[case])
    listed = {entry["name"] for entry in manifest["files"]}
    assert listed == {p.name for p in folder.iterdir()} - {"manifest.json"}
    for entry in manifest["files"]:
        data = (folder / entry["name"]).read_bytes()
        assert entry["size"] == len(data)
        assert entry["sha256"] == hashlib.sha256(data).hexdigest()


def test_no_temporary_siblings_left(archives: Path) -> None:
    assert sorted(p.name for p in archives.iterdir()) == sorted(CASES)


def test_interrupted_write_leaves_previous_archive(tmp_path: Path, monkeypatch) -> None:
    spec = demo.demo_case("sc-ostra-01").with_size(nx=12, ny=12, ntimes=3)
    folder = demo.write_demo_case(spec, tmp_path)
    before = (folder / "manifest.json").read_text()
    real_state = physics.state_at

    def failing(s: demo.DemoCase, i: int):
        if i == 2:
            raise KeyboardInterrupt  # like a killed run
        return real_state(s, i)

    monkeypatch.setattr(writers, "state_at", failing)
    with pytest.raises(KeyboardInterrupt):
        demo.write_demo_case(spec.with_size(seed=7), tmp_path)
    assert [p.name for p in tmp_path.iterdir()] == [spec.case]
    assert (folder / "manifest.json").read_text() == before
    with pytest.raises(KeyboardInterrupt):  # nothing appears for a new case either
        demo.write_demo_case(demo.demo_case("sc-ostra-02").with_size(nx=12, ny=12), tmp_path)
    assert [p.name for p in tmp_path.iterdir()] == [spec.case]


def test_rewrite_replaces_archive(tmp_path: Path) -> None:
    spec = demo.demo_case("cu-marro-01").with_size(nx=12, ny=12, ntimes=3)
    demo.write_demo_case(spec, tmp_path)
    folder = demo.write_demo_case(spec.with_size(ntimes=2), tmp_path)
    assert sorted(p.name for p in folder.iterdir()) == [
        "manifest.json",
        "snap_0000.nc",
        "snap_0001.nc",
    ]
    assert [p.name for p in tmp_path.iterdir()] == [spec.case]


@pytest.mark.parametrize("case", ["sc-ostra-01", "sc-ostra-02"])
def test_compressed_archive_holds_the_same_values(case: str, tmp_path: Path) -> None:
    spec = demo.demo_case(case).with_size(nx=16, ny=16, ntimes=2)
    plain = demo.write_demo_case(spec, tmp_path / "plain")
    packed = demo.write_demo_case(spec, tmp_path / "packed", compress=True)
    name, var = ("snap_0001.nc", "liq") if spec.flavour == "alpha" else ("theta.nc", "theta")
    with netCDF4.Dataset(plain / name) as a, netCDF4.Dataset(packed / name) as b:
        assert b[var].filters()["zlib"] and not a[var].filters()["zlib"]
        np.testing.assert_array_equal(a[var][:], b[var][:])
    manifest = json.loads((packed / "manifest.json").read_text())
    assert manifest["compress"] is True
