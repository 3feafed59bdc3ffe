"""Chunk writes that leave out all-fill chunks themselves, against zarr's own writes.

The reference is zarr (its default ``write_empty_chunks=False``): the same arrays written
with plain ``arr[region] = data`` must give the same chunk files with the same bytes.
"""

from __future__ import annotations

from pathlib import Path

import numpy as np
import pytest
import zarr

from lesprep.store import CHUNK_KEYS, all_fill, write_block


def _pair(tmp_path: Path, fill: float) -> tuple[zarr.Array, zarr.Array]:
    arrays = []
    for name in ("ours", "zarr"):
        root = zarr.open_group(str(tmp_path / f"{name}-{fill}.zarr"), mode="w", zarr_format=3)
        arrays.append(
            root.create_array(
                "v",
                shape=(3, 10, 6, 5),
                chunks=(1, 4, 6, 5),  # 10 levels: the last chunk row is partial
                dtype="float32",
                fill_value=fill,
                chunk_key_encoding=CHUNK_KEYS,
            )
        )
    return arrays[0], arrays[1]


def _files(a: zarr.Array) -> dict[str, bytes]:
    folder = Path(a.store.root) / a.path
    return {p.name: p.read_bytes() for p in sorted(folder.iterdir()) if p.name != "zarr.json"}


@pytest.mark.parametrize("fill", [0.0, np.nan])
def test_same_chunks_and_bytes_as_zarr(tmp_path, fill):
    ours, ref = _pair(tmp_path, fill)
    rng = np.random.default_rng(0)
    step = rng.normal(size=(10, 6, 5)).astype(np.float32)
    step[0:4] = fill  # an all-fill chunk row
    step[8:10] = fill  # the partial last row, all fill
    step[4, 0, 0] = -0.0 if fill == 0.0 else np.nan  # -0.0 is not the 0.0 fill (bits)
    step[5:8] = np.where(step[5:8] > 0, fill, step[5:8])  # partly fill
    second = np.full((10, 6, 5), fill, np.float32)  # a whole step of fill
    second[9, 5, 4] = 1.5  # but one value in the partial row
    # a whole time step, then rows of one time written one chunk row at a time
    write_block(ours, (0,), step[None])
    ref[0] = step
    write_block(ours, (1,), second[None])
    ref[1] = second
    for z0 in (0, 4, 8):
        write_block(ours, (2, z0), step[None, z0 : z0 + 4])
        ref[2, z0 : z0 + 4] = step[z0 : z0 + 4]
    assert _files(ours) == _files(ref)
    assert len(_files(ours)) == 3  # per time one chunk row holds non-fill values
    np.testing.assert_array_equal(ours[...], ref[...])


def test_all_fill_stops_at_the_first_difference_and_compares_bits():
    assert all_fill(np.zeros((3, 4), np.float64), 0.0)
    assert not all_fill(np.array([0.0, -0.0], np.float32), 0.0)  # zarr compares bits
    assert all_fill(np.array([np.nan, -np.nan], np.float32), np.nan)
    assert not all_fill(np.array([np.nan, -np.inf]), np.nan)
    assert not all_fill(np.array([np.nan, np.inf], np.float32), np.nan)
    assert all_fill(np.zeros((2, 2), bool), 0) and not all_fill(np.ones(2, np.int8), 0)
    strided = np.zeros((4, 6), np.float32)[:, ::2]
    assert all_fill(strided, 0.0)
