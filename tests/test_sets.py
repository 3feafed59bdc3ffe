"""Training stores: stacking, shuffling, filters, train-only normalization, provenance."""

from __future__ import annotations

import json
import re
import shutil
import subprocess
import sys
from pathlib import Path

import numpy as np
import pytest
import xarray as xr
import zarr
from hypothesis import given, settings
from hypothesis import strategies as st

from lesprep.canonical.ingest import ingest_case
from lesprep.errors import ConfigError, TimeAxisError
from lesprep.scales.coarsen import coarsen_case
from lesprep.scales.spec import parse_scales
from lesprep.sets.assemble import (
    build_set,
    kept_indices,
    normalization_stats,
    open_set,
    write_normalization,
)
from lesprep.sets.lags import output_interval, plan_lags
from lesprep.store import open_store
from settings_helpers import coarsen_settings, ingest_settings, set_settings

REPO = Path(__file__).resolve().parents[1]
CASES = {"sc-ostra-01": "alpha", "sc-ostra-02": "beta", "cu-marro-01": "alpha"}
REGIMES = {"sc-ostra-01": "stratocumulus", "sc-ostra-02": "stratocumulus", "cu-marro-01": "cumulus"}


def _coarsened_cases(demo_root, out, ing, co) -> dict[str, Path]:
    """Each case of CASES ingested and coarsened to 400 m: case -> its scale store."""
    stores = {}
    for case, flavour in CASES.items():
        canon = ingest_case(
            case=case,
            raw=str(demo_root / case / "*.nc"),
            varmap=REPO / f"config/varmaps/flavour-{flavour}.yaml",
            settings=ing,
            out=out / case / "canonical.zarr",
            regime=REGIMES[case],
        )
        stores[case] = coarsen_case(canon, {"400m": out / case / "scale-400m.zarr"}, co)["400m"]
    return stores


@pytest.fixture(scope="module")
def case_stores(tmp_path_factory, demo_root):
    out = tmp_path_factory.mktemp("cases")
    ing = ingest_settings(
        spinup="1 h",
        cloud_threshold="1e-5 kg/kg",
    )
    co = coarsen_settings(
        scales=tuple(parse_scales(["400 m"])), patch_scales=("400m",), patch_size=4
    )
    return _coarsened_cases(demo_root, out, ing, co)


def build(case_stores, cases, out, statistics=None, **kw):
    small = {"shuffle": False, "chunk_mib": 0.05, "shard_mib": 0.5}  # several units per store
    settings = set_settings(**{**small, **kw})
    return build_set(
        {c: case_stores[c] for c in cases},
        REGIMES,
        out,
        settings,
        split="train",
        scale="400m",
        statistics=statistics,
    )


def test_stacks_every_coarse_cell(case_stores, tmp_path):
    path = build(case_stores, list(CASES), tmp_path / "s.zarr")
    ds = open_set(path)
    cells = {c: open_store(p) for c, p in case_stores.items()}
    assert ds.sizes["sample"] == sum(
        s.sizes["time"] * s.sizes["z"] * s.sizes["y"] * s.sizes["x"] for s in cells.values()
    )
    assert set(ds["case"].values) == set(CASES)
    assert set(ds["regime"].values) == {"stratocumulus", "cumulus"}
    # natural order: case, time, z, y, x; the first samples are the first case's first cells
    first = cells[sorted(CASES)[0]]
    np.testing.assert_array_equal(
        ds["qc_mean"].values[: first.sizes["x"]], first["qc_mean"].isel(time=0, z=0, y=0).values
    )
    assert ds["qc_patch"].dims == ("sample", "py", "px")
    # column features repeat over the levels of their column
    s = ds.isel(sample=slice(0, 2 * first.sizes["y"] * first.sizes["x"]))
    n = first.sizes["y"] * first.sizes["x"]
    np.testing.assert_array_equal(s["lwp_mean"].values[:n], s["lwp_mean"].values[n : 2 * n])


