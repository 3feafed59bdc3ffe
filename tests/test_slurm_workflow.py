"""The lesprep demo workflow on a real one-node SLURM cluster (started by ``slurm_cluster``).

Outside references: SLURM's accounting database, read with ``sacct``, must record one
job per Snakemake job, tagged with its rule, and how it ended; Snakemake's plain local
executor, run on the same project, must give the same arrays (``numpy.array_equal``);
pint's dimensionality decides that ``m s-1`` is no temperature, which is the deliberate
failure. Nothing is mocked. Outside CI the tests skip when SLURM or the executor plugin
is missing; in CI (``CI=true``) they fail instead (the policy of ``test_slurm_smoke.py``).

The module starts its own cluster (about 12 s) and stops it when the module is done.
Tests run in file order and share module fixtures: a run on SLURM, a local run of the
same project, and a second project whose ingest job is made to fail and is then resumed.

Runs target the data products (per-case stores, splits, training stores, normalization),
not ``rule all``, so report rules stay out of the job count. Every run uses a snapshot of
the workflow and of ``src/lesprep`` taken when the module starts (``PYTHONPATH`` points at
it, in the SLURM jobs too): the workflow's params hold a hash of lesprep's source, so an
edit of the checkout during the minutes the module runs would make later runs redo
every job.
"""

from __future__ import annotations

import importlib.util
import json
import os
import re
import shutil
import subprocess
import sys
import time
from collections import Counter
from collections.abc import Iterator, Sequence
from dataclasses import dataclass
from pathlib import Path

import netCDF4
import numpy as np
import pytest

from ci_policy import unavailable
from lesprep.provenance import load
from lesprep.store import open_store
from slurm_cluster import ACCOUNT, Cluster, slurm_available, start_cluster
from workflow_project import FLAVOUR, SNAKEMAKE, Project, parse_job_stats

pytestmark = pytest.mark.slurm

REPO = Path(__file__).resolve().parents[1]
CI_PROFILE = REPO / "profiles" / "slurm-ci"
# On top of the CI profile. Jobs here take 10-25 s (two Snakemake start-ups and the
# lesprep step), longer than the smoke test's 9 s. The plugin checks job states s,
# 2s + 10, 3s + 30 ... seconds after its last check that saw a job end, s being the
# value below: 6 gives 6, 22, 48. More jobs than the node's two CPUs keep a ready job
# queued in SLURM, which starts it as soon as a CPU is free, before the next check.
SLURM_FLAGS = ("--jobs", "4", "--slurm-init-seconds-before-status-checks", "6")
SLURM_RUN_TIMEOUT = 300  # s; nine jobs take about 100 s
LOCAL_RUN_TIMEOUT = 300  # s; the same project on the local executor takes about 30 s
SACCT_FIELDS = ("JobID", "JobName", "State", "ExitCode", "Account", "Comment", "Start", "End")
TERMINAL = {"COMPLETED", "FAILED", "CANCELLED", "TIMEOUT", "OUT_OF_MEMORY", "NODE_FAIL"}

TRAIN_CASE, TEST_CASE = "sc-ostra-01", "cu-marro-01"
CASES = (TRAIN_CASE, TEST_CASE)
SCALE = "600m"
COARSEN_RULE = f"coarsen_g-{SCALE}"  # the one scale group configured in tiny_project
# The file damaged in the failure test, its variable (flavour alpha's temperature) and
# the wrong units: a velocity, not a temperature.
DAMAGED_FILE, DAMAGED_VARIABLE, WRONG_UNITS = "snap_0003.nc", "tempc", "m s-1"


@pytest.fixture(scope="module")
def cluster(tmp_path_factory: pytest.TempPathFactory) -> Iterator[Cluster]:
    """A one-node SLURM cluster for this module (the executor plugin is required too)."""
    ok, why = slurm_available()
    if not ok:
        unavailable(why)
    if importlib.util.find_spec("snakemake_executor_plugin_slurm") is None:
        unavailable("snakemake-executor-plugin-slurm is not installed (pip install -e '.[slurm]')")
    with start_cluster(tmp_path_factory.mktemp("slurm-workflow")) as running:
        yield running


