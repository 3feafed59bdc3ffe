"""Layout of a training store along ``sample``, and the writer that fills it unit by unit.

Chunk lengths (``sets.chunking``, ``sets.chunk_mib``):

- ``widest``: one chunk length for every array, about ``chunk_mib`` MiB of the widest
  array (a patch array when the store has patches; the feature arrays then get small
  chunks).
- ``per-array``: each array's chunk holds about ``chunk_mib`` MiB of that array, rounded
  down to a power of two samples, so the lengths nest: each divides the largest.

Sharding (``sets.shard_mib`` > 0): every array is sharded with one common shard length
along ``sample``, about ``shard_mib`` MiB of one sample of every array together
(uncompressed), a whole multiple of every array's chunk length (chunks longer than the
shard are cut to it).

**Read unit.** Every multiple of the *read unit* is a chunk or shard boundary of every
array: the shard length when sharded, otherwise the largest chunk length. A reader that
reads whole units in random order touches every stored chunk once. The store records it
in the root attribute ``sample_unit`` (samples); it also follows from the arrays' zarr
metadata (:func:`storage_length`).

**Writing.** :class:`UnitWriter` takes samples in their final order, in pieces of any
size, and writes each array one whole write unit (shard, else chunk) at a time, each unit
once: nothing is read back and re-encoded. A unit that lies wholly in one piece is written
straight from the piece; the rest is gathered in one buffer of one unit per array. Memory
is one unit plus one piece. :class:`ShuffleWriter` (``sets.shuffle``) puts the samples in
their permuted order through scratch files first and hands them to the same writer.
"""

from __future__ import annotations

import math
import shutil
from collections.abc import Callable, Mapping
from concurrent.futures import ThreadPoolExecutor
from dataclasses import dataclass
from pathlib import Path
from typing import Any, Literal

import numpy as np

Chunking = Literal["widest", "per-array"]
MIB = 2**20


@dataclass(frozen=True)
class SampleLayout:
    """Chunk and shard lengths along ``sample`` of the arrays of one store.

    Attributes
    ----------
    chunks
        Array name -> chunk length (samples; the inner chunk when sharded).
    shard
        Common shard length (samples), or None without sharding.
    """

    chunks: Mapping[str, int]
    shard: int | None

    @property
    def unit(self) -> int:
        """The read unit: shard length, else the largest chunk length."""
        return self.shard if self.shard else max(self.chunks.values())

    def write_unit(self, name: str) -> int:
        """Samples of array ``name`` that are encoded together (shard, else chunk)."""
        return self.shard if self.shard else self.chunks[name]

    @property
    def bucket(self) -> int:
        """Smallest write unit of any array (the scratch bucket of the shuffled writer)."""
        return min(self.write_unit(n) for n in self.chunks)


def _pow2_floor(n: int) -> int:
    """Largest power of two <= n (n >= 1).

    >>> [_pow2_floor(n) for n in (1, 2, 3, 1000)]
    [1, 2, 2, 512]
    """
    return 1 << (max(1, int(n)).bit_length() - 1)