def test_shuffle_is_a_seeded_permutation(case_stores, tmp_path):
    plain = open_set(build(case_stores, list(CASES), tmp_path / "a.zarr"))
    mixed = open_set(
        build(case_stores, list(CASES), tmp_path / "b.zarr", shuffle=True, shuffle_seed=5)
    )
    again = open_set(
        build(case_stores, list(CASES), tmp_path / "c.zarr", shuffle=True, shuffle_seed=5)
    )
    n = plain.sizes["sample"]
    perm = np.random.default_rng(5).permutation(n)  # numpy's generator: the documented rule
    for v in ("w_mean", "z", "time", "case", "qc_patch"):
        np.testing.assert_array_equal(mixed[v].values[perm], plain[v].values)
        np.testing.assert_array_equal(mixed[v].values, again[v].values)
    assert zarr.open_group(str(tmp_path / "b.zarr")).attrs["sample_unit"] < n  # many units
    assert not (tmp_path / "b.zarr" / ".scratch").exists()


def natural_reference(case_stores, cases):
    """Every array of a natural-order set, stacked with xarray and numpy alone."""
    out: dict[str, list] = {}
    for c in sorted(cases):
        src = open_store(case_stores[c])
        cell = src["qc_mean"]  # (time, z, y, x)
        grid = xr.broadcast(cell, src["time"], src["z"], src["y"], src["x"])
        for name, v in zip(("time", "z", "y", "x"), grid[1:], strict=True):
            out.setdefault(name, []).append(v.transpose(*cell.dims).values.reshape(-1))
        out.setdefault("case", []).append(np.full(cell.size, c, dtype=object))
        out.setdefault("regime", []).append(np.full(cell.size, REGIMES[c], dtype=object))
        for name, v in src.data_vars.items():
            if name.endswith("_bounds") or v.dims[:1] not in (("time",), ("z",)):
                continue
            extra = [d for d in v.dims if d not in cell.dims]
            a = v.broadcast_like(cell).transpose(*cell.dims, *extra).values
            out.setdefault(name, []).append(a.reshape(cell.size, *a.shape[4:]))
    return {k: np.concatenate(v) for k, v in out.items()}


LAYOUTS = [  # small enough for several units of every kind in the 1512 samples
    {"chunking": "widest", "shard_mib": 0.0, "chunk_mib": 0.002},
    {"chunking": "per-array", "shard_mib": 0.0, "chunk_mib": 0.002},
    {"chunking": "per-array", "shard_mib": 0.1, "chunk_mib": 0.002},
    {"chunking": "widest", "shard_mib": 0.1, "chunk_mib": 0.002},
]


@pytest.mark.parametrize("layout", LAYOUTS, ids=lambda d: f"{d['chunking']}-{d['shard_mib']}")
@pytest.mark.parametrize("shuffle", [False, True])
def test_every_layout_holds_the_stacked_cells(case_stores, tmp_path, layout, shuffle):
    """Unit-aligned writing gives, in every layout, the arrays xarray stacks from the cases,
    in natural or numpy's permuted order; every chunk and shard boundary of every array falls
    on a multiple of the recorded read unit."""
    stats: dict = {}
    path = build(case_stores, list(CASES), tmp_path / "s.zarr", stats, shuffle=shuffle, **layout)
    want = natural_reference(case_stores, list(CASES))
    root = zarr.open_group(str(path), mode="r")
    n = root["time"].shape[0]
    perm = np.random.default_rng(0).permutation(n)  # numpy's rule, the schema's seed
    names = {k for k, _ in root.arrays()}
    assert names == set(want)
    for name in names:
        got = root[name][...]
        if shuffle:
            got = got[perm]  # the sample at perm[i] is the i-th in natural order
        np.testing.assert_array_equal(got, want[name].astype(got.dtype))
    unit = root.attrs["sample_unit"]
    lengths = {k: (a.shards or a.chunks)[0] for k, a in root.arrays()}  # zarr's metadata
    assert max(lengths.values()) == unit < n
    assert all(unit % length == 0 for length in lengths.values())
    if layout["shard_mib"]:
        assert {a.shards[0] for _, a in root.arrays()} == {unit}
    if layout["chunking"] == "widest":
        assert len({a.chunks[0] for _, a in root.arrays()}) == 1
    else:
        assert root["w_mean"].chunks[0] > root["qc_patch"].chunks[0]
    # statistics collected while writing: those of the written store, and numpy's
    assert stats == normalization_stats(path)
    for v in ("qc_mean", "qc_patch"):
        a = want[v].astype(np.float32).astype(np.float64)
        assert stats[v]["mean"] == pytest.approx(a.mean(), rel=1e-9)
        assert stats[v]["std"] == pytest.approx(a.std(), rel=1e-9)


