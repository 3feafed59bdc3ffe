"""Horizontal destaggering against independent numpy averages and hand-worked values.

Each check value is computed in the test itself, from the face positions and values the
test constructs (plain numpy indexing written independently of lesprep), or worked out
by hand in the comment beside it.
"""

from __future__ import annotations

import numpy as np
import pytest

from lesprep.errors import ConfigError, GridError
from lesprep.raw.grid import destagger_horizontal, face_offset, face_side

L = 1000.0  # domain length (m)
N = 8
DX = L / N  # 125 m
XC = (np.arange(N) + 0.5) * DX  # centres 62.5, 187.5, ..., 937.5
XF_LOW = np.arange(N) * DX  # face i at x_i - dx/2: 0, 125, ..., 875
XF_HIGH = (np.arange(N) + 1) * DX  # face i at x_i + dx/2: 125, ..., 1000
XF_LOW_CLOSED = np.arange(N + 1) * DX  # 0 .. 1000: the periodic end face repeated


def sine(x: np.ndarray) -> np.ndarray:
    return np.sin(2.0 * np.pi * x / L)


# --------------------------------------------------------------------------- face_offset


def test_face_offset_low_high_and_closed():
    assert face_offset(XF_LOW, XC, axis_name="x") == "low"
    assert face_offset(XF_HIGH, XC, axis_name="x") == "high"
    assert face_offset(XF_LOW_CLOSED, XC, axis_name="x") == "low"
    # float32 coordinates, offset by a domain origin, still read correctly
    x0 = 52_000.0
    assert face_offset((XF_HIGH + x0).astype(np.float32), XC + x0, axis_name="y") == "high"


def test_face_offset_refuses_faces_not_at_half_cells():
    # faces at the centres (offset 0) and a quarter cell off: neither side
    for faces, offset in ((XC, 0.0), (XF_LOW + 0.25 * DX, -0.25 * DX)):
        with pytest.raises(GridError) as err:
            face_offset(faces, XC, axis_name="x", variable="uf", file="run.nc")
        text = str(err.value)
        assert "file run.nc" in text and "'uf'" in text and "half a cell" in text
        # found vs expected: face 0 at its position, expected x_0 -/+ dx/2 = 0 m or 125 m
        assert f"face 0 at {faces[0]:g} m" in text and f"offset {offset:g} m" in text
        assert "expected 0 m (low side" in text and "125 m (high side" in text


def test_face_offset_refuses_wrong_count_and_uneven_spacing():
    with pytest.raises(GridError, match=r"has 10 points; expected n = 8 .* n \+ 1 = 9"):
        face_offset(np.arange(10) * DX, XC, axis_name="x", variable="uf")
    uneven = XF_LOW.copy()
    uneven[5] += 10.0  # step 4 becomes 135 m, step 5 115 m
    with pytest.raises(GridError, match=r"step 4 .* is 135 m; expected dx = 125 m"):
        face_offset(uneven, XC, axis_name="x")
    # n + 1 faces starting on the high side run past the domain end (1000 m)
    with pytest.raises(GridError, match="outside the domain"):
        face_offset((np.arange(N + 1) + 1) * DX, XC, axis_name="x")


def test_face_side_explicit_statement():
    # stated and no coordinate: taken as stated
    assert face_side(stated="high", face_coord=None, centre_coord=XC, axis_name="x") == "high"
    # stated and a coordinate that agrees
    assert face_side(stated="low", face_coord=XF_LOW, centre_coord=XC, axis_name="x") == "low"
    # a coordinate alone
    assert face_side(stated=None, face_coord=XF_HIGH, centre_coord=XC, axis_name="y") == "high"
    with pytest.raises(GridError, match="states its x faces lie on the low side") as err:
        face_side(stated="low", face_coord=XF_HIGH, centre_coord=XC, axis_name="x", variable="uf")
    assert "face 0 at 125 m, centre 0 at 62.5 m" in str(err.value)
    with pytest.raises(GridError, match="does not say where the faces lie"):
        face_side(stated=None, face_coord=None, centre_coord=XC, axis_name="y", file="a.nc")
    with pytest.raises(ConfigError, match="expected low or high"):
        face_side(stated="left", face_coord=None, centre_coord=XC, axis_name="x")


# --------------------------------------------------------------------------- destagger


ROWS = np.array([1.0, -2.0, 0.5])[:, None] * np.array([1.0, 3.0])[None, :]  # (z, y)


def _field(x_faces: np.ndarray) -> np.ndarray:
    """A (z, y, x) field on x faces: sin(2 pi x / L) times a distinct factor per row."""
    return ROWS[:, :, None] * sine(x_faces)[None, None, :]