def plan_layout(
    widths: Mapping[str, int],
    total: int,
    *,
    chunking: Chunking,
    chunk_mib: float,
    shard_mib: float,
) -> SampleLayout:
    """Chunk and shard lengths of the arrays of a store of ``total`` samples.

    Parameters
    ----------
    widths
        Array name -> bytes of one sample of it (uncompressed).
    total
        Samples of the store (>= 1).
    chunking
        ``widest`` (one chunk length, set by the widest array) or ``per-array``.
    chunk_mib
        Target chunk size (MiB).
    shard_mib
        Target size of one shard length of all arrays together (MiB); 0: no sharding.

    Returns
    -------
    SampleLayout

    Examples
    --------
    >>> w = {"f": 4, "patch": 400}
    >>> plan_layout(w, 10**6, chunking="widest", chunk_mib=1, shard_mib=0).chunks
    {'f': 2621, 'patch': 2621}
    >>> lay = plan_layout(w, 10**6, chunking="per-array", chunk_mib=1, shard_mib=0)
    >>> dict(lay.chunks), lay.unit
    ({'f': 262144, 'patch': 2048}, 262144)
    >>> lay = plan_layout(w, 10**6, chunking="per-array", chunk_mib=1, shard_mib=8)
    >>> dict(lay.chunks), lay.shard
    ({'f': 16384, 'patch': 2048}, 16384)
    """
    total = max(1, int(total))
    target = {n: max(1, int(chunk_mib * MIB) // max(1, int(w))) for n, w in widths.items()}
    if chunking == "widest":
        c = min(total, min(target.values()))
        chunks = {n: c for n in widths}
    else:
        cap = _pow2_floor(2 * total - 1)  # the smallest power of two >= total
        chunks = {n: min(cap, _pow2_floor(t)) for n, t in target.items()}
    if shard_mib <= 0:
        return SampleLayout(chunks=chunks, shard=None)
    record = max(1, sum(int(w) for w in widths.values()))
    want = max(1, int(shard_mib * MIB) // record)
    longest = want if chunking == "widest" else _pow2_floor(want)
    chunks = {n: min(c, longest) for n, c in chunks.items()}
    step = math.lcm(*chunks.values())
    shard = max(step, want // step * step)
    shard = min(shard, -(-total // step) * step)  # no longer than the store needs
    return SampleLayout(chunks=chunks, shard=shard)


def storage_length(arr: Any) -> int:
    """Samples one stored object of a zarr array holds along ``sample`` (shard, else chunk)."""
    shards = getattr(arr, "shards", None)
    return int(shards[0] if shards else arr.chunks[0])


def read_unit(arrays: Mapping[str, Any]) -> int:
    """The read unit of a set store's arrays: the largest shard or chunk length.

    With the layouts of :func:`plan_layout` every array's length divides it.
    """
    return max(storage_length(a) for a in arrays.values())


WriteFn = Callable[[str, int, int, np.ndarray], None]


class UnitWriter:
    """Write samples that arrive in order, one whole write unit per array at a time.

    Parameters
    ----------
    write
        ``write(name, lo, hi, values)`` stores samples ``[lo, hi)`` of array ``name``.
    units
        Array name -> its write unit (samples).
    shapes
        Array name -> shape of one sample (``()`` for 1-D arrays).
    dtypes
        Array name -> dtype of the values handed in.
    total
        Samples of the store.
    threads
        Arrays written concurrently (codecs release the GIL).
    """

    def __init__(
        self,
        write: WriteFn,
        units: Mapping[str, int],
        shapes: Mapping[str, tuple[int, ...]],
        dtypes: Mapping[str, np.dtype],
        total: int,
        *,
        threads: int = 1,
    ) -> None:
        self._write = write
        self.units = dict(units)
        self.total = int(total)
        self.pos = 0
        self.buffers = {
            n: np.empty((min(u, self.total), *shapes[n]), dtype=dtypes[n])
            for n, u in self.units.items()
        }
        self._pool = ThreadPoolExecutor(max_workers=threads) if threads > 1 else None

    def add(self, data: Mapping[str, np.ndarray]) -> None:
        """Take the next samples (every array, the same number of samples)."""
        n = int(next(iter(data.values())).shape[0])
        if self.pos + n > self.total:
            raise ValueError(f"{self.pos + n} samples handed in, the store holds {self.total}")
        jobs: list[tuple] = []
        tails: list[tuple] = []
        for name in self.units:
            self._take(name, data[name], n, jobs, tails)
        if self._pool is None:
            for job in jobs:
                self._write(*job)
        else:
            for f in [self._pool.submit(self._write, *job) for job in jobs]:
                f.result()
        for buf, lo, values in tails:  # after the writes: they may still read the buffer
            buf[lo : lo + values.shape[0]] = values
        self.pos += n

    def _take(self, name: str, values: np.ndarray, n: int, jobs: list, tails: list) -> None:
        """Split one array's piece into unit writes and a tail left in the buffer."""
        u, buf, i = self.units[name], self.buffers[name], 0
        while i < n:
            p = self.pos + i
            b0 = p // u * u
            end = min(b0 + u, self.total)
            k = min(n - i, end - p)
            if p == b0 and k == end - b0:  # a whole unit inside the piece: no copy
                jobs.append((name, b0, end, values[i : i + k]))
            elif p + k == end:  # completes the unit begun by earlier pieces
                buf[p - b0 : end - b0] = values[i : i + k]
                jobs.append((name, b0, end, buf[: end - b0]))
            else:  # the piece ends inside a unit: copied once the writes are done
                tails.append((buf, p - b0, values[i : i + k]))
            i += k

    def close(self) -> None:
        """Check that every sample arrived, and stop the threads."""
        if self._pool is not None:
            self._pool.shutdown()
        if self.pos != self.total:
            raise RuntimeError(f"{self.pos} samples written, the store holds {self.total}")


class ShuffleWriter:
    """Two-pass external shuffle.

    Pass 1 appends every sample, as one packed record with its final position, to the
    scratch file of the bucket it belongs to (``bucket`` samples, a whole write unit of
    every array); pass 2 reads each bucket's file, puts the records in place and hands
    them to the unit writer in order (labels still as codes in the records).
    """

    def __init__(self, writer: UnitWriter, bucket: int, perm: np.ndarray, scratch: Path) -> None:
        self.writer = writer
        self.total = writer.total
        self.chunk = int(bucket)
        self.perm = perm
        self.pos = 0
        self.nb = math.ceil(self.total / self.chunk)
        self.dir = scratch
        self.dir.mkdir(parents=True)
        fields: list[Any] = [("_pos", np.int64)]
        for name, buf in writer.buffers.items():
            fields.append((name, buf.dtype, buf.shape[1:]) if buf.ndim > 1 else (name, buf.dtype))
        self.record = np.dtype(fields)

    def add(self, data: Mapping[str, np.ndarray]) -> None:
        """Take the next samples in natural order (pass 1)."""
        n = next(iter(data.values())).shape[0]
        rec = np.empty(n, dtype=self.record)
        rec["_pos"] = self.perm[self.pos : self.pos + n]
        self.pos += n
        for name in self.writer.buffers:
            rec[name] = data[name]
        bucket = rec["_pos"] // self.chunk
        order = np.argsort(bucket, kind="stable")
        rec = rec[order]
        bounds = np.searchsorted(bucket[order], np.arange(self.nb + 1))
        for b in np.nonzero(np.diff(bounds))[0]:
            with open(self.dir / f"{b}.bin", "ab") as fh:
                fh.write(rec[bounds[b] : bounds[b + 1]].tobytes())

    def finish(self) -> None:
        """Hand every bucket to the writer in order, then remove the scratch files."""
        try:
            for b in range(self.nb):
                lo = b * self.chunk
                hi = min(self.total, lo + self.chunk)
                rec = np.fromfile(self.dir / f"{b}.bin", dtype=self.record)
                if rec.size != hi - lo:
                    raise RuntimeError(f"shuffle chunk {b}: {rec.size} samples, expected {hi - lo}")
                rec = rec[np.argsort(rec["_pos"])]
                self.writer.add({name: rec[name] for name in self.writer.buffers})
        finally:
            shutil.rmtree(self.dir, ignore_errors=True)
