"""Training stores: every coarse cell of a split's cases as one ``sample`` dimension.

``results/sets/<split>/scale-<L>.zarr`` stacks the coarse cells ``(case, time, z, y, x)``
of all cases of the split along ``sample``, so cases with different grids, heights and
run lengths concatenate. Per-sample coordinates ``case`` and ``regime`` are categorical
(CF ``flag_values`` / ``flag_meanings``: small integers with the names in the attrs),
``time``, ``z``, ``y``, ``x`` are the cell's coordinates, so any sample maps back to its
cell of the per-case store. Features are 1-D over ``sample``; column features
(``lwp_mean``, ``lwp_var``, ``cloud_cover``) and a pressure profile are repeated for every
level of their column; patches are ``(sample, py, px)``.

Sample order is either the natural order (case, time, z, y, x) or a seeded random
permutation. The store is written by streaming: one case and output time at a time is
read; with shuffling each piece's samples are appended to per-chunk scratch files
(bucket = final position // chunk length) and every chunk is then written once, in
order. Memory is one piece plus one chunk, not the split.
"""

from __future__ import annotations

import json
import logging
import math
import shutil
from collections.abc import Mapping, Sequence
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import numpy as np
import xarray as xr
import zarr

from lesprep import provenance
from lesprep._memory import retain_freed_memory
from lesprep.errors import ConfigError
from lesprep.sets.settings import SetSettings
from lesprep.store import CHUNK_KEYS, CONVENTIONS, atomic_path, compressors, consolidate, open_store

log = logging.getLogger(__name__)

COORDS = ("case", "regime", "time", "z", "y", "x")


@dataclass(frozen=True)
class _Piece:
    case_index: int
    time_index: int
    n: int  # samples in this piece (kept z * ny * nx)


FEATURE_KINDS: dict[tuple[str, ...], str] = {
    ("time", "z", "y", "x"): "cell",
    ("time", "y", "x"): "column",
    ("z",): "profile",
    ("time", "z", "y", "x", "py", "px"): "patch",
}
"""Dims of a per-case scale-store variable that a set carries, and what kind it is."""


def feature_kind(dims: tuple[str, ...]) -> str | None:
    """Kind of a per-case scale-store variable a set carries (None: not a feature)."""
    return FEATURE_KINDS.get(tuple(dims))


def store_layout(ds: xr.Dataset) -> tuple[list[str], list[str], list[str]]:
    """(3-D features, column and profile features, patch variables) of a scale store."""
    feats, cols, patches = [], [], []
    for name, v in ds.data_vars.items():
        kind = feature_kind(tuple(v.dims))
        if str(name).endswith("_bounds") or kind is None:
            continue
        {"cell": feats, "column": cols, "profile": cols, "patch": patches}[kind].append(str(name))
    return sorted(feats), sorted(cols), sorted(patches)


def kept_indices(
    times: int, z: np.ndarray, *, z_range: Sequence[float] | None, time_stride: int
) -> tuple[np.ndarray, np.ndarray]:
    """Time and level indices a set keeps of a per-case store under its filters.

    Every ``time_stride``-th time from the first; levels with ``z_min <= z <= z_max``.

    Parameters
    ----------
    times
        Number of times of the per-case store.
    z
        Its heights (m).
    z_range
        ``(z_min, z_max)`` in m, or None for every level.
    time_stride
        Keep every n-th time.

    Returns
    -------
    t_idx, z_idx : numpy.ndarray

    Examples
    --------
    >>> import numpy as np
    >>> t, k = kept_indices(5, np.array([50.0, 150.0, 250.0]), z_range=(100, 300), time_stride=2)
    >>> t.tolist(), k.tolist()
    ([0, 2, 4], [1, 2])
    """
    t_idx = np.arange(0, times, max(1, int(time_stride)))
    z = np.asarray(z, dtype=np.float64)
    z_idx = np.arange(z.size)
    if z_range is not None:
        z_idx = z_idx[(z >= float(z_range[0])) & (z <= float(z_range[1]))]
    return t_idx, z_idx


