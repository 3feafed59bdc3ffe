"""Time segments: a case with a raw archive runs as one job per segment and stage, the
segments are joined without copying, the arrays equal a one-job run (hashed), and new or
rewritten output files re-run only their segments."""

from __future__ import annotations

import hashlib
import os
import shutil
from pathlib import Path

import numpy as np
import pytest
import zarr

from lesprep.canonical.ingest import ingest_case
from lesprep.errors import InputError
from lesprep.scales.coarsen import coarsen_case
from lesprep.segments.gather import gather_stores
from lesprep.segments.plan import SegmentSettings, plan_case, segment_name
from settings_helpers import ingest_settings, workflow_settings
from workflow_project import REPO

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


# The workflow side (segment jobs in sacct, a new output file submitting only its segment,
# a rewritten file re-running only its segment, arrays equal to a one-job run) is tested on
# a real SLURM cluster: tests/test_slurm_workflow.py.
