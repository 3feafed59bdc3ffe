"""Training stores: every coarse cell of a split's cases as one ``sample`` dimension.

``results/sets/<split>/scale-<L>.zarr`` stacks the coarse cells ``(case, time, z, y, x)``
of all cases of the split along ``sample``, so cases with different grids, heights and
run lengths concatenate. Per-sample coordinates ``case`` and ``regime``, and every case
attribute given to :func:`build_set` (a column of the case sheet), are strings (Zarr v3
``string``, variable-length UTF-8), which xarray decodes to ``str`` by itself: the same
string is the same case in every store. ``time``, ``z``, ``y``, ``x`` are the cell's
coordinates, so any sample maps back to its cell of the per-case store. Features are 1-D
over ``sample``; column features (``lwp_mean``, ``lwp_var``, ``cloud_cover``) and a
pressure profile are repeated for every level of their column; patches are
``(sample, py, px)``. Lagged features ``<f>_lag<k>`` (``sets.lags``) are the same cell's
value ``k`` output times earlier (:mod:`lesprep.sets.lags`).

While a store is assembled, labels travel as small integer codes (with the shuffle's
packed records) and are written as strings unit by unit.

Sample order is the natural order (case, time, z, y, x) unless ``sets.shuffle`` asks for
a seeded random permutation; a reader that shuffles at read time takes whole read units
(root attribute ``sample_unit``, see :mod:`lesprep.sets.chunking`) in random order. The
store is written by streaming: one case and output time at a time is read and handed to
a :class:`~lesprep.sets.chunking.UnitWriter`, which writes each array one whole shard or
chunk at a time, once. With shuffling each piece's samples are first appended to
scratch files (bucket = final position // smallest write unit) and every bucket is then
handed to the writer in order. Memory is one piece plus one unit, not the split.
"""

from __future__ import annotations

import json
import logging
import math
import re
from collections.abc import Iterable, Mapping, Sequence
from concurrent.futures import ThreadPoolExecutor
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import numpy as np
import xarray as xr
import zarr

from lesprep import provenance
from lesprep._memory import retain_freed_memory
from lesprep.errors import ConfigError
from lesprep.sets.chunking import (
    SampleLayout,
    ShuffleWriter,
    UnitWriter,
    plan_layout,
    storage_length,
)
from lesprep.sets.lags import (
    Lag,
    common_interval,
    kept_after_lags,
    lag_attrs,
    output_interval,
    plan_lags,
)
from lesprep.sets.settings import SetSettings
from lesprep.store import CHUNK_KEYS, CONVENTIONS, atomic_path, compressors, consolidate, open_store

log = logging.getLogger(__name__)

COORDS = ("case", "regime", "time", "z", "y", "x")
"""Per-sample coordinates every set store has (case attributes come in addition)."""
LABELS = ("case", "regime")
"""Per-sample coordinates stored as strings (case attributes come in addition)."""
ATTRIBUTE_NAME = re.compile(r"^[A-Za-z][A-Za-z0-9_]*$")
"""Allowed names of case attributes (they become variable names of the store)."""


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
    times: int,
    z: np.ndarray,
    *,
    z_range: Sequence[float] | None,
    time_stride: int,
    lag_steps: Sequence[int] = (),
) -> tuple[np.ndarray, np.ndarray]:
    """Time and level indices a set keeps of a per-case store under its filters.

    Every ``time_stride``-th time from the first, without the first ``max(lag_steps)``
    times (their lags would precede the case); levels with ``z_min <= z <= z_max``.

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
    lag_steps
        Lags of the set's lagged features, in output times (empty: no lags).

    Returns
    -------
    t_idx, z_idx : numpy.ndarray

    Examples
    --------
    >>> import numpy as np
    >>> t, k = kept_indices(5, np.array([50.0, 150.0, 250.0]), z_range=(100, 300), time_stride=2)
    >>> t.tolist(), k.tolist()
    ([0, 2, 4], [1, 2])
    >>> kept_indices(5, np.array([50.0]), z_range=None, time_stride=1, lag_steps=[2])[0].tolist()
    [2, 3, 4]
    """
    t_idx = kept_after_lags(np.arange(0, times, max(1, int(time_stride))), lag_steps)
    z = np.asarray(z, dtype=np.float64)
    z_idx = np.arange(z.size)
    if z_range is not None:
        z_idx = z_idx[(z >= float(z_range[0])) & (z <= float(z_range[1]))]
    return t_idx, z_idx


