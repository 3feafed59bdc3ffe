"""Storage trials (codecs, chunks, sample-store layouts) and profiles of one step."""

from __future__ import annotations

import time
from collections.abc import Mapping, Sequence
from pathlib import Path
from typing import Any

from helpers import MIB, STORE, dir_bytes, file_count, remove
from workers import import_lesprep, w_coarsen, w_ingest

_CODECS: tuple[tuple[str, dict[str, Any]], ...] = (
    ("none", {"codec": "none"}),
    ("blosc-lz4 1", {"codec": "blosc-lz4", "clevel": 1}),
    ("blosc-lz4 3", {"codec": "blosc-lz4", "clevel": 3}),
    ("blosc-lz4 5", {"codec": "blosc-lz4", "clevel": 5}),
    ("blosc-zstd 1", {"codec": "blosc-zstd", "clevel": 1}),
    ("blosc-zstd 3", {"codec": "blosc-zstd", "clevel": 3}),
    ("blosc-zstd 5", {"codec": "blosc-zstd", "clevel": 5}),
    ("zstd 0", {"codec": "zstd", "clevel": 0}),
    ("zstd 3", {"codec": "zstd", "clevel": 3}),
)


def _store_trial(
    data: Any,
    path: Path,
    *,
    chunks: tuple[int, ...],
    store_cfg: Mapping[str, Any],
    shards: tuple[int, ...] | None = None,
    windows: Sequence[tuple[int, int]] = (),
    level: int | None = None,
    repeat: int = 3,
) -> dict[str, Any]:
    """Write ``data`` to a fresh array and read it back, ``repeat`` times each (fastest kept)."""
    import numpy as np
    import zarr

    import_lesprep()
    from lesprep.store import StoreSettings, compressors

    writes, reads = [], []
    for _ in range(repeat):
        remove(path)
        t0 = time.perf_counter()
        arr = zarr.create_array(
            store=str(path),
            shape=data.shape,
            chunks=chunks,
            shards=shards,
            dtype=data.dtype,
            compressors=compressors(StoreSettings.from_dict(store_cfg)),
            fill_value=0,
            zarr_format=3,
        )
        arr[...] = data
        writes.append(time.perf_counter() - t0)
    size = dir_bytes(path)
    for _ in range(repeat):
        t0 = time.perf_counter()
        back = zarr.open_array(str(path), mode="r")[...]
        reads.append(time.perf_counter() - t0)
    write_s, read_s = min(writes), min(reads)
    row: dict[str, Any] = {
        "write_s": write_s,
        "read_s": read_s,
        "bytes": int(data.nbytes),
        "stored_bytes": size,
        "ratio": data.nbytes / max(size, 1),
        "files": file_count(path),
        "write_gbps": data.nbytes / 1e9 / write_s,
        "read_gbps": data.nbytes / 1e9 / read_s,
        "lossless": bool(np.array_equal(back, data)),
    }
    del back
    a = zarr.open_array(str(path), mode="r")
    if level is not None:
        times = []
        for _ in range(repeat):
            t0 = time.perf_counter()
            a[0, level]
            times.append(time.perf_counter() - t0)
        row["read_level_s"] = min(times)
    if windows:
        times = []
        for _ in range(repeat):
            t0 = time.perf_counter()
            for lo, hi in windows:
                a[lo:hi]
            times.append(time.perf_counter() - t0)
        row["read_batches_s"] = min(times)
        row["batches"] = len(windows)
    remove(path)
    return row


