"""The lesprep demo workflow on a real one-node SLURM cluster (started by ``slurm_cluster``).

Outside references: SLURM's accounting database, read with ``sacct``, must record one
job per Snakemake job with the rule in its comment and the final state; a run with the
plain local executor of the same project must give the same arrays (``numpy.array_equal``);
pint's dimensionality decides that ``m s-1`` is no temperature, which is the deliberate
failure. Nothing is mocked. Outside CI the tests skip when SLURM or the executor plugin
is missing; in CI (``CI=true``) they fail instead (the policy of ``test_slurm_smoke.py``).

The module starts its own cluster (about 12 s) and stops it when the module is done.
Tests run in file order and share module fixtures: the SLURM run, the local run and a
project whose ingest job is made to fail and is then resumed.

Every run uses a snapshot of the workflow and of ``src/lesprep`` taken when the module
starts (``PYTHONPATH`` points at it, in the SLURM jobs too). The workflow's params hold a
hash of lesprep's source, so an edit of the checkout during the few minutes the module
runs would otherwise make the later runs redo every job.
"""

from __future__ import annotations

import importlib.util
import json
import os
import re
import shutil
import subprocess
import time
from collections import Counter
from collections.abc import Iterator
from dataclasses import dataclass
from pathlib import Path

import netCDF4
import numpy as np
import pytest

from lesprep.store import open_store
from slurm_cluster import ACCOUNT, Cluster, slurm_available, start_cluster
from workflow_project import FLAVOUR, SNAKEMAKE, Project, parse_job_stats

pytestmark = pytest.mark.slurm

REPO = Path(__file__).resolve().parents[1]
CI_PROFILE = REPO / "profiles" / "slurm-ci"
SLURM_RUN_TIMEOUT = 300  # s; nine tiny jobs, two at a time, take about 90 s
LOCAL_RUN_TIMEOUT = 300  # s; the same project on the local executor takes about 40 s
SACCT_FIELDS = ("JobID", "JobName", "State", "ExitCode", "Account", "Comment", "Start", "End")
TERMINAL = {"COMPLETED", "FAILED", "CANCELLED", "TIMEOUT", "OUT_OF_MEMORY", "NODE_FAIL"}

TRAIN_CASE, TEST_CASE = "sc-ostra-01", "cu-marro-01"
CASES = (TRAIN_CASE, TEST_CASE)
SCALE = "600m"
COARSEN_RULE = f"coarsen_g-{SCALE}"  # the one scale group configured in tiny_project
# The file damaged in the failure test, its variable (flavour alpha's temperature) and
# the wrong units: a velocity, not a temperature (dimensionality as pint sees it).
DAMAGED_FILE, DAMAGED_VARIABLE, WRONG_UNITS = "snap_0003.nc", "tempc", "m s-1"


def _unavailable(reason: str) -> None:
    """Skip outside CI; fail in CI, where SLURM must be there."""
    if os.environ.get("CI") == "true":
        pytest.fail(f"SLURM tests cannot run in CI: {reason}", pytrace=False)
    pytest.skip(reason)


@pytest.fixture(scope="module")
def cluster(tmp_path_factory: pytest.TempPathFactory) -> Iterator[Cluster]:
    """A one-node SLURM cluster for this module (the executor plugin is required too)."""
    ok, why = slurm_available()
    if not ok:
        _unavailable(why)
    if importlib.util.find_spec("snakemake_executor_plugin_slurm") is None:
        _unavailable("snakemake-executor-plugin-slurm is not installed (pip install -e '.[slurm]')")
    with start_cluster(tmp_path_factory.mktemp("slurm-workflow")) as running:
        yield running


# --- the code under test, projects and runs ------------------------------------------


