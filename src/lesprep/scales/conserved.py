"""Conserved and buoyancy variables, computed per fine cell from each slab of fine fields.

Coarsening derives these from the canonical fields of one z-slab in float64, just before
the block moments, so they are never rounded to the stored dtype and never stored on the
fine grid (they are cheap to recompute from the canonical store, see the formulas in
:mod:`lesprep.thermo`):

* ``qt``: total water mixing ratio, vapour plus cloud condensate, ``qv + qc (+ qi)``.
  Precipitating water (rain ``qr``) is left out: it falls through the air and is not
  conserved under the moist-adiabatic processes a statistical cloud scheme assumes;
* ``theta_l``: liquid-water potential temperature (Betts 1973), warm phase: ice, when
  mapped, is ignored here;
* ``theta_il``: liquid-ice potential temperature (Tripoli and Cotton 1981), only for a
  case whose variable map provides cloud ice ``qi``;
* ``theta_v``: virtual potential temperature with condensate loading, the buoyancy
  variable; every mapped water species loads the air (rain included).
"""

from __future__ import annotations

from collections.abc import Mapping, Sequence

import numpy as np

from lesprep import catalogue, thermo
from lesprep._jit import HAVE_NUMBA, Engine, njit, prange, resolve_engine
from lesprep.errors import ConfigError

PER_SLAB: tuple[str, ...] = tuple(v.name for v in catalogue.variables() if v.per_slab)
"""Variables coarsening computes from each slab (``qt``, ``theta_l``, ``theta_il``,
``theta_v``)."""


def inputs_of(names: Sequence[str], stored: Sequence[str]) -> tuple[str, ...]:
    """Canonical fields the per-slab variables among ``names`` are computed from.

    ``stored`` lists the canonical store's fields: optional water species (``qi``, ``qr``)
    are used when present.

    Raises
    ------
    ConfigError
        ``theta_il`` for a store without cloud ice.
    """
    out: list[str] = []
    for n in names:
        if n not in PER_SLAB:
            continue
        if n == "theta_il" and "qi" not in stored:
            raise ConfigError(
                "theta_il (liquid-ice potential temperature) needs cloud ice qi, which this "
                "case's variable map does not provide",
                hint="map qi, or use theta_l for a warm case",
            )
        out += [v for v in catalogue.get(n).derived_from if v != "p"]
        if n in ("qt", "theta_il"):
            out += [s for s in ("qi",) if s in stored]
        if n == "theta_v":
            out += [s for s in ("qi", "qr") if s in stored]
    return tuple(dict.fromkeys(out))


def _f64(a: np.ndarray) -> np.ndarray:
    return np.asarray(a, dtype=np.float64)


def _exact(fine: Mapping[str, np.ndarray], name: str) -> np.ndarray:
    """A field in float64; a near-constant one from its reference and deviation (stored
    before rounding, see :func:`lesprep.canonical.nearconstant.quantized_levels`)."""
    if f"{name}_dev" in fine and f"{name}_ref" in fine:
        return _f64(fine[f"{name}_ref"])[:, None, None] + _f64(fine[f"{name}_dev"])
    return _f64(fine[name])


def _stored(fine: Mapping[str, np.ndarray], name: str) -> np.ndarray:
    """A field as stored (float32 or float64), or its exact float64 form when it is kept
    as reference and deviation."""
    if f"{name}_dev" in fine and f"{name}_ref" in fine:
        return _exact(fine, name)
    return np.asarray(fine[name])


