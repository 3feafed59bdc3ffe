"""Skill of the baseline cloud fraction against the target.

Error metrics (RMSE, bias, MAE and the count of pairs) are computed in float64 over the
pairs where neither value is NaN (:func:`baseline_errors`); :func:`baseline_skill` reads
a training store in chunks and combines the chunks' metrics exactly, weighted by their
counts.
"""

from __future__ import annotations

import math
from pathlib import Path

import numpy as np
from numpy.typing import ArrayLike

from lesprep.errors import GridError, NonFiniteError
from lesprep.report.stores import SET_CHUNK, opened_store, require_names, set_slices


def baseline_errors(predicted: ArrayLike, target: ArrayLike) -> dict[str, float]:
    """Error of a prediction against a target, over the pairs without NaN.

    Parameters
    ----------
    predicted, target
        Arrays of the same shape (DataArrays and dask arrays are loaded). A pair is
        skipped when either value is NaN.

    Returns
    -------
    dict
        ``rmse = sqrt(mean((p - t)**2))``, ``bias = mean(p - t)`` (positive when the
        prediction is too high), ``mae = mean(|p - t|)``, all float64 over the kept
        pairs, and ``n``, the number of kept pairs (an int). With no pair left the three
        metrics are NaN and ``n`` is 0.

    Raises
    ------
    GridError
        If the shapes differ.
    NonFiniteError
        If a value is infinite.

    Examples
    --------
    >>> errors = baseline_errors([0.1, 0.5, float("nan")], [0.2, 0.2, 0.3])
    >>> {key: round(value, 6) for key, value in errors.items()}
    {'rmse': 0.223607, 'bias': 0.1, 'mae': 0.2, 'n': 2}
    """
    p = np.asarray(predicted, dtype=np.float64)
    t = np.asarray(target, dtype=np.float64)
    if p.shape != t.shape:
        raise GridError(
            f"predicted has shape {p.shape} and target has shape {t.shape}; "
            "expected the same shape",
        )
    if np.any(np.isinf(p)) or np.any(np.isinf(t)):
        raise NonFiniteError(
            "predicted or target holds infinite values; expected finite values or NaN",
            hint="mask invalid points as NaN to leave them out",
        )
    keep = ~(np.isnan(p) | np.isnan(t))
    n = int(np.count_nonzero(keep))
    if n == 0:
        nan = float("nan")
        return {"rmse": nan, "bias": nan, "mae": nan, "n": 0}
    diff = p[keep] - t[keep]
    return {
        "rmse": float(np.sqrt(np.mean(diff**2))),
        "bias": float(np.mean(diff)),
        "mae": float(np.mean(np.abs(diff))),
        "n": n,
    }


BASELINES: tuple[tuple[str, str, str], ...] = (
    ("sundqvist", "cf_sundqvist", "cloud_fraction"),
    ("gaussian", "cf_gaussian", "cloud_fraction"),
    ("gaussian", "cf_gaussian", "cloud_fraction_zero"),
)
"""``(baseline, predicted, target)`` rows of the baseline table. The Gaussian scheme
predicts P(s > 0), the fraction of cells holding any condensate, so it is also compared
with the fraction of cells with ``qc > 0`` (the target counts ``qc`` above the cloud
threshold)."""


def baseline_skill(
    set_store: str | Path,
    *,
    chunk: int = SET_CHUNK,
    predicted: str = "cf_sundqvist",
    target: str = "cloud_fraction",
) -> dict[str, float]:
    """Error of a baseline cloud fraction (default: Sundqvist's) against a target.

    Parameters
    ----------
    set_store
        A training store (any split, one scale).
    predicted, target
        Names of the baseline and the target in the store.
    chunk
        Samples read at a time; the per-slice results of
        :func:`lesprep.schemes.baseline_errors` are combined exactly (weighted by their
        pair counts: mean squared error, bias and mean absolute error are means).

    Returns
    -------
    dict
        ``rmse``, ``bias`` (positive when the baseline predicts too much cloud), ``mae``
        and ``n`` (pairs without NaN), as :func:`lesprep.schemes.baseline_errors`;
        NaN metrics and ``n = 0`` for a store without samples.

    Examples
    --------
    The test split of a small run (one case, 3 kept times x 16 levels x 2 x 2 columns at
    400 m):

    >>> skill = baseline_skill("results/sets/test/scale-400m.zarr")
    >>> sorted(skill)
    ['bias', 'mae', 'n', 'rmse']
    >>> skill["n"], 0.0 < skill["mae"] <= skill["rmse"]
    (192, True)
    """
    sq = bias = mae = 0.0
    n = 0
    with opened_store(set_store) as ds:
        if predicted in ds.variables and target in ds.variables:
            for sl in set_slices(ds, chunk):
                part = baseline_errors(
                    ds[predicted].isel(sample=sl).values,
                    ds[target].isel(sample=sl).values,
                )
                if part["n"] == 0:
                    continue
                k = int(part["n"])
                sq += k * part["rmse"] ** 2
                bias += k * part["bias"]
                mae += k * part["mae"]
                n += k
        elif int(ds.sizes.get("sample", 0)) > 0:
            require_names(ds, (predicted, target), set_store)
    if n == 0:
        nan = float("nan")
        return {"rmse": nan, "bias": nan, "mae": nan, "n": 0}
    return {"rmse": math.sqrt(sq / n), "bias": bias / n, "mae": mae / n, "n": n}


# --------------------------------------------------------------------------- scenes
