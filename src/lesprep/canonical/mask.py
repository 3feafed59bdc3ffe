"""Cloud mask on the fine grid.

A fine cell is cloudy when its cloud liquid water mixing ratio exceeds the threshold,
strictly (``qc > threshold``). The default threshold, 1e-5 kg kg-1 (0.01 g/kg), is
common practice for LES cloud masks; it is configured as a quantity with units and
parsed once into :attr:`lesprep.canonical.settings.IngestSettings.threshold`.
"""

from __future__ import annotations

import numpy as np
from numpy.typing import NDArray


def cloud_mask(qc: NDArray[np.floating], threshold: float) -> NDArray[np.bool_]:
    """Cloudy cells: ``qc > threshold`` (kg kg-1)."""
    return np.asarray(qc) > threshold


def column_cloudy(mask: NDArray[np.bool_], *, z_axis: int = 0) -> NDArray[np.bool_]:
    """Columns with at least one cloudy cell (reduces the z axis)."""
    return np.any(mask, axis=z_axis)
