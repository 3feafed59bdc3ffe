"""Progress lines of a long job: one INFO line per finished output time.

A job that works through a case one output time at a time (ingest, coarsening) creates a
:class:`StepProgress` before its first time and calls :meth:`StepProgress.done` when a
time is complete. Each call logs one line such as::

    coarsen sc-01: time 3/12 (25%), 412.6 MB read in 9.1 s, 45.3 MB/s, about 27.3 s left

so that following the job's log file answers "how far, how fast, how long". Sizes are in
decimal megabytes (1 MB = 10**6 bytes) or gigabytes (10**9 bytes) of *input*, counted
uncompressed; the rate is the mean since the tracker was created; the estimate of the
time left assumes the remaining times take as long, on average, as those done so far
(:func:`progress_report`). The last line says the job is through instead.

Nothing here touches the data: a call costs a clock reading and one formatted line.
"""

from __future__ import annotations

import logging
import time
from collections.abc import Callable
from dataclasses import dataclass

MB = 10**6
"""Bytes per megabyte in the progress lines (decimal)."""


@dataclass(frozen=True)
class ProgressReport:
    """Where a job stands after one finished step.

    Attributes
    ----------
    completed
        Steps finished so far.
    total
        Steps of the whole job.
    nbytes
        Input bytes processed so far (uncompressed).
    elapsed_s
        Seconds since the tracker started.
    rate_bytes_s
        Mean rate so far, ``nbytes / elapsed_s`` in bytes per second; None when no time
        has passed on the clock.
    left_s
        Estimated seconds left: ``(total - completed) * elapsed_s / completed``.
    """

    completed: int
    total: int
    nbytes: int
    elapsed_s: float
    rate_bytes_s: float | None
    left_s: float

    @property
    def fraction(self) -> float:
        """Share of the steps finished, 0 to 1."""
        return self.completed / self.total

    @property
    def finished(self) -> bool:
        """Whether every step is done."""
        return self.completed >= self.total


def progress_report(completed: int, total: int, nbytes: int, elapsed_s: float) -> ProgressReport:
    """The state of a job after ``completed`` of ``total`` steps.

    Parameters
    ----------
    completed
        Steps finished (at least 1).
    total
        Steps of the job (at least ``completed``).
    nbytes
        Input bytes processed in those steps.
    elapsed_s
        Seconds they took, from the start of the job's loop.

    Returns
    -------
    ProgressReport
        With the mean rate ``nbytes / elapsed_s`` and the time left estimated from the
        mean time per step so far, ``(total - completed) * elapsed_s / completed``.

    Raises
    ------
    ValueError
        ``completed`` outside ``1 .. total``, or negative bytes or time.
    """
    if not 1 <= completed <= total:
        raise ValueError(f"progress: step {completed} of {total} (expected 1 to {total})")
    if nbytes < 0 or elapsed_s < 0:
        raise ValueError(
            f"progress: negative size ({nbytes} bytes) or duration ({elapsed_s} s); both "
            "must be zero or more"
        )
    rate = nbytes / elapsed_s if elapsed_s > 0 else None
    left = (total - completed) * elapsed_s / completed
    return ProgressReport(completed, total, nbytes, elapsed_s, rate, left)


def format_duration(seconds: float) -> str:
    """A duration for a log line: ``9.1 s``, ``4 min 05 s`` or ``2 h 07 min``."""
    if seconds < 59.95:
        return f"{seconds:.1f} s"
    whole = round(seconds)
    if whole < 3600:
        return f"{whole // 60} min {whole % 60:02d} s"
    minutes = round(seconds / 60)
    return f"{minutes // 60} h {minutes % 60:02d} min"


def format_size(nbytes: int) -> str:
    """An input size for a log line: decimal MB below 10 GB, GB above."""
    if nbytes < 10_000 * MB:
        return f"{nbytes / MB:.1f} MB"
    return f"{nbytes / (1000 * MB):.2f} GB"


def format_line(label: str, unit: str, report: ProgressReport) -> str:
    """One progress line, e.g. ``ingest c1: time 3/12 (25%), 412.6 MB read in 9.1 s,
    45.3 MB/s, about 27.3 s left``; the last step ends with ``done`` instead of an
    estimate."""
    rate = (
        "rate not measurable yet"
        if report.rate_bytes_s is None
        else f"{report.rate_bytes_s / MB:.1f} MB/s"
    )
    tail = "done" if report.finished else f"about {format_duration(report.left_s)} left"
    return (
        f"{label}: {unit} {report.completed}/{report.total} ({report.fraction:.0%}), "
        f"{format_size(report.nbytes)} read in {format_duration(report.elapsed_s)}, "
        f"{rate}, {tail}"
    )


class StepProgress:
    """Log how far a job is after each of its steps (output times).

    The clock starts when the tracker is created: create it just before the work on the
    first step begins, so that the first line already has a rate and an estimate of the
    time left. The estimate comes from the mean rate so far, i.e. the remaining steps times
    the mean time per finished step (:func:`progress_report`).

    Parameters
    ----------
    label
        What the lines are about, e.g. ``"coarsen sc-01"``.
    total
        Number of steps of the job (at least 1).
    step_bytes
        Input bytes of one step (uncompressed), used when :meth:`done` is given none.
    logger
        Where the lines go (at INFO).
    unit
        What a step is called in the lines.
    clock
        Seconds as a float, monotonic; :func:`time.perf_counter` unless a test injects
        its own.

    Raises
    ------
    ValueError
        ``total`` below 1 or ``step_bytes`` negative.
    """

    def __init__(
        self,
        label: str,
        total: int,
        step_bytes: int,
        *,
        logger: logging.Logger,
        unit: str = "time",
        clock: Callable[[], float] = time.perf_counter,
    ) -> None:
        if total < 1 or step_bytes < 0:
            raise ValueError(
                f"progress of {label}: {total} steps of {step_bytes} bytes (expected at "
                "least one step and a size of zero or more)"
            )
        self.label = label
        self.total = int(total)
        self.step_bytes = int(step_bytes)
        self.unit = unit
        self._log = logger
        self._clock = clock
        self._start = clock()
        self._bytes = 0

    def done(self, index: int, nbytes: int | None = None) -> ProgressReport:
        """Record that step ``index`` (0-based) is finished and log one line.

        Steps finish in order, so ``index + 1`` steps are done.

        Parameters
        ----------
        index
            The step just finished, counted from 0.
        nbytes
            Its input bytes; ``step_bytes`` of the tracker when None.

        Returns
        -------
        ProgressReport
            What the line says; the log record carries it too, as its ``progress``
            attribute.
        """
        self._bytes += self.step_bytes if nbytes is None else int(nbytes)
        report = progress_report(index + 1, self.total, self._bytes, self._clock() - self._start)
        self._log.info("%s", format_line(self.label, self.unit, report), extra={"progress": report})
        return report
