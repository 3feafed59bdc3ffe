"""Start and stop a real single-node SLURM cluster with accounting, for tests.

The harness runs the daemons a real cluster runs -- ``munged``, ``mariadbd``,
``slurmdbd``, ``slurmctld`` and ``slurmd`` -- from the Debian packages, with every
configuration, state, log and pid file inside one work directory. Clients find the
cluster through ``SLURM_CONF`` (see :attr:`Cluster.env`). Outside the work directory
the harness only touches what SLURM and munge insist on: a symlink
``/etc/slurm/slurm.conf`` to the work directory's config while the cluster runs (srun
inside a Snakemake job gets no ``SLURM_CONF``), munge's default socket directory
``/run/munge`` and, if absent, the munge key. Every daemon runs as a foreground child
and is stopped by the pid in its own pid file (never by process name), on
:meth:`Cluster.stop`, on leaving the ``with`` block, on a failed start and at
interpreter exit (not on SIGKILL of the Python process).

The module has no pytest dependency, so it can also be used by hand::

    from pathlib import Path
    from slurm_cluster import start_cluster

    with start_cluster(Path("/tmp/slurm-demo")) as cluster:
        print(cluster.run(["sinfo"]).stdout)

Needs root (``slurmd`` launches jobs as their owner; ``munged`` is started as user
``munge``).
"""

from __future__ import annotations

import atexit
import os
import pwd
import secrets
import shutil
import signal
import socket
import subprocess
import tempfile
import time
from collections.abc import Callable, Sequence
from dataclasses import dataclass, field
from pathlib import Path

#: Names the harness gives the test cluster; ``profiles/slurm-ci`` uses the same ones.
CLUSTER_NAME = "lesprepci"
ACCOUNT = "lesprep_ci"
PARTITION = "ci"

#: Programs the harness runs, with the Debian package that ships each one.
REQUIRED_PROGRAMS: dict[str, str] = {
    "munged": "munge",
    "mungekey": "munge",
    "munge": "munge",
    "unmunge": "munge",
    "slurmctld": "slurmctld",
    "slurmd": "slurmd",
    "slurmdbd": "slurmdbd",
    "sbatch": "slurm-client",
    "sacct": "slurm-client",
    "sacctmgr": "slurm-client",
    "scancel": "slurm-client",
    "scontrol": "slurm-client",
    "sinfo": "slurm-client",
    "squeue": "slurm-client",
    "mariadbd": "mariadb-server",
    "mariadb-install-db": "mariadb-server",
    "mariadb": "mariadb-server",
}

MUNGE_KEY = Path("/etc/munge/munge.key")
#: Where SLURM commands look when SLURM_CONF is unset (see _link_default_conf).
DEFAULT_CONF = Path("/etc/slurm/slurm.conf")
_CONF_HEADER = "# Written by tests/slurm_cluster.py for a throwaway test cluster."
MUNGE_SOCKET = Path("/run/munge/munge.socket.2")  # compiled-in default of libmunge
_COMMAND_TIMEOUT = 30.0
_DB_USER = "slurm"
_DB_NAME = "slurm_acct_db"


class ClusterError(RuntimeError):
    """The test cluster could not be started, queried or stopped."""


@dataclass
class _Daemon:
    """One daemon the harness started: its pid file and the pid read from it."""

    name: str
    pid_file: Path
    log_file: Path
    pid: int | None = None
    child: subprocess.Popen[bytes] | None = None


