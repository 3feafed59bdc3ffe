"""Cloud mask on the fine grid.

A fine cell is cloudy when its cloud liquid water exceeds the threshold, strictly. The
threshold is configured as a quantity with units, parsed once by :func:`parse_threshold`,
in one of two forms:

* a mixing ratio (``"1e-5 kg/kg"``, the default: 0.01 g/kg, common practice for LES cloud
  masks): cloudy where ``qc > threshold``;
* a mass concentration (``"0.001 g m-3"``, a value used in practice at the native grid:
  common practice, no published source): cloudy where ``rho_d * qc > threshold``, with
  ``rho_d`` the dry-air density of the cell (:func:`lesprep.thermo.dry_air_density`),
  since ``qc`` is kg of water per kg of dry air.

Which form was used goes into provenance and the mask's ``long_name``.
"""

from __future__ import annotations

from typing import Literal

import numpy as np
from numpy.typing import NDArray

from lesprep.errors import ConfigError
from lesprep.units import parse_quantity

ThresholdUnits = Literal["kg kg-1", "kg m-3"]
THRESHOLD_UNITS: tuple[str, ...] = ("kg kg-1", "kg m-3")


def parse_threshold(text: object, *, name: str = "ingest.cloud_threshold") -> tuple[float, str]:
    """A configured cloud threshold as ``(value, units)`` in SI units.

    Examples
    --------
    >>> parse_threshold("0.01 g/kg")
    (1e-05, 'kg kg-1')
    >>> parse_threshold("0.001 g m-3")
    (1e-06, 'kg m-3')
    """
    if isinstance(text, (int, float)) and not isinstance(text, bool):
        return parse_quantity(text, "kg kg-1", name=name), "kg kg-1"  # refused: no units
    for expected in THRESHOLD_UNITS:
        try:
            return parse_quantity(text, expected, name=name), expected
        except ConfigError:
            continue
    raise ConfigError(
        f"{name} is {text!r}: expected a mixing ratio of cloud water (for example "
        f"'1e-5 kg/kg' or '0.01 g/kg') or a mass concentration of cloud water (for example "
        f"'0.001 g m-3')",
        hint="give a number followed by its units",
    )


def describe_threshold(value: float, units: str) -> str:
    """The mask's condition in words, for ``long_name`` and provenance.

    >>> describe_threshold(1e-6, "kg m-3")
    'dry-air density times qc > 1e-06 kg m-3'
    """
    if units == "kg m-3":
        return f"dry-air density times qc > {value:g} kg m-3"
    return f"qc > {value:g} kg kg-1"


def cloud_mask(
    qc: NDArray[np.floating],
    threshold: float,
    *,
    units: str = "kg kg-1",
    dry_density: NDArray[np.floating] | None = None,
) -> NDArray[np.bool_]:
    """Cloudy cells: ``qc > threshold`` (kg kg-1) or ``rho_d qc > threshold`` (kg m-3).

    ``dry_density`` (kg m-3, broadcastable to ``qc``) is required for the second form.
    """
    if units == "kg m-3":
        if dry_density is None:
            raise ValueError("a mass-concentration threshold needs the dry-air density")
        return np.asarray(qc, dtype=np.float64) * np.asarray(dry_density) > threshold
    return np.asarray(qc) > threshold


def column_cloudy(mask: NDArray[np.bool_], *, z_axis: int = 0) -> NDArray[np.bool_]:
    """Columns with at least one cloudy cell (reduces the z axis)."""
    return np.any(mask, axis=z_axis)
