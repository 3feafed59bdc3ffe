"""Training stores: stacking, shuffling, filters, train-only normalization, provenance."""

from __future__ import annotations

import json
import shutil
import subprocess
import sys
from pathlib import Path

import numpy as np
import pytest
import zarr

from lesprep.canonical.ingest import ingest_case
from lesprep.scales.coarsen import coarsen_case
from lesprep.scales.spec import parse_scales
from lesprep.sets.assemble import (
    build_set,
    decode_category,
    normalization_stats,
    open_set,
    write_normalization,
)
from lesprep.store import open_store
from settings_helpers import coarsen_settings, ingest_settings, set_settings

REPO = Path(__file__).resolve().parents[1]
CASES = {"sc-ostra-01": "alpha", "sc-ostra-02": "beta", "cu-marro-01": "alpha"}
REGIMES = {"sc-ostra-01": "stratocumulus", "sc-ostra-02": "stratocumulus", "cu-marro-01": "cumulus"}


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


def build(case_stores, cases, out, **kw):
    settings = set_settings(**{"shuffle": False, "chunk_mib": 0.05, **kw})
    return build_set(
        {c: case_stores[c] for c in cases}, REGIMES, out, settings, split="train", scale="400m"
    )


def test_stacks_every_coarse_cell(case_stores, tmp_path):
    path = build(case_stores, list(CASES), tmp_path / "s.zarr")
    ds = open_set(path)
    cells = {c: open_store(p) for c, p in case_stores.items()}
    assert ds.sizes["sample"] == sum(
        s.sizes["time"] * s.sizes["z"] * s.sizes["y"] * s.sizes["x"] for s in cells.values()
    )
    cases = decode_category(ds, "case")
    assert set(cases) == set(CASES)
    assert set(decode_category(ds, "regime")) == {"stratocumulus", "cumulus"}
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
    assert zarr.open_group(str(tmp_path / "b.zarr"))["w_mean"].chunks[0] < n  # many chunks
    assert not (tmp_path / "b.zarr" / ".scratch").exists()


def test_filters(case_stores, tmp_path):
    ds = open_set(
        build(case_stores, list(CASES), tmp_path / "f.zarr", z_range=(300.0, 1200.0), time_stride=2)
    )
    assert ds["z"].values.min() >= 300.0 and ds["z"].values.max() <= 1200.0
    for c in CASES:
        src = open_store(case_stores[c])
        sel = decode_category(ds, "case") == c
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
