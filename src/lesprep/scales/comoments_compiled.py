"""The compiled (numba) engine of the block co-moments: fused, parallel loops.

Every kernel has a numpy twin in :mod:`lesprep.scales.comoments` (``np_comoment``,
``np_comerge``); the tests compare the two. Without numba this module defines nothing and
the numpy engine is used.

The kernels follow the layout of :mod:`lesprep.scales.moments_compiled`: parallel over
(plane, block row); within a block row either row-wise (the innermost loop runs across the
blocks of the row) for small factors, or block by block for large ones.
"""

from __future__ import annotations

import numpy as np

from lesprep._jit import HAVE_NUMBA, njit, prange
from lesprep.scales.moments_compiled import _ROWWISE_MAX

if HAVE_NUMBA:
    from lesprep.scales.moments_compiled import nb_mean4

    @njit(inline="always")
    def nb_cofinish(s1x, s1y, sxy, n):  # pragma: no cover - compiled
        """Shift correction: ``sum((x - mx)(y - my))`` from sums about any centres."""
        return sxy - s1x * (s1y / n)

    @njit(inline="always")
    def nb_co4(x0, x1, x2, x3, y0, y1, y2, y3, cx, cy):  # pragma: no cover - compiled
        """Co-moment of a 2 x 2 block about the centres ``cx``, ``cy``."""
        s1x = 0.0
        s1y = 0.0
        sxy = 0.0
        for xv, yv in ((x0, y0), (x1, y1), (x2, y2), (x3, y3)):
            dx = xv - cx
            dy = yv - cy
            s1x += dx
            s1y += dy
            sxy += dx * dy
        return nb_cofinish(s1x, s1y, sxy, 4)

    @njit(inline="always")
    def nb_comoment_row(x, y, f, mx, my, given, out, p, bi):  # pragma: no cover - compiled
        """Co-moments of the ``f x f`` blocks in block row ``bi`` of plane ``p``."""
        nbx = x.shape[2] // f
        n = f * f
        r0 = bi * f
        o = out[p, bi]
        if f == 2:  # constant stride, which LLVM vectorises
            xa = x[p, r0]
            xb = x[p, r0 + 1]
            ya = y[p, r0]
            yb = y[p, r0 + 1]
            if given:  # (two loops without a branch inside, so both vectorise)
                mxr = mx[p, bi]
                myr = my[p, bi]
                for bj in range(nbx):
                    i0 = 2 * bj
                    i1 = i0 + 1
                    o[bj] = nb_co4(
                        xa[i0], xa[i1], xb[i0], xb[i1],
                        ya[i0], ya[i1], yb[i0], yb[i1],
                        mxr[bj], myr[bj],
                    )  # fmt: skip
            else:
                for bj in range(nbx):
                    i0 = 2 * bj
                    i1 = i0 + 1
                    x0, x1, x2, x3 = xa[i0], xa[i1], xb[i0], xb[i1]
                    y0, y1, y2, y3 = ya[i0], ya[i1], yb[i0], yb[i1]
                    o[bj] = nb_co4(
                        x0, x1, x2, x3, y0, y1, y2, y3,
                        nb_mean4(x0, x1, x2, x3, 4), nb_mean4(y0, y1, y2, y3, 4),
                    )  # fmt: skip
        elif f <= _ROWWISE_MAX:
            if given:
                ux = mx[p, bi]
                uy = my[p, bi]
            else:
                ux = np.zeros(nbx)
                uy = np.zeros(nbx)
                for r in range(r0, r0 + f):
                    xr = x[p, r]
                    yr = y[p, r]
                    for c in range(f):
                        for bj in range(nbx):
                            ux[bj] += xr[bj * f + c]
                            uy[bj] += yr[bj * f + c]
                for bj in range(nbx):
                    ux[bj] = ux[bj] / n
                    uy[bj] = uy[bj] / n
            tx = np.zeros(nbx)
            ty = np.zeros(nbx)
            o[:] = 0.0
            for r in range(r0, r0 + f):
                xr = x[p, r]
                yr = y[p, r]
                for c in range(f):
                    for bj in range(nbx):
                        dx = xr[bj * f + c] - ux[bj]
                        dy = yr[bj * f + c] - uy[bj]
                        tx[bj] += dx
                        ty[bj] += dy
                        o[bj] += dx * dy
            for bj in range(nbx):
                o[bj] = nb_cofinish(tx[bj], ty[bj], o[bj], n)
        else:
            for bj in range(nbx):
                c0 = bj * f
                if given:
                    cx = mx[p, bi, bj]
                    cy = my[p, bi, bj]
                else:
                    cx = 0.0
                    cy = 0.0
                    for r in range(r0, r0 + f):
                        for c in range(c0, c0 + f):
                            cx += x[p, r, c]
                            cy += y[p, r, c]
                    cx = cx / n
                    cy = cy / n
                s1x = 0.0
                s1y = 0.0
                sxy = 0.0
                for r in range(r0, r0 + f):
                    for c in range(c0, c0 + f):
                        dx = x[p, r, c] - cx
                        dy = y[p, r, c] - cy
                        s1x += dx
                        s1y += dy
                        sxy += dx * dy
                o[bj] = nb_cofinish(s1x, s1y, sxy, n)

    @njit(parallel=True, cache=True, fastmath=False, error_model="numpy")
    def nb_comoment(x, y, f, mx, my, given, out):  # pragma: no cover - compiled
        """Co-moment of every ``f x f`` block of the planes ``x``, ``y`` into ``out``.

        With ``given`` the centres are the block means ``mx``, ``my`` (planes, ny/f,
        nx/f); otherwise a first pass computes them (``mx`` and ``my`` are not read).
        """
        planes, ny, _ = x.shape
        nby = ny // f
        for t in prange(planes * nby):
            p = t // nby
            nb_comoment_row(x, y, f, mx, my, given, out, p, t - p * nby)

    @njit(inline="always")
    def nb_comerge_row(cc, cmx, cmy, nc, k, out, p, bi):  # pragma: no cover - compiled
        """Merge the k x k children of the parents in block row ``bi`` of plane ``p``."""
        nxp = cc.shape[2] // k
        kk = k * k
        r0 = bi * k
        o = out[p, bi]
        if k == 2:  # the row-wise sums below, in their order, without work rows
            xa, xb = cmx[p, r0], cmx[p, r0 + 1]
            ya, yb = cmy[p, r0], cmy[p, r0 + 1]
            ca, cb = cc[p, r0], cc[p, r0 + 1]
            for bj in range(nxp):
                i0 = 2 * bj
                i1 = i0 + 1
                cx = nb_mean4(xa[i0], xa[i1], xb[i0], xb[i1], kk)
                cy = nb_mean4(ya[i0], ya[i1], yb[i0], yb[i1], kk)
                tx = 0.0
                ty = 0.0
                acc = 0.0
                for xv, yv, cv in (
                    (xa[i0], ya[i0], ca[i0]),
                    (xa[i1], ya[i1], ca[i1]),
                    (xb[i0], yb[i0], cb[i0]),
                    (xb[i1], yb[i1], cb[i1]),
                ):
                    dx = xv - cx
                    dy = yv - cy
                    tx += dx
                    ty += dy
                    acc += cv + nc * dx * dy
                o[bj] = nb_cofinish(nc * tx, nc * ty, acc, nc * kk)
        elif k <= _ROWWISE_MAX:
            ux = np.zeros(nxp)
            uy = np.zeros(nxp)
            tx = np.zeros(nxp)
            ty = np.zeros(nxp)
            o[:] = 0.0
            for r in range(r0, r0 + k):
                xr = cmx[p, r]
                yr = cmy[p, r]
                for c in range(k):
                    for bj in range(nxp):
                        ux[bj] += xr[bj * k + c]
                        uy[bj] += yr[bj * k + c]
            for bj in range(nxp):
                ux[bj] = ux[bj] / kk  # first-pass means of the parents
                uy[bj] = uy[bj] / kk
            for r in range(r0, r0 + k):
                xr = cmx[p, r]
                yr = cmy[p, r]
                cr = cc[p, r]
                for c in range(k):
                    for bj in range(nxp):
                        i = bj * k + c
                        dx = xr[i] - ux[bj]
                        dy = yr[i] - uy[bj]
                        tx[bj] += dx
                        ty[bj] += dy
                        o[bj] += cr[i] + nc * dx * dy
            for bj in range(nxp):
                # nc*s1 are the fine-cell sums of deviations from the first-pass means
                o[bj] = nb_cofinish(nc * tx[bj], nc * ty[bj], o[bj], nc * kk)
        else:
            for bj in range(nxp):
                c0 = bj * k
                cx = 0.0
                cy = 0.0
                for r in range(r0, r0 + k):
                    for c in range(c0, c0 + k):
                        cx += cmx[p, r, c]
                        cy += cmy[p, r, c]
                cx = cx / kk
                cy = cy / kk
                s1x = 0.0
                s1y = 0.0
                acc = 0.0
                for r in range(r0, r0 + k):
                    for c in range(c0, c0 + k):
                        dx = cmx[p, r, c] - cx
                        dy = cmy[p, r, c] - cy
                        s1x += dx
                        s1y += dy
                        acc += cc[p, r, c] + nc * dx * dy
                o[bj] = nb_cofinish(nc * s1x, nc * s1y, acc, nc * kk)

    @njit(parallel=True, cache=True, fastmath=False, error_model="numpy")
    def nb_comerge(cc, cmx, cmy, nc, k, out):  # pragma: no cover - compiled
        """Merge ``k x k`` children (co-moments ``cc``, means ``cmx``, ``cmy``, count
        ``nc`` each) into the parents' co-moments ``out``."""
        planes, nyc, _ = cc.shape
        nyp = nyc // k
        for t in prange(planes * nyp):
            p = t // nyp
            nb_comerge_row(cc, cmx, cmy, nc, k, out, p, t - p * nyp)

    @njit(parallel=True, cache=True, fastmath=False, error_model="numpy")
    def nb_cohierarchy(x, y, co, mx, my, factor, parent, k, nc):  # pragma: no cover
        """Every level of a co-moment hierarchy in one call, plane by plane (as
        :func:`~lesprep.scales.moments_compiled.nb_hierarchy`): level ``i`` holds the
        co-moments of ``factor[i] x factor[i]`` blocks about the block means ``mx[i]``,
        ``my[i]``, computed from the planes ``x``, ``y`` where ``parent[i] < 0`` (zero for
        factor 1: single cells have no deviations), else merged from ``k[i] x k[i]``
        blocks of level ``parent[i]`` (count ``nc[i]``). The arithmetic is
        :func:`nb_comoment`'s and :func:`nb_comerge`'s, block for block."""
        for p in prange(x.shape[0]):
            for i in range(len(co)):
                q = parent[i]
                if q >= 0:
                    for bi in range(co[i].shape[1]):
                        nb_comerge_row(co[q], mx[q], my[q], nc[i], k[i], co[i], p, bi)
                elif factor[i] == 1:
                    co[i][p] = 0.0
                else:
                    for bi in range(co[i].shape[1]):
                        nb_comoment_row(x, y, factor[i], mx[i], my[i], True, co[i], p, bi)
