"""Progress lines of long jobs: fractions, rate and time left with a fake clock; one line
per output time from a real ingest and coarsening, and in the job's log file."""

from __future__ import annotations

import logging
import re
from pathlib import Path
from types import SimpleNamespace

import netCDF4
import numpy as np
import pytest

from lesprep.canonical.ingest import ingest_case
from lesprep.progress import (
    ProgressReport,
    StepProgress,
    format_duration,
    format_size,
    progress_report,
)
from lesprep.raw.archive import index_archive
from lesprep.raw.varmap import load_varmap
from lesprep.scales.coarsen import coarsen_case
from lesprep.scales.reader import FineReader
from lesprep.scales.spec import parse_scales
from lesprep.store import open_store
from settings_helpers import coarsen_settings, ingest_settings

REPO = Path(__file__).resolve().parents[1]
BETA = REPO / "config/varmaps/flavour-beta.yaml"
CASE = "sc-ostra-02"  # flavour beta: one file per variable, a time-invariant p profile
LOGGER = "lesprep.test.progress"


def fake_clock(readings):
    """A clock returning the given readings in turn (the first one starts the tracker)."""
    it = iter(readings)
    return lambda: next(it)


# ------------------------------------------------------------------ the arithmetic


def test_fractions_rate_and_time_left_with_a_fake_clock(caplog):
    caplog.set_level(logging.INFO, logger=LOGGER)
    step = 2_000_000
    clock = fake_clock([10.0, 12.0, 14.5, 17.0, 20.0])  # steps end 2, 4.5, 7 and 10 s in
    tracker = StepProgress("ingest c1", 4, step, logger=logging.getLogger(LOGGER), clock=clock)
    reports = [tracker.done(j) for j in range(4)]
    # by hand: after k steps, k * 2e6 bytes in t_k seconds; left = (4 - k) * t_k / k
    elapsed = [2.0, 4.5, 7.0, 10.0]
    for k, (r, t) in enumerate(zip(reports, elapsed, strict=True), start=1):
        assert (r.completed, r.total, r.nbytes) == (k, 4, k * step)
        assert r.fraction == k / 4
        assert r.elapsed_s == pytest.approx(t)
        assert r.rate_bytes_s == pytest.approx(k * step / t)
        assert r.left_s == pytest.approx((4 - k) * t / k)
    assert [r.left_s for r in reports] == pytest.approx([6.0, 4.5, 7.0 / 3, 0.0])
    assert [r.finished for r in reports] == [False, False, False, True]
    lines = [r.getMessage() for r in caplog.records if r.name == LOGGER]
    assert len(lines) == 4
    # first line: 2 MB in 2 s is 1.0 MB/s; 3 steps of 2 s each are left
    assert lines[0] == (
        "ingest c1: time 1/4 (25%), 2.0 MB read in 2.0 s, 1.0 MB/s, about 6.0 s left"
    )
    # third: 6 MB in 7 s = 0.857 MB/s; one step of 7/3 s left
    assert lines[2] == (
        "ingest c1: time 3/4 (75%), 6.0 MB read in 7.0 s, 0.9 MB/s, about 2.3 s left"
    )
    # last: 8 MB in 10 s = 0.8 MB/s, no estimate but "done"
    assert lines[3] == "ingest c1: time 4/4 (100%), 8.0 MB read in 10.0 s, 0.8 MB/s, done"
    assert all("left" not in ln for ln in lines[3:]) and all("done" not in ln for ln in lines[:3])


