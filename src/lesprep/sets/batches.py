"""Minibatches of a set store as dicts of numpy arrays: the batch reader.

:class:`BatchReader` reads a training store (:mod:`lesprep.sets.assemble`) in read units
aligned to its storage (:mod:`lesprep.sets.batchplan`), shuffles units per epoch and
samples within a buffer of units, applies the train normalization
(:mod:`lesprep.sets.standardize`) and, on request, one symmetry of the square per sample
(:mod:`lesprep.sets.symmetry`). Filters and scene labels are decided before the first
read (:mod:`lesprep.sets.selection`). A background thread reads and assembles the next
batches while the consumer works; an error there is raised in the consumer.

Each batch is a dict: every chosen feature ``(n,)``, patch variable ``(n, py, px)`` and
the target ``(n,)`` (float, normalized unless asked otherwise), ``sample`` (the store
index of each sample, int64), the requested coordinates (``case`` and other labels as
``str`` objects, ``time z y x`` as float64), ``scene_label`` (int64) when a regimes table
is joined, and ``symmetry`` (int8, the element of D4 applied) when augmenting.

The reader's position (epoch, batches delivered in it) is a small dict
(:meth:`BatchReader.save_state`) that resumes a run mid-epoch with exactly the batches
that were not yet delivered. See ``docs/reader.md`` for use with a framework's data
loader.
"""

from __future__ import annotations

import copy
import functools
import os
import queue
import re
import threading
import warnings
from collections.abc import Callable, Iterator, Mapping, Sequence
from concurrent.futures import ThreadPoolExecutor
from pathlib import Path
from typing import Any

import numpy as np
import zarr
from numpy.typing import NDArray
from zarr.core.buffer import default_buffer_prototype

from lesprep.errors import ConfigError
from lesprep.sets import batchplan as plan
from lesprep.sets import selection, symmetry
from lesprep.sets.assemble import COORDS, LABELS, label_values
from lesprep.sets.standardize import Statistics, read_statistics

Batch = dict[str, NDArray]
STATE_FORMAT = 1
_DIRECTIONAL = re.compile(r"(^|_)[uv](_|$)")
_BLOCK = 1 << 22  # samples per block of the up-front reads
_PROTOTYPE = default_buffer_prototype()
BLOCK_BATCHES = 16
"""Batches gathered together by one pass over the arrays (Python work per batch is then a
few slices), and handed from the reading thread to the consumer as one item."""


