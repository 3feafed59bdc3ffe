"""Lagged inputs: a coarse cell's value some output times earlier.

With ``sets.lags`` a set store carries, for each chosen feature ``f`` and each lag ``k``,
``f_lag<k>``: the value of the same coarse cell (same case, z, y, x) ``k`` output times
before the sample's time, read from the per-case scale store. ``k`` counts output times
of the per-case store, not the kept times of a set thinned by ``time_stride``. Kept
times whose lag would fall before the case's first output time (its first ``max(k)``
times) are dropped, so no sample lacks a lag.

A lag is a time only when the output interval is regular: every case of a set with lags
must have one constant interval (a missing output time or an irregular interval is
refused, naming the case and the gap). The span is the attribute ``lag_s`` of the lagged
array when all cases of the set share their interval; cases with different intervals
(the demo cases have 1200 s to 1800 s) are allowed with a warning, and the attribute
``lag_s_by_case`` then gives each case's span.

A lag describes the history of the cell, not of the air in it: at 5 m s-1 the air
crosses a 1 km cell in about 200 s, so after an hourly output interval the cell holds
other air.
"""

from __future__ import annotations

from collections.abc import Mapping, Sequence
from dataclasses import dataclass
from typing import Any

import numpy as np

from lesprep.errors import ConfigError, TimeAxisError

LAG_KINDS = ("cell", "column")
"""Kinds of feature (see :data:`lesprep.sets.assemble.FEATURE_KINDS`) that can be lagged:
a profile has no time and a patch would multiply the store's size."""

INTERVAL_RTOL = 1e-6
"""Relative tolerance of two output intervals that count as equal."""


@dataclass(frozen=True)
class Lag:
    """One lagged array of a set: ``name`` is ``feature`` ``steps`` output times earlier."""

    name: str
    feature: str
    steps: int


def lag_name(feature: str, steps: int) -> str:
    """Name of a lagged feature.

    Examples
    --------
    >>> lag_name("qt_mean", 2)
    'qt_mean_lag2'
    """
    return f"{feature}_lag{int(steps)}"


def plan_lags(
    features: Sequence[str],
    steps: Sequence[int],
    kinds: Mapping[str, str],
    *,
    where: str,
) -> list[Lag]:
    """The lagged arrays of a set, checked against the features its cases carry.

    Parameters
    ----------
    features
        Features to lag (``sets.lags.features``).
    steps
        Lags in output times (``sets.lags.steps``), each at least 1.
    kinds
        Every variable of the per-case stores -> its feature kind (``cell``, ``column``,
        ``profile``, ``patch``).
    where
        The set and scale, for messages.

    Returns
    -------
    list of Lag
        In the order features x steps.

    Raises
    ------
    ConfigError
        If a feature is not in the stores, cannot be lagged, or a lagged name is taken.

    Examples
    --------
    >>> [x.name for x in plan_lags(["w_mean"], [1, 2], {"w_mean": "cell"}, where="train")]
    ['w_mean_lag1', 'w_mean_lag2']
    """
    out = []
    lagable = sorted(k for k, v in kinds.items() if v in LAG_KINDS)
    for f in features:
        kind = kinds.get(f)
        if kind is None:
            raise ConfigError(
                f"{where}: sets.lags.features names {f!r}, which the per-case scale stores "
                f"do not hold; expected one of {lagable}",
                variable=f,
                hint="name a feature of the scale stores (see coarsen.moments)",
            )
        if kind not in LAG_KINDS:
            raise ConfigError(
                f"{where}: sets.lags.features names {f!r}, a {kind} variable; only features "
                f"per cell or per column ({', '.join(LAG_KINDS)}) can be lagged",
                variable=f,
                hint="remove it from sets.lags.features",
            )
        for k in steps:
            if int(k) < 1:
                raise ConfigError(f"{where}: sets.lags.steps holds {k}; expected integers >= 1")
            name = lag_name(f, int(k))
            if name in kinds:
                raise ConfigError(
                    f"{where}: the lagged feature {name!r} would replace a variable of the "
                    "per-case stores of that name",
                    variable=name,
                    hint="rename that variable in the variable map",
                )
            out.append(Lag(name=name, feature=f, steps=int(k)))
    return out


