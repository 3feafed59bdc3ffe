"""Synthetic demo LES archives (invented data, not a real simulation).

The generator builds physically consistent, but entirely made-up, raw archives in two
invented "model flavours" so that the ingest stage of lesprep has real work to do:

* a horizontally uniform base state -- liquid-water potential temperature ``theta_l(z)``
  and total water ``qt(z)`` made of well-mixed and linear layers joined by smooth steps
  (``tanh``; the step thickness is its 10-90 % depth), a surface pressure of 1015 hPa and
  a reference pressure from hydrostatic balance ``dp/dz = -g rho`` with
  :func:`lesprep.thermo.air_density` (steady-state profile, vapour-only density);
* turbulence: doubly periodic Gaussian fields with a von Karman / Kolmogorov
  ``k**(-5/3)`` horizontal spectrum (:mod:`lesprep.demo.spectral`) times vertical sine modes
  of each layer, so ``w`` vanishes at the surface, the top and every layer boundary;
  moisture and ``theta_l`` anomalies are correlated with ``w`` (moist, warm updrafts);
* organised structures: inversion undulations above updrafts (all regimes), a cellular
  pattern (three plane waves 120 degrees apart, i.e. hexagons of 1-2 km wavelength,
  broken deck) and narrow Gaussian plumes with a life cycle (cumulus);
* cloud by saturation adjustment (:func:`lesprep.thermo.saturation_adjustment`) of
  ``theta_l``, ``qt`` and pressure -- cloud water is never invented separately;
* a spin-up: all perturbation amplitudes grow like
  ``a0 + (1 - a0) (1 - exp(-(t / tau)**2))`` with ``a0 = 0.05`` and ``tau = 30 min``
  (98 % after 1 h), and the lower layer starts 2 g/kg drier than its steady state, the
  deficit decaying like ``exp(-(t / tau)**2)``; the earliest outputs therefore have
  little or no cloud and the statistics are steady after about 1 h.

Everything is deterministic: a spec and a time index give bit-identical fields, every
time step is computed on its own (nothing carried between steps), so large benchmark
sizes are generated and written one output time at a time.

Conventions
-----------
* Heights are above the surface; ``z_faces[0] = 0`` and ``z_faces[-1] = ztop``; cell
  centres are face midpoints. Flavour alpha uses uniform spacing ``ztop / nz``, flavour
  beta a smoothly stretched grid (spacing grows 4-fold from the bottom to the top).
* ``w`` is built on cell faces (exactly 0 at the surface and the top face); the
  centred ``w`` is the midpoint average of the two faces of a cell, and that centred
  ``w`` is the one anomalies are correlated with.
* Flavour alpha's 3-D pressure is the reference profile plus a Bernoulli-like dynamic
  perturbation ``-0.25 rho_ref (w**2 - <w**2>)`` (``<>``: horizontal mean of the level),
  a few Pa. Flavour beta uses the reference profile, rounded to float32 exactly as
  written to ``pref.nc``, as the 3-D pressure, so temperature recovered from the
  written ``theta`` and ``pref`` is consistent.
* Model time ``t`` counts from the start of the run. Alpha outputs at
  ``t = i * interval_s``; beta at ``t = 900 s + i * interval_s``, written as
  "hours since 2031-06-01 00:00:00" (the invented start of the run).
* Horizontal positions are cell centres ``(i + 0.5) * dx``; ``dy = dx``.
"""

from __future__ import annotations

import functools
import itertools
import math
import zlib
from dataclasses import dataclass
from typing import Any

import numpy as np
from numpy.typing import NDArray

from lesprep import thermo
from lesprep.demo.cases import (
    _REGIMES,
    DECORRELATION_S,
    DYNAMIC_PRESSURE_FACTOR,
    SPINUP_FLOOR,
    SPINUP_TAU_S,
    SURFACE_PRESSURE,
    DemoCase,
    _Regime,
)
from lesprep.demo.spectral import evolving_field
from lesprep.errors import InputError

_TANH_10_90 = 2.0 * math.atanh(0.8)  # 10-90 % depth of tanh(z / w) is this times w


# --------------------------------------------------------------------------- grid


