"""Paired fine patches: the fine field under every coarse cell.

For a block factor ``f`` and patch size ``P``, the patch of coarse cell ``(j, i)`` holds
the fine cells ``[j*f - h, (j+1)*f + h) x [i*f - h, (i+1)*f + h)`` (``h`` the halo,
wrapped periodically), block-mean downsampled by ``d = f / P`` when ``f > P`` (``P``
must then divide ``f``, and ``d`` must divide ``h``), or native (``d = 1``) when
``f <= P``. The stored patch has ``(f + 2h) / d`` points a side. Patches are
index-aligned with the coarse cells: ``patch[..., j, i, :, :]`` lies under coarse cell
``(j, i)``, so a training sample pairs inputs and patch by position.
"""

from __future__ import annotations

import numpy as np
import numpy.typing as npt
from numpy.typing import NDArray

from lesprep.errors import ScaleError
from lesprep.scales.moments import block_mean, divisors


def patch_geometry(factor: int, size: int, halo: int, *, scale: str = "") -> tuple[int, int]:
    """(downsampling d, stored patch edge) for a factor, patch size and halo.

    Raises
    ------
    ScaleError
        If ``size`` does not divide ``factor`` (when ``factor > size``) or ``d`` does not
        divide ``halo``.
    """
    if factor <= size:
        return 1, factor + 2 * halo
    if factor % size:
        valid = [p for p in divisors(factor) if p < factor]
        raise ScaleError(
            f"patch size {size} does not divide the block factor {factor} of scale "
            f"{scale!r}; patch sizes that divide it: {valid} (or any size >= {factor} for "
            "native patches)",
            hint="set coarsen.patches.size to one of the listed sizes",
        )
    d = factor // size
    if halo % d:
        raise ScaleError(
            f"patch halo {halo} is not a multiple of the downsampling {d} of scale {scale!r}",
            hint=f"use a halo that is a multiple of {d}",
        )
    return d, (factor + 2 * halo) // d


def extract_patches(
    field: NDArray[np.floating],
    factor: int,
    size: int,
    halo: int = 0,
    *,
    dtype: npt.DTypeLike = np.float64,
    means: NDArray[np.floating] | None = None,
    out: NDArray[np.floating] | None = None,
) -> NDArray[np.floating]:
    """Patches of a ``(..., ny, nx)`` field: ``(..., ny/f, nx/f, p, p)`` of ``dtype``.

    Native patches copy the fine values (exact in any dtype that holds them); downsampled
    patches are float64 block means rounded to ``dtype``.

    Parameters
    ----------
    field
        The fine field, horizontal dimensions last.
    factor, size, halo
        Block factor, patch size and halo in fine cells (:func:`patch_geometry`).
    dtype
        dtype of the result (ignored when ``out`` is given).
    means
        For downsampled patches, the block means of ``field`` for the downsampling
        factor ``d`` if already computed (``block_mean(field, d)``: the same numbers);
        then ``field`` itself is not read.
    out
        An array of the result's shape to write into (its dtype wins).

    Returns
    -------
    numpy.ndarray
        ``out`` if given, else a new array.
    """
    dt = np.dtype(dtype) if out is None else out.dtype
    d, _ = patch_geometry(factor, size, halo)
    if d > 1 and means is not None:
        a = np.asarray(means)
    else:
        a = np.asarray(field)
        if a.dtype.kind != "f":
            a = a.astype(np.float64)
        if d > 1:
            a = block_mean(a, d)
    # d divides the halo, so wrapping the block means by halo / d gives the means of the
    # wrapped fine field's blocks
    f, h = factor // d, halo // d
    ny, nx = (n * d for n in a.shape[-2:])
    if h:
        a = np.pad(a, [(0, 0)] * (a.ndim - 2) + [(h, h), (h, h)], mode="wrap")
    cy, cx = ny // factor, nx // factor
    lead = a.shape[:-2]
    if h == 0:
        view = np.moveaxis(a.reshape(*lead, cy, f, cx, f), -3, -2)
    else:
        win = 2 * h + f
        windows = np.lib.stride_tricks.sliding_window_view(a, (win, win), axis=(-2, -1))
        view = windows[..., ::f, ::f, :, :][..., :cy, :cx, :, :]
    if out is None:
        out = np.empty(view.shape, dtype=dt)
    elif out.shape != view.shape:
        raise ScaleError(f"out has shape {out.shape}; the patches have shape {view.shape}")
    out[...] = view
    return out


def reassemble(patches: NDArray[np.floating], halo: int = 0) -> NDArray[np.float64]:
    """Inverse of native :func:`extract_patches`: tile the patch interiors back together."""
    p = np.asarray(patches)
    if halo:
        p = p[..., halo:-halo, halo:-halo]
    *lead, cy, cx, f, _ = p.shape
    return np.moveaxis(p, -2, -3).reshape(*lead, cy * f, cx * f)
