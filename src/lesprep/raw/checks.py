"""Value checks after unit conversion: finiteness and plausibility ranges.

The plausibility ranges (``plausible`` of each entry of :mod:`lesprep.catalogue`) are
common practice for boundary-layer LES, not physical laws; they exist to catch mislabelled
units (g/kg stored under a ``kg kg-1`` label gives cloud water of order 1) and garbage.
The config may override any of them (``ingest.plausible_ranges``).

============  ===================  ==========================================
variable      default range        why
============  ===================  ==========================================
qc            [0, 0.02] kg kg-1     no boundary-layer cloud holds 20 g/kg
qv            [0, 0.05] kg kg-1     50 g/kg exceeds saturation at 40 degC
T             [150, 340] K          coldest tropopause to hottest surface
p             [1e4, 1.1e5] Pa       100 hPa to the highest sea-level pressure
w             [-60, 60] m s-1       strongest convective updrafts stay below
============  ===================  ==========================================
"""

from __future__ import annotations

from collections.abc import Sequence

import numpy as np
from numpy.typing import NDArray

from lesprep.errors import NonFiniteError, RangeError


def value_extent(values: NDArray[np.floating]) -> tuple[int, float, float]:
    """Count of NaN/Inf values and the minimum and maximum of the finite ones.

    Returns ``(nonfinite, vmin, vmax)``; ``vmin > vmax`` (``inf, -inf``) when no value is
    finite. The common case (all finite) costs two vectorised reductions and no
    temporary: NaN propagates through ``min`` and an infinity shows as an extreme, so
    finite extremes prove every value finite. Only otherwise are the values masked.
    """
    a = np.asarray(values)
    if a.size == 0:
        return 0, float("inf"), float("-inf")
    lo, hi = float(a.min()), float(a.max())
    if np.isfinite(lo) and np.isfinite(hi):
        return 0, lo, hi
    good = a[np.isfinite(a)]
    if good.size == 0:
        return int(a.size), float("inf"), float("-inf")
    return int(a.size - good.size), float(good.min()), float(good.max())


def check_finite(
    values: NDArray[np.floating],
    *,
    variable: str,
    case: str,
    file: str,
    dims: Sequence[str],
    time: float | None = None,
) -> None:
    """Raise NonFiniteError with the count and first location of NaN/Inf values."""
    if value_extent(values)[0] == 0:
        return
    bad = ~np.isfinite(values)
    first = np.unravel_index(int(np.argmax(bad)), values.shape)
    loc = ", ".join(f"{d}={i}" for d, i in zip(dims, first, strict=True))
    when = f" at time {time:g} s" if time is not None else ""
    raise NonFiniteError(
        f"{int(bad.sum())} NaN/Inf value(s){when}; first at index ({loc})",
        case=case,
        file=file,
        variable=variable,
        hint="repair or remove the output time; lesprep does not fill missing values",
    )


def check_range(
    values: NDArray[np.floating],
    *,
    name: str,
    bounds: tuple[float, float],
    units: str,
    case: str,
    file: str,
    raw_variable: str,
    raw_units: str,
    time: float | None = None,
    extent: tuple[float, float] | None = None,
) -> None:
    """Raise RangeError if converted values fall outside the plausible range.

    ``extent`` is ``(min, max)`` of ``values`` when the caller has it already.
    """
    lo, hi = bounds
    if extent is None:
        _, vmin, vmax = value_extent(values)
    else:
        vmin, vmax = float(extent[0]), float(extent[1])
    if vmin >= lo and vmax <= hi:
        return
    when = f" at time {time:g} s" if time is not None else ""
    hint = "check the units attribute"
    if name in ("qc", "qv") and vmax > hi and vmax < 1000 * hi:
        hint = (
            f"values look like g/kg labelled {raw_units!r}; fix the units attribute or "
            "declare the right units in the variable map"
        )
    raise RangeError(
        f"canonical {name} spans [{vmin:.6g}, {vmax:.6g}] {units}{when} after converting from "
        f"{raw_units!r}; expected within [{lo:g}, {hi:g}] {units} (plausibility range, "
        "common practice; override in config ingest.plausible_ranges)",
        case=case,
        file=file,
        variable=raw_variable,
        hint=hint,
    )
