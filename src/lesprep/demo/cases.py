"""The invented demo cases: regimes, grid sizes, flavours and the case catalogue.

Every case is made up (invented names, invented sites); the data they lead to are
synthetic and exist only to exercise the workflow.
"""

from __future__ import annotations

import dataclasses
import math
import re
from dataclasses import dataclass
from typing import Any, Literal

import numpy as np
from numpy.typing import NDArray

from lesprep.errors import ConfigError, InputError

GENERATOR_VERSION = "1"
"""Version of the generated data; bump when the fields change."""

SOURCE = "lesprep synthetic demo (not a real simulation)"
SURFACE_PRESSURE = 101500.0
"""Surface pressure of every demo case, Pa."""
SPINUP_TAU_S = 1800.0
"""Time scale ``tau`` of the spin-up (Gaussian in time, see the module docstring), s."""
SPINUP_FLOOR = 0.05
"""Perturbation amplitude at t = 0, as a fraction of the steady-state amplitude."""
BETA_FIRST_OUTPUT_S = 900.0
"""First output time of flavour beta, s after the start of the run."""
BETA_TIME_UNITS = "hours since 2031-06-01 00:00:00"
DECORRELATION_S = 3600.0
"""Decorrelation time of the largest turbulent eddies, s."""
DYNAMIC_PRESSURE_FACTOR = 0.25

Kind = Literal["overcast", "broken", "cumulus"]
Flavour = Literal["alpha", "beta"]
_KINDS = ("overcast", "broken", "cumulus")
_FLAVOURS = ("alpha", "beta")
_CASE_ID = re.compile(r"[A-Za-z0-9][A-Za-z0-9._-]*")


# --------------------------------------------------------------------------- regimes


@dataclass(frozen=True)
class _Cells:
    """Cellular pattern of the broken deck (hexagons from three plane waves)."""

    wavelength: float = 1500.0  # m
    w_amp: float = 0.55  # m s-1, std of the cellular w at mid-layer
    q_amp: float = 0.45e-3  # kg kg-1
    th_amp: float = 0.15  # K
    zi_amp: float = 20.0  # m, inversion lifted above the cloudy updrafts


@dataclass(frozen=True)
class _Plumes:
    """Gaussian cumulus plumes with a life cycle."""

    density_per_km2: float = 1.5  # mean number of active plumes per km2
    radius: tuple[float, float] = (100.0, 300.0)  # m, e-folding radius
    w_peak: tuple[float, float] = (2.0, 5.0)  # m s-1
    life_s: tuple[float, float] = (1200.0, 2700.0)
    top_max: float = 2500.0  # m
    q_excess: float = 0.6e-3  # kg kg-1, source-air excess over the mixed layer
    th_excess: float = 0.3  # K
    entrainment_scale: float = 3000.0  # m, e-folding of undiluted air above the layer top


@dataclass(frozen=True)
class _Regime:
    """Base-state profile and perturbation parameters of one kind of case.

    Layer 0 is well mixed (``theta_ml``, ``qt_ml``); layer ``j + 1`` starts at interface
    ``j`` with a jump and a linear slope. ``w_sigma`` etc. give one value per layer.
    """

    theta_ml: float  # K
    z_base: float  # m, cloud base of the steady state (sets qt_ml)
    interfaces: tuple[tuple[float, float], ...]  # (height m, 10-90 % thickness m)
    theta_layers: tuple[tuple[float, float], ...]  # (jump K, slope K m-1)
    qt_layers: tuple[tuple[float, float], ...]  # (jump kg kg-1, slope kg kg-1 m-1)
    spinup_below: int  # index of the interface below which the spin-up deficit applies
    w_sigma: tuple[float, ...]  # m s-1, peak std of turbulent w per layer
    w_modes: tuple[int, ...]
    q_sigma: tuple[float, ...]  # kg kg-1
    th_sigma: tuple[float, ...]  # K
    rho_q: float = 0.7  # correlation of qt anomaly with w
    rho_th: float = 0.5  # correlation of theta_l anomaly with w
    zi_sigma: float = 15.0  # m, undulation of interface 0
    velocity: tuple[float, float] = (2.0, -1.0)  # m s-1, translation of all structures
    spinup_dq: float = 2.0e-3  # kg kg-1
    cells: _Cells | None = None
    plumes: _Plumes | None = None

    @property
    def min_top(self) -> float:
        """Lowest domain top that holds the profile (last interface + 300 m)."""
        z, thick = self.interfaces[-1]
        return z + thick + 300.0


