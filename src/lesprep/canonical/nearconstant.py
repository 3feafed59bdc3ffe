"""Near-constant fields: levels whose sub-grid spread float32 cannot hold.

One float32 step at 290 K is 3e-5 K. Where the true horizontal spread of a level is below
a few steps, the stored values are quantized and block variances and skewness describe the
rounding. Ingest detects such levels at the first kept output time
(:func:`quantized_levels`) and stores the variable also as ``<v>_dev``, its deviation from
the level mean computed in float64 before rounding, with ``<v>_ref``, that mean; the
physical ``<v>`` stays as it is. Coarsening takes the moments from ``<v>_dev``.
"""

from __future__ import annotations

import logging
from collections.abc import Sequence
from typing import Any

import numpy as np

from lesprep import catalogue
from lesprep.raw.archive import ArchiveIndex
from lesprep.raw.grid import destagger_vertical
from lesprep.store import ArraySpec

log = logging.getLogger("lesprep.canonical.ingest")


QUANTUM_STEPS = 16
"""A level whose values span fewer float32 steps than this is quantized (see
:func:`quantized_levels`)."""


def quantized_levels(values: np.ndarray) -> np.ndarray:
    """Levels of a stored ``(z, y, x)`` field whose spread is within a few float32 steps.

    A level is quantized when ``max - min < QUANTUM_STEPS * spacing(max |v|)`` in float32
    and the level is not all zero: its sub-grid variance and skewness would then describe
    the rounding, not the field (a float32 step is 3e-5 K at 290 K). Levels that are
    exactly zero everywhere (clear air in ``qc``) are not quantized, they are zero.

    Examples
    --------
    >>> a = np.full((2, 4, 4), 290.0, dtype=np.float32)
    >>> a[1] += np.linspace(0, 1, 16, dtype=np.float32).reshape(4, 4)
    >>> quantized_levels(a).tolist()
    [0]
    """
    lo = values.min(axis=(1, 2)).astype(np.float64)
    hi = values.max(axis=(1, 2)).astype(np.float64)
    top = np.maximum(np.abs(lo), np.abs(hi))
    step = np.spacing(top.astype(np.float32)).astype(np.float64)
    return np.nonzero((hi - lo < QUANTUM_STEPS * step) & (top > 0))[0]


def level_deviation(
    values: np.ndarray,
    *,
    faces: np.ndarray,
    z: np.ndarray,
    quantity: Any,
    fields: dict[str, np.ndarray],
    dtype: np.dtype,
) -> tuple[np.ndarray, np.ndarray]:
    """Deviation from the per-level horizontal mean (store dtype) and that mean (float64),
    from canonical-axis values converted in float64 (destaggered and quantity-converted in
    float64 here)."""
    if values.shape[0] == faces.size:  # on z faces
        values = destagger_vertical(np.ascontiguousarray(values), faces, z, axis=0)
    if quantity.convert is not None:
        values = np.asarray(quantity.convert(values, fields), dtype=np.float64)
    ref = values.mean(axis=(1, 2))
    return (values - ref[:, None, None]).astype(dtype), ref


def first_step(
    cat: ArchiveIndex,
    keep: np.ndarray,
    step_fields: Any,
    clipped: Any,
    names: Sequence[str],
) -> tuple[dict[str, np.ndarray], frozenset[str], dict[str, list[int]]]:
    """The first kept time's fields, the variables stored with a deviation field, and the
    quantized levels found (:func:`quantized_levels`) per variable.

    The first kept output time decides: a variable with quantized levels there gets
    ``<v>_dev`` and ``<v>_ref`` for the whole run (a store's arrays are fixed when it is
    created). Variables on horizontally staggered grids are only reported.
    """
    n_clipped = len(clipped.records)
    first = step_fields(int(keep[0]), frozenset())
    vm = cat.varmap
    quantized: dict[str, list[int]] = {}
    for name in names:
        if name == "p" or first[name].ndim != 3:
            continue
        levels = quantized_levels(first[name])
        if levels.size:
            quantized[name] = [int(k) for k in levels]
    eligible = {
        n
        for n in quantized
        if not any(a in ("y_face", "x_face") for a in vm.variables[n].axes(vm.dims))
    }
    for name, levels in quantized.items():
        shown = ", ".join(str(k) for k in levels[:12]) + (" ..." if len(levels) > 12 else "")
        remedy = (
            f"stored also as {name}_dev (deviation from the level mean, computed before "
            f"rounding) and {name}_ref, from which coarsening takes its sub-grid statistics"
            if name in eligible
            else "no remedy for a horizontally staggered field; its sub-grid statistics on "
            "these levels describe the rounding"
        )
        log.warning(
            "case %s: %s spans fewer than %d float32 steps on %d level(s) (indices %s) at "
            "the first kept time; %s",
            cat.case,
            name,
            QUANTUM_STEPS,
            len(levels),
            shown,
            remedy,
        )
    deviations = frozenset(eligible)
    if deviations:
        del clipped.records[n_clipped:]
        first = step_fields(int(keep[0]), deviations)
    return first, deviations, quantized


def deviation_layout(
    deviations: frozenset[str], nt: int, layout: dict[str, ArraySpec], dtype: np.dtype
) -> dict[str, ArraySpec]:
    """Arrays of the deviation fields: ``<v>_dev`` like ``<v>``, ``<v>_ref`` (time, z)."""
    out: dict[str, ArraySpec] = {}
    for name in sorted(deviations):
        base = layout[name]
        var = catalogue.get(name)
        attrs = {
            "long_name": f"{var.label} minus its horizontal mean on the level ({name}_ref), "
            "computed in float64 before rounding",
            "units": var.units,
            "comment": f"{name} = {name}_ref + {name}_dev; kept because {name} is nearly "
            "constant on some levels, where its float32 values are quantized",
        }
        attrs.update(catalogue.temperature_metadata(var.units, difference=True))
        out[f"{name}_dev"] = ArraySpec(
            dims=base.dims, shape=base.shape, chunks=base.chunks, dtype=dtype, attrs=attrs
        )
        nz = base.shape[1]
        out[f"{name}_ref"] = ArraySpec(
            dims=("time", "z"),
            shape=(nt, nz),
            chunks=(1, nz),
            dtype="float64",
            attrs={
                "long_name": f"horizontal mean of {var.label} on each level (float64)",
                "units": var.units,
                **catalogue.temperature_metadata(var.units, difference=False),
            },
        )
    return out