def test_filters(case_stores, tmp_path):
    ds = open_set(
        build(case_stores, list(CASES), tmp_path / "f.zarr", z_range=(300.0, 1200.0), time_stride=2)
    )
    assert ds["z"].values.min() >= 300.0 and ds["z"].values.max() <= 1200.0
    for c in CASES:
        src = open_store(case_stores[c])
        sel = ds["case"].values == c
        assert set(np.unique(ds["time"].values[sel])) == set(src.time.values[::2])


def test_normalization_from_train_only(case_stores, tmp_path):
    train = build(case_stores, ["sc-ostra-01", "cu-marro-01"], tmp_path / "train.zarr")
    doc = write_normalization(train, tmp_path / "n.json", scale="400m")
    ds = open_set(train)
    for v in ("qc_mean", "w_var", "qc_patch"):  # against numpy over the train store
        a = ds[v].values.astype(np.float64)
        assert doc["statistics"][v]["mean"] == pytest.approx(a.mean(), rel=1e-9)
        assert doc["statistics"][v]["std"] == pytest.approx(a.std(), rel=1e-9)  # ddof=0
    assert json.loads((tmp_path / "n.json").read_text()) == doc
    assert json.loads(zarr.open_group(str(train)).attrs["normalization"]) == doc
    # a held-out case changes: the train store, rebuilt from the same train cases, gives
    # the same statistics, so nothing of the held-out split leaks into the normalization
    held = tmp_path / "held.zarr"
    shutil.copytree(case_stores["sc-ostra-02"], held)
    g = zarr.open_group(str(held), mode="r+")
    g["qc_mean"][...] = 1.0
    build_set(
        {"sc-ostra-02": held},
        REGIMES,
        tmp_path / "test.zarr",
        set_settings(shuffle=False),
        split="test",
        scale="400m",
    )
    again = build(case_stores, ["sc-ostra-01", "cu-marro-01"], tmp_path / "train2.zarr")
    assert normalization_stats(again) == doc["statistics"]
    # and the check can fail: a changed train case does move them
    changed = tmp_path / "changed.zarr"
    shutil.copytree(case_stores["cu-marro-01"], changed)
    zarr.open_group(str(changed), mode="r+")["qc_mean"][...] = 1.0
    moved = build(
        {**case_stores, "cu-marro-01": changed},
        ["sc-ostra-01", "cu-marro-01"],
        tmp_path / "train3.zarr",
    )
    assert normalization_stats(moved)["qc_mean"] != doc["statistics"]["qc_mean"]


def test_provenance_command(case_stores, tmp_path):
    path = build(case_stores, list(CASES), tmp_path / "p.zarr")
    exe = str(Path(sys.executable).parent / "lesprep")
    text = subprocess.run(
        [exe, "provenance", str(path)], capture_output=True, text=True, check=True, timeout=120
    ).stdout
    for part in (
        "sc-ostra-01",
        "sha256",
        "g/kg -> kg kg-1",
        "spin-up 1 h",
        "assemble",
        "scale 400m",
        "Bolton",
    ):
        assert part in text
    full = json.loads(
        subprocess.run(
            [exe, "provenance", "--json", str(path)],
            capture_output=True,
            text=True,
            check=True,
            timeout=120,
        ).stdout
    )
    ingests = [s for inp in full["inputs"] for s in inp["steps"] if s["step"] == "ingest"]
    assert {s["case"] for s in ingests} == set(CASES)
    assert all(s["raw_files"] and s["environment"]["code_version"] for s in ingests)


