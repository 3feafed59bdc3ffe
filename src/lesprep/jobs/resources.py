"""Job sizing for Snakemake ``resources`` from the real size of a job's inputs.

Snakemake's ``input.size_mb`` of a Zarr directory is the directory inode, not its
content, so sizes here are measured: the content size of stores and the array shapes in
their metadata. Every stage streams one output time at a time, so memory follows the
size of one time step of the fine grid (float64 working copies), not the run length.
Memory grows with ``attempt`` so a job killed for memory is retried larger.
"""

from __future__ import annotations

import json
import math
from collections.abc import Iterable, Mapping
from dataclasses import dataclass
from pathlib import Path
from typing import Any

from lesprep.store import dir_size_bytes

MiB = 2**20
# float64-sized copies of one fine time step held by a job, by stage. Measured peaks at
# 512 x 512 x 160 (one step of one variable = 320 MiB in float64): ingest 4.9 GB; coarsening
# with 9 scales and 2 patch scales 2.8 GB (finished chunk rows are written while the next
# slab is computed, so only the coarse scales hold a whole step; its float64 work arrays
# are sized by a z-slab). The coarsening figure keeps a margin for taller slabs.
_WORKING_COPIES = {"demo": 12, "ingest": 14, "coarsen": 10, "sets": 4}
_BASE_MB = {"demo": 600, "ingest": 700, "coarsen": 800, "sets": 700}
# throughput floor used for the runtime request, MB/s of input content
_MB_PER_S = {"demo": 20, "ingest": 40, "coarsen": 40, "sets": 40}


def _paths(inputs: Any) -> list[Path]:
    if isinstance(inputs, (str, Path)):
        return [Path(inputs)]
    out: list[Path] = []
    for item in inputs if isinstance(inputs, Iterable) else [inputs]:
        out.extend(_paths(item) if not isinstance(item, (str, Path)) else [Path(item)])
    return out


def zarr_step_bytes(store: Path) -> int:
    """Bytes of one time step of the largest array in a Zarr store (from its metadata)."""
    meta = store / "zarr.json"
    if not meta.exists():
        return 0
    try:
        doc = json.loads(meta.read_text())
        arrays = doc.get("consolidated_metadata", {}).get("metadata", {})
        best = 0
        for m in arrays.values():
            if m.get("node_type") != "array":
                continue
            shape = m.get("shape", [])
            dims = m.get("dimension_names") or []
            n = math.prod(shape)
            if dims and dims[0] in ("time", "sample") and shape and shape[0]:
                n //= shape[0]
            best = max(best, n)
        return best * 8
    except (OSError, ValueError):
        return 0


def netcdf_step_bytes(path: Path) -> int:
    """Bytes (float64) of one time step of the largest variable of a NetCDF file."""
    try:
        import netCDF4

        with netCDF4.Dataset(path) as nc:
            best = 0
            for v in nc.variables.values():
                shape = v.shape
                n = math.prod(shape)
                lead = v.dimensions[0] if v.dimensions else None
                if lead is not None and (nc.dimensions[lead].isunlimited() or lead == "time"):
                    n //= max(1, shape[0])
                best = max(best, n)
            return best * 8
    except Exception:  # an unreadable file fails later, with a precise message
        return 0


@dataclass(frozen=True, kw_only=True)
class ResourceSettings:
    """Job sizing (config section ``resources``)."""

    max_mem_mb: int
    threads: int

    @classmethod
    def from_config(cls, resources: Mapping[str, Any]) -> ResourceSettings:
        """Parse the validated ``resources`` section."""
        return cls(max_mem_mb=int(resources["max_mem_mb"]), threads=int(resources["threads"]))


def job_resources(
    step: str, inputs: Any, attempt: int, resources: ResourceSettings
) -> dict[str, int]:
    """``mem_mb`` and ``runtime`` (minutes) for one job.

    Parameters
    ----------
    step
        Stage name: ``demo``, ``ingest``, ``coarsen`` or ``sets``.
    inputs
        The job's input paths (files or store directories).
    attempt
        Snakemake's attempt counter (1 for the first try).
    resources
        Job sizing (``max_mem_mb`` caps the request).
    """
    paths = [p for p in _paths(inputs) if p.exists()]
    total = sum(dir_size_bytes(p) for p in paths)
    step_bytes = 0
    for p in paths:
        if p.is_dir() and (p / "zarr.json").exists():
            step_bytes = max(step_bytes, zarr_step_bytes(p))
        elif p.is_dir():
            for f in sorted(p.glob("*.nc"))[:4]:
                step_bytes = max(step_bytes, netcdf_step_bytes(f))
        elif p.suffix == ".nc":
            step_bytes = max(step_bytes, netcdf_step_bytes(p))
    cap = resources.max_mem_mb
    mem = _BASE_MB.get(step, 700) + _WORKING_COPIES.get(step, 8) * step_bytes / MiB
    mem_mb = int(min(cap, math.ceil(mem * (1.5 ** (attempt - 1)))))
    runtime = int(max(5, math.ceil(total / MiB / _MB_PER_S.get(step, 40) / 60 * 3 + 2)))
    return {"mem_mb": mem_mb, "runtime": runtime * attempt}


def job_threads(step: str, inputs: Any, resources: ResourceSettings) -> int:
    """Threads of a job: one for small inputs (start-up dominates), else the config's."""
    configured = resources.threads
    stores = [p for p in _paths(inputs) if (p / "zarr.json").exists()]
    if not stores:  # not written yet (sized when the DAG is built): assume big
        return configured
    return 1 if max(zarr_step_bytes(p) for p in stores) < 32 * MiB else configured
