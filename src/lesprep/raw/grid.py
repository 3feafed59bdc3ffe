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

from typing import Literal

import numpy as np
import numpy.typing as npt
from numpy.typing import NDArray

from lesprep._jit import HAVE_NUMBA, Engine, njit, prange, resolve_engine
from lesprep.errors import ConfigError, GridError


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


def _fmt(values: NDArray[np.float64], k: int = 3) -> str:
    shown = ", ".join(f"{v:g}" for v in values[:k])
    return f"[{shown}{', ...' if values.size > k else ''}]"


FaceSide = Literal["low", "high"]
"""Where face i of a staggered horizontal axis lies: ``"low"`` at x_i - dx/2 (the face
between cells i - 1 and i), ``"high"`` at x_i + dx/2 (between cells i and i + 1)."""

FACE_RTOL = 0.01
"""Tolerance on face positions, as a fraction of the grid spacing. The two sides differ by
a whole cell, so 1 % of dx tells them apart with a wide margin while absorbing float32
rounding of coordinates (about 1e-7 of the coordinate value: 0.01 m at 100 km)."""


def face_offset(
    face_coord: npt.ArrayLike,
    centre_coord: npt.ArrayLike,
    *,
    axis_name: str,
    variable: str | None = None,
    file: str | None = None,
    case: str | None = None,
) -> FaceSide:
    """Which side of cell i face i lies on, from the coordinate values.

    Parameters
    ----------
    face_coord
        Positions of the faces (m): n values, or n + 1 with the last one closing the
        periodic domain (``face_n = x_{n-1} + dx/2``, the same face as face 0).
    centre_coord
        Positions of the n cell centres (m), increasing and uniform.
    axis_name
        ``"x"`` or ``"y"``, for messages.
    variable, file, case
        Where the faces come from, for messages.

    Returns
    -------
    {"low", "high"}
        ``"low"`` when ``face_i = x_i - dx/2`` for every i, ``"high"`` when
        ``face_i = x_i + dx/2``; positions must match within :data:`FACE_RTOL` of dx.

    Raises
    ------
    GridError
        Fewer than two centres or non-uniform centres; a face count other than n or n + 1;
        non-uniform or decreasing face spacing; faces not at half-cell offsets from the
        centres; n + 1 faces that do not close the domain on the low side.

    Examples
    --------
    >>> face_offset([0.0, 10.0, 20.0], [5.0, 15.0, 25.0], axis_name="x")
    'low'
    >>> face_offset([10.0, 20.0, 30.0], [5.0, 15.0, 25.0], axis_name="x")
    'high'
    """
    f = np.asarray(face_coord, dtype=np.float64).reshape(-1)
    c = np.asarray(centre_coord, dtype=np.float64).reshape(-1)
    where = {"case": case, "file": file, "variable": variable}
    n, m = c.size, f.size
    if n < 2:
        raise GridError(
            f"axis {axis_name} has {n} cell centre(s); need at least 2 to place its faces",
            **where,
        )
    dc = np.diff(c)
    dx = float(dc.mean())
    tol = FACE_RTOL * abs(dx)
    if dx <= 0 or np.any(np.abs(dc - dx) > tol):
        raise GridError(
            f"the {axis_name} cell centres are not increasing with uniform spacing "
            f"(steps {_fmt(dc)} m); the faces cannot be placed",
            **where,
        )
    if m not in (n, n + 1):
        raise GridError(
            f"the {axis_name} face coordinate has {m} points; expected n = {n} (periodic "
            f"faces) or n + 1 = {n + 1} (with the periodic end face repeated)",
            hint=f"map the {axis_name}_face dimension to the coordinate of this variable's faces",
            **where,
        )
    df = np.diff(f)
    bad = np.nonzero(np.abs(df - dx) > tol)[0]
    if bad.size:
        i = int(bad[0])
        raise GridError(
            f"the {axis_name} faces are not uniformly spaced like the centres: step {i} "
            f"(face {i} at {f[i]:g} m to face {i + 1} at {f[i + 1]:g} m) is {df[i]:g} m; "
            f"expected dx = {dx:g} m within {tol:g} m",
            **where,
        )
    off = f[:n] - c
    for side, half in (("low", -0.5 * dx), ("high", 0.5 * dx)):
        if np.all(np.abs(off - half) <= tol):
            if m == n + 1 and side == "high":
                raise GridError(
                    f"the {axis_name} face coordinate has n + 1 = {m} points with face 0 on "
                    f"the high side (face 0 at {f[0]:g} m, centre 0 at {c[0]:g} m): its last "
                    f"face ({f[-1]:g} m) lies outside the domain "
                    f"[{c[0] - 0.5 * dx:g}, {c[-1] + 0.5 * dx:g}] m",
                    hint="n + 1 faces are read only as x_0 - dx/2 .. x_{n-1} + dx/2",
                    **where,
                )
            return side  # type: ignore[return-value]
    i = int(np.argmax(np.minimum(np.abs(off + 0.5 * dx), np.abs(off - 0.5 * dx))))
    raise GridError(
        f"the {axis_name} faces do not lie half a cell from the centres: face {i} at "
        f"{f[i]:g} m, centre {i} at {c[i]:g} m (offset {off[i]:g} m); expected "
        f"{c[i] - 0.5 * dx:g} m (low side, x_i - dx/2) or {c[i] + 0.5 * dx:g} m (high side, "
        f"x_i + dx/2) within {tol:g} m (dx = {dx:g} m)",
        hint=f"check that the {axis_name}_face coordinate belongs to this variable's faces",
        **where,
    )


