"""Zarr stores: codecs, chunking, atomic publication and reading.

Every store is written into a hidden temporary sibling (``.<name>.tmp-<id>``) and
renamed into place only when complete, so a killed job never leaves a store that looks
finished. Stale temporary siblings of killed runs are removed before a new write.
Stores are Zarr format 3 with consolidated metadata.
"""

from __future__ import annotations

import contextlib
import itertools
import json
import os
import shutil
import uuid
import warnings
from collections.abc import Callable, Iterable, Iterator, Mapping
from concurrent.futures import Future, ThreadPoolExecutor
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any, Literal, get_args

import numpy as np
import xarray as xr
import zarr
from zarr.codecs import BloscCodec, ZstdCodec

from lesprep._jit import HAVE_NUMBA, njit
from lesprep.errors import ConfigError, InputError

CONVENTIONS = "CF-1.11, ACDD-1.3"
"""The conventions every store follows: CF 1.11 is the version an independent CF checker
verifies (``tests/test_cf_compliance.py``)."""
TMP_TAG = ".tmp-"
CHUNK_KEYS = {"name": "v2", "separator": "."}
"""Flat chunk file names (``0.3.0.0``): one directory per array instead of one per chunk
row, which makes replacing and deleting stores several times faster (Zarr v3 spec)."""
_IO_THREADS = 8  # concurrent array writes: storage latency, not CPU, is what they hide


Codec = Literal["blosc-lz4", "blosc-zstd", "zstd", "none"]


@dataclass(frozen=True, kw_only=True)
class StoreSettings:
    """Storage choices of every array: compressor and level (config section ``store``)."""

    codec: Codec
    clevel: int

    def __post_init__(self) -> None:
        if self.codec not in get_args(Codec):
            raise ConfigError(
                f"store.codec is {self.codec!r}; expected one of {list(get_args(Codec))}"
            )
        if not 0 <= int(self.clevel) <= 9:
            raise ConfigError(f"store.clevel is {self.clevel!r}; expected 0 to 9")

    def to_dict(self) -> dict[str, Any]:
        """Plain form (job params, provenance)."""
        return {"codec": self.codec, "clevel": self.clevel}

    @classmethod
    def from_dict(cls, d: Mapping[str, Any]) -> StoreSettings:
        """Inverse of :meth:`to_dict` (both keys required)."""
        return cls(codec=d["codec"], clevel=int(d["clevel"]))


def compressors(store: StoreSettings) -> tuple[Any, ...]:
    """zarr 3 compressor list of the storage settings.

    ``blosc-lz4``, ``blosc-zstd`` (both with byte shuffle), ``zstd`` or ``none``;
    ``clevel`` sets the level.
    """
    if store.codec == "none":
        return ()
    if store.codec == "zstd":
        return (ZstdCodec(level=store.clevel),)
    cname = {"blosc-lz4": "lz4", "blosc-zstd": "zstd"}[store.codec]
    return (BloscCodec(cname=cname, clevel=store.clevel, shuffle="shuffle"),)


def _tmp_sibling(final: Path) -> Path:
    return final.with_name(f".{final.name}{TMP_TAG}{os.getpid()}-{uuid.uuid4().hex[:8]}")


def stale_temporaries(final: Path) -> list[Path]:
    """Temporary siblings left by killed writers of ``final``."""
    final = Path(final)
    if not final.parent.exists():
        return []
    prefix = f".{final.name}{TMP_TAG}"
    return sorted(p for p in final.parent.iterdir() if p.name.startswith(prefix))


@contextlib.contextmanager
def atomic_path(final: str | Path) -> Iterator[Path]:
    """Yield a temporary sibling path; rename it to ``final`` when the block succeeds.

    On any exception the temporary is removed and ``final`` is left as it was (absent,
    when Snakemake runs the job). An existing ``final`` is replaced.
    """
    final = Path(final)
    final.parent.mkdir(parents=True, exist_ok=True)
    for stale in stale_temporaries(final):
        _remove(stale)
    tmp = _tmp_sibling(final)
    try:
        yield tmp
    except BaseException:
        _remove(tmp)
        raise
    if final.exists():
        old = final.with_name(f".{final.name}{TMP_TAG}old-{uuid.uuid4().hex[:8]}")
        os.rename(final, old)
        os.rename(tmp, final)
        _remove(old)
    else:
        os.rename(tmp, final)