def conserved_fields(
    fine: Mapping[str, np.ndarray],
    names: Sequence[str],
    p: np.ndarray,
    *,
    engine: Engine = "auto",
) -> dict[str, np.ndarray]:
    """The per-slab variables among ``names``, float64, the shape of ``fine["T"]``.

    Parameters
    ----------
    fine
        Canonical fields of one slab, ``(k, ny, nx)`` (those :func:`inputs_of` lists).
    names
        Variables wanted (others are ignored).
    p
        Pressure of the slab, Pa: ``(k, ny, nx)`` or a ``(k,)`` profile.
    engine
        ``"numba"``: one compiled pass over the cells for every wanted variable, with the
        Exner function computed once per cell; ``"numpy"``: the reference, the functions
        of :mod:`lesprep.thermo`; ``"auto"``: numba when available. Both agree to
        round-off.

    Examples
    --------
    >>> f = {n: np.full((1, 2, 2), v) for n, v in (("qv", 0.01), ("qc", 0.001), ("T", 290.0))}
    >>> out = conserved_fields(f, ["qt"], np.array([9e4]))
    >>> float(out["qt"][0, 0, 0])
    0.011
    """
    wanted = [n for n in names if n in PER_SLAB]
    if not wanted:
        return {}
    shape = np.shape(fine["T_dev"] if "T_dev" in fine else fine["T"])
    if resolve_engine(engine) == "numba" and len(shape) == 3:
        # the kernel reads float32 fields as they are (each value converts exactly)
        t, qv, qc = (_stored(fine, n) for n in ("T", "qv", "qc"))
        qi = _stored(fine, "qi") if "qi" in fine else None
        return _compiled(fine, wanted, t, np.asarray(p), qv, qc, qi)
    pp = _f64(p) if np.ndim(p) == 3 else np.broadcast_to(_f64(p)[:, None, None], shape)
    t = _exact(fine, "T")
    qv, qc = _exact(fine, "qv"), _exact(fine, "qc")
    qi = _exact(fine, "qi") if "qi" in fine else None
    out: dict[str, np.ndarray] = {}
    for n in wanted:
        if n == "qt":
            out[n] = thermo.total_water(qv, qc, qi)
        elif n == "theta_l":
            out[n] = thermo.liquid_water_potential_temperature(pp, t, qc)
        elif n == "theta_il":
            out[n] = thermo.liquid_ice_potential_temperature(
                pp, t, qc, np.zeros_like(qc) if qi is None else qi
            )
        elif n == "theta_v":
            cond = qc.copy()
            for s in ("qi", "qr"):
                if s in fine:
                    cond += _exact(fine, s)
            out[n] = thermo.virtual_potential_temperature(pp, t, qv, cond)
    return out


def _compiled(
    fine: Mapping[str, np.ndarray],
    wanted: Sequence[str],
    t: np.ndarray,
    p: np.ndarray,
    qv: np.ndarray,
    qc: np.ndarray,
    qi: np.ndarray | None,
) -> dict[str, np.ndarray]:
    zero = np.zeros((1, 1, 1))
    ice = zero if qi is None else np.ascontiguousarray(qi)
    rain = np.ascontiguousarray(_stored(fine, "qr")) if "qr" in fine else zero
    outs = {n: np.empty(t.shape) for n in wanted}
    dummy = np.empty((1, 1, 1))
    # a pressure profile: the Exner function once per level; 3-D pressure: per cell, from
    # a table of the level's distinct float32 values where it is small (_exner_tables)
    per_level = p.ndim == 1
    p_or_exner = (
        ((np.asarray(p, np.float64) / thermo.P0) ** thermo.KAPPA)[:, None, None]
        if per_level
        else np.ascontiguousarray(p)
    )
    nz = t.shape[0]
    table, lo, width = np.zeros((1, 1)), np.zeros(nz, np.int64), np.zeros(nz, np.int64)
    bits = np.zeros((1, 1, 1), np.int32)
    if not per_level and p_or_exner.dtype == np.float32:
        table, lo, width = _exner_tables(p_or_exner)
        bits = p_or_exner.view(np.int32)
    _nb_conserved(
        np.ascontiguousarray(t),
        p_or_exner,
        per_level,
        table,
        lo,
        width,
        bits,
        np.ascontiguousarray(qv),
        np.ascontiguousarray(qc),
        ice,
        rain,
        qi is not None,
        "qr" in fine,
        outs.get("qt", dummy),
        outs.get("theta_l", dummy),
        outs.get("theta_il", dummy),
        outs.get("theta_v", dummy),
        "qt" in outs,
        "theta_l" in outs,
        "theta_il" in outs,
        "theta_v" in outs,
    )
    return outs


TABLE_MAX = 1 << 16
"""Largest number of distinct float32 pressures of one level that the Exner function is
tabulated for (512 KiB of float64; about 500 Pa of range near 1000 hPa)."""