@dataclass(frozen=True)
class Grid:
    """Vertical grid of a demo case: face and centre heights (m)."""

    z_faces: NDArray[np.float64]
    z: NDArray[np.float64]
    x: NDArray[np.float64]
    y: NDArray[np.float64]


def _stretched_faces(nz: int, ztop: float) -> NDArray[np.float64]:
    """Faces with spacing growing smoothly (smoothstep) by a factor 4 from bottom to top."""
    xi = np.linspace(0.0, 1.0, nz)
    spacing = 1.0 + 3.0 * xi * xi * (3.0 - 2.0 * xi)
    faces = np.concatenate([[0.0], np.cumsum(spacing)])
    faces *= ztop / faces[-1]
    faces[-1] = ztop
    return faces


@functools.lru_cache(maxsize=32)
def grid_of(spec: DemoCase) -> Grid:
    """The vertical grid of a case: uniform (flavour alpha) or stretched (flavour beta)."""
    if spec.flavour == "alpha":
        faces = np.linspace(0.0, spec.ztop, spec.nz + 1)
    else:
        faces = _stretched_faces(spec.nz, spec.ztop)
    centres = 0.5 * (faces[:-1] + faces[1:])
    x = (np.arange(spec.nx) + 0.5) * spec.dx
    y = (np.arange(spec.ny) + 0.5) * spec.dx
    for a in (faces, centres, x, y):
        a.setflags(write=False)
    return Grid(z_faces=faces, z=centres, x=x, y=y)


# --------------------------------------------------------------------------- base state


def _step(z: NDArray[np.float64], height: Any, thickness: float) -> NDArray[np.float64]:
    """Smooth 0 -> 1 step at ``height`` whose 10-90 % depth is ``thickness``."""
    return 0.5 * (1.0 + np.tanh((z - height) * (_TANH_10_90 / thickness)))


def _layered(
    z: NDArray[np.float64],
    reg: _Regime,
    first: float,
    layers: tuple[tuple[float, float], ...],
    shift: Any = 0.0,
) -> NDArray[np.float64]:
    """Well-mixed layer 0 joined smoothly to linear layers above each interface.

    ``shift`` displaces interface 0 (broadcast against ``z``); the linear profiles above
    are anchored at the undisplaced heights.
    """
    value = np.full(np.broadcast_shapes(np.shape(z), np.shape(shift)), first)
    anchor = first
    for j, ((height, thick), (jump, slope)) in enumerate(zip(reg.interfaces, layers, strict=True)):
        anchor = anchor + jump
        above = anchor + slope * (z - height)
        s = _step(z, height + (shift if j == 0 else 0.0), thick)
        value = value * (1.0 - s) + above * s
        next_height = reg.interfaces[j + 1][0] if j + 1 < len(reg.interfaces) else None
        if next_height is not None:
            anchor = anchor + slope * (next_height - height)
    return value


def _per_layer(z: NDArray[np.float64], reg: _Regime, values: tuple[float, ...]) -> NDArray:
    """Piecewise-constant layer values blended with the interface steps."""
    out = np.full(np.shape(z), values[0])
    for (height, thick), v in zip(reg.interfaces, values[1:], strict=True):
        s = _step(z, height, thick)
        out = out * (1.0 - s) + v * s
    return out


def _spinup_deficit(reg: _Regime, t: float) -> float:
    return reg.spinup_dq * math.exp(-((t / SPINUP_TAU_S) ** 2))


def _spinup_amplitude(t: float) -> float:
    return SPINUP_FLOOR + (1.0 - SPINUP_FLOOR) * (1.0 - math.exp(-((t / SPINUP_TAU_S) ** 2)))


def _theta_l(z: NDArray, reg: _Regime, shift: Any = 0.0) -> NDArray[np.float64]:
    return _layered(z, reg, reg.theta_ml, reg.theta_layers, shift)


def _qt(z: NDArray, reg: _Regime, qt_ml: float, t: float, shift: Any = 0.0) -> NDArray:
    qt = _layered(z, reg, qt_ml, reg.qt_layers, shift)
    deficit = _spinup_deficit(reg, t)
    if deficit > 0.0:
        height, thick = reg.interfaces[reg.spinup_below]
        sb = shift if reg.spinup_below == 0 else 0.0
        qt = qt - deficit * (1.0 - _step(z, height + sb, thick))
    return qt