# --- the code under test --------------------------------------------------------------


@dataclass(frozen=True)
class Code:
    """A frozen copy of the workflow and the lesprep package, and its code hash."""

    root: Path
    version: str = ""

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
    """Snapshot the workflow and the package; check that the snapshot is what imports."""
    root = tmp_path_factory.mktemp("code")
    skip = shutil.ignore_patterns("__pycache__", "*.pyc")
    for rel in ("src/lesprep", "workflow", "config/varmaps"):
        shutil.copytree(REPO / rel, root / rel, ignore=skip)
    shutil.copy2(REPO / "Snakefile", root / "Snakefile")
    probe = subprocess.run(
        [sys.executable, "-c",
         "import lesprep.provenance as p; print(p.__file__); print(p.code_version())"],
        env=Code(root).environ(dict(os.environ)),
        capture_output=True,
        text=True,
        timeout=60,
        check=True,
    )  # fmt: skip
    where, version = probe.stdout.split()
    assert Path(where).is_relative_to(root), where  # the snapshot, not the checkout
    return Code(root, version)


# --- projects and runs ----------------------------------------------------------------


def tiny_project(root: Path, code: Code) -> Project:
    """Two demo cases at the TINY size, one scale; the splits are pinned (one per split).

    Pinning fixes the job list: ``assemble_train`` reads only TRAIN_CASE and
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


def case_stores(case: str) -> list[str]:
    return [f"results/cases/{case}/canonical.zarr", f"results/cases/{case}/scale-{SCALE}.zarr"]


def set_stores() -> list[str]:
    return [f"results/sets/train/scale-{SCALE}.zarr", f"results/sets/test/scale-{SCALE}.zarr"]


NORMALIZATION = f"results/sets/normalization-{SCALE}.json"
DATA_TARGETS = (
    *(s for c in CASES for s in case_stores(c)),
    "results/splits.tsv",
    *set_stores(),
    NORMALIZATION,
)


def expected_jobs() -> dict[str, str]:
    """Rule of every job a run for DATA_TARGETS submits, by the job's SLURM comment.

    The plugin tags a job ``--comment rule_<rule>`` and, for jobs with wildcards,
    ``rule_<rule>_wildcards_<wildcard values joined by _>``.
    """
    jobs = {
        f"rule_{rule}_wildcards_{case}": rule
        for case in CASES
        for rule in ("demo_archive", "ingest", COARSEN_RULE)
    }
    jobs["rule_assign_splits"] = "assign_splits"
    jobs[f"rule_assemble_train_wildcards_{SCALE}"] = "assemble_train"
    jobs[f"rule_assemble_heldout_wildcards_test_{SCALE}"] = "assemble_heldout"
    return jobs


def snakemake(
    code: Code,
    project: Project,
    *args: str,
    targets: Sequence[str] = DATA_TARGETS,
    env: dict[str, str],
    timeout: float,
) -> subprocess.CompletedProcess[str]:
    """Run the snapshot's Snakefile for `project` from inside the project folder.

    The working directory matters: the SLURM plugin puts ``.snakemake/slurm_logs``
    under the directory Snakemake starts in, and a ``profiles/default`` there would
    be read. Output is captured; the exit code is the caller's to check.
    """
    project.write()
    cmd = [
        SNAKEMAKE,
        *targets,
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


def run_locally(code: Code, project: Project, targets: Sequence[str] = DATA_TARGETS) -> None:
    """Run `project` on Snakemake's plain local executor with two cores; must succeed."""
    res = snakemake(
        code, project, "--cores", "2",
        targets=targets, env=dict(os.environ), timeout=LOCAL_RUN_TIMEOUT,
    )  # fmt: skip
    assert res.returncode == 0, res.stdout[-3000:] + res.stderr[-6000:]


