"""Provenance: what went into a store, recorded in the store itself.

Each store carries a root attribute ``lesprep_provenance`` (a JSON string) of the form::

    {"format": 1, "steps": [ {"step": "ingest", ...}, {"step": "coarsen", ...} ]}

A step records its inputs (raw files with size and sha256, upstream stores), the
settings it used, a hash of the resolved config, the lesprep version and git commit,
package versions and the UTC time. The CF ``history`` attribute gets one dated line per
step.
"""

from __future__ import annotations

import datetime as _dt
import hashlib
import importlib.metadata
import json
import platform
import subprocess
import sys
import threading
from collections.abc import Sequence
from functools import cache
from pathlib import Path
from typing import Any

from lesprep import __version__

ATTR = "lesprep_provenance"
PACKAGES = (
    "numpy",
    "xarray",
    "zarr",
    "dask",
    "numcodecs",
    "pint",
    "cf-xarray",
    "netCDF4",
    "h5netcdf",
    "scipy",
    "numba",
    "pandas",
    "snakemake",
)
_SRC = Path(__file__).resolve().parent


def utc_now() -> str:
    """Current UTC time, ISO 8601 with a Z suffix, to the second."""
    return _dt.datetime.now(_dt.UTC).replace(microsecond=0).isoformat().replace("+00:00", "Z")


def sha256_file(path: str | Path) -> str:
    """sha256 of a file, streamed."""
    with open(path, "rb") as fh:
        return hashlib.file_digest(fh, "sha256").hexdigest()


class FileRecords:
    """:func:`file_record` of several files, computed on a background thread.

    Hashing a large raw archive takes seconds of CPU that overlap with reading and
    converting it. Use as a context manager; :meth:`result` waits for the records. When the
    block raises, the files not yet hashed are skipped and the thread is joined.

    Examples
    --------
    >>> with FileRecords([]) as records:
    ...     records.result()
    []
    """

    def __init__(self, paths: Sequence[str | Path]) -> None:
        self.paths = [Path(p) for p in paths]
        self._stop = threading.Event()
        self._records: list[dict[str, Any]] = []
        self._error: BaseException | None = None
        self._thread = threading.Thread(target=self._run, name="lesprep-hash", daemon=True)

    def _run(self) -> None:
        try:
            for p in self.paths:
                if self._stop.is_set():
                    return
                self._records.append(file_record(p))
        except BaseException as exc:  # re-raised by result()
            self._error = exc

    def __enter__(self) -> FileRecords:
        self._thread.start()
        return self

    def result(self) -> list[dict[str, Any]]:
        """The records, in the order of the paths (waits for the thread)."""
        self._thread.join()
        if self._error is not None:
            raise self._error
        return list(self._records)

    def __exit__(self, *exc: Any) -> None:
        if exc[0] is not None:
            self._stop.set()
        self._thread.join()


def file_record(path: str | Path) -> dict[str, Any]:
    """Path, size, modification time and sha256 of one raw file."""
    p = Path(path)
    st = p.stat()
    return {
        "path": str(p),
        "size": st.st_size,
        "mtime": _dt.datetime.fromtimestamp(st.st_mtime, _dt.UTC).isoformat(),
        "sha256": sha256_file(p),
    }


@cache
def git_commit() -> str | None:
    """Commit of the lesprep checkout (with ``-dirty`` if modified), or None."""
    try:
        out = subprocess.run(
            ["git", "-C", str(_SRC), "describe", "--always", "--dirty", "--abbrev=40"],
            capture_output=True,
            text=True,
            timeout=10,
            check=True,
        )
        return out.stdout.strip() or None
    except (OSError, subprocess.SubprocessError):
        return None


@cache
def code_version() -> str:
    """sha256 over lesprep's own source files: outputs depend on it (see the workflow)."""
    h = hashlib.sha256()
    for f in sorted(_SRC.rglob("*.py")):
        h.update(f.relative_to(_SRC).as_posix().encode())
        h.update(f.read_bytes())
    return h.hexdigest()[:16]


@cache
def environment() -> dict[str, Any]:
    """lesprep version, git commit, code hash, Python and package versions."""
    versions = {}
    for name in PACKAGES:
        try:
            versions[name] = importlib.metadata.version(name)
        except importlib.metadata.PackageNotFoundError:
            versions[name] = None
    return {
        "lesprep": __version__,
        "git_commit": git_commit(),
        "code_version": code_version(),
        "python": sys.version.split()[0],
        "platform": platform.platform(),
        "packages": versions,
    }


def new_step(step: str, **fields: Any) -> dict[str, Any]:
    """A provenance step record with the environment and the UTC time."""
    return {"step": step, "created": utc_now(), "environment": environment(), **fields}


def load(attrs: dict[str, Any]) -> dict[str, Any]:
    """Parse the provenance of a store's root attrs (empty record if none)."""
    text = attrs.get(ATTR)
    if not text:
        return {"format": 1, "steps": []}
    return json.loads(text)