_REGIMES: dict[str, _Regime] = {
    "overcast": _Regime(
        theta_ml=289.0,
        z_base=720.0,
        interfaces=((1000.0, 50.0),),
        theta_layers=((8.0, 6.0e-3),),
        qt_layers=((-4.0e-3, -0.5e-6),),
        spinup_below=0,
        w_sigma=(0.6, 0.06),
        w_modes=(3, 1),
        q_sigma=(0.25e-3, 0.08e-3),
        th_sigma=(0.1, 0.05),
    ),
    "broken": _Regime(
        theta_ml=290.0,
        z_base=960.0,
        interfaces=((1100.0, 50.0),),
        theta_layers=((7.0, 6.0e-3),),
        qt_layers=((-3.5e-3, -0.5e-6),),
        spinup_below=0,
        w_sigma=(0.35, 0.06),
        w_modes=(3, 1),
        q_sigma=(0.2e-3, 0.08e-3),
        th_sigma=(0.1, 0.05),
        velocity=(1.5, 1.0),
        cells=_Cells(),
    ),
    "cumulus": _Regime(
        theta_ml=298.0,
        z_base=700.0,
        interfaces=((600.0, 50.0), (2300.0, 200.0)),
        theta_layers=((0.0, 4.0e-3), (5.0, 5.0e-3)),
        qt_layers=((0.0, -5.0e-6), (-3.0e-3, -0.5e-6)),
        spinup_below=1,
        w_sigma=(0.5, 0.25, 0.06),
        w_modes=(3, 2, 1),
        q_sigma=(0.25e-3, 0.3e-3, 0.1e-3),
        th_sigma=(0.12, 0.1, 0.05),
        velocity=(-3.0, 1.0),
        plumes=_Plumes(),
    ),
}


# --------------------------------------------------------------------------- the spec


@dataclass(frozen=True, kw_only=True)
class DemoCase:
    """Specification of one synthetic demo case.

    Parameters
    ----------
    case
        Invented case id, also the directory name of the archive.
    regime
        Regime tag recorded for the case sheet ("stratocumulus", "cumulus").
    kind
        Which structure to build: "overcast" (near-overcast stratocumulus deck),
        "broken" (cellular, broken deck) or "cumulus" (shallow cumulus plumes).
    flavour
        Raw archive layout, "alpha" or "beta" (see :func:`write_demo_case`).
    nx, ny
        Horizontal grid points.
    nz
        Vertical levels (cell centres).
    dx
        Horizontal spacing in m (``dy = dx``).
    ztop
        Height of the top face in m.
    ntimes
        Number of output times.
    interval_s
        Output interval in s.
    seed
        Seed of the random fields.

    Examples
    --------
    >>> spec = demo_case("sc-ostra-01").with_size(nx=32, ny=32)
    >>> spec.nx, spec.case
    (32, 'sc-ostra-01')
    """

    case: str
    regime: str
    kind: Kind
    flavour: Flavour
    nx: int = 60
    ny: int = 60
    nz: int = 48
    dx: float = 50.0
    ztop: float = 2500.0
    ntimes: int = 8
    interval_s: float = 1800.0
    seed: int = 0

    def __post_init__(self) -> None:
        def bad(message: str, hint: str | None = None) -> ConfigError:
            return ConfigError(message, case=self.case, hint=hint)

        if not isinstance(self.case, str) or not _CASE_ID.fullmatch(self.case):
            raise bad(
                f"case id {self.case!r} is not usable as a directory name; expected "
                "letters, digits, '.', '_' or '-'"
            )
        if not self.regime:
            raise bad("regime tag is empty; expected e.g. 'stratocumulus'")
        if self.kind not in _KINDS:
            raise bad(f"kind {self.kind!r} is unknown; expected one of {list(_KINDS)}")
        if self.flavour not in _FLAVOURS:
            raise bad(f"flavour {self.flavour!r} is unknown; expected one of {list(_FLAVOURS)}")
        for name, low in (("nx", 8), ("ny", 8), ("nz", 8), ("ntimes", 1)):
            value = getattr(self, name)
            if isinstance(value, bool) or not isinstance(value, int) or value < low:
                raise bad(f"{name} = {value!r}; expected an integer >= {low}")
        for name in ("dx", "interval_s"):
            value = getattr(self, name)
            if not (isinstance(value, (int, float)) and math.isfinite(value) and value > 0):
                raise bad(f"{name} = {value!r}; expected a positive number")
        min_top = _REGIMES[self.kind].min_top
        if not (isinstance(self.ztop, (int, float)) and self.ztop >= min_top):
            raise bad(
                f"ztop = {self.ztop!r} m is too low for kind {self.kind!r}; expected "
                f">= {min_top:g} m"
            )
        if not isinstance(self.seed, int) or self.seed < 0:
            raise bad(f"seed = {self.seed!r}; expected a non-negative integer")

    def with_size(self, **overrides: Any) -> DemoCase:
        """A copy with some fields replaced (e.g. ``nx``, ``ny``, ``nz``, ``ntimes``).

        Parameters
        ----------
        **overrides
            Field names and new values.

        Returns
        -------
        DemoCase
            The modified spec (validated).

        Raises
        ------
        ConfigError
            For a name that is not a field of :class:`DemoCase` or an invalid value.

        Examples
        --------
        >>> demo_case("cu-marro-01").with_size(nx=512, ny=512, nz=160, ntimes=12).nz
        160
        """
        names = {f.name for f in dataclasses.fields(self)}
        unknown = sorted(set(overrides) - names)
        if unknown:
            raise ConfigError(
                f"unknown demo size field(s) {unknown}; expected some of {sorted(names)}",
                case=self.case,
            )
        return dataclasses.replace(self, **overrides)

    def output_times_s(self) -> NDArray[np.float64]:
        """Output times of the case.

        Alpha starts at ``t = 0``, beta at ``t = 900 s``; then every ``interval_s``.

        Returns
        -------
        numpy.ndarray
            Seconds since the start of the run, float64, length ``ntimes``.

        Examples
        --------
        >>> demo_case("sc-ostra-02").output_times_s()[:2].tolist()
        [900.0, 2400.0]
        """
        start = 0.0 if self.flavour == "alpha" else BETA_FIRST_OUTPUT_S
        return start + self.interval_s * np.arange(self.ntimes, dtype=np.float64)

    def to_dict(self) -> dict[str, Any]:
        """Plain-dict form (for manifests and provenance).

        Returns
        -------
        dict
            Field name to value, as :func:`dataclasses.asdict`.

        Examples
        --------
        >>> demo_case("cu-marro-02").to_dict()["flavour"]
        'beta'
        """
        return dataclasses.asdict(self)


