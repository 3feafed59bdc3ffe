"""Reading deflate-compressed NetCDF4 variables on several threads.

Real archives are often zlib-compressed NetCDF4 (HDF5 underneath). The NetCDF and HDF5
libraries serialise their calls, so reading such a file is bound to one core by
decompression (about 0.3 GB/s of output here). Here the compressed chunks that a read
needs are located once through h5py (the chunk index), then read with ``os.pread`` and
inflated with :mod:`zlib` on a thread pool: neither holds the GIL while it works, so the
chunks of one field are decompressed in parallel. Memory in flight is the compressed and
inflated bytes of the chunks being worked on, besides the output array.

Only the common pipeline is taken: deflate, optionally preceded by the byte shuffle, with
every filter applied to every chunk. Anything else (Fletcher32, other compressors, a
skipped filter) returns None and the caller reads through netCDF4 as before.
"""

from __future__ import annotations

import os
import zlib
from concurrent.futures import ThreadPoolExecutor
from dataclasses import dataclass
from functools import lru_cache
from pathlib import Path

import h5py
import numpy as np

from lesprep._jit import HAVE_NUMBA, njit

_SHUFFLE, _DEFLATE = 2, 1  # HDF5 filter ids (H5Z_FILTER_SHUFFLE, H5Z_FILTER_DEFLATE)
THREADS = max(1, min(4, os.cpu_count() or 1))
"""Threads that inflate chunks."""


@lru_cache(maxsize=1)
def _pool() -> ThreadPoolExecutor:
    return ThreadPoolExecutor(max_workers=THREADS, thread_name_prefix="lesprep-inflate")


@dataclass(frozen=True)
class _Chunk:
    offset: tuple[int, ...]
    byte_offset: int
    size: int


@dataclass(frozen=True)
class ChunkLayout:
    """Where the compressed chunks of one variable are, and how they were filtered."""

    shape: tuple[int, ...]
    chunks: tuple[int, ...]
    dtype: np.dtype
    shuffle: bool
    table: tuple[_Chunk, ...]
    fill: float


def chunk_layout(path: str | Path, variable: str) -> ChunkLayout | None:
    """The chunk table of a deflate-compressed variable, or None (not that pipeline).

    The tables of every variable of a file are read in one pass and kept while the file's
    size and modification time stay the same.
    """
    st = os.stat(path)
    return _file_layouts(str(path), st.st_size, st.st_mtime_ns).get(variable)


@lru_cache(maxsize=16)
def _file_layouts(path: str, size: int, mtime_ns: int) -> dict[str, ChunkLayout | None]:
    out: dict[str, ChunkLayout | None] = {}
    try:
        with h5py.File(path, "r") as f:
            for name, ds in f.items():
                if isinstance(ds, h5py.Dataset):
                    out[name] = _layout_of(ds)
    except (OSError, ValueError, TypeError):
        pass
    return out


def _layout_of(ds: h5py.Dataset) -> ChunkLayout | None:
    """The chunk table of one dataset, or None when it is not deflate (+ shuffle)."""
    if ds.chunks is None or ds.compression != "gzip":
        return None
    plist = ds.id.get_create_plist()
    filters = [plist.get_filter(i)[0] for i in range(plist.get_nfilters())]
    if filters not in ([_DEFLATE], [_SHUFFLE, _DEFLATE]):
        return None
    table = []
    for i in range(ds.id.get_num_chunks()):
        info = ds.id.get_chunk_info(i)
        if info.filter_mask != 0:
            return None
        table.append(_Chunk(tuple(info.chunk_offset), info.byte_offset, info.size))
    return ChunkLayout(
        shape=tuple(ds.shape),
        chunks=tuple(ds.chunks),
        dtype=ds.dtype,
        shuffle=filters[0] == _SHUFFLE,
        table=tuple(table),
        fill=float(ds.fillvalue),
    )


def unshuffle(raw: np.ndarray, item: int) -> np.ndarray:
    """Undo HDF5's byte shuffle: byte ``b`` of element ``i`` is at ``b * n + i``.

    Compiled (releasing the GIL, so chunks unshuffle in parallel) where numba is present;
    the numpy transpose gives the same bytes.

    Examples
    --------
    >>> unshuffle(np.array([1, 3, 2, 4], dtype=np.uint8), 2).tolist()
    [1, 2, 3, 4]
    """
    if HAVE_NUMBA:
        out = np.empty_like(raw)
        _nb_unshuffle(raw, item, out)
        return out
    return raw.reshape(item, -1).T.copy().reshape(-1)


if HAVE_NUMBA:

    @njit(nogil=True, cache=True)
    def _nb_unshuffle(src, item, out):  # pragma: no cover - compiled
        n = src.size // item
        for b in range(item):
            base = b * n
            for i in range(n):
                out[i * item + b] = src[base + i]


def _inflate(fd: int, c: _Chunk, layout: ChunkLayout) -> np.ndarray:
    data = zlib.decompress(os.pread(fd, c.size, c.byte_offset))
    item = layout.dtype.itemsize
    raw = np.frombuffer(data, dtype=np.uint8)
    if layout.shuffle and item > 1:
        raw = unshuffle(raw, item)
    return raw.view(layout.dtype).reshape(layout.chunks)


def read_chunked(path: str | Path, layout: ChunkLayout, lead: int | None = None) -> np.ndarray:
    """The whole variable, or its index ``lead`` along the first axis, decompressed on
    :data:`THREADS` threads, in the native byte order of its dtype.

    Examples
    --------
    >>> import tempfile, netCDF4, numpy as np
    >>> with tempfile.TemporaryDirectory() as tmp:
    ...     f = f"{tmp}/a.nc"
    ...     with netCDF4.Dataset(f, "w") as nc:
    ...         _ = nc.createDimension("t", 3); _ = nc.createDimension("x", 10)
    ...         v = nc.createVariable("v", "f4", ("t", "x"), zlib=True, chunksizes=(1, 4))
    ...         v[:] = np.arange(30, dtype="f4").reshape(3, 10)
    ...     read_chunked(f, chunk_layout(f, "v"), lead=1).tolist()
    [10.0, 11.0, 12.0, 13.0, 14.0, 15.0, 16.0, 17.0, 18.0, 19.0]
    """
    shape = layout.shape
    if lead is None:
        out = np.empty(shape, dtype=layout.dtype.newbyteorder("="))
        wanted = list(layout.table)
        base = (0,) * len(shape)
    else:
        out = np.empty(shape[1:], dtype=layout.dtype.newbyteorder("="))
        c0 = layout.chunks[0]
        wanted = [c for c in layout.table if c.offset[0] <= lead < c.offset[0] + c0]
        base = (lead,) + (0,) * (len(shape) - 1)

    grid = [-(-size // n) for size, n in zip(shape, layout.chunks, strict=True)]
    if len(wanted) < int(np.prod(grid[1:] if lead is not None else grid)):
        out[...] = layout.fill  # chunks never written hold the fill value
    fd = os.open(str(path), os.O_RDONLY)
    try:

        def place(c: _Chunk) -> None:
            block = _inflate(fd, c, layout)
            src, dst = [], []
            for ax, (o, n, size) in enumerate(zip(c.offset, layout.chunks, shape, strict=True)):
                if lead is not None and ax == 0:
                    src.append(lead - o)
                    continue
                stop = min(o + n, size)
                src.append(slice(0, stop - o))
                dst.append(slice(o - base[ax], stop - base[ax]))
            out[tuple(dst)] = block[tuple(src)]

        for _ in _pool().map(place, wanted):
            pass
    finally:
        os.close(fd)
    return out
