"""End to end: Snakemake runs the demo in a temporary folder; incremental re-runs."""

from __future__ import annotations

import json
import shutil

import netCDF4
import numpy as np
import pandas as pd
import pytest
import xarray as xr

from lesprep.sets.assemble import open_set
from lesprep.sets.splits import read_assignment_tsv
from lesprep.store import open_store
from workflow_project import REPO, Project

pytestmark = pytest.mark.workflow


@pytest.fixture(scope="module")
def project(tmp_path_factory):
    p = Project(tmp_path_factory.mktemp("project"))
    for c in ("sc-ostra-01", "sc-ostra-02", "cu-marro-01", "cu-marro-02"):
        p.add_demo_case(c)
    p.snakemake()
    return p


def test_demo_runs_end_to_end(project):
    r = project.root / "results"
    for c in ("sc-ostra-01", "sc-ostra-02", "cu-marro-01", "cu-marro-02"):
        assert (r / "cases" / c / "canonical.zarr").is_dir()
        for lab in ("200m", "600m", "1200m"):
            ds = open_store(r / "cases" / c / f"scale-{lab}.zarr")
            assert ds.attrs["factor"] == {"200m": 4, "600m": 12, "1200m": 24}[lab]
    assign = {a.case: a.split for a in read_assignment_tsv(r / "splits.tsv")}
    # stratified: each regime (two cases each) has a train and a test case
    for regime in ("sc", "cu"):
        assert {s for c, s in assign.items() if c.startswith(regime)} == {"train", "test"}
    for split in ("train", "test"):
        ds = open_set(r / "sets" / split / "scale-600m.zarr")
        # plain xarray decodes the per-sample case to the case ids (strings)
        plain = xr.open_zarr(r / "sets" / split / "scale-600m.zarr")
        cases = set(plain["case"].values.tolist())
        assert all(isinstance(c, str) for c in cases)
        assert cases == {c for c, s in assign.items() if s == split}
        assert ds["qc_patch"].shape[1:] == (6, 6)
    assert (r / "sets" / "normalization-600m.json").exists()
    # no sample of a test case is in the train store and vice versa
    for lab in ("200m", "600m", "1200m"):
        seen = {
            sp: set(open_set(r / "sets" / sp / f"scale-{lab}.zarr")["case"].values.tolist())
            for sp in ("train", "test")
        }
        assert seen["train"] and seen["test"] and not seen["train"] & seen["test"]
    assert project.planned_jobs() == {}  # a second run has nothing to do


def test_new_case_reruns_only_that_case(project):
    project.add_demo_case("sc-pelle-01")
    jobs = project.planned_jobs()
    assert jobs.get("demo_archive") == 1
    assert jobs.get("ingest") == 1
    assert jobs.get("coarsen_all") == 1
    # only the sets of the split the new case joins are re-assembled
    assert jobs.get("assemble_train", 0) + jobs.get("assemble_heldout", 0) == 3
    project.rows.pop()
    assert project.planned_jobs() == {}


def test_regimes_cover_every_scene_and_a_train_case_reruns_no_other_split(project):
    r = project.root / "results"
    scenes = pd.read_csv(r / "scenes.tsv", sep="\t")
    labels = pd.read_csv(r / "regimes.tsv", sep="\t")
    assert list(labels.columns) == ["case", "time_s", "split", "label", "clear"]
    key = ["case", "time_s"]
    assert sorted(map(tuple, labels[key].to_numpy())) == sorted(map(tuple, scenes[key].to_numpy()))
    assign = {a.case: a.split for a in read_assignment_tsv(r / "splits.tsv")}
    assert labels["case"].map(assign).tolist() == labels["split"].tolist()
    fit = json.loads((r / "regimes.json").read_text())
    assert set(labels["label"]) <= {-1, *range(fit["k"])}
    for kind in ("silhouette", "descriptors", "timeline"):
        assert (r / "figures" / "regimes" / f"{kind}.png").stat().st_size > 0
    # the labels are in no set store
    ds = open_set(r / "sets" / "train" / "scale-600m.zarr")
    assert not any("regime_label" in v or v == "label" for v in ds.variables)
    # a new train case: its own stages, the train sets and the labelling, never test sets
    project.add_demo_case("sc-pelle-01", split="train")
    jobs = project.planned_jobs()
    assert jobs.get("ingest") == 1 and jobs.get("assemble_train") == 3
    assert "assemble_heldout" not in jobs
    assert jobs.get("case_scenes") == 1 and jobs.get("scene_table") == 1
    assert jobs.get("regimes") == 1
    project.rows.pop()
    assert project.planned_jobs() == {}


def test_threshold_change_reruns_masks_and_downstream(project):
    project.config["ingest"]["cloud_threshold"] = "2e-5 kg/kg"
    jobs = project.planned_jobs()
    assert jobs.get("ingest") == 4 and jobs.get("coarsen_all") == 4
    assert "demo_archive" not in jobs
    project.config["ingest"]["cloud_threshold"] = "1e-5 kg/kg"
    assert project.planned_jobs() == {}


