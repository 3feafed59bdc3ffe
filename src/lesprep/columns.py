"""Column quantities on the fine grid.

Liquid water path ``LWP = sum_k rho_k * qc_k * dz_k`` (kg m-2): the midpoint rule on the
possibly stretched grid, with ``dz_k`` the thickness between the cell's faces and
``rho`` moist-air density from the ideal-gas law with virtual temperature
(:func:`lesprep.thermo.air_density`). It is exact for a cloud-water profile that is
linear in height within each cell when each centre is midway between its faces.
"""

from __future__ import annotations

import numpy as np
from numpy.typing import NDArray


def column_integral(
    values: NDArray[np.floating], thickness: NDArray[np.floating], *, z_axis: int = 0
) -> NDArray[np.float64]:
    """Vertical integral ``sum_k values_k * dz_k`` along ``z_axis`` in float64."""
    v = np.moveaxis(np.asarray(values, dtype=np.float64), z_axis, -1)
    return v @ np.asarray(thickness, dtype=np.float64)


def liquid_water_path(
    qc: NDArray[np.floating],
    rho: NDArray[np.floating],
    thickness: NDArray[np.floating],
    *,
    z_axis: int = 0,
) -> NDArray[np.float64]:
    """Liquid water path (kg m-2) from qc (kg kg-1), rho (kg m-3) and dz (m)."""
    return column_integral(np.asarray(qc, dtype=np.float64) * rho, thickness, z_axis=z_axis)