def face_side(
    *,
    stated: str | None,
    face_coord: npt.ArrayLike | None,
    centre_coord: npt.ArrayLike,
    axis_name: str,
    variable: str | None = None,
    file: str | None = None,
    case: str | None = None,
) -> FaceSide:
    """The side of a variable's faces on one horizontal axis, stated or read from the grid.

    Parameters
    ----------
    stated
        The variable map's ``faces: {<axis>: low|high}`` entry, or None.
    face_coord
        The face coordinate from the files, or None when there is none.
    centre_coord, axis_name, variable, file, case
        As for :func:`face_offset`.

    Returns
    -------
    {"low", "high"}
        The stated side, checked against the face coordinate when there is one; else
        the side the face coordinate shows.

    Raises
    ------
    GridError
        The statement and the coordinate disagree, neither is available, or the
        coordinate is unusable (:func:`face_offset`).
    ConfigError
        ``stated`` is neither ``"low"`` nor ``"high"``.
    """
    where = {"case": case, "file": file, "variable": variable}
    if stated is not None and stated not in ("low", "high"):
        raise ConfigError(
            f"'faces: {{{axis_name}: {stated}}}' is not a side; expected low or high",
            **where,
        )
    if face_coord is None:
        if stated is None:
            raise GridError(
                f"the field is on {axis_name} faces, but the files have no {axis_name} face "
                "coordinate and the variable map does not say where the faces lie",
                hint=f"add 'faces: {{{axis_name}: low}}' (face i at {axis_name}_i - d/2) or "
                f"'faces: {{{axis_name}: high}}' (at {axis_name}_i + d/2) to the variable, "
                f"or map the face coordinate under 'coords: {axis_name}_face:'",
                **where,
            )
        return stated  # type: ignore[return-value]
    found = face_offset(
        face_coord, centre_coord, axis_name=axis_name, variable=variable, file=file, case=case
    )
    if stated is not None and stated != found:
        f = np.asarray(face_coord, dtype=np.float64).reshape(-1)
        c = np.asarray(centre_coord, dtype=np.float64).reshape(-1)
        raise GridError(
            f"the variable map states its {axis_name} faces lie on the {stated} side, but the "
            f"face coordinate puts them on the {found} side (face 0 at {f[0]:g} m, centre 0 "
            f"at {c[0]:g} m)",
            hint=f"fix 'faces: {{{axis_name}: ...}}' in the variable map, or drop it to use "
            "the coordinate",
            **where,
        )
    return found


