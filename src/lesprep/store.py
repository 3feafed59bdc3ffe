"""Zarr stores: codecs, chunking, atomic publication and reading.

Every store is written into a hidden temporary sibling (``.<name>.tmp-<id>``) and
renamed into place only when complete, so a killed job never leaves a store that looks
finished. Stale temporary siblings of killed runs are removed before a new write.
Stores are Zarr format 3 with consolidated metadata.
"""

from __future__ import annotations

import contextlib
import os
import shutil
import uuid
import warnings
from collections.abc import Iterator, Mapping
from pathlib import Path
from typing import Any

import xarray as xr
import zarr
from zarr.codecs import BloscCodec, ZstdCodec

TMP_TAG = ".tmp-"


def compressors(store_cfg: Mapping[str, Any] | None = None) -> tuple[Any, ...]:
    """zarr 3 compressor list from the config's ``store`` section.

    ``blosc-lz4`` (default), ``blosc-zstd`` (both with byte shuffle), ``zstd`` or
    ``none``; ``clevel`` sets the level.
    """
    cfg = dict(store_cfg or {})
    codec = cfg.get("codec", "blosc-lz4")
    level = int(cfg.get("clevel", 5))
    if codec == "none":
        return ()
    if codec == "zstd":
        return (ZstdCodec(level=level),)
    cname = {"blosc-lz4": "lz4", "blosc-zstd": "zstd"}[codec]
    return (BloscCodec(cname=cname, clevel=level, shuffle="shuffle"),)


def _tmp_sibling(final: Path) -> Path:
    return final.with_name(f".{final.name}{TMP_TAG}{os.getpid()}-{uuid.uuid4().hex[:8]}")


def stale_temporaries(final: Path) -> list[Path]:
    """Temporary siblings left by killed writers of ``final``."""
    final = Path(final)
    if not final.parent.exists():
        return []
    prefix = f".{final.name}{TMP_TAG}"
    return sorted(p for p in final.parent.iterdir() if p.name.startswith(prefix))


@contextlib.contextmanager
def atomic_path(final: str | Path) -> Iterator[Path]:
    """Yield a temporary sibling path; rename it to ``final`` when the block succeeds.

    On any exception the temporary is removed and ``final`` is left as it was (absent,
    when Snakemake runs the job). An existing ``final`` is replaced.
    """
    final = Path(final)
    final.parent.mkdir(parents=True, exist_ok=True)
    for stale in stale_temporaries(final):
        _remove(stale)
    tmp = _tmp_sibling(final)
    try:
        yield tmp
    except BaseException:
        _remove(tmp)
        raise
    if final.exists():
        old = final.with_name(f".{final.name}{TMP_TAG}old-{uuid.uuid4().hex[:8]}")
        os.rename(final, old)
        os.rename(tmp, final)
        _remove(old)
    else:
        os.rename(tmp, final)


def _remove(path: Path) -> None:
    if path.is_dir():
        shutil.rmtree(path, ignore_errors=True)
    elif path.exists():
        path.unlink()


def consolidate(path: str | Path) -> None:
    """Write consolidated metadata (the format-3 warning is expected and silenced)."""
    with warnings.catch_warnings():
        warnings.filterwarnings("ignore", message=".*[Cc]onsolidated metadata.*")
        zarr.consolidate_metadata(str(path))


def open_store(path: str | Path, **kwargs: Any) -> xr.Dataset:
    """Open a lesprep store lazily (consolidated metadata, no time decoding)."""
    with warnings.catch_warnings():
        warnings.filterwarnings("ignore", message=".*[Cc]onsolidated metadata.*")
        warnings.filterwarnings("ignore", message=".*not part of the Zarr format 3.*")
        return xr.open_zarr(
            str(path),
            consolidated=True,
            decode_times=False,
            decode_timedelta=False,
            zarr_format=3,
            **kwargs,
        )


def dir_size_bytes(path: str | Path) -> int:
    """Content size of a file or directory tree (a Zarr store) in bytes."""
    path = Path(path)
    if path.is_file():
        return path.stat().st_size
    total = 0
    for root, _, files in os.walk(path):
        for f in files:
            with contextlib.suppress(OSError):
                total += os.stat(os.path.join(root, f)).st_size
    return total
