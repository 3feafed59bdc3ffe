"""Time segments of a case: which output times each ingest and coarsening job takes.

A case with a raw archive is split into *segments* of consecutive kept output times, a
configured number each (``segments.times``), counted from the case's first kept output
time: segment ``t0024-0047`` holds kept times 24 to 47. Membership is by index, so it is
stable as output files are appended: a new file adds times to the last segment (which
then re-runs) or opens new segments; earlier segments keep their inputs and are not
re-run.

The plan is made when the workflow is planned, from the raw file list, by the same
archive index the ingest uses (:func:`lesprep.raw.archive.index_archive`: time units and
origin, restart overlaps, gaps, spin-up), so a dry-run lists every job and no job count
depends on data produced during the run. The index of an unchanged archive is cached
(``<results>/.plan/<case>.json``, keyed by every file's path, size and modification
time).

A raw file modified less than ``segments.settle_s`` seconds before planning is taken to
be still written by a running simulation: it is left for the next run, with a message.
"""

from __future__ import annotations

import hashlib
import json
import logging
import os
import time
from collections.abc import Sequence
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import numpy as np

from lesprep.canonical.ingest import kept_times
from lesprep.canonical.settings import IngestSettings
from lesprep.errors import ConfigError
from lesprep.raw.archive import index_archive
from lesprep.raw.varmap import VariableMap, load_varmap

log = logging.getLogger(__name__)

PLAN_VERSION = 1
"""Bumped when the cached plan's content changes."""


@dataclass(frozen=True, kw_only=True)
class SegmentSettings:
    """How cases are split in time.

    Attributes
    ----------
    times
        Kept output times per segment (0: a case is one segment).
    settle_s
        A raw file modified less than this many seconds ago is left for the next run.
    """

    times: int
    settle_s: float

    def __post_init__(self) -> None:
        if self.times < 0:
            raise ConfigError(f"segments.times is {self.times}; expected >= 0 (0: no split)")
        if self.settle_s < 0:
            raise ConfigError(f"segments.settle_s is {self.settle_s:g}; expected >= 0")

    def to_dict(self) -> dict[str, Any]:
        """Plain form; :meth:`from_dict` inverts it."""
        return {"times": self.times, "settle_s": self.settle_s}

    @classmethod
    def from_dict(cls, d: dict[str, Any]) -> SegmentSettings:
        """Inverse of :meth:`to_dict`."""
        return cls(times=int(d["times"]), settle_s=float(d["settle_s"]))


@dataclass(frozen=True, kw_only=True)
class Segment:
    """One segment of a case.

    Attributes
    ----------
    name
        ``t<first>-<last>`` of its nominal range of kept-time indices (zero-padded).
    index
        Position of the segment (0 for the first).
    start
        Index of its first kept time among the case's kept times.
    times
        Its kept output times (s since the case's time origin).
    files
        The raw files it reads: those holding its times, and those holding the case's
        first output time and first kept time (time origin and first-time decisions).
    first_time, first_kept
        The case's first output time and first kept output time (s).
    """

    name: str
    index: int
    start: int
    times: tuple[float, ...]
    files: tuple[str, ...]
    first_time: float
    first_kept: float

    def to_dict(self) -> dict[str, Any]:
        """Plain form (job params); :meth:`from_dict` inverts it."""
        return {
            "name": self.name,
            "index": self.index,
            "start": self.start,
            "times": list(self.times),
            "files": list(self.files),
            "first_time": self.first_time,
            "first_kept": self.first_kept,
        }

    @classmethod
    def from_dict(cls, d: dict[str, Any]) -> Segment:
        """Inverse of :meth:`to_dict`."""
        return cls(
            name=d["name"],
            index=int(d["index"]),
            start=int(d["start"]),
            times=tuple(float(t) for t in d["times"]),
            files=tuple(d["files"]),
            first_time=float(d["first_time"]),
            first_kept=float(d["first_kept"]),
        )


@dataclass(frozen=True, kw_only=True)
class CasePlan:
    """The segments of one case and the files left for a later run."""

    case: str
    segments: tuple[Segment, ...]
    waiting: tuple[str, ...] = ()

    @property
    def names(self) -> list[str]:
        """Segment names, in order."""
        return [s.name for s in self.segments]

    def segment(self, name: str) -> Segment:
        """The segment called ``name``."""
        for s in self.segments:
            if s.name == name:
                return s
        raise KeyError(f"case {self.case!r} has no segment {name!r} (it has {self.names})")


def segment_name(index: int, size: int, width: int = 4) -> str:
    """Name of segment ``index`` of ``size`` kept times.

    Examples
    --------
    >>> segment_name(1, 24)
    't0024-0047'
    """
    a = index * size
    return f"t{a:0{width}d}-{a + size - 1:0{width}d}"