@dataclass(frozen=True)
class Code:
    """A frozen copy of the workflow and the lesprep package."""

    root: Path

    @property
    def snakefile(self) -> Path:
        return self.root / "Snakefile"

    def varmap(self, case: str) -> Path:
        return self.root / "config/varmaps" / f"flavour-{FLAVOUR[case]}.yaml"

    def environ(self, base: dict[str, str]) -> dict[str, str]:
        """`base` with the snapshot's package first on ``PYTHONPATH``."""
        path = os.pathsep.join(p for p in (str(self.root / "src"), base.get("PYTHONPATH")) if p)
        return {**base, "PYTHONPATH": path, "PYTHONWARNINGS": "ignore"}


@pytest.fixture(scope="module")
def code(tmp_path_factory: pytest.TempPathFactory) -> Code:
    root = tmp_path_factory.mktemp("code")
    skip = shutil.ignore_patterns("__pycache__", "*.pyc")
    for rel in ("src/lesprep", "workflow", "config/varmaps"):
        shutil.copytree(REPO / rel, root / rel, ignore=skip)
    shutil.copy2(REPO / "Snakefile", root / "Snakefile")
    return Code(root)


def snakemake(
    code: Code, project: Project, *args: str, env: dict[str, str], timeout: float
) -> subprocess.CompletedProcess[str]:
    """Run the snapshot's Snakefile for `project`, from inside the project folder.

    The working directory matters: the SLURM plugin puts ``.snakemake/slurm_logs``
    under the directory Snakemake starts in, and a ``profiles/default`` there would
    be read. Output is captured; the exit code is the caller's to check.
    """
    project.write()
    cmd = [
        SNAKEMAKE,
        "-s", str(code.snakefile),
        "--directory", str(project.root),
        "--configfile", str(project.root / "config/config.yaml"),
        *args,
    ]  # fmt: skip
    return subprocess.run(
        cmd,
        cwd=project.root,
        env=code.environ(env),
        stdin=subprocess.DEVNULL,
        capture_output=True,
        text=True,
        timeout=timeout,
        check=False,
    )


def run_locally(code: Code, project: Project, *args: str) -> None:
    """Run `project` on Snakemake's plain local executor with two cores; must succeed."""
    res = snakemake(
        code, project, "--cores", "2", *args, env=dict(os.environ), timeout=LOCAL_RUN_TIMEOUT
    )
    assert res.returncode == 0, res.stdout[-3000:] + res.stderr[-6000:]


def planned_jobs(code: Code, project: Project) -> dict[str, int]:
    """Jobs a dry run would execute, by rule."""
    res = snakemake(code, project, "--cores", "2", "--dry-run", env=dict(os.environ), timeout=120)
    assert res.returncode == 0, res.stdout[-3000:] + res.stderr[-6000:]
    return parse_job_stats(res.stdout + res.stderr)


def tiny_project(root: Path, code: Code) -> Project:
    """Two demo cases at the TINY size, one scale; the splits are pinned (one per split).

    Pinning makes the job list fixed: ``assemble_train`` reads only TRAIN_CASE and
    ``assemble_heldout`` (split ``test``) only TEST_CASE.
    """
    p = Project(root)
    p.add_demo_case(TRAIN_CASE, split="train")
    p.add_demo_case(TEST_CASE, split="test")
    for row in p.rows:
        row["varmap"] = str(code.varmap(row["case"]))
    p.config["coarsen"] = {
        "scales": ["600 m"],
        "groups": [["600 m"]],
        "patches": {"variables": ["qc", "w"], "scales": ["600 m"], "size": 6},
    }
    return p


def expected_comments(cases: tuple[str, ...] = CASES) -> Counter[str]:
    """The plugin's ``--comment`` of every job a full run of ``tiny_project`` submits.

    The plugin writes ``rule_<rule>`` and, for jobs with wildcards,
    ``rule_<rule>_wildcards_<values joined by _>``.
    """
    per_case = ("demo_archive", "ingest", COARSEN_RULE)
    comments = [f"rule_{rule}_wildcards_{case}" for case in cases for rule in per_case]
    comments += [
        "rule_assign_splits",
        f"rule_assemble_train_wildcards_{SCALE}",
        f"rule_assemble_heldout_wildcards_test_{SCALE}",
    ]
    return Counter(comments)


