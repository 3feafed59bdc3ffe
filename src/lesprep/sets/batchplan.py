"""Which samples a batch reader reads, in which order: pure functions, no I/O.

A set store is read in **read units**: contiguous ranges of ``unit`` samples starting at
multiples of ``unit``, where ``unit`` is the storage unit along ``sample`` (the shard
length of sharded arrays, else the chunk length; the largest over the arrays read), so
each unit decodes every stored chunk it touches once and reads are sequential within it.

One epoch of one worker is planned as follows.

1. The units holding at least one selected sample are ordered: in store order, or, when
   shuffling, by a permutation drawn from ``numpy.random.default_rng([seed, epoch])``
   (a Fisher-Yates shuffle of the unit numbers). Every worker draws the same permutation.
2. Worker ``w`` of ``W`` takes every ``W``-th unit of that order starting at ``w``, so the
   workers' units are disjoint and together cover every unit once per epoch.
3. The worker's units are grouped in order into **buffers** of ``buffer_units`` units.
   The selected samples of a buffer are permuted with
   ``default_rng([seed, epoch, worker, workers, buffer])`` (store order without
   shuffling). A buffer's permutation depends on nothing drawn for an earlier buffer, so a
   reader can start at any buffer and produce the same samples.
4. The worker's sample stream is the buffers' samples one after the other; batch ``b`` is
   the stream's samples ``[b * batch_size, (b + 1) * batch_size)``, the last one shorter
   (kept) or dropped.

Every selected sample occurs exactly once in the union of the workers' streams of an
epoch. The randomness of a batch is bounded by its buffer: a batch draws from at most
``buffer_units`` units (two buffers at a boundary), while a full permutation would draw
from nearly ``min(batch_size, units)``; larger buffers mix better and cost memory
(``docs/reader.md``).
"""

from __future__ import annotations

import math
from collections.abc import Sequence
from dataclasses import dataclass

import numpy as np
from numpy.typing import NDArray


@dataclass(frozen=True)
class Buffer:
    """The samples of one buffer of an epoch plan.

    Attributes
    ----------
    index
        Buffer number within the worker's epoch (0, 1, ...).
    units
        Unit numbers the buffer reads, in read order.
    samples
        Store indices of the buffer's selected samples, in the order they are emitted.
    positions
        Where each of ``samples`` lies in the concatenation of the units' full sample
        ranges (in ``units`` order): the row to take from the data read.
    """

    index: int
    units: NDArray[np.int64]
    samples: NDArray[np.int64]
    positions: NDArray[np.int64]


def storage_unit(lengths: Sequence[int]) -> int:
    """Length of a read unit: the largest storage unit along ``sample`` of the arrays.

    Parameters
    ----------
    lengths
        Each array's shard length along ``sample`` (its chunk length if not sharded).

    Returns
    -------
    int
        The largest; stores written by :func:`lesprep.sets.assemble.build_set` give every
        array the same length, so a unit then decodes each array's chunks exactly once.

    Examples
    --------
    >>> storage_unit([8192, 8192, 4096])
    8192
    """
    if not lengths:
        raise ValueError("no array to read: expected at least one storage length")
    return int(max(int(n) for n in lengths))


def unit_bounds(unit: int, n_samples: int, index: int) -> tuple[int, int]:
    """``(lo, hi)`` sample range of read unit ``index``.

    Examples
    --------
    >>> unit_bounds(4, 10, 2)
    (8, 10)
    """
    lo = int(index) * int(unit)
    return lo, min(int(n_samples), lo + int(unit))


def unit_count(unit: int, n_samples: int) -> int:
    """Number of read units of ``n_samples`` samples.

    Examples
    --------
    >>> unit_count(4, 10)
    3
    """
    return math.ceil(int(n_samples) / int(unit))


def kept_per_unit(kept: NDArray[np.bool_], unit: int) -> NDArray[np.int64]:
    """Selected samples in each read unit (``kept`` is the per-sample selection).

    Examples
    --------
    >>> kept_per_unit(np.array([1, 0, 1, 1, 0], dtype=bool), 2).tolist()
    [1, 2, 0]
    """
    n = kept.size
    padded = np.zeros(unit_count(unit, n) * unit, dtype=np.int64)
    padded[:n] = kept
    return padded.reshape(-1, unit).sum(axis=1)


def epoch_unit_order(
    units: NDArray[np.int64], *, epoch: int, seed: int, shuffle: bool
) -> NDArray[np.int64]:
    """Order in which the units are read in one epoch (the same for every worker).

    Parameters
    ----------
    units
        Unit numbers holding at least one selected sample, ascending.
    epoch, seed
        The permutation is drawn from ``numpy.random.default_rng([seed, epoch])``.
    shuffle
        False: store order.

    Examples
    --------
    >>> epoch_unit_order(np.arange(4), epoch=0, seed=0, shuffle=False).tolist()
    [0, 1, 2, 3]
    >>> sorted(epoch_unit_order(np.arange(4), epoch=3, seed=1, shuffle=True).tolist())
    [0, 1, 2, 3]
    """
    units = np.asarray(units, dtype=np.int64)
    if not shuffle:
        return units.copy()
    return np.random.default_rng([int(seed), int(epoch)]).permutation(units)