def _mixed_layer_qt(reg: _Regime) -> float:
    """Mixed-layer total water that puts the steady-state cloud base at ``reg.z_base``.

    Pressure at cloud base comes from the closed-form hydrostatic profile of a layer of
    constant virtual potential temperature (``p**kappa`` linear in height).
    """
    qt = 0.01
    for _ in range(4):
        theta_v = thermo.virtual_temperature(reg.theta_ml, qt)
        pk = SURFACE_PRESSURE**thermo.KAPPA - thermo.KAPPA * thermo.G * thermo.P0**thermo.KAPPA * (
            reg.z_base / (thermo.RD * theta_v)
        )
        p_base = pk ** (1.0 / thermo.KAPPA)
        t_base = reg.theta_ml * thermo.exner(p_base)
        qt = float(thermo.saturation_mixing_ratio(p_base, t_base))
    return qt


@dataclass(frozen=True)
class _Reference:
    qt_ml: float
    p: NDArray[np.float64]  # at centres, Pa
    rho: NDArray[np.float64]  # at centres, kg m-3


def _hydrostatic(heights: NDArray[np.float64], reg: _Regime, qt_ml: float) -> NDArray[np.float64]:
    """Integrate ``dp/dz = -g rho`` of the steady base state from the surface.

    Trapezoidal rule on a grid 8 times finer than ``heights`` (plus z = 0), iterated to a
    fixed point in ``p`` (the density depends on pressure).
    """
    knots = np.unique(np.concatenate([[0.0], heights]))
    fine = np.concatenate(
        [np.linspace(a, b, 9)[:-1] for a, b in itertools.pairwise(knots)] + [knots[-1:]]
    )
    thl = _theta_l(fine, reg)
    qt = _qt(fine, reg, qt_ml, math.inf)
    p = SURFACE_PRESSURE * np.exp(-fine / 8000.0)
    for _ in range(200):
        temp, qv, _qc = thermo.saturation_adjustment(thl, qt, p)
        rho = thermo.air_density(p, temp, qv)
        dz = np.diff(fine)
        new = SURFACE_PRESSURE - thermo.G * np.concatenate(
            [[0.0], np.cumsum(0.5 * (rho[1:] + rho[:-1]) * dz)]
        )
        change = float(np.max(np.abs(new - p)))
        p = new
        if change < 1e-7:
            break
    return np.interp(heights, fine, p)


@functools.lru_cache(maxsize=32)
def reference_state(spec: DemoCase) -> _Reference:
    """The steady base state of a case: profiles and hydrostatic reference pressure."""
    reg = _REGIMES[spec.kind]
    grid = grid_of(spec)
    qt_ml = _mixed_layer_qt(reg)
    p = _hydrostatic(grid.z, reg, qt_ml)
    if spec.flavour == "beta":
        p = p.astype(np.float32).astype(np.float64)  # exactly the values in pref.nc
    temp, qv, _qc = thermo.saturation_adjustment(
        _theta_l(grid.z, reg), _qt(grid.z, reg, qt_ml, math.inf), p
    )
    rho = thermo.air_density(p, temp, qv)
    p.setflags(write=False)
    rho.setflags(write=False)
    return _Reference(qt_ml=qt_ml, p=p, rho=rho)


# --------------------------------------------------------------------------- perturbations


def _stream(spec: DemoCase, *ids: int) -> tuple[int, ...]:
    return (spec.seed, zlib.crc32(spec.case.encode()), *ids)


def _field(spec: DemoCase, t: float, reg: _Regime, depth: float, *ids: int) -> NDArray:
    """Unit-variance turbulent field whose spectrum peaks near wavelength 1.5 * depth."""
    return evolving_field(
        _stream(spec, *ids),
        nx=spec.nx,
        ny=spec.ny,
        dx=spec.dx,
        dy=spec.dx,
        t=t,
        velocity=reg.velocity,
        tau_large=DECORRELATION_S,
        k_peak=1.0 / (1.55 * 1.5 * depth),
        k_cut=1.0 / (3.0 * spec.dx),
    )