@dataclass
class SlurmRun:
    """One Snakemake run on the cluster and the SLURM jobs it submitted."""

    proc: subprocess.CompletedProcess[str]
    jobs: dict[str, dict[str, str]]  # SLURM job id -> final sacct record
    seconds: float

    @property
    def output(self) -> str:
        return self.proc.stdout + self.proc.stderr

    def comments(self) -> Counter[str]:
        return Counter(r["Comment"] for r in self.jobs.values())

    def by_comment(self, comment: str) -> dict[str, str]:
        (record,) = [r for r in self.jobs.values() if r["Comment"] == comment]
        return record


def _accounting(cluster: Cluster) -> dict[str, dict[str, str]]:
    """Every job in the accounting database (one row per job, no steps)."""
    out = cluster.run(
        ["sacct", "-X", "-n", "-P", "-a", "-S", "2000-01-01", "-o", ",".join(SACCT_FIELDS)]
    )
    rows = [r.split("|") for r in out.stdout.splitlines() if r.strip()]
    return {r[0]: dict(zip(SACCT_FIELDS, r, strict=True)) for r in rows}


def _final_records(
    cluster: Cluster, job_ids: set[str], timeout: float = 60.0
) -> dict[str, dict[str, str]]:
    """Accounting records of `job_ids` once all reached a final state.

    slurmdbd stores the end of a job a moment after the job ends, so poll.
    """
    deadline = time.monotonic() + timeout
    records: dict[str, dict[str, str]] = {}
    while time.monotonic() < deadline:
        records = {k: v for k, v in _accounting(cluster).items() if k in job_ids}
        done = [
            r
            for r in records.values()
            if r["State"].split()[0] in TERMINAL and r["End"] != "Unknown"
        ]
        if len(done) == len(job_ids):
            return records
        time.sleep(0.5)
    pytest.fail(f"sacct shows no final state for all of {sorted(job_ids)}: {records}")


def run_on_slurm(cluster: Cluster, code: Code, project: Project, *extra: str) -> SlurmRun:
    """Run `project` with the CI SLURM profile.

    The SLURM jobs of the run are the jobs accounting gained during it; they must be
    the ones Snakemake reports as submitted.
    """
    before = set(_accounting(cluster))
    start = time.monotonic()
    proc = snakemake(
        code,
        project,
        "--profile",
        str(CI_PROFILE),
        *extra,
        env=cluster.environ(),
        timeout=SLURM_RUN_TIMEOUT,
    )
    seconds = time.monotonic() - start
    output = proc.stdout + proc.stderr
    submitted = set(re.findall(r"has been submitted with SLURM jobid (\d+)", output))
    new = set(_accounting(cluster)) - before
    assert new == submitted, f"accounting gained {new}, Snakemake submitted {submitted}"
    return SlurmRun(proc, _final_records(cluster, new), seconds)


def _same_arrays(a: Path, b: Path) -> None:
    """Every variable (data and coordinates) of two stores has equal dims and values.

    Attributes are not compared: provenance holds timestamps and paths.
    """
    da, db = open_store(a), open_store(b)
    assert da.data_vars, f"{a} holds no data variables"
    assert sorted(da.variables) == sorted(db.variables), (a, b)
    for name in da.variables:
        x, y = da[name], db[name]
        assert x.dims == y.dims, (a, name)
        xv, yv = x.values, y.values
        assert xv.dtype == yv.dtype, (a, name)
        assert np.array_equal(xv, yv, equal_nan=xv.dtype.kind in "fc"), f"{a}: {name} differs"


def _normalization(path: Path) -> dict[str, object]:
    doc = json.loads(path.read_text())
    doc.pop("created", None)  # a timestamp
    return doc


