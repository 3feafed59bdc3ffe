"""Training-store layouts and set assembly against its I/O floor, measured on demo cases.

Run from the repository root::

    .venv/bin/python benchmarks/set_layout.py --quick     # 120 x 120 x 48, 3 times
    .venv/bin/python benchmarks/set_layout.py             # 300 x 300 x 96, 6 times

Two invented demo cases (flavour alpha) are generated, ingested and coarsened by lesprep
to 200 m (features only) and 500 m (features and 10 x 10 patches of ``qc`` and ``w``);
they are kept under ``<out>/data/<size>/`` and reused. Then:

``layout``
    The 500 m train store of both cases is assembled (natural order) in each layout of
    :data:`LAYOUTS`; for each: assembly time, size on disk, file count, and two shuffled
    read patterns with batches of 256: whole read units in random order, each shuffled in
    memory and cut into batches ("units"), and 256 random samples per batch through
    zarr's orthogonal selection ("random", as many batches as fit in ``--random-budget``
    seconds).
``assembly``
    The train job (``build_set`` and its normalization statistics) with the schema's
    defaults at 200 m and 500 m against its I/O floor:
    read every array the set takes from the per-case stores once (whole arrays, the
    arrays concurrently), plus write lesprep's set store once more into a store of the
    same layout and codecs (values read from lesprep's store untimed, whole read units,
    arrays concurrently). The page cache is warmed with the inputs before each timed step
    and dirty pages are flushed after it.
``profile``
    ``build_set`` at 200 m under cProfile (main thread; the top functions are printed).
"""

from __future__ import annotations

import argparse
import cProfile
import io
import json
import os
import pstats
import shutil
import sys
import time
from collections.abc import Callable, Mapping, Sequence
from concurrent.futures import ThreadPoolExecutor
from pathlib import Path
from typing import Any

import numpy as np

HERE = Path(__file__).resolve().parent
sys.path.insert(0, str(HERE))

from helpers import ROOT, STORE, dir_bytes, file_count, remove, warm  # noqa: E402

CASES = ("sc-ostra-01", "cu-marro-01")  # invented demo cases, both flavour alpha
VARMAP = ROOT / "config" / "varmaps" / "flavour-alpha.yaml"
SCALES = ("200 m", "500 m")
LABELS = ("200m", "500m")
BATCH = 256
LAYOUTS: dict[str, dict[str, Any]] = {
    "(a) one chunk length, 8 MiB of the widest": {
        "chunking": "widest",
        "chunk_mib": 8.0,
        "shard_mib": 0.0,
    },
    "(b) per-array chunks of 8 MiB": {"chunking": "per-array", "chunk_mib": 8.0, "shard_mib": 0.0},
    "(c) shards of 64 MiB, per-array chunks of 1 MiB": {
        "chunking": "per-array",
        "chunk_mib": 1.0,
        "shard_mib": 64.0,
    },
    "(d) shards of 64 MiB, per-array chunks of 8 MiB": {
        "chunking": "per-array",
        "chunk_mib": 8.0,
        "shard_mib": 64.0,
    },
    "(e) shards of 16 MiB, per-array chunks of 1 MiB": {
        "chunking": "per-array",
        "chunk_mib": 1.0,
        "shard_mib": 16.0,
    },
    "(f) shards of 64 MiB, per-array chunks of 0.25 MiB": {
        "chunking": "per-array",
        "chunk_mib": 0.25,
        "shard_mib": 64.0,
    },
}


def parse_args(argv: Sequence[str] | None = None) -> argparse.Namespace:
    p = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    p.add_argument("--quick", action="store_true", help="120 x 120 x 48, 3 times")
    p.add_argument("--nx", type=int, default=None)
    p.add_argument("--nz", type=int, default=None)
    p.add_argument("--ntimes", type=int, default=None)
    p.add_argument("--out", default=str(HERE / "out" / "sets"), help="data and results")
    p.add_argument("--only", default="layout,assembly,profile", help="subset of the steps")
    p.add_argument("--threads", type=int, default=2, help="threads of build_set and floors")
    p.add_argument("--random-budget", type=float, default=10.0, help="s of random batches")
    p.add_argument("--layouts", default="", help="comma-separated letters (default: all)")
    a = p.parse_args(argv)
    nx, nz, nt = (120, 48, 3) if a.quick else (300, 96, 6)
    a.nx, a.nz, a.ntimes = a.nx or nx, a.nz or nz, a.ntimes or nt
    if a.nx % 20:
        p.error("--nx must be a multiple of 20 (200 m and 500 m blocks of 50 m cells)")
    return a