def test_low_faces_n_and_n_plus_one():
    for xf in (XF_LOW, XF_LOW_CLOSED):
        a = _field(xf)
        got = destagger_horizontal(a, axis=2, faces="low", n_centres=N)
        # independent: centre i averages the faces at x_i - dx/2 and x_i + dx/2, both
        # evaluated from the analytic sine (face n is face 0 shifted by L)
        want = ROWS[..., None] * 0.5 * (sine(XC - DX / 2) + sine(XC + DX / 2))[None, None, :]
        np.testing.assert_allclose(got, want, rtol=0, atol=1e-14)
        # closed form: the face average of a sine is cos(pi dx / L) sin(2 pi x_i / L)
        np.testing.assert_allclose(got[0, 0], np.cos(np.pi * DX / L) * sine(XC), rtol=0, atol=1e-14)


def test_high_faces_n():
    a = _field(XF_HIGH)
    got = destagger_horizontal(a, axis=2, faces="high", n_centres=N)
    want = np.empty_like(got)
    for i in range(N):  # face i-1 and face i, face -1 being face n-1 (periodic)
        want[..., i] = 0.5 * (a[..., (i - 1) % N] + a[..., i])
    np.testing.assert_array_equal(got, want)
    np.testing.assert_allclose(got[0, 0], np.cos(np.pi * DX / L) * sine(XC), atol=1e-14)


def test_y_axis_and_other_positions():
    # faces on axis 1 (y) of a (z, y, x) array, and axis 0 of a 1-D array
    a = np.arange(2 * N * 3, dtype=np.float64).reshape(2, N, 3) ** 2
    got = destagger_horizontal(a, axis=1, faces="low", n_centres=N)
    want = 0.5 * (a + a[:, np.r_[1:N, 0], :])
    np.testing.assert_array_equal(got, want)
    assert destagger_horizontal(np.array([1.0, 3.0]), axis=0, faces="high", n_centres=2)[
        0
    ] == pytest.approx(2.0)  # by hand: (3 + 1) / 2


def test_distinct_last_column_hand_values():
    # A row whose last face column is distinct, as in a field whose last cell matters
    # (e.g. the last liquid water path column). Values by hand:
    a = np.array([[1.0, 2.0, 4.0, 8.0]])
    # high faces: centre 3 = (face 2 + face 3) / 2 = (4 + 8) / 2 = 6;
    #             centre 0 = (face 3 + face 0) / 2 = (8 + 1) / 2 = 4.5
    high = destagger_horizontal(a, axis=1, faces="high", n_centres=4)
    np.testing.assert_array_equal(high, [[4.5, 1.5, 3.0, 6.0]])
    # low faces:  centre 3 = (face 3 + face 0) / 2 = (8 + 1) / 2 = 4.5
    low = destagger_horizontal(a, axis=1, faces="low", n_centres=4)
    np.testing.assert_array_equal(low, [[1.5, 3.0, 6.0, 4.5]])
    # n faces whose first and last values happen to be equal are still n faces (no face
    # is dropped): by hand, high faces [1, 5, 7, 1] give centres [1, 3, 6, 4]
    same_ends = np.array([1.0, 5.0, 7.0, 1.0])
    np.testing.assert_array_equal(
        destagger_horizontal(same_ends, axis=0, faces="high", n_centres=4), [1.0, 3.0, 6.0, 4.0]
    )


def test_non_periodic_n_plus_one():
    a = np.array([1.0, 2.0, 4.0, 8.0, 16.0])  # by hand: pairwise means 1.5, 3, 6, 12
    got = destagger_horizontal(a, axis=0, faces="low", n_centres=4, periodic=False)
    np.testing.assert_array_equal(got, [1.5, 3.0, 6.0, 12.0])
    with pytest.raises(GridError, match="non-periodic axis: the last cell lacks its high face"):
        destagger_horizontal(a[:4], axis=0, faces="low", n_centres=4, periodic=False)


def test_refusals():
    a = _field(XF_LOW)
    with pytest.raises(GridError) as err:
        destagger_horizontal(
            a[..., :6], axis=2, faces="low", n_centres=N, axis_name="x", variable="uf", file="f.nc"
        )
    text = str(err.value)
    assert "file f.nc" in text and "'uf'" in text
    assert "6 points along its x face dimension; expected n = 8" in text
    with pytest.raises(GridError, match=r"n \+ 1 = 9 faces .* high side"):
        destagger_horizontal(_field(XF_LOW_CLOSED), axis=2, faces="high", n_centres=N)
    # n + 1 faces whose last column is not a copy of the first (the distinct last column)
    b = _field(XF_LOW_CLOSED)
    b[1, 0, N] += 0.25
    with pytest.raises(
        GridError, match=r"last face does not repeat the first .* 0\.25 at index \(1, 0\)"
    ):
        destagger_horizontal(b, axis=2, faces="low", n_centres=N)
    with pytest.raises(ConfigError, match="'low' or 'high'"):
        destagger_horizontal(a, axis=2, faces="west", n_centres=N)  # type: ignore[arg-type]
