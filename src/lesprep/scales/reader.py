"""Reading the canonical store for coarsening: one z-slab of every input at a time."""

from __future__ import annotations

import contextlib
import math
from collections.abc import Iterator
from concurrent.futures import Future, ThreadPoolExecutor
from pathlib import Path
from typing import Any

import numpy as np
import zarr

from lesprep.errors import InputError
from lesprep.scales.conserved import PER_SLAB
from lesprep.scales.settings import CoarsenSettings
from lesprep.scales.step import slab_bounds, slab_inputs


class FineReader:
    """Read the canonical store's fine fields slab by slab, one slab ahead.

    A slab is ``levels`` levels (default: the store's chunk height, so each read
    decodes whole chunks) of every 3-D input at one time. The arrays of a slab are read
    concurrently in their stored dtype (float32 stays float32, the mask int8); while the
    caller coarsens one slab the next is read on a background thread. Memory is two
    slabs, whatever the column height or the number of times.
    """

    def __init__(
        self, path: str | Path, settings: CoarsenSettings, *, levels: int | None = None
    ) -> None:
        self.group = zarr.open_group(str(path), mode="r")
        qc = self.group["qc"]
        self.ntimes, self.nz, self.ny, self.nx = (int(n) for n in qc.shape)
        self.levels = int(levels or qc.chunks[1])
        p = self.group["p"]
        self.p_profile = np.asarray(p[...], dtype=np.float64) if p.ndim == 1 else None
        arrays = dict(self.group.arrays())
        self.stored = tuple(
            n for n, a in arrays.items() if a.ndim == 4 and not n.endswith("_dev") and n != "p"
        )
        self.surface = tuple(
            n
            for n, a in arrays.items()
            if a.shape == (self.ntimes, self.ny, self.nx) and n != "lwp"
        )
        self._check(settings, path)
        names = list(slab_inputs(settings, p_is_3d=self.p_profile is None, stored=self.stored))
        for v in list(names):
            if f"{v}_dev" in self.group:  # a near-constant field's deviation and reference
                names += [f"{v}_dev", f"{v}_ref"]
        self.names = tuple(names)
        self.time_step_bytes = sum(
            math.prod(self.group[n].shape[1:]) * self.group[n].dtype.itemsize
            for n in (*self.names, *self.surface, "lwp")
        )
        """Uncompressed bytes read per output time: every slab input over the whole
        column, the surface fields and the liquid water path, in their stored dtypes."""
        self.bounds = slab_bounds(self.nz, self.levels)
        self._io = ThreadPoolExecutor(max_workers=len(self.names))
        self._ahead = ThreadPoolExecutor(max_workers=1)

    def _read(self, j: int, z0: int, z1: int) -> dict[str, np.ndarray]:
        def one(name: str) -> np.ndarray:
            return np.asarray(self.group[name][j, z0:z1])

        return dict(zip(self.names, self._io.map(one, self.names), strict=True))

    def slabs(self) -> Iterator[tuple[int, int, dict[str, np.ndarray]]]:
        """Yield ``(time index, z0, fields)`` for every slab of every time, in order."""
        keys = [(j, z0, z1) for j in range(self.ntimes) for z0, z1 in self.bounds]
        pending: Future[dict[str, np.ndarray]] | None = None
        try:
            for n, key in enumerate(keys):
                fields = pending.result() if pending is not None else self._read(*key)
                pending = None
                if n + 1 < len(keys):
                    pending = self._ahead.submit(self._read, *keys[n + 1])
                yield key[0], key[1], fields
                del fields
        finally:
            if pending is not None:
                with contextlib.suppress(Exception):
                    pending.result()

    def _check(self, settings: CoarsenSettings, path: str | Path) -> None:
        """Every variable the settings name must be in the store or computable from it."""
        available = {*self.stored, *self.surface, "p", *PER_SLAB}
        wanted = {
            "coarsen.moments": settings.moments,
            "coarsen.covariances": [v for pair in settings.covariances for v in pair],
            "coarsen.patches.variables": settings.patch_variables,
        }
        for key, names in wanted.items():
            for n in names:
                if n not in available:
                    raise InputError(
                        f"{key} lists {n!r}, which this case's canonical store does not hold "
                        f"(it holds {sorted({*self.stored, *self.surface})})",
                        hint="map the raw field in the case's variable map, or remove "
                        f"{n!r} from {key}",
                        file=str(path),
                        variable=n,
                    )
                if key != "coarsen.moments" and n in self.surface:
                    raise InputError(
                        f"{key} lists {n!r}, a 2-D surface field: only block moments are "
                        "computed for surface fields",
                        file=str(path),
                        variable=n,
                    )

    def surface_fields(self, j: int) -> dict[str, np.ndarray]:
        """The 2-D (surface) fields of time ``j``, by name."""
        return {n: np.asarray(self.group[n][j]) for n in self.surface}

    def lwp(self, j: int) -> np.ndarray:
        """Liquid water path of time ``j``."""
        return np.asarray(self.group["lwp"][j])

    def close(self) -> None:
        """Stop the reader threads."""
        self._ahead.shutdown(wait=True)
        self._io.shutdown(wait=True)

    def __enter__(self) -> FineReader:
        return self

    def __exit__(self, *exc: Any) -> None:
        self.close()