# ============================================================================ inputs


def settings_of(**sets: Any) -> Any:
    """The workflow's settings, built from the schema's defaults like the workflow does."""
    from lesprep.jobs.settings import WorkflowSettings

    return WorkflowSettings.from_config(
        {
            "cases": "unused.tsv",
            "ingest": {"spinup": "0 s", "cloud_threshold": "1e-5 kg/kg"},
            "coarsen": {
                "scales": list(SCALES),
                "patches": {"variables": ["qc", "w"], "scales": ["500 m"], "size": 10},
            },
            "sets": sets,
            "store": dict(STORE),
        }
    )


def prepare(a: argparse.Namespace) -> dict[str, dict[str, Path]]:
    """Per-case scale stores (label -> case -> path), generated once per size."""
    from lesprep.canonical.ingest import ingest_case
    from lesprep.demo import demo_case, write_demo_case
    from lesprep.scales.coarsen import coarsen_case

    size = f"{a.nx}x{a.nx}x{a.nz}x{a.ntimes}"
    root = Path(a.out) / "data" / size
    done = root / "done.json"
    stores = {lab: {c: root / c / f"scale-{lab}.zarr" for c in CASES} for lab in LABELS}
    if done.exists():
        return stores
    remove(root)
    ws = settings_of()
    for c in CASES:
        t0 = time.perf_counter()
        spec = demo_case(c).with_size(nx=a.nx, ny=a.nx, nz=a.nz, ntimes=a.ntimes)
        raw = write_demo_case(spec, root / "raw")
        canon = ingest_case(
            case=c,
            raw=str(raw / "*.nc"),
            varmap=VARMAP,
            settings=ws.ingest,
            out=root / c / "canonical.zarr",
        )
        coarsen_case(canon, {lab: stores[lab][c] for lab in LABELS}, ws.coarsen.for_group("all"))
        shutil.rmtree(raw)
        remove(root / c / "canonical.zarr")
        print(f"prepared {c} at {size} in {time.perf_counter() - t0:.0f} s", flush=True)
    done.write_text(json.dumps({"size": size, "cases": CASES}))
    return stores


# ============================================================================ steps


def timed_build(
    inputs: Mapping[str, Path], out: Path, threads: int, *, train: bool = False, **sets: Any
) -> float:
    """Seconds of one assembly job (inputs warm, dirty pages flushed before and after).

    ``train``: the train job, ``build_set`` and the normalization statistics it collects
    written as JSON and into the store (what the workflow's train job does).
    """
    from lesprep.sets.assemble import build_set, write_normalization

    settings = settings_of(**sets).sets
    remove(out)
    warm(inputs.values())
    os.sync()
    stats: dict[str, Any] = {}
    t0 = time.perf_counter()
    build_set(
        dict(inputs),
        {},
        out,
        settings,
        split="train",
        scale="bench",
        threads=threads,
        statistics=stats if train else None,
    )
    if train:
        write_normalization(out, out.with_suffix(".json"), scale="bench", stats=stats)
    os.sync()
    return time.perf_counter() - t0


def _arrays(path: Path) -> dict[str, Any]:
    import zarr

    return dict(zarr.open_group(str(path), mode="r").arrays())