DEMO_CASES: tuple[DemoCase, ...] = (
    DemoCase(
        case="sc-ostra-01",
        regime="stratocumulus",
        kind="overcast",
        flavour="alpha",
        nz=50,
        ztop=2500.0,
        ntimes=8,
        interval_s=1800.0,
        seed=101,
    ),
    DemoCase(
        case="sc-ostra-02",
        regime="stratocumulus",
        kind="overcast",
        flavour="beta",
        nz=52,
        ztop=2600.0,
        ntimes=9,
        interval_s=1500.0,
        seed=202,
    ),
    DemoCase(
        case="sc-pelle-01",
        regime="stratocumulus",
        kind="broken",
        flavour="alpha",
        nz=48,
        ztop=2640.0,
        ntimes=7,
        interval_s=1800.0,
        seed=303,
    ),
    DemoCase(
        case="cu-marro-01",
        regime="cumulus",
        kind="cumulus",
        flavour="alpha",
        nz=56,
        ztop=2800.0,
        ntimes=9,
        interval_s=1200.0,
        seed=404,
    ),
    DemoCase(
        case="cu-marro-02",
        regime="cumulus",
        kind="cumulus",
        flavour="beta",
        nz=54,
        ztop=3000.0,
        ntimes=8,
        interval_s=1800.0,
        seed=505,
    ),
    DemoCase(
        case="cu-varnix-01",
        regime="cumulus",
        kind="cumulus",
        flavour="alpha",
        nz=50,
        ztop=2900.0,
        ntimes=7,
        interval_s=1500.0,
        seed=606,
    ),
)
"""The default demo cases (invented ids; two sites of each regime)."""


def demo_case(case_id: str) -> DemoCase:
    """Look up a default demo case by id.

    Parameters
    ----------
    case_id
        One of the ids in :data:`DEMO_CASES`.

    Returns
    -------
    DemoCase

    Raises
    ------
    InputError
        If the id is not a default demo case; the message lists the valid ids.

    Examples
    --------
    >>> demo_case("sc-pelle-01").kind
    'broken'
    """
    for spec in DEMO_CASES:
        if spec.case == case_id:
            return spec
    valid = [spec.case for spec in DEMO_CASES]
    raise InputError(
        f"is not a demo case; expected one of {valid}",
        case=str(case_id),
        hint="use one of the listed demo case ids",
    )
