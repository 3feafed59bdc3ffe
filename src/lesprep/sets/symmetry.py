"""Symmetries of the square (the dihedral group D4) applied to patches and wind vectors.

A patch is an array ``(..., py, px)``: the last axis runs along ``x`` and the one before
along ``y``, both with increasing coordinate (the layout of
:mod:`lesprep.scales.patches`). Element ``code`` (0 to 7) of D4 is ``code % 4`` quarter
turns as ``numpy.rot90(a, k, axes=(-2, -1))`` after, when ``code >= 4``, a reflection
``numpy.flip(a, axis=-1)`` (``x -> -x``). Code 0 is the identity.

A scalar field is moved: ``b(r) = a(M^-1 r)``. A horizontal vector field (the wind
components ``u`` along ``x`` and ``v`` along ``y``) is moved and turned:
``(u', v')(r) = M (u, v)(M^-1 r)``, with ``M`` the element's 2 x 2 matrix on ``(x, y)``
(:func:`matrix`; ``numpy.rot90`` over ``(y, x)`` turns ``x`` towards ``-y``, so one of its
quarter turns has ``M = [[0, 1], [-1, 0]]``). A per-sample vector without position (the
block means ``u_mean``, ``v_mean``) is only turned. Entries of ``M`` are 0 and +-1, so
every transform is exact in any dtype.

The flow is symmetric under D4 only where nothing sets a horizontal direction: a mean
wind or mean shear, Coriolis turning of the wind with height, sloping terrain or a
coastline, and anisotropic grids (``dx != dy``, or patches that are not square) all
break it (``docs/reader.md``).
"""

from __future__ import annotations

from collections.abc import Mapping, Sequence

import numpy as np
from numpy.typing import NDArray

CODES = tuple(range(8))
"""The eight elements of D4: quarter turns ``code % 4``, reflection when ``code >= 4``."""

_TURN = np.array([[0, 1], [-1, 0]], dtype=np.int64)
_FLIP = np.array([[-1, 0], [0, 1]], dtype=np.int64)


def _check(code: int) -> tuple[int, bool]:
    if int(code) not in CODES:
        raise ValueError(f"symmetry code {code}: expected an integer 0 to 7")
    return int(code) % 4, int(code) >= 4


def matrix(code: int) -> NDArray[np.int64]:
    """2 x 2 matrix of element ``code`` acting on ``(x, y)`` vectors.

    Examples
    --------
    >>> matrix(1).tolist(), matrix(4).tolist()
    ([[0, 1], [-1, 0]], [[-1, 0], [0, 1]])
    """
    k, flip = _check(code)
    m = np.linalg.matrix_power(_TURN, k)
    return m @ _FLIP if flip else m


def inverse(code: int) -> int:
    """Code of the inverse element (reflections are their own inverse).

    Examples
    --------
    >>> [inverse(c) for c in CODES]
    [0, 3, 2, 1, 4, 5, 6, 7]
    """
    k, flip = _check(code)
    return int(code) if flip else (4 - k) % 4


def move(a: NDArray, code: int) -> NDArray:
    """Scalar patches ``(..., py, px)`` moved by element ``code`` (a view where possible).

    Examples
    --------
    >>> move(np.array([[1, 2], [3, 4]]), 1).tolist()
    [[2, 4], [1, 3]]
    """
    k, flip = _check(code)
    a = np.asarray(a)
    if k % 2 and a.shape[-1] != a.shape[-2]:
        raise ValueError(
            f"patches of shape {a.shape[-2:]} (py, px) are not square: a quarter turn needs "
            "py == px"
        )
    if flip:
        a = np.flip(a, axis=-1)
    return np.rot90(a, k, axes=(-2, -1))


def turn(u: NDArray, v: NDArray, code: int) -> tuple[NDArray, NDArray]:
    """Components ``(u, v)`` turned by element ``code`` (no move).

    Examples
    --------
    >>> [float(c) for c in turn(np.array(1.0), np.array(0.0), 1)]
    [0.0, -1.0]
    """
    m = matrix(code)
    u, v = np.asarray(u), np.asarray(v)
    return m[0, 0] * u + m[0, 1] * v, m[1, 0] * u + m[1, 1] * v


def transform_vector(u: NDArray, v: NDArray, code: int) -> tuple[NDArray, NDArray]:
    """Vector patches ``(u, v)`` moved and turned by element ``code``."""
    return turn(move(u, code), move(v, code), code)


def apply(
    batch: Mapping[str, NDArray],
    codes: NDArray[np.integer],
    *,
    vectors: Sequence[tuple[str, str]] = (),
) -> dict[str, NDArray]:
    """One element of D4 per sample, the same for every patch variable of the sample.

    Parameters
    ----------
    batch
        Name -> array with the sample first; arrays of three or more dimensions are
        patches (moved), the others are left alone unless named in ``vectors``.
    codes
        Element of each sample (0 to 7).
    vectors
        ``(x component, y component)`` pairs of the batch: patches moved and turned,
        per-sample values turned.

    Returns
    -------
    dict
        New arrays for the patches and vectors; the other entries as they were.
    """
    codes = np.asarray(codes)
    out = dict(batch)
    paired = {name for pair in vectors for name in pair}
    for name, a in batch.items():
        if name in paired or np.ndim(a) < 3:
            continue
        out[name] = _moved(np.asarray(a), codes)
    for xname, yname in vectors:
        u, v = np.asarray(batch[xname]), np.asarray(batch[yname])
        newu, newv = np.empty_like(u), np.empty_like(v)
        for c in np.unique(codes):
            sel = codes == c
            a, b = (
                transform_vector(u[sel], v[sel], int(c))
                if u.ndim >= 3
                else turn(u[sel], v[sel], int(c))
            )
            newu[sel], newv[sel] = a, b
        out[xname], out[yname] = newu, newv
    return out


def _moved(a: NDArray, codes: NDArray) -> NDArray:
    out = np.empty_like(a)
    for c in np.unique(codes):
        sel = codes == c
        out[sel] = move(a[sel], int(c))
    return out