@dataclass
class Cluster:
    """A running single-node SLURM cluster.

    Parameters
    ----------
    workdir
        Directory holding config, state, logs and pid files.
    conf
        The ``slurm.conf`` clients and daemons read.
    node
        Name of the one compute node.
    """

    workdir: Path
    conf: Path
    node: str
    _daemons: list[_Daemon] = field(default_factory=list)
    _scratch: list[Path] = field(default_factory=list)
    _links: list[Path] = field(default_factory=list)
    _stopped: bool = False

    @property
    def env(self) -> dict[str, str]:
        """Environment variables a SLURM client needs to reach this cluster.

        Returns
        -------
        dict of str to str
            Merge into ``os.environ`` for every ``sbatch``/``sacct``/``snakemake`` call.
        """
        return {"SLURM_CONF": str(self.conf)}

    def environ(self) -> dict[str, str]:
        """Return a copy of ``os.environ`` with :attr:`env` applied.

        Returns
        -------
        dict of str to str
            A full environment for ``subprocess``.
        """
        return {**os.environ, **self.env}

    def run(
        self, args: Sequence[str], *, timeout: float = _COMMAND_TIMEOUT, check: bool = True
    ) -> subprocess.CompletedProcess[str]:
        """Run a SLURM client command against this cluster.

        Parameters
        ----------
        args
            Command and arguments, e.g. ``["sinfo", "-h"]``.
        timeout
            Seconds before the command is killed.
        check
            Raise :class:`ClusterError` on a non-zero exit.

        Returns
        -------
        subprocess.CompletedProcess
            With text ``stdout`` and ``stderr``.
        """
        return _run(args, env=self.environ(), timeout=timeout, check=check)

    def wait_idle(self, timeout: float = 60.0) -> None:
        """Wait until the node is ``idle`` and no job is queued or running.

        Parameters
        ----------
        timeout
            Seconds to wait before raising :class:`ClusterError`.
        """
        deadline = time.monotonic() + timeout
        state, jobs = "?", "?"
        while time.monotonic() < deadline:
            info = self.run(["sinfo", "-h", "-N", "-n", self.node, "-o", "%t"], check=False)
            queue = self.run(["squeue", "-h", "-o", "%i"], check=False)
            state, jobs = info.stdout.strip(), queue.stdout.strip()
            if info.returncode == 0 and queue.returncode == 0 and state == "idle" and not jobs:
                return
            time.sleep(0.3)
        raise ClusterError(
            f"node {self.node} not idle after {timeout:.0f} s: sinfo state {state!r}, "
            f"queued/running jobs {jobs.split() or 'none'}\n{self.log_tail()}"
        )

    def log_tail(self, lines: int = 15) -> str:
        """Return the last lines of every daemon log, for error messages.

        Parameters
        ----------
        lines
            Lines per log.

        Returns
        -------
        str
            One block per daemon.
        """
        blocks = []
        for daemon in self._daemons:
            if daemon.log_file.exists():
                text = daemon.log_file.read_text(errors="replace").splitlines()[-lines:]
                blocks.append(f"--- {daemon.log_file} ---\n" + "\n".join(text))
        return "\n".join(blocks)

    def stop(self, timeout: float = 30.0) -> None:
        """Cancel remaining jobs and stop every daemon by the pid in its pid file.

        Safe to call more than once. Raises :class:`ClusterError` only if a daemon
        survives SIGKILL.

        Parameters
        ----------
        timeout
            Seconds each daemon gets to exit after SIGTERM before SIGKILL.
        """
        if self._stopped:
            return
        self._stopped = True
        atexit.unregister(self.stop)
        if any(d.name == "slurmctld" and _alive(d.pid) for d in self._daemons):
            _cancel_all_jobs(self)
        survivors = [
            daemon.name for daemon in reversed(self._daemons) if not _stop_daemon(daemon, timeout)
        ]
        for path in self._scratch:
            shutil.rmtree(path, ignore_errors=True)
        for link in self._links:
            if link.is_symlink() and link.readlink() == self.conf:
                link.unlink()
        if survivors:
            raise ClusterError(f"daemons still running after SIGKILL: {survivors}")

    def pids(self) -> dict[str, int | None]:
        """Return the pid the harness recorded for each daemon it started.

        Returns
        -------
        dict of str to int or None
            ``None`` where the daemon never wrote its pid file.
        """
        return {d.name: d.pid for d in self._daemons}

    def __enter__(self) -> Cluster:
        return self

    def __exit__(self, *exc_info: object) -> None:
        self.stop()


