"""Run jobs on a real one-node SLURM cluster (started by ``slurm_cluster``).

The outside reference here is SLURM itself: its accounting database, read with
``sacct``, must record what ran, under which account and partition, and how it ended.
Nothing is mocked. Outside CI the tests skip when SLURM is not installed; in CI
(``CI=true``) a missing SLURM or executor plugin fails them instead.
"""

from __future__ import annotations

import importlib.util
import re
import socket
import subprocess
import sys
import time
from collections.abc import Iterator
from pathlib import Path

import pytest

from ci_policy import unavailable
from slurm_cluster import ACCOUNT, PARTITION, Cluster, slurm_available, start_cluster

pytestmark = pytest.mark.slurm

REPO = Path(__file__).resolve().parents[1]
CI_PROFILE = REPO / "profiles" / "slurm-ci"
USER_PROFILE = REPO / "profiles" / "slurm"
SNAKEMAKE_TIMEOUT = 240  # s; two tiny jobs take about 30 s
# Partition is left out on purpose: SLURM 22.05 accounting leaves it empty for some
# jobs (a race between submission and the start record); scontrol is asked instead.
SACCT_FIELDS = ("JobID", "JobName", "State", "ExitCode", "Account", "Comment", "Start", "End")
TERMINAL = {"COMPLETED", "FAILED", "CANCELLED", "TIMEOUT", "OUT_OF_MEMORY", "NODE_FAIL"}


@pytest.fixture(scope="session")
def slurm_cluster(tmp_path_factory: pytest.TempPathFactory) -> Iterator[Cluster]:
    """Start a one-node SLURM cluster for the session and stop it afterwards."""
    ok, why = slurm_available()
    if not ok:
        unavailable(why)
    with start_cluster(tmp_path_factory.mktemp("slurm")) as cluster:
        yield cluster


@pytest.fixture(scope="session")
def slurm_plugin() -> None:
    """Require the Snakemake SLURM executor plugin."""
    if importlib.util.find_spec("snakemake_executor_plugin_slurm") is None:
        unavailable(
            "snakemake-executor-plugin-slurm is not installed "
            "(pip install snakemake-executor-plugin-slurm==2.8.0)"
        )


def _sacct(cluster: Cluster, job_id: str, timeout: float = 30.0) -> dict[str, str]:
    """Return the accounting record of `job_id` once it reached a final state.

    slurmdbd stores the end of a job a moment after the job ends, so poll.
    """
    deadline = time.monotonic() + timeout
    record: dict[str, str] = {}
    while time.monotonic() < deadline:
        out = cluster.run(
            ["sacct", "-X", "-n", "-P", "-j", job_id, "-o", ",".join(SACCT_FIELDS)], check=False
        )
        rows = [r.split("|") for r in out.stdout.splitlines() if r.strip()]
        if rows:
            record = dict(zip(SACCT_FIELDS, rows[0], strict=True))
            if record["State"].split()[0] in TERMINAL and record["End"] != "Unknown":
                return record
        time.sleep(0.5)
    pytest.fail(f"sacct shows no final state for job {job_id} after {timeout} s: {record}")


def _partition(cluster: Cluster, job_id: str) -> str:
    """Return the partition slurmctld ran `job_id` in (it keeps jobs for MinJobAge)."""
    out = cluster.run(["scontrol", "show", "job", job_id]).stdout
    found = re.search(r"\bPartition=(\S+)", out)
    assert found, out
    return found.group(1)


def _snakemake(cluster: Cluster, workdir: Path, *extra: str) -> subprocess.CompletedProcess[str]:
    """Run Snakemake with the CI SLURM profile in `workdir`, output captured."""
    return subprocess.run(
        [sys.executable, "-m", "snakemake", "--profile", str(CI_PROFILE), *extra],
        cwd=workdir,
        env=cluster.environ(),
        stdin=subprocess.DEVNULL,
        capture_output=True,
        text=True,
        timeout=SNAKEMAKE_TIMEOUT,
        check=False,
    )


CHAIN_SNAKEFILE = """\
localrules: all

rule all:
    input: "second.txt"

rule first:
    output: "first.txt"
    shell: "echo $SLURM_JOB_ID > {output}"

rule second:
    input: "first.txt"
    output: "second.txt"
    shell: "cat {input} > {output} && echo $SLURM_JOB_ID >> {output}"
"""

