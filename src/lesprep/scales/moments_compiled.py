"""The compiled (numba) engine of the block moments: fused, parallel loops.

Every kernel has a numpy twin in :mod:`lesprep.scales.moments_reference`; the tests
compare the two. Without numba this module defines nothing and the numpy engine is used.
"""

from __future__ import annotations

import numpy as np

from lesprep._jit import HAVE_NUMBA, njit, prange

_ROWWISE_MAX = 32
"""numba engine: factors up to this loop row-wise across blocks, larger ones block by block."""

# --------------------------------------------------------------------------------------
# numba engine (fused loops, parallel over (plane, block row))
# --------------------------------------------------------------------------------------

if HAVE_NUMBA:
    # Each kernel runs in parallel over (plane, block row). Within a block row the loops go
    # either row-wise (the innermost loop runs across the blocks of the row, which LLVM can
    # vectorise without reordering any sum) for small factors, or block by block for large
    # ones (few blocks per row). Both add each block's cells in the same (row, column)
    # order, so they give bit-identical results; only the speed differs.

    @njit(inline="always")
    def nb_finish(m0, s1, s2, s3, n):  # pragma: no cover - compiled
        """Shift correction of the corrected two-pass algorithm (see module docstring)."""
        delta = s1 / n
        v = s2 - s1 * delta
        m3 = s3 - 3.0 * delta * s2 + 2.0 * n * delta * delta * delta
        return m0 + delta, (v if v > 0.0 else 0.0), m3

    @njit(inline="always")
    def nb_mean4(x0, x1, x2, x3, n):  # pragma: no cover - compiled
        """First-pass mean of four cells, summed in the order of the row-wise loops."""
        s = 0.0
        s += x0
        s += x1
        s += x2
        s += x3
        return s / n

    @njit(inline="always")
    def nb_dev4(x0, x1, x2, x3, m0):  # pragma: no cover - compiled
        """Second-pass sums of four cells, in the order of the row-wise loops."""
        s1 = 0.0
        s2 = 0.0
        s3 = 0.0
        for x in (x0, x1, x2, x3):
            d = x - m0
            d2 = d * d
            s1 += d
            s2 += d2
            s3 += d2 * d
        return s1, s2, s3

    @njit(inline="always")
    def nb_merge1(cm, c2, c3, m0, nc, s1, a2, a3):  # pragma: no cover - compiled
        """Add one child (mean, M2, M3) to the merge sums, as the row-wise loop does."""
        d = cm - m0
        return s1 + d, a2 + (c2 + nc * d * d), a3 + (c3 + 3.0 * d * c2 + nc * d * d * d)

    @njit(inline="always")
    def nb_moments_row(a, f, mean, m2, m3, p, bi):  # pragma: no cover - compiled
        """The moments of the ``f x f`` blocks in block row ``bi`` of plane ``p``."""
        nbx = a.shape[2] // f
        n = f * f
        r0 = bi * f
        o1 = mean[p, bi]
        o2 = m2[p, bi]
        o3 = m3[p, bi]
        if f == 2:  # the same sums with a constant stride, which LLVM vectorises
            ra = a[p, r0]
            rb = a[p, r0 + 1]
            for bj in range(nbx):
                x0, x1 = ra[2 * bj], ra[2 * bj + 1]
                x2, x3 = rb[2 * bj], rb[2 * bj + 1]
                m0 = nb_mean4(x0, x1, x2, x3, n)
                s1b, s2b, s3b = nb_dev4(x0, x1, x2, x3, m0)
                o1[bj], o2[bj], o3[bj] = nb_finish(m0, s1b, s2b, s3b, n)
        elif f <= _ROWWISE_MAX:
            s1 = np.zeros(nbx)
            o1[:] = 0.0
            o2[:] = 0.0
            o3[:] = 0.0
            for r in range(r0, r0 + f):
                row = a[p, r]
                for c in range(f):
                    for bj in range(nbx):
                        o1[bj] += row[bj * f + c]
            for bj in range(nbx):
                o1[bj] = o1[bj] / n  # first-pass mean m0
            for r in range(r0, r0 + f):
                row = a[p, r]
                for c in range(f):
                    for bj in range(nbx):
                        d = row[bj * f + c] - o1[bj]
                        d2 = d * d
                        s1[bj] += d
                        o2[bj] += d2
                        o3[bj] += d2 * d
            for bj in range(nbx):
                o1[bj], o2[bj], o3[bj] = nb_finish(o1[bj], s1[bj], o2[bj], o3[bj], n)
        else:
            for bj in range(nbx):
                c0 = bj * f
                s = 0.0
                for r in range(r0, r0 + f):
                    for c in range(c0, c0 + f):
                        s += a[p, r, c]
                m0 = s / n
                s1b = 0.0
                s2b = 0.0
                s3b = 0.0
                for r in range(r0, r0 + f):
                    for c in range(c0, c0 + f):
                        d = a[p, r, c] - m0
                        d2 = d * d
                        s1b += d
                        s2b += d2
                        s3b += d2 * d
                o1[bj], o2[bj], o3[bj] = nb_finish(m0, s1b, s2b, s3b, n)

    @njit(parallel=True, cache=True, fastmath=False, error_model="numpy")
    def nb_moments(a, f, mean, m2, m3):  # pragma: no cover - compiled
        planes, ny, _ = a.shape
        nby = ny // f
        for t in prange(planes * nby):
            p = t // nby
            nb_moments_row(a, f, mean, m2, m3, p, t - p * nby)

    @njit(parallel=True, cache=True, fastmath=False, error_model="numpy")
    def nb_mean(a, f, mean):  # pragma: no cover - compiled
        """The mean of nb_moments (same sums in the same order), without M2 and M3."""
        planes, ny, nx = a.shape
        nby = ny // f
        nbx = nx // f
        n = f * f
        for t in prange(planes * nby):
            p = t // nby
            bi = t - p * nby
            r0 = bi * f
            o1 = mean[p, bi]
            if f == 2:
                ra = a[p, r0]
                rb = a[p, r0 + 1]
                for bj in range(nbx):
                    x0, x1 = ra[2 * bj], ra[2 * bj + 1]
                    x2, x3 = rb[2 * bj], rb[2 * bj + 1]
                    m0 = nb_mean4(x0, x1, x2, x3, n)
                    s1b = nb_dev4(x0, x1, x2, x3, m0)[0]  # (the unused sums compile away)
                    o1[bj] = m0 + s1b / n
            elif f <= _ROWWISE_MAX:
                s1 = np.zeros(nbx)
                o1[:] = 0.0
                for r in range(r0, r0 + f):
                    row = a[p, r]
                    for c in range(f):
                        for bj in range(nbx):
                            o1[bj] += row[bj * f + c]
                for bj in range(nbx):
                    o1[bj] = o1[bj] / n
                for r in range(r0, r0 + f):
                    row = a[p, r]
                    for c in range(f):
                        for bj in range(nbx):
                            s1[bj] += row[bj * f + c] - o1[bj]
                for bj in range(nbx):
                    o1[bj] = o1[bj] + s1[bj] / n
            else:
                for bj in range(nbx):
                    c0 = bj * f
                    sm = 0.0
                    for r in range(r0, r0 + f):
                        for c in range(c0, c0 + f):
                            sm += a[p, r, c]
                    m0 = sm / n
                    s1b = 0.0
                    for r in range(r0, r0 + f):
                        for c in range(c0, c0 + f):
                            s1b += a[p, r, c] - m0
                    o1[bj] = m0 + s1b / n

    @njit(inline="always")
    def nb_merge_row(cmean, cm2, cm3, nc, k, mean, m2, m3, p, bi):  # pragma: no cover
        """Merge the k x k children of the parents in block row ``bi`` of plane ``p``."""
        nxp = cmean.shape[2] // k
        kk = k * k
        n = nc * kk
        r0 = bi * k
        o1 = mean[p, bi]
        o2 = m2[p, bi]
        o3 = m3[p, bi]
        if k == 2:  # constant stride, as in nb_moments
            ma, mb = cmean[p, r0], cmean[p, r0 + 1]
            va, vb = cm2[p, r0], cm2[p, r0 + 1]
            wa, wb = cm3[p, r0], cm3[p, r0 + 1]
            for bj in range(nxp):
                i0 = 2 * bj
                i1 = i0 + 1
                m0 = nb_mean4(ma[i0], ma[i1], mb[i0], mb[i1], kk)
                s1b = 0.0
                a2 = 0.0
                a3 = 0.0
                s1b, a2, a3 = nb_merge1(ma[i0], va[i0], wa[i0], m0, nc, s1b, a2, a3)
                s1b, a2, a3 = nb_merge1(ma[i1], va[i1], wa[i1], m0, nc, s1b, a2, a3)
                s1b, a2, a3 = nb_merge1(mb[i0], vb[i0], wb[i0], m0, nc, s1b, a2, a3)
                s1b, a2, a3 = nb_merge1(mb[i1], vb[i1], wb[i1], m0, nc, s1b, a2, a3)
                o1[bj], o2[bj], o3[bj] = nb_finish(m0, nc * s1b, a2, a3, n)
        elif k <= _ROWWISE_MAX:
            s1 = np.zeros(nxp)
            o1[:] = 0.0
            o2[:] = 0.0
            o3[:] = 0.0
            for r in range(r0, r0 + k):
                row = cmean[p, r]
                for c in range(k):
                    for bj in range(nxp):
                        o1[bj] += row[bj * k + c]
            for bj in range(nxp):
                o1[bj] = o1[bj] / kk  # first-pass mean m0
            for r in range(r0, r0 + k):
                row = cmean[p, r]
                row2 = cm2[p, r]
                row3 = cm3[p, r]
                for c in range(k):
                    for bj in range(nxp):
                        i = bj * k + c
                        d = row[i] - o1[bj]
                        c2 = row2[i]
                        s1[bj] += d
                        o2[bj] += c2 + nc * d * d
                        o3[bj] += row3[i] + 3.0 * d * c2 + nc * d * d * d
            for bj in range(nxp):
                # nc*s1 is the fine-cell sum of deviations from m0
                o1[bj], o2[bj], o3[bj] = nb_finish(o1[bj], nc * s1[bj], o2[bj], o3[bj], n)
        else:
            for bj in range(nxp):
                c0 = bj * k
                s = 0.0
                for r in range(r0, r0 + k):
                    for c in range(c0, c0 + k):
                        s += cmean[p, r, c]
                m0 = s / kk
                s1b = 0.0
                a2 = 0.0
                a3 = 0.0
                for r in range(r0, r0 + k):
                    for c in range(c0, c0 + k):
                        d = cmean[p, r, c] - m0
                        c2 = cm2[p, r, c]
                        s1b += d
                        a2 += c2 + nc * d * d
                        a3 += cm3[p, r, c] + 3.0 * d * c2 + nc * d * d * d
                o1[bj], o2[bj], o3[bj] = nb_finish(m0, nc * s1b, a2, a3, n)

    @njit(parallel=True, cache=True, fastmath=False, error_model="numpy")
    def nb_merge(cmean, cm2, cm3, nc, k, mean, m2, m3):  # pragma: no cover - compiled
        planes, nyc, _ = cmean.shape
        nyp = nyc // k
        for t in prange(planes * nyp):
            p = t // nyp
            nb_merge_row(cmean, cm2, cm3, nc, k, mean, m2, m3, p, t - p * nyp)

    @njit(parallel=True, cache=True, fastmath=False, error_model="numpy")
    def nb_hierarchy(a, mean, m2, m3, factor, parent, k, nc):  # pragma: no cover - compiled
        """Every level of a hierarchy in one call, plane by plane: level ``i`` holds the
        moments of ``factor[i] x factor[i]`` blocks, computed from the planes ``a`` where
        ``parent[i] < 0``, else merged from ``k[i] x k[i]`` blocks of level ``parent[i]``
        (count ``nc[i]``), in list order. A plane's finest level is merged into the
        coarser ones while it is still in the cache (not read back from memory), and the
        whole hierarchy costs one parallel launch. The arithmetic is :func:`nb_moments`'s
        and :func:`nb_merge`'s, block for block."""
        for p in prange(a.shape[0]):
            for i in range(len(mean)):
                q = parent[i]
                if q < 0:
                    for bi in range(mean[i].shape[1]):
                        nb_moments_row(a, factor[i], mean[i], m2[i], m3[i], p, bi)
                else:
                    for bi in range(mean[i].shape[1]):
                        nb_merge_row(
                            mean[q], m2[q], m3[q], nc[i], k[i], mean[i], m2[i], m3[i], p, bi
                        )

    @njit(parallel=True, cache=True, fastmath=False, error_model="numpy")
    def nb_count(a, f, nonzero, out):  # pragma: no cover - compiled
        """Per f x f block of the integer planes ``a``: the number of nonzero cells
        (``nonzero``) or the sum of the values (counts of finer blocks)."""
        planes, ny, nx = a.shape
        nby = ny // f
        nbx = nx // f
        for t in prange(planes * nby):
            p = t // nby
            bi = t - p * nby
            o = out[p, bi]
            if f == 2:  # constant stride, which LLVM vectorises
                ra = a[p, 2 * bi]
                rb = a[p, 2 * bi + 1]
                if nonzero:
                    for bj in range(nbx):
                        o[bj] = (
                            np.int64(ra[2 * bj] != 0)
                            + np.int64(ra[2 * bj + 1] != 0)
                            + np.int64(rb[2 * bj] != 0)
                            + np.int64(rb[2 * bj + 1] != 0)
                        )
                else:
                    for bj in range(nbx):
                        o[bj] = ra[2 * bj] + ra[2 * bj + 1] + rb[2 * bj] + rb[2 * bj + 1]
                continue
            o[:] = 0
            for r in range(bi * f, bi * f + f):
                row = a[p, r]
                for c in range(f):
                    if nonzero:
                        for bj in range(nbx):
                            o[bj] += row[bj * f + c] != 0
                    else:
                        for bj in range(nbx):
                            o[bj] += row[bj * f + c]

    @njit(parallel=True, cache=True, fastmath=False, error_model="numpy")
    def nb_var_skew(mean, m2, m3, n, tiny_rel, zero, var, skew, mean_out, with_mean):
        """Same operations as BlockMoments.variance/skewness, per element (and the mean
        rounded into ``mean_out`` when ``with_mean``)."""  # pragma: no cover - compiled
        for i in prange(mean.size):
            m = mean[i]
            v = m2[i] / n
            var[i] = v
            tiny = m * tiny_rel
            tiny = tiny * tiny
            denom = np.sqrt(v) * v
            g = (m3[i] / n) / denom
            skew[i] = zero if (v <= tiny or denom == 0.0) else g
            if with_mean:
                mean_out[i] = m

    @njit(parallel=True, cache=True, fastmath=False, error_model="numpy")
    def nb_quantized_count(mean, var, steps):  # pragma: no cover - compiled
        """One pass of :func:`~lesprep.scales.moments_reference.np_quantized_count`: the
        float32 spacing at ``|mean|`` from its binary exponent (``2**-149`` below the
        smallest normal float32)."""
        count = 0
        for i in prange(mean.size):
            m = mean[i]
            af = np.float32(abs(m))
            a = np.float64(af)
            step = 1.401298464324817e-45
            if a >= 1.1754943508222875e-38:
                # 2**(frexp(a)[1] - 24) from the float32 exponent field E: frexp gives
                # E - 126, so 2**(E - 150), built from its float64 bits (no libm calls)
                e = (np.int64(af.view(np.int32)) >> 23) & 0xFF
                if e == 255:  # inf: frexp's exponent is 0
                    step = 5.960464477539063e-08
                else:
                    step = np.int64((e - 150 + 1023) << 52).view(np.float64)
            hit = m != 0.0 and m == m and np.float64(var[i]) < (steps * step) * (steps * step)
            count += 1 if hit else 0
        return count
