"""Reliability: kill-and-resume, raw data untouched, determinism (workflow level)."""

from __future__ import annotations

import hashlib
import os
import shutil
import signal
import subprocess
import time
from pathlib import Path

import pytest
import zarr

from workflow_project import REPO, SNAKEMAKE, Project

pytestmark = pytest.mark.workflow


def make_project(root: Path) -> Project:
    p = Project(root)
    p.add_demo_case("sc-ostra-01")
    p.add_demo_case("cu-marro-02")
    p.config["coarsen"] = {
        "scales": ["200 m", "600 m"],
        "patches": {"variables": ["qc"], "scales": ["600 m"], "size": 6},
    }
    p.config["splits"] = {"seed": 3, "fractions": {"train": 0.5, "validation": 0.0, "test": 0.5}}
    return p


def array_hashes(results: Path) -> dict[str, str]:
    """sha256 of every array's values in every store under results (attrs ignored)."""
    out: dict[str, str] = {}
    for meta in sorted(results.rglob("zarr.json")):
        store = meta.parent
        if store.suffix != ".zarr":
            continue
        root = zarr.open_group(str(store), mode="r")
        for name, arr in root.arrays():
            out[f"{store.relative_to(results)}/{name}"] = hashlib.sha256(
                arr[...].tobytes()
            ).hexdigest()
    return out


def temporaries(root: Path) -> list[Path]:
    return [p for p in root.rglob("*") if ".tmp-" in p.name or ".partial-" in p.name]


@pytest.fixture(scope="module")
def reference(tmp_path_factory):
    p = make_project(tmp_path_factory.mktemp("reference"))
    p.snakemake()
    return p, array_hashes(p.root / "results")


def test_two_runs_from_scratch_are_identical(reference, tmp_path):
    _, ref = reference
    p = make_project(tmp_path)
    p.snakemake()
    assert array_hashes(tmp_path / "results") == ref
    assert len(ref) > 100


def _run_until(p: Project, pattern: str, timeout: float = 240.0) -> bool:
    """Start the workflow, SIGKILL its whole process group once `pattern` appears."""
    p.write()
    cmd = [
        SNAKEMAKE,
        "-s",
        str(REPO / "Snakefile"),
        "--directory",
        str(p.root),
        "--configfile",
        str(p.root / "config/config.yaml"),
        "--cores",
        "2",
    ]
    proc = subprocess.Popen(
        cmd,
        stdout=subprocess.DEVNULL,
        stderr=subprocess.DEVNULL,
        stdin=subprocess.DEVNULL,
        start_new_session=True,
    )
    t0 = time.time()
    hit = False
    try:
        while time.time() - t0 < timeout and proc.poll() is None:
            if any(p.root.glob(pattern)):
                hit = True
                break
            time.sleep(0.01)
    finally:
        if proc.poll() is None:
            os.killpg(proc.pid, signal.SIGKILL)
        proc.wait(timeout=60)
    return hit


@pytest.mark.parametrize(
    "phase, pattern",
    [
        ("ingest", "results/cases/*/.canonical.zarr.tmp-*"),
        ("coarsen", "results/cases/*/.scale-*.zarr.tmp-*"),
        ("assembly", "results/sets/*/.scale-*.zarr.tmp-*"),
    ],
)
def test_kill_and_resume(reference, tmp_path, phase, pattern):
    _, ref = reference
    p = make_project(tmp_path)
    if phase != "ingest":  # get the earlier stages done first, then kill in this one
        p.snakemake("--until", "ingest" if phase == "coarsen" else "coarsen_all")
    assert _run_until(p, pattern), f"never saw a {phase} job write"
    # what the README tells a user after a kill: unlock, then the same command
    # (the default profile sets --rerun-incomplete; here it is given explicitly)
    p.snakemake("--unlock")
    p.snakemake("--rerun-incomplete")
    assert array_hashes(tmp_path / "results") == ref
    assert temporaries(tmp_path) == []


def test_raw_archive_untouched(tmp_path):
    p = make_project(tmp_path)
    p.rows = []
    p.add_demo_case("sc-ostra-01")
    p.snakemake("--until", "demo_archive")
    shutil.copytree(tmp_path / "resources/demo/sc-ostra-01", tmp_path / "archive/own")
    for f in (tmp_path / "archive/own").iterdir():
        f.chmod(0o444)  # as archives often are; lesprep must not need write access
    p.add_case("own-02", "archive/own/*.nc", "alpha", "cumulus")
    before = {
        f: (f.stat().st_mtime_ns, hashlib.sha256(f.read_bytes()).hexdigest())
        for f in sorted((tmp_path / "archive/own").iterdir())
    }
    p.snakemake()
    after = {
        f: (f.stat().st_mtime_ns, hashlib.sha256(f.read_bytes()).hexdigest())
        for f in sorted((tmp_path / "archive/own").iterdir())
    }
    assert after == before
