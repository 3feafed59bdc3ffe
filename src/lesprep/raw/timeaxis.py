"""The output-time axis of a raw archive: gaps, irregular intervals and restart overlaps.

Real archives are not always regular: a file may be missing in the middle (0, 1, 2, 3, 5,
6, 7 h), the output interval may change, and a restarted simulation often writes the
times after its last restart point twice. This module finds each of these; what to do
about them is the ingest settings' choice (``time_gaps``, ``duplicate_times``,
``restart_order``).

Conventions
-----------
* The usual interval is the median of the differences between consecutive output times.
* A difference within 0.1 % of a whole multiple ``m >= 2`` of the usual interval is a gap:
  ``m - 1`` output times are missing, at the multiples of the interval in between. Any
  other difference that is not within 0.1 % of the interval is irregular.
* Two output times closer than 1e-6 of the largest time (at least 1e-6 s) are the same
  time: a duplicate.
"""

from __future__ import annotations

import os
from collections.abc import Sequence
from dataclasses import dataclass, field
from pathlib import Path
from typing import Literal

import numpy as np
import pandas as pd

_REL = 1e-3


@dataclass(frozen=True)
class TimeAxisReport:
    """What the output times show: the usual interval, missing times, irregular steps."""

    interval_s: float | None
    missing_s: tuple[float, ...] = ()
    irregular: tuple[tuple[float, float], ...] = ()

    @property
    def regular(self) -> bool:
        """No gap and no irregular interval."""
        return not self.missing_s and not self.irregular

    def describe(self) -> str:
        """One sentence naming the missing times, the irregular steps and the interval."""
        parts = []
        if self.missing_s:
            shown = ", ".join(f"{t:g}" for t in self.missing_s[:10])
            more = f" and {len(self.missing_s) - 10} more" if len(self.missing_s) > 10 else ""
            parts.append(f"output time(s) {shown}{more} s are missing")
        if self.irregular:
            shown = ", ".join(f"{a:g} -> {b:g} s" for a, b in self.irregular[:10])
            parts.append(f"irregular interval(s) {shown}")
        return "; ".join(parts) + f" (the usual interval is {self.interval_s:g} s)"

    def to_dict(self) -> dict[str, object]:
        """Plain form for provenance."""
        return {
            "interval_s": self.interval_s,
            "missing_s": list(self.missing_s),
            "irregular_s": [list(p) for p in self.irregular],
        }


def check_intervals(times: Sequence[float]) -> TimeAxisReport:
    """Find gaps and irregular intervals in sorted, distinct output times (seconds).

    Examples
    --------
    >>> r = check_intervals([0.0, 3600.0, 7200.0, 10800.0, 18000.0, 21600.0])
    >>> r.interval_s, r.missing_s, r.irregular
    (3600.0, (14400.0,), ())
    >>> check_intervals([0.0, 60.0, 130.0, 180.0]).irregular
    ((60.0, 130.0), (130.0, 180.0))
    """
    t = np.asarray(times, dtype=np.float64)
    if t.size < 3:
        return TimeAxisReport(interval_s=float(t[1] - t[0]) if t.size == 2 else None)
    d = np.diff(t)
    step = float(np.median(d))
    missing: list[float] = []
    irregular: list[tuple[float, float]] = []
    for a, b, dt in zip(t[:-1], t[1:], d, strict=True):
        m = round(dt / step)
        if abs(dt - step) <= _REL * step:
            continue
        if m >= 2 and abs(dt - m * step) <= _REL * step:
            missing.extend(float(a + k * step) for k in range(1, m))
        else:
            irregular.append((float(a), float(b)))
    return TimeAxisReport(interval_s=step, missing_s=tuple(missing), irregular=tuple(irregular))


@dataclass(frozen=True)
class Overlap:
    """An output time found in several files, and which copy is kept."""

    time_s: float
    kept: str
    dropped: tuple[str, ...]


def file_ranks(files: Sequence[Path], order: Literal["mtime", "name"]) -> list[int]:
    """Rank of each file in restart order (higher is later): by modification time (ties by
    name) or by file name."""
    if order == "name":
        keys = [(p.name, str(p)) for p in files]
    else:
        keys = [(os.stat(p).st_mtime_ns, p.name) for p in files]  # type: ignore[misc]
    ordered = sorted(range(len(files)), key=lambda i: keys[i])
    ranks = [0] * len(files)
    for r, i in enumerate(ordered):
        ranks[i] = r
    return ranks


