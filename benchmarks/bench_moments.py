"""Micro-benchmark of block moments: hierarchical vs direct-per-factor, numba vs numpy.

Run from the repository root, e.g.::

    python benchmarks/bench_moments.py --shape 12 160 512 512 --json /tmp/bench.json
    python benchmarks/bench_moments.py --shape 32 512 512 --comoments 4 --repeat 3

Prints a table (wall seconds of the first and of the best run, process CPU seconds and
input throughput of the best run, peak memory traced by ``tracemalloc`` beyond the outputs)
and optionally writes the same rows as JSON. There are no assertions: this measures, it does
not test. The first run of a case can be much slower on a virtual machine whose memory is
backed lazily by the host, because the outputs touch fresh pages; on a shared machine, CPU
seconds well below twice the wall seconds mean the cores were busy with other work.
"""

from __future__ import annotations

import argparse
import json
import os
import platform
import sys
import time
import tracemalloc
from functools import partial
from pathlib import Path

import numpy as np

try:
    from lesprep.scales import comoments, moments
except ImportError:  # running from a checkout without an installed package
    sys.path.insert(0, str(Path(__file__).resolve().parents[1] / "src"))
    from lesprep.scales import comoments, moments

METHODS = ("hierarchical", "direct")


def parse_args(argv: list[str] | None = None) -> argparse.Namespace:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--shape", type=int, nargs="+", default=[12, 160, 512, 512])
    parser.add_argument("--dtype", default="float32", choices=["float32", "float64"])
    parser.add_argument(
        "--factors",
        type=int,
        nargs="+",
        default=None,
        help="block factors (default: powers of two from 2 that divide both horizontal sizes)",
    )
    parser.add_argument("--engines", nargs="+", default=["numba", "numpy"])
    parser.add_argument("--methods", nargs="+", default=list(METHODS), choices=METHODS)
    parser.add_argument(
        "--repeat", type=int, default=2, help="runs per case; the first and the best are shown"
    )
    parser.add_argument("--seed", type=int, default=0)
    parser.add_argument("--json", type=Path, default=None, help="write the rows here as JSON")
    parser.add_argument(
        "--comoments",
        type=int,
        default=0,
        metavar="PAIRS",
        help="instead of the table: time the block co-moments of PAIRS pairs of fields "
        "against hierarchical_moments of one field (see bench_comoments)",
    )
    return parser.parse_args(argv)


def default_factors(ny: int, nx: int) -> list[int]:
    factors = []
    f = 2
    while ny % f == 0 and nx % f == 0:
        factors.append(f)
        f *= 2
    return factors


def make_field(shape: tuple[int, ...], dtype: str, seed: int) -> np.ndarray:
    """A skewed synthetic field (exponential noise plus a smooth wave), made plane by plane."""
    rng = np.random.default_rng(seed)
    out = np.empty(shape, dtype=dtype)
    planes = out.reshape(-1, *shape[-2:])
    ny, nx = shape[-2:]
    wave = (
        np.sin(2 * np.pi * np.arange(nx) / nx)[None, :]
        * np.cos(2 * np.pi * np.arange(ny) / ny)[:, None]
    )
    for p in range(planes.shape[0]):
        planes[p] = rng.standard_exponential((ny, nx), dtype=np.float32) + wave
    return out


def run_case(
    a: np.ndarray, factors: list[int], method: str, engine: str
) -> tuple[float, int, float]:
    """Wall seconds, peak traced bytes and process CPU seconds for one case."""
    tracemalloc.start()
    tracemalloc.reset_peak()
    cpu = time.process_time()
    start = time.perf_counter()
    if method == "hierarchical":
        result = moments.hierarchical_moments(a, factors, engine=engine)
    else:
        result = {f: moments.block_moments(a, f, engine=engine) for f in factors}
    elapsed = time.perf_counter() - start
    cpu = time.process_time() - cpu
    _, peak = tracemalloc.get_traced_memory()
    tracemalloc.stop()
    del result
    return elapsed, peak, cpu