def slurm_available() -> tuple[bool, str]:
    """Say whether this machine can run the test cluster.

    Returns
    -------
    tuple of (bool, str)
        ``(True, "")`` when every program is installed and we are root, else
        ``(False, reason)`` naming what is missing and how to get it.

    Examples
    --------
    >>> ok, why = slurm_available()
    >>> isinstance(ok, bool) and isinstance(why, str)
    True
    """
    missing = [prog for prog in REQUIRED_PROGRAMS if _which(prog) is None]
    if missing:
        packages = sorted({REQUIRED_PROGRAMS[prog] for prog in missing})
        return False, (
            f"programs not installed: {', '.join(missing)}; "
            f"run .ci/install-slurm.sh (Debian packages {' '.join(packages)})"
        )
    if os.geteuid() != 0:
        return False, "the SLURM test cluster must be started as root"
    try:
        pwd.getpwnam("munge")
    except KeyError:
        return False, "user 'munge' does not exist; reinstall the Debian package munge"
    return True, ""


def start_cluster(workdir: Path, *, timeout: float = 60.0) -> Cluster:
    """Write the configuration into `workdir` and start a one-node cluster.

    Starts munged, mariadbd, slurmdbd (then registers cluster, account and user
    with sacctmgr), slurmctld and slurmd, and returns once the node is idle. If any
    step fails, every daemon started so far is stopped before the error propagates.

    Parameters
    ----------
    workdir
        Directory for config, state, logs and pid files; created if absent.
    timeout
        Seconds each daemon gets to become ready.

    Returns
    -------
    Cluster
        Running; use as a context manager or call :meth:`Cluster.stop`.

    Examples
    --------
    Used by the SLURM tests (it starts real daemons, so it is shown, not run here)::

        with start_cluster(Path("/tmp/demo")) as c:
            c.run(["sbatch", "--wrap", "hostname"])
    """
    ok, why = slurm_available()
    if not ok:
        raise ClusterError(why)
    workdir = Path(workdir).resolve()
    for sub in ("etc", "run", "log", "state", "spool", "db"):
        (workdir / sub).mkdir(parents=True, exist_ok=True)
    node_line, node = _node_line()
    cluster = Cluster(workdir=workdir, conf=workdir / "etc" / "slurm.conf", node=node)
    atexit.register(cluster.stop)
    try:
        _start_all(cluster, node_line, timeout)
    except BaseException as exc:
        if not isinstance(exc, ClusterError):  # ClusterError messages carry the logs
            exc.add_note(cluster.log_tail())
        cluster.stop()
        raise
    return cluster


# --- start-up steps -------------------------------------------------------------


def _start_all(cluster: Cluster, node_line: str, timeout: float) -> None:
    """Run every start-up step in order; record each daemon before waiting on it."""
    w = cluster.workdir
    ports = _free_ports(4)
    ctld_port, slurmd_port, dbd_port, db_port = ports
    db_pass = secrets.token_hex(12)
    _link_default_conf(cluster)  # first: it refuses to touch a real site's config
    _start_munged(cluster, timeout)
    _start_mariadb(cluster, db_port, db_pass, timeout)
    host = socket.gethostname().split(".")[0]
    _write_slurmdbd_conf(w, host, dbd_port, db_port, db_pass)
    _write_slurm_conf(cluster.conf, w, host, node_line, ctld_port, slurmd_port, dbd_port)
    env = cluster.environ()
    _start_child(cluster, "slurmdbd", ["slurmdbd", "-D"], w / "run/slurmdbd.pid", env, timeout)
    _wait_for(
        lambda: cluster.run(["sacctmgr", "-n", "list", "cluster"], check=False).returncode == 0,
        timeout,
        "slurmdbd to answer sacctmgr",
        cluster,
    )
    _register_accounting(cluster)
    _start_child(cluster, "slurmctld", ["slurmctld", "-D"], w / "run/slurmctld.pid", env, timeout)
    _wait_for(
        lambda: "UP" in cluster.run(["scontrol", "ping"], check=False).stdout,
        timeout,
        "slurmctld to answer scontrol ping",
        cluster,
    )
    _start_child(cluster, "slurmd", ["slurmd", "-D"], w / "run/slurmd.pid", env, timeout)
    cluster.wait_idle(timeout)


