"""What real LES archives contain and must be accepted, with a record: tiny negative
condensate, missing output times, restart overlaps; and half-written files, refused with
a clear message."""

from __future__ import annotations

import os
import shutil

import netCDF4
import numpy as np
import pytest
from metpy.calc import density, vapor_pressure
from metpy.units import units

from conftest import REPO
from lesprep.canonical.ingest import ingest_case
from lesprep.errors import InputError, RangeError, TimeAxisError
from lesprep.provenance import load
from lesprep.raw.timeaxis import check_intervals
from lesprep.store import open_store, stale_temporaries
from settings_helpers import ingest_settings

ALPHA = REPO / "config/varmaps/flavour-alpha.yaml"


def _ingest(raw, out, **settings):
    return ingest_case(
        case="c1",
        raw=str(raw / "*.nc"),
        varmap=ALPHA,
        settings=ingest_settings(spinup="0 s", **settings),
        out=out,
    )


def _step(store):
    return load(open_store(store).attrs)["steps"][-1]


# ------------------------------------------------------------------ negative condensate


def test_tiny_negative_cloud_water_is_set_to_zero_and_recorded(tmp_path, case_copy, caplog):
    raw = case_copy("sc-ostra-01")  # liq in g/kg
    cells = [(0, 3, 4, 5), (0, 10, 2, 7), (0, 20, 11, 11)]
    with netCDF4.Dataset(raw / "snap_0002.nc", "a") as nc:
        t_s = float(nc["time"][0])
        for c in cells:
            nc["liq"][c] = -1e-6  # g/kg, i.e. -1e-9 kg/kg: numerics, not a broken file
    out = _ingest(raw, tmp_path / "c.zarr")
    ds = open_store(out)
    j = int(np.argmin(np.abs(ds["time"].values - t_s)))
    qc = ds["qc"].values[j]
    for _, k, y, x in cells:
        assert qc[k, y, x] == 0.0
    assert float(ds["qc"].min()) >= 0.0
    recs = _step(out)["negatives_clipped"]
    assert [(r["variable"], r["time_s"], r["cells"]) for r in recs] == [("qc", t_s, 3)]
    # the clipped mass as a domain-mean column, with the dry-air density from MetPy (the
    # density of the dry air's partial pressure p - e, e from MetPy's vapor_pressure)
    p, t, r = (ds[v].values[j].astype(np.float64) for v in ("p", "T", "qv"))
    pa = p * units.Pa
    e = vapor_pressure(pa, r * units("kg/kg"))
    rho = density(pa - e, t * units.K, 0 * units("kg/kg")).to("kg/m^3").magnitude
    dz = np.diff(ds["z_bounds"].values, axis=1)[:, 0]
    ref = sum(rho[k, y, x] * 1e-9 * dz[k] for _, k, y, x in cells) / (qc.shape[1] * qc.shape[2])
    assert recs[0]["mass_kg_m2"] == pytest.approx(ref, rel=1e-3)
    assert "below zero" in caplog.text and "qc" in caplog.text


def test_negative_cloud_water_beyond_the_tolerance_is_refused(tmp_path, case_copy):
    raw = case_copy("sc-ostra-01")
    with netCDF4.Dataset(raw / "snap_0002.nc", "a") as nc:
        nc["liq"][0, 3, 4, 5] = -0.01  # g/kg = -1e-5 kg/kg, 10x the default tolerance
    out = tmp_path / "c.zarr"
    with pytest.raises(RangeError, match="canonical qc spans"):
        _ingest(raw, out)
    assert not out.exists() and stale_temporaries(out) == []
    # a larger configured tolerance accepts it
    _ingest(raw, out, negative_tolerance={"qc": 2e-5})
    assert float(open_store(out)["qc"].min()) == 0.0


# ------------------------------------------------------------------ gaps and intervals


def test_interval_check_against_hand_worked_axes():
    r = check_intervals([0, 3600, 7200, 10800, 18000, 21600, 25200])
    assert r.interval_s == 3600 and r.missing_s == (14400.0,) and r.irregular == ()
    assert check_intervals([0, 60, 120, 180]).regular
    r = check_intervals([0, 600, 1200, 1500, 2100])
    assert r.irregular == ((1200.0, 1500.0),)  # diffs 600, 600, 300, 600: median 600


def test_missing_output_time_warns_and_is_recorded(tmp_path, case_copy):
    raw = case_copy("sc-ostra-01")
    with netCDF4.Dataset(raw / "snap_0002.nc") as nc:
        gone = float(nc["time"][0])
    (raw / "snap_0002.nc").unlink()
    out = _ingest(raw, tmp_path / "c.zarr")
    step = _step(out)
    assert step["time_axis"]["missing_s"] == [gone]
    assert any(f"{gone:g}" in w and "missing" in w for w in step["warnings"])
    with pytest.raises(TimeAxisError, match=f"output time.*{gone:g}.*missing"):
        _ingest(raw, tmp_path / "d.zarr", time_gaps="error")
    assert not (tmp_path / "d.zarr").exists()