def output_interval(times: Any, *, case: str, file: str | None = None) -> float | None:
    """The regular output interval of a case (s), or None with fewer than two times.

    Parameters
    ----------
    times
        Output times of the per-case store, in s, increasing.
    case, file
        Named in the error.

    Raises
    ------
    TimeAxisError
        If two consecutive intervals differ (relative tolerance :data:`INTERVAL_RTOL`):
        names the first interval that differs from the first one, with its times.

    Examples
    --------
    >>> output_interval([0.0, 600.0, 1200.0], case="c")
    600.0
    >>> output_interval([0.0, 600.0, 1800.0], case="c")  # doctest: +ELLIPSIS
    Traceback (most recent call last):
    ...
    lesprep.errors.TimeAxisError: case 'c': output interval is not regular: 600 s from 0 s ...
    """
    t = np.asarray(times, dtype=np.float64)
    if t.size < 2:
        return None
    d = np.diff(t)
    first = float(d[0])
    bad = np.nonzero(~np.isclose(d, first, rtol=INTERVAL_RTOL, atol=0.0))[0]
    if first <= 0 or bad.size:
        i = int(bad[0]) if bad.size else 0
        raise TimeAxisError(
            f"output interval is not regular: {first:g} s from {t[0]:g} s to {t[1]:g} s "
            f"but {d[i]:g} s from {t[i]:g} s to {t[i + 1]:g} s (a missing or irregular "
            "output time); lagged inputs need one constant interval",
            case=case,
            file=file,
            hint="drop sets.lags, or re-ingest the case with a regular output interval",
        )
    return first


def common_interval(intervals: Mapping[str, float | None]) -> float | None:
    """The output interval shared by every case of a set, or None if they differ.

    Cases with a single time (no interval) are ignored.

    Examples
    --------
    >>> common_interval({"a": 600.0, "b": None, "c": 600.0})
    600.0
    >>> common_interval({"a": 600.0, "b": 900.0}) is None
    True
    """
    known = [v for v in intervals.values() if v is not None]
    if not known or not np.allclose(known, known[0], rtol=INTERVAL_RTOL, atol=0.0):
        return None
    return float(known[0])


def lag_attrs(
    base: Mapping[str, Any], lag: Lag, intervals: Mapping[str, float | None]
) -> dict[str, Any]:
    """Attributes of a lagged array: the feature's, with the lag described.

    ``lag_s`` is the lag in seconds when every case has the same output interval;
    otherwise ``lag_s_by_case`` maps each case to its lag in seconds.

    Examples
    --------
    >>> lag = Lag("w_mean_lag1", "w_mean", 1)
    >>> a = lag_attrs({"long_name": "mean of w", "units": "m s-1"}, lag, {"c": 600.0})
    >>> a["lag_s"], a["lag_steps"], a["long_name"]
    (600.0, 1, 'mean of w, 1 output time(s) (600 s) earlier')
    >>> lag_attrs({}, lag, {"c": 600.0, "d": 900.0})["lag_s_by_case"]
    {'c': 600.0, 'd': 900.0}
    """
    attrs = {k: v for k, v in base.items() if k not in ("coordinates", "_FillValue")}
    common = common_interval(intervals)
    span = "" if common is None else f" ({lag.steps * common:g} s)"
    attrs["long_name"] = (
        f"{base.get('long_name', lag.feature)}, {lag.steps} output time(s){span} earlier"
    )
    attrs["lag_of"] = lag.feature
    attrs["lag_steps"] = lag.steps
    if common is not None:
        attrs["lag_s"] = float(lag.steps * common)
    else:
        attrs["lag_s_by_case"] = {
            c: float(lag.steps * v) for c, v in sorted(intervals.items()) if v is not None
        }
    attrs["comment"] = (
        f"{lag.feature} of the same coarse cell {lag.steps} output time(s) before the "
        "sample's time, from the per-case scale store. It is the history of the cell, not "
        "of the same air: air at 5 m s-1 crosses a 1 km cell in about 200 s."
    )
    return attrs


def kept_after_lags(t_idx: np.ndarray, steps: Sequence[int]) -> np.ndarray:
    """Kept time indices whose every lag lies within the case (index >= max(steps)).

    Examples
    --------
    >>> kept_after_lags(np.array([0, 2, 4, 6]), [1, 3]).tolist()
    [4, 6]
    """
    t_idx = np.asarray(t_idx)
    if not len(steps):
        return t_idx
    return t_idx[t_idx >= max(int(k) for k in steps)]
