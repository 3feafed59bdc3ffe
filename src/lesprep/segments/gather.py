"""Join a case's segment stores into the one per-case store users open.

Why one store: every later stage, ``xr.open_zarr`` and ``lesprep verify`` keep opening
``cases/<case>/canonical.zarr`` and ``scale-<label>.zarr`` as before, with the case's whole
time axis, and nothing downstream knows about segments.

How, without copying: a segment store holds one chunk per output time (chunk length 1
along ``time``), so the per-case store is made of the segments' own chunk files, *hard
linked* under their new time index (``<t>.<z>.<y>.<x>`` of segment ``k`` becomes
``<t + start_k>.<z>.<y>.<x>``). Only metadata is written: each array's ``zarr.json`` with
the whole time length, the ``time`` coordinate (a few numbers), the root attributes and
the consolidated metadata. No data is read, copied or rewritten, so adding a segment does
not touch the earlier segments' data; a segment that re-runs writes new files and the
gather links the new ones. Hard links need the segment and case stores on one file
system (both are under ``results/``).

Every segment must have the same arrays, dtypes, chunks and non-time coordinates (the
gather refuses otherwise, naming the segment and the array).
"""

from __future__ import annotations

import json
import os
import shutil
from collections.abc import Sequence
from pathlib import Path
from typing import Any

import numpy as np
import zarr

from lesprep import provenance
from lesprep.errors import InputError
from lesprep.store import atomic_path, consolidate

SMALL_BYTES = 16 * 2**20
"""A time-dependent array chunked longer than one time (the ``time`` coordinate) is
rewritten whole when it is at most this large."""


def _meta(path: Path) -> dict[str, Any]:
    return json.loads((path / "zarr.json").read_text())


def _arrays(store: Path) -> dict[str, dict[str, Any]]:
    metas = {p.name: _meta(p) for p in sorted(store.iterdir()) if (p / "zarr.json").is_file()}
    return {name: m for name, m in metas.items() if m.get("node_type") == "array"}


def _time_axis(meta: dict[str, Any]) -> bool:
    names = meta.get("dimension_names") or []
    return bool(names) and names[0] == "time"


def _separator(meta: dict[str, Any]) -> str:
    return str(meta["chunk_key_encoding"].get("configuration", {}).get("separator", "."))


def _check_same(first: dict[str, Any], other: dict[str, Any], name: str, seg: Path) -> None:
    keys = ("data_type", "chunk_grid", "codecs", "dimension_names", "fill_value")
    for k in keys:
        if first.get(k) != other.get(k):
            raise InputError(
                f"array {name!r} differs from the first segment in {k}: "
                f"{other.get(k)!r} against {first.get(k)!r}",
                file=str(seg),
                variable=name,
                hint="re-run the case's segments with one configuration",
            )
    if first["shape"][1:] != other["shape"][1:] and _time_axis(first):
        raise InputError(
            f"array {name!r} has shape {other['shape']} against {first['shape']} in the first "
            "segment (beyond time)",
            file=str(seg),
            variable=name,
        )


