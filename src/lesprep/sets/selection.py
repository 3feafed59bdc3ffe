"""Which samples of a set a reader keeps, and labels joined from outside the store.

Filters act on per-sample arrays read whole once, before any batch: the coordinates
(``z``, ``case``, ``regime``, case attributes, ``time``), a 1-D feature named in a
condition (``cloud_fraction`` for cloudy-only) and the joined scene labels. All filters
combine with *and*. Because the selection is known before reading, a read unit without a
selected sample is never read.

Scene labels come from the regimes table ``results/regimes.tsv`` (columns ``case``,
``time_s``, ``label``; :mod:`lesprep.report.regimes`), joined on the sample's ``case`` and
``time``. Both are the seconds of the per-case store, the table's written with nine
significant digits, so they are matched after rounding to the millisecond.
"""

from __future__ import annotations

from collections.abc import Mapping, Sequence
from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd
from numpy.typing import NDArray

from lesprep.errors import ConfigError, InputError

SCENE_COLUMNS = ("case", "time_s", "label")
"""Columns of the regimes table the join needs (``lesprep.report.regimes.label_scenes``)."""
SCENE_KEY = "scene_label"
"""Name of the joined label in batches and in ``where`` conditions."""

Condition = str | float | int | Sequence[str | float | int]


def condition_mask(values: NDArray, wanted: Condition) -> NDArray[np.bool_]:
    """Samples whose value equals ``wanted`` or, for a list, is one of its entries.

    Examples
    --------
    >>> condition_mask(np.array(["a", "b", "c"], dtype=object), ["a", "c"]).tolist()
    [True, False, True]
    >>> condition_mask(np.array([1.0, 2.0]), 2).tolist()
    [False, True]
    """
    items = [wanted] if isinstance(wanted, (str, int, float)) else list(wanted)
    return np.isin(np.asarray(values), np.asarray(items, dtype=object))


def range_mask(values: NDArray, bounds: Sequence[float]) -> NDArray[np.bool_]:
    """Samples with ``bounds[0] <= value <= bounds[1]``.

    Examples
    --------
    >>> range_mask(np.array([50.0, 150.0, 300.0]), (100, 300)).tolist()
    [False, True, True]
    """
    lo, hi = (float(b) for b in bounds)
    if lo > hi:
        raise ConfigError(f"height range [{lo:g}, {hi:g}] m is empty: expected min <= max")
    v = np.asarray(values, dtype=np.float64)
    return (v >= lo) & (v <= hi)


def combine(masks: Sequence[NDArray[np.bool_]], n: int) -> NDArray[np.bool_] | None:
    """*And* of the masks (None when there is none: every sample is kept)."""
    if not masks:
        return None
    out = np.ones(int(n), dtype=bool)
    for m in masks:
        out &= m
    return out


def read_scene_table(path: str | Path) -> pd.DataFrame:
    """The regimes table with its key and label columns checked.

    Raises
    ------
    InputError
        A missing column or a repeated ``(case, time_s)``.
    """
    path = Path(path)
    try:
        table = pd.read_csv(path, sep="\t", dtype={"case": str})
    except (OSError, ValueError) as err:
        raise InputError(f"cannot read the scene label table: {err}", file=str(path)) from err
    missing = [c for c in SCENE_COLUMNS if c not in table.columns]
    if missing:
        raise InputError(
            f"has no column(s) {missing}; found {list(table.columns)}, expected "
            f"{list(SCENE_COLUMNS)} (the regimes table)",
            file=str(path),
            hint="pass results/regimes.tsv written by the regimes rule",
        )
    table = table.assign(_ms=_millis(table["time_s"].to_numpy()))
    dup = table.duplicated(["case", "_ms"])
    if dup.any():
        row = table[dup].iloc[0]
        raise InputError(
            f"repeats the scene (case {row['case']!r}, time_s {row['time_s']}); expected one "
            "row per case and time",
            file=str(path),
        )
    return table


def _millis(t: NDArray) -> NDArray[np.int64]:
    return np.round(np.asarray(t, dtype=np.float64) * 1000.0).astype(np.int64)


def join_scene_labels(
    case: NDArray,
    time: NDArray,
    table: pd.DataFrame,
    *,
    source: str,
    fill: int | None = None,
) -> NDArray[np.int64]:
    """Scene label of every sample from its ``(case, time)``.

    Parameters
    ----------
    case, time
        The samples' case ids and times (s, the store's numbers).
    table
        :func:`read_scene_table` output.
    source
        The table's file, for messages.
    fill
        Label of samples whose scene is not in the table; None: such a sample is an error.

    Raises
    ------
    InputError
        If a sample has no label and ``fill`` is None (names the first missing scenes).
    """
    keys = pd.DataFrame({"case": np.asarray(case).astype(str), "_ms": _millis(time)})
    right = table[["case", "_ms", "label"]].astype({"case": str})
    joined = keys.merge(right, on=["case", "_ms"], how="left", sort=False)
    labels = joined["label"].to_numpy()
    missing = pd.isna(labels)
    if missing.any():
        if fill is None:
            lost = keys[missing].drop_duplicates().head(3)
            scenes = ", ".join(f"({c!r}, {m / 1000:g} s)" for c, m in lost.itertuples(False))
            raise InputError(
                f"has no label for {int(missing.sum())} samples, e.g. the scenes (case, time) "
                f"{scenes}; expected a row for every scene of the set",
                file=source,
                hint="use the regimes table of the same results tree, or give a fill label",
            )
        labels = np.where(missing, fill, labels)
    return labels.astype(np.int64)


def describe_where(where: Mapping[str, Any]) -> str:
    """One-line text of the conditions (for messages and the reader's repr)."""
    return ", ".join(f"{k} in {v!r}" for k, v in where.items()) or "none"