def read_units(path: Path, threads: int, seed: int = 0) -> dict[str, float]:
    """Every read unit once, in random order, shuffled in memory and cut into batches."""
    import zarr

    root = zarr.open_group(str(path), mode="r")
    arrays = dict(root.arrays())
    n = next(iter(arrays.values())).shape[0]
    unit = int(root.attrs["sample_unit"])
    rng = np.random.default_rng(seed)
    t0 = time.perf_counter()
    batches = 0
    with ThreadPoolExecutor(threads) as pool:
        for u in rng.permutation(-(-n // unit)):
            lo, hi = int(u) * unit, min(n, (int(u) + 1) * unit)
            parts = pool.map(lambda a, lo=lo, hi=hi: a[lo:hi], arrays.values())
            got = dict(zip(arrays, parts, strict=True))
            order = rng.permutation(hi - lo)
            for b in range(0, hi - lo, BATCH):
                pick = order[b : b + BATCH]
                _ = {k: v[pick] for k, v in got.items()}
                batches += 1
    dt = time.perf_counter() - t0
    return {"units_s": dt, "units_samples_per_s": n / dt, "unit": unit, "batches": batches}


def read_random(path: Path, threads: int, budget: float, seed: int = 1) -> dict[str, float]:
    """Batches of 256 random samples (zarr's orthogonal selection), for ``budget`` seconds."""
    arrays = _arrays(path)
    n = next(iter(arrays.values())).shape[0]
    rng = np.random.default_rng(seed)
    done = 0
    t0 = time.perf_counter()
    with ThreadPoolExecutor(threads) as pool:
        while time.perf_counter() - t0 < budget and done < 400:
            idx = np.sort(rng.choice(n, BATCH, replace=False))
            list(pool.map(lambda a, idx=idx: a.oindex[idx], arrays.values()))
            done += 1
    dt = time.perf_counter() - t0
    return {"random_batches": done, "random_samples_per_s": done * BATCH / dt}


def floor(inputs: Mapping[str, Path], made: Path, out: Path, threads: int) -> dict[str, float]:
    """Read the per-case arrays a set takes once, and write ``made``'s arrays once more."""
    import zarr

    from lesprep.sets.assemble import store_layout
    from lesprep.store import open_store

    ds = open_store(next(iter(inputs.values())))
    feats, cols, patches = store_layout(ds)
    ds.close()
    names = [*feats, *cols, *patches]
    warm(inputs.values())
    os.sync()
    t0 = time.perf_counter()
    with ThreadPoolExecutor(threads) as pool:
        for p in inputs.values():
            g = zarr.open_group(str(p), mode="r")
            list(pool.map(lambda n, g=g: g[n][...].nbytes, names))
    read_s = time.perf_counter() - t0
    src = zarr.open_group(str(made), mode="r")
    arrays = dict(src.arrays())
    remove(out)
    write_s = 0.0
    t0 = time.perf_counter()
    root = zarr.open_group(str(out), mode="w", zarr_format=3)
    dst = {
        k: root.create_array(
            k,
            shape=a.shape,
            chunks=a.chunks,
            shards=a.shards,
            dtype=a.dtype,
            compressors=a.compressors,
            fill_value=a.fill_value,
            dimension_names=a.metadata.dimension_names,
            attributes=dict(a.attrs),
        )
        for k, a in arrays.items()
    }
    write_s += time.perf_counter() - t0
    n = next(iter(arrays.values())).shape[0]
    unit = int(src.attrs["sample_unit"])
    with ThreadPoolExecutor(threads) as pool:
        for lo in range(0, n, unit):
            hi = min(n, lo + unit)
            vals = {k: a[lo:hi] for k, a in arrays.items()}  # untimed
            t0 = time.perf_counter()
            sl = slice(lo, hi)
            list(pool.map(lambda k, sl=sl, v=vals: dst[k].__setitem__(sl, v[k]), vals))
            write_s += time.perf_counter() - t0
    t0 = time.perf_counter()
    root.attrs.update(dict(src.attrs))
    zarr.consolidate_metadata(str(out))
    os.sync()
    write_s += time.perf_counter() - t0
    return {"read_s": read_s, "write_s": write_s, "floor_s": read_s + write_s}


def uncompressed_bytes(path: Path) -> int:
    """Bytes of the store's arrays in memory (strings: their UTF-8 length, read once)."""
    total = 0
    for a in _arrays(path).values():
        if np.dtype(a.dtype).kind in "OTU":
            total += a.shape[0] * 8
        else:
            total += int(np.prod(a.shape)) * np.dtype(a.dtype).itemsize
    return total


# ============================================================================ main


def table(headers: Sequence[str], rows: Sequence[Sequence[Any]]) -> str:
    lines = ["| " + " | ".join(headers) + " |", "|" + " --- |" * len(headers)]
    lines += ["| " + " | ".join(str(x) for x in r) + " |" for r in rows]
    return "\n".join(lines)


def step_layout(a: argparse.Namespace, stores: Mapping, results: dict) -> None:
    inputs = stores["500m"]
    rows, out = [], Path(a.out) / "layout.zarr"
    wanted = [s.strip() for s in a.layouts.split(",") if s.strip()]
    for name, lay in LAYOUTS.items():
        if wanted and name[1] not in wanted:
            continue
        build_s = timed_build(inputs, out, a.threads, **lay)
        r = {"build_s": build_s, "bytes": dir_bytes(out), "files": file_count(out)}
        r["raw_bytes"] = uncompressed_bytes(out)
        r.update(read_units(out, a.threads))
        r.update(read_random(out, a.threads, a.random_budget))
        results.setdefault("layout", {})[name] = r
        rows.append(
            [
                name,
                f"{r['bytes'] / 2**20:.0f}",
                r["files"],
                f"{build_s:.1f}",
                f"{r['unit']}",
                f"{r['units_samples_per_s'] / 1e6:.2f}",
                f"{r['random_samples_per_s'] / 1e3:.1f} ({r['random_batches']})",
            ]
        )
        print(table(LAYOUT_HEAD, rows[-1:]).splitlines()[-1], flush=True)
    remove(out)
    print(table(LAYOUT_HEAD, rows))


LAYOUT_HEAD = (
    "layout",
    "MiB on disk",
    "files",
    "assembly s",
    "read unit (samples)",
    "units: M samples/s",
    "random: k samples/s (batches)",
)


def step_assembly(a: argparse.Namespace, stores: Mapping, results: dict) -> None:
    rows = []
    for lab in LABELS:
        out = Path(a.out) / f"set-{lab}.zarr"
        build_s = timed_build(stores[lab], out, a.threads, train=True)
        f = floor(stores[lab], out, Path(a.out) / f"floor-{lab}.zarr", a.threads)
        r = {"build_s": build_s, **f, "bytes": dir_bytes(out), "files": file_count(out)}
        r["ratio"] = build_s / f["floor_s"]
        results.setdefault("assembly", {})[lab] = r
        rows.append(
            [
                lab,
                f"{r['bytes'] / 1e6:.0f}",
                r["files"],
                f"{build_s:.2f}",
                f"{f['read_s']:.2f} + {f['write_s']:.2f} = {f['floor_s']:.2f}",
                f"{r['ratio']:.2f}",
            ]
        )
        remove(Path(a.out) / f"floor-{lab}.zarr")
        remove(out)
    heads = ("scale", "MB on disk", "files", "train job s", "floor s (read + write)", "ratio")
    print(table(heads, rows))


def step_profile(a: argparse.Namespace, stores: Mapping, results: dict) -> None:
    from lesprep.sets.assemble import build_set

    out = Path(a.out) / "profile.zarr"
    remove(out)
    settings = settings_of().sets
    prof = cProfile.Profile()
    prof.enable()
    build_set(dict(stores["200m"]), {}, out, settings, split="train", scale="200m",
              threads=a.threads)  # fmt: skip
    prof.disable()
    remove(out)
    text = io.StringIO()
    pstats.Stats(prof, stream=text).sort_stats("cumulative").print_stats(25)
    print(text.getvalue())
    results["profile"] = text.getvalue()


STEPS: dict[str, Callable[[argparse.Namespace, Mapping, dict], None]] = {
    "layout": step_layout,
    "assembly": step_assembly,
    "profile": step_profile,
}


def main(argv: Sequence[str] | None = None) -> int:
    a = parse_args(argv)
    Path(a.out).mkdir(parents=True, exist_ok=True)
    stores = prepare(a)
    results: dict[str, Any] = {"size": [a.nx, a.nx, a.nz, a.ntimes], "threads": a.threads}
    for name in a.only.split(","):
        STEPS[name.strip()](a, stores, results)
        (Path(a.out) / "results.json").write_text(json.dumps(results, indent=2, default=str))
    return 0


if __name__ == "__main__":
    sys.exit(main())
