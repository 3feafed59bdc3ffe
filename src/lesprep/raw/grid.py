"""Grid checks and staggering.

Conventions
-----------
* Horizontal: cell-centre coordinates, uniform spacing, ``dx == dy`` (relative
  tolerance 1e-6), doubly periodic domain.
* Vertical: cell centres ``z`` (strictly increasing, possibly stretched) and faces
  ``z_faces`` (nz + 1). Faces come from the archive (a face coordinate or CF bounds) when
  it has them; otherwise interior faces are the midpoints between centres and the end
  faces mirror the nearest interior face about the end centre.
* A face-staggered field (nz + 1 levels) is interpolated linearly in height to the
  centres: ``a_c[k] = a_f[k] + (a_f[k+1] - a_f[k]) * (z[k] - zf[k]) / (zf[k+1] - zf[k])``,
  which is the plain face average when the centre is midway between its faces.
"""

from __future__ import annotations

import numpy as np
import numpy.typing as npt
from numpy.typing import NDArray

from lesprep._jit import HAVE_NUMBA, Engine, njit, prange, resolve_engine
from lesprep.errors import GridError


def horizontal_spacing(
    x: NDArray[np.float64], y: NDArray[np.float64], *, case: str, file: str | None = None
) -> float:
    """Check the horizontal grid is uniform with dx == dy and return the spacing (m).

    Raises
    ------
    GridError
        Non-uniform spacing, or dx != dy.
    """
    out = []
    for name, c in (("x", x), ("y", y)):
        if c.size < 2:
            raise GridError(
                f"axis {name} has {c.size} point(s); need at least 2",
                case=case,
                file=file,
                variable=name,
            )
        d = np.diff(c)
        if np.any(d <= 0) or not np.allclose(d, d[0], rtol=1e-6, atol=0):
            i = int(np.argmax(np.abs(d - d[0])))
            raise GridError(
                f"axis {name} spacing is not uniform (first step {d[0]:g} m, step {i} is "
                f"{d[i]:g} m); lesprep needs a uniform, doubly periodic horizontal grid",
                case=case,
                file=file,
                variable=name,
            )
        out.append(float(d.mean()))
    dx, dy = out
    if not np.isclose(dx, dy, rtol=1e-6):
        raise GridError(
            f"dx = {dx:g} m but dy = {dy:g} m; lesprep needs square cells (dx == dy)",
            case=case,
            file=file,
        )
    return dx


def vertical_faces(
    z: NDArray[np.float64],
    *,
    z_face: NDArray[np.float64] | None = None,
    z_bounds: NDArray[np.float64] | None = None,
    case: str = "",
) -> NDArray[np.float64]:
    """Cell faces (nz + 1) of the vertical grid.

    Parameters
    ----------
    z
        Cell-centre heights (m), strictly increasing.
    z_face
        Face heights from the archive, if any.
    z_bounds
        CF bounds ``(nz, 2)`` from the archive, if any.
    """
    z = np.asarray(z, dtype=np.float64)
    if z.ndim != 1 or z.size < 2 or np.any(np.diff(z) <= 0):
        raise GridError(
            "z (cell centres) must be 1-D and strictly increasing", case=case, variable="z"
        )
    if z_face is not None:
        faces = np.asarray(z_face, dtype=np.float64)
        if faces.shape != (z.size + 1,):
            raise GridError(
                f"z faces have {faces.size} levels; expected nz + 1 = {z.size + 1}",
                case=case,
                variable="z_face",
            )
    elif z_bounds is not None:
        b = np.asarray(z_bounds, dtype=np.float64)
        if b.shape != (z.size, 2) or not np.allclose(b[1:, 0], b[:-1, 1]):
            raise GridError(
                f"z bounds must be (nz, 2) = ({z.size}, 2) and contiguous; got {b.shape}",
                case=case,
                variable="z_bounds",
            )
        faces = np.concatenate([b[:, 0], b[-1:, 1]])
    else:
        mid = 0.5 * (z[1:] + z[:-1])
        faces = np.concatenate([[2 * z[0] - mid[0]], mid, [2 * z[-1] - mid[-1]]])
    if np.any(np.diff(faces) <= 0) or np.any(z <= faces[:-1]) or np.any(z >= faces[1:]):
        raise GridError(
            "cell centres do not lie strictly between their faces", case=case, variable="z"
        )
    return faces


def destagger_vertical(
    values_on_faces: NDArray[np.float64],
    z_faces: NDArray[np.float64],
    z: NDArray[np.float64],
    *,
    axis: int = 0,
    dtype: npt.DTypeLike = np.float64,
    engine: Engine = "auto",
) -> NDArray[np.floating]:
    """Interpolate a face-staggered field linearly in height to the cell centres.

    ``out = a[k] + (a[k+1] - a[k]) * w_k`` with ``w_k = (z_k - zf_k) / (zf_{k+1} - zf_k)``,
    computed in float64 and stored as ``dtype``. The numba engine handles a C-ordered
    3-D field with height first in one pass; everything else takes the numpy reference.
    """
    w = (np.asarray(z, dtype=np.float64) - z_faces[:-1]) / (z_faces[1:] - z_faces[:-1])
    src = np.asarray(values_on_faces)
    dt = np.dtype(dtype)
    fast = (
        resolve_engine(engine) == "numba"
        and axis == 0
        and src.ndim == 3
        and src.flags.c_contiguous
        and src.dtype.char in "fd"
        and dt.char in "fd"
    )
    if fast:
        out = np.empty((src.shape[0] - 1, *src.shape[1:]), dtype=dt)
        _nb_destagger(src, w, out)
        return out
    a = np.moveaxis(src.astype(np.float64, copy=False), axis, 0)
    shape = (-1,) + (1,) * (a.ndim - 1)
    res = a[:-1] + (a[1:] - a[:-1]) * w.reshape(shape)
    return np.moveaxis(res, 0, axis).astype(dt, copy=False)


if HAVE_NUMBA:

    @njit(parallel=True, cache=True, fastmath=False)
    def _nb_destagger(a, w, out):  # pragma: no cover - compiled
        nz, ny, nx = out.shape
        for kj in prange(nz * ny):
            k = kj // ny
            j = kj - k * ny
            wk = w[k]
            for i in range(nx):
                lo = np.float64(a[k, j, i])
                out[k, j, i] = lo + (np.float64(a[k + 1, j, i]) - lo) * wk


def destagger_periodic(values_on_faces: NDArray[np.float64], *, axis: int) -> NDArray[np.float64]:
    """Average a field on the faces of a periodic axis to the centres.

    Accepts n faces (periodic, the last face wraps to the first) or n + 1 faces (the
    last repeats the first).
    """
    a = np.asarray(values_on_faces, dtype=np.float64)
    lo = np.take(a, np.arange(a.shape[axis] - 1), axis=axis)
    if np.allclose(np.take(a, [0], axis=axis), np.take(a, [-1], axis=axis)):
        a = lo if a.shape[axis] > 1 else a
    return 0.5 * (a + np.roll(a, -1, axis=axis))


def layer_thickness(z_faces: NDArray[np.float64]) -> NDArray[np.float64]:
    """Thickness of each cell (m) from its faces."""
    return np.diff(np.asarray(z_faces, dtype=np.float64))
