"""Benchmark of the batch reader (lesprep.sets.batches) on a large synthetic set store.

    .venv/bin/python benchmarks/reader.py            # 1,048,576 samples, 2.2 GB of arrays
    .venv/bin/python benchmarks/reader.py --quick    # 131,072 samples, for trying

The set has 12 float32 features, the target ``cloud_fraction`` and float32 ``qc_patch``
and ``w_patch`` of 16 x 16 per sample, eight cases in natural order, written the way
``lesprep.sets.assemble`` writes a store (blosc-lz4 level 5, v2-style chunk keys; by
default the assembly's own chunk and shard lengths, ``lesprep.sets.chunking.plan_layout``
with the schema's defaults; ``--layout widest`` instead: one chunk length of
``--chunk-mib`` of the widest sample, shards of ``--shard-chunks`` chunks). One shuffled
epoch at batch size 256 is timed for:

* the reader (two buffer sizes; the consumer only touches each batch);
* a hand-written xarray loop, ``ds[names].isel(sample=idx)`` on ``xr.open_zarr`` (with its
  default dask chunks, and with ``chunks=None``) per batch of a random permutation
  (``--xr-batches`` batches timed, extrapolated to the epoch; the faster one is compared);
* zarr's orthogonal selection of the sorted batch indices per array
  (``get_orthogonal_selection``; ``--oindex-batches`` timed, extrapolated);
* the floor: the same arrays read in order unit by unit and decompressed, no shuffle
  (one thread, and two threads like the reader).

Every measurement runs in a fresh process after the store's files have been read once
(warm page cache); peak memory is that process's ``VmHWM``. The reader's peak is also
measured on a set twice as large. Randomness: mean distinct read units and distinct cases
per batch, against a full random permutation. Results: a table, and JSON in
``<out>/reader.json`` (``benchmarks/out/`` is git-ignored).
"""

from __future__ import annotations

import argparse
import json
import math
import os
import subprocess
import sys
import time
from concurrent.futures import ThreadPoolExecutor
from pathlib import Path
from typing import Any

import numpy as np
from helpers import HERE, MIB, dir_bytes, status_kib, warm

FEATURES = (
    "qt_mean",
    "qt_var",
    "qt_skew",
    "theta_l_mean",
    "theta_l_var",
    "w_mean",
    "w_var",
    "w_skew",
    "qc_mean",
    "qc_var",
    "rh_mean",
    "p_mean",
)
PATCHES = ("qc_patch", "w_patch")
TARGET = "cloud_fraction"
CASES = 8
TARGETS = {"vs_xarray": 10.0, "vs_oindex": 2.0, "vs_floor": 0.5, "memory_growth": 0.20}


# ------------------------------------------------------------------------ the synthetic set