def output_bytes(shape: tuple[int, ...], factors: list[int]) -> int:
    lead = int(np.prod(shape[:-2]))
    return sum(3 * 8 * lead * (shape[-2] // f) * (shape[-1] // f) for f in factors)


def _best_seconds(call, repeat: int) -> tuple[float, float]:
    """Wall seconds of the first and of the best of ``repeat`` calls."""
    times = []
    for _ in range(max(1, repeat)):
        start = time.perf_counter()
        call()
        times.append(time.perf_counter() - start)
    return times[0], min(times)


def _all_hierarchical_comoments(w, others, factors, mom, engine) -> list:
    return [
        comoments.hierarchical_comoments(w, o, factors, mom[0], m, engine=engine)
        for o, m in zip(others, mom[1:], strict=True)
    ]


def _all_block_comoments(w, others, factors, engine) -> list:
    return [comoments.block_comoment(w, o, f, engine=engine) for o in others for f in factors]


def bench_comoments(
    shape: tuple[int, ...] = (32, 512, 512),
    pairs: int = 4,
    factors: list[int] | None = None,
    engines: tuple[str, ...] = ("numba", "numpy"),
    dtype: str = "float32",
    repeat: int = 3,
) -> list[dict]:
    """Time the sub-grid co-moments of ``pairs`` pairs of fields, relative to moments.

    The pairs share one field, as sub-grid fluxes do (``w`` with ``pairs`` others). The
    baseline is ``hierarchical_moments`` of one field (mean, M2, M3 for every factor). The
    co-moments are timed with the ``BlockMoments`` of both fields already computed (what a
    caller has after the moments), as ``hierarchical_comoments`` for all pairs, and, for
    comparison, as ``block_comoment`` per factor computing its own block means (fused first
    pass, no merges). Prints the best of ``repeat`` runs and returns the rows.
    """
    factors = factors or default_factors(shape[-2], shape[-1])
    engines = tuple(e for e in engines if e != "numba" or moments.HAVE_NUMBA)
    fields = [make_field(shape, dtype, seed) for seed in range(pairs + 1)]
    w, others = fields[0], fields[1:]
    if "numba" in engines:  # compile (or load the cache) outside the timings
        small = [f[:1, : max(factors), : max(factors)] for f in fields[:2]]
        mom = [moments.hierarchical_moments(f, factors, engine="numba") for f in small]
        comoments.hierarchical_comoments(*small, factors, *mom, engine="numba")
        comoments.block_comoment(*small, factors[0], engine="numba")
    print(f"co-moments: {pairs} pairs, {dtype} {shape}, factors {factors}, repeat {repeat}")
    header = f"{'engine':<6} {'what':<40} {'best s':>8} {'first s':>8} {'x moments':>10}"
    print(header)
    print("-" * len(header))
    rows = []
    for engine in engines:
        mom = [moments.hierarchical_moments(f, factors, engine=engine) for f in fields]
        cases = {
            "hierarchical_moments, 1 field": partial(
                moments.hierarchical_moments, w, factors, engine=engine
            ),
            f"hierarchical_comoments, {pairs} pairs": partial(
                _all_hierarchical_comoments, w, others, factors, mom, engine
            ),
            f"block_comoment per factor, {pairs} pairs": partial(
                _all_block_comoments, w, others, factors, engine
            ),
        }
        base = None
        for what, call in cases.items():
            first, best = _best_seconds(call, repeat)
            base = best if base is None else base
            rows.append(
                {"engine": engine, "what": what, "best_seconds": best, "first_seconds": first}
            )
            print(f"{engine:<6} {what:<40} {best:8.3f} {first:8.3f} {best / base:10.2f}")
    return rows


def main(argv: list[str] | None = None) -> int:
    args = parse_args(argv)
    shape = tuple(args.shape)
    factors = args.factors or default_factors(shape[-2], shape[-1])
    engines = [e for e in args.engines if e != "numba" or moments.HAVE_NUMBA]
    if args.comoments:
        rows = bench_comoments(
            shape, args.comoments, factors, tuple(engines), args.dtype, max(1, args.repeat)
        )
        if args.json is not None:
            args.json.parent.mkdir(parents=True, exist_ok=True)
            args.json.write_text(json.dumps({"shape": list(shape), "rows": rows}, indent=2))
        return 0

    print(f"making a {args.dtype} field of shape {shape} ...", flush=True)
    a = make_field(shape, args.dtype, args.seed)
    gib = a.nbytes / 2**30
    if "numba" in engines:  # compile (or load the cache) outside the timings
        small = make_field((2, max(factors), max(factors)), args.dtype, 1)
        moments.hierarchical_moments(small, factors, engine="numba")
        moments.block_moments(small, factors[0], engine="numba")

    rows = []
    header = (
        f"{'method':<13} {'engine':<6} {'first s':>8} {'best s':>8} {'cpu s':>7} {'GiB/s':>7}"
        f" {'peak extra MiB':>15}"
    )
    print(f"input {gib:.2f} GiB, factors {factors}, {os.cpu_count()} CPUs, repeat {args.repeat}")
    print(header)
    print("-" * len(header))
    out_bytes = output_bytes(shape, factors)
    for method in args.methods:
        for engine in engines:
            runs = [run_case(a, factors, method, engine) for _ in range(max(1, args.repeat))]
            first = runs[0][0]
            best = min(runs, key=lambda r: r[0])
            seconds, cpu = best[0], best[2]
            peak = max(r[1] for r in runs)
            extra = max(0, peak - out_bytes) / 2**20
            rows.append(
                {
                    "method": method,
                    "engine": engine,
                    "first_seconds": first,
                    "best_seconds": seconds,
                    "best_cpu_seconds": cpu,
                    "all_seconds": [r[0] for r in runs],
                    "input_gib_per_s": gib / seconds,
                    "peak_traced_bytes": peak,
                    "output_bytes": out_bytes,
                }
            )
            print(
                f"{method:<13} {engine:<6} {first:8.2f} {seconds:8.2f} {cpu:7.2f}"
                f" {gib / seconds:7.2f}"
                f" {extra:15.1f}",
                flush=True,
            )

    if args.json is not None:
        report = {
            "shape": list(shape),
            "dtype": args.dtype,
            "factors": factors,
            "cpus": os.cpu_count(),
            "python": platform.python_version(),
            "numpy": np.__version__,
            "rows": rows,
        }
        args.json.parent.mkdir(parents=True, exist_ok=True)
        args.json.write_text(json.dumps(report, indent=2) + "\n")
        print(f"wrote {args.json}")
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
