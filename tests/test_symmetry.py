"""Symmetries of the square on patches: numpy's rot90/flip, and vector fields whose
transformed form is known (the gradient of a moved potential; solid-body rotation)."""

from __future__ import annotations

import numpy as np
import pytest

from lesprep.sets import symmetry


@pytest.mark.parametrize("code", symmetry.CODES)
def test_move_is_numpy_rot90_after_flip(code):
    a = np.random.default_rng(code).random((3, 5, 5))
    b = np.flip(a, axis=2) if code >= 4 else a
    np.testing.assert_array_equal(symmetry.move(a, code), np.rot90(b, code % 4, axes=(1, 2)))
    np.testing.assert_array_equal(symmetry.move(symmetry.move(a, code), symmetry.inverse(code)), a)


def test_the_eight_elements_form_d4():
    mats = {c: symmetry.matrix(c) for c in symmetry.CODES}
    assert len({m.tobytes() for m in mats.values()}) == 8
    for c, m in mats.items():
        np.testing.assert_array_equal(m @ m.T, np.eye(2))  # orthogonal
        assert round(np.linalg.det(m)) == (-1 if c >= 4 else 1)
        np.testing.assert_array_equal(m @ mats[symmetry.inverse(c)], np.eye(2))


@pytest.mark.parametrize("code", symmetry.CODES)
def test_gradient_of_a_moved_potential_is_the_transformed_gradient(code):
    """grad(phi o M^-1) = M grad(phi) o M^-1, with numpy.gradient on the grid."""
    n = 9
    y, x = np.meshgrid(np.arange(n, dtype=float), np.arange(n, dtype=float), indexing="ij")
    phi = np.sin(0.7 * x) * np.exp(0.2 * y) + 0.3 * x * y**2
    dphi_dy, dphi_dx = np.gradient(phi)  # axes (py, px) = (y, x)
    moved = symmetry.move(phi, code)
    want_v, want_u = np.gradient(moved)
    u, v = symmetry.transform_vector(dphi_dx, dphi_dy, code)
    np.testing.assert_allclose(u, want_u, atol=1e-12)
    np.testing.assert_allclose(v, want_v, atol=1e-12)


@pytest.mark.parametrize("code", symmetry.CODES)
def test_solid_body_rotation(code):
    """u = -y, v = x is unchanged by rotations and reversed by reflections."""
    c = np.arange(7, dtype=float) - 3.0
    y, x = np.meshgrid(c, c, indexing="ij")
    u, v = symmetry.transform_vector(-y, x, code)
    sign = -1.0 if code >= 4 else 1.0
    np.testing.assert_array_equal(u, sign * -y)
    np.testing.assert_array_equal(v, sign * x)


def test_apply_uses_one_element_per_sample_for_every_variable():
    rng = np.random.default_rng(1)
    batch = {
        "qc_patch": rng.random((8, 4, 4)),
        "w_patch": rng.random((8, 4, 4)),
        "u_patch": rng.random((8, 4, 4)),
        "v_patch": rng.random((8, 4, 4)),
        "u_mean": rng.random(8),
        "v_mean": rng.random(8),
        "qt_mean": rng.random(8),
    }
    codes = np.arange(8)
    out = symmetry.apply(batch, codes, vectors=[("u_patch", "v_patch"), ("u_mean", "v_mean")])
    for i, c in enumerate(codes):
        for name in ("qc_patch", "w_patch"):
            np.testing.assert_array_equal(out[name][i], symmetry.move(batch[name][i], c))
        u, v = symmetry.transform_vector(batch["u_patch"][i], batch["v_patch"][i], c)
        np.testing.assert_array_equal(out["u_patch"][i], u)
        np.testing.assert_array_equal(out["v_patch"][i], v)
        m = symmetry.matrix(c)
        np.testing.assert_allclose(
            [out["u_mean"][i], out["v_mean"][i]], m @ [batch["u_mean"][i], batch["v_mean"][i]]
        )
    np.testing.assert_array_equal(out["qt_mean"], batch["qt_mean"])


def test_quarter_turn_needs_square_patches():
    with pytest.raises(ValueError, match="not square"):
        symmetry.move(np.zeros((2, 3, 4)), 1)
    assert symmetry.move(np.zeros((2, 3, 4)), 2).shape == (2, 3, 4)
