"""The batch reader: every sample once per epoch, worker split, resume, filters, labels,
normalization, prefetch thread, and a framework-style loader wrapped around it.

Stores are small synthetic set stores written here with zarr directly (the layout of
``lesprep.sets.assemble``), plus one written by ``build_set``. Expected values come from
numpy on the arrays zarr reads back.
"""

from __future__ import annotations

import json
import threading
from pathlib import Path

import numpy as np
import pandas as pd
import pytest
import xarray as xr
import zarr
from zarr.storage import LocalStore

from lesprep.errors import ConfigError, InputError
from lesprep.sets import batchplan
from lesprep.sets.assemble import build_set, open_set, write_normalization
from lesprep.sets.batches import BatchReader, prefetched
from lesprep.store import CHUNK_KEYS, consolidate
from settings_helpers import set_settings

CASES = ("cu-a", "cu-b", "sc-c")
REGIME = {"cu-a": "cumulus", "cu-b": "cumulus", "sc-c": "stratocumulus"}
FEATURES = ("qt_mean", "theta_l_mean", "w_var")
PATCHES = ("qc_patch", "w_patch")


def write_store(
    path: Path,
    *,
    per_case: int = 120,
    chunk: int = 16,
    shard: int | None = None,
    patch: int = 4,
    shuffled: bool = False,
    extra_patches: tuple[str, ...] = (),
) -> Path:
    """A set store: cases in natural order (or shuffled), 6 times x 5 levels x 4 cells."""
    rng = np.random.default_rng(42)
    case = np.repeat(np.asarray(CASES, dtype=object), per_case)
    n = case.size
    local = np.tile(np.arange(per_case), len(CASES))
    time = 600.0 * (local // 20)
    z = 100.0 * ((local // 4) % 5) + 50.0
    y = 1000.0 * ((local // 2) % 2)
    x = 1000.0 * (local % 2)
    data: dict[str, np.ndarray] = {
        "qt_mean": rng.normal(0.01, 0.002, n),
        "theta_l_mean": rng.normal(300.0, 2.0, n),
        "w_var": rng.gamma(2.0, 0.1, n),
        "cloud_fraction": np.where(rng.random(n) < 0.4, 0.0, rng.random(n)),
    }
    for name in (*PATCHES, *extra_patches):
        data[name] = rng.normal(0.0, 1.0, (n, patch, patch))
    if shuffled:
        perm = rng.permutation(n)
        case, time, z, y, x = case[perm], time[perm], z[perm], y[perm], x[perm]
        data = {k: v[perm] for k, v in data.items()}
    root = zarr.open_group(str(path), mode="w", zarr_format=3)

    def put(name, values, dtype, dims):
        chunks = (chunk, *values.shape[1:])
        shards = None if shard is None else (shard, *values.shape[1:])
        a = root.create_array(
            name,
            shape=values.shape,
            chunks=chunks,
            shards=shards,
            dtype=dtype,
            dimension_names=dims,
            chunk_key_encoding=CHUNK_KEYS,
        )
        a[:] = values

    put("case", case.astype(str), str, ["sample"])
    put("regime", np.asarray([REGIME[c] for c in case], dtype=str), str, ["sample"])
    for name, v in (("time", time), ("z", z), ("y", y), ("x", x)):
        put(name, v, "float64", ["sample"])
    for name, v in data.items():
        put(name, v.astype(np.float32), "float32", ["sample", "py", "px"][: v.ndim])
    root.attrs["sample_labels"] = ["case", "regime"]
    consolidate(path)
    write_normalization(path, path.parent / "normalization.json", scale="1000m")
    return path


@pytest.fixture(scope="module")
def store(tmp_path_factory) -> Path:
    return write_store(tmp_path_factory.mktemp("set") / "s.zarr")


@pytest.fixture(scope="module")
def raw(store) -> dict[str, np.ndarray]:
    """Every array read back by zarr, as stored."""
    root = zarr.open_group(str(store), mode="r")
    return {k: np.asarray(a[...]) for k, a in root.arrays()}


def reader(path, **kw) -> BatchReader:
    kw = {"features": FEATURES, "patches": PATCHES, "batch_size": 32, **kw}
    return BatchReader(path, **kw)


def samples(batches) -> np.ndarray:
    return np.concatenate([b["sample"] for b in batches])


def test_every_sample_once_per_epoch_and_values_match(store, raw):
    r = reader(store, epochs=2, buffer_units=3, normalize=False)
    batches = list(r)
    n = raw["case"].size
    per_epoch = -(-n // 32)
    assert len(batches) == 2 * per_epoch
    first, second = samples(batches[:per_epoch]), samples(batches[per_epoch:])
    np.testing.assert_array_equal(np.sort(first), np.arange(n))
    np.testing.assert_array_equal(np.sort(second), np.arange(n))
    assert not np.array_equal(first, second)  # each epoch has its own order
    assert not np.array_equal(first, np.arange(n))
    for b in batches:
        for name in (*FEATURES, *PATCHES, "cloud_fraction"):
            np.testing.assert_array_equal(b[name], raw[name][b["sample"]])
    assert [len(b["sample"]) for b in batches[:per_epoch]][-1] == n - 32 * (per_epoch - 1)


def test_drop_last_and_batch_sizes(store, raw):
    n = raw["case"].size
    kept = list(reader(store, batch_size=50, drop_last=True).epoch_batches(0))
    assert [len(b["sample"]) for b in kept] == [50] * (n // 50)
    assert len(np.unique(samples(kept))) == 50 * (n // 50)


def test_batches_draw_from_a_bounded_buffer(store):
    """A batch holds samples of at most two consecutive buffers of the unit order."""
    r = reader(store, buffer_units=2, batch_size=20, normalize=False)
    unit = r.unit
    for b in r.epoch_batches(0):
        assert np.unique(b["sample"] // unit).size <= 4


def test_workers_split_every_epoch_disjointly(store, raw):
    n = raw["case"].size
    for epoch in (0, 1):
        parts = [
            samples(reader(store, normalize=False).for_worker(w, 3).epoch_batches(epoch))
            for w in range(3)
        ]
        joined = np.concatenate(parts)
        np.testing.assert_array_equal(np.sort(joined), np.arange(n))
        units = [set((p // 16).tolist()) for p in parts]
        assert not (units[0] & units[1]) and not (units[1] & units[2])


def test_resume_mid_epoch_gives_the_remaining_batches(store):
    full = list(reader(store, epochs=2, augment=True, seed=7))
    r = reader(store, epochs=2, augment=True, seed=7)
    it = iter(r)
    taken = [next(it) for _ in range(5)]
    saved = json.loads(json.dumps(r.save_state()))
    it.close()
    assert saved["epoch"] == 0 and saved["batch"] == 5
    again = reader(store, epochs=2, augment=True, seed=7)
    again.restore_state(saved)
    rest = list(again)
    assert len(taken) + len(rest) == len(full)
    for a, b in zip(full, taken + rest, strict=True):
        assert a.keys() == b.keys()
        for k in a:
            np.testing.assert_array_equal(a[k], b[k])
    with pytest.raises(ConfigError, match="batch_size 32"):
        reader(store, batch_size=16).restore_state(saved)


def test_seed_reproduces_and_changes_order(store):
    a = samples(reader(store, seed=1, normalize=False).epoch_batches(0))
    b = samples(reader(store, seed=1, normalize=False, prefetch=0).epoch_batches(0))
    c = samples(reader(store, seed=2, normalize=False).epoch_batches(0))
    np.testing.assert_array_equal(a, b)
    assert not np.array_equal(a, c)


def test_held_out_reads_in_store_order(store, raw):
    r = reader(store, shuffle=False, coords=("case", "z"), normalize=False)
    batches = list(r)
    np.testing.assert_array_equal(samples(batches), np.arange(raw["case"].size))
    assert list(np.concatenate([b["case"] for b in batches])) == list(raw["case"])
    assert "symmetry" not in batches[0]


def test_normalization_from_store_and_file_inverts(store, raw):
    doc = json.loads((store.parent / "normalization.json").read_text())
    for source in (None, store.parent / "normalization.json"):
        r = reader(store, statistics=source, shuffle=False, batch_size=500)
        (b,) = list(r)
        for name in (*FEATURES, *PATCHES):
            x = raw[name].astype(np.float64)
            expected = (x - x.mean()) / x.std()  # numpy, population std
            np.testing.assert_allclose(b[name], expected, rtol=1e-5, atol=1e-5)
            np.testing.assert_allclose(
                r.denormalize(name, b[name]),
                raw[name],
                rtol=1e-5,
                atol=1e-6 * doc["statistics"][name]["std"],
            )
        np.testing.assert_array_equal(b["cloud_fraction"], raw["cloud_fraction"])
    with pytest.raises(ConfigError, match=r"no statistics of .theta_l_mean"):
        reader(store, statistics={"statistics": {"qt_mean": {"mean": 0, "std": 1}}})


def test_filters_select_like_numpy(store, raw):
    r = reader(
        store, z_range=(100, 300), cloudy_only=True, where={"regime": "cumulus"}, normalize=False
    )
    got = np.sort(samples(r.epoch_batches(0)))
    want = np.flatnonzero(
        (raw["z"] >= 100)
        & (raw["z"] <= 300)
        & (raw["cloud_fraction"] > 0)
        & (raw["regime"] == "cumulus")
    )
    np.testing.assert_array_equal(got, want)
    got = samples(reader(store, where={"case": ["sc-c", "cu-a"]}).epoch_batches(1))
    np.testing.assert_array_equal(np.sort(got), np.flatnonzero(raw["case"] != "cu-b"))
    with pytest.raises(ConfigError, match="'nope'"):
        reader(store, where={"nope": 1})


class CountingStore(LocalStore):
    """A local store that records the key of every read."""

    def __init__(self, *args, **kw):
        super().__init__(*args, **kw)
        self.keys: list[str] = []

    async def get(self, key, prototype=None, byte_range=None):
        self.keys.append(key)
        return await super().get(key, prototype, byte_range)

    async def get_partial_values(self, prototype, key_ranges):
        key_ranges = list(key_ranges)
        self.keys.extend(k for k, _ in key_ranges)
        return await super().get_partial_values(prototype, key_ranges)


@pytest.mark.parametrize("shard", [None, 32])
def test_excluded_units_are_never_read(tmp_path, shard):
    path = write_store(tmp_path / "s.zarr", shard=shard)
    counting = CountingStore(str(path), read_only=True)
    root = zarr.open_group(store=counting, mode="r")
    r = reader(root, where={"case": "cu-b"}, normalize=False)
    unit = 32 if shard else 16
    assert r.unit == unit
    counting.keys.clear()
    got = samples(r.epoch_batches(0))
    case = np.asarray(zarr.open_group(str(path), mode="r")["case"][...])
    np.testing.assert_array_equal(np.sort(got), np.flatnonzero(case == "cu-b"))
    wanted = {int(u) for u in np.unique(np.flatnonzero(case == "cu-b") // unit)}
    for name in (*FEATURES, *PATCHES):
        touched = {
            int(k.split("/")[1].split(".")[0])
            for k in counting.keys
            if k.startswith(name + "/") and not k.endswith(".json")
        }  # <name>/<i>.0.0
        assert touched == wanted, name


def test_scene_labels_join_on_case_and_time(store, raw, tmp_path):
    times = np.unique(raw["time"])
    rows = [
        (c, t, "train", int(i + 3 * j), False)
        for i, c in enumerate(CASES)
        for j, t in enumerate(times)
    ]
    table = pd.DataFrame(rows, columns=["case", "time_s", "split", "label", "clear"])
    path = tmp_path / "regimes.tsv"
    table.to_csv(path, sep="\t", index=False, float_format="%.9g")
    b = next(iter(reader(store, scene_labels=path, coords=("case", "time"))))
    expect = table.set_index(["case", "time_s"])["label"]
    want = [expect[(c, t)] for c, t in zip(b["case"], b["time"], strict=True)]
    np.testing.assert_array_equal(b["scene_label"], want)
    only = reader(store, scene_labels=path, where={"scene_label": [0, 3]})
    sel = samples(only.epoch_batches(0))
    np.testing.assert_array_equal(
        np.sort(sel), np.flatnonzero((raw["case"] == "cu-a") & (raw["time"] <= times[1]))
    )
    table.iloc[1:].to_csv(path, sep="\t", index=False)
    with pytest.raises(InputError, match=r"regimes.tsv.*no label for 20 samples.*'cu-a'"):
        reader(store, scene_labels=path)
    filled = reader(store, scene_labels=path, label_fill=-9, shuffle=False)
    assert (next(iter(filled))["scene_label"][:20] == -9).all()


def test_prefetch_error_reaches_the_consumer_and_threads_stop(tmp_path):
    path = write_store(tmp_path / "s.zarr")
    (path / "qc_patch" / "3.0.0").write_bytes(b"not a chunk")
    r = reader(path, shuffle=False, normalize=False)
    with pytest.raises(Exception):  # noqa: B017 - the codec's own error type
        list(r.epoch_batches(0))
    before = threading.active_count()
    it = iter(reader(path, where={"case": "sc-c"}, normalize=False).epoch_batches(0))
    next(it)
    it.close()
    assert threading.active_count() <= before


def test_prefetched_keeps_order_and_raises_late():
    def source():
        yield from range(5)
        raise KeyError("late")

    got = []
    with pytest.raises(KeyError, match="late"):
        for v in prefetched(source, 2):
            got.append(v)
    assert got == [0, 1, 2, 3, 4]


def test_plan_properties():
    """Pure plan: units and buffers cover every selected sample exactly once."""
    kept = np.random.default_rng(0).random(103) < 0.6
    per_unit = batchplan.kept_per_unit(kept, 8)
    units = np.flatnonzero(per_unit)
    order = batchplan.epoch_unit_order(units, epoch=2, seed=5, shuffle=True)
    seen = []
    for w in range(4):
        for g, group in enumerate(batchplan.buffer_groups(batchplan.worker_units(order, w, 4), 3)):
            rng = batchplan.buffer_rng(5, 2, w, 4, g)
            buf = batchplan.plan_buffer(group, kept, unit=8, n_samples=103, rng=rng)
            rows = np.concatenate([np.arange(*batchplan.unit_bounds(8, 103, u)) for u in group])
            np.testing.assert_array_equal(rows[buf.positions], buf.samples)
            seen.append(buf.samples)
    np.testing.assert_array_equal(np.sort(np.concatenate(seen)), np.flatnonzero(kept))


def test_augmentation_moves_patches_like_numpy(tmp_path):
    path = write_store(tmp_path / "s.zarr", extra_patches=("u_patch", "v_patch"))
    raw = {k: np.asarray(a[...]) for k, a in zarr.open_group(str(path), mode="r").arrays()}
    r = reader(path, patches=(*PATCHES, "u_patch", "v_patch"), augment=True, normalize=False)
    assert r.vectors == (("u_patch", "v_patch"),)
    codes = set()
    for b in r.epoch_batches(0):
        for j, (i, c) in enumerate(zip(b["sample"], b["symmetry"], strict=True)):
            codes.add(int(c))
            a = raw["qc_patch"][i]
            a = np.flip(a, axis=-1) if c >= 4 else a
            np.testing.assert_array_equal(b["qc_patch"][j], np.rot90(a, c % 4))
            speed = np.hypot(raw["u_patch"][i], raw["v_patch"][i])
            moved = np.rot90(np.flip(speed, -1) if c >= 4 else speed, c % 4)
            np.testing.assert_allclose(np.hypot(b["u_patch"][j], b["v_patch"][j]), moved)
    assert codes == set(range(8))
    with pytest.raises(ConfigError, match="u_patch"):
        reader(path, patches=("u_patch",), augment=True)


class StandInIterable:
    """A dataset with the iterable-dataset protocol of a deep-learning framework.

    The framework calls ``iter(dataset)`` inside each worker process after setting that
    worker's info; the training loop calls ``set_epoch`` before each epoch.
    """

    worker_info: tuple[int, int] | None = None  # (id, num_workers), set by the loop

    def __init__(self, reader: BatchReader) -> None:
        self.reader = reader
        self.epoch = 0
        self.starts: list[int] | None = None  # per-worker batches to skip when resuming

    def set_epoch(self, epoch: int) -> None:
        self.epoch = epoch

    def __iter__(self):
        worker, workers = StandInIterable.worker_info or (0, 1)
        start = self.starts[worker] if self.starts else 0
        return self.reader.for_worker(worker, workers).epoch_batches(self.epoch, start=start)


def fake_loader(dataset: StandInIterable, num_workers: int):
    """The loop of a multi-worker loader: each worker iterates its copy; batches are taken
    from the workers in turn."""
    import pickle

    streams = []
    for w in range(num_workers):
        copy = pickle.loads(pickle.dumps(dataset))  # what a worker process receives
        StandInIterable.worker_info = (w, num_workers)
        streams.append(iter(copy))
    StandInIterable.worker_info = None
    live = list(streams)
    while live:
        for s in list(live):
            try:
                yield next(s)
            except StopIteration:
                live.remove(s)


def test_framework_style_loader(store, raw):
    ds = StandInIterable(reader(store, seed=3))
    orders = []
    for epoch in range(2):
        ds.set_epoch(epoch)
        got = samples(fake_loader(ds, num_workers=2))
        np.testing.assert_array_equal(np.sort(got), np.arange(raw["case"].size))
        orders.append(got)
    assert not np.array_equal(orders[0], orders[1])


@pytest.mark.filterwarnings("ignore:Consolidated metadata")
def test_reads_a_store_written_by_build_set(tmp_path):
    cases = {}
    for k, c in enumerate(("c1", "c2")):
        rng = np.random.default_rng(k)
        shape = (3, 4, 2, 2)
        ds = xr.Dataset(
            {
                "qt_mean": (("time", "z", "y", "x"), rng.random(shape).astype("f4")),
                "cloud_fraction": (("time", "z", "y", "x"), rng.random(shape).astype("f4")),
                "qc_patch": (
                    ("time", "z", "y", "x", "py", "px"),
                    rng.random((*shape, 4, 4)).astype("f4"),
                ),
            },
            coords={
                "time": [0.0, 600.0, 1200.0],
                "z": [50.0, 150.0, 250.0, 350.0],
                "y": [500.0, 1500.0],
                "x": [500.0, 1500.0],
            },
        )
        cases[c] = tmp_path / f"{c}.zarr"
        ds.to_zarr(cases[c], zarr_format=3, consolidated=True)
    out = build_set(
        cases,
        {"c1": "cumulus"},
        tmp_path / "set.zarr",
        set_settings(shuffle=True, chunk_mib=0.001),
        split="train",
        scale="1000m",
    )
    write_normalization(out, tmp_path / "normalization.json", scale="1000m")
    ref = open_set(out)
    r = BatchReader(out, batch_size=10, where={"regime": "cumulus"}, coords=("case",))
    assert r.features == ("qt_mean",) and r.patches == ("qc_patch",)
    batches = list(r)
    idx = samples(batches)
    np.testing.assert_array_equal(np.sort(idx), np.flatnonzero(ref["case"].values == "c1"))
    qc = ref["qc_patch"].values[idx].astype(np.float64)
    flat = ref["qc_patch"].values.astype(np.float64)
    np.testing.assert_allclose(
        np.concatenate([b["qc_patch"] for b in batches]),
        (qc - flat.mean()) / flat.std(),
        rtol=1e-5,
        atol=1e-5,
    )


def test_framework_style_loader_resumes_mid_epoch(store):
    ds = StandInIterable(reader(store, seed=4, batch_size=8, buffer_units=2))
    ds.set_epoch(1)
    full = list(fake_loader(ds, num_workers=3))
    consumed = 17
    counts = [ds.reader.for_worker(w, 3).batches_in_epoch(1) for w in range(3)]
    assert sum(counts) == len(full)
    ds.starts = batchplan.round_robin_starts(counts, consumed)
    rest = list(fake_loader(ds, num_workers=3))

    # the same batches; a new loader starts its turns at worker 0, so they interleave anew
    def key(b):
        return tuple(b["sample"].tolist())

    assert sorted(map(key, rest)) == sorted(map(key, full[consumed:]))
    by_key = {key(b): b for b in full}
    for b in rest:
        np.testing.assert_array_equal(b["qc_patch"], by_key[key(b)]["qc_patch"])


def test_gather_and_normalize_in_one_pass_equals_numpy():
    """The compiled gather-and-normalize gives numpy's ``((x - mean) / std)`` bit for bit:
    float64 arithmetic of each float32 value, rounded once (reference: numpy itself)."""
    from lesprep.sets.standardize import take_normalized

    rng = np.random.default_rng(3)
    src = rng.normal(0.01, 0.003, (500, 6, 6)).astype(np.float32)
    rows = rng.permutation(500)[:77]
    mean, std = 0.0098765, 0.0031
    expected = ((src[rows].astype(np.float64) - mean) * (1.0 / std)).astype(np.float32)
    out = np.empty((77, 6, 6), np.float32)
    take_normalized(src, rows, mean, 1.0 / std, out)
    np.testing.assert_array_equal(out, expected)
    strided = np.empty((77, 6, 12), np.float32)[:, :, ::2]  # not contiguous: numpy path
    take_normalized(src, rows, mean, 1.0 / std, strided)
    np.testing.assert_array_equal(strided, expected)
    with pytest.raises(ValueError, match="expected"):
        take_normalized(src, rows, mean, 1.0, np.empty((76, 6, 6), np.float32))