def worker_units(order: NDArray[np.int64], worker: int, workers: int) -> NDArray[np.int64]:
    """The units worker ``worker`` of ``workers`` reads: every ``workers``-th of ``order``.

    Examples
    --------
    >>> worker_units(np.array([5, 2, 7, 1, 0]), 1, 2).tolist()
    [2, 1]
    """
    check_worker(worker, workers)
    return np.asarray(order, dtype=np.int64)[int(worker) :: int(workers)]


def check_worker(worker: int, workers: int) -> None:
    """Refuse a worker index outside ``0 .. workers - 1``."""
    if int(workers) < 1 or not 0 <= int(worker) < int(workers):
        raise ValueError(
            f"worker index {worker} of {workers} workers: expected workers >= 1 and "
            "0 <= worker < workers"
        )


def buffer_groups(units: NDArray[np.int64], buffer_units: int) -> list[NDArray[np.int64]]:
    """The worker's units cut in order into buffers of ``buffer_units`` units.

    Examples
    --------
    >>> [g.tolist() for g in buffer_groups(np.array([3, 1, 2, 0, 4]), 2)]
    [[3, 1], [2, 0], [4]]
    """
    if int(buffer_units) < 1:
        raise ValueError(f"buffer_units is {buffer_units}; expected at least 1")
    units = np.asarray(units, dtype=np.int64)
    return [units[i : i + int(buffer_units)] for i in range(0, units.size, int(buffer_units))]


def buffer_sizes(
    groups: Sequence[NDArray[np.int64]], per_unit: NDArray[np.int64]
) -> NDArray[np.int64]:
    """Selected samples of each buffer (no data is read)."""
    return np.asarray([int(per_unit[g].sum()) for g in groups], dtype=np.int64)


def buffer_rng(
    seed: int, epoch: int, worker: int, workers: int, index: int, stream: int = 0
) -> np.random.Generator:
    """The random generator of one buffer; ``stream`` separates independent uses."""
    return np.random.default_rng(
        [int(seed), int(epoch), int(worker), int(workers), int(index), int(stream)]
    )


def plan_buffer(
    units: NDArray[np.int64],
    kept: NDArray[np.bool_] | None,
    *,
    unit: int,
    n_samples: int,
    rng: np.random.Generator | None,
    index: int = 0,
) -> Buffer:
    """Samples of one buffer, permuted by ``rng`` (None: store order within each unit).

    Examples
    --------
    >>> b = plan_buffer(np.array([1, 0]), None, unit=2, n_samples=3, rng=None)
    >>> b.samples.tolist(), b.positions.tolist()
    ([2, 0, 1], [0, 1, 2])
    """
    ids, pos = [], []
    offset = 0
    for u in np.asarray(units, dtype=np.int64):
        lo, hi = unit_bounds(unit, n_samples, int(u))
        local = np.arange(hi - lo) if kept is None else np.flatnonzero(kept[lo:hi])
        ids.append(lo + local)
        pos.append(offset + local)
        offset += hi - lo
    samples = np.concatenate(ids).astype(np.int64) if ids else np.zeros(0, np.int64)
    positions = np.concatenate(pos).astype(np.int64) if pos else np.zeros(0, np.int64)
    if rng is not None:
        order = rng.permutation(samples.size)
        samples, positions = samples[order], positions[order]
    return Buffer(int(index), np.asarray(units, dtype=np.int64), samples, positions)


def batch_count(n: int, batch_size: int, *, drop_last: bool) -> int:
    """Batches of a stream of ``n`` samples.

    Examples
    --------
    >>> batch_count(10, 4, drop_last=False), batch_count(10, 4, drop_last=True)
    (3, 2)
    """
    if int(batch_size) < 1:
        raise ValueError(f"batch_size is {batch_size}; expected at least 1")
    return int(n) // int(batch_size) if drop_last else math.ceil(int(n) / int(batch_size))


def locate(sizes: NDArray[np.int64], start: int) -> tuple[int, int]:
    """``(buffer, offset)`` of stream position ``start`` given the buffers' sizes.

    Examples
    --------
    >>> locate(np.array([4, 0, 3]), 5)
    (2, 1)
    >>> locate(np.array([4, 3]), 7)
    (2, 0)
    """
    ends = np.cumsum(np.asarray(sizes, dtype=np.int64))
    g = int(np.searchsorted(ends, int(start), side="right"))
    before = int(ends[g - 1]) if g > 0 else 0
    return g, int(start) - before


def round_robin_starts(counts: Sequence[int], consumed: int) -> list[int]:
    """Batches each worker has delivered after ``consumed`` batches taken round-robin.

    A framework's multi-worker loader takes one batch from each worker in turn, skipping
    workers that are done; ``counts`` are the workers' batches in the epoch. The result
    is the ``start`` of each worker when resuming after ``consumed`` batches.

    Examples
    --------
    >>> round_robin_starts([3, 1, 2], 5)
    [2, 1, 2]
    """
    starts = [0] * len(counts)
    left = int(consumed)
    if left > sum(int(c) for c in counts):
        raise ValueError(f"{consumed} batches consumed but the workers have only {sum(counts)}")
    while left:
        for w, c in enumerate(counts):
            if left and starts[w] < int(c):
                starts[w] += 1
                left -= 1
    return starts