def _start_munged(cluster: Cluster, timeout: float) -> None:
    """Start munged as user munge on the default socket, unless one already answers.

    A private socket (``AuthInfo=socket=...``) does not work: SLURM 22.05's sacctmgr
    ignores it on its connection to slurmdbd and uses the compiled-in default socket.
    So the default socket is used, and a munged already serving it (a developer's
    machine) is reused and left running; the key is created if absent.
    """
    if _munge_works():
        return
    if not MUNGE_KEY.exists():
        _run(["mungekey", "--create", f"--keyfile={MUNGE_KEY}"], timeout=_COMMAND_TIMEOUT)
        shutil.chown(MUNGE_KEY, "munge", "munge")
        MUNGE_KEY.chmod(0o600)
    MUNGE_SOCKET.parent.mkdir(mode=0o755, parents=True, exist_ok=True)
    shutil.chown(MUNGE_SOCKET.parent, "munge", "munge")
    # Pid, log and seed files of our munged go to a directory 'munge' can write
    # (the work directory may sit below a root-only directory, as pytest's tmp_path).
    scratch = Path(tempfile.mkdtemp(prefix="slurm-harness-munge-"))
    cluster._scratch.append(scratch)
    shutil.chown(scratch, "munge", "munge")
    scratch.chmod(0o755)
    args = [
        "munged",
        "--foreground",
        "--force",  # no munged answered above, so any socket or lock left is stale
        f"--socket={MUNGE_SOCKET}",
        f"--key-file={MUNGE_KEY}",
        f"--pid-file={scratch / 'munged.pid'}",
        f"--log-file={scratch / 'munged.log'}",
        f"--seed-file={scratch / 'munged.seed'}",
    ]
    _start_child(
        cluster, "munged", args, scratch / "munged.pid", None, timeout, user="munge",
        log_file=scratch / "munged.log",
    )  # fmt: skip
    _wait_for(_munge_works, timeout, "munged to encode and decode a credential", cluster)


def _munge_works() -> bool:
    """True if a munged answers on the default socket (encode, then decode)."""
    if not MUNGE_SOCKET.exists():
        return False
    cred = _run(["munge", "-n", "-S", str(MUNGE_SOCKET)], timeout=10, check=False)
    if cred.returncode != 0:
        return False
    try:
        back = subprocess.run(
            [_which("unmunge") or "unmunge", "-S", str(MUNGE_SOCKET)],
            input=cred.stdout,
            capture_output=True,
            text=True,
            timeout=10,
            check=False,
        )
    except subprocess.TimeoutExpired:
        return False
    return back.returncode == 0


def _start_mariadb(cluster: Cluster, port: int, password: str, timeout: float) -> None:
    """Initialise a private MariaDB data directory, start mariadbd, create the DB user."""
    w = cluster.workdir
    datadir = w / "db" / "data"
    sock = w / "db" / "mariadb.sock"
    log = w / "log" / "mariadb.log"
    if not (datadir / "mysql").exists():
        init = _run(
            [
                "mariadb-install-db",
                "--no-defaults",
                f"--datadir={datadir}",
                "--user=root",
                "--auth-root-authentication-method=socket",
                "--skip-test-db",
            ],
            timeout=120,
            check=False,
        )
        log.write_text(init.stdout + init.stderr)
        if init.returncode != 0:
            raise ClusterError(f"mariadb-install-db exited with {init.returncode}; see {log}")
    args = [
        "mariadbd",
        "--no-defaults",
        f"--datadir={datadir}",
        f"--socket={sock}",
        f"--port={port}",
        "--bind-address=127.0.0.1",
        "--skip-name-resolve",
        f"--pid-file={w / 'run' / 'mariadb.pid'}",
        f"--log-error={log}",
        "--user=root",
        # Settings the SLURM accounting documentation recommends for slurmdbd.
        "--innodb-buffer-pool-size=1024M",
        "--innodb-log-file-size=64M",
        "--innodb-lock-wait-timeout=900",
    ]
    _start_child(cluster, "mariadbd", args, w / "run" / "mariadb.pid", None, timeout, log_file=log)
    sql = ["mariadb", "--no-defaults", f"--socket={sock}", "-u", "root", "-e"]
    _wait_for(
        lambda: _run([*sql, "SELECT 1"], timeout=10, check=False).returncode == 0,
        timeout,
        "mariadbd to accept connections",
        cluster,
    )
    grants = " ".join(
        f"CREATE USER IF NOT EXISTS '{_DB_USER}'@'{host}' IDENTIFIED BY '{password}';"
        f" ALTER USER '{_DB_USER}'@'{host}' IDENTIFIED BY '{password}';"
        f" GRANT ALL ON {_DB_NAME}.* TO '{_DB_USER}'@'{host}';"
        for host in ("127.0.0.1", "localhost")
    )
    _run([*sql, grants], timeout=_COMMAND_TIMEOUT)