def assert_same_results(root: Path, reference: Path) -> None:
    """Canonical, scale and training stores and normalization of `root` equal `reference`."""
    stores = [
        f"cases/{c}/{name}" for c in CASES for name in ("canonical.zarr", f"scale-{SCALE}.zarr")
    ]
    stores += [f"sets/train/scale-{SCALE}.zarr", f"sets/test/scale-{SCALE}.zarr"]
    for rel in stores:
        _same_arrays(root / "results" / rel, reference / "results" / rel)
    norm = f"results/sets/normalization-{SCALE}.json"
    assert _normalization(root / norm) == _normalization(reference / norm)


@pytest.fixture(scope="module")
def slurm_run(
    cluster: Cluster, code: Code, tmp_path_factory: pytest.TempPathFactory
) -> tuple[Project, SlurmRun]:
    project = tiny_project(tmp_path_factory.mktemp("on-slurm"), code)
    return project, run_on_slurm(cluster, code, project)


@pytest.fixture(scope="module")
def local_run(code: Code, tmp_path_factory: pytest.TempPathFactory) -> Project:
    """The same project on Snakemake's plain local executor (no SLURM involved)."""
    project = tiny_project(tmp_path_factory.mktemp("local"), code)
    run_locally(code, project)
    return project


@dataclass
class FailedProject:
    project: Project
    run: SlurmRun
    damaged: Path
    backup: Path


@pytest.fixture(scope="module")
def failed(cluster: Cluster, code: Code, tmp_path_factory: pytest.TempPathFactory) -> FailedProject:
    """A project whose TRAIN_CASE archive gets wrong units after the demo step.

    The demo archives are written locally; the rest runs on SLURM with ``--keep-going``,
    so everything not downstream of the failing ingest job finishes.
    """
    project = tiny_project(tmp_path_factory.mktemp("failing"), code)
    run_locally(code, project, "--until", "demo_archive")
    damaged = project.root / "resources/demo" / TRAIN_CASE / DAMAGED_FILE
    backup = project.root / f"{DAMAGED_FILE}.orig"
    shutil.copy2(damaged, backup)
    with netCDF4.Dataset(damaged, "a") as nc:
        assert nc[DAMAGED_VARIABLE].getncattr("units") != WRONG_UNITS
        nc[DAMAGED_VARIABLE].setncattr("units", WRONG_UNITS)
    run = run_on_slurm(cluster, code, project, "--keep-going")
    return FailedProject(project, run, damaged, backup)


# --- tests ----------------------------------------------------------------------------


def test_demo_runs_as_one_slurm_job_per_snakemake_job(
    code: Code, slurm_run: tuple[Project, SlurmRun]
) -> None:
    project, run = slurm_run
    assert run.proc.returncode == 0, run.output[-6000:]
    # Snakemake's own job table (rule `all` has no action and is not submitted) ...
    stats = parse_job_stats(run.output)
    assert stats.pop("all") == 1
    assert sum(stats.values()) == len(run.jobs)
    # ... and SLURM's accounting: one COMPLETED job per Snakemake job, each tagged
    # with its rule and wildcards, under the harness's account, all of one run
    # (the plugin names every job of a run by the run's id).
    assert run.comments() == expected_comments()
    for record in run.jobs.values():
        assert record["State"] == "COMPLETED", record
        assert record["ExitCode"] == "0:0", record
        assert record["Account"] == ACCOUNT, record
    assert len({r["JobName"] for r in run.jobs.values()}) == 1
    # SLURM started a case's ingest job only after its demo job had ended.
    for case in CASES:
        demo = run.by_comment(f"rule_demo_archive_wildcards_{case}")
        ingest = run.by_comment(f"rule_ingest_wildcards_{case}")
        assert ingest["Start"] >= demo["End"]  # ISO 8601 timestamps sort as text
    for case in CASES:
        assert (project.root / "results/cases" / case / f"scale-{SCALE}.zarr").is_dir()
    # Snakemake's record agrees: nothing is left to do.
    assert planned_jobs(code, project) == {}