class BatchReader:
    """Iterate over minibatches of a set store.

    Parameters
    ----------
    store
        Path of a set store, or an open zarr group of one (a path keeps the reader
        picklable, which a framework's worker processes need).
    features
        1-D features to deliver; None: every 1-D floating array that is not a coordinate
        nor the target.
    patches
        Patch variables ``(sample, py, px)``; None: every patch variable of the store.
    target
        The variable to predict (default ``cloud_fraction``); None: no target.
    coords
        Per-sample coordinates to deliver as they are (``case``, ``regime``, case
        attributes, ``time``, ``z``, ``y``, ``x``).
    batch_size, epochs, seed
        Samples per batch, epochs of :meth:`__iter__`, seed of every random choice.
    shuffle
        Shuffle units per epoch and samples within each buffer; False: store order.
    buffer_units
        Read units per shuffle buffer; randomness grows with it, and so does memory (two
        buffers: the one served and the one read ahead).
    drop_last
        Drop a last batch shorter than ``batch_size`` (per worker and epoch).
    normalize, statistics, normalize_target
        Apply ``(x - mean) / std`` of the train statistics to features and patches (and to
        the target if ``normalize_target``). ``statistics``: a ``normalization.json``, its
        loaded document, or None for the store's root attribute ``normalization``.
    z_range
        Keep samples with ``z_range[0] <= z <= z_range[1]`` (m).
    cloudy_only
        Keep samples with ``cloud_fraction > 0``.
    where
        Variable -> value or list of values to keep (``{"regime": "cumulus"}``,
        ``{"case": [...]}``, ``{"scene_label": [1, 2]}``); 1-D arrays or coordinates.
    scene_labels, label_fill
        The regimes table (``results/regimes.tsv``) to join on ``(case, time)`` as
        ``scene_label``; a sample without a row is an error unless ``label_fill`` is given.
    augment, vectors
        Apply one random element of D4 per sample to its patches (off by default); the
        ``(x, y)`` component pairs in ``vectors`` are turned as vectors (None: every chosen
        ``u_<s>`` with its ``v_<s>``).
    worker, workers
        This reader's share of every epoch: worker ``worker`` of ``workers``.
    prefetch
        Batches the background thread may have ready (0: no thread). The thread gathers
        and hands over blocks of :data:`BLOCK_BATCHES` batches, so up to that many more
        are held.
    read_threads
        Threads that read and decompress the arrays of a buffer concurrently.
    """

    def __init__(
        self,
        store: str | Path | zarr.Group,
        *,
        features: Sequence[str] | None = None,
        patches: Sequence[str] | None = None,
        target: str | None = "cloud_fraction",
        coords: Sequence[str] = (),
        batch_size: int = 256,
        epochs: int = 1,
        seed: int = 0,
        shuffle: bool = True,
        buffer_units: int = 8,
        drop_last: bool = False,
        normalize: bool = True,
        statistics: str | Path | Mapping[str, Any] | None = None,
        normalize_target: bool = False,
        z_range: Sequence[float] | None = None,
        cloudy_only: bool = False,
        where: Mapping[str, selection.Condition] | None = None,
        scene_labels: str | Path | None = None,
        label_fill: int | None = None,
        augment: bool = False,
        vectors: Sequence[tuple[str, str]] | None = None,
        worker: int = 0,
        workers: int = 1,
        prefetch: int = 4,
        read_threads: int = 2,
    ) -> None:
        self._path = None if isinstance(store, zarr.Group) else str(store)
        self._root: zarr.Group | None = store if isinstance(store, zarr.Group) else None
        self.name = self._path or str(getattr(store, "store", "set store"))
        root = self._group()
        arrays = {str(k): a for k, a in root.arrays()}
        if "case" not in arrays:
            raise ConfigError(
                f"{self.name} has no per-sample coordinate 'case'; expected a set store "
                f"(found {sorted(arrays)[:10]})",
                file=self.name,
                hint="open a store written by the set assembly (results/sets/...)",
            )
        self.n_samples = int(arrays["case"].shape[0])
        self.labels = tuple(dict.fromkeys([*LABELS, *root.attrs.get("sample_labels", [])]))
        not_features = {*COORDS, *self.labels}
        floats = sorted(
            n
            for n, a in arrays.items()
            if a.ndim == 1 and n not in not_features and np.dtype(a.dtype).kind == "f"
        )
        patch_vars = sorted(n for n, a in arrays.items() if a.ndim == 3)
        self.target = target
        if target is not None:
            self._need(arrays, [target], "target")
        self.features = tuple([f for f in floats if f != target] if features is None else features)
        self.patches = tuple(patch_vars if patches is None else patches)
        self.coords = tuple(coords)
        self._need(arrays, self.features, "feature", allowed=floats)
        self._need(arrays, self.patches, "patch variable", allowed=patch_vars)
        self._need(arrays, self.coords, "coordinate", allowed=[*COORDS, *self.labels])
        if target is not None and target in (*self.features, *self.patches):
            raise ConfigError(
                f"{target!r} is both the target and an input",
                variable=target,
                file=self.name,
                hint="leave the target out of features and patches",
            )
        self.batch_size = _positive(batch_size, "batch_size")
        self.epochs = int(epochs)
        self.seed = int(seed)
        self.shuffle = bool(shuffle)
        self.buffer_units = _positive(buffer_units, "buffer_units")
        self.drop_last = bool(drop_last)
        plan.check_worker(worker, workers)
        self.worker, self.workers = int(worker), int(workers)
        self.prefetch = max(0, int(prefetch))
        self.read_threads = _positive(read_threads, "read_threads")
        self.augment = bool(augment)
        self.vectors = self._vectors(vectors)
        self._check_augment(arrays)
        self.read_names = tuple(
            dict.fromkeys(
                [*self.features, *self.patches, *([target] if target else []), *self.coords]
            )
        )
        self.unit = plan.storage_unit(
            [(arrays[n].shards or arrays[n].chunks)[0] for n in self.read_names or ["case"]]
        )
        self.normalized = (
            tuple(
                [*self.features, *self.patches, *([target] if target and normalize_target else [])]
            )
            if normalize
            else ()
        )
        self.statistics: Statistics | None = None
        if normalize:
            self.statistics = read_statistics(statistics, root.attrs, self.name)
            self.statistics.check(list(self.normalized))
        self.where = dict(where or {})
        self._scene: NDArray[np.int64] | None = None
        self.kept = self._select(arrays, z_range, cloudy_only, scene_labels, label_fill)
        self._per_unit = (
            plan.kept_per_unit(self.kept, self.unit)
            if self.kept is not None
            else np.diff(
                [
                    min(self.n_samples, u * self.unit)
                    for u in range(plan.unit_count(self.unit, self.n_samples) + 1)
                ]
            ).astype(np.int64)
        )
        self.units = np.flatnonzero(self._per_unit > 0).astype(np.int64)
        self.n_selected = int(self._per_unit.sum())
        self._epoch, self._batch = 0, 0

    # -- set-up ---------------------------------------------------------------------------

    def _group(self) -> zarr.Group:
        if self._root is None:
            with warnings.catch_warnings():
                warnings.filterwarnings("ignore", message=".*[Cc]onsolidated metadata.*")
                self._root = zarr.open_group(str(self._path), mode="r")
        return self._root

    def _need(
        self,
        arrays: Mapping[str, Any],
        names: Sequence[str],
        what: str,
        allowed: Sequence[str] | None = None,
    ) -> None:
        for name in names:
            if name not in arrays or (allowed is not None and name not in allowed):
                choices = sorted(allowed if allowed is not None else arrays)
                raise ConfigError(
                    f"{self.name} has no {what} {name!r}; expected one of {choices}",
                    file=self.name,
                    variable=name,
                )

    def _vectors(self, vectors: Sequence[tuple[str, str]] | None) -> tuple[tuple[str, str], ...]:
        chosen = [*self.features, *self.patches]
        if vectors is None:
            return tuple(
                (n, "v_" + n[2:]) for n in chosen if n.startswith("u_") and "v_" + n[2:] in chosen
            )
        for pair in vectors:
            if len(pair) != 2 or any(n not in chosen for n in pair):
                raise ConfigError(
                    f"vector pair {tuple(pair)} of {self.name}: expected two chosen features "
                    f"or patch variables (chosen: {chosen})",
                    file=self.name,
                )
        return tuple((str(a), str(b)) for a, b in vectors)

    def _check_augment(self, arrays: Mapping[str, Any]) -> None:
        if not self.augment:
            return
        paired = {n for pair in self.vectors for n in pair}
        for name in [*self.features, *self.patches]:
            if _DIRECTIONAL.search(name) and name not in paired:
                raise ConfigError(
                    f"{name!r} depends on the direction of the horizontal wind but is not one "
                    "component of a vector pair, so a rotation or reflection would leave it "
                    "wrong (a variance of u becomes one of v, a covariance with u changes sign)",
                    file=self.name,
                    variable=name,
                    hint="leave it out, declare its pair in vectors, or augment=False",
                )
        for name in self.patches:
            py, px = arrays[name].shape[1:]
            if py != px:
                raise ConfigError(
                    f"patches of {name!r} are {py} x {px}; the symmetries of the square need "
                    "square patches",
                    file=self.name,
                    variable=name,
                    hint="augment=False",
                )

    def _select(
        self,
        arrays: Mapping[str, Any],
        z_range: Sequence[float] | None,
        cloudy_only: bool,
        scene_labels: str | Path | None,
        label_fill: int | None,
    ) -> NDArray[np.bool_] | None:
        """Per-sample selection, read block by block from the small 1-D arrays."""
        names = set(self.where) - {selection.SCENE_KEY}
        for name in names:
            self._need(
                arrays,
                [name],
                "1-D variable for a condition",
                allowed=[n for n, a in arrays.items() if a.ndim == 1],
            )
        if selection.SCENE_KEY in self.where and scene_labels is None:
            raise ConfigError(
                f"a condition on {selection.SCENE_KEY!r} needs the regimes table",
                hint="pass scene_labels='results/regimes.tsv'",
            )
        if cloudy_only:
            self._need(arrays, ["cloud_fraction"], "variable for cloudy_only")
        table = None
        if scene_labels is not None:
            table = selection.read_scene_table(scene_labels)
            self._scene = np.empty(self.n_samples, dtype=np.int64)
        filtered = bool(names or z_range is not None or cloudy_only or self.where)
        if not filtered and table is None:
            return None
        kept = np.ones(self.n_samples, dtype=bool) if filtered else None
        step = max(self.unit, (_BLOCK // self.unit) * self.unit)
        for lo in range(0, self.n_samples, step):
            hi = min(self.n_samples, lo + step)
            masks = []
            if table is not None:
                assert self._scene is not None
                self._scene[lo:hi] = selection.join_scene_labels(
                    self._column(arrays, "case", lo, hi),
                    self._column(arrays, "time", lo, hi),
                    table,
                    source=str(scene_labels),
                    fill=label_fill,
                )
            if z_range is not None:
                masks.append(selection.range_mask(self._column(arrays, "z", lo, hi), z_range))
            if cloudy_only:
                masks.append(self._column(arrays, "cloud_fraction", lo, hi) > 0)
            for name, wanted in self.where.items():
                values = (
                    self._scene[lo:hi]
                    if name == selection.SCENE_KEY and self._scene is not None
                    else self._column(arrays, name, lo, hi)
                )
                masks.append(selection.condition_mask(values, wanted))
            if kept is not None:
                piece = selection.combine(masks, hi - lo)
                if piece is not None:
                    kept[lo:hi] = piece
        return kept

    def _column(self, arrays: Mapping[str, Any], name: str, lo: int, hi: int) -> NDArray:
        if name in self.labels:
            return label_values(arrays[name], np.arange(lo, hi))
        return np.asarray(arrays[name][lo:hi])

    # -- workers, state -------------------------------------------------------------------

    def for_worker(self, worker: int, workers: int) -> BatchReader:
        """A copy of this reader that reads worker ``worker``'s share of ``workers``."""
        plan.check_worker(worker, workers)
        out = copy.copy(self)
        out.worker, out.workers = int(worker), int(workers)
        out._epoch, out._batch = self._epoch, self._batch
        return out

    def _fingerprint(self) -> dict[str, Any]:
        return {
            "seed": self.seed,
            "batch_size": self.batch_size,
            "buffer_units": self.buffer_units,
            "shuffle": self.shuffle,
            "drop_last": self.drop_last,
            "augment": self.augment,
            "worker": self.worker,
            "workers": self.workers,
            "unit": self.unit,
            "samples_selected": self.n_selected,
        }

    def save_state(self) -> dict[str, Any]:
        """The reader's position as a plain dict (JSON-ready).

        ``epoch`` and ``batch`` (batches of that epoch already delivered) plus the
        settings the position depends on, which :meth:`restore_state` checks.
        """
        return {
            "format": STATE_FORMAT,
            "epoch": self._epoch,
            "batch": self._batch,
            **self._fingerprint(),
        }

    def restore_state(self, state: Mapping[str, Any]) -> None:
        """Continue from a :meth:`save_state` position (same store, settings and worker).

        Raises
        ------
        ConfigError
            If the state was saved by a reader with other settings.
        """
        mine = self._fingerprint()
        diff = {k: (state.get(k), v) for k, v in mine.items() if state.get(k) != v}
        if state.get("format") != STATE_FORMAT or diff:
            found = ", ".join(f"{k} {a!r} (this reader: {b!r})" for k, (a, b) in diff.items())
            raise ConfigError(
                f"saved reader state does not fit this reader: {found or 'unknown format'}",
                file=self.name,
                hint="resume with the settings, worker split and filters of the saved run",
            )
        self._epoch, self._batch = int(state["epoch"]), int(state["batch"])

    # -- the plan -------------------------------------------------------------------------

    def _groups(self, epoch: int) -> list[NDArray[np.int64]]:
        order = plan.epoch_unit_order(self.units, epoch=epoch, seed=self.seed, shuffle=self.shuffle)
        mine = plan.worker_units(order, self.worker, self.workers)
        return plan.buffer_groups(mine, self.buffer_units)

    def samples_in_epoch(self, epoch: int) -> int:
        """Selected samples this worker delivers in ``epoch`` (before ``drop_last``)."""
        return int(plan.buffer_sizes(self._groups(epoch), self._per_unit).sum())

    def batches_in_epoch(self, epoch: int) -> int:
        """Batches this worker delivers in ``epoch``."""
        return plan.batch_count(
            self.samples_in_epoch(epoch), self.batch_size, drop_last=self.drop_last
        )

    # -- iteration ------------------------------------------------------------------------

    def __iter__(self) -> Iterator[Batch]:
        """Batches of every epoch from the saved position to ``epochs``; tracks the state."""
        while self._epoch < self.epochs:
            epoch = self._epoch
            for batch in self.epoch_batches(epoch, start=self._batch):
                self._batch += 1
                yield batch
            self._epoch, self._batch = epoch + 1, 0

    def epoch_batches(self, epoch: int, *, start: int = 0) -> Iterator[Batch]:
        """Batches ``start, start + 1, ...`` of one epoch (this worker's share).

        Reading runs on a background thread when ``prefetch > 0``; closing the iterator
        stops it.
        """
        make = functools.partial(self._produce, int(epoch), int(start))
        if self.prefetch == 0:
            return _flatten(make())
        # the thread hands over blocks of batches: ``prefetch`` batches ahead at least
        return _flatten(prefetched(make, -(-self.prefetch // BLOCK_BATCHES)))

    def _produce(self, epoch: int, start: int) -> Iterator[list[Batch]]:
        """Lists of consecutive batches: blocks of up to :data:`BLOCK_BATCHES` batches
        gathered at once (one kernel call per array and block), or single augmented ones."""
        groups = self._groups(epoch)
        sizes = plan.buffer_sizes(groups, self._per_unit)
        total = int(sizes.sum())
        bs = self.batch_size
        n_batches = plan.batch_count(total, bs, drop_last=self.drop_last)
        if start >= n_batches:
            return
        end = n_batches * bs if self.drop_last else total
        pos = start * bs
        g0, skip = plan.locate(sizes, pos)
        pieces: list[tuple[Batch, NDArray[np.int64], NDArray[np.int8] | None]] = []
        block: Batch = {}
        ids = np.empty(0, np.int64)
        filled = size = 0  # samples in the current block (or augmented batch), its length
        ahead = ThreadPoolExecutor(1)  # reads the next buffer while this one is served
        # two sets of buffer arrays, used in turn: reused memory is not paged in again
        spaces: list[Batch] = [{}, {}]
        try:
            future = ahead.submit(self._read, groups[g0], spaces[g0 % 2])
            for g in range(g0, len(groups)):
                buf = self._buffer(epoch, g, groups[g])
                try:
                    data = future.result()
                except BaseException:
                    if not self.augment and filled >= bs:  # the whole batches read so far
                        block["sample"] = ids
                        yield self._split({n: a[: filled - filled % bs] for n, a in block.items()})
                    raise
                if g + 1 < len(groups) and pos + buf.samples.size - skip < end:
                    future = ahead.submit(self._read, groups[g + 1], spaces[(g + 1) % 2])
                codes = None
                if self.augment:
                    codes = (
                        plan.buffer_rng(self.seed, epoch, self.worker, self.workers, g, 1)
                        .integers(0, 8, size=buf.samples.size)
                        .astype(np.int8)
                    )
                i, skip = skip, 0
                while i < buf.samples.size and pos < end:
                    if filled == 0:
                        size = min(bs if self.augment else BLOCK_BATCHES * bs, end - pos)
                        if codes is None:
                            block = self._empty_block(data, size)
                            ids = np.empty(size, np.int64)
                    take = min(size - filled, buf.samples.size - i)
                    rows = buf.positions[i : i + take]
                    if codes is None:  # gathered (and normalized) into the block in one pass
                        self._gather(data, rows, block, filled)
                        ids[filled : filled + take] = buf.samples[i : i + take]
                    else:
                        pieces.append(
                            (
                                {n: a[rows] for n, a in data.items()},
                                buf.samples[i : i + take],
                                codes[i : i + take],
                            )
                        )
                    filled, i, pos = filled + take, i + take, pos + take
                    if filled == size:
                        if codes is None:
                            block["sample"] = ids
                            yield self._split(block)
                        else:
                            yield [self._finish(pieces)]
                        pieces, filled = [], 0
                del data
                if pos >= end:
                    return
        finally:
            ahead.shutdown(wait=True, cancel_futures=True)

    def _buffer(self, epoch: int, g: int, units: NDArray[np.int64]) -> plan.Buffer:
        rng = (
            plan.buffer_rng(self.seed, epoch, self.worker, self.workers, g)
            if self.shuffle
            else None
        )
        return plan.plan_buffer(
            units, self.kept, unit=self.unit, n_samples=self.n_samples, rng=rng, index=g
        )

    def _read(self, units: NDArray[np.int64], space: Batch) -> Batch:
        """Every read array over the units' full ranges, concatenated in unit order.

        The arrays are views into ``space`` (name -> array of ``buffer_units * unit``
        rows, made on first use and reused by later buffers).
        """
        root = self._group()
        bounds = [plan.unit_bounds(self.unit, self.n_samples, int(u)) for u in units]
        rows = sum(hi - lo for lo, hi in bounds)
        offsets = np.cumsum([0, *(hi - lo for lo, hi in bounds)])
        arrays = {n: root[n] for n in self.read_names}
        out: Batch = {}
        for n, a in arrays.items():
            if n in self.labels:
                out[n] = np.empty(rows, dtype=object)
                continue
            if n not in space:
                space[n] = np.empty(
                    (self.buffer_units * self.unit, *a.shape[1:]), dtype=np.dtype(a.dtype)
                )
            out[n] = space[n][:rows]

        def read(n: str, k: int) -> None:
            lo, hi = bounds[k]
            if n in self.labels:
                out[n][offsets[k] : offsets[k + 1]] = label_values(arrays[n], np.arange(lo, hi))
            else:  # decoded straight into the buffer, no copy
                dest = _PROTOTYPE.nd_buffer.from_numpy_array(out[n][offsets[k] : offsets[k + 1]])
                arrays[n].get_basic_selection(slice(lo, hi), out=dest)

        tasks = [(n, k) for k in range(len(bounds)) for n in arrays]
        if self.read_threads == 1:
            for t in tasks:
                read(*t)
        else:
            with ThreadPoolExecutor(self.read_threads) as pool:
                for f in [pool.submit(read, *t) for t in tasks]:
                    f.result()
        return out

    def _empty_block(self, data: Batch, n: int) -> Batch:
        """Uninitialised arrays of ``n`` samples, shaped like the buffer arrays ``data``."""
        return {k: np.empty((n, *a.shape[1:]), dtype=a.dtype) for k, a in data.items()}

    def _gather(self, data: Batch, rows: NDArray, block: Batch, at: int) -> None:
        """Rows ``rows`` of the buffer arrays into ``block[name][at:]``, normalized ones
        through :meth:`Statistics.take` (gather and normalization in one pass)."""
        for n, a in data.items():
            dst = block[n][at : at + rows.size]
            if self.statistics is not None and n in self.normalized and a.dtype.kind == "f":
                self.statistics.take(n, a, rows, dst)
            elif a.dtype == object:
                dst[...] = a[rows]
            else:
                np.take(a, rows, axis=0, out=dst)

    def _split(self, block: Batch) -> list[Batch]:
        """A gathered block as consecutive batches (views into it), with scene labels."""
        n = len(block["sample"])
        bs = self.batch_size
        out = []
        for lo in range(0, n, bs):
            batch = {k: a[lo : lo + bs] for k, a in block.items()}
            if self._scene is not None:
                batch[selection.SCENE_KEY] = self._scene[batch["sample"]]
            out.append(batch)
        return out

    def _finish(self, pieces: Sequence[tuple[Batch, NDArray, NDArray | None]]) -> Batch:
        """Join the pieces of one augmented batch; augment, normalize, add indices and
        labels."""
        if len(pieces) == 1:
            batch, ids, codes = dict(pieces[0][0]), pieces[0][1], pieces[0][2]
        else:
            batch = {n: np.concatenate([p[0][n] for p in pieces]) for n in pieces[0][0]}
            ids = np.concatenate([p[1] for p in pieces])
            codes = None if pieces[0][2] is None else np.concatenate([p[2] for p in pieces])
        if codes is not None:
            moved = {
                n: batch[n] for n in [*self.features, *self.patches, self.target] if n is not None
            }
            batch.update(symmetry.apply(moved, codes, vectors=self.vectors))
            batch["symmetry"] = codes
        if self.statistics is not None:
            for n in self.normalized:
                batch[n] = self.statistics.apply(n, batch[n], out=batch[n])
        batch["sample"] = ids
        if self._scene is not None:
            batch[selection.SCENE_KEY] = self._scene[ids]
        return batch

    def denormalize(self, name: str, values: NDArray) -> NDArray:
        """Physical values of normalized ``values`` of variable ``name``."""
        if self.statistics is None or name not in self.normalized:
            return np.asarray(values)
        return self.statistics.invert(name, values)

    def __getstate__(self) -> dict[str, Any]:
        if self._path is None:
            raise TypeError(
                "a BatchReader made from an open zarr group cannot be pickled; make it from "
                "the store's path to use it in worker processes"
            )
        state = dict(self.__dict__)
        state["_root"] = None
        return state

    def __repr__(self) -> str:
        return (
            f"BatchReader({self.name!r}, {self.n_selected} of {self.n_samples} samples, "
            f"unit {self.unit}, batch_size {self.batch_size}, worker {self.worker} of "
            f"{self.workers}, where {selection.describe_where(self.where)})"
        )


def _flatten(blocks: Iterator[list[Batch]]) -> Iterator[Batch]:
    """The batches of a stream of blocks; closing it closes the stream (and its thread)."""
    try:
        for block in blocks:
            yield from block
    finally:
        close = getattr(blocks, "close", None)
        if close is not None:
            close()


def _positive(value: int, name: str) -> int:
    if int(value) < 1:
        raise ConfigError(f"{name} is {value}; expected an integer >= 1")
    return int(value)


class _Failure:
    def __init__(self, error: BaseException) -> None:
        self.error = error


_DONE = object()


def prefetched(make: Callable[[], Iterator[Any]], depth: int) -> Iterator[Any]:
    """Run the iterator ``make()`` on a background thread, ``depth`` items ahead.

    Items arrive in order; an exception of the producer is raised in the consumer at the
    point where the item would have come. Closing the returned iterator (or dropping it)
    stops the producer and joins the thread.
    """
    q: queue.Queue = queue.Queue(maxsize=max(1, int(depth)))
    stop = threading.Event()

    def put(item: Any) -> bool:
        while not stop.is_set():
            try:
                q.put(item, timeout=0.05)
                return True
            except queue.Full:
                continue
        return False

    def run() -> None:
        source = None
        try:
            source = make()
            for item in source:
                if not put(item):
                    return
            put(_DONE)
        except BaseException as err:  # handed to the consumer
            put(_Failure(err))
        finally:
            if source is not None and hasattr(source, "close"):
                source.close()

    thread = threading.Thread(target=run, name=f"lesprep-prefetch-{os.getpid()}", daemon=True)
    thread.start()
    try:
        while True:
            item = q.get()
            if item is _DONE:
                return
            if isinstance(item, _Failure):
                raise item.error
            yield item
    finally:
        stop.set()
        thread.join()