def w_storage(
    *, canonical: str, scale_store: str, tmp: str, n_samples: int, chunk_mib: float
) -> dict[str, Any]:
    """Codecs, chunk shapes and sharding on the case's own fields and a sample array."""
    import numpy as np
    import zarr

    t0 = time.perf_counter()
    tmpdir = Path(tmp)
    remove(tmpdir)
    tmpdir.mkdir(parents=True)
    g = zarr.open_group(canonical, mode="r")
    nt, nz, ny, nx = g["qc"].shape
    j = nt // 2
    fields = {n: g[n][j : j + 1] for n in ("qc", "w", "T")}
    canon_chunk = g["qc"].chunks
    sc = zarr.open_group(scale_store, mode="r")
    rng = np.random.default_rng(7)
    samples: dict[str, Any] = {}
    for name in ("w_var", "qc_mean", "T_mean"):
        flat = sc[name][...].reshape(-1)
        samples[f"sample {name}"] = flat[rng.integers(0, flat.size, min(n_samples, flat.size))]
    del flat
    codec_rows = []
    for fname, data in {**fields, **samples}.items():
        chunks = canon_chunk if data.ndim == 4 else (min(data.size, int(chunk_mib * MIB) // 4),)
        for cname, cfg in _CODECS:
            row = _store_trial(data, tmpdir / "c.zarr", chunks=chunks, store_cfg=cfg)
            row.update({"field": fname, "codec": cname, "chunks": list(chunks)})
            codec_rows.append(row)
    chunk_rows = []
    default = dict(STORE)
    zc = canon_chunk[1]
    variants = {
        "(1, nz, ny, nx)": (1, nz, ny, nx),
        f"(1, {zc}, ny, nx) lesprep 32 MiB": (1, zc, ny, nx),
        "(1, nz/4, ny, nx)": (1, max(1, nz // 4), ny, nx),
        "(1, 1, ny, nx)": (1, 1, ny, nx),
    }
    for fname in ("qc", "T"):
        for vname, chunks in variants.items():
            row = _store_trial(
                fields[fname], tmpdir / "k.zarr", chunks=chunks, store_cfg=default, level=nz // 2
            )
            row.update({"stage": "canonical", "field": fname, "chunks": vname})
            chunk_rows.append(row)
    coarse = sc["T_mean"][...]
    cnt, cnz, cny, cnx = coarse.shape
    czc = sc["T_mean"].chunks[1]
    cvariants = {
        "(1, nz, ny, nx)": (1, cnz, cny, cnx),
        f"(1, {czc}, ny, nx) lesprep 32 MiB": (1, czc, cny, cnx),
        "(1, nz/4, ny, nx)": (1, max(1, cnz // 4), cny, cnx),
        "(nt, 1, ny, nx)": (cnt, 1, cny, cnx),
    }
    for vname, chunks in cvariants.items():
        row = _store_trial(
            coarse, tmpdir / "k.zarr", chunks=chunks, store_cfg=default, level=cnz // 2
        )
        row.update({"stage": f"coarse {Path(scale_store).name} T_mean", "chunks": vname})
        chunk_rows.append(row)
    del coarse
    shard_rows = []
    small = 8192  # what sets.py picks with 16 x 16 float32 patches in the store (8 MiB / 1 KiB)
    big = int(chunk_mib * MIB) // 4  # what it picks for 1-D features alone
    data = samples["sample w_var"]
    n = data.size
    windows = [(int(lo), int(lo) + small) for lo in rng.integers(0, max(1, n - small), 256)]
    for vname, chunks, shards in (
        (f"chunks {small}", (min(small, n),), None),
        (f"chunks {big}", (min(big, n),), None),
        (f"chunks {small}, shards of 64", (min(small, n),), (min(64 * small, n),)),
        (f"chunks {small}, shards of 256", (min(small, n),), (min(256 * small, n),)),
    ):
        if shards is not None and shards[0] % chunks[0]:
            continue
        row = _store_trial(
            data,
            tmpdir / "s.zarr",
            chunks=chunks,
            store_cfg=default,
            shards=shards,
            windows=windows,
        )
        row.update({"stage": "sample w_var", "layout": vname})
        shard_rows.append(row)
    remove(tmpdir)
    return {
        "time_s": time.perf_counter() - t0,
        "codecs": codec_rows,
        "chunks": chunk_rows,
        "sharding": shard_rows,
        "field_time_index": j,
    }


def w_profile(*, kind: str, params: dict[str, Any], top: int = 25) -> dict[str, Any]:
    """cProfile of ingest_case or coarsen_case (outputs to a scratch place, removed)."""
    import cProfile
    import io
    import pstats

    prof = cProfile.Profile()
    fn = {"ingest": w_ingest, "coarsen": w_coarsen}[kind]
    prof.enable()
    res = fn(**params)
    prof.disable()
    texts = {}
    for key in ("cumulative", "tottime"):
        buf = io.StringIO()
        pstats.Stats(prof, stream=buf).strip_dirs().sort_stats(key).print_stats(top)
        texts[key] = buf.getvalue()
    stats = pstats.Stats(prof)
    phases: dict[str, float] = {}
    wanted = {
        "ingest": (
            "canonical_step",
            "read_field",
            "open_raw",
            "catalogue",
            "check_finite",
            "check_range",
            "cell_diagnostics",
            "value_extent",
            "convert",
            "temperature_from_potential_temperature",
            "destagger_vertical",
            "cloud_mask",
            "apply",
            "add",
            "flush",
            "create_store",
            "file_record",
            "consolidate",
        ),
        "coarsen": (
            "slabs",
            "add_slab",
            "finish",
            "hierarchical_moments",
            "hierarchical_means",
            "extract_patches",
            "relative_humidity",
            "sundqvist_cloud_fraction",
            "vertical_derivative",
            "variance_and_skewness",
            "_layout",
            "create_store",
            "add",
            "flush",
            "consolidate",
        ),
    }[kind]
    for (file, _, func), (_, _, _, ct, _) in stats.stats.items():  # type: ignore[attr-defined]
        if func in wanted and "lesprep" in file:
            key = f"{func} ({Path(file).name})"
            phases[key] = phases.get(key, 0.0) + ct
    astype = sum(
        v[2]
        for (f, _, func), v in stats.stats.items()
        if "astype" in func  # type: ignore
    )
    phases["numpy astype (self)"] = astype
    return {**res, "profile": texts, "phases_cumulative_s": phases}
