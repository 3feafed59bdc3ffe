"""Liquid water path, vertical faces and destaggering against closed forms."""

from __future__ import annotations

import numpy as np
import pytest
from metpy.calc import density, vapor_pressure
from metpy.units import units

from lesprep.canonical.derived import cell_diagnostics
from lesprep.errors import GridError
from lesprep.raw.grid import (
    destagger_vertical,
    horizontal_spacing,
    layer_thickness,
    vertical_faces,
)


def stretched_faces(n: int = 60, top: float = 2500.0) -> np.ndarray:
    s = np.linspace(0.0, 1.0, n + 1)
    return top * (0.4 * s + 0.6 * s**2)


def test_lwp_of_adiabatic_linear_profile() -> None:
    # qc rises linearly with height above cloud base zb at rate G up to cloud top zt:
    # LWP = rho * G * (zt - zb)**2 / 2 (closed form); cloud base/top fall on faces and
    # centres are midway between faces, so the midpoint rule is exact.
    # The ingest's fused pass is checked, with uniform p, T, qv so the density is one
    # number: the dry-air density (a mixing ratio is per kg of dry air), from MetPy as the
    # density of the dry air's partial pressure p - e.
    faces = stretched_faces()
    z = 0.5 * (faces[1:] + faces[:-1])
    zb, zt = faces[20], faces[40]
    gamma = 2.0e-6  # kg kg-1 per m (order of the adiabatic rate)
    p, t, r = 90000.0, 285.0, 0.008
    e = vapor_pressure(p * units.Pa, r * units("kg/kg"))
    rho = density(p * units.Pa - e, t * units.K, 0 * units("kg/kg")).to("kg/m^3").magnitude
    qc = np.where((z > zb) & (z < zt), gamma * (z - zb), 0.0)[:, None, None]
    full = np.ones_like(qc)
    diag = cell_diagnostics(
        p * full, t * full, r * full, qc, layer_thickness(faces), 1e-5, dtype=np.float64
    )
    assert float(diag.lwp[0, 0]) == pytest.approx(rho * gamma * (zt - zb) ** 2 / 2, rel=1e-6)


def test_faces_from_centres_and_bounds() -> None:
    faces = stretched_faces(30)
    z = 0.5 * (faces[1:] + faces[:-1])
    bounds = np.stack([faces[:-1], faces[1:]], axis=1)
    np.testing.assert_allclose(vertical_faces(z, z_bounds=bounds), faces)
    np.testing.assert_allclose(vertical_faces(z, z_face=faces), faces)
    derived = vertical_faces(z)
    assert derived.size == z.size + 1
    assert np.all((z > derived[:-1]) & (z < derived[1:]))


def test_destagger_linear_field_exact() -> None:
    # a field linear in height is reproduced exactly at the centres by linear interpolation
    faces = stretched_faces(40)
    z = faces[:-1] + 0.3 * np.diff(faces)  # centres deliberately off-midpoint
    wf = (3.0 + 0.002 * faces)[:, None] * np.ones((1, 5))
    wc = destagger_vertical(wf, faces, z, axis=0)
    np.testing.assert_allclose(wc, (3.0 + 0.002 * z)[:, None] * np.ones((1, 5)), rtol=1e-13)


def test_horizontal_spacing_checks() -> None:
    x = (np.arange(10) + 0.5) * 50.0
    assert horizontal_spacing(x, x, case="c") == pytest.approx(50.0)
    with pytest.raises(GridError, match="not uniform"):
        horizontal_spacing(np.r_[x[:5], x[5:] + 3.0], x, case="c")
    with pytest.raises(GridError, match="dx"):
        horizontal_spacing(x, 2 * x, case="c")
