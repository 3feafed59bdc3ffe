"""Benchmark suite of lesprep's performance targets, in one run.

Run from the repository root::

    /tmp/venv/bin/python benchmarks/run.py                 # 512 x 512 x 160, 12 times
    /tmp/venv/bin/python benchmarks/run.py --quick         # 256 x 256 x 80, 6 times

Every measured step runs in a fresh worker process (this script, re-run with ``--worker``), so
the peak resident memory of one step (the kernel's high-water mark ``VmHWM`` of the worker,
read from ``/proc/self/status`` when the step ends) is not polluted by another. Before each
timed step the page cache is warmed with the step's inputs and dirty pages are flushed
(``os.sync``), so the numbers are warm-cache numbers and a step does not pay for the previous
step's write-back. Each comparison is wrapped so a failure is printed and the run goes on; each
worker has a timeout. See ``benchmarks/README.md`` for what is compared and why.
"""

from __future__ import annotations

import argparse
import sys
import time
from collections.abc import Sequence
from pathlib import Path

from helpers import HERE
from runner import code_identity, worker_main
from suite import Suite

# =============================================================================== main


def parse_args(argv: Sequence[str] | None = None) -> argparse.Namespace:
    p = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    p.add_argument("--nx", type=int, default=None)
    p.add_argument("--ny", type=int, default=None)
    p.add_argument("--nz", type=int, default=None)
    p.add_argument("--ntimes", type=int, default=None)
    p.add_argument("--quick", action="store_true", help="256 x 256 x 80, 6 times")
    p.add_argument("--out", default=str(HERE / "out"), help="data, profiles and results")
    p.add_argument("--json", default=None, help="results JSON (default: <out>/results.json)")
    p.add_argument("--skip-generate", action="store_true", help="use the archive as it is")
    p.add_argument(
        "--only",
        default="ingest,coarsen,xarray,memory,storage,profile",
        help="comma-separated subset of: ingest, coarsen, xarray, memory, storage, profile",
    )
    p.add_argument("--step-timeout", type=float, default=1200.0, help="seconds per worker")
    p.add_argument(
        "--repeat",
        type=int,
        default=2,
        help="runs of each side of the ingest and coarsening pairs (fastest kept)",
    )
    p.add_argument(
        "--xr-budget",
        type=float,
        default=600.0,
        help="run the xarray script on all times only if 1 time x ntimes fits in this (s)",
    )
    p.add_argument("--xr-times", type=int, default=0, help="force the xarray script's times")
    p.add_argument(
        "--memory-mode",
        choices=("auto", "extend", "subset"),
        default="auto",
        help="extend: a 4x longer archive of copied files; subset: ntimes/4 of the files",
    )
    p.add_argument("--mem-extend-max-gb", type=float, default=8.0)
    p.add_argument(
        "--worker-env",
        action="append",
        default=[],
        metavar="KEY=VALUE",
        help="extra environment of the worker processes (e.g. glibc MALLOC_* tunables)",
    )
    p.add_argument("--samples", type=int, default=2**24, help="values of the 1-D sample array")
    p.add_argument(
        "--settle-free",
        type=float,
        default=2.0,
        metavar="GIB",
        help="before every step read the archive into the page cache until free memory is "
        "below this (GiB; 0: off)",
    )
    p.add_argument("--keep", action="store_true", help="keep the xarray and memory outputs")
    p.add_argument("--worker", default=None, help=argparse.SUPPRESS)
    p.add_argument("--params", default=None, help=argparse.SUPPRESS)
    p.add_argument("--result", default=None, help=argparse.SUPPRESS)
    a = p.parse_args(argv)
    base = (256, 256, 80, 6) if a.quick else (512, 512, 160, 12)
    for name, default in zip(("nx", "ny", "nz", "ntimes"), base, strict=True):
        if getattr(a, name) is None:
            setattr(a, name, default)
    if a.json is None:
        a.json = str(Path(a.out) / "results.json")
    return a


def main(argv: Sequence[str] | None = None) -> int:
    args = parse_args(argv)
    if args.worker:
        return worker_main(args.worker, args.params, args.result)
    Path(args.out).mkdir(parents=True, exist_ok=True)
    gi = Path(args.out) / ".gitignore"
    if not gi.exists():
        gi.write_text("*\n")
    suite = Suite(args)
    t0 = time.perf_counter()
    print(
        f"lesprep benchmarks: {args.nx} x {args.ny} x {args.nz}, {args.ntimes} times -> "
        f"{suite.data}",
        flush=True,
    )
    try:
        suite.setup()
    except Exception as exc:
        print(f"!! setup failed: {exc}")
        suite.r.results["errors"]["setup"] = str(exc)
        suite.r.save()
        return 1
    only = {s.strip() for s in args.only.split(",") if s.strip()}
    plan = [
        ("ingest", "3. ingest vs its I/O floor", suite.ingest),
        ("coarsen", "2. coarsening vs its I/O floor", suite.coarsen),
        ("xarray", "1. coarsening vs a hand-written xarray script", suite.xarray),
        ("memory", "4. peak memory vs run length", suite.memory),
        ("storage", "5. storage choices", suite.storage),
        ("profile", "profiles (cProfile) of ingest_case and coarsen_case", suite.profile),
    ]
    for key, title, fn in plan:
        if key in only:
            suite.r.attempt(title, fn)
    suite.r.results["total_s"] = time.perf_counter() - t0
    end = code_identity()
    if end["src_sha256"] != suite.r.results.get("code", {}).get("src_sha256"):
        print("!! lesprep's source changed during the run: the steps measured mixed versions")
        suite.r.results["code_at_end"] = end
    suite.summary()
    print(f"total {suite.r.results['total_s'] / 60:.1f} min")
    return 0


if __name__ == "__main__":
    sys.exit(main())