# --- labels as strings, case attributes ---------------------------------------------------


def test_labels_decode_to_case_ids_with_plain_xarray(case_stores, tmp_path):
    """Two stores sharing one case: plain ``xr.open_zarr`` gives str case ids, and the same
    string is the same case in both (each sample's values are those of that case's cell,
    located with xarray's own ``sel``)."""
    a = build(case_stores, ["cu-marro-01", "sc-ostra-01"], tmp_path / "a.zarr")
    b = build(case_stores, ["cu-marro-01", "sc-ostra-02"], tmp_path / "b.zarr", shuffle=True)
    rng = np.random.default_rng(1)
    seen = {}
    for path, cases in ((a, {"cu-marro-01", "sc-ostra-01"}), (b, {"cu-marro-01", "sc-ostra-02"})):
        ds = xr.open_zarr(path)  # no option, no lesprep code
        assert ds["case"].dtype.kind in "OT" and "case" in ds.coords  # object or StringDType
        names = ds["case"].values
        assert all(type(c) is str for c in names.tolist())
        assert set(names.tolist()) == cases
        assert set(ds["regime"].values.tolist()) == {REGIMES[c] for c in cases}
        seen[path] = names
        for i in rng.choice(ds.sizes["sample"], 20, replace=False):
            s = ds.isel(sample=int(i))
            src = open_store(case_stores[str(s["case"].values)])
            cell = src.sel(time=float(s.time), z=float(s.z), y=float(s.y), x=float(s.x))
            assert float(s["qc_mean"]) == float(cell["qc_mean"])
    # the shared case has as many samples in both stores (same string, same case)
    assert (seen[a] == "cu-marro-01").sum() == (seen[b] == "cu-marro-01").sum() > 0
    meta = json.loads((a / "case" / "zarr.json").read_text())
    assert meta["data_type"] == "string"  # Zarr v3 variable-length UTF-8


def test_case_attributes_become_string_coordinates(case_stores, tmp_path):
    cases = ["cu-marro-01", "sc-ostra-01"]
    attrs = {"cu-marro-01": {"forcing": "warm-7", "site": "isle-b"}, "sc-ostra-01": {"site": 3}}
    plain = build(case_stores, cases, tmp_path / "plain.zarr")
    path = build_set(
        {c: case_stores[c] for c in cases},
        REGIMES,
        tmp_path / "attrs.zarr",
        set_settings(shuffle=True, chunk_mib=0.05),
        split="train",
        scale="400m",
        attributes=attrs,
    )
    ds = xr.open_zarr(path)  # no option, no lesprep code
    for c in cases:
        sel = ds["case"].values == c
        assert set(ds["site"].values[sel].tolist()) == {str(attrs[c]["site"])}
        assert set(ds["forcing"].values[sel].tolist()) == {attrs[c].get("forcing", "")}
    assert {"site", "forcing"} <= set(ds.coords)
    # an empty mapping adds nothing
    empty = build_set(
        {c: case_stores[c] for c in cases},
        REGIMES,
        tmp_path / "empty.zarr",
        set_settings(shuffle=False, chunk_mib=0.05),
        split="train",
        scale="400m",
        attributes={},
    )
    assert set(xr.open_zarr(empty).variables) == set(xr.open_zarr(plain).variables)


@pytest.mark.parametrize("name", ["qc_mean", "time", "1st", "with space"])
def test_unusable_attribute_names_are_refused(case_stores, tmp_path, name):
    with pytest.raises(ConfigError, match=f"case attribute {re.escape(repr(name))}"):
        build_set(
            {"cu-marro-01": case_stores["cu-marro-01"]},
            REGIMES,
            tmp_path / "x.zarr",
            set_settings(),
            split="train",
            scale="400m",
            attributes={"cu-marro-01": {name: "a"}},
        )


def test_string_labels_survive_the_shuffle(case_stores, tmp_path):
    plain = open_set(build(case_stores, list(CASES), tmp_path / "a.zarr"))
    mixed = open_set(
        build(case_stores, list(CASES), tmp_path / "b.zarr", shuffle=True, shuffle_seed=3)
    )
    perm = np.random.default_rng(3).permutation(plain.sizes["sample"])  # numpy's rule
    for v in ("case", "regime"):
        assert mixed[v].values[perm].tolist() == plain[v].values.tolist()


