"""Shared constants and small helpers of the benchmark suite (sizes, files, targets)."""

from __future__ import annotations

import contextlib
import math
import operator
import os
import shutil
import time
from collections.abc import Callable, Iterable
from pathlib import Path
from typing import Any

HERE = Path(__file__).resolve().parent
ROOT = HERE.parent
CASE = "sc-ostra-01"  # an invented demo case (flavour alpha: one file per output time)
VARMAP = ROOT / "config" / "varmaps" / "flavour-alpha.yaml"
STORE = {"codec": "blosc-lz4", "clevel": 5}  # the workflow's default store settings
SPINUP = "0 s"  # keep every generated time, so "ntimes" is what each step processes
THRESHOLD = "1e-5 kg/kg"
PATCH_LENGTHS_M = (1600.0, 6400.0)
PATCH_SIZE = 16
BALLAST = "settle-ballast.bin"  # scratch file read last when settling free memory
CANON_READ = ("qc", "qv", "T", "w", "rh", "cloud_mask", "lwp", "p")  # what coarsening reads
TARGETS = {
    "xarray_speedup": 20.0,  # xarray script time / lesprep time >= this
    "coarsen_floor": 1.5,  # lesprep coarsen time / I/O floor time <= this
    "ingest_floor": 1.5,  # lesprep ingest time / I/O floor time <= this
    "memory_growth": 0.20,  # 4x more times -> peak RSS grows by less than this fraction
}
MIB = 2**20


# =============================================================================== helpers


def status_kib(key: str) -> int:
    """A ``kB`` field of ``/proc/self/status`` (e.g. VmHWM, VmRSS); -1 if unavailable."""
    with contextlib.suppress(OSError), open("/proc/self/status") as fh:
        for line in fh:
            if line.startswith(key + ":"):
                return int(line.split()[1])
    return -1


def dir_bytes(path: str | Path) -> int:
    """Bytes of the files under ``path`` (a store or an archive)."""
    from lesprep.store import dir_size_bytes

    return dir_size_bytes(path)


def file_count(path: str | Path) -> int:
    """Number of files under ``path``."""
    return sum(len(files) for _, _, files in os.walk(path))


def warm(paths: Iterable[str | Path]) -> float:
    """Read every file under ``paths`` once (fills the page cache); returns seconds."""
    t0 = time.perf_counter()
    buf = bytearray(8 * MIB)
    for path in paths:
        p = Path(path)
        files = [p] if p.is_file() else [Path(r) / f for r, _, fs in os.walk(p) for f in fs]
        for f in files:
            with contextlib.suppress(OSError), open(f, "rb", buffering=0) as fh:
                while fh.readinto(buf):
                    pass
    return time.perf_counter() - t0


def meminfo_bytes(field: str) -> int:
    """A field of ``/proc/meminfo`` (``"MemFree"``, ``"MemTotal"``) in bytes (0 where
    there is no such file or field)."""
    with contextlib.suppress(OSError):
        for line in Path("/proc/meminfo").read_text().splitlines():
            if line.startswith(f"{field}:"):
                return int(line.split()[1]) * 1024
    return 0


def ballast_file(path: str | Path, nbytes: int) -> dict[str, float]:
    """Make sure ``path`` is a scratch file of at least ``nbytes`` bytes, written once and
    synced (its cached pages are clean, so the kernel can take them back at once).

    :func:`settle_memory` reads it after the step's own inputs when those are too small to
    bring free memory down to its target (a machine with more memory than archive).
    """
    p = Path(path)
    have = p.stat().st_size if p.exists() else 0
    t0 = time.perf_counter()
    if nbytes > 0 and have < nbytes:
        p.parent.mkdir(parents=True, exist_ok=True)
        block = os.urandom(8 * MIB)
        with open(p, "wb") as fh:
            for _ in range(-(-nbytes // len(block))):
                fh.write(block)
            fh.flush()
            os.fsync(fh.fileno())
        have = p.stat().st_size
    return {"ballast_gib": have / 2**30, "ballast_write_s": time.perf_counter() - t0}


def settle_memory(paths: Iterable[str | Path], free_below: int) -> dict[str, float]:
    """Read files under ``paths`` into the page cache until ``MemFree`` is below
    ``free_below`` bytes (or the files run out), so that every timed step starts with
    little free memory and writes into recycled page-cache pages. Put a
    :func:`ballast_file` last in ``paths`` so that the files do not run out first.

    On a virtual machine whose host takes back freed guest memory, a page that is free
    for a while is "cold": the guest's first write to it waits for the host. A step
    that starts with gigabytes of free memory (say, right after its previous outputs were
    deleted) then pays several times more for its page-cache writes than a step that
    starts with the page cache full (measured: the same extended coarsening 55.7 s with
    17 GB free, 45.9 s with 5 GB free). Settling gives every step the second state.
    Without a ballast file the archive alone left 8 GB free before a coarsening here and
    about 3 GB before its floor (2026-12-05), so the two sides did not start alike.
    """
    t0 = time.perf_counter()
    before = meminfo_bytes("MemFree")
    buf = bytearray(8 * MIB)
    done = False
    for path in paths:
        p = Path(path)
        files = [p] if p.is_file() else [Path(r) / f for r, _, fs in os.walk(p) for f in fs]
        for f in sorted(files):
            if meminfo_bytes("MemFree") < free_below:
                done = True
                break
            with contextlib.suppress(OSError), open(f, "rb", buffering=0) as fh:
                while fh.readinto(buf):
                    pass
        if done:
            break
    return {
        "settle_s": time.perf_counter() - t0,
        "mem_free_before_gib": before / 2**30,
        "mem_free_after_gib": meminfo_bytes("MemFree") / 2**30,
    }


def remove(path: str | Path) -> None:
    """Remove a file or directory tree if present."""
    p = Path(path)
    if p.is_dir():
        shutil.rmtree(p, ignore_errors=True)
    elif p.exists():
        p.unlink()


def power_factors(nx: int, ny: int) -> list[int]:
    """Block factors 2, 4, 8, ... that divide both horizontal sizes."""
    g = math.gcd(nx, ny)
    out, f = [], 2
    while g % f == 0:
        out.append(f)
        f *= 2
    return out


def scale_texts(nx: int, ny: int, dx: float) -> list[str]:
    """Configured scale lengths ("100 m", ...) for every power-of-two factor of the grid."""
    return [f"{f * dx:g} m" for f in power_factors(nx, ny)]


def label_of(length_m: float) -> str:
    """Store label of a length, as lesprep writes it (``1600m``)."""
    return f"{length_m:.6g}m".replace("+", "")


_OPS: dict[str, Callable[[float, float], bool]] = {
    "<": operator.lt,
    "<=": operator.le,
    ">=": operator.ge,
}


def comparison(ratio: float, op: str, limit: float, *, suffix: str = "", **extra: Any) -> dict:
    """A comparison record: the measured ratio, the target as text and whether it is met."""
    return {
        "ratio": ratio,
        "target": f"{op} {limit:g}{suffix}",
        "met": bool(_OPS[op](ratio, limit)),
        **extra,
    }