def _exner_tables(p: np.ndarray) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Per level of a float32 pressure slab ``(k, ny, nx)``: the Exner function
    ``(p / P0) ** KAPPA`` of every float32 value between the level's smallest and largest
    pressure, where that range holds at most :data:`TABLE_MAX` values.

    Positive float32 numbers are ordered like their bit patterns, so a value's table index
    is its bits minus those of the level's smallest value. The table holds exactly the
    values the per-cell computation gives (the same ``pow`` of the same float64 numbers),
    computed once per distinct pressure instead of once per cell.

    Returns
    -------
    tuple
        ``table`` ``(k, width_max)`` float64, ``lo`` ``(k,)`` (bits of each level's
        smallest value) and ``width`` ``(k,)`` (entries of each level's table; 0 where the
        level is left to the per-cell computation: too wide a range, or a value that is
        not a positive finite number).
    """
    bits = np.ascontiguousarray(p, dtype=np.float32).view(np.int32)
    k = bits.shape[0]
    lo = np.empty(k, np.int64)
    hi = np.empty(k, np.int64)
    _nb_level_range(bits, lo, hi)
    ok = (lo > 0) & (hi < 0x7F800000) & (hi - lo + 1 <= TABLE_MAX)
    width = np.where(ok, hi - lo + 1, 0).astype(np.int64)
    size = max(1, int(width.max(initial=0)))
    values = (np.where(ok, lo, 0)[:, None] + np.arange(size)).astype(np.int32).view(np.float32)
    table = np.empty((k, size))
    _nb_exner_table(values, lo, width, table)
    return table, lo, width


if HAVE_NUMBA:

    @njit(parallel=True, cache=True)
    def _nb_level_range(bits, lo, hi):  # pragma: no cover - compiled
        nz, ny, nx = bits.shape
        for k in prange(nz):
            a = np.int64(bits[k, 0, 0])
            b = a
            for j in range(ny):
                for i in range(nx):
                    v = np.int64(bits[k, j, i])
                    a = min(a, v)
                    b = max(b, v)
            lo[k] = a
            hi[k] = b

    @njit(parallel=True, cache=True)
    def _nb_exner_table(values, lo, width, table):  # pragma: no cover - compiled
        """The per-cell expression of _nb_conserved for each tabulated float32 value."""
        for k in prange(lo.size):
            for n in range(width[k]):
                table[k, n] = (np.float64(values[k, n]) / _P0) ** _KAPPA

    _LV_CP = thermo.LV / thermo.CP
    _LS_CP = thermo.LS / thermo.CP
    _P0, _KAPPA, _EPS = thermo.P0, thermo.KAPPA, thermo.EPS

    @njit(parallel=True, cache=True, fastmath=False, error_model="numpy")
    def _nb_conserved(
        t,
        p_or_exner,
        per_level,
        table,
        lo,
        width,
        p_bits,
        qv,
        qc,
        qi,
        qr,
        has_ice,
        has_rain,
        o_qt,
        o_thl,
        o_thil,
        o_thv,
        w_qt,
        w_thl,
        w_thil,
        w_thv,
    ):  # pragma: no cover - compiled
        nz, ny, nx = t.shape
        for kj in prange(nz * ny):
            k = kj // ny
            j = kj - k * ny
            # the Exner function of the row first (a gather or pow: scalar), then the
            # formulas in a loop of their own, whose divisions LLVM can vectorise
            exner = np.empty(nx)
            for i in range(nx):
                if per_level:
                    exner[i] = p_or_exner[k, 0, 0]
                elif width[k] > 0:  # the level's table: the same pow, computed once
                    exner[i] = table[k, np.int64(p_bits[k, j, i]) - lo[k]]
                else:
                    exner[i] = (np.float64(p_or_exner[k, j, i]) / _P0) ** _KAPPA
            # one loop per output, without branches inside (ice and rain are 0.0 when
            # absent, as in the formulas' plain form)
            if w_qt:
                for i in range(nx):
                    ri = np.float64(qi[k, j, i]) if has_ice else 0.0
                    o_qt[k, j, i] = np.float64(qv[k, j, i]) + np.float64(qc[k, j, i]) + ri
            if w_thl:
                for i in range(nx):
                    tk = np.float64(t[k, j, i])
                    o_thl[k, j, i] = (tk - _LV_CP * np.float64(qc[k, j, i])) / exner[i]
            if w_thil:
                for i in range(nx):
                    tk = np.float64(t[k, j, i])
                    rc = np.float64(qc[k, j, i])
                    ri = np.float64(qi[k, j, i]) if has_ice else 0.0
                    o_thil[k, j, i] = (tk - (_LV_CP * rc + _LS_CP * ri)) / exner[i]
            if w_thv:
                for i in range(nx):
                    tk = np.float64(t[k, j, i])
                    rv = np.float64(qv[k, j, i])
                    ri = np.float64(qi[k, j, i]) if has_ice else 0.0
                    cond = np.float64(qc[k, j, i]) + ri
                    cond = cond + (np.float64(qr[k, j, i]) if has_rain else 0.0)
                    o_thv[k, j, i] = tk / exner[i] * (1.0 + rv / _EPS) / (1.0 + rv + cond)
