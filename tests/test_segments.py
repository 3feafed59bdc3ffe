"""Time segments: a case with a raw archive runs as one job per segment and stage, the
segments are joined without copying, the arrays equal a one-job run (hashed), and new or
rewritten output files re-run only their segments."""

from __future__ import annotations

import hashlib
import os
import shutil
import time
from pathlib import Path

import netCDF4
import numpy as np
import pytest
import zarr

from lesprep.canonical.ingest import ingest_case
from lesprep.errors import InputError
from lesprep.scales.coarsen import coarsen_case
from lesprep.segments.gather import gather_stores
from lesprep.segments.plan import SegmentSettings, plan_case, segment_name
from settings_helpers import ingest_settings, workflow_settings
from workflow_project import REPO, Project

VARMAP = REPO / "config/varmaps/flavour-alpha.yaml"
LAYERS = {"name": "p4", "interfaces": ["1020 hPa", "990 hPa", "960 hPa", "920 hPa", "850 hPa"]}
"""A pressure layer set: every segment maps it with the case's first kept time."""


def hashes(store: Path) -> dict[str, str]:
    """sha256 of every array's values (and shape and dtype) of a store."""
    g = zarr.open_group(str(store), mode="r")
    out = {}
    for name, arr in g.arrays():
        a = np.ascontiguousarray(arr[...])
        out[name] = hashlib.sha256(f"{a.shape}{a.dtype}".encode() + a.tobytes()).hexdigest()
    return out


# -------------------------------------------------------------------------------------
# the plan and the gather, on a demo archive
# -------------------------------------------------------------------------------------


@pytest.fixture(scope="module")
def archive(demo_root) -> list[Path]:
    return sorted((demo_root / "sc-ostra-01").glob("*.nc"))


def test_plan_is_stable_when_files_are_appended(archive, tmp_path):
    ing = ingest_settings(spinup="1 h")
    seg = SegmentSettings(times=2, settle_s=0)
    short = plan_case("c", archive[:-2], VARMAP, ing, seg)
    full = plan_case("c", archive, VARMAP, ing, seg, cache=tmp_path / "c.json")
    assert full.names[: len(short.names)] == short.names
    for a, b in zip(short.segments[:-1], full.segments, strict=False):
        assert a == b  # complete segments: same times, same files, same name
    assert full.names == [segment_name(i, 2) for i in range(len(full.names))]
    kept = [t for s in full.segments for t in s.times]
    assert len(kept) == len(set(kept)) and kept == sorted(kept)
    again = plan_case("c", archive, VARMAP, ing, seg, cache=tmp_path / "c.json")
    assert again == full  # from the cache


def test_file_still_written_is_left_for_next_run(archive, caplog, tmp_path):
    ing = ingest_settings(spinup="1 h")
    files = []
    for f in archive:
        files.append(tmp_path / f.name)
        shutil.copy2(f, files[-1])
        os.utime(files[-1], (1.0e9, 1.0e9))  # written long ago
    os.utime(files[-1], (2.0e9, 2.0e9))  # the newest: written just now
    seg = SegmentSettings(times=2, settle_s=60)
    plan = plan_case("c", files, VARMAP, ing, seg, now=2.0e9 + 10)
    assert plan.waiting == (str(files[-1]),)
    assert "left for the next run" in caplog.text and files[-1].name in caplog.text
    assert all(str(files[-1]) not in s.files for s in plan.segments)
    later = plan_case("c", files, VARMAP, ing, seg, now=2.0e9 + 61)
    assert later.waiting == () and str(files[-1]) in later.segments[-1].files


def test_segments_gathered_equal_one_job(archive, tmp_path):
    """Ingest and coarsening in segments of one output time, joined by the gather, give
    the same arrays (sha256 of each) as one job over the whole case; nothing is copied."""
    ing = ingest_settings(spinup="1 h")
    cfg = {"scales": ["200 m", "600 m"], "layers": [LAYERS]}
    co = workflow_settings(coarsen=cfg).coarsen.for_group("all")
    plan = plan_case("c", archive, VARMAP, ing, SegmentSettings(times=1, settle_s=0))
    assert len(plan.segments) >= 3
    whole = ingest_case(
        case="c",
        raw=list(map(str, archive)),
        varmap=VARMAP,
        settings=ing,
        out=tmp_path / "whole/canonical.zarr",
    )
    labels = co.store_labels
    coarsen_case(whole, {lab: tmp_path / f"whole/scale-{lab}.zarr" for lab in labels}, co)
    segs, scale_segs = [], {lab: [] for lab in labels}
    for s in plan.segments:
        d = tmp_path / "segments" / s.name
        segs.append(
            ingest_case(
                case="c",
                raw=list(s.files),
                varmap=VARMAP,
                settings=ing,
                out=d / "canonical.zarr",
                segment=s.to_dict(),
            )
        )
        outs = {lab: d / f"scale-{lab}.zarr" for lab in labels}
        coarsen_case(segs[-1], outs, co, reference=segs[0])
        for lab in labels:
            scale_segs[lab].append(outs[lab])
    facts = gather_stores(segs, tmp_path / "joined/canonical.zarr")
    assert hashes(tmp_path / "joined/canonical.zarr") == hashes(whole)
    assert set(facts["rewritten"]) <= {"time"} and facts["linked"] > 0  # metadata only
    for lab in labels:
        gather_stores(scale_segs[lab], tmp_path / f"joined/scale-{lab}.zarr")
        assert hashes(tmp_path / f"joined/scale-{lab}.zarr") == hashes(
            tmp_path / f"whole/scale-{lab}.zarr"
        )
    # hard links: the joined store's chunk files are the segments' own inodes
    seg_chunk = next(p for p in (segs[1] / "qc").iterdir() if p.name != "zarr.json")
    assert seg_chunk.stat().st_nlink == 2


