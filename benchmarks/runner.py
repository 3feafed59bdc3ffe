"""Running workers: the worker entry point, the parent's runner, machine facts, tables."""

from __future__ import annotations

import contextlib
import json
import math
import os
import platform
import shutil
import subprocess
import sys
import time
import traceback
from collections.abc import Callable, Iterable, Mapping, Sequence
from pathlib import Path
from typing import Any

from helpers import HERE, MIB, ROOT, meminfo_bytes, remove, settle_memory, status_kib, warm
from trials import w_profile, w_storage
from workers import (
    w_check,
    w_coarsen,
    w_coarsen_floor,
    w_coarsen_xarray,
    w_extend,
    w_generate,
    w_info,
    w_ingest,
    w_ingest_floor,
    w_jit_warm,
    w_touch,
)

WORKERS: dict[str, Callable[..., dict[str, Any]]] = {
    "info": w_info,
    "touch": w_touch,
    "generate": w_generate,
    "extend": w_extend,
    "jit_warm": w_jit_warm,
    "ingest": w_ingest,
    "ingest_floor": w_ingest_floor,
    "coarsen": w_coarsen,
    "coarsen_floor": w_coarsen_floor,
    "coarsen_xarray": w_coarsen_xarray,
    "check": w_check,
    "storage": w_storage,
    "profile": w_profile,
}


def worker_main(name: str, params_file: str, result_file: str) -> int:
    """Entry of a worker process: run one step, write its result (with peak memory)."""
    params = json.loads(Path(params_file).read_text())
    base = status_kib("VmRSS")
    cpu0 = os.times()
    try:
        res = WORKERS[name](**params)
        rc = 0
    except BaseException as exc:  # reported to the parent, which carries on
        res = {"error": f"{type(exc).__name__}: {exc}", "traceback": traceback.format_exc()}
        rc = 1
    cpu1 = os.times()
    import resource

    res["cpu_s"] = (cpu1.user - cpu0.user) + (cpu1.system - cpu0.system)
    res["user_s"] = cpu1.user - cpu0.user
    res["system_s"] = cpu1.system - cpu0.system
    res["peak_rss_mib"] = status_kib("VmHWM") / 1024
    res["start_rss_mib"] = base / 1024
    ru = resource.getrusage(resource.RUSAGE_SELF)
    res["ru_maxrss_mib"] = ru.ru_maxrss / 1024
    res["minor_faults"] = ru.ru_minflt
    res["major_faults"] = ru.ru_majflt
    Path(result_file).write_text(json.dumps(res, default=str))
    return rc


# =============================================================================== parent


class Runner:
    """Runs workers in fresh processes, keeps every result, writes the JSON as it goes."""

    def __init__(
        self, out: Path, json_path: Path, timeout: float, env: Mapping[str, str] | None = None
    ) -> None:
        self.env = {**os.environ, **dict(env or {})}
        self.out = out
        self.json_path = json_path
        self.timeout = timeout
        self.results: dict[str, Any] = {"steps": {}, "comparisons": {}, "errors": {}}
        self.settle_paths: list[Path] = []
        """Files read before every step until free memory is below ``settle_free``
        (:func:`helpers.settle_memory`); empty: no settling."""
        self.settle_free = 2 * 2**30
        self.ipc = out / "ipc"
        self.ipc.mkdir(parents=True, exist_ok=True)

    def save(self) -> None:
        """Write the JSON results (after every step, so a killed run leaves its numbers)."""
        self.json_path.parent.mkdir(parents=True, exist_ok=True)
        self.json_path.write_text(json.dumps(self.results, indent=1, default=str) + "\n")

    def step(
        self,
        key: str,
        worker: str,
        params: Mapping[str, Any],
        *,
        warm_paths: Iterable[str | Path] = (),
        timeout: float | None = None,
        record: bool = True,
        prepare: Iterable[str | Path] = (),
    ) -> dict[str, Any]:
        """Run one worker; raise RuntimeError if it fails. The result is kept under ``key``.

        Before the worker starts: the paths of ``prepare`` are removed (a step's previous
        outputs), the free memory is settled (:attr:`settle_paths`), then the step's
        inputs ``warm_paths`` are read into the page cache.
        """
        for path in prepare:
            remove(path)
        settled = settle_memory(self.settle_paths, self.settle_free) if self.settle_paths else {}
        warm_s = warm(warm_paths)
        t0 = time.perf_counter()
        os.sync()
        sync_before = time.perf_counter() - t0
        pfile = self.ipc / f"{key}.params.json"
        rfile = self.ipc / f"{key}.result.json"
        pfile.write_text(json.dumps(dict(params), default=str))
        remove(rfile)
        cmd = [sys.executable, str(HERE / "run.py"), "--worker", worker]
        cmd += ["--params", str(pfile), "--result", str(rfile)]
        print(f"  .. {key} ({worker})", flush=True)
        load0 = os.getloadavg()
        t0 = time.perf_counter()
        try:
            proc = subprocess.run(
                cmd,
                capture_output=True,
                text=True,
                timeout=timeout or self.timeout,
                cwd=ROOT,
                env=self.env,
            )
        except subprocess.TimeoutExpired:
            msg = f"{key}: worker timed out after {timeout or self.timeout:g} s"
            raise RuntimeError(msg) from None
        wall = time.perf_counter() - t0
        if not rfile.exists():
            raise RuntimeError(f"{key}: worker died (rc {proc.returncode}): {proc.stderr[-2000:]}")
        res = json.loads(rfile.read_text())
        res["process_wall_s"] = wall
        res["loadavg_1min_before_after"] = [load0[0], os.getloadavg()[0]]
        res["warm_s"] = warm_s
        res.update(settled)
        res["sync_before_s"] = sync_before
        t0 = time.perf_counter()
        os.sync()
        res["sync_after_s"] = time.perf_counter() - t0
        if record:
            self.results["steps"][key] = res
            self.save()
        if "error" in res:
            raise RuntimeError(f"{key}: {res['error']}\n{res.get('traceback', '')}")
        print(
            f"     {res.get('time_s', float('nan')):9.2f} s   peak RSS "
            f"{res['peak_rss_mib']:8.0f} MiB   (process {wall:.1f} s, user "
            f"{res['user_s']:.1f} s, system {res['system_s']:.1f} s, load "
            f"{load0[0]:.1f})",
            flush=True,
        )
        return res

    def attempt(self, name: str, fn: Callable[[], None]) -> None:
        """Run one comparison; print and keep a failure, then carry on."""
        print(f"\n== {name}", flush=True)
        try:
            fn()
        except Exception as exc:
            msg = f"{type(exc).__name__}: {exc}"
            print(f"!! {name} failed: {msg}", flush=True)
            self.results["errors"][name] = msg
            self.save()