def _layer_bounds(reg: _Regime, ztop: float) -> list[tuple[float, float]]:
    heights = [0.0] + [h for h, _ in reg.interfaces] + [ztop]
    return list(itertools.pairwise(heights))


def _normalise_levels(a: NDArray[np.float64]) -> NDArray[np.float64]:
    """Scale each level (axis 0) to zero mean and unit population std (0 where flat)."""
    a -= a.mean(axis=(1, 2), keepdims=True)
    std = a.std(axis=(1, 2), keepdims=True)
    np.divide(a, std, out=a, where=std > 1e-300)
    a[np.broadcast_to(std <= 1e-300, a.shape)] = 0.0
    return a


def _turbulence(
    spec: DemoCase, reg: _Regime, grid: Grid, t: float
) -> tuple[NDArray, NDArray, NDArray, NDArray]:
    """Steady-state turbulence of time ``t`` (before the spin-up factor).

    Returns w on faces (sum over layers of ``sin`` modes times k^-5/3 fields), the
    unit-variance lead field of the lowest layer (its deepest mode, used for inversion
    undulations) and the qt and theta_l anomalies at centres, each
    ``sigma(z) * (rho * w_hat + sqrt(1 - rho**2) * noise)`` with ``w_hat`` the centred w
    scaled to unit variance per level and ``noise`` an independent unit-variance field.
    """
    nzf = grid.z_faces.size
    wf = np.zeros((nzf, spec.ny, spec.nx))
    lead = np.zeros((spec.ny, spec.nx))
    for layer, ((z0, z1), sigma, modes) in enumerate(
        zip(_layer_bounds(reg, spec.ztop), reg.w_sigma, reg.w_modes, strict=True)
    ):
        inside = (grid.z_faces > z0) & (grid.z_faces < z1)
        weights = np.array([1.0 / m for m in range(1, modes + 1)])
        weights /= np.sqrt(np.sum(weights**2))
        for m in range(1, modes + 1):
            h = _field(spec, t, reg, (z1 - z0) / m, 1, layer, m)
            if layer == 0 and m == 1:
                lead = h
            shape = np.where(inside, np.sin(m * np.pi * (grid.z_faces - z0) / (z1 - z0)), 0.0)
            wf += (sigma * weights[m - 1] * shape)[:, None, None] * h[None]
    wf[0] = 0.0
    wf[-1] = 0.0
    w_hat = _normalise_levels(0.5 * (wf[:-1] + wf[1:]))
    depth = reg.interfaces[0][0]
    scalars = []
    for kind_id, rho, sigmas in ((2, reg.rho_q, reg.q_sigma), (3, reg.rho_th, reg.th_sigma)):
        s = np.zeros((grid.z.size, spec.ny, spec.nx))
        for m, c in enumerate((1.0, 0.6, 0.4)):
            h = _field(spec, t, reg, depth / (m + 1), kind_id, m)
            s += (c * np.cos(m * np.pi * grid.z / depth))[:, None, None] * h[None]
        s = _normalise_levels(s)
        s *= math.sqrt(1.0 - rho**2)
        s += rho * w_hat
        s *= _per_layer(grid.z, reg, sigmas)[:, None, None]
        scalars.append(s)
    return wf, lead, scalars[0], scalars[1]


def _hexagon_wavevectors(spec: DemoCase, wavelength: float) -> list[tuple[float, float]]:
    """Three periodic-domain wavevectors summing to zero, about 120 degrees apart."""
    lx, ly = spec.nx * spec.dx, spec.ny * spec.dx
    n = max(2, 2 * round(lx / (2.0 * wavelength)))
    m = max(1, round(0.5 * n * math.sqrt(3.0) * ly / lx))
    return [(n / lx, 0.0), (-0.5 * n / lx, m / ly), (-0.5 * n / lx, -m / ly)]