FAILING_SNAKEFILE = """\
localrules: all

rule all:
    input: "never.txt"

rule doomed:
    output: "never.txt"
    shell: "echo $SLURM_JOB_ID > doomed_jobid.txt; echo deliberate failure >&2; exit 3"
"""


def test_sbatch_wrap_completes_in_accounting(slurm_cluster: Cluster, tmp_path: Path) -> None:
    out = slurm_cluster.run(
        ["sbatch", "--parsable", f"--chdir={tmp_path}", "--output=smoke-%j.out",
         "--wrap", "hostname"]
    )  # fmt: skip
    job_id = out.stdout.strip().split(";")[0]
    assert job_id.isdigit(), out.stdout
    record = _sacct(slurm_cluster, job_id)
    assert record["State"] == "COMPLETED"
    assert record["ExitCode"] == "0:0"
    # With neither given, SLURM picks the user's default account and the default partition.
    assert record["Account"] == ACCOUNT
    assert _partition(slurm_cluster, job_id) == PARTITION
    # The job ran on this machine (the node is 127.0.0.1): reference is the OS hostname.
    assert (tmp_path / f"smoke-{job_id}.out").read_text().strip() == socket.gethostname()


def test_unknown_account_is_refused(slurm_cluster: Cluster) -> None:
    # AccountingStorageEnforce=associations: slurmctld checks jobs against slurmdbd.
    out = slurm_cluster.run(["sbatch", "--account=no_such_account", "--wrap", "true"], check=False)
    assert out.returncode != 0
    assert "Invalid account" in out.stderr


def test_snakemake_chain_runs_as_slurm_jobs(
    slurm_cluster: Cluster, slurm_plugin: None, tmp_path: Path
) -> None:
    (tmp_path / "Snakefile").write_text(CHAIN_SNAKEFILE)
    run = _snakemake(slurm_cluster, tmp_path)
    assert run.returncode == 0, run.stdout + run.stderr
    first_id, second_id = (tmp_path / "second.txt").read_text().split()
    assert first_id.isdigit() and second_id.isdigit() and first_id != second_id
    first, second = _sacct(slurm_cluster, first_id), _sacct(slurm_cluster, second_id)
    for record, rule in ((first, "first"), (second, "second")):
        assert record["State"] == "COMPLETED", record
        assert record["Account"] == ACCOUNT
        assert _partition(slurm_cluster, record["JobID"]) == PARTITION
        assert record["Comment"] == f"rule_{rule}"  # the plugin's tag for the rule
    # The dependency held: SLURM started the second job only after the first ended.
    assert second["Start"] >= first["End"]  # ISO 8601 timestamps sort as text


def test_snakemake_reports_slurm_failure(
    slurm_cluster: Cluster, slurm_plugin: None, tmp_path: Path
) -> None:
    (tmp_path / "Snakefile").write_text(FAILING_SNAKEFILE)
    run = _snakemake(slurm_cluster, tmp_path, "--retries", "0")
    output = run.stdout + run.stderr
    assert run.returncode != 0, output
    job_id = (tmp_path / "doomed_jobid.txt").read_text().strip()
    record = _sacct(slurm_cluster, job_id)
    assert record["State"] == "FAILED", record
    assert record["ExitCode"] != "0:0"
    assert record["Comment"] == "rule_doomed"
    # SLURM's verdict reaches the user through Snakemake's output ...
    assert re.search(rf"SLURM-job '{job_id}' failed, SLURM status is: 'FAILED'", output), output
    # ... with the job's SLURM log, kept for failed jobs, holding the job's own stderr.
    logs = re.findall(rf"\S+/slurm_logs/rule_doomed/{job_id}\.log", output)
    assert logs, output
    assert "deliberate failure" in Path(logs[0]).read_text()
    assert not (tmp_path / "never.txt").exists()


def test_user_profile_parses(slurm_plugin: None, tmp_path: Path) -> None:
    # A dry run reads every key of the profile; an unknown option makes Snakemake exit 1.
    (tmp_path / "Snakefile").write_text(CHAIN_SNAKEFILE)
    run = subprocess.run(
        [sys.executable, "-m", "snakemake", "--profile", str(USER_PROFILE), "--dry-run"],
        cwd=tmp_path,
        stdin=subprocess.DEVNULL,
        capture_output=True,
        text=True,
        timeout=120,
        check=False,
    )
    assert run.returncode == 0, run.stdout + run.stderr
    assert "first" in run.stdout and "second" in run.stdout
