"""Fields derived from the canonical ones at every fine cell, in one fused pass.

Ingest derives, for each output time, the relative humidity, the cloud mask and the
liquid water path from pressure, temperature, vapour and cloud water. Written as separate
numpy expressions this makes a dozen full-size float64 temporaries per time step; the
numba engine computes all three in one loop over the cells, with float64 arithmetic and
results stored in the requested dtype. The numpy engine is the reference: it calls the
functions of :mod:`lesprep.thermo` and :mod:`lesprep.canonical.mask` and is tested against the
compiled one.

Conventions (those of :mod:`lesprep.thermo`):

* ``rh = e / e_s``, ``e = p r / (eps + r)``, ``e_s`` from Bolton (1980) over liquid water;
* dry-air density ``rho_d = (p - e) / (Rd T) = p eps / ((eps + r) Rd T)``: mixing ratios
  are kg of water per kg of dry air, so the mass of water per volume is ``rho_d * r``
  (the moist density of :func:`lesprep.thermo.air_density` would count the vapour twice
  and give a liquid water path about 1 % high);
* ``lwp = sum_k dz_k rho_d,k qc_k`` over the column (kg m-2), accumulated in float64;
* ``cloud_mask``: ``qc > threshold`` for a mixing-ratio threshold, ``rho_d qc >
  threshold`` for a mass concentration (:mod:`lesprep.canonical.mask`), evaluated on the
  values as given (the stored ones), so a mask recomputed from the stored fields gives
  the same cells.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
import numpy.typing as npt

from lesprep import thermo
from lesprep._jit import HAVE_NUMBA, Engine, njit, prange, resolve_engine
from lesprep.canonical.mask import cloud_mask

__all__ = ["CellDiagnostics", "cell_diagnostics", "relative_humidity"]

_EPS = thermo.EPS
_RD = thermo.RD
_T0 = thermo.T0


@dataclass(frozen=True)
class CellDiagnostics:
    """Derived fields of one output time.

    Attributes
    ----------
    rh
        Relative humidity (1 = saturated), ``(z, y, x)``.
    cloud_mask
        1 where ``qc > threshold``, else 0 (int8), ``(z, y, x)``.
    lwp
        Liquid water path, kg m-2, float64, ``(y, x)``.
    """

    rh: np.ndarray
    cloud_mask: np.ndarray
    lwp: np.ndarray


def _broadcast_p(p: np.ndarray, shape: tuple[int, ...]) -> np.ndarray:
    p = np.asarray(p)
    if p.ndim == 1:
        return np.broadcast_to(p[:, None, None], shape)
    return p


def cell_diagnostics(
    p: npt.ArrayLike,
    temperature: npt.ArrayLike,
    mixing_ratio: npt.ArrayLike,
    qc: npt.ArrayLike,
    dz: npt.ArrayLike,
    threshold: float,
    *,
    threshold_units: str = "kg kg-1",
    dtype: npt.DTypeLike = np.float64,
    engine: Engine = "auto",
) -> CellDiagnostics:
    """Relative humidity, cloud mask and liquid water path of one output time.

    Parameters
    ----------
    p
        Pressure, Pa: ``(z, y, x)`` or a ``(z,)`` profile.
    temperature, mixing_ratio, qc
        T (K), vapour and cloud-water mixing ratios (kg kg-1), ``(z, y, x)``.
    dz
        Layer thicknesses (m), ``(z,)``.
    threshold, threshold_units
        Cloud threshold: on ``qc`` (``"kg kg-1"``) or on ``rho_d qc`` (``"kg m-3"``).
    dtype
        dtype of ``rh`` (arithmetic is float64 regardless).
    engine
        ``"auto"``, ``"numba"`` or ``"numpy"`` (reference).

    Returns
    -------
    CellDiagnostics
    """
    t = np.asarray(temperature)
    r = np.asarray(mixing_ratio)
    q = np.asarray(qc)
    pp = _broadcast_p(np.asarray(p), t.shape)
    dzs = np.asarray(dz, dtype=np.float64)
    dt = np.dtype(dtype)
    eng = resolve_engine(engine)
    if eng == "numpy" or t.ndim != 3 or dt.char not in "fd":
        rh = thermo.relative_humidity(pp, t, r).astype(dt)
        rho_d = thermo.dry_air_density(pp, t, r)
        lwp = np.tensordot(dzs, np.asarray(q, dtype=np.float64) * rho_d, axes=(0, 0))
        mask = cloud_mask(q, threshold, units=threshold_units, dry_density=rho_d)
        return CellDiagnostics(rh, mask.astype(np.int8), lwp)
    rh = np.empty(t.shape, dtype=dt)
    mask = np.empty(t.shape, dtype=np.int8)
    lwp = np.empty(t.shape[1:], dtype=np.float64)
    by_density = threshold_units == "kg m-3"
    _nb_cells(pp, t, r, q, dzs, float(threshold), by_density, rh, mask, lwp)
    return CellDiagnostics(rh, mask, lwp)


def relative_humidity(
    p: npt.ArrayLike,
    temperature: npt.ArrayLike,
    mixing_ratio: npt.ArrayLike,
    *,
    dtype: npt.DTypeLike = np.float64,
    out: np.ndarray | None = None,
    engine: Engine = "auto",
) -> np.ndarray:
    """:func:`lesprep.thermo.relative_humidity` of 3-D fields in one compiled pass.

    ``p`` may be a ``(z,)`` profile. The numpy engine calls the thermo function. ``out``
    (the shape of ``temperature``; its dtype wins over ``dtype``) receives the result.
    """
    t = np.asarray(temperature)
    r = np.asarray(mixing_ratio)
    pp = _broadcast_p(np.asarray(p), t.shape)
    if out is not None:
        if out.shape != t.shape:
            raise ValueError(f"out has shape {out.shape}, expected {t.shape}")
        if resolve_engine(engine) == "numpy" or t.ndim != 3 or out.dtype.char not in "fd":
            out[...] = thermo.relative_humidity(pp, t, r)
        else:
            _nb_rh(pp, t, r, out)
        return out
    dt = np.dtype(dtype)
    if resolve_engine(engine) == "numpy" or t.ndim != 3 or dt.char not in "fd":
        return thermo.relative_humidity(pp, t, r).astype(dt)
    out = np.empty(t.shape, dtype=dt)
    _nb_rh(pp, t, r, out)
    return out


if HAVE_NUMBA:

    @njit(inline="always")
    def _nb_rh_cell(p, t, r):  # pragma: no cover - compiled
        e = p * r / (_EPS + r)
        tc = t - _T0
        return e / (611.2 * np.exp(17.67 * tc / (tc + 243.5)))

    @njit(parallel=True, cache=True, fastmath=False, error_model="numpy")
    def _nb_cells(p, t, r, q, dz, threshold, by_density, rh, mask, lwp):  # pragma: no cover
        nz, ny, nx = t.shape
        for j in prange(ny):
            for i in range(nx):
                lwp[j, i] = 0.0
            for k in range(nz):
                dzk = dz[k]
                for i in range(nx):
                    pk = np.float64(p[k, j, i])
                    tk = np.float64(t[k, j, i])
                    rk = np.float64(r[k, j, i])
                    qk = np.float64(q[k, j, i])
                    rh[k, j, i] = _nb_rh_cell(pk, tk, rk)
                    rho_d = pk * _EPS / ((_EPS + rk) * _RD * tk)
                    lwp[j, i] += dzk * (qk * rho_d)
                    amount = qk * rho_d if by_density else qk
                    mask[k, j, i] = 1 if amount > threshold else 0

    @njit(parallel=True, cache=True, fastmath=False, error_model="numpy")
    def _nb_rh(p, t, r, out):  # pragma: no cover - compiled
        nz, ny, nx = t.shape
        for kj in prange(nz * ny):
            k = kj // ny
            j = kj - k * ny
            for i in range(nx):
                out[k, j, i] = _nb_rh_cell(
                    np.float64(p[k, j, i]), np.float64(t[k, j, i]), np.float64(r[k, j, i])
                )