def _cell_pattern(spec: DemoCase, reg: _Regime, grid: Grid, t: float) -> NDArray:
    """Unit-variance cellular pattern: broad cloudy updrafts around narrow clear holes."""
    assert reg.cells is not None
    rng = np.random.default_rng(list(_stream(spec, 7)))
    phase0 = rng.uniform(0.0, 2.0 * np.pi, size=2)
    drift = rng.choice([-1.0, 1.0], size=2) * rng.uniform(0.5, 1.0, size=2) * 2 * np.pi / 14400
    phases = phase0 + drift * t
    phases = [phases[0], phases[1], -(phases[0] + phases[1])]
    xs = grid.x[None, :] - reg.velocity[0] * t
    ys = grid.y[:, None] - reg.velocity[1] * t
    c = np.zeros((spec.ny, spec.nx))
    for (kx, ky), ph in zip(_hexagon_wavevectors(spec, reg.cells.wavelength), phases, strict=True):
        c += np.cos(2.0 * np.pi * (kx * xs + ky * ys) + ph)
    pattern = -c / math.sqrt(1.5)
    lam = reg.cells.wavelength
    pattern *= 1.0 + 0.3 * _field(spec, t, reg, 2.0 * lam / 1.5, 8, 0)
    pattern += 0.4 * _field(spec, t, reg, lam / 1.5, 8, 1)
    pattern -= pattern.mean()
    return pattern / pattern.std()


@dataclass(frozen=True)
class _Population:
    birth: NDArray[np.float64]
    life: NDArray[np.float64]
    x0: NDArray[np.float64]
    y0: NDArray[np.float64]
    radius: NDArray[np.float64]
    w_peak: NDArray[np.float64]
    top: NDArray[np.float64]


@functools.lru_cache(maxsize=32)
def _plume_population(spec: DemoCase) -> _Population:
    reg = _REGIMES[spec.kind]
    pl = reg.plumes
    assert pl is not None
    rng = np.random.default_rng(list(_stream(spec, 9)))
    times = spec.output_times_s()
    start, end = -pl.life_s[1], float(times[-1]) + 1.0
    area_km2 = spec.nx * spec.ny * spec.dx**2 / 1e6
    mean_life = 0.5 * (pl.life_s[0] + pl.life_s[1])
    n = int(rng.poisson(pl.density_per_km2 * area_km2 * (end - start) / mean_life))
    base = reg.z_base
    top_max = min(pl.top_max, spec.ztop - 200.0)
    return _Population(
        birth=rng.uniform(start, end, n),
        life=rng.uniform(*pl.life_s, n),
        x0=rng.uniform(0.0, spec.nx * spec.dx, n),
        y0=rng.uniform(0.0, spec.ny * spec.dx, n),
        radius=rng.uniform(*pl.radius, n),
        w_peak=rng.uniform(*pl.w_peak, n),
        top=base + 300.0 + (top_max - base - 300.0) * rng.beta(1.3, 1.7, n),
    )


def _window(centre: int, half: int, n: int) -> tuple[NDArray[np.intp], Any]:
    """Periodic indices ``centre - half .. centre + half`` and an indexer for them.

    The indexer is a slice when the window does not wrap (a view, fast), else the index
    array itself. ``2 * half + 1 <= n`` keeps the indices unique.
    """
    lo, hi = centre - half, centre + half + 1
    if 0 <= lo and hi <= n:
        return np.arange(lo, hi), slice(lo, hi)
    idx = np.arange(lo, hi) % n
    return idx, idx


