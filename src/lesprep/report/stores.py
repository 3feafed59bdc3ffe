"""Opening the stores the report reads, with the variables each figure or table needs."""

from __future__ import annotations

import contextlib
from collections.abc import Iterator
from pathlib import Path
from typing import Any

import xarray as xr

from lesprep.errors import InputError
from lesprep.store import open_store

SET_CHUNK = 1 << 22
"""Samples per read of a training store (16 MiB of float32)."""


def set_slices(ds: xr.Dataset, chunk: int) -> Iterator[slice]:
    """Slices of at most ``chunk`` samples covering a training store's ``sample`` axis."""
    n = int(ds.sizes.get("sample", 0))
    for start in range(0, n, max(1, int(chunk))):
        yield slice(start, min(n, start + chunk))


def require_names(ds: xr.Dataset, names: tuple[str, ...], path: str | Path) -> None:
    """Raise InputError naming the store and what it lacks when ``names`` are missing."""
    missing = [n for n in names if n not in ds.variables]
    if missing:
        raise InputError(
            f"store lacks variable(s) {missing}; expected a lesprep store holding {list(names)}",
            file=str(path),
            hint="pass the right store (canonical.zarr, scale-<L>m.zarr or a set store)",
        )


@contextlib.contextmanager
def opened_store(
    path: str | Path, required: tuple[str, ...] = (), **kwargs: Any
) -> Iterator[xr.Dataset]:
    """Open a store (:func:`lesprep.store.open_store`), check ``required``, close it after.

    Parameters
    ----------
    path
        The store.
    required
        Variables the caller reads (InputError naming the missing ones otherwise).
    **kwargs
        Passed to :func:`lesprep.store.open_store` (e.g. ``chunks={}``).
    """
    ds = open_store(path, **kwargs)
    try:
        require_names(ds, required, path)
        yield ds
    finally:
        ds.close()