def _case_pieces(
    ds: xr.Dataset,
    t_idx: np.ndarray,
    z_idx: np.ndarray,
    feats,
    cols,
    patches,
    meta: dict[str, int],
    *,
    limit_bytes: int = 128 * 2**20,
):
    """Yield the samples of each kept time of one case, in (z, y, x) order.

    Several times are read per array access (up to ``limit_bytes``), which is far faster
    than one read per time for small coarse grids, and memory stays bounded.
    """
    ny, nx = ds.sizes["y"], ds.sizes["x"]
    nz = z_idx.size
    n = nz * ny * nx
    per_time = sum(
        ds[v].dtype.itemsize * n * (math.prod(ds[v].shape[-2:]) if v in patches else 1)
        for v in feats + patches
    )
    block = int(max(1, limit_bytes // max(1, per_time)))
    zz, yy, xx = np.meshgrid(ds.z.values[z_idx], ds.y.values, ds.x.values, indexing="ij")
    zz, yy, xx = zz.reshape(-1), yy.reshape(-1), xx.reshape(-1)
    profile_cols = {c: ds[c].values[z_idx] for c in cols if ds[c].dims == ("z",)}
    for b0 in range(0, t_idx.size, block):
        tb = t_idx[b0 : b0 + block]
        data = {v: ds[v].isel(time=tb, z=z_idx).values for v in feats + patches}
        data.update({c: ds[c].isel(time=tb).values for c in cols if c not in profile_cols})
        for k, t in enumerate(tb):
            out: dict[str, np.ndarray] = {}
            for v in feats:
                out[v] = data[v][k].reshape(-1)
            for v in cols:
                a = profile_cols[v][:, None, None] if v in profile_cols else data[v][k][None]
                out[v] = np.ascontiguousarray(np.broadcast_to(a, (nz, ny, nx))).reshape(-1)
            for v in patches:
                a = data[v][k]
                out[v] = a.reshape(-1, a.shape[-2], a.shape[-1])
            out["time"] = np.full(n, float(ds.time.values[t]))
            out["z"], out["y"], out["x"] = zz, yy, xx
            out["case"] = np.full(n, meta["case"], dtype=np.int16)
            out["regime"] = np.full(n, meta["regime"], dtype=np.int16)
            yield out


def sample_attrs(
    name: str, attrs: Mapping[str, Any], stores: Mapping[str, xr.Dataset]
) -> dict[str, Any]:
    """Attributes of a set variable from those of the per-case variable it stacks.

    Per-sample coordinates lose ``bounds`` (a set has no cell bounds) and ``axis`` (CF
    gives an axis to coordinate variables, and ``sample`` is the only axis of a set).
    ``time`` stays the number of its per-case store, seconds since its case's time origin;
    cases have their own origins (a date, or the start of the run), so one set's ``time``
    is a duration in ``s`` and names each case's origin in its ``comment``.
    """
    out = {k: v for k, v in attrs.items() if name not in COORDS or k not in ("bounds", "axis")}
    if name != "time":
        return out
    origins = "; ".join(f"{c}: {ds['time'].attrs.get('units', 's')}" for c, ds in stores.items())
    return {
        "long_name": "time of the sample since its case's time origin",
        "units": "s",
        "comment": "seconds since the time origin of the sample's case, the same numbers as "
        f"in its per-case store, whose time units are: {origins}",
    }


def build_set(
    inputs: Mapping[str, str | Path],
    regimes: Mapping[str, str],
    out: str | Path,
    settings: SetSettings,
    *,
    split: str,
    scale: str,
    extra_provenance: Mapping[str, Any] | None = None,
) -> Path:
    """Assemble the training store of one split and scale.

    Parameters
    ----------
    inputs
        Case id -> that case's store at this scale (sorted by case id for a stable order).
    regimes
        Case id -> regime tag.
    out
        The store to write (atomically).
    settings
        Set settings.
    split, scale
        Names recorded in the attrs.
    extra_provenance
        Extra fields of the provenance step (split rule, assignment, ...).
    """
    retain_freed_memory()
    if not inputs:
        raise ConfigError(f"split {split!r} has no case at scale {scale}; nothing to assemble")
    stores = {c: open_store(inputs[c]) for c in sorted(inputs)}
    skipped = {c: str(ds.attrs["skipped"]) for c, ds in stores.items() if "skipped" in ds.attrs}
    for c in skipped:
        log.warning("case %s has no data at scale %s (skipped: %s)", c, scale, skipped[c])
        stores.pop(c).close()
    case_ids = sorted(stores)
    if not case_ids:
        return _empty_set(out, split=split, scale=scale, skipped=skipped)
    regime_names = sorted({regimes.get(c, "") or "none" for c in case_ids})
    layouts = {c: store_layout(ds) for c, ds in stores.items()}
    ref = layouts[case_ids[0]]
    for c in case_ids[1:]:
        if layouts[c] != ref:
            raise ConfigError(
                f"case {c!r} at scale {scale} has variables {layouts[c]} but case "
                f"{case_ids[0]!r} has {ref}; cases of one set must be coarsened alike",
                hint="re-run the workflow so every case uses the same coarsen settings",
            )
    feats, cols, patches = ref
    pieces: list[_Piece] = []
    kept: dict[str, tuple[np.ndarray, np.ndarray]] = {}
    for ci, c in enumerate(case_ids):
        ds = stores[c]
        t_idx, z_idx = kept_indices(
            ds.sizes["time"],
            ds.z.values,
            z_range=settings.z_range,
            time_stride=settings.time_stride,
        )
        kept[c] = (t_idx, z_idx)
        n = z_idx.size * ds.sizes["y"] * ds.sizes["x"]
        pieces.extend(_Piece(ci, int(t), n) for t in t_idx)
    total = int(sum(p.n for p in pieces))
    if total == 0:
        raise ConfigError(
            f"split {split!r} at scale {scale}: the filters leave no sample",
            hint="widen sets.z_range or lower sets.time_stride",
        )
    dtype = np.dtype(settings.dtype)
    patch_shape = {n: stores[case_ids[0]][n].shape[-2:] for n in patches}
    widest = max([dtype.itemsize] + [dtype.itemsize * math.prod(s) for s in patch_shape.values()])
    chunk = int(max(1, min(total, settings.chunk_mib * 2**20 // widest)))
    perm = None
    if settings.shuffle:
        perm = np.random.default_rng(settings.shuffle_seed).permutation(total)
    comp = compressors(settings.store)
    first = stores[case_ids[0]]
    dtypes: dict[str, np.dtype] = {
        **{n: dtype for n in feats + cols + patches},
        "time": np.dtype("float64"),
        "z": np.dtype("float64"),
        "y": np.dtype("float64"),
        "x": np.dtype("float64"),
        "case": np.dtype("int16"),
        "regime": np.dtype("int16"),
    }
    with atomic_path(out) as tmp:
        root = zarr.open_group(str(tmp), mode="w-", zarr_format=3)
        arrays: dict[str, Any] = {}
        for name, dt in dtypes.items():
            shape: tuple[int, ...] = (total,)
            chunks: tuple[int, ...] = (chunk,)
            dims = ["sample"]
            if name in patches:
                shape = (total, *patch_shape[name])
                chunks = (chunk, *patch_shape[name])
                dims = ["sample", "py", "px"]
            fill = 0 if dt.kind in "iu" else 0.0
            arrays[name] = root.create_array(
                name,
                shape=shape,
                chunks=chunks,
                dtype=dt,
                compressors=comp,
                fill_value=fill,
                dimension_names=dims,
                chunk_key_encoding=CHUNK_KEYS,
            )
            if name in first:
                arrays[name].attrs.update(sample_attrs(name, first[name].attrs, stores))
        arrays["case"].attrs.update(
            {
                "long_name": "case of the sample",
                "flag_values": list(range(len(case_ids))),
                "flag_meanings": " ".join(case_ids),
            }
        )
        arrays["regime"].attrs.update(
            {
                "long_name": "regime tag of the sample's case",
                "flag_values": list(range(len(regime_names))),
                "flag_meanings": " ".join(regime_names),
            }
        )
        coord_names = "case regime time z y x"
        for name in feats + cols + patches:
            arrays[name].attrs["coordinates"] = coord_names
        writer = None
        if perm is not None:
            writer = _ShuffleWriter(arrays, total, chunk, perm, tmp / ".scratch")
        pos = 0
        for ci, c in enumerate(case_ids):
            meta = {"case": ci, "regime": regime_names.index(regimes.get(c, "") or "none")}
            t_idx, z_idx = kept[c]
            for data in _case_pieces(stores[c], t_idx, z_idx, feats, cols, patches, meta):
                n = data["time"].size
                if writer is None:
                    for name, a in data.items():
                        arrays[name][pos : pos + n] = a.astype(dtypes[name], copy=False)
                else:
                    writer.add(pos, data)
                pos += n
        assert pos == total
        if writer is not None:
            writer.finish()
        prov_inputs = [dict(s.attrs) for s in stores.values()]
        step = provenance.new_step(
            "assemble",
            split=split,
            scale=scale,
            cases=case_ids,
            inputs={c: str(inputs[c]) for c in case_ids},
            samples=total,
            skipped_cases=skipped,
            settings=settings.to_dict(),
            **dict(extra_provenance or {}),
        )
        lineage = provenance.merge(prov_inputs)
        lineage["steps"].append(step)
        history = "\n".join(
            sorted({h for a in prov_inputs for h in str(a.get("history", "")).splitlines() if h})
        )
        root.attrs.update(
            {
                "Conventions": CONVENTIONS,
                "title": f"lesprep training samples, split {split}, scale {scale}",
                "summary": "Coarse cells of whole cases stacked along 'sample' with their "
                "sub-grid statistics, GCM-view inputs and fine patches.",
                "split": split,
                "scale": scale,
                "cases": case_ids,
                "sample_order": "shuffled" if perm is not None else "case, time, z, y, x",
                "history": (
                    history + f"\n{step['created']} lesprep assemble: {split} {scale} "
                    f"({total} samples)"
                ).strip(),
                "date_created": step["created"],
                provenance.ATTR: json.dumps(lineage, sort_keys=True, default=str),
            }
        )
        consolidate(tmp)
    for s in stores.values():
        s.close()
    return Path(out)


def _empty_set(out: str | Path, *, split: str, scale: str, skipped: Mapping[str, str]) -> Path:
    """A store with no samples: every case of the split skipped this scale."""
    with atomic_path(out) as tmp:
        root = zarr.open_group(str(tmp), mode="w-", zarr_format=3)
        step = provenance.new_step(
            "assemble", split=split, scale=scale, cases=[], samples=0, skipped_cases=dict(skipped)
        )
        root.attrs.update(
            {
                "title": f"lesprep training samples, split {split}, scale {scale} (empty)",
                "split": split,
                "scale": scale,
                "cases": [],
                "skipped": "every case of the split skipped this scale",
                provenance.ATTR: json.dumps({"format": 1, "steps": [step]}, default=str),
            }
        )
        consolidate(tmp)
    return Path(out)


class _ShuffleWriter:
    """Two-pass external shuffle.

    Pass 1 appends every sample, as one packed record with its final position, to the
    scratch file of the output chunk it belongs to; pass 2 reads each chunk's file, puts
    the records in place and writes the chunk once.
    """

    def __init__(
        self, arrays: Mapping[str, Any], total: int, chunk: int, perm: np.ndarray, scratch: Path
    ) -> None:
        self.arrays = arrays
        self.total = total
        self.chunk = chunk
        self.perm = perm
        self.nb = math.ceil(total / chunk)
        self.dir = scratch
        self.dir.mkdir(parents=True)
        fields = [("_pos", np.int64)]
        for name, arr in arrays.items():
            fields.append(
                (name, arr.dtype, tuple(arr.shape[1:])) if arr.ndim > 1 else (name, arr.dtype)
            )
        self.record = np.dtype(fields)

    def add(self, start: int, data: Mapping[str, np.ndarray]) -> None:
        n = next(iter(data.values())).shape[0]
        rec = np.empty(n, dtype=self.record)
        rec["_pos"] = self.perm[start : start + n]
        for name, a in data.items():
            rec[name] = a
        bucket = rec["_pos"] // self.chunk
        order = np.argsort(bucket, kind="stable")
        rec = rec[order]
        bounds = np.searchsorted(bucket[order], np.arange(self.nb + 1))
        for b in np.nonzero(np.diff(bounds))[0]:
            with open(self.dir / f"{b}.bin", "ab") as fh:
                fh.write(rec[bounds[b] : bounds[b + 1]].tobytes())

    def finish(self) -> None:
        try:
            for b in range(self.nb):
                lo = b * self.chunk
                hi = min(self.total, lo + self.chunk)
                rec = np.fromfile(self.dir / f"{b}.bin", dtype=self.record)
                if rec.size != hi - lo:
                    raise RuntimeError(f"shuffle chunk {b}: {rec.size} samples, expected {hi - lo}")
                rec = rec[np.argsort(rec["_pos"])]
                for name, arr in self.arrays.items():
                    arr[lo:hi] = rec[name]
        finally:
            shutil.rmtree(self.dir, ignore_errors=True)


def normalization_stats(store: str | Path) -> dict[str, dict[str, float]]:
    """Mean and population standard deviation of every feature and patch variable.

    Streams the store chunk by chunk and merges float64 moments exactly (Chan et al.
    1979). Coordinates (case, regime, time, z, y, x) are not features.
    """
    root = zarr.open_group(str(store), mode="r")
    out: dict[str, dict[str, float]] = {}
    for name, arr in root.arrays():
        if name in COORDS:
            continue
        n_tot, mean, m2 = 0, 0.0, 0.0
        step = arr.chunks[0] * 4
        for lo in range(0, arr.shape[0], step):
            a = np.asarray(arr[lo : lo + step], dtype=np.float64).reshape(-1)
            n = a.size
            if n == 0:
                continue
            ma = float(a.mean())
            m2a = float(((a - ma) ** 2).sum())
            delta = ma - mean
            tot = n_tot + n
            mean += delta * n / tot
            m2 += m2a + delta * delta * n_tot * n / tot
            n_tot = tot
        out[name] = {
            "mean": mean,
            "std": math.sqrt(m2 / n_tot) if n_tot else float("nan"),
            "count": n_tot,
        }
    return out


def write_normalization(
    train_store: str | Path, out_json: str | Path, *, scale: str
) -> dict[str, Any]:
    """Compute train-only normalization statistics, write them as JSON and into attrs."""
    stats = normalization_stats(train_store)  # {} for an empty store
    root = zarr.open_group(str(train_store), mode="r+")
    doc = {
        "scale": scale,
        "split": "train",
        "cases": root.attrs.get("cases"),
        "convention": "mean and population standard deviation (ddof=0) over every "
        "sample (and every patch pixel) of the train split only",
        "created": provenance.utc_now(),
        "statistics": stats,
    }
    root.attrs["normalization"] = json.dumps(doc, sort_keys=True)
    consolidate(train_store)
    out_json = Path(out_json)
    tmp = out_json.with_name(f".{out_json.name}.tmp")
    tmp.write_text(json.dumps(doc, indent=2, sort_keys=True))
    tmp.replace(out_json)
    return doc


def open_set(path: str | Path) -> xr.Dataset:
    """Open a training store with categorical ``case``/``regime`` as coordinates."""
    ds = open_store(path)
    return ds.set_coords([c for c in COORDS if c in ds.data_vars])


def decode_category(ds: xr.Dataset, name: str) -> np.ndarray:
    """Names of a categorical per-sample coordinate (``case`` or ``regime``)."""
    meanings = str(ds[name].attrs["flag_meanings"]).split()
    return np.asarray(meanings)[ds[name].values.astype(int)]


def sample_count(inputs: Sequence[str | Path]) -> int:
    """Samples a set would hold without filters (sum of coarse cells)."""
    n = 0
    for p in inputs:
        ds = open_store(p)
        n += ds.sizes["time"] * ds.sizes["z"] * ds.sizes["y"] * ds.sizes["x"]
        ds.close()
    return n