def destagger_horizontal(
    values: npt.ArrayLike,
    *,
    axis: int,
    faces: FaceSide,
    n_centres: int,
    periodic: bool = True,
    axis_name: str | None = None,
    variable: str | None = None,
    file: str | None = None,
    case: str | None = None,
) -> NDArray[np.float64]:
    """Average a field on the faces of a horizontal axis to the cell centres (float64).

    Parameters
    ----------
    values
        The field, with its face dimension at ``axis``.
    axis
        Position of the face dimension in ``values``.
    faces
        Side of face i relative to centre i (:func:`face_side`).
    n_centres
        Number of cell centres n on this axis.
    periodic
        Whether the axis is periodic (the face beyond the last cell is face 0).
    axis_name
        ``"x"`` or ``"y"``, for messages.
    variable, file, case
        Where the field comes from, for messages.

    Returns
    -------
    numpy.ndarray
        ``0.5 * (a[i] + a[i + 1])`` for ``"low"`` faces, ``0.5 * (a[i - 1] + a[i])`` for
        ``"high"`` faces, indices taken modulo n on a periodic axis; n points on ``axis``.

    Raises
    ------
    GridError
        A face count other than n or n + 1; n + 1 faces on the high side; n + 1 periodic
        faces whose last face differs from the first; n faces on a non-periodic axis (one
        end cell lacks a face).
    """
    a = np.moveaxis(np.asarray(values, dtype=np.float64), axis, 0)
    n, m = int(n_centres), a.shape[0]
    where = {"case": case, "file": file, "variable": variable}
    name = f"its {axis_name} face dimension" if axis_name else f"array axis {axis}"
    if faces not in ("low", "high"):
        raise ConfigError(f"faces must be 'low' or 'high'; got {faces!r}", **where)
    if m not in (n, n + 1):
        raise GridError(
            f"the field has {m} points along {name}; expected n = {n} "
            f"faces (periodic) or n + 1 = {n + 1} (the end face repeated) for {n} cells",
            hint="check which dimension the variable map maps to the face axis",
            **where,
        )
    if m == n + 1 and faces == "high":
        raise GridError(
            f"the field has n + 1 = {m} faces along {name} with face 0 on the high side; "
            "n + 1 faces are read only with face 0 on the low side (x_0 - dx/2)",
            **where,
        )
    if m == n and not periodic:
        raise GridError(
            f"the field has n = {n} faces along {name} of a non-periodic axis: the "
            f"{'last' if faces == 'low' else 'first'} cell lacks its "
            f"{'high' if faces == 'low' else 'low'} face",
            **where,
        )
    if m == n + 1 and periodic:
        first, last = a[0], a[n]
        scale = float(np.max(np.abs(a))) if a.size else 0.0
        diff = np.abs(first - last)
        if not np.all(diff <= 1e-5 * scale):
            k = np.unravel_index(int(np.argmax(diff)), diff.shape) if diff.ndim else ()
            raise GridError(
                f"the field has n + 1 = {m} faces along {name} of a periodic axis, but the "
                f"last face does not repeat the first (largest difference {float(diff[k]):g} "
                f"at index {tuple(int(j) for j in k)} of the other dims, against values up "
                f"to {scale:g}); expected face n = face 0",
                hint="the face dimension may belong to another grid, or the domain may not be "
                "periodic",
                **where,
            )
    out = np.empty((n, *a.shape[1:]), dtype=np.float64)
    if faces == "low":
        np.add(a[: n - 1], a[1:n], out=out[: n - 1])
        np.add(a[n - 1 : n], a[n : n + 1] if m == n + 1 else a[:1], out=out[n - 1 :])
    else:
        np.add(a[: n - 1], a[1:n], out=out[1:])
        np.add(a[n - 1 : n], a[:1], out=out[:1])
    out *= 0.5
    return np.moveaxis(out, 0, axis)


def layer_thickness(z_faces: NDArray[np.float64]) -> NDArray[np.float64]:
    """Thickness of each cell (m) from its faces."""
    return np.diff(np.asarray(z_faces, dtype=np.float64))


def horizontal_attrs(axis: str, long_name: str) -> dict[str, str]:
    """CF attributes of the ``x`` or ``y`` coordinate of an LES grid (metres).

    The domain is a Cartesian plane (doubly periodic, idealized): ``projection_x_coordinate``
    / ``projection_y_coordinate`` say so (without a standard name, CF checkers take an
    ``X``/``Y`` axis for longitude/latitude). CF would describe the projection with a
    ``grid_mapping`` variable, but such a domain is no projection of the Earth's surface:
    there is no grid mapping and no latitude or longitude to give, and the ``comment`` says so.
    """
    return {
        "standard_name": f"projection_{axis}_coordinate",
        "long_name": long_name,
        "units": "m",
        "axis": axis.upper(),
        "comment": "Cartesian coordinate of the LES domain (doubly periodic); the domain is "
        "not placed on the Earth, so there is no grid_mapping, latitude or longitude",
    }