def _remove(path: Path) -> None:
    if path.is_dir():
        shutil.rmtree(path, ignore_errors=True)
    elif path.exists():
        path.unlink()


def consolidate(path: str | Path) -> None:
    """Write consolidated metadata (the format-3 warning is expected and silenced)."""
    with warnings.catch_warnings():
        warnings.filterwarnings("ignore", message=".*[Cc]onsolidated metadata.*")
        zarr.consolidate_metadata(str(path))


def open_store(path: str | Path, *, chunks: Any = None, **kwargs: Any) -> xr.Dataset:
    """Open a lesprep store lazily (consolidated metadata, no time decoding).

    With the default ``chunks=None`` arrays are lazily indexed without dask (each
    selection reads only the chunks it touches); pass ``chunks={}`` for dask arrays.
    """
    with warnings.catch_warnings():
        warnings.filterwarnings("ignore", message=".*[Cc]onsolidated metadata.*")
        warnings.filterwarnings("ignore", message=".*not part of the Zarr format 3.*")
        return xr.open_dataset(
            str(path),
            engine="zarr",
            chunks=chunks,
            consolidated=True,
            decode_times=False,
            decode_timedelta=False,
            zarr_format=3,
            **kwargs,
        )


CF_TYPED_ATTRS = (
    "flag_values",
    "flag_masks",
    "valid_min",
    "valid_max",
    "valid_range",
    "actual_range",
    "missing_value",
)
"""Attributes CF wants of the variable's own type (CF 2.5.1, 3.5); JSON (Zarr attributes)
keeps only "a number", so :func:`export_netcdf` casts them back."""


def coordinate_names(ds: xr.Dataset) -> set[str]:
    """Coordinate variables, auxiliary coordinates and bounds of a dataset (CF 5, 7.1).

    These may not (coordinate variables, bounds) or need not (auxiliary coordinates of
    lesprep, which are never missing) carry a ``_FillValue``.
    """
    names = {str(n) for n in ds.variables if n in ds.dims}
    names.update(str(n) for n in ds.coords)  # xarray reads ``coordinates`` into coords
    for v in ds.variables.values():
        names.update(str(v.attrs.get("coordinates", "")).split())
        if "bounds" in v.attrs:
            names.add(str(v.attrs["bounds"]))
    return {n for n in names if n in ds.variables}


def _netcdf_attr(name: str, value: Any, dtype: np.dtype | None) -> Any:
    """One attribute as NetCDF can hold it (None: leave it out)."""
    if value is None:
        return None
    if dtype is not None and name in CF_TYPED_ATTRS:
        return np.asarray(value, dtype=dtype)
    if isinstance(value, bool | np.bool_):
        return int(value)
    if isinstance(value, Mapping) or (
        isinstance(value, list | tuple)
        and not all(isinstance(v, int | float) and not isinstance(v, bool) for v in value)
    ):
        return json.dumps(value, sort_keys=True, default=str)
    if isinstance(value, list | tuple):
        return np.asarray(value)
    return value


def netcdf_dataset(ds: xr.Dataset) -> tuple[xr.Dataset, dict[str, dict[str, Any]]]:
    """A store's dataset as a CF NetCDF file holds it, and the encoding to write it with.

    Zarr encodings (codecs, chunk keys) are dropped; attributes a JSON document holds
    differently (typed flag values, lists, mappings, booleans) are converted
    (:data:`CF_TYPED_ATTRS` get the variable's type, other lists of non-numbers and
    mappings become JSON text); coordinates, auxiliary coordinates and bounds get no
    ``_FillValue``; data variables get deflate compression (level 4).
    """
    out = ds.drop_encoding()
    out.attrs = {k: a for k, v in ds.attrs.items() if (a := _netcdf_attr(k, v, None)) is not None}
    for name, var in out.variables.items():
        var.attrs = {
            k: a
            for k, v in ds[name].attrs.items()
            if (a := _netcdf_attr(k, v, var.dtype)) is not None
        }
    coords = coordinate_names(out)
    encoding: dict[str, dict[str, Any]] = {}
    for name, var in out.variables.items():
        enc: dict[str, Any] = {}
        if name in coords:
            enc["_FillValue"] = None
        elif var.ndim:
            enc.update(zlib=True, complevel=4)
        encoding[str(name)] = enc
    return out, encoding