def planned_jobs(code: Code, project: Project) -> dict[str, int]:
    """Jobs a dry run for DATA_TARGETS would execute, by rule."""
    res = snakemake(code, project, "--cores", "2", "--dry-run", env=dict(os.environ), timeout=120)
    assert res.returncode == 0, res.stdout[-3000:] + res.stderr[-6000:]
    return parse_job_stats(res.stdout + res.stderr)


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

    def jobs_by_comment(self) -> dict[str, dict[str, str]]:
        """Records by comment; a comment that occurs twice is an error."""
        assert max(self.comments().values(), default=1) == 1, self.comments()
        return {r["Comment"]: r for r in self.jobs.values()}

    def by_comment(self, comment: str) -> dict[str, str]:
        return self.jobs_by_comment()[comment]


def _accounting(cluster: Cluster) -> dict[str, dict[str, str]]:
    """Every job in the accounting database, by job id (allocations only, no steps)."""
    out = cluster.run(
        ["sacct", "-X", "-n", "-P", "-a", "-S", "2000-01-01", "-o", ",".join(SACCT_FIELDS)]
    )
    rows = [r.split("|") for r in out.stdout.splitlines() if r.strip()]
    return {r[0]: dict(zip(SACCT_FIELDS, r, strict=True)) for r in rows}


def _final_records(
    cluster: Cluster, job_ids: set[str], timeout: float = 60.0
) -> dict[str, dict[str, str]]:
    """Accounting records of `job_ids` once every one reached a final state.

    slurmdbd stores the end of a job a moment after the job ends, so poll.
    """
    deadline = time.monotonic() + timeout
    records: dict[str, dict[str, str]] = {}
    while time.monotonic() < deadline:
        records = {k: v for k, v in _accounting(cluster).items() if k in job_ids}
        final = [
            r
            for r in records.values()
            if r["State"].split()[0] in TERMINAL and r["End"] != "Unknown"
        ]
        if len(final) == len(job_ids):
            return records
        time.sleep(0.5)
    pytest.fail(f"sacct shows no final state for all of {sorted(job_ids)}: {records}")


def run_on_slurm(
    cluster: Cluster,
    code: Code,
    project: Project,
    *extra: str,
    targets: Sequence[str] = DATA_TARGETS,
) -> SlurmRun:
    """Run `project` for `targets` (default DATA_TARGETS) with the CI SLURM profile.

    The SLURM jobs of the run are the jobs accounting gained during it; they must be
    the ones Snakemake reports as submitted.
    """
    before = set(_accounting(cluster))
    start = time.monotonic()
    proc = snakemake(
        code, project, "--profile", str(CI_PROFILE), *SLURM_FLAGS, *extra,
        targets=targets, env=cluster.environ(), timeout=SLURM_RUN_TIMEOUT,
    )  # fmt: skip
    seconds = time.monotonic() - start
    output = proc.stdout + proc.stderr
    submitted = set(re.findall(r"has been submitted with SLURM jobid (\d+)", output))
    gained = set(_accounting(cluster)) - before
    assert gained == submitted, f"accounting gained {gained}, Snakemake submitted {submitted}"
    return SlurmRun(proc, _final_records(cluster, gained), seconds)


def _same_arrays(a: Path, b: Path) -> None:
    """Every variable (data and coordinates) of two stores has equal dims, dtype, values.

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
    """Per-case and training stores and normalization of `root` equal `reference`'s."""
    for rel in [*case_stores(TRAIN_CASE), *case_stores(TEST_CASE), *set_stores()]:
        _same_arrays(root / rel, reference / rel)
    assert _normalization(root / NORMALIZATION) == _normalization(reference / NORMALIZATION)


