"""Check ``nan``: no NaN or infinity where the conventions forbid one."""

from __future__ import annotations

import math
import re
from typing import Any

import numpy as np
import zarr

from lesprep.verify.findings import ResultsTree

COORDINATES: tuple[str, ...] = ("time", "z", "y", "x", "z_bounds", "y_bounds", "x_bounds")
"""Coordinate arrays of a store (not checked)."""
_BLOCK_BYTES = 64 * 2**20  # read at most this much per array access when scanning


# --- NaN -------------------------------------------------------------------------------


def _forbidden(kind: str, name: str) -> bool:
    """Whether NaN is forbidden in an array: every canonical field (ingest refuses NaN in
    any mapped field and derives the others from them); in a scale store, the moments,
    covariances, sub-grid TKE and the cloud fractions (``drh_dz`` of a one-level column
    and the baselines may be NaN); a lagged copy ``<name>_lag<k>`` as ``<name>``."""
    if name in COORDINATES:
        return False
    if kind == "canonical":
        return True
    name = re.sub(r"_lag[0-9]+$", "", name)  # a lagged copy (set stores) as its feature
    base, _, suffix = name.rpartition("_")
    return (
        name in ("cloud_fraction", "cloud_fraction_zero", "tke_sgs")
        or name.startswith("cov_")
        or (bool(base) and suffix in ("mean", "var", "skew"))
    )


def nonfinite(
    arr: Any, *, block_bytes: int = _BLOCK_BYTES
) -> tuple[int, int, tuple[int, ...] | None]:
    """NaN count, infinity count and the first non-finite index of an array.

    Reads blocks of whole chunks along the first axis, so memory stays bounded.

    Parameters
    ----------
    arr
        A zarr (or numpy) array of floats.
    block_bytes
        Most bytes read at once (at least one chunk along the first axis).

    Returns
    -------
    n_nan, n_inf : int
    first : tuple of int or None
        Index of the first non-finite element in C order, or None.

    Examples
    --------
    >>> import numpy as np
    >>> nonfinite(np.array([[1.0, np.nan], [np.inf, np.nan]]))
    (2, 1, (0, 1))
    """
    if arr.ndim == 0 or arr.shape[0] == 0:
        return 0, 0, None
    chunk0 = getattr(arr, "chunks", arr.shape)[0]
    per_row = max(1, math.prod(arr.shape[1:]) * arr.dtype.itemsize)
    step = max(chunk0, (block_bytes // per_row) // chunk0 * chunk0)
    n_nan = n_inf = 0
    first: tuple[int, ...] | None = None
    for lo in range(0, arr.shape[0], step):
        a = np.asarray(arr[lo : lo + step])
        if a.dtype.kind not in "fc":
            return 0, 0, None
        nan, inf = np.isnan(a), np.isinf(a)
        n_nan += int(nan.sum())
        n_inf += int(inf.sum())
        if first is None and (n_nan or n_inf):
            idx = np.argwhere(nan | inf)[0]
            first = (int(idx[0]) + lo, *(int(i) for i in idx[1:]))
    return n_nan, n_inf, first


def check_nan(tree: ResultsTree) -> None:
    kinds = [("canonical", p) for p in tree.canonical.values()]
    kinds += [("coarse", p) for p in [*tree.scale.values(), *tree.sets.values()]]
    for kind, path in kinds:
        if not tree.opened(path):
            continue
        try:
            root = zarr.open_group(str(path), mode="r")
            arrays = sorted((n, a) for n, a in root.arrays() if _forbidden(kind, n))
        except Exception as exc:
            tree.add("nan", path, f"cannot list arrays: {exc}")
            continue
        for name, arr in arrays:
            tree.checked["nan"] += 1
            try:
                n_nan, n_inf, first = nonfinite(arr)
            except Exception as exc:  # undecodable chunk
                tree.add("nan", path, f"{name}: cannot read: {type(exc).__name__}: {exc}")
                continue
            if n_nan or n_inf:
                dims = arr.metadata.dimension_names or tuple(f"dim{i}" for i in range(arr.ndim))
                at = ", ".join(f"{d}={i}" for d, i in zip(dims, first or (), strict=False))
                tree.add("nan", path, f"{name}: {n_nan} NaN, {n_inf} inf (first at {at})")