# ------------------------------------------------------------------ restarts


def _overlap(raw):
    """A restart overlap: snap_0003.nc written again, later, with other values."""
    dup = raw / "snap_0003r.nc"
    shutil.copyfile(raw / "snap_0003.nc", dup)
    with netCDF4.Dataset(dup, "a") as nc:
        nc["liq"][...] = nc["liq"][...] * 0.5
        t_s = float(nc["time"][0])
    old = os.stat(raw / "snap_0003.nc").st_mtime
    os.utime(dup, (old + 60, old + 60))
    return dup, t_s


def test_restart_overlap_is_refused_by_default(tmp_path, case_copy):
    raw = case_copy("sc-ostra-01")
    _overlap(raw)
    with pytest.raises(TimeAxisError, match="appears in two files"):
        _ingest(raw, tmp_path / "c.zarr")


@pytest.mark.parametrize("order", ["mtime", "name"])
def test_restart_overlap_keeps_the_later_file(tmp_path, case_copy, order):
    raw = case_copy("sc-ostra-01")
    dup, t_s = _overlap(raw)
    out = _ingest(raw, tmp_path / "c.zarr", duplicate_times="keep_later", restart_order=order)
    ds = open_store(out)
    j = int(np.argmin(np.abs(ds["time"].values - t_s)))
    with netCDF4.Dataset(dup) as nc:
        later = np.asarray(nc["liq"][0], dtype=np.float64) * 1e-3  # g/kg -> kg/kg
    np.testing.assert_allclose(ds["qc"].values[j], later.astype(np.float32), rtol=1e-6)
    step = _step(out)
    assert step["restart_overlaps"] == [
        {"time_s": t_s, "kept": "snap_0003r.nc", "dropped": ["snap_0003.nc"]}
    ]
    assert any("snap_0003r.nc" in w and f"{t_s:g}" in w for w in step["warnings"])


# ------------------------------------------------------------------ half-written files