# --- lagged features -----------------------------------------------------------------------

LAGGED = ("qc_mean", "lwp_mean")  # a per-cell and a per-column feature


@pytest.fixture(scope="module")
def lag_stores(tmp_path_factory, demo_root):
    """The cases without spin-up (all 5 output times), coarsened without patches."""
    out = tmp_path_factory.mktemp("lagcases")
    ing = ingest_settings(spinup="0 h", cloud_threshold="1e-5 kg/kg")
    co = coarsen_settings(scales=tuple(parse_scales(["400 m"])), patch_scales=())
    return _coarsened_cases(demo_root, out, ing, co)


def lag_set(case_stores, tmp_path, name="lag.zarr", steps=(1, 2), **kw):
    return build(
        case_stores,
        list(CASES),
        tmp_path / name,
        lag_features=LAGGED,
        lag_steps=tuple(steps),
        **kw,
    )


@pytest.mark.parametrize("shuffle", [False, True])
def test_lagged_values_are_the_cell_at_earlier_times(lag_stores, tmp_path, shuffle):
    ds = open_set(lag_set(lag_stores, tmp_path, shuffle=shuffle))
    srcs = {c: open_store(p) for c, p in lag_stores.items()}
    for c, src in srcs.items():
        sel = np.nonzero(ds["case"].values == c)[0]
        t = ds["time"].values[sel]
        times = src["time"].values
        k_now = np.searchsorted(times, t)  # index of the sample's time (numpy)
        assert np.array_equal(times[k_now], t)
        for k in (1, 2):
            prev = xr.DataArray(times[k_now - k], dims="s")
            at = {
                "time": prev,
                "z": xr.DataArray(ds["z"].values[sel], dims="s"),
                "y": xr.DataArray(ds["y"].values[sel], dims="s"),
                "x": xr.DataArray(ds["x"].values[sel], dims="s"),
            }
            for f in LAGGED:
                want = src[f].sel({d: at[d] for d in src[f].dims}).values  # xarray's own sel
                got = ds[f"{f}_lag{k}"].values[sel]
                np.testing.assert_array_equal(got, want.astype(got.dtype))
                attrs = ds[f"{f}_lag{k}"].attrs
                assert attrs["lag_steps"] == k and attrs["lag_of"] == f


def test_lag_seconds_of_cases_with_one_interval(lag_stores, tmp_path):
    same = ["sc-ostra-01", "cu-marro-01"]
    times = open_store(lag_stores["sc-ostra-01"])["time"].values
    stores = {**lag_stores}
    stores["cu-marro-01"] = _retime(lag_stores["cu-marro-01"], tmp_path / "re.zarr", times)
    ds = open_set(
        build(stores, same, tmp_path / "one.zarr", lag_features=("qc_mean",), lag_steps=(2,))
    )
    assert ds["qc_mean_lag2"].attrs["lag_s"] == pytest.approx(2 * (times[1] - times[0]))
    assert "lag_s_by_case" not in ds["qc_mean_lag2"].attrs


def test_first_times_of_each_case_are_dropped(lag_stores, tmp_path):
    ds = open_set(lag_set(lag_stores, tmp_path, steps=(2,), time_stride=1))
    strided = open_set(lag_set(lag_stores, tmp_path, "s.zarr", steps=(1,), time_stride=2))
    for c, p in lag_stores.items():
        times = open_store(p)["time"].values
        assert times.size >= 3
        got = np.unique(ds["time"].values[ds["case"].values == c])
        np.testing.assert_array_equal(got, times[2:])  # lags of 2 need two earlier times
        got = np.unique(strided["time"].values[strided["case"].values == c])
        np.testing.assert_array_equal(got, times[::2][1:])  # every 2nd time but the first
    assert "qc_mean_lag1" not in ds and "qc_mean_lag2" in ds


