"""Set-store layout along ``sample`` and the unit writer: every stored chunk or shard is
written once, whole and in order, with memory of one unit plus one piece.

Outside references: zarr's own store interface (which keys are written, and how often),
zarr's array metadata, numpy's concatenation of the pieces and Python's ``tracemalloc``
for the memory held.
"""

from __future__ import annotations

import collections
import tracemalloc

import numpy as np
import pytest
import zarr
from hypothesis import given, settings
from hypothesis import strategies as st
from zarr.storage import MemoryStore

from lesprep.sets.chunking import UnitWriter, plan_layout, read_unit, storage_length


class CountingStore(MemoryStore):
    """A memory store that counts the writes of every key."""

    def __init__(self) -> None:
        super().__init__()
        self.writes: collections.Counter[str] = collections.Counter()

    async def set(self, key, value, byte_range=None):
        self.writes[key] += 1
        await super().set(key, value)


def _pieces(total: int, rng: np.random.Generator, most: int) -> list[int]:
    sizes, left = [], total
    while left:
        sizes.append(int(min(left, rng.integers(1, most + 1))))
        left -= sizes[-1]
    return sizes


def _arrays(root, layout, total: int) -> dict:
    return {
        name: root.create_array(
            name,
            shape=(total, *shape),
            chunks=(layout.chunks[name], *shape),
            shards=(layout.shard, *shape) if layout.shard else None,
            dtype="float32",
        )
        for name, shape in {"f": (), "g": (), "patch": (3, 3)}.items()
    }


@pytest.mark.parametrize("shard_mib", [0.0, 0.002])
@pytest.mark.parametrize("chunking", ["widest", "per-array"])
@pytest.mark.parametrize("threads", [1, 2])
def test_every_chunk_and_shard_is_written_once(chunking, shard_mib, threads):
    total = 3001
    layout = plan_layout(
        {"f": 4, "g": 4, "patch": 36}, total, chunking=chunking, chunk_mib=0.0005,
        shard_mib=shard_mib,
    )  # fmt: skip
    store = CountingStore()
    root = zarr.open_group(store, mode="w")
    arrays = _arrays(root, layout, total)
    rng = np.random.default_rng(4)
    want = {n: rng.normal(size=a.shape).astype(np.float32) for n, a in arrays.items()}
    store.writes.clear()
    writer = UnitWriter(
        lambda n, lo, hi, v: arrays[n].__setitem__(slice(lo, hi), v),
        {n: layout.write_unit(n) for n in arrays},
        {n: a.shape[1:] for n, a in arrays.items()},
        {n: np.dtype("float32") for n in arrays},
        total,
        threads=threads,
    )
    pos = 0
    for n in _pieces(total, rng, 700):
        writer.add({k: v[pos : pos + n] for k, v in want.items()})
        pos += n
    writer.close()
    for name, a in arrays.items():
        np.testing.assert_array_equal(a[...], want[name])  # read back with zarr
        expected = -(-total // storage_length(a))  # objects along sample, zarr's metadata
        keys = [k for k in store.writes if k.startswith(f"{name}/c")]
        assert len(keys) == expected
        assert all(store.writes[k] == 1 for k in keys)
    assert read_unit(arrays) == layout.unit


def test_the_count_sees_rewritten_chunks():
    """The check above can fail: writing pieces straight at their offsets (the earlier
    writer) rewrites every chunk that two pieces share."""
    store = CountingStore()
    a = zarr.open_group(store, mode="w").create_array("f", shape=(100,), chunks=(10,), dtype="f4")
    store.writes.clear()
    for lo in range(0, 100, 15):
        a[lo : lo + 15] = 1.0
    assert max(store.writes.values()) == 2


def test_memory_is_one_unit_plus_one_piece():
    unit, piece, total = 2**14, 5000, 2**20  # float64: 128 KiB unit, 8 MiB in all
    seen = np.zeros(1)

    def write(name, lo, hi, values):
        seen[0] += float(values.sum())

    tracemalloc.start()
    writer = UnitWriter(write, {"f": unit}, {"f": ()}, {"f": np.dtype("float64")}, total)
    pos, expected = 0, 0.0
    while pos < total:
        n = min(piece, total - pos)
        values = np.arange(pos, pos + n, dtype=np.float64)
        expected += float(values.sum())
        writer.add({"f": values})
        pos += n
        del values
    _, peak = tracemalloc.get_traced_memory()
    tracemalloc.stop()
    writer.close()
    assert seen[0] == expected  # every sample written once (numpy's sums)
    assert peak < (unit + 2 * piece) * 8 + 64 * 1024  # the buffer and a piece, not the store
    assert peak < total * 8 / 16


@given(
    widths=st.lists(st.sampled_from([4, 8, 64, 400, 1600]), min_size=1, max_size=6),
    total=st.integers(1, 10**7),
    chunk_mib=st.sampled_from([0.01, 1.0, 8.0]),
    shard_mib=st.sampled_from([0.0, 0.5, 64.0]),
    chunking=st.sampled_from(["widest", "per-array"]),
)
@settings(max_examples=200, deadline=None)
def test_layout_rules(widths, total, chunk_mib, shard_mib, chunking):
    w = {f"a{i}": v for i, v in enumerate(widths)}
    lay = plan_layout(w, total, chunking=chunking, chunk_mib=chunk_mib, shard_mib=shard_mib)
    chunks = lay.chunks.values()
    assert all(lay.unit % c == 0 for c in chunks)  # one boundary every unit, every array
    if chunking == "widest":
        assert len(set(chunks)) == 1
    else:
        assert all(c & (c - 1) == 0 for c in chunks)  # powers of two
        for name, c in lay.chunks.items():  # about chunk_mib of each array, never more
            assert c == 1 or c * w[name] <= chunk_mib * 2**20
    if shard_mib:
        assert lay.shard == lay.unit
        record = sum(widths)
        assert lay.shard * record <= max(shard_mib * 2**20, max(chunks) * record)
        assert lay.shard < total + max(chunks)
    else:
        assert lay.shard is None