def _index(idx: np.ndarray) -> slice | np.ndarray:
    """A slice for consecutive indices (a plain range read), else the indices.

    >>> _index(np.array([2, 3, 4])), _index(np.array([0, 2])).tolist()
    (slice(2, 5, None), [0, 2])
    """
    if idx.size and np.all(np.diff(idx) == 1):
        return slice(int(idx[0]), int(idx[-1]) + 1)
    return idx


def _case_pieces(
    ds: xr.Dataset,
    group: Any,
    t_idx: np.ndarray,
    z_idx: np.ndarray,
    feats: Sequence[str],
    cols: Sequence[str],
    patches: Sequence[str],
    codes: Mapping[str, int],
    lags: Sequence[Lag] = (),
    *,
    limit_bytes: int = 128 * 2**20,
    threads: int = 1,
):
    """Yield the samples of each kept time of one case, in (z, y, x) order.

    Several times are read per array access (up to ``limit_bytes``), which is far faster
    than one read per time for small coarse grids, and memory stays bounded. The arrays
    are read straight from the zarr ``group`` of ``ds`` (its values as stored, as xarray
    gives them), ``threads`` at a time, and the next block of times is read while the
    current one is handed out (memory: two blocks). ``codes`` holds the case's code of
    every label coordinate; each lagged feature is read at the times its lags need
    (``t_idx`` holds no time whose lag precedes the case).
    """
    ny, nx = ds.sizes["y"], ds.sizes["x"]
    nz = z_idx.size
    n = nz * ny * nx
    lagged = sorted({lag.feature for lag in lags})
    steps = sorted({lag.steps for lag in lags})
    per_time = sum(
        ds[v].dtype.itemsize * n * (math.prod(ds[v].shape[-2:]) if v in patches else 1)
        for v in [*feats, *patches, *lagged]
    ) + sum(ds[v].dtype.itemsize * n * len(steps) for v in lagged)
    block = int(max(1, limit_bytes // 2 // max(1, per_time)))
    zz, yy, xx = np.meshgrid(ds.z.values[z_idx], ds.y.values, ds.x.values, indexing="ij")
    zz, yy, xx = zz.reshape(-1), yy.reshape(-1), xx.reshape(-1)
    profiles = {
        c: np.ascontiguousarray(np.broadcast_to(ds[c].values[z_idx][:, None, None], (nz, ny, nx)))
        for c in cols
        if ds[c].dims == ("z",)
    }
    zsel = _index(z_idx)
    times = ds.time.values

    def read(v: str, t: np.ndarray) -> np.ndarray:
        if v in feats or v in patches:
            return group[v].oindex[_index(t), zsel]
        return group[v].oindex[_index(t)]

    def per_cell(v: str, a: np.ndarray) -> np.ndarray:
        if v in cols:
            return np.ascontiguousarray(np.broadcast_to(a[None], (nz, ny, nx))).reshape(-1)
        return a.reshape(-1)

    def load(tb: np.ndarray) -> tuple[dict, np.ndarray, dict]:
        now = [*feats, *patches, *(c for c in cols if c not in profiles)]
        past_t = np.unique(np.concatenate([tb - k for k in steps])) if steps else tb[:0]
        jobs = [(v, tb) for v in now] + [(v, past_t) for v in lagged]
        got = list(pool.map(lambda job: read(*job), jobs))
        past = dict(zip(lagged, got[len(now) :], strict=True))
        return dict(zip(now, got[: len(now)], strict=True)), past_t, past

    blocks = [t_idx[b0 : b0 + block] for b0 in range(0, t_idx.size, block)]
    with ThreadPoolExecutor(max(1, threads)) as pool, ThreadPoolExecutor(1) as ahead:
        pending = ahead.submit(load, blocks[0]) if blocks else None
        for i, tb in enumerate(blocks):
            data, past_t, past = pending.result()
            pending = ahead.submit(load, blocks[i + 1]) if i + 1 < len(blocks) else None
            for k, t in enumerate(tb):
                out: dict[str, np.ndarray] = {}
                for v in feats:
                    out[v] = data[v][k].reshape(-1)
                for v in cols:
                    out[v] = profiles[v].reshape(-1) if v in profiles else per_cell(v, data[v][k])
                for v in patches:
                    a = data[v][k]
                    out[v] = a.reshape(-1, a.shape[-2], a.shape[-1])
                for lag in lags:
                    j = int(np.searchsorted(past_t, t - lag.steps))
                    out[lag.name] = per_cell(lag.feature, past[lag.feature][j])
                out["time"] = np.full(n, float(times[t]))
                out["z"], out["y"], out["x"] = zz, yy, xx
                for name, code in codes.items():
                    out[name] = np.full(n, code, dtype=np.int32)
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


def label_vocabulary(
    case_ids: Sequence[str],
    regimes: Mapping[str, str],
    attributes: Mapping[str, Mapping[str, Any]],
    *,
    taken: Sequence[str] = (),
) -> dict[str, dict[str, str]]:
    """Label coordinate -> case id -> that case's string, for the cases of a set.

    Parameters
    ----------
    case_ids
        The set's cases.
    regimes
        Case id -> regime tag (empty or missing: ``none``).
    attributes
        Case id -> {attribute: value}; values become strings, a case without an
        attribute that another case has gets the empty string.
    taken
        Names of the store's other variables (an attribute may not reuse one).

    Raises
    ------
    ConfigError
        If an attribute name is not a plain identifier or is taken.

    Examples
    --------
    >>> v = label_vocabulary(["a", "b"], {"a": "cumulus"}, {"a": {"site": "x1"}})
    >>> v["regime"], v["site"]
    ({'a': 'cumulus', 'b': 'none'}, {'a': 'x1', 'b': ''})
    """
    out: dict[str, dict[str, str]] = {
        "case": {c: str(c) for c in case_ids},
        "regime": {c: str(regimes.get(c, "") or "none") for c in case_ids},
    }
    names = sorted({str(k) for c in case_ids for k in (attributes.get(c) or {})})
    for name in names:
        if not ATTRIBUTE_NAME.match(name) or name in (*COORDS, "sample", *taken):
            raise ConfigError(
                f"case attribute {name!r} cannot be a per-sample coordinate: expected a name "
                "of letters, digits and _ (starting with a letter) that is not already "
                f"a coordinate ({', '.join(COORDS)}, sample) or a feature of the store",
                variable=name,
                hint="rename that column of the case sheet",
            )
        out[name] = {c: str((attributes.get(c) or {}).get(name, "")) for c in case_ids}
    return out


def _codes(vocab: Mapping[str, Mapping[str, str]]) -> tuple[dict[str, np.ndarray], dict]:
    """(label -> its sorted distinct strings, case -> label -> code into them)."""
    distinct = {k: sorted(set(v.values())) for k, v in vocab.items()}
    index = {k: {text: i for i, text in enumerate(v)} for k, v in distinct.items()}
    codes = {c: {k: index[k][vocab[k][c]] for k in vocab} for c in vocab["case"]}
    names = {k: np.asarray(v, dtype=object) for k, v in distinct.items()}  # fast to index
    return names, codes


_LABEL_LONG_NAMES = {"case": "case id of the sample", "regime": "regime tag of the sample's case"}


def build_set(
    inputs: Mapping[str, str | Path],
    regimes: Mapping[str, str],
    out: str | Path,
    settings: SetSettings,
    *,
    split: str,
    scale: str,
    attributes: Mapping[str, Mapping[str, Any]] | None = None,
    extra_provenance: Mapping[str, Any] | None = None,
    threads: int = 1,
    statistics: dict[str, dict[str, float]] | None = None,
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
    attributes
        Case id -> {attribute: value} (columns of the case sheet): each attribute becomes
        a string coordinate per sample; None or empty adds nothing.
    extra_provenance
        Extra fields of the provenance step (split rule, assignment, ...).
    threads
        Arrays encoded and written concurrently.
    statistics
        If given, filled with the normalization statistics of the written store (what
        :func:`normalization_stats` computes from it), collected while writing.

    Raises
    ------
    ConfigError
        Cases coarsened differently, filters leaving no sample, an unusable case
        attribute or lagged feature.
    TimeAxisError
        With ``settings.lag_features``: a case whose output interval is not regular.
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
    first = stores[case_ids[0]]
    where = f"split {split} at scale {scale}"
    kinds = {str(n): feature_kind(tuple(v.dims)) or "other" for n, v in first.data_vars.items()}
    lags = plan_lags(settings.lag_features, settings.lag_steps, kinds, where=where)
    intervals = {
        c: output_interval(ds.time.values, case=c, file=str(inputs[c]))
        for c, ds in stores.items()
        if lags
    }
    if lags and common_interval(intervals) is None:
        log.warning(
            "%s: the cases' output intervals differ (%s); a lag of k output times spans "
            "k times the case's own interval (attribute lag_s_by_case)",
            where,
            ", ".join(f"{c} {v:g} s" for c, v in intervals.items() if v is not None),
        )
    vocab = label_vocabulary(
        case_ids, regimes, attributes or {}, taken=[*kinds, *(lag.name for lag in lags)]
    )
    names, codes = _codes(vocab)
    pieces: list[_Piece] = []
    kept: dict[str, tuple[np.ndarray, np.ndarray]] = {}
    for ci, c in enumerate(case_ids):
        ds = stores[c]
        t_idx, z_idx = kept_indices(
            ds.sizes["time"],
            ds.z.values,
            z_range=settings.z_range,
            time_stride=settings.time_stride,
            lag_steps=[lag.steps for lag in lags],
        )
        kept[c] = (t_idx, z_idx)
        n = z_idx.size * ds.sizes["y"] * ds.sizes["x"]
        pieces.extend(_Piece(ci, int(t), n) for t in t_idx)
    total = int(sum(p.n for p in pieces))
    if total == 0:
        raise ConfigError(
            f"{where}: the filters leave no sample",
            hint="widen sets.z_range, lower sets.time_stride or shorten sets.lags.steps",
        )
    dtype = np.dtype(settings.dtype)
    patch_shape = {n: tuple(first[n].shape[-2:]) for n in patches}
    perm = None
    if settings.shuffle:
        perm = np.random.default_rng(settings.shuffle_seed).permutation(total)
    # in-flight dtypes (labels as codes); the store holds labels as strings
    dtypes: dict[str, np.dtype] = {
        **{n: dtype for n in [*feats, *cols, *patches, *(lag.name for lag in lags)]},
        **{n: np.dtype("float64") for n in ("time", "z", "y", "x")},
        **{n: np.dtype("int32") for n in vocab},
    }
    shapes = {n: patch_shape.get(n, ()) for n in dtypes}
    layout = plan_layout(
        {n: dt.itemsize * math.prod(shapes[n]) for n, dt in dtypes.items()},
        total,
        chunking=settings.chunking,
        chunk_mib=settings.chunk_mib,
        shard_mib=settings.shard_mib,
    )
    coord_names = " ".join(
        ["case", "regime", *sorted(set(vocab) - set(LABELS)), "time", "z", "y", "x"]
    )
    with atomic_path(out) as tmp:
        root = zarr.open_group(str(tmp), mode="w-", zarr_format=3)
        arrays: dict[str, Any] = {}
        lag_of = {lag.name: lag for lag in lags}
        for name, dt in dtypes.items():
            dims = ["sample", "py", "px"] if name in patches else ["sample"]
            label = name in vocab
            attrs = dict(sample_attrs(name, first[name].attrs, stores)) if name in first else {}
            if label:
                attrs["long_name"] = _LABEL_LONG_NAMES.get(
                    name, f"case attribute {name} of the sample's case"
                )
            elif name not in COORDS:
                attrs["coordinates"] = coord_names
            if name in lag_of:
                lag = lag_of[name]
                attrs.update(lag_attrs(first[lag.feature].attrs, lag, intervals))
                attrs["coordinates"] = coord_names
            arrays[name] = root.create_array(
                name,
                shape=(total, *shapes[name]),
                chunks=(layout.chunks[name], *shapes[name]),
                shards=(layout.shard, *shapes[name]) if layout.shard else None,
                dtype=str if label else dt,
                compressors=compressors(settings.store),
                fill_value="" if label else 0.0,
                dimension_names=dims,
                chunk_key_encoding=CHUNK_KEYS,
                attributes=attrs,
            )
        moments = None
        if statistics is not None:
            moments = {n: {} for n, dt in dtypes.items() if n not in vocab and is_statistic(n, dt)}
        writer = _writer(
            arrays, names, dtypes, shapes, layout, total, threads=threads, moments=moments
        )
        shuffler = None
        if perm is not None:
            shuffler = ShuffleWriter(writer, layout.bucket, perm, tmp / ".scratch")
        for c in case_ids:
            t_idx, z_idx = kept[c]
            group = zarr.open_group(str(inputs[c]), mode="r")
            for data in _case_pieces(
                stores[c], group, t_idx, z_idx, feats, cols, patches, codes[c], lags,
                threads=threads,
            ):  # fmt: skip
                if shuffler is None:
                    writer.add(data)
                else:
                    shuffler.add(data)
        if shuffler is not None:
            shuffler.finish()
        writer.close()
        if moments is not None and statistics is not None:
            statistics.clear()
            for n in sorted(moments):
                statistics[n] = merge_moments(moments[n][lo] for lo in sorted(moments[n]))
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
            case_attributes={k: vocab[k] for k in vocab if k not in LABELS},
            output_intervals_s=intervals,
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
                "sample_labels": list(vocab),
                "sample_order": "shuffled" if perm is not None else "case, time, z, y, x",
                "sample_unit": layout.unit,
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


def _writer(
    arrays: Mapping[str, Any],
    names: Mapping[str, np.ndarray],
    dtypes: Mapping[str, np.dtype],
    shapes: Mapping[str, tuple[int, ...]],
    layout: SampleLayout,
    total: int,
    *,
    threads: int,
    moments: dict[str, dict[int, tuple[int, float, float]]] | None = None,
) -> UnitWriter:
    """A unit writer into the store's arrays that writes labels as strings.

    With ``moments``, every written unit of a statistic array adds its
    :func:`block_moments` under ``moments[name][lo]``.
    """

    def write(name: str, lo: int, hi: int, values: np.ndarray) -> None:
        if name in names:
            arrays[name][lo:hi] = names[name][values]
            return
        stored = values.astype(dtypes[name], copy=False)
        arrays[name][lo:hi] = stored
        if moments is not None and name in moments:
            moments[name][lo] = block_moments(stored)

    units = {n: layout.write_unit(n) for n in arrays}
    return UnitWriter(write, units, shapes, dtypes, total, threads=threads)


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


def block_moments(a: np.ndarray) -> tuple[int, float, float]:
    """(count, mean, sum of squared deviations) of one block, in float64.

    >>> block_moments(np.array([1.0, 2.0, 3.0], dtype=np.float32))
    (3, 2.0, 2.0)
    """
    a = np.asarray(a, dtype=np.float64).reshape(-1)
    if a.size == 0:
        return 0, 0.0, 0.0
    mean = float(a.mean())
    return int(a.size), mean, float(((a - mean) ** 2).sum())


def merge_moments(blocks: Iterable[tuple[int, float, float]]) -> dict[str, float]:
    """Mean, population standard deviation and count of blocks merged in order.

    The merge is exact in real arithmetic (Chan et al. 1979); in floating point it
    depends on the order, so blocks are merged in sample order.

    >>> merge_moments([block_moments(np.arange(3.0)), block_moments(np.arange(3.0, 10))])
    {'mean': 4.5, 'std': 2.8722813232690143, 'count': 10}
    """
    n_tot, mean, m2 = 0, 0.0, 0.0
    for n, ma, m2a in blocks:
        if n == 0:
            continue
        delta = ma - mean
        tot = n_tot + n
        mean += delta * n / tot
        m2 += m2a + delta * delta * n_tot * n / tot
        n_tot = tot
    return {"mean": mean, "std": math.sqrt(m2 / n_tot) if n_tot else float("nan"), "count": n_tot}


def is_statistic(name: str, dtype: Any) -> bool:
    """Whether a set array gets normalization statistics (floating, not a coordinate)."""
    return name not in COORDS and np.dtype(dtype).kind == "f"


def normalization_stats(store: str | Path) -> dict[str, dict[str, float]]:
    """Mean and population standard deviation of every feature and patch variable.

    Streams the store one shard (else chunk) at a time and merges float64 moments in
    sample order (:func:`merge_moments`), the blocks in which :func:`build_set` computes
    them while writing. Coordinates (case, regime, case attributes, time, z, y, x) are
    not features; lagged features are.
    """
    root = zarr.open_group(str(store), mode="r")
    out: dict[str, dict[str, float]] = {}
    for name, arr in root.arrays():
        if not is_statistic(name, arr.dtype):
            continue
        step = storage_length(arr)
        n = arr.shape[0]
        out[name] = merge_moments(block_moments(arr[lo : lo + step]) for lo in range(0, n, step))
    return out


def write_normalization(
    train_store: str | Path,
    out_json: str | Path,
    *,
    scale: str,
    stats: Mapping[str, Mapping[str, float]] | None = None,
) -> dict[str, Any]:
    """Write train-only normalization statistics as JSON and into attrs.

    ``stats`` are those :func:`build_set` collected while writing the store; None
    computes them from the store (:func:`normalization_stats`).
    """
    if stats is None:
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
    """Open a training store with every per-sample coordinate as a coordinate.

    ``xr.open_zarr`` alone does as much for a store with features (their ``coordinates``
    attribute names the coordinates); this also covers a store without features.
    """
    ds = open_store(path)
    labels = [str(n) for n in ds.attrs.get("sample_labels", ())]
    return ds.set_coords([c for c in (*COORDS, *labels) if c in ds.data_vars])


def label_values(arr: Any, index: Any = None) -> np.ndarray:
    """Strings of a per-sample label (``case``, ``regime``, a case attribute).

    Reads a zarr array, an xarray variable or a numpy array, whole or at the samples
    ``index`` (an integer array). Stores written before labels were strings hold small
    integers with the names in ``flag_meanings``; they are decoded here, so readers
    handle both.

    Examples
    --------
    >>> label_values(np.asarray(["a", "b"], dtype=object)).tolist()
    ['a', 'b']
    """
    attrs = getattr(arr, "attrs", {})
    values = np.asarray(arr[...] if index is None else arr[np.asarray(index)])
    if values.dtype.kind in "iu" and "flag_meanings" in attrs:
        return np.asarray(str(attrs["flag_meanings"]).split(), dtype=object)[values.astype(int)]
    return values.astype(object)


def decode_category(ds: xr.Dataset, name: str) -> np.ndarray:
    """Names of a per-sample label of an opened set (``case``, ``regime``, an attribute).

    Kept for callers of earlier versions: a label now reads as strings by itself
    (``ds[name].values``); this also decodes the integer codes of older stores.
    """
    return label_values(ds[name])


def sample_count(inputs: Sequence[str | Path]) -> int:
    """Samples a set would hold without filters (sum of coarse cells)."""
    n = 0
    for p in inputs:
        ds = open_store(p)
        n += ds.sizes["time"] * ds.sizes["z"] * ds.sizes["y"] * ds.sizes["x"]
        ds.close()
    return n