def test_uneven_steps_and_a_clock_that_has_not_moved(caplog):
    caplog.set_level(logging.INFO, logger=LOGGER)
    clock = fake_clock([5.0, 5.0, 9.0, 11.0])
    tracker = StepProgress("coarsen c2", 3, 0, logger=logging.getLogger(LOGGER), clock=clock)
    first = tracker.done(0, 3_000_000)
    assert first.rate_bytes_s is None and first.left_s == 0.0  # no time on the clock yet
    assert "rate not measurable yet" in caplog.records[-1].getMessage()
    second = tracker.done(1, 5_000_000)
    # 8 MB in 4 s; one step of 4/2 s left
    assert second.nbytes == 8_000_000 and second.rate_bytes_s == pytest.approx(2_000_000)
    assert second.left_s == pytest.approx(2.0)
    assert "8.0 MB read in 4.0 s, 2.0 MB/s, about 2.0 s left" in caplog.records[-1].getMessage()
    third = tracker.done(2)  # the tracker's own step size, here 0
    assert third.nbytes == 8_000_000 and third.finished


def test_long_durations_and_large_sizes_read_as_minutes_hours_and_gigabytes():
    assert format_duration(9.06) == "9.1 s"
    assert format_duration(65.0) == "1 min 05 s"
    assert format_duration(59.97) == "1 min 00 s"
    assert format_duration(2 * 3600 + 7 * 60 + 10) == "2 h 07 min"
    assert format_size(412_600_000) == "412.6 MB"
    assert format_size(48_213_000_000) == "48.21 GB"
    # 100 steps of 1.5 GB, 40 done in 20 min: 60 steps of 30 s left, 50 MB/s
    r = progress_report(40, 100, 40 * 1_500_000_000, 1200.0)
    assert r.left_s == pytest.approx(1800.0) and r.rate_bytes_s == pytest.approx(50e6)
    assert format_duration(r.left_s) == "30 min 00 s"


def test_impossible_counts_are_refused():
    log = logging.getLogger(LOGGER)
    with pytest.raises(ValueError, match="expected at least one step"):
        StepProgress("ingest c1", 0, 10, logger=log)
    with pytest.raises(ValueError, match="step 5 of 4"):
        progress_report(5, 4, 0, 1.0)
    with pytest.raises(ValueError, match="negative"):
        progress_report(1, 4, 0, -1.0)


# ------------------------------------------------------------------ real jobs


def raw_bytes_of_kept_times(folder: Path, n_kept: int) -> int:
    """Bytes an ingest of ``n_kept`` times reads, from the raw files' own sizes: the
    kept share of every time-dependent variable, and the p profile once per time."""
    vm = load_varmap(BETA)
    raw_names = {spec.raw for spec in vm.variables.values()}
    total = 0
    seen: list[str] = []
    for path in sorted(folder.glob("*.nc")):
        with netCDF4.Dataset(path) as nc:
            for name in raw_names & set(nc.variables):
                seen.append(name)
                var = nc.variables[name]
                nbytes = int(np.prod(var.shape)) * var.dtype.itemsize
                if "time" in var.dimensions:
                    total += nbytes * n_kept // nc.dimensions["time"].size
                else:
                    total += nbytes * n_kept
    assert sorted(seen) == sorted(raw_names)  # one file per variable, all times in it
    return total


def test_raw_bytes_per_time_of_a_file_per_time_archive(demo_root):
    """Flavour alpha: every variable of a time in one file, w on nz + 1 faces."""
    files = sorted((demo_root / "sc-ostra-01").glob("*.nc"))
    vm = load_varmap(REPO / "config/varmaps/flavour-alpha.yaml")
    cat = index_archive(
        files,
        vm,
        case="sc-ostra-01",
        time_gaps="warn",
        duplicate_times="error",
        restart_order="name",
    )
    try:
        got = cat.time_step_bytes()
    finally:
        cat.close()
    with netCDF4.Dataset(files[-1]) as nc:
        per_file = [nc.variables[spec.raw] for spec in vm.variables.values()]
        expected = sum(int(np.prod(v.shape)) * v.dtype.itemsize for v in per_file)
        n_times = nc.dimensions["time"].size
    assert n_times == 1 and len(files) > 1
    assert got == expected