def test_half_written_newest_file_is_named(tmp_path, case_copy):
    raw = case_copy("sc-ostra-01")
    newest = sorted(raw.glob("snap_*.nc"))[-1]
    data = newest.read_bytes()
    newest.write_bytes(data[: len(data) // 2])  # a run still writing its newest output
    with pytest.raises(InputError) as err:
        _ingest(raw, tmp_path / "c.zarr")
    msg = str(err.value)
    assert newest.name in msg and "cannot be read completely" in msg
    assert "still be writing" in msg or "running simulation" in msg


# ------------------------------------------------------------------ near-constant fields

QUIET_MAP = """
dims: {t: time, k: z, kw: z_face, j: y, i: x}
coords: {time: {raw: t}, z: {raw: k}, z_face: {raw: kw}, y: {raw: j}, x: {raw: i}}
variables:
  qc: {raw: qc, dims: [t, k, j, i]}
  qv: {raw: qv, dims: [t, k, j, i]}
  T: {raw: ta, dims: [t, k, j, i], quantity: temperature}
  p: {raw: pa, dims: [t, k, j, i]}
  w: {raw: wa, dims: [t, kw, j, i]}
"""


def _quiet_archive(path, rng, *, nt=2, nz=3, n=32, sigma=2e-6):
    """A quiet layer: T = 290 K plus noise of standard deviation ``sigma`` and skewness 1
    (a standardised gamma distribution of shape 4: skewness 2 / sqrt(4)), stored in float64
    in the raw file. Everything else is smooth and plausible."""
    z = 25.0 + 50.0 * np.arange(nz)
    with netCDF4.Dataset(path, "w") as nc:
        for name, size in (("t", nt), ("k", nz), ("kw", nz + 1), ("j", n), ("i", n)):
            nc.createDimension(name, size)
        for name, dims, vals, u in (
            ("t", ("t",), 600.0 * np.arange(nt), "s"),
            ("k", ("k",), z, "m"),
            ("kw", ("kw",), 50.0 * np.arange(nz + 1), "m"),
            ("j", ("j",), (np.arange(n) + 0.5) * 50.0, "m"),
            ("i", ("i",), (np.arange(n) + 0.5) * 50.0, "m"),
        ):
            v = nc.createVariable(name, "f8", dims)
            v.units = u
            v[:] = vals
        shape, d4 = (nt, nz, n, n), ("t", "k", "j", "i")
        g = rng.gamma(4.0, 1.0, shape)
        fields = {
            "qc": (np.zeros(shape), "kg kg-1", d4),
            "qv": (0.008 + rng.normal(0, 1e-4, shape), "kg kg-1", d4),
            "ta": (290.0 + sigma * (g - 4.0) / 2.0, "K", d4),
            "pa": (np.broadcast_to(100000.0 - 12.0 * z[None, :, None, None], shape), "Pa", d4),
            "wa": (rng.normal(0, 0.3, (nt, nz + 1, n, n)), "m s-1", ("t", "kw", "j", "i")),
        }
        for name, (vals, u, dims) in fields.items():
            v = nc.createVariable(name, "f8", dims)
            v.units = u
            v[:] = vals
    return path


def _ingest_quiet(raw, tmp_path):
    vm = tmp_path / "quiet.yaml"
    vm.write_text(QUIET_MAP)
    return ingest_case(
        case="quiet",
        raw=[raw],
        varmap=vm,
        settings=ingest_settings(spinup="0 s"),
        out=tmp_path / "canonical.zarr",
    )


def _block_stats(x, f):
    nt, nz, ny, nx = x.shape
    b = x.reshape(nt, nz, ny // f, f, nx // f, f).transpose(0, 1, 2, 4, 3, 5)
    b = b.reshape(nt, nz, ny // f, nx // f, f * f)
    import scipy.stats

    return b.mean(axis=-1), b.var(axis=-1), scipy.stats.skew(b, axis=-1, bias=True)


def test_near_constant_field_keeps_its_subgrid_statistics(tmp_path, caplog):
    from lesprep.scales.coarsen import coarsen_case
    from lesprep.scales.spec import parse_scales
    from settings_helpers import coarsen_settings

    raw = _quiet_archive(tmp_path / "quiet.nc", np.random.default_rng(11))
    canon = _ingest_quiet(raw, tmp_path)
    assert "T spans fewer than 16 float32 steps on 3 level(s)" in caplog.text
    fine = open_store(canon)
    assert fine["T"].attrs["units"] == "K" and float(fine["T"].mean()) == pytest.approx(290.0)
    assert "T_dev" in fine and _step(canon)["deviation_fields"] == ["T"]
    with netCDF4.Dataset(raw) as nc:
        t64 = np.asarray(nc["ta"][:], dtype=np.float64)
    settings = coarsen_settings(scales=tuple(parse_scales([4, 16])), patch_scales=())
    outs = coarsen_case(canon, {"f4": tmp_path / "f4.zarr", "f16": tmp_path / "f16.zarr"}, settings)
    for lab, f in (("f4", 4), ("f16", 16)):
        ds = open_store(outs[lab])
        # reference: numpy / scipy.stats on the float64 raw values (shifted by 290 K, which
        # changes neither variance nor skewness, to spare scipy the cancellation)
        mean, var, skew = _block_stats(t64 - 290.0, f)
        mean = mean + 290.0
        np.testing.assert_allclose(ds["T_mean"].values, mean, rtol=0, atol=1e-4)
        np.testing.assert_allclose(ds["T_var"].values, var, rtol=0.02)
        err = float(np.max(np.abs(ds["T_skew"].values - skew)))
        print(f"f = {f}: largest skewness error {err:.3g}")
        assert err < 0.1  # within 0.1 of the float64 value
        # without the deviation field the stored float32 T is quantized (a float32 step is
        # 3.05e-5 K at 290 K): most f = 4 blocks would have zero variance
        if f == 4:
            b = fine["T"].values.astype(np.float64)
            nt, nz, ny, nx = b.shape
            var32 = b.reshape(nt, nz, ny // 4, 4, nx // 4, 4).var(axis=(3, 5))
            assert np.mean(var32 == 0) > 0.5

    # storage: the deviation field costs at most 1.3x the store without it
    def size(p):
        return sum(x.stat().st_size for x in p.rglob("*") if x.is_file())

    extra = size(canon / "T_dev") + size(canon / "T_ref")
    ratio = size(canon) / (size(canon) - extra)
    print(f"canonical store with T_dev and T_ref / without: {ratio:.3f}")
    assert ratio <= 1.3


def test_quiet_blocks_after_the_first_time_are_counted(tmp_path, caplog):
    # the first kept time is turbulent (no deviation field), the second is quiet: its
    # T blocks are counted and reported by coarsening instead
    from lesprep.scales.coarsen import coarsen_case
    from lesprep.scales.spec import parse_scales
    from settings_helpers import coarsen_settings

    raw = _quiet_archive(tmp_path / "quiet.nc", np.random.default_rng(5))
    with netCDF4.Dataset(raw, "a") as nc:
        nc["ta"][0] = 290.0 + np.random.default_rng(6).normal(0, 0.1, nc["ta"].shape[1:])
    canon = _ingest_quiet(raw, tmp_path)
    assert "T_dev" not in open_store(canon)
    settings = coarsen_settings(scales=tuple(parse_scales([4])), patch_scales=())
    out = coarsen_case(canon, {"f4": tmp_path / "f4.zarr"}, settings)["f4"]
    q = _step(out)["quantized_blocks"]
    assert q["T"]["of"] == 2 * 3 * 8 * 8 and 0 < q["T"]["blocks"] <= 3 * 8 * 8
    assert "blocks of T at scale f4" in caplog.text