def settled(
    files: Sequence[Path], settle_s: float, *, now: float | None = None
) -> tuple[list[Path], list[Path]]:
    """Split files into those to use and those modified within ``settle_s`` seconds of
    ``now`` (still being written)."""
    t = time.time() if now is None else now
    use, wait = [], []
    for f in files:
        (wait if t - f.stat().st_mtime < settle_s else use).append(f)
    return use, wait


def _fingerprint(files: Sequence[Path], extra: Any) -> str:
    h = hashlib.sha256()
    for f in files:
        st = f.stat()
        h.update(f"{f}\0{st.st_size}\0{st.st_mtime_ns}\n".encode())
    h.update(json.dumps(extra, sort_keys=True, default=str).encode())
    return h.hexdigest()


def archive_times(
    files: Sequence[Path],
    varmap: VariableMap,
    settings: IngestSettings,
    *,
    case: str,
    cache: Path | None = None,
) -> tuple[list[float], list[list[int]]]:
    """Every output time of an archive (s since its origin) and, per time, the indices of
    the files holding it (all time-dependent variables), from the archive index the
    ingest uses; cached in ``cache`` while no file changes."""
    key = _fingerprint(files, [PLAN_VERSION, varmap.to_dict(), settings.to_dict()])
    if cache is not None and cache.exists():
        try:
            data = json.loads(cache.read_text())
            if data.get("key") == key:
                return data["times"], data["files_of"]
        except (OSError, ValueError):
            pass
    cat = index_archive(
        list(files),
        varmap,
        case=case,
        time_gaps=settings.time_gaps,
        duplicate_times=settings.duplicate_times,
        restart_order=settings.restart_order,
    )
    times = [float(t) for t in cat.times]
    files_of: list[set[int]] = [set() for _ in times]
    static: set[int] = set()
    for where in cat.where.values():
        if len(where) == 1 and where[0][1] == -1:
            static.add(where[0][0])
            continue
        for ti, (fi, _) in enumerate(where):
            files_of[ti].add(fi)
    out = [sorted(s | static) for s in files_of]
    cat.close()
    if cache is not None:
        cache.parent.mkdir(parents=True, exist_ok=True)
        tmp = cache.with_suffix(f".tmp{os.getpid()}")
        tmp.write_text(json.dumps({"key": key, "times": times, "files_of": out}))
        tmp.replace(cache)
    return times, out


def plan_case(
    case: str,
    files: Sequence[str | Path],
    varmap: str | Path | VariableMap,
    ingest: IngestSettings,
    segments: SegmentSettings,
    *,
    cache: Path | None = None,
    now: float | None = None,
) -> CasePlan:
    """The segments of a case with a raw archive.

    Parameters
    ----------
    case
        Case id.
    files
        Its raw files (sorted).
    varmap
        Its variable map.
    ingest
        Its ingest settings (spin-up, time-axis policies).
    segments
        Segment size and settle time.
    cache
        File caching the archive index between plannings.
    now
        The planning time (s since the epoch; default: now).

    Returns
    -------
    CasePlan
        With no segment when no output time is past the spin-up yet (logged).
    """
    paths = sorted(Path(f) for f in files)
    use, wait = settled(paths, segments.settle_s, now=now)
    for f in wait:
        log.warning(
            "case %s: %s was modified less than %g s ago and may still be written by the "
            "simulation; it is left for the next run",
            case,
            f,
            segments.settle_s,
        )
    if not use:
        return CasePlan(case=case, segments=(), waiting=tuple(map(str, wait)))
    vm = varmap if isinstance(varmap, VariableMap) else load_varmap(varmap)
    times, files_of = archive_times(use, vm, ingest, case=case, cache=cache)
    t = np.asarray(times)
    if t.size < 2 or ingest.spinup_s >= t[-1] - t[0]:
        log.warning(
            "case %s: no output time past the spin-up of %g s yet (%d output time(s)); "
            "nothing to do until more output arrives",
            case,
            ingest.spinup_s,
            t.size,
        )
        return CasePlan(case=case, segments=(), waiting=tuple(map(str, wait)))
    keep = kept_times(t, ingest.spinup_s, case=case)
    size = segments.times if segments.times > 0 else int(keep.size)
    out = []
    always = set(files_of[0]) | set(files_of[int(keep[0])])
    for index, a in enumerate(range(0, keep.size, size)):
        idx = keep[a : a + size]
        held = set(always)
        for ti in idx:
            held |= set(files_of[int(ti)])
        out.append(
            Segment(
                name=segment_name(index, size) if segments.times > 0 else "all",
                index=index,
                start=a,
                times=tuple(float(t[i]) for i in idx),
                files=tuple(str(use[i]) for i in sorted(held)),
                first_time=float(t[0]),
                first_kept=float(t[keep[0]]),
            )
        )
    return CasePlan(case=case, segments=tuple(out), waiting=tuple(map(str, wait)))