def write_set(
    path: Path, n: int, *, patch: int, chunk_mib: float, shard_chunks: int, layout: str
) -> dict:
    """A set store of ``n`` samples in the layout of the set assembly.

    ``layout="assembly"``: the chunk and shard lengths the assembly gives a store of these
    arrays with the schema's defaults (per-array chunks of 8 MiB in common shards of
    64 MiB); ``"widest"``: one chunk length of ``chunk_mib`` of the widest array, shards of
    ``shard_chunks`` chunks (1: none).
    """
    import zarr

    from lesprep.sets.assemble import COORDS
    from lesprep.sets.chunking import plan_layout
    from lesprep.store import CHUNK_KEYS, StoreSettings, compressors, consolidate

    names = [*FEATURES, TARGET, *PATCHES, "case", "regime", "time", "z", "y", "x"]
    widths = {k: (4 * patch * patch if k in PATCHES else 8 if k in COORDS else 4) for k in names}
    if layout == "assembly":
        plan = plan_layout(widths, n, chunking="per-array", chunk_mib=8.0, shard_mib=64.0)
        lengths, shard = dict(plan.chunks), plan.shard
    else:
        chunk = int(max(1, min(n, chunk_mib * MIB // (4 * patch * patch))))
        lengths = {k: chunk for k in names}
        shard = chunk * shard_chunks if shard_chunks > 1 else None
    codecs = compressors(StoreSettings(codec="blosc-lz4", clevel=5))
    root = zarr.open_group(str(path), mode="w", zarr_format=3)
    arrays = {}
    coords = "case regime time z y x"
    for name in names:
        chunk = lengths[name]
        shape, chunks, dims = (n,), (chunk,), ["sample"]
        if name in PATCHES:
            shape, chunks, dims = (n, patch, patch), (chunk, patch, patch), ["sample", "py", "px"]
        label = name in ("case", "regime")
        arrays[name] = root.create_array(
            name,
            shape=shape,
            chunks=chunks,
            shards=None if shard is None else (shard, *chunks[1:]),
            dtype=str if label else ("float64" if name in COORDS else "float32"),
            compressors=codecs,
            fill_value="" if label else 0.0,
            dimension_names=dims,
            chunk_key_encoding=CHUNK_KEYS,
        )
        if name not in COORDS:
            arrays[name].attrs["coordinates"] = coords
    per_case = math.ceil(n / CASES)
    block = shard or max(lengths.values())
    rng = np.random.default_rng(0)
    stats: dict[str, list[float]] = {}
    for lo in range(0, n, block):
        hi = min(n, lo + block)
        m = hi - lo
        idx = np.arange(lo, hi)
        data: dict[str, np.ndarray] = {}
        for k, name in enumerate([*FEATURES, TARGET]):
            data[name] = (k + rng.standard_normal(m, dtype=np.float32)).astype(np.float32)
        data[TARGET] = np.clip(data[TARGET] - len(FEATURES), 0, 1)
        coarse = rng.standard_normal((m, 4, 4), dtype=np.float32)
        f = math.ceil(patch / 4)
        up = np.repeat(np.repeat(coarse, f, axis=1), f, axis=2)[:, :patch, :patch]
        data["qc_patch"] = np.maximum(up - 1.0, 0.0).astype(np.float32) * 1e-3
        data["w_patch"] = up + 0.1 * rng.standard_normal(up.shape, dtype=np.float32)
        case = idx // per_case
        data["case"] = np.asarray([f"case-{c:02d}" for c in range(CASES)])[case]
        data["regime"] = np.where(case % 2 == 0, "cumulus", "stratocumulus")
        local = idx - case * per_case
        data["x"] = 1000.0 * (local % 32)
        data["y"] = 1000.0 * ((local // 32) % 32)
        data["z"] = 100.0 * ((local // 1024) % 40)
        data["time"] = 600.0 * (local // 40960)
        if lo == 0:  # statistics of the first block stand in for the train statistics
            stats = {
                k: [float(np.mean(v)), float(np.std(v))]
                for k, v in data.items()
                if k in (*FEATURES, TARGET, *PATCHES)
            }
        with ThreadPoolExecutor(2) as pool:
            for f in [
                pool.submit(arrays[k].__setitem__, slice(lo, hi), v) for k, v in data.items()
            ]:
                f.result()
    doc = {"statistics": {k: {"mean": mu, "std": sd, "count": 0} for k, (mu, sd) in stats.items()}}
    root.attrs.update(
        {
            "sample_labels": ["case", "regime"],
            "normalization": json.dumps(doc),
            "sample_order": "case, time, z, y, x",
        }
    )
    consolidate(path)
    return {"samples": n, "chunks": lengths, "shard": shard}


def payload_bytes(n: int, patch: int) -> int:
    """Uncompressed bytes of the arrays every method delivers (features, target, patches)."""
    return n * 4 * (len(FEATURES) + 1 + len(PATCHES) * patch * patch)


# ------------------------------------------------------------------------ measured steps


def _result(t: float, n: int, batches: int, params: dict, **extra: Any) -> dict:
    return {
        "seconds": t,
        "samples": n,
        "batches": batches,
        "samples_per_s": n / t,
        "gbps": payload_bytes(n, params["patch"]) / t / 1e9,
        "vmhwm_mib": status_kib("VmHWM") / 1024,
        **extra,
    }


def w_reader(p: dict) -> dict:
    from lesprep.sets.batches import BatchReader

    r = BatchReader(
        p["store"],
        features=FEATURES,
        patches=PATCHES,
        target=TARGET,
        batch_size=p["batch"],
        seed=1,
        buffer_units=p["buffer_units"],
        read_threads=p.get("threads", 2),
    )
    per_case = math.ceil(r.n_samples / CASES)  # the synthetic cases (not read: memory)
    t0 = time.perf_counter()
    n, nb = 0, 0
    units, cases = [], []
    for b in r.epoch_batches(0):
        _ = b["qc_patch"][0, 0, 0]
        ids = b["sample"]
        n, nb = n + ids.size, nb + 1
        units.append(np.unique(ids // r.unit).size)
        cases.append(np.unique(ids // per_case).size)
    t = time.perf_counter() - t0
    return _result(
        t,
        n,
        nb,
        p,
        unit=r.unit,
        distinct_units=float(np.mean(units)),
        distinct_cases=float(np.mean(cases)),
    )


def _permutation_batches(n: int, batch: int, seed: int = 1) -> list[np.ndarray]:
    perm = np.random.default_rng(seed).permutation(n)
    return [perm[i : i + batch] for i in range(0, n, batch)]


def w_xarray(p: dict) -> dict:
    import warnings

    import xarray as xr

    warnings.filterwarnings("ignore")
    ds = xr.open_zarr(p["store"], **({} if p["dask"] else {"chunks": None}))
    names = [*FEATURES, TARGET, *PATCHES]
    batches = _permutation_batches(ds.sizes["sample"], p["batch"])
    k = min(p["timed_batches"], len(batches))
    t0 = time.perf_counter()
    for idx in batches[:k]:
        sub = ds[names].isel(sample=idx)
        out = {v: sub[v].values for v in names}
        _ = out["qc_patch"][0, 0, 0]
    t = time.perf_counter() - t0
    n = ds.sizes["sample"]
    scale = len(batches) / k
    return _result(t * scale, n, len(batches), p, timed_batches=k, timed_seconds=t)


def w_oindex(p: dict) -> dict:
    import zarr

    root = zarr.open_group(p["store"], mode="r")
    names = [*FEATURES, TARGET, *PATCHES]
    arrays = {v: root[v] for v in names}
    n = arrays[TARGET].shape[0]
    batches = _permutation_batches(n, p["batch"])
    k = min(p["timed_batches"], len(batches))
    t0 = time.perf_counter()
    for idx in batches[:k]:
        s = np.sort(idx)
        out = {
            v: a.get_orthogonal_selection((s, *[slice(None)] * (a.ndim - 1)))
            for v, a in arrays.items()
        }
        _ = out["qc_patch"][0, 0, 0]
    t = time.perf_counter() - t0
    scale = len(batches) / k
    return _result(t * scale, n, len(batches), p, timed_batches=k, timed_seconds=t)


def w_floor(p: dict) -> dict:
    import zarr

    root = zarr.open_group(p["store"], mode="r")
    names = [*FEATURES, TARGET, *PATCHES]
    arrays = {v: root[v] for v in names}
    n = arrays[TARGET].shape[0]
    unit = max((a.shards or a.chunks)[0] for a in arrays.values())
    tasks = [(v, lo) for lo in range(0, n, unit) for v in names]

    def read(task: tuple[str, int]) -> None:
        v, lo = task
        _ = arrays[v][lo : lo + unit]

    t0 = time.perf_counter()
    if p["threads"] == 1:
        for task in tasks:
            read(task)
    else:
        with ThreadPoolExecutor(p["threads"]) as pool:
            list(pool.map(read, tasks))
    t = time.perf_counter() - t0
    return _result(t, n, 0, p, threads=p["threads"])


def w_full_permutation(p: dict) -> dict:
    """Distinct units and cases per batch of a full random permutation (no reading)."""
    import zarr

    root = zarr.open_group(p["store"], mode="r")
    n = root[TARGET].shape[0]
    per_case = math.ceil(n / CASES)
    unit = max((root[v].shards or root[v].chunks)[0] for v in [*FEATURES, *PATCHES])
    batches = _permutation_batches(n, p["batch"])
    return {
        "distinct_units": float(np.mean([np.unique(b // unit).size for b in batches])),
        "distinct_cases": float(np.mean([np.unique(b // per_case).size for b in batches])),
        "unit": unit,
    }


WORKERS = {
    "reader": w_reader,
    "xarray": w_xarray,
    "oindex": w_oindex,
    "floor": w_floor,
    "permutation": w_full_permutation,
}


def run_worker(name: str, params: dict) -> dict:
    """Run one measured step in a fresh interpreter; its JSON result."""
    warm([params["store"]])
    cmd = [
        sys.executable,
        str(Path(__file__).resolve()),
        "--worker",
        name,
        "--params",
        json.dumps(params),
    ]
    res = subprocess.run(cmd, capture_output=True, text=True, env=os.environ.copy())
    if res.returncode != 0:
        raise RuntimeError(f"worker {name} failed:\n{res.stderr[-3000:]}")
    return json.loads(res.stdout.strip().splitlines()[-1])


# ------------------------------------------------------------------------ the run


def main() -> int:
    ap = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    ap.add_argument("--quick", action="store_true", help="131,072 samples")
    ap.add_argument("--samples", type=int, help="samples of the set (default 2**20)")
    ap.add_argument("--patch", type=int, default=16)
    ap.add_argument(
        "--chunk-mib",
        type=float,
        default=8.0,
        help="target chunk MiB of the widest array (the set default, 8)",
    )
    ap.add_argument(
        "--layout",
        choices=("assembly", "widest"),
        default="assembly",
        help="assembly: the set assembly's default layout; widest: --chunk-mib "
        "of the widest array, --shard-chunks chunks per shard",
    )
    ap.add_argument("--shard-chunks", type=int, default=1, help="chunks per shard (1: none)")
    ap.add_argument("--batch", type=int, default=256)
    ap.add_argument("--buffers", default="4,16", help="buffer_units of the reader runs")
    ap.add_argument("--xr-batches", type=int, default=8)
    ap.add_argument("--oindex-batches", type=int, default=16)
    ap.add_argument("--no-double", action="store_true", help="skip the 2x memory set")
    ap.add_argument("--out", type=Path, default=HERE / "out" / "reader")
    ap.add_argument("--worker", help=argparse.SUPPRESS)
    ap.add_argument("--params", help=argparse.SUPPRESS)
    a = ap.parse_args()
    if a.worker:
        print(json.dumps(WORKERS[a.worker](json.loads(a.params))))
        return 0
    n = a.samples or (2**17 if a.quick else 2**20)
    a.out.mkdir(parents=True, exist_ok=True)
    layout = (
        f"p{a.patch}-assembly"
        if a.layout == "assembly"
        else f"p{a.patch}-c{a.chunk_mib:g}-s{a.shard_chunks}"
    )
    results: dict[str, Any] = {
        "samples": n,
        "patch": a.patch,
        "batch": a.batch,
        "layout": layout,
        "payload_gb": payload_bytes(n, a.patch) / 1e9,
        "targets": TARGETS,
        "runs": {},
    }
    sets = {"1x": (a.out / f"set-{n}-{layout}.zarr", n)}
    if not a.no_double:
        sets["2x"] = (a.out / f"set-{2 * n}-{layout}.zarr", 2 * n)
    for key, (path, m) in sets.items():
        marker = path / "done.json"
        if not marker.exists():
            t0 = time.perf_counter()
            info = write_set(
                path,
                m,
                patch=a.patch,
                chunk_mib=a.chunk_mib,
                shard_chunks=a.shard_chunks,
                layout=a.layout,
            )
            info["write_s"] = time.perf_counter() - t0
            info["disk_gb"] = dir_bytes(path) / 1e9
            marker.write_text(json.dumps(info))
            print(f"wrote {path.name}: {info}", flush=True)
        results[f"store_{key}"] = json.loads(marker.read_text())
    base = {"store": str(sets["1x"][0]), "batch": a.batch, "patch": a.patch}
    runs = results["runs"]
    for b in (int(x) for x in a.buffers.split(",")):
        runs[f"reader b={b}"] = run_worker("reader", {**base, "buffer_units": b})
    runs["floor 1 thread"] = run_worker("floor", {**base, "threads": 1})
    runs["floor 2 threads"] = run_worker("floor", {**base, "threads": 2})
    runs["zarr oindex"] = run_worker("oindex", {**base, "timed_batches": a.oindex_batches})
    runs["xarray isel"] = run_worker(
        "xarray", {**base, "timed_batches": a.xr_batches, "dask": True}
    )
    runs["xarray isel, no dask"] = run_worker(
        "xarray", {**base, "dask": False, "timed_batches": a.xr_batches}
    )
    results["full_permutation"] = run_worker("permutation", base)
    if "2x" in sets:
        b0 = int(a.buffers.split(",")[0])
        runs[f"reader b={b0}, 2x set"] = run_worker(
            "reader", {**base, "store": str(sets["2x"][0]), "buffer_units": b0}
        )
    reader_keys = [k for k in runs if k.startswith("reader b=") and "2x" not in k]
    best = max(runs[k]["samples_per_s"] for k in reader_keys)
    floor = max(runs["floor 1 thread"]["samples_per_s"], runs["floor 2 threads"]["samples_per_s"])
    results["ratios"] = {
        "reader_over_xarray": best
        / max(runs["xarray isel"]["samples_per_s"], runs["xarray isel, no dask"]["samples_per_s"]),
        "reader_over_oindex": best / runs["zarr oindex"]["samples_per_s"],
        "reader_over_floor": best / floor,
    }
    if "2x" in sets:
        one = runs[reader_keys[0]]["vmhwm_mib"]
        two = runs[f"reader b={b0}, 2x set"]["vmhwm_mib"]
        results["ratios"]["memory_growth_2x"] = two / one - 1
    print(
        f"\nset: {n} samples, {results['payload_gb']:.2f} GB of feature/target/patch "
        f"arrays ({results['store_1x']['disk_gb']:.2f} GB on disk), layout {layout}, unit "
        f"{runs[reader_keys[0]]['unit']} samples, batch {a.batch}"
    )
    rows = []
    for k, r in runs.items():
        note = f"{r['timed_batches']} batches timed" if "timed_batches" in r else ""
        if "distinct_units" in r:
            note = f"units/batch {r['distinct_units']:.1f}, cases/batch {r['distinct_cases']:.2f}"
        rows.append(
            [
                k,
                f"{r['seconds']:.1f}",
                f"{r['samples_per_s']:,.0f}",
                f"{r['gbps']:.3f}",
                f"{r['vmhwm_mib']:.0f}",
                note,
            ]
        )
    fp = results["full_permutation"]
    rows.append(
        [
            "full permutation",
            "",
            "",
            "",
            "",
            f"units/batch {fp['distinct_units']:.1f}, cases/batch {fp['distinct_cases']:.2f}",
        ]
    )
    head = ["method", "epoch s", "samples/s", "GB/s", "VmHWM MiB", "note"]
    widths = [max(len(str(r[i])) for r in [head, *rows]) for i in range(len(head))]
    for r in [head, ["-" * w for w in widths], *rows]:
        print(" | ".join(str(c).ljust(w) for c, w in zip(r, widths, strict=True)))
    print()
    for k, v in results["ratios"].items():
        print(f"{k}: {v:.3f}")
    (a.out / "reader.json").write_text(json.dumps(results, indent=2))
    print(f"\nJSON: {a.out / 'reader.json'}")
    return 0


if __name__ == "__main__":
    sys.exit(main())