def assert_made_by(code: Code, root: Path) -> None:
    """Every step recorded in every per-case store ran the snapshot's code."""
    for rel in [*case_stores(TRAIN_CASE), *case_stores(TEST_CASE)]:
        steps = load(open_store(root / rel).attrs)["steps"]
        assert steps and {s["environment"]["code_version"] for s in steps} == {code.version}


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

    The demo archives are written locally, the rest is run on SLURM. The three jobs
    ready at the start -- both ingest jobs and ``assign_splits`` -- are submitted at
    once (``--jobs 4``). Once Snakemake sees the failure it submits nothing more and
    waits for the jobs already out; jobs made ready by one of those ending may have
    gone out before (timing decides).
    """
    project = tiny_project(tmp_path_factory.mktemp("failing"), code)
    run_locally(code, project, targets=[f"resources/demo/{c}" for c in CASES])
    damaged = project.root / "resources/demo" / TRAIN_CASE / DAMAGED_FILE
    backup = project.root / f"{DAMAGED_FILE}.orig"
    shutil.copy2(damaged, backup)
    with netCDF4.Dataset(damaged, "a") as nc:
        assert nc[DAMAGED_VARIABLE].getncattr("units") != WRONG_UNITS
        nc[DAMAGED_VARIABLE].setncattr("units", WRONG_UNITS)
    return FailedProject(project, run_on_slurm(cluster, code, project), damaged, backup)


# --- tests ----------------------------------------------------------------------------


def test_demo_runs_as_one_slurm_job_per_snakemake_job(
    code: Code, slurm_run: tuple[Project, SlurmRun]
) -> None:
    project, run = slurm_run
    assert run.proc.returncode == 0, run.output[-6000:]
    # Snakemake's own job table and SLURM's accounting agree on the number of jobs ...
    assert sum(parse_job_stats(run.output).values()) == len(run.jobs)
    # ... and accounting has one COMPLETED job per Snakemake job, tagged with its rule
    # and wildcards, under the harness's account, all of one run (the plugin names
    # every job of a run by the run's id).
    assert run.comments() == Counter(list(expected_jobs()))
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
    # The stores were written by the jobs, with the snapshot's code, and Snakemake's
    # record of the run is complete: nothing is left to do.
    assert_made_by(code, project.root)
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
    # The three jobs ready at the start went out together (--jobs 4). Once Snakemake
    # saw the failure it submitted nothing more; it waited for the jobs out already,
    # and they completed. Jobs that do not need the failed one may have been submitted
    # before the failure was seen (which depends on timing), those needing it never.
    others = {c: r for c, r in run.jobs_by_comment().items() if c != doomed["Comment"]}
    assert {f"rule_ingest_wildcards_{TEST_CASE}", "rule_assign_splits"} <= set(others)
    independent = {
        f"rule_ingest_wildcards_{TEST_CASE}",
        f"rule_{COARSEN_RULE}_wildcards_{TEST_CASE}",
        "rule_assign_splits",
        f"rule_assemble_heldout_wildcards_test_{SCALE}",
    }
    assert set(others) <= independent, sorted(others)
    assert sum(run.comments().values()) == len(others) + 1  # each job once
    assert all(r["State"] == "COMPLETED" for r in others.values()), others
    # SLURM's verdict reaches the user through Snakemake's output, with the rule's log ...
    job_id = doomed["JobID"]
    assert f"SLURM-job '{job_id}' failed, SLURM status is: 'FAILED'" in run.output
    assert f"logs/ingest/{TRAIN_CASE}.log" in run.output
    # ... where lesprep's one-line error names case, file, variable and the units found;
    # the job's SLURM log holds it too (the step's stderr).
    message = (
        f"case '{TRAIN_CASE}', file resources/demo/{TRAIN_CASE}/{DAMAGED_FILE}, "
        f"variable '{DAMAGED_VARIABLE}': has units '{WRONG_UNITS}'"
    )
    rule_log = (root / "logs/ingest" / f"{TRAIN_CASE}.log").read_text()
    assert message in rule_log, rule_log
    slurm_log = root / ".snakemake/slurm_logs/rule_ingest" / TRAIN_CASE / f"{job_id}.log"
    assert f"lesprep ingest failed: {message}" in slurm_log.read_text()
    # The failed job left no canonical store behind; the other case's is there.
    assert not (root / case_stores(TRAIN_CASE)[0]).exists()
    assert (root / case_stores(TEST_CASE)[0]).is_dir()


def test_rerun_after_fix_submits_only_the_missing_jobs(
    cluster: Cluster, code: Code, failed: FailedProject, local_run: Project
) -> None:
    project = failed.project
    shutil.copy2(failed.backup, failed.damaged)  # the fix: the original file again
    # Missing: every job of the workflow but the demo jobs (run locally before) and the
    # jobs that completed in the failed run; the failed job is among them.
    completed = {c for c, r in failed.run.jobs_by_comment().items() if r["State"] == "COMPLETED"}
    missing = {
        c: rule
        for c, rule in expected_jobs().items()
        if rule != "demo_archive" and c not in completed
    }
    for comment in (
        f"rule_ingest_wildcards_{TRAIN_CASE}",
        f"rule_assemble_train_wildcards_{SCALE}",
    ):
        assert comment in missing
    # Snakemake plans (dry run) and SLURM then runs exactly those: no job that completed
    # in the failed run is submitted again.
    assert planned_jobs(code, project) == dict(Counter(missing.values()))
    rerun = run_on_slurm(cluster, code, project)
    assert rerun.proc.returncode == 0, rerun.output[-6000:]
    assert rerun.comments() == Counter(list(missing))
    assert all(r["State"] == "COMPLETED" for r in rerun.jobs.values())
    # The resumed project holds the same arrays as the uninterrupted local run.
    assert_same_results(project.root, local_run.root)
    assert planned_jobs(code, project) == {}


# --- time segments on the cluster -----------------------------------------------------

SEGMENT_CASE = "seg-01"
SEGMENT_TARGETS = (
    f"results/cases/{SEGMENT_CASE}/canonical.zarr",
    f"results/cases/{SEGMENT_CASE}/scale-{SCALE}.zarr",
)


def segmented_project(root: Path, code: Code, files: int) -> tuple[Project, list[Path]]:
    """A case with a raw archive of a running simulation: 6 output times of 30 min
    (kept: 4 after the 1 h spin-up) written by the demo writer, of which the first
    `files` are in the case's folder; one kept time per segment."""
    from lesprep.demo import demo_case, write_demo_case
    from workflow_project import TINY

    spec = demo_case(TRAIN_CASE).with_size(**{**TINY, "ntimes": 6})
    made = write_demo_case(spec, root / "generated")
    p = Project(root)
    p.add_case(SEGMENT_CASE, f"archive/{SEGMENT_CASE}/*.nc", "alpha", "stratocumulus")
    p.rows[0]["varmap"] = str(code.varmap(TRAIN_CASE))
    p.config["coarsen"] = {"scales": ["600 m"], "groups": [["600 m"]]}
    p.config["segments"] = {"times": 1, "settle_s": 0}
    src = sorted(Path(made).glob("*.nc"))
    (root / "archive" / SEGMENT_CASE).mkdir(parents=True)
    for f in src[:files]:
        shutil.copy2(f, root / "archive" / SEGMENT_CASE / f.name)
    return p, src