def extend(attrs: dict[str, Any], step: dict[str, Any], summary: str) -> dict[str, Any]:
    """New root attrs: upstream provenance plus ``step``, and one more history line."""
    prov = load(attrs)
    prov["steps"].append(step)
    history = attrs.get("history", "")
    line = f"{step['created']} lesprep {__version__} {step['step']}: {summary}"
    out = {k: v for k, v in attrs.items() if k not in (ATTR, "history")}
    out["history"] = (history + "\n" + line).strip()
    out[ATTR] = json.dumps(prov, sort_keys=True, default=str)
    out["date_created"] = step["created"]
    return out


def merge(upstream: list[dict[str, Any]]) -> dict[str, Any]:
    """Provenance of a store built from several upstream stores (e.g. a training set)."""
    return {"format": 1, "steps": [], "inputs": [load(a) for a in upstream]}


def config_sha(config_record: Any) -> str:
    """sha256 of a resolved config (canonical JSON)."""
    text = json.dumps(config_record, sort_keys=True, separators=(",", ":"), default=str)
    return hashlib.sha256(text.encode()).hexdigest()


def _steps_of(prov: dict[str, Any]) -> list[dict[str, Any]]:
    """Every step of a record, upstream inputs first."""
    out: list[dict[str, Any]] = []
    for inp in prov.get("inputs", []):
        out.extend(_steps_of(inp))
    out.extend(prov.get("steps", []))
    return out


def summarize(prov: dict[str, Any], *, attrs: dict[str, Any] | None = None, path: str = "") -> str:
    """A readable multi-line summary of a store's provenance."""
    attrs = attrs or {}
    lines = [f"store: {path}" if path else "store", f"title: {attrs.get('title', '?')}"]
    steps = _steps_of(prov)
    seen_ingest: set[str] = set()
    for st in steps:
        env = st.get("environment", {})
        head = (
            f"- {st.get('step')} at {st.get('created')} (lesprep {env.get('lesprep')}, "
            f"commit {env.get('git_commit') or 'unknown'}, code {env.get('code_version')})"
        )
        if st.get("step") == "ingest":
            case = st.get("case")
            if case in seen_ingest:
                continue
            seen_ingest.add(case)
            lines.append(head)
            lines.append(
                f"    case {case} (regime {st.get('regime') or '-'}), variable map "
                f"{st.get('variable_map', {}).get('path')} "
                f"sha256 {str(st.get('variable_map', {}).get('sha256'))[:12]}"
            )
            for f in st.get("raw_files", []):
                lines.append(f"    raw {f['path']}  {f['size']} B  sha256 {f['sha256'][:16]}")
            for c in st.get("conversions", []):
                if "operation" in c:
                    lines.append(f"    {c['variable']}: {c['operation']}")
                elif c.get("factor") != 1.0 or c.get("offset") != 0.0:
                    lines.append(
                        f"    {c['variable']} ({c['raw_variable']}): {c['from_units']}"
                        f" -> {c['to_units']} x{c['factor']:g} {c['offset']:+g}"
                    )
            s = st.get("settings", {})
            lines.append(
                f"    spin-up {float(s.get('spinup_s', 'nan')) / 3600:g} h (dropped "
                f"{len(st.get('times_dropped_s', []))} times, kept {st.get('times_kept')}), "
                f"cloud threshold {float(s.get('threshold', 'nan')):g} "
                f"{s.get('threshold_units', 'kg kg-1')}, "
                f"saturation: {st.get('saturation_formula')}"
            )
            lines.append(f"    config sha256 {str(st.get('config_sha256'))[:16]}")
        elif st.get("step") == "coarsen":
            if any(ln.startswith(head) for ln in lines):
                continue
            lines.append(head)
            lines.append(
                f"    case {st.get('case')} scale {st.get('scale')} factor "
                f"{st.get('factor')} (L = {st.get('length_m')} m, dx = {st.get('dx')} m)"
            )
        elif st.get("step") == "assemble":
            lines.append(head)
            lines.append(
                f"    split {st.get('split')} scale {st.get('scale')}: "
                f"{st.get('samples')} samples from cases {', '.join(st.get('cases', []))}"
            )
            rule = st.get("split_rule")
            if rule:
                lines.append(
                    f"    split rule: fractions {rule.get('fractions')} seed {rule.get('seed')}"
                )
            for a in st.get("assignment", []):
                lines.append(f"    {a['case']}: {a['split']} ({a['reason']})")
        else:
            lines.append(head)
    pk = next((s.get("environment", {}).get("packages") for s in steps), None)
    if pk:
        lines.append("packages: " + ", ".join(f"{k} {v}" for k, v in sorted(pk.items()) if v))
    if attrs.get("history"):
        lines.append("history:")
        lines.extend(f"  {h}" for h in str(attrs["history"]).splitlines())
    return "\n".join(lines)