def export_netcdf(store: str | Path, out: str | Path) -> Path:
    """Write a lesprep store as one NetCDF-4 file, for tools that read NetCDF only.

    Times keep their stored numbers and CF ``units`` (``seconds since <origin>``); see
    :func:`netcdf_dataset` for what changes between Zarr and NetCDF attributes. Each
    variable is read whole while it is written: meant for stores that fit in memory one
    variable at a time.

    Parameters
    ----------
    store
        A canonical, scale or set store.
    out
        The NetCDF file to write (replaced atomically).

    Returns
    -------
    pathlib.Path
        ``out``.

    Raises
    ------
    lesprep.errors.InputError
        ``store`` is not a Zarr format 3 group.
    """
    out = Path(out)
    if not (Path(store) / "zarr.json").is_file():
        raise InputError(
            "is not a lesprep store (no zarr.json: expected a Zarr format 3 group)",
            file=str(store),
            hint="give a results/cases/<case>/*.zarr or results/sets/<split>/*.zarr folder",
        )
    with open_store(store) as ds, atomic_path(out) as tmp:
        data, encoding = netcdf_dataset(ds)
        data.to_netcdf(tmp, format="NETCDF4", engine="netcdf4", encoding=encoding)
    return out


def dir_size_bytes(path: str | Path) -> int:
    """Content size of a file or directory tree (a Zarr store) in bytes."""
    path = Path(path)
    if path.is_file():
        return path.stat().st_size
    total = 0
    for root, _, files in os.walk(path):
        for f in files:
            with contextlib.suppress(OSError):
                total += os.stat(os.path.join(root, f)).st_size
    return total


@dataclass(frozen=True, kw_only=True)
class ArraySpec:
    """One array of a store to create: dims, shape, chunks, dtype, attrs, fill value."""

    dims: tuple[str, ...]
    shape: tuple[int, ...]
    chunks: tuple[int, ...]
    dtype: Any
    attrs: Mapping[str, Any] = field(default_factory=dict)
    fill_value: Any = None
    data: Any = None  # values written at creation (coordinates, small arrays)


def create_store(
    path: str | Path, arrays: Mapping[str, ArraySpec], *, codecs: tuple[Any, ...] = ()
) -> zarr.Group:
    """Create a Zarr v3 group with the given arrays (readable by ``xarray.open_zarr``).

    Arrays with ``data`` are written at once; the others are left for region writes.
    Float arrays without an explicit fill value get NaN (never used as a mask by xarray
    for format 3); an all-fill chunk is not stored.
    """
    root = zarr.open_group(str(path), mode="w-", zarr_format=3)

    def create(item: tuple[str, ArraySpec]) -> None:
        name, spec = item
        dt = np.dtype(spec.dtype)
        fill = spec.fill_value
        if fill is None:
            fill = np.nan if dt.kind == "f" else 0
        arr = root.create_array(
            name,
            shape=spec.shape,
            chunks=spec.chunks,
            dtype=dt,
            compressors=codecs if spec.data is None else (),
            fill_value=fill,
            dimension_names=list(spec.dims),
            attributes=dict(spec.attrs),
            chunk_key_encoding=CHUNK_KEYS,
        )
        if spec.data is not None:
            arr[...] = np.asarray(spec.data, dtype=dt)

    _each_array(create, arrays.items())
    return root