def disk_write_gbps(folder: Path, nbytes: int = 2**30) -> dict[str, float]:
    """Sequential write of ``nbytes`` to ``folder``: into the page cache, and with fsync."""
    folder.mkdir(parents=True, exist_ok=True)
    path = folder / "disk-probe.bin"
    block = os.urandom(8 * MIB)
    t0 = time.perf_counter()
    with open(path, "wb") as fh:
        for _ in range(nbytes // len(block)):
            fh.write(block)
        t_cache = time.perf_counter() - t0
        fh.flush()
        os.fsync(fh.fileno())
    t_sync = time.perf_counter() - t0
    remove(path)
    return {
        "page_cache_write_gbps": nbytes / 1e9 / t_cache,
        "fsync_write_gbps": nbytes / 1e9 / t_sync,
    }


def code_identity() -> dict[str, Any]:
    """Which lesprep code is measured: git HEAD, changed files, a hash of the package source."""
    import hashlib

    digest = hashlib.sha256()
    src = ROOT / "src" / "lesprep"
    for f in sorted(src.rglob("*.py")):  # every module, subpackages included
        digest.update(f.relative_to(src).as_posix().encode() + b"\0" + f.read_bytes())
    out: dict[str, Any] = {"src_sha256": digest.hexdigest()}
    with contextlib.suppress(Exception):
        out["git_head"] = subprocess.run(
            ["git", "rev-parse", "--short", "HEAD"], capture_output=True, text=True, cwd=ROOT
        ).stdout.strip()
        status = subprocess.run(
            ["git", "status", "--porcelain", "--", "src"],
            capture_output=True,
            text=True,
            cwd=ROOT,
        ).stdout
        out["src_uncommitted"] = [line[3:] for line in status.splitlines()]
    return out


def machine_info(out: Path) -> dict[str, Any]:
    """nproc, RAM, CPU model, OS, free disk, disk write speed."""
    info: dict[str, Any] = {"nproc": os.cpu_count(), "platform": platform.platform()}
    with contextlib.suppress(OSError):
        info.update(disk_write_gbps(out))
    info["disk_free_gb"] = shutil.disk_usage(out).free / 1e9
    if total := meminfo_bytes("MemTotal"):
        info["ram_gib"] = round(total / 2**30, 1)
    with contextlib.suppress(OSError):
        for line in Path("/proc/cpuinfo").read_text().splitlines():
            if line.startswith("model name"):
                info["cpu"] = line.split(":", 1)[1].strip()
                break
    with contextlib.suppress(Exception):
        info["affinity"] = len(os.sched_getaffinity(0))
    info["free_page_reporting"] = free_page_reporting()
    return info


def free_page_reporting() -> bool | None:
    """Whether a virtio balloon device (device id 5) offers free page reporting (feature
    bit 5): the guest then hands pages that stay free back to the host, and the next
    write to them is slow. None where no virtio balloon is seen."""
    found = None
    for dev in Path("/sys/bus/virtio/devices").glob("*"):
        with contextlib.suppress(OSError, ValueError):
            if int((dev / "device").read_text(), 16) == 5:
                bits = (dev / "features").read_text().strip()
                found = bool(found) or (len(bits) > 5 and bits[5] == "1")
    return found


def fmt(x: Any, spec: str) -> str:
    """``x`` formatted with ``spec``, or "-" for a missing or non-finite value."""
    if x is None or (isinstance(x, float) and not math.isfinite(x)):
        return "-"
    return format(x, spec)


def print_table(headers: Sequence[str], rows: Sequence[Sequence[Any]]) -> str:
    """A plain fixed-width table (also returned as text)."""
    cells = [[str(c) for c in r] for r in rows]
    widths = [
        max(len(h), *(len(r[i]) for r in cells)) if cells else len(h) for i, h in enumerate(headers)
    ]
    lines = [" | ".join(h.ljust(w) for h, w in zip(headers, widths, strict=True))]
    lines.append("-+-".join("-" * w for w in widths))
    for r in cells:
        lines.append(" | ".join(c.ljust(w) for c, w in zip(r, widths, strict=True)))
    text = "\n".join(lines)
    print(text, flush=True)
    return text