@pytest.fixture(scope="module")
def ingested(tmp_path_factory, demo_root):
    """A small ingest and coarsening with their log records."""
    out = tmp_path_factory.mktemp("progress")
    handler = _Collect()
    root = logging.getLogger("lesprep")
    level = root.level
    root.addHandler(handler)
    root.setLevel(logging.INFO)
    try:
        canon = ingest_case(
            case=CASE,
            raw=str(demo_root / CASE / "*.nc"),
            varmap=BETA,
            settings=ingest_settings(spinup="1 h", cloud_threshold="1e-5 kg/kg"),
            out=out / "canonical.zarr",
        )
        settings = coarsen_settings(scales=tuple(parse_scales(["100 m", "400 m"])))
        coarsen_case(canon, {lab: out / f"{lab}.zarr" for lab in settings.labels}, settings)
    finally:
        root.removeHandler(handler)
        root.setLevel(level)
    return canon, settings, handler.records


class _Collect(logging.Handler):
    def __init__(self) -> None:
        super().__init__(logging.INFO)
        self.records: list[logging.LogRecord] = []

    def emit(self, record: logging.LogRecord) -> None:
        self.records.append(record)


def _reports(records, logger) -> list[ProgressReport]:
    return [r.progress for r in records if r.name == logger and hasattr(r, "progress")]


def test_ingest_logs_one_line_per_kept_time(ingested, demo_root):
    canon, _, records = ingested
    n = open_store(canon).sizes["time"]
    reports = _reports(records, "lesprep.canonical.ingest")
    assert [r.completed for r in reports] == list(range(1, n + 1))
    assert {r.total for r in reports} == {n}
    assert reports[-1].finished and not reports[0].finished
    assert reports[-1].nbytes == raw_bytes_of_kept_times(demo_root / CASE, n)
    lines = [r.getMessage() for r in records if hasattr(r, "progress")]
    assert lines[0].startswith(f"ingest {CASE}: time 1/{n} (")


def test_coarsening_logs_one_line_per_time(ingested):
    canon, settings, records = ingested
    fine = open_store(canon)
    n = fine.sizes["time"]
    reports = _reports(records, "lesprep.scales.coarsen")
    assert [r.completed for r in reports] == list(range(1, n + 1))
    with FineReader(canon, settings) as reader:
        names = (*reader.names, *reader.surface, "lwp")
    per_time = sum(fine[v].isel(time=0).nbytes for v in names)
    assert per_time >= sum(fine[v].isel(time=0).nbytes for v in ("qc", "qv", "T", "w", "rh"))
    assert [r.nbytes for r in reports] == [k * per_time for k in range(1, n + 1)]
    assert all(r.left_s >= 0 for r in reports) and reports[-1].left_s == 0


@pytest.fixture
def restore_logging():
    """Put the root logger and numba's thread count back after a job's set-up."""
    import numba

    root = logging.getLogger()
    handlers, level, threads = list(root.handlers), root.level, numba.get_num_threads()
    yield
    for h in root.handlers:
        if h not in handlers:
            h.close()
    root.handlers[:] = handlers
    root.setLevel(level)
    numba.set_num_threads(threads)


def test_the_lines_land_in_the_rule_log_file(ingested, tmp_path, restore_logging):
    from lesprep.jobs.steps import run

    canon, settings, _ = ingested
    log_file = tmp_path / "logs" / "coarsen" / "case.log"
    smk = SimpleNamespace(
        log=[str(log_file)],
        params=SimpleNamespace(settings={"coarsen": settings.to_dict()}),
        input=SimpleNamespace(canonical=str(canon)),
        output=SimpleNamespace(stores=[str(tmp_path / f"{lab}.zarr") for lab in settings.labels]),
        threads=1,
    )
    run("coarsen", smk)
    n = open_store(canon).sizes["time"]
    line = re.compile(rf"INFO lesprep\.scales\.coarsen: coarsen {CASE}: time (\d+)/{n} \(")
    found = [int(m.group(1)) for m in map(line.search, log_file.read_text().splitlines()) if m]
    assert found == list(range(1, n + 1))