class _InFlight:
    """One background write at a time: :meth:`submit` first waits for the previous one
    (re-raising its failure), so memory holds at most one write's arrays in flight."""

    def __init__(self) -> None:
        self._pool: ThreadPoolExecutor | None = None
        self._pending: Future[None] | None = None

    def submit(self, fn: Callable[..., None], *args: Any) -> None:
        self.wait()
        if self._pool is None:
            self._pool = ThreadPoolExecutor(max_workers=1)
        self._pending = self._pool.submit(fn, *args)

    def wait(self) -> None:
        if self._pending is not None:
            pending, self._pending = self._pending, None
            pending.result()  # re-raises a failed write here

    def close(self) -> None:
        self.wait()
        if self._pool is not None:
            self._pool.shutdown(wait=True)
            self._pool = None


class TimeWriter:
    """Buffer consecutive time steps and write them to a group's arrays in one call.

    Writing many small time steps one at a time is dominated by per-call overhead;
    buffering up to ``limit_bytes`` keeps memory bounded while making each write large
    enough for zarr to encode its chunks concurrently. A step at least that large is
    written on its own, without waiting for a second one: buffering large steps only
    holds memory (measured on a 256 x 256 x 80 ingest, 6 times: 256 MiB gave a 2.0 GB peak
    and 1.7-2.8 s, writing each step at once 0.85 GB and 1.4 s). A full buffer is written by a
    background thread while the caller computes the next time steps (at most one write
    in flight, so memory is two buffers at most); :meth:`flush` waits for everything.
    """

    def __init__(self, group: zarr.Group, *, limit_bytes: int = 32 * 2**20) -> None:
        self.group = group
        self.limit = limit_bytes
        self.start = 0
        self.buf: dict[str, list[np.ndarray]] = {}
        self.nbytes = 0
        self._steps = _InFlight()
        self._rows = _InFlight()

    def add(self, index: int, fields: Mapping[str, np.ndarray]) -> None:
        """Queue the arrays of time ``index`` (consecutive indices from 0)."""
        if not self.buf:
            self.start = index
        for name, arr in fields.items():
            self.buf.setdefault(name, []).append(arr)
            self.nbytes += arr.nbytes
        if self.nbytes >= self.limit:
            self._submit()

    def _submit(self) -> None:
        if self.buf:
            self._steps.submit(self._write, self.start, self.buf)
        self.buf = {}
        self.nbytes = 0

    def _write(self, start: int, buf: dict[str, list[np.ndarray]]) -> None:
        def write(item: tuple[str, list[np.ndarray]]) -> None:
            name, steps = item
            arr = self.group[name]
            if len(steps) == 1:  # a large step: no stacked copy
                write_block(arr, (start,), steps[0][None])
            else:
                write_block(arr, (start,), np.stack(steps))

        _each_array(write, buf.items())

    def write_rows(self, index: int, z0: int, fields: Mapping[str, np.ndarray]) -> None:
        """Write levels ``z0 : z0 + k`` of time ``index`` of each array in the background.

        For outputs finished one z-chunk row at a time (``z0`` on a chunk boundary, ``k``
        whole chunks or up to the end): the row is written while the caller computes the
        next one. At most one row write is in flight; a failed one is re-raised by the
        next call or by :meth:`flush`.
        """
        self._rows.submit(self._write_rows, index, z0, dict(fields))

    def _write_rows(self, index: int, z0: int, fields: dict[str, np.ndarray]) -> None:
        def write(item: tuple[str, np.ndarray]) -> None:
            name, arr = item
            write_block(self.group[name], (index, z0), arr[None])

        _each_array(write, fields.items())

    def flush(self) -> None:
        """Write what is buffered and wait until every write is done."""
        self._submit()
        self._steps.close()
        self._rows.close()