def _register_accounting(cluster: Cluster) -> None:
    """Add the cluster, the test account and user root to the accounting database."""
    existing = cluster.run(["sacctmgr", "-n", "-P", "list", "cluster", "format=cluster"])
    if CLUSTER_NAME not in existing.stdout.split():
        cluster.run(["sacctmgr", "-i", "add", "cluster", CLUSTER_NAME])
    accounts = cluster.run(["sacctmgr", "-n", "-P", "list", "account", "format=account"])
    if ACCOUNT not in accounts.stdout.split():
        cluster.run(
            [
                "sacctmgr", "-i", "add", "account", ACCOUNT, f"cluster={CLUSTER_NAME}",
                "description=test account", "organization=testing",
            ]
        )  # fmt: skip
    assoc = cluster.run(
        ["sacctmgr", "-n", "-P", "list", "assoc", "user=root", "format=account"]
    ).stdout.split()
    if ACCOUNT not in assoc:
        cluster.run(
            ["sacctmgr", "-i", "add", "user", "root", f"account={ACCOUNT}",
             f"cluster={CLUSTER_NAME}"]
        )  # fmt: skip
    cluster.run(["sacctmgr", "-i", "modify", "user", "root", "set", f"defaultaccount={ACCOUNT}"])


def _start_child(
    cluster: Cluster,
    name: str,
    args: list[str],
    pid_file: Path,
    env: dict[str, str] | None,
    timeout: float,
    *,
    user: str | None = None,
    log_file: Path | None = None,
) -> None:
    """Start a daemon in the foreground as our child and wait for its pid file.

    Foreground children are reaped by :meth:`Cluster.stop` at once; a daemon that
    forks is reparented to pid 1, which here reaps late, so a stopped daemon would
    linger as a zombie that still answers ``kill(pid, 0)``.
    """
    daemon = _Daemon(name, pid_file, log_file or cluster.workdir / "log" / f"{name}.log")
    cluster._daemons.append(daemon)
    with (cluster.workdir / "log" / f"{name}.out").open("ab") as out:
        daemon.child = subprocess.Popen(
            [_which(args[0]) or args[0], *args[1:]],
            env=env,
            stdin=subprocess.DEVNULL,
            stdout=out,
            stderr=out,
            start_new_session=True,
            user=user,
            group=user,
            extra_groups=[] if user else None,
        )
    daemon.pid = _wait_pid_file(daemon, timeout, cluster)
    if daemon.pid != daemon.child.pid:
        raise ClusterError(
            f"{name} pid file {pid_file} names {daemon.pid}, not the started {daemon.child.pid}"
        )


# --- configuration ----------------------------------------------------------------


def _link_default_conf(cluster: Cluster) -> None:
    """Point /etc/slurm/slurm.conf at our slurm.conf for the cluster's lifetime.

    SLURM_CONF alone is not enough: inside a job, the Snakemake SLURM jobstep plugin
    removes every SLURM_* variable but a few job-identity ones (SLURM_CONF included)
    before it calls srun, which then only finds the compiled-in default path. A file
    there that this harness did not write is never replaced.
    """
    link = DEFAULT_CONF
    if link.is_symlink() or link.exists():
        try:
            ours = link.read_text(errors="replace").startswith(_CONF_HEADER)
        except OSError:  # a dangling symlink
            ours = link.is_symlink()
        if not ours:
            raise ClusterError(
                f"{link} exists and was not written by this harness; it belongs to a real "
                "SLURM installation, which the test cluster will not overwrite. Run the "
                "SLURM tests on a machine without a configured SLURM."
            )
        link.unlink()  # left by an earlier run that could not clean up
    link.parent.mkdir(parents=True, exist_ok=True)
    link.symlink_to(cluster.conf)
    cluster._links.append(link)