def _add_plumes(
    spec: DemoCase,
    reg: _Regime,
    grid: Grid,
    t: float,
    amp: float,
    qt_ml: float,
    wf: NDArray,
    qt: NDArray,
    thl: NDArray,
) -> None:
    """Add the active plumes of time ``t`` to ``wf``, ``qt`` and ``thl`` in place.

    Each plume is a Gaussian ``exp(-(r / R)**2)`` in the horizontal. Below the mixed-layer
    top it carries a constant warm, moist excess; above, a mixture of source air and
    environment whose source fraction decays with height (entrainment) and tapers to zero
    at the plume top. ``w`` follows ``sin(pi (z / top) ** a)`` (peak at 0.6 top). The
    domain mean of the plume ``w`` is removed level by level (compensating subsidence).
    """
    pl = reg.plumes
    assert pl is not None
    pop = _plume_population(spec)
    age = t - pop.birth
    active = np.flatnonzero((age >= 0.0) & (age < pop.life))
    lx, ly = spec.nx * spec.dx, spec.ny * spec.dx
    zml = reg.interfaces[0][0]
    env_q = _qt(grid.z, reg, qt_ml, t)
    env_th = _theta_l(grid.z, reg)
    src_q = qt_ml - _spinup_deficit(reg, t) + pl.q_excess
    src_th = reg.theta_ml + pl.th_excess
    expo = math.log(0.5) / math.log(0.6)
    mean_w = np.zeros(grid.z_faces.size)
    for i in active:
        life_factor = amp * math.sqrt(math.sin(math.pi * age[i] / pop.life[i]))
        xc = (pop.x0[i] + reg.velocity[0] * age[i]) % lx
        yc = (pop.y0[i] + reg.velocity[1] * age[i]) % ly
        r = pop.radius[i]
        hx = min(math.ceil(3.0 * r / spec.dx), (spec.nx - 1) // 2)
        hy = min(math.ceil(3.0 * r / spec.dx), (spec.ny - 1) // 2)
        ix, sx = _window(int(xc // spec.dx), hx, spec.nx)
        iy, sy = _window(int(yc // spec.dx), hy, spec.ny)
        if not isinstance(sx, slice) and not isinstance(sy, slice):
            sy, sx = sy[:, None], sx[None, :]  # outer (not pointwise) fancy indexing
        ddx = (grid.x[ix] - xc + 0.5 * lx) % lx - 0.5 * lx
        ddy = (grid.y[iy] - yc + 0.5 * ly) % ly - 0.5 * ly
        g = np.exp(-(ddx[None, :] ** 2 + ddy[:, None] ** 2) / r**2)
        top = pop.top[i]
        nf = int(np.searchsorted(grid.z_faces, top))  # faces 1 .. nf-1 lie below the top
        shape_w = np.sin(np.pi * (grid.z_faces[1:nf] / top) ** expo)
        patch = (life_factor * pop.w_peak[i] * shape_w)[:, None, None] * g[None]
        wf[1:nf, sy, sx] += patch
        mean_w[1:nf] += patch.sum(axis=(1, 2)) / (spec.nx * spec.ny)
        nc = int(np.searchsorted(grid.z, top))
        zc = grid.z[:nc]
        above = np.clip((zc - zml) / (top - zml), 0.0, 1.0)
        mix = np.exp(-np.maximum(zc - zml, 0.0) / pl.entrainment_scale) * (1.0 - above**4)
        below = zc < zml
        a_q = np.where(below, pl.q_excess, mix * (src_q - env_q[:nc]))
        a_th = np.where(below, pl.th_excess, mix * (src_th - env_th[:nc]))
        qt[:nc, sy, sx] += (life_factor * a_q)[:, None, None] * g[None]
        thl[:nc, sy, sx] += (life_factor * a_th)[:, None, None] * g[None]
    wf -= mean_w[:, None, None]


# --------------------------------------------------------------------------- the state


def _check_index(spec: DemoCase, time_index: int) -> int:
    if isinstance(time_index, bool) or not isinstance(time_index, (int, np.integer)):
        raise InputError(
            f"time index {time_index!r} is not an integer; expected 0..{spec.ntimes - 1}",
            case=spec.case,
        )
    if not 0 <= int(time_index) < spec.ntimes:
        raise InputError(
            f"time index {time_index} is out of range; expected 0..{spec.ntimes - 1}",
            case=spec.case,
        )
    return int(time_index)


def _adjust(thl: NDArray, qt: NDArray, p: NDArray) -> tuple[NDArray, NDArray, NDArray]:
    """:func:`lesprep.thermo.saturation_adjustment`, applied only where cloud is possible.

    Where ``qt <= qs(p, Pi * theta_l)`` no cloud can form (``qs`` grows with ``T`` and
    ``T >= Pi * theta_l``), and the adjustment returns ``T = Pi * theta_l``, ``qv = qt``,
    ``qc = 0`` exactly; those points are filled directly, the others go through the
    adjustment. The result is identical to adjusting every point, only faster.
    Works in blocks of levels to bound the temporaries.
    """
    temp = np.empty_like(qt)
    qv = np.empty_like(qt)
    qc = np.zeros_like(qt)
    step = max(1, 2_000_000 // max(1, qt[0].size))
    for k0 in range(0, qt.shape[0], step):
        sl = slice(k0, k0 + step)
        tl = thl[sl] * thermo.exner(p[sl])
        maybe = qt[sl] > thermo.saturation_mixing_ratio(p[sl], tl)
        temp[sl] = tl
        qv[sl] = qt[sl]
        if maybe.any():
            t_m, qv_m, qc_m = thermo.saturation_adjustment(
                thl[sl][maybe], qt[sl][maybe], p[sl][maybe]
            )
            temp[sl][maybe] = t_m
            qv[sl][maybe] = qv_m
            qc[sl][maybe] = qc_m
    return temp, qv, qc


def state_at(spec: DemoCase, time_index: int) -> dict[str, Any]:
    """All fields of one output time, including ``w_faces`` and the time ``t`` (s)."""
    i = _check_index(spec, time_index)
    reg = _REGIMES[spec.kind]
    grid = grid_of(spec)
    ref = reference_state(spec)
    t = float(spec.output_times_s()[i])
    amp = _spinup_amplitude(t)

    wf, lead, dq, dth = _turbulence(spec, reg, grid, t)
    wf *= amp
    shift = amp * reg.zi_sigma * lead
    z3 = grid.z[:, None, None]
    if reg.cells is not None:
        cell = reg.cells
        pattern = _cell_pattern(spec, reg, grid, t)
        z0 = reg.interfaces[0][0]
        inside = (grid.z_faces > 0.0) & (grid.z_faces < z0)
        shape = np.where(inside, np.sin(np.pi * grid.z_faces / z0), 0.0)
        wf += (amp * cell.w_amp * shape)[:, None, None] * pattern[None]
        below = 1.0 - _step(grid.z, z0, reg.interfaces[0][1])
        dq += (amp * cell.q_amp * below)[:, None, None] * pattern[None]
        dth += (amp * cell.th_amp * below)[:, None, None] * pattern[None]
        shift = shift + amp * cell.zi_amp * pattern
    thl = _theta_l(z3, reg, shift[None])
    thl += amp * dth
    del dth
    qt = _qt(z3, reg, ref.qt_ml, t, shift[None])
    qt += amp * dq
    del dq
    if reg.plumes is not None:
        _add_plumes(spec, reg, grid, t, amp, ref.qt_ml, wf, qt, thl)
    np.maximum(qt, 1e-6, out=qt)
    wf[0] = 0.0
    wf[-1] = 0.0
    w = 0.5 * (wf[:-1] + wf[1:])

    p = np.empty_like(qt)
    p[...] = ref.p[:, None, None]
    if spec.flavour == "alpha":
        w2 = w * w
        w2 -= w2.mean(axis=(1, 2), keepdims=True)
        w2 *= (-DYNAMIC_PRESSURE_FACTOR * ref.rho)[:, None, None]
        p += w2
        del w2

    temp, qv, qc = _adjust(thl, qt, p)
    del thl
    return {
        "qc": qc,
        "qv": qv,
        "T": temp,
        "p": p,
        "w": w,
        "w_faces": wf,
        "z": grid.z.copy(),
        "z_faces": grid.z_faces.copy(),
        "t": t,
    }


def demo_fields(spec: DemoCase, time_index: int) -> dict[str, NDArray[np.float64]]:
    """The canonical truth of one output time of a demo case.

    Parameters
    ----------
    spec
        The case.
    time_index
        Output time index, ``0 <= time_index < spec.ntimes``.

    Returns
    -------
    dict
        float64 arrays with dims ``(z, y, x)``: ``qc`` and ``qv`` (mixing ratios,
        kg kg-1), ``T`` (K), ``p`` (Pa), ``w`` (m s-1, at cell centres); and the 1-D
        heights ``z`` (cell centres, m) and ``z_faces`` (``nz + 1`` faces, m).

    Raises
    ------
    InputError
        If ``time_index`` is out of range.

    Examples
    --------
    >>> from lesprep.demo import demo_case
    >>> f = demo_fields(demo_case("sc-ostra-01").with_size(nx=16, ny=16), 7)
    >>> f["qc"].shape, f["z_faces"].shape
    ((50, 16, 16), (51,))
    """
    state = state_at(spec, time_index)
    return {key: state[key] for key in ("qc", "qv", "T", "p", "w", "z", "z_faces")}