@pytest.mark.parametrize(
    "edited, expected",
    [
        # a fix in the report code re-runs the report only
        # the scene descriptors are their own stage, and the regimes read their table
        ("report/scenes.py", {"case_scenes": 4, "scene_table": 1, "regimes": 1}),
        ("report/skill.py", {"figures": 1, "tables": 1}),
        # the regime labelling is its own stage: nothing upstream re-runs
        ("report/regimes.py", {"regimes": 1}),
        # a change in coarsening code re-runs coarsening and what follows, never ingest
        (
            "scales/patches.py",
            {
                "coarsen_all": 4,
                "assemble_train": 3,
                "assemble_heldout": 3,
                "figures": 1,
                "tables": 1,
            },
        ),
    ],
)
def test_code_change_reruns_only_its_stage(project, tmp_path, edited, expected):
    src = tmp_path / "src"
    shutil.copytree(
        REPO / "src" / "lesprep", src / "lesprep", ignore=shutil.ignore_patterns("__pycache__")
    )
    f = src / "lesprep" / edited
    f.write_text(f.read_text() + "\n# an edit\n")
    jobs = project.planned_jobs(src=src)
    jobs.pop("all", None)
    assert jobs == expected


def test_edited_raw_file_reruns_its_case(tmp_path):
    p = Project(tmp_path)
    p.add_demo_case("sc-ostra-01")
    p.add_demo_case("cu-marro-01")
    p.snakemake("--until", "demo_archive")
    # a user archive outside the demo: copy one case and register it as a real case
    shutil.copytree(tmp_path / "resources/demo/sc-ostra-01", tmp_path / "archive/own-01")
    p.add_case("own-01", "archive/own-01/*.nc", "alpha", "stratocumulus")
    p.config["coarsen"] = {"scales": ["600 m"], "groups": [["600 m"]]}
    p.snakemake()
    assert p.planned_jobs() == {}
    with netCDF4.Dataset(tmp_path / "archive/own-01/snap_0004.nc", "a") as nc:
        nc["vap"][0, 0, 0, 0] = nc["vap"][0, 0, 0, 0] * 1.01  # a real edit of the content
    jobs = p.planned_jobs()  # a case with a raw archive runs as time segments (one here)
    assert jobs.get("ingest_segment") == 1 and jobs.get("coarsen_segment_g-600m") == 1
    assert jobs.get("gather_canonical") == 1 and "ingest" not in jobs


def test_scale_groups_rerun_only_the_changed_scale(tmp_path):
    p = Project(tmp_path)
    p.add_demo_case("sc-ostra-01")
    p.add_demo_case("cu-marro-01")
    p.config["coarsen"] = {"scales": ["200 m", "600 m"], "groups": [["200 m"], ["600 m"]]}
    p.snakemake()
    p.config["coarsen"] = {"scales": ["200 m", "1200 m"], "groups": [["200 m"], ["1200 m"]]}
    jobs = p.planned_jobs()
    assert jobs.get("coarsen_g-1200m") == 2
    assert "coarsen_g-200m" not in jobs and "ingest" not in jobs
    # sets of the new scale only (one per split in use; train includes normalization)
    used = {a.split for a in read_assignment_tsv(tmp_path / "results/splits.tsv")}
    assert jobs.get("assemble_train", 0) == (1 if "train" in used else 0)
    assert jobs.get("assemble_heldout", 0) == len(used - {"train"})


def test_sets_round_trip_to_per_case_store(project):
    r = project.root / "results"
    ds = open_set(r / "sets" / "train" / "scale-200m.zarr")
    cases = ds["case"].values
    rng = np.random.default_rng(0)
    for i in rng.choice(ds.sizes["sample"], 25, replace=False):
        s = ds.isel(sample=int(i))
        src = open_store(r / "cases" / cases[i] / "scale-200m.zarr")
        cell = src.sel(time=float(s.time), z=float(s.z), y=float(s.y), x=float(s.x))
        for v in ("qc_mean", "w_var", "cloud_fraction", "lwp_mean", "rh_of_means"):
            assert float(s[v]) == float(cell[v])


def test_report_html(project):
    out = project.root / "report.html"
    project.snakemake("--report", str(out))
    html = out.read_text(errors="replace")
    assert len(html) > 50_000
    for part in (
        "timeseries.png",
        "cf_vs_rh.png",
        "scenes.tsv",
        "baseline.tsv",
        "Cases",
        "regimes.tsv",
        "silhouette.png",
    ):
        assert part in html
    base = (project.root / "results/baseline.tsv").read_text().splitlines()
    head = ["split", "scale", "baseline", "target", "rmse", "bias", "mae", "n"]
    assert base[0].split("\t") == head
    assert len(base) == 1 + 2 * 3 * 3  # train and test at three scales, three baseline rows
    rows = [dict(zip(head, line.split("\t"), strict=True)) for line in base[1:]]
    assert {(r["baseline"], r["target"]) for r in rows} == {
        ("sundqvist", "cloud_fraction"),
        ("gaussian", "cloud_fraction"),
        ("gaussian", "cloud_fraction_zero"),
    }