def test_slurm_outputs_equal_local_run(
    slurm_run: tuple[Project, SlurmRun], local_run: Project
) -> None:
    project, run = slurm_run
    assert run.proc.returncode == 0, run.output[-6000:]
    assert_same_results(project.root, local_run.root)


def test_failing_job_fails_the_run_with_slurm_reason(failed: FailedProject) -> None:
    run, root = failed.run, failed.project.root
    assert run.proc.returncode != 0, run.output[-6000:]
    doomed = run.by_comment(f"rule_ingest_wildcards_{TRAIN_CASE}")
    assert doomed["State"] == "FAILED", doomed
    assert doomed["ExitCode"] != "0:0", doomed
    # With --keep-going everything that does not need the failed job ran and completed.
    others = {
        f"rule_ingest_wildcards_{TEST_CASE}",
        f"rule_{COARSEN_RULE}_wildcards_{TEST_CASE}",
        "rule_assign_splits",
        f"rule_assemble_heldout_wildcards_test_{SCALE}",
    }
    assert set(run.comments()) == others | {doomed["Comment"]}
    assert sum(run.comments().values()) == len(others) + 1
    for comment in others:
        assert run.by_comment(comment)["State"] == "COMPLETED"
    # SLURM's verdict reaches the user through Snakemake's output ...
    job_id = doomed["JobID"]
    assert f"SLURM-job '{job_id}' failed, SLURM status is: 'FAILED'" in run.output
    # ... and lesprep's one-line error is in the rule's log and in the job's SLURM log.
    message = (
        f"case '{TRAIN_CASE}', file resources/demo/{TRAIN_CASE}/{DAMAGED_FILE}, "
        f"variable '{DAMAGED_VARIABLE}': has units '{WRONG_UNITS}'"
    )
    rule_log = (root / "logs/ingest" / f"{TRAIN_CASE}.log").read_text()
    assert message in rule_log, rule_log
    slurm_log = root / ".snakemake/slurm_logs/rule_ingest" / TRAIN_CASE / f"{job_id}.log"
    assert f"lesprep ingest failed: {message}" in slurm_log.read_text()
    assert f"logs/ingest/{TRAIN_CASE}.log" in run.output
    # The failed job left no canonical store behind; the other case's is complete.
    assert not (root / "results/cases" / TRAIN_CASE / "canonical.zarr").exists()
    assert (root / "results/cases" / TEST_CASE / f"scale-{SCALE}.zarr").is_dir()


def test_rerun_after_fix_submits_only_the_missing_jobs(
    cluster: Cluster, code: Code, failed: FailedProject, local_run: Project
) -> None:
    project = failed.project
    shutil.copy2(failed.backup, failed.damaged)  # the fix: the original file again
    missing = {
        f"rule_ingest_wildcards_{TRAIN_CASE}",
        f"rule_{COARSEN_RULE}_wildcards_{TRAIN_CASE}",
        f"rule_assemble_train_wildcards_{SCALE}",
    }
    # What Snakemake plans (dry run) and what SLURM then runs are the missing jobs only;
    # the jobs that completed in the failed run are not submitted again.
    planned = planned_jobs(code, project)
    assert planned == {"ingest": 1, COARSEN_RULE: 1, "assemble_train": 1, "all": 1}
    rerun = run_on_slurm(cluster, code, project)
    assert rerun.proc.returncode == 0, rerun.output[-6000:]
    assert rerun.comments() == Counter(missing)
    assert all(r["State"] == "COMPLETED" for r in rerun.jobs.values())
    # Over both runs every job of the workflow ran on SLURM once, except the demo jobs
    # (run locally) and the one that failed and was run again.
    both = failed.run.comments() + rerun.comments()
    demo = Counter(f"rule_demo_archive_wildcards_{c}" for c in CASES)
    assert both == expected_comments() - demo + Counter({f"rule_ingest_wildcards_{TRAIN_CASE}": 1})
    # The resumed project holds the same arrays as the uninterrupted local run.
    assert_same_results(project.root, local_run.root)