def write_block(arr: zarr.Array, start: tuple[int, ...], data: np.ndarray) -> int:
    """Write ``data`` into ``arr`` at offset ``start`` (one per leading axis; the other axes
    start at 0), leaving out chunks whose part of ``data`` is all fill value.

    zarr leaves out such chunks itself, but finds them by comparing every value of every
    chunk with the fill value (for a float fill: NaN tests or a bytewise comparison of a
    broadcast copy). Here a compiled scan stops at the first value that differs, which is
    usually the first, and zarr's own check is switched off. The same chunks are left
    out: a chunk is stored unless all its values are the fill value (NaN for a NaN fill,
    the same bits for a numeric fill, so -0.0 is stored where the fill is 0.0).

    Returns
    -------
    int
        Chunk regions written (after leaving out the all-fill ones).
    """
    data = np.asarray(data)
    offset = (*start, *([0] * (data.ndim - len(start))))
    region = tuple(slice(o, o + n) for o, n in zip(offset, data.shape, strict=True))
    if arr.shards is not None or data.dtype != arr.dtype:  # (not used for sharded arrays)
        arr[region] = data
        return 1
    cuts = []
    for o, n, c in zip(offset, data.shape, arr.chunks, strict=True):
        edges = [o, *range((o // c + 1) * c, o + n, c), o + n]
        cuts.append(list(itertools.pairwise(edges)))

    def local(block: tuple[tuple[int, int], ...]) -> tuple[slice, ...]:
        return tuple(slice(lo - o, hi - o) for (lo, hi), o in zip(block, offset, strict=True))

    blocks = list(itertools.product(*cuts))
    keep = [b for b in blocks if not all_fill(data[local(b)], arr.fill_value)]
    fast = arr.with_config({"write_empty_chunks": True})
    if len(keep) == len(blocks):
        fast[region] = data
        return len(blocks)
    for b in keep:
        fast[tuple(slice(lo, hi) for lo, hi in b)] = data[local(b)]
    return len(keep)


def all_fill(a: np.ndarray, fill: Any) -> bool:
    """True if every value of ``a`` is ``fill`` (NaN for a NaN fill; for a float fill the
    same bits, as zarr compares them), stopping at the first value that is not.

    Examples
    --------
    >>> all_fill(np.zeros(4, np.float32), 0.0), all_fill(np.array([0.0, -0.0]), 0.0)
    (True, False)
    >>> all_fill(np.full(3, np.nan), np.nan), all_fill(np.array([np.nan, 1.0]), np.nan)
    (True, False)
    """
    a = np.asarray(a)
    if a.size == 0:
        return True
    if a.dtype.kind == "f" and a.dtype.itemsize in (4, 8):
        f = np.asarray(fill, dtype=a.dtype)
        ints = np.uint32 if a.dtype.itemsize == 4 else np.uint64
        flat = np.ascontiguousarray(a).reshape(-1).view(ints)
        if np.isnan(f):
            if HAVE_NUMBA:
                exp, mantissa = _NAN_BITS[a.dtype.itemsize]
                return bool(_nb_all_nan(flat, ints(exp), ints(mantissa)))
            return bool(np.isnan(a).all())
        bits = f.reshape(1).view(ints)[0]
        if HAVE_NUMBA:
            return bool(_nb_all_equal(flat, bits))
        return bool((flat == bits).all())
    return bool((a == np.asarray(fill, dtype=a.dtype)).all())


_NAN_BITS = {4: (0x7F800000, 0x007FFFFF), 8: (0x7FF0000000000000, 0x000FFFFFFFFFFFFF)}
"""Exponent and mantissa bits of float32 and float64: a NaN has every exponent bit set
and a non-zero mantissa."""

if HAVE_NUMBA:

    @njit(cache=True, nogil=True)
    def _nb_all_equal(bits, value):  # pragma: no cover - compiled
        for i in range(bits.size):
            if bits[i] != value:
                return False
        return True

    @njit(cache=True, nogil=True)
    def _nb_all_nan(bits, exp, mantissa):  # pragma: no cover - compiled
        for i in range(bits.size):
            b = bits[i]
            if (b & exp) != exp or (b & mantissa) == 0:
                return False
        return True


def _each_array(write: Callable[[Any], None], items: Iterable[Any]) -> None:
    """``write`` every item, several arrays at a time (storage latency, not CPU)."""
    with ThreadPoolExecutor(max_workers=_IO_THREADS) as pool:
        list(pool.map(write, items))