def _node_line() -> tuple[str, str]:
    """Return the node definition from ``slurmd -C`` (without UpTime) and the node name."""
    out = _run(["slurmd", "-C"], timeout=_COMMAND_TIMEOUT).stdout
    line = next(ln for ln in out.splitlines() if ln.startswith("NodeName="))
    node = line.split()[0].split("=", 1)[1]
    return f"{line} NodeAddr=127.0.0.1 State=UNKNOWN", node


def _write_slurm_conf(
    path: Path,
    w: Path,
    host: str,
    node_line: str,
    ctld_port: int,
    slurmd_port: int,
    dbd_port: int,
) -> None:
    """Write slurm.conf: no cgroups, real accounting through slurmdbd."""
    path.write_text(
        f"""\
{_CONF_HEADER}
ClusterName={CLUSTER_NAME}
SlurmctldHost={host}(127.0.0.1)
SlurmctldPort={ctld_port}
SlurmdPort={slurmd_port}
SlurmUser=root
SlurmdUser=root
AuthType=auth/munge
CredType=cred/munge
StateSaveLocation={w}/state
SlurmdSpoolDir={w}/spool
SlurmctldPidFile={w}/run/slurmctld.pid
SlurmdPidFile={w}/run/slurmd.pid
SlurmctldLogFile={w}/log/slurmctld.log
SlurmdLogFile={w}/log/slurmd.log
SlurmctldDebug=info
SlurmdDebug=info
# No cgroups: plain /proc process tracking, no task confinement.
ProctrackType=proctrack/linuxproc
TaskPlugin=task/none
JobAcctGatherType=jobacct_gather/linux
JobAcctGatherFrequency=30
SelectType=select/cons_tres
SelectTypeParameters=CR_CPU
SchedulerType=sched/backfill
MpiDefault=none
AccountingStorageType=accounting_storage/slurmdbd
AccountingStorageHost=127.0.0.1
AccountingStoragePort={dbd_port}
AccountingStorageEnforce=associations
AccountingStoreFlags=job_comment
JobCompType=jobcomp/none
ReturnToService=2
MinJobAge=300
KillWait=5
InactiveLimit=0
SlurmctldTimeout=30
SlurmdTimeout=60
{node_line}
PartitionName={PARTITION} Nodes=ALL Default=YES MaxTime=INFINITE State=UP
"""
    )


def _write_slurmdbd_conf(w: Path, host: str, dbd_port: int, db_port: int, db_pass: str) -> None:
    """Write slurmdbd.conf beside slurm.conf (slurmdbd looks there), mode 0600."""
    path = w / "etc" / "slurmdbd.conf"
    path.write_text(
        f"""\
{_CONF_HEADER}
AuthType=auth/munge
DbdHost={host}
DbdAddr=127.0.0.1
DbdPort={dbd_port}
SlurmUser=root
PidFile={w}/run/slurmdbd.pid
LogFile={w}/log/slurmdbd.log
DebugLevel=info
StorageType=accounting_storage/mysql
StorageHost=127.0.0.1
StoragePort={db_port}
StorageUser={_DB_USER}
StoragePass={db_pass}
StorageLoc={_DB_NAME}
"""
    )
    path.chmod(0o600)


# --- process handling ---------------------------------------------------------------


def _run(
    args: Sequence[str],
    *,
    env: dict[str, str] | None = None,
    timeout: float = _COMMAND_TIMEOUT,
    check: bool = True,
) -> subprocess.CompletedProcess[str]:
    """Run a short command with a timeout; raise ClusterError on failure if `check`."""
    try:
        proc = subprocess.run(
            [_which(args[0]) or args[0], *args[1:]],
            env=env,
            stdin=subprocess.DEVNULL,
            capture_output=True,
            text=True,
            timeout=timeout,
            check=False,
        )
    except subprocess.TimeoutExpired as exc:
        if not check:
            return subprocess.CompletedProcess(list(args), 124, "", f"timeout: {exc}")
        raise ClusterError(f"{' '.join(args)} did not finish in {timeout} s") from exc
    if check and proc.returncode != 0:
        raise ClusterError(
            f"{' '.join(args)} exited with {proc.returncode}: "
            f"{proc.stderr.strip() or proc.stdout.strip()}"
        )
    return proc


def _which(prog: str) -> str | None:
    """Find `prog` on PATH or in the sbin directories a non-login root PATH may lack."""
    path = os.environ.get("PATH", "") + ":/usr/local/sbin:/usr/sbin:/sbin"
    return shutil.which(prog, path=path)


