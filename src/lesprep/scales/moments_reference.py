"""The numpy engine of the block moments: the reference the compiled engine is tested
against (same sums in the same order where the compiled kernels promise bit-identity).
"""

from __future__ import annotations

import numpy as np

_SLICE_MAX = 8
"""numpy engine: factors up to this add ``f*f`` strided slices, larger ones reduce a
reshaped view (many tiny slices cost per-call overhead, a tiny reduced axis costs more)."""


# --------------------------------------------------------------------------------------
# numpy engine (reference)
# --------------------------------------------------------------------------------------


def np_finish(m0, s1, s2, s3, n):
    """Shift correction of the corrected two-pass algorithm (see module docstring)."""
    delta = s1 / n
    mean = m0 + delta
    m2 = s2 - s1 * delta
    np.maximum(m2, 0.0, out=m2)
    m3 = s3 - 3.0 * delta * s2 + 2.0 * n * delta * delta * delta
    return mean, m2, m3


def np_block_sum(x: np.ndarray, f: int) -> np.ndarray:
    """Sum of each ``f x f`` block of ``x`` (G, ny, nx), float64."""
    if f <= _SLICE_MAX:
        s = np.array(x[:, 0::f, 0::f], dtype=np.float64)
        for i in range(f):
            for j in range(f):
                if i or j:
                    s += x[:, i::f, j::f]
        return s
    g, ny, nx = x.shape
    return x.reshape(g, ny // f, f, nx // f, f).sum(axis=(2, 4), dtype=np.float64)


def np_moments(x: np.ndarray, f: int):
    """Block mean, M2, M3 of float64 planes ``x`` (G, ny, nx)."""
    n = f * f
    m0 = np_block_sum(x, f)
    m0 /= n
    if f <= _SLICE_MAX:
        s1 = np.zeros_like(m0)
        s2 = np.zeros_like(m0)
        s3 = np.zeros_like(m0)
        for i in range(f):
            for j in range(f):
                d = x[:, i::f, j::f] - m0
                s1 += d
                d2 = d * d
                s2 += d2
                d2 *= d
                s3 += d2
    else:
        g, ny, nx = x.shape
        xr = x.reshape(g, ny // f, f, nx // f, f)
        d = xr - m0[:, :, None, :, None]
        s1 = d.sum(axis=(2, 4))
        d2 = d * d
        s2 = d2.sum(axis=(2, 4))
        d2 *= d
        s3 = d2.sum(axis=(2, 4))
    return np_finish(m0, s1, s2, s3, n)


def np_mean(x: np.ndarray, f: int) -> np.ndarray:
    """Corrected two-pass block mean of float64 planes ``x`` (G, ny, nx)."""
    n = f * f
    m0 = np_block_sum(x, f)
    m0 /= n
    if f <= _SLICE_MAX:
        s1 = np.zeros_like(m0)
        for i in range(f):
            for j in range(f):
                s1 += x[:, i::f, j::f] - m0
    else:
        g, ny, nx = x.shape
        s1 = (x.reshape(g, ny // f, f, nx // f, f) - m0[:, :, None, :, None]).sum(axis=(2, 4))
    s1 /= n
    m0 += s1
    return m0


def np_merge(cmean: np.ndarray, cm2: np.ndarray, cm3: np.ndarray, nc: int, k: int):
    """Merge ``k x k`` children (G, nyc, nxc) of count ``nc``; return mean, M2, M3."""
    kk = k * k
    m0 = np_block_sum(cmean, k)
    m0 /= kk
    if k <= _SLICE_MAX:
        s1 = np.zeros_like(m0)
        a2 = np.zeros_like(m0)
        a3 = np.zeros_like(m0)
        for i in range(k):
            for j in range(k):
                d = cmean[:, i::k, j::k] - m0
                c2 = cm2[:, i::k, j::k]
                s1 += d
                t = d * d
                t *= nc  # n_c * d**2
                a2 += c2
                a2 += t
                t *= d  # n_c * d**3
                a3 += t
                a3 += cm3[:, i::k, j::k]
                t = 3.0 * d
                t *= c2
                a3 += t
    else:
        g, nyc, nxc = cmean.shape
        shape5 = (g, nyc // k, k, nxc // k, k)
        c2 = cm2.reshape(shape5)
        d = cmean.reshape(shape5) - m0[:, :, None, :, None]
        s1 = d.sum(axis=(2, 4))
        a2 = (c2 + nc * d * d).sum(axis=(2, 4))
        a3 = (cm3.reshape(shape5) + 3.0 * d * c2 + nc * d**3).sum(axis=(2, 4))
    # The fine-cell sum of deviations from m0 is nc*s1 = N*delta with delta = s1/kk.
    return np_finish(m0, nc * s1, a2, a3, nc * kk)


def np_quantized_count(mean: np.ndarray, var: np.ndarray, steps: float) -> int:
    """Blocks of a non-zero mean whose variance is below ``(steps * spacing)**2``, the
    spacing of float32 numbers at the mean (the reference of the compiled count)."""
    step = np.spacing(np.abs(mean).astype(np.float32)).astype(np.float64)
    var64 = np.asarray(var, dtype=np.float64)
    return int(np.count_nonzero((np.asarray(mean) != 0) & (var64 < (steps * step) ** 2)))