def gather_stores(
    segments: Sequence[str | Path], out: str | Path, *, summary: str = ""
) -> dict[str, Any]:
    """Build one store from segment stores, in order, by hard links (see module docs).

    Parameters
    ----------
    segments
        The segment stores, in time order.
    out
        The store to write (replaced atomically).
    summary
        History line of the gather step.

    Returns
    -------
    dict
        Facts of the gather: ``times``, ``linked`` (chunk files), ``rewritten`` (arrays
        rewritten whole) and ``bytes_written`` (metadata and small arrays).
    """
    segs = [Path(s) for s in segments]
    if not segs:
        raise InputError("no segment store to gather", file=str(out))
    arrays = [_arrays(s) for s in segs]
    names = list(arrays[0])
    for seg, arr in zip(segs[1:], arrays[1:], strict=True):
        if list(arr) != names:
            raise InputError(
                f"holds arrays {list(arr)}, the first segment {names}",
                file=str(seg),
                hint="re-run the case's segments with one configuration",
            )
    lengths = []
    for seg, arr in zip(segs, arrays, strict=True):
        times = [m["shape"][0] for m in arr.values() if _time_axis(m)]
        if len(set(times)) > 1:
            raise InputError(f"arrays disagree on the number of times: {times}", file=str(seg))
        lengths.append(times[0] if times else 0)
    starts = np.concatenate([[0], np.cumsum(lengths)[:-1]]).astype(int)
    total = int(sum(lengths))
    facts = {"times": total, "linked": 0, "rewritten": [], "bytes_written": 0}
    with atomic_path(Path(out)) as tmp:
        tmp.mkdir(parents=True)
        for name in names:
            first = arrays[0][name]
            for seg, arr in zip(segs[1:], arrays[1:], strict=True):
                _check_same(first, arr[name], name, seg)
            dst = tmp / name
            dst.mkdir()
            meta = dict(first)
            if not _time_axis(first):
                _link_all(segs[0] / name, dst, facts)
                _check_static(segs, name)
            else:
                meta["shape"] = [total, *first["shape"][1:]]
                chunk = first["chunk_grid"]["configuration"]["chunk_shape"]
                if chunk[0] == 1:
                    sep = _separator(first)
                    for seg, t0 in zip(segs, starts, strict=True):
                        _link_shifted(seg / name, dst, int(t0), sep, facts)
                else:
                    meta["chunk_grid"] = {
                        "name": "regular",
                        "configuration": {"chunk_shape": [total, *chunk[1:]]},
                    }
                    facts["rewritten"].append(name)
            text = json.dumps(meta, indent=2)
            (dst / "zarr.json").write_text(text)
            facts["bytes_written"] += len(text)
        root = _meta(segs[0])
        root.pop("consolidated_metadata", None)
        (tmp / "zarr.json").write_text(json.dumps(root, indent=2))
        group = zarr.open_group(str(tmp), mode="r+")
        for name in facts["rewritten"]:
            parts = [np.asarray(zarr.open_array(str(s / name), mode="r")[...]) for s in segs]
            whole = np.concatenate(parts, axis=0)
            if whole.nbytes > SMALL_BYTES:
                raise InputError(
                    f"array {name!r} is chunked over several times and {whole.nbytes} bytes "
                    "large: it cannot be joined without rewriting it",
                    file=str(segs[0]),
                    variable=name,
                )
            group[name][...] = whole
            facts["bytes_written"] += int(whole.nbytes)
        attrs = [dict(zarr.open_group(str(s), mode="r").attrs) for s in segs]
        merged = {k: v for k, v in attrs[0].items() if k not in (provenance.ATTR, "history")}
        prov = provenance.merge(attrs)
        step = provenance.new_step(
            "gather",
            segments=[str(s) for s in segs],
            times_per_segment=[int(n) for n in lengths],
            chunk_files_linked=facts["linked"],
        )
        prov["steps"].append(step)
        merged[provenance.ATTR] = json.dumps(prov, sort_keys=True, default=str)
        history = attrs[-1].get("history", "")
        merged["history"] = (
            f"{history}\n{step['created']} lesprep gather: "
            f"{summary or f'joined {len(segs)} segment(s), {total} output times'}"
        ).strip()
        merged["segments"] = len(segs)
        group.attrs.clear()
        group.attrs.update(merged)
        consolidate(tmp)
    return facts


def _link(src: Path, dst: Path) -> None:
    try:
        os.link(src, dst)
    except OSError:  # another file system: a copy is the only way
        shutil.copy2(src, dst)


def _link_all(src: Path, dst: Path, facts: dict[str, Any]) -> None:
    for f in src.iterdir():
        if f.name != "zarr.json" and f.is_file():
            _link(f, dst / f.name)
            facts["linked"] += 1


def _link_shifted(src: Path, dst: Path, t0: int, sep: str, facts: dict[str, Any]) -> None:
    for f in src.iterdir():
        if f.name == "zarr.json" or not f.is_file():
            continue
        head, _, rest = f.name.partition(sep)
        key = f"{int(head) + t0}{sep}{rest}" if rest else str(int(head) + t0)
        _link(f, dst / key)
        facts["linked"] += 1


def _check_static(segs: Sequence[Path], name: str) -> None:
    """A coordinate without time must be the same in every segment."""
    ref = np.asarray(zarr.open_array(str(segs[0] / name), mode="r")[...])
    for s in segs[1:]:
        other = np.asarray(zarr.open_array(str(s / name), mode="r")[...])
        if other.shape != ref.shape or not np.array_equal(other, ref, equal_nan=True):
            raise InputError(
                f"array {name!r} (no time axis) differs from the first segment's",
                file=str(s),
                variable=name,
                hint="the segments were made from different grids or settings",
            )