def segment_comments(rule: str, names: Sequence[str]) -> list[str]:
    return [f"rule_{rule}_wildcards_{SEGMENT_CASE}_{n}" for n in names]


def one_job_stores(project: Project, code: Code, out: Path) -> dict[str, Path]:
    """The case ingested and coarsened by one local job each, in this process, from the
    project's archive and settings (the reference the segmented run must equal)."""
    from lesprep.canonical.ingest import ingest_case
    from lesprep.jobs.settings import WorkflowSettings
    from lesprep.scales.coarsen import coarsen_case

    project.write()
    ws = WorkflowSettings.load(project.root / "config/config.yaml")
    files = sorted(str(f) for f in (project.root / "archive" / SEGMENT_CASE).glob("*.nc"))
    canon = ingest_case(
        case=SEGMENT_CASE,
        raw=files,
        varmap=code.varmap(TRAIN_CASE),
        settings=ws.ingest,
        out=out / "canonical.zarr",
    )
    co = ws.coarsen.for_group(f"g-{SCALE}")
    scale = out / f"scale-{SCALE}.zarr"
    coarsen_case(canon, {SCALE: scale}, co)
    return {SEGMENT_TARGETS[0]: canon, SEGMENT_TARGETS[1]: scale}


def test_segments_run_as_slurm_jobs_and_new_files_submit_only_theirs(
    cluster: Cluster, code: Code, tmp_path_factory: pytest.TempPathFactory
) -> None:
    """Five of six output files: three kept times, three segment jobs per stage (sacct);
    the sixth file then submits one ingest and one coarsening job and the two gathers;
    the arrays equal one local job over the whole archive; a file rewritten in place plans
    its own segment only."""
    project, src = segmented_project(tmp_path_factory.mktemp("segments"), code, files=5)
    first = run_on_slurm(cluster, code, project, targets=SEGMENT_TARGETS)
    assert first.proc.returncode == 0, first.output[-6000:]
    names = [f"t{i:04d}-{i:04d}" for i in range(3)]
    gathers = [
        f"rule_gather_canonical_wildcards_{SEGMENT_CASE}",
        f"rule_gather_g-{SCALE}_wildcards_{SEGMENT_CASE}",
    ]
    assert first.comments() == Counter(
        [
            *segment_comments("ingest_segment", names),
            *segment_comments(f"coarsen_segment_g-{SCALE}", names),
            *gathers,
        ]
    )
    assert all(r["State"] == "COMPLETED" for r in first.jobs.values())
    # the gather started after every segment job of its stage had ended
    for c in segment_comments("ingest_segment", names):
        assert first.by_comment(gathers[0])["Start"] >= first.by_comment(c)["End"]
    # a new output file of the running simulation: only its segment runs, then the gathers
    shutil.copy2(src[5], project.root / "archive" / SEGMENT_CASE / src[5].name)
    second = run_on_slurm(cluster, code, project, targets=SEGMENT_TARGETS)
    assert second.proc.returncode == 0, second.output[-6000:]
    new = ["t0003-0003"]
    assert second.comments() == Counter(
        [
            *segment_comments("ingest_segment", new),
            *segment_comments(f"coarsen_segment_g-{SCALE}", new),
            *gathers,
        ]
    )
    # the same arrays as one local job each over the whole archive
    reference = one_job_stores(project, code, tmp_path_factory.mktemp("one-job"))
    for rel, path in reference.items():
        _same_arrays(project.root / rel, path)
    # a file rewritten in place (the third kept time's) plans its own segment only
    with netCDF4.Dataset(project.root / "archive" / SEGMENT_CASE / src[4].name, "a") as nc:
        nc["vap"][0, 0, 0, 0] = nc["vap"][0, 0, 0, 0] * 1.01
    res = snakemake(
        code, project, "--cores", "2", "--dry-run",
        targets=SEGMENT_TARGETS, env=dict(os.environ), timeout=120,
    )  # fmt: skip
    assert res.returncode == 0, res.stdout[-3000:] + res.stderr[-3000:]
    planned = parse_job_stats(res.stdout + res.stderr)
    assert planned == {
        "ingest_segment": 1,
        f"coarsen_segment_g-{SCALE}": 1,
        "gather_canonical": 1,
        f"gather_g-{SCALE}": 1,
    }
    assert "t0002-0002" in res.stdout + res.stderr