def _free_ports(count: int) -> list[int]:
    """Return `count` distinct TCP ports that are free on 127.0.0.1 right now."""
    socks = []
    try:
        for _ in range(count):
            s = socket.socket(socket.AF_INET, socket.SOCK_STREAM)
            s.bind(("127.0.0.1", 0))
            socks.append(s)
        return [s.getsockname()[1] for s in socks]
    finally:
        for s in socks:
            s.close()


def _wait_for(pred: Callable[[], bool], timeout: float, what: str, cluster: Cluster) -> None:
    """Poll `pred` every 0.2 s until it is true; raise ClusterError after `timeout`."""
    deadline = time.monotonic() + timeout
    while time.monotonic() < deadline:
        if pred():
            return
        time.sleep(0.2)
    raise ClusterError(f"timed out after {timeout:.0f} s waiting for {what}\n{cluster.log_tail()}")


def _read_pid(pid_file: Path) -> int | None:
    """Return the pid in `pid_file`, or None if it is absent or not yet written."""
    try:
        text = pid_file.read_text().strip()
    except OSError:
        return None
    return int(text) if text.isdigit() else None


def _wait_pid_file(daemon: _Daemon, timeout: float, cluster: Cluster) -> int:
    """Wait until the daemon's pid file names a live process; return that pid."""
    deadline = time.monotonic() + timeout
    while time.monotonic() < deadline:
        pid = _read_pid(daemon.pid_file)
        if pid is not None and _alive(pid):
            return pid
        if daemon.child is not None and daemon.child.poll() is not None:
            break
        time.sleep(0.1)
    raise ClusterError(
        f"{daemon.name} wrote no live pid to {daemon.pid_file}\n{cluster.log_tail()}"
    )


def _alive(pid: int | None) -> bool:
    """True if `pid` exists and is not a zombie (a zombie has exited already)."""
    if pid is None:
        return False
    try:
        stat = Path(f"/proc/{pid}/stat").read_text()
    except OSError:
        return False
    return stat.rsplit(")", 1)[1].split()[0] != "Z"


def _comm(pid: int) -> str:
    """Return the kernel's short name of process `pid` ('' if gone)."""
    try:
        return Path(f"/proc/{pid}/comm").read_text().strip()
    except OSError:
        return ""


def _stop_daemon(daemon: _Daemon, timeout: float) -> bool:
    """SIGTERM the daemon by the pid read from its pid file, SIGKILL after `timeout`.

    The pid was read from the pid file at start (and checked to be the child we
    started); a daemon that died or hung before writing its pid file is stopped by
    the pid of the child we started. Returns False only if it survives SIGKILL.
    """
    pid = daemon.pid or _read_pid(daemon.pid_file)
    if pid is None and daemon.child is not None:
        pid = daemon.child.pid
    ours = daemon.child is not None and pid == daemon.child.pid
    if pid is not None and _alive(pid) and (ours or _comm(pid) == daemon.name[:15]):
        for sig, grace in ((signal.SIGTERM, timeout), (signal.SIGKILL, 5.0)):
            try:
                os.kill(pid, sig)
            except ProcessLookupError:
                break
            deadline = time.monotonic() + grace
            while _alive(pid) and time.monotonic() < deadline:
                time.sleep(0.1)
            if not _alive(pid):
                break
    ok = pid is None or not _alive(pid)
    if daemon.child is not None:
        try:
            daemon.child.wait(timeout=5.0)  # reap, so no zombie is left behind
        except subprocess.TimeoutExpired:
            ok = False
    return ok


def _cancel_all_jobs(cluster: Cluster) -> None:
    """Cancel every queued or running job so no job outlives slurmd; wait up to 15 s."""
    deadline = time.monotonic() + 15
    cancelled = False
    while time.monotonic() < deadline:
        queue = cluster.run(["squeue", "-h", "-o", "%i"], check=False, timeout=10)
        jobs = queue.stdout.split()
        if queue.returncode != 0 or not jobs:
            return
        if not cancelled:
            cluster.run(["scancel", *jobs], check=False, timeout=15)
            cancelled = True
        time.sleep(0.3)