@dataclass
class DuplicateResolver:
    """Keep, for every output time present in several files, the copy of the later file."""

    files: Sequence[Path]
    ranks: Sequence[int]
    overlaps: dict[float, Overlap] = field(default_factory=dict)

    def resolve(
        self, items: list[tuple[float, int, int]], tol: float
    ) -> list[tuple[float, int, int]]:
        """``(time, file index, index in file)`` items, sorted, one per time (the later file's)."""
        items = sorted(items, key=lambda it: (it[0], self.ranks[it[1]]))
        out: list[tuple[float, int, int]] = []
        group: list[tuple[float, int, int]] = []
        for it in items:
            if group and it[0] - group[0][0] > tol:
                out.append(self._keep(group))
                group = []
            group.append(it)
        if group:
            out.append(self._keep(group))
        return out

    def _keep(self, group: list[tuple[float, int, int]]) -> tuple[float, int, int]:
        best = max(group, key=lambda it: self.ranks[it[1]])
        if len(group) > 1:
            t = round(best[0], 6)
            dropped = tuple(sorted({self.files[it[1]].name for it in group if it is not best}))
            self.overlaps.setdefault(t, Overlap(t, self.files[best[1]].name, dropped))
        return best

    def describe(self, order: str) -> str:
        """One sentence naming the overlapping times and the files kept and dropped."""
        by_files: dict[tuple[str, tuple[str, ...]], list[float]] = {}
        for o in self.overlaps.values():
            by_files.setdefault((o.kept, o.dropped), []).append(o.time_s)
        parts = [
            f"time(s) {', '.join(f'{t:g}' for t in sorted(ts))} s from {kept} "
            f"(dropped the copy in {', '.join(dropped)})"
            for (kept, dropped), ts in sorted(by_files.items())
        ]
        rule = "modified later" if order == "mtime" else "later in file-name order"
        return (
            f"{len(self.overlaps)} output time(s) appear in two files (a restart overlap); "
            f"kept the copy of the file {rule}: " + "; ".join(parts)
        )


NOMINAL_ORIGIN = "1970-01-01 00:00:00"
"""Reference time of the stores of an archive whose times are plain durations since the
start of the run (units ``s``, no calendar date): CF 4.4 needs ``<unit> since <date>``,
so those stores count from this nominal date, which stands for the start of the run and
is not a real date."""

RUN_START = "start of run"
"""The origin an archive index reports for plain durations (see :data:`NOMINAL_ORIGIN`)."""


def cf_time_units(origin: str) -> str:
    """CF time units of times in seconds since an archive's origin (CF 4.4).

    Parameters
    ----------
    origin
        ISO date of the archive's time origin, or ``"start of run"`` when the archive's
        times are plain durations (then :data:`NOMINAL_ORIGIN` stands in for it).

    Returns
    -------
    str
        ``"seconds since YYYY-MM-DD hh:mm:ss"`` (UTC; fractional seconds when there are).

    Examples
    --------
    >>> cf_time_units("2031-06-01T06:30:00")
    'seconds since 2031-06-01 06:30:00'
    >>> cf_time_units("start of run")
    'seconds since 1970-01-01 00:00:00'
    """
    if origin == RUN_START:
        return f"seconds since {NOMINAL_ORIGIN}"
    ts = pd.Timestamp(origin)
    if ts.tzinfo is not None:
        ts = ts.tz_convert("UTC").tz_localize(None)
    text = ts.strftime("%Y-%m-%d %H:%M:%S")
    if ts.microsecond or ts.nanosecond:
        text += f".{ts.microsecond:06d}{ts.nanosecond:03d}".rstrip("0")
    return f"seconds since {text}"


def cf_time_attrs(origin: str) -> dict[str, str]:
    """CF attributes of a store's ``time`` coordinate (seconds since ``origin``).

    The values are what the archive index gives (seconds since the archive's origin), so
    the stored numbers do not depend on the origin; the ``units`` tell a reader which
    date time zero is. ``time_origin`` repeats the archive's origin as read. A simulation's
    clock has no leap seconds (CF 1.11 4.4.3: ``units_metadata = "leap_seconds: none"``).
    """
    attrs = {
        "standard_name": "time",
        "long_name": "time",
        "units": cf_time_units(origin),
        "calendar": "standard",
        "units_metadata": "leap_seconds: none",
        "axis": "T",
        "time_origin": origin,
    }
    if origin == RUN_START:
        attrs["long_name"] = "time since the start of the run"
        attrs["comment"] = (
            "the raw archive gives its times as durations since the start of the run, with "
            f"no calendar date; CF needs a reference date, so {NOMINAL_ORIGIN} stands for "
            "the start of the run: it is a nominal date, not when the simulated day was"
        )
    return attrs