def test_lagged_features_have_normalization_statistics(lag_stores, tmp_path):
    path = lag_set(lag_stores, tmp_path)
    stats = normalization_stats(path)
    ds = open_set(path)
    for v in ("qc_mean_lag1", "lwp_mean_lag2"):
        a = ds[v].values.astype(np.float64)  # numpy's mean and population std
        assert stats[v]["mean"] == pytest.approx(a.mean(), rel=1e-9)
        assert stats[v]["std"] == pytest.approx(a.std(), rel=1e-9)
    assert not {"case", "regime"} & set(stats)


def _retime(src, dst, times):
    shutil.copytree(src, dst)
    zarr.open_array(str(dst / "time"), mode="r+")[...] = times
    return dst


def test_irregular_interval_is_refused_naming_the_gap(lag_stores, tmp_path):
    times = open_store(lag_stores["sc-ostra-01"])["time"].values.astype(np.float64)
    dt = float(times[1] - times[0])
    gapped = times.copy()
    gapped[2:] += dt  # one output time missing between times[1] and times[2]
    bad = _retime(lag_stores["sc-ostra-01"], tmp_path / "gap.zarr", gapped)
    stores = {**lag_stores, "sc-ostra-01": bad}
    with pytest.raises(TimeAxisError) as err:
        build(
            stores, ["sc-ostra-01"], tmp_path / "x.zarr", lag_features=("qc_mean",), lag_steps=(1,)
        )
    msg = str(err.value)
    assert "case 'sc-ostra-01'" in msg and "gap.zarr" in msg
    assert f"{2 * dt:g} s from {gapped[1]:g} s to {gapped[2]:g} s" in msg
    # without lags the same case is fine
    build(stores, ["sc-ostra-01"], tmp_path / "ok.zarr")


def test_cases_with_different_intervals_record_each_span(lag_stores, tmp_path):
    ds = open_set(lag_set(lag_stores, tmp_path))
    for k in (1, 2):
        attrs = ds[f"qc_mean_lag{k}"].attrs
        assert "lag_s" not in attrs  # the demo cases have different intervals
        for c, p in lag_stores.items():
            dt = np.diff(open_store(p)["time"].values)[0]  # numpy's difference
            assert attrs["lag_s_by_case"][c] == pytest.approx(k * dt)


@pytest.mark.parametrize(
    ("feature", "found"), [("nope_mean", "do not hold"), ("qc_patch", "a patch variable")]
)
def test_unusable_lag_features_are_refused(case_stores, tmp_path, feature, found):
    with pytest.raises(ConfigError, match=found):
        build(
            case_stores,
            ["cu-marro-01"],
            tmp_path / "x.zarr",
            lag_features=(feature,),
            lag_steps=(1,),
        )


def test_a_profile_cannot_be_lagged():
    with pytest.raises(ConfigError, match="a profile variable"):
        plan_lags(["p_ref"], [1], {"p_ref": "profile", "w_mean": "cell"}, where="train")


@given(
    t0=st.floats(-1e6, 1e6),
    dt=st.floats(1.0, 1e4),
    n=st.integers(2, 40),
    gap=st.integers(1, 39),
)
@settings(max_examples=60, deadline=None)
def test_interval_rule(t0, dt, n, gap):
    times = t0 + dt * np.arange(n)  # numpy's evenly spaced times
    assert output_interval(times, case="c") == pytest.approx(dt, rel=1e-9)
    if gap < n and n >= 3:  # a doubled interval among others (two times are always regular)
        times[gap:] += dt
        with pytest.raises(TimeAxisError, match="not regular"):
            output_interval(times, case="c")


@given(
    times=st.integers(0, 30),
    stride=st.integers(1, 5),
    steps=st.lists(st.integers(1, 6), max_size=3, unique=True),
)
@settings(max_examples=80, deadline=None)
def test_kept_times_against_a_plain_rule(times, stride, steps):
    t, _ = kept_indices(times, np.zeros(1), z_range=None, time_stride=stride, lag_steps=steps)
    want = [i for i in range(times) if i % stride == 0 and all(i - k >= 0 for k in steps)]
    assert t.tolist() == want