def test_gather_refuses_mismatched_segments(archive, tmp_path):
    ing = ingest_settings(spinup="1 h")
    plan = plan_case("c", archive, VARMAP, ing, SegmentSettings(times=1, settle_s=0))
    a = ingest_case(
        case="c",
        raw=list(plan.segments[0].files),
        varmap=VARMAP,
        settings=ing,
        out=tmp_path / "a.zarr",
        segment=plan.segments[0].to_dict(),
    )
    b = ingest_case(
        case="c",
        raw=list(plan.segments[1].files),
        varmap=VARMAP,
        settings=ingest_settings(spinup="1 h", dtype="float64"),
        out=tmp_path / "b.zarr",
        segment=plan.segments[1].to_dict(),
    )
    with pytest.raises(InputError, match="differs from the first segment in data_type"):
        gather_stores([a, b], tmp_path / "out.zarr")
    assert not (tmp_path / "out.zarr").exists()  # nothing half-written


# -------------------------------------------------------------------------------------
# the workflow: segment jobs, incremental runs
# -------------------------------------------------------------------------------------


@pytest.fixture(scope="module")
def running(tmp_path_factory):
    """A project whose case 'run-01' is a simulation still running: 4 of its 5 output
    files are there (kept times: spin-up 1 h of 30-min output)."""
    root = tmp_path_factory.mktemp("running")
    p = Project(root)
    p.add_demo_case("sc-ostra-01")
    p.add_demo_case("cu-marro-01")
    p.snakemake("--until", "demo_archive")
    src = sorted((root / "resources/demo/sc-ostra-01").glob("*.nc"))
    (root / "archive/run-01").mkdir(parents=True)
    for f in src[:4]:
        shutil.copy2(f, root / "archive/run-01" / f.name)
    p.add_case("run-01", "archive/run-01/*.nc", "alpha", "stratocumulus", split="train")
    p.config["coarsen"] = {"scales": ["600 m"]}
    p.config["segments"] = {"times": 1, "settle_s": 0}
    p.snakemake()
    return p, src


@pytest.mark.workflow
def test_new_output_file_runs_only_its_segment(running):
    p, src = running
    root = p.root
    before = sorted(d.name for d in (root / "results/cases/run-01/segments").iterdir())
    assert before == ["t0000-0000", "t0001-0001"]  # kept times 3600 s and 5400 s
    first = root / "results/cases/run-01/segments/t0000-0000/canonical.zarr"
    stamp = first.stat().st_mtime_ns
    shutil.copy2(src[4], root / "archive/run-01" / src[4].name)
    jobs = p.planned_jobs()
    assert jobs["ingest_segment"] == 1 and jobs["coarsen_segment_all"] == 1
    assert jobs["gather_canonical"] == 1 and jobs["gather_all"] == 1
    assert "ingest" not in jobs and "coarsen_all" not in jobs  # the demo cases rest
    p.snakemake()
    assert first.stat().st_mtime_ns == stamp  # the earlier segment was not rewritten
    g = zarr.open_group(str(root / "results/cases/run-01/canonical.zarr"), mode="r")
    assert g["qc"].shape[0] == 3
    assert p.planned_jobs() == {}
    log = (root / "logs/ingest/run-01-t0002-0002.log").read_text()
    assert "time 1/1 (100%)" in log  # the progress line of the job


@pytest.mark.workflow
def test_rewritten_file_reruns_its_segment_only(running):
    p, src = running
    time.sleep(0.01)
    with netCDF4.Dataset(p.root / "archive/run-01" / src[3].name, "a") as nc:
        nc["vap"][0, 0, 0, 0] = nc["vap"][0, 0, 0, 0] * 1.01
    jobs = p.planned_jobs()
    assert jobs["ingest_segment"] == 1 and jobs["coarsen_segment_all"] == 1
    p.snakemake()
    seg = zarr.open_group(
        str(p.root / "results/cases/run-01/segments/t0001-0001/canonical.zarr"), mode="r"
    )
    joined = zarr.open_group(str(p.root / "results/cases/run-01/canonical.zarr"), mode="r")
    np.testing.assert_array_equal(joined["qv"][1], seg["qv"][0])
    assert os.path.samefile(
        next(
            f
            for f in (p.root / "results/cases/run-01/canonical.zarr/qv").iterdir()
            if f.name.startswith("1.")
        ),
        next(
            f
            for f in (
                p.root / "results/cases/run-01/segments/t0001-0001/canonical.zarr/qv"
            ).iterdir()
            if f.name.startswith("0.")
        ),
    )
