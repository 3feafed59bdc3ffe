"""The variable catalogue: one entry per variable lesprep knows, and every stage asks it.

An entry (:class:`Variable`) says everything the stages need to know about a variable:

* its canonical units (UDUNITS spelling), CF ``standard_name`` where CF has one, a
  ``long_name`` for the canonical store and a short ``label`` for composite names
  ("block mean of <label>");
* how it arrives: ``mapped`` (read from the raw files through a variable map) or
  ``derived`` (computed per fine cell from other variables);
* for a mapped variable, the quantities a raw field may measure (``quantity:`` in a
  variable map), each with the units the raw field is converted to first and, where
  the quantity is not the canonical one, the conversion to it;
* its plausible range in canonical units (common practice, see :mod:`lesprep.raw.checks`);
* for a quantity that cannot be negative, how far below zero raw values may go before the
  archive is refused (``negative_tolerance``; values in between are numerics of advection
  schemes that are not positive-definite, set to zero and recorded);
* whether it is a water species (``water``: its mass counts in total water and in the
  exact conversion between mass fractions and mixing ratios) and whether it is
  precipitating (``precipitating``: rain, kept out of total water ``qt``);
* for a derived variable, the variables it is computed from and its formula, and whether
  it is computed by coarsening from each slab of fine fields (``per_slab``: the conserved
  and buoyancy variables of :mod:`lesprep.scales.conserved`, never stored on the fine
  grid) rather than stored by ingest;
* whether it may get sub-grid moments and fine patches at coarse scales.

The units of a variance are the square of the field's units, those of a covariance the
product of both fields' units (:func:`variance_units`, :func:`product_units`).

Adding a variable is one :func:`register` call (or one entry in :data:`BUILTIN`), plus
its line in a variable map and its place in the config. A variable the catalogue does
not know cannot be mapped yet: :func:`get` names the known ones.

Examples
--------
>>> get("qc").units
'kg kg-1'
>>> variance_units("m s-1")
'm2 s-2'
>>> product_units("m s-1", "K")
'm s-1 K'
"""

from __future__ import annotations

import re
from collections.abc import Callable, Iterator, Mapping
from dataclasses import dataclass, field
from types import MappingProxyType
from typing import Any, Literal

import numpy as np
from numpy.typing import NDArray

from lesprep import thermo
from lesprep.errors import ConfigError

Kind = Literal["mapped", "derived"]

Convert = Callable[[NDArray[np.floating], Mapping[str, NDArray[np.floating]]], NDArray]
"""Quantity conversion: ``(values, fields already converted) -> canonical values``."""

Formula = Callable[[Mapping[str, NDArray[np.floating]]], NDArray]
"""Formula of a derived variable: ``(fields of one time) -> values``."""


@dataclass(frozen=True, kw_only=True)
class Quantity:
    """What a raw field may measure for a mapped variable.

    Parameters
    ----------
    units
        Units the raw field is converted to before ``convert`` (UDUNITS).
    convert
        Conversion to the canonical quantity, or None when the quantity is the canonical
        one. It may use fields converted before it (``needs``).
    needs
        Variables ``convert`` reads, converted before this one.
    description
        The conversion as recorded in provenance.
    mass_fraction
        The raw field is a mass fraction of a water species (kg per kg of moist air,
        condensate included). All such fields of a time are converted to mixing ratios
        together, exactly (:func:`lesprep.thermo.mixing_ratios_from_mass_fractions`).
    """

    units: str
    convert: Convert | None = None
    needs: tuple[str, ...] = ()
    description: str = ""
    mass_fraction: bool = False


@dataclass(frozen=True, kw_only=True)
class Variable:
    """One catalogue entry (see the module docstring)."""

    name: str
    units: str
    long_name: str
    label: str
    kind: Kind = "mapped"
    standard_name: str | None = None
    quantities: Mapping[str, Quantity] = field(default_factory=dict)
    plausible: tuple[float, float] | None = None
    negative_tolerance: float | None = None
    derived_from: tuple[str, ...] = ()
    formula: Formula | None = None
    moments: bool = True
    patches: bool = True
    required: bool = False
    water: bool = False
    precipitating: bool = False
    per_slab: bool = False
    extra_attrs: Mapping[str, Any] = field(default_factory=dict)

    def __post_init__(self) -> None:
        if not re.fullmatch(r"[A-Za-z][A-Za-z0-9_]*", self.name):
            raise ConfigError(
                f"variable name {self.name!r} is not a plain identifier",
                hint="use letters, digits and '_' (starting with a letter)",
            )
        if self.kind == "mapped" and "direct" not in self.quantities:
            quantities = {"direct": Quantity(units=self.units), **self.quantities}
            object.__setattr__(self, "quantities", MappingProxyType(quantities))
        if self.kind == "derived" and not self.derived_from:
            raise ConfigError(f"derived variable {self.name!r} names no inputs (derived_from)")

    @property
    def variance_units(self) -> str:
        """Units of the variance (the square of :attr:`units`)."""
        return variance_units(self.units)

    def cf_attrs(self) -> dict[str, Any]:
        """CF attributes of the canonical (fine-grid) field."""
        attrs: dict[str, Any] = {"standard_name": self.standard_name} if self.standard_name else {}
        attrs.update(long_name=self.long_name, units=self.units)
        attrs.update(temperature_metadata(self.units, difference=False))
        attrs.update(self.extra_attrs)
        return attrs


_TEMPERATURE = re.compile(r"^(K|degC|deg_C|celsius|degF|deg_F)(-?\d+)?$")
"""A units token that is a temperature unit (with an optional power)."""


def temperature_metadata(units: str, *, difference: bool) -> dict[str, str]:
    """CF 1.11 ``units_metadata`` of a quantity whose units involve a temperature unit.

    A temperature on its scale (units exactly ``K``, ``degC``, ...) is ``temperature:
    on_scale`` unless ``difference``; a variance, covariance, deviation, or any unit
    combining a temperature with other units or powers (``K2``, ``K s-1``, ``K m s-1``)
    is ``temperature: difference`` (CF 1.11, section 3.1.2). No temperature unit: ``{}``.

    Examples
    --------
    >>> temperature_metadata("K", difference=False)
    {'units_metadata': 'temperature: on_scale'}
    >>> temperature_metadata("K2", difference=True)
    {'units_metadata': 'temperature: difference'}
    >>> temperature_metadata("K s-1", difference=False)
    {'units_metadata': 'temperature: difference'}
    >>> temperature_metadata("kg kg-1", difference=False)
    {}
    """
    tokens = str(units).split()
    matches = [_TEMPERATURE.match(tok) for tok in tokens]
    if not any(matches):
        return {}
    alone = len(tokens) == 1 and matches[0] is not None and matches[0].group(2) in (None, "1")
    kind = "on_scale" if alone and not difference else "difference"
    return {"units_metadata": f"temperature: {kind}"}


_TOKEN = re.compile(r"^([A-Za-z]+)(-?\d+)?$")


def _scaled(units: str, power: int) -> list[str]:
    out: list[str] = []
    for tok in units.split():
        m = _TOKEN.match(tok)
        if tok == "1" or m is None:
            if tok != "1":
                raise ValueError(f"cannot raise units {units!r} to a power (token {tok!r})")
            continue
        exp = int(m.group(2) or 1) * power
        out.append(m.group(1) if exp == 1 else f"{m.group(1)}{exp}")
    return out


def variance_units(units: str) -> str:
    """Units of a variance: each factor's exponent doubled (``"1"`` stays ``"1"``)."""
    toks = _scaled(units, 2)
    return " ".join(toks) if toks else "1"


def product_units(a: str, b: str) -> str:
    """Units of a covariance of two fields (the product of their units, UDUNITS spelling)."""
    toks = [*_scaled(a, 1), *_scaled(b, 1)]
    return " ".join(toks) if toks else "1"


def _theta_to_t(values: NDArray, fields: Mapping[str, NDArray]) -> NDArray:
    p = fields["p"] if fields["p"].ndim == 3 else fields["p"][:, None, None]
    return thermo.temperature_from_potential_temperature(values, p)


_KG = "kg kg-1"
_MASS_FRACTION = Quantity(
    units=_KG,
    mass_fraction=True,
    description="mixing ratio r = q (1 + R) / (1 - S) from mass fraction q, with S the sum "
    "of the water species given as mass fractions and R the sum of those given as mixing "
    "ratios (exact; S = q and R = 0 gives r = q / (1 - q))",
)
BUILTIN: tuple[Variable, ...] = (
    Variable(
        name="p",
        units="Pa",
        standard_name="air_pressure",
        long_name="air pressure",
        label="air pressure",
        plausible=(1.0e4, 1.1e5),
        required=True,
        patches=False,
    ),
    Variable(
        name="qc",
        units=_KG,
        standard_name="cloud_liquid_water_mixing_ratio",
        long_name="cloud liquid water mixing ratio",
        label="cloud liquid water mixing ratio",
        quantities={"mixing_ratio": Quantity(units=_KG), "mass_fraction": _MASS_FRACTION},
        plausible=(0.0, 0.02),
        negative_tolerance=1e-6,
        required=True,
        water=True,
    ),
    Variable(
        name="qv",
        units=_KG,
        standard_name="humidity_mixing_ratio",
        long_name="water vapour mixing ratio",
        label="water vapour mixing ratio",
        quantities={
            "mixing_ratio": Quantity(units=_KG),
            "specific_humidity": _MASS_FRACTION,
        },
        plausible=(0.0, 0.05),
        negative_tolerance=1e-6,
        required=True,
        water=True,
    ),
    Variable(
        name="T",
        units="K",
        standard_name="air_temperature",
        long_name="air temperature",
        label="air temperature",
        quantities={
            "temperature": Quantity(units="K"),
            "potential_temperature": Quantity(
                units="K",
                convert=_theta_to_t,
                needs=("p",),
                description=f"T = theta * (p / 1000 hPa) ** (Rd/cp), Rd/cp = {thermo.KAPPA:.6f}",
            ),
        },
        plausible=(150.0, 340.0),
        required=True,
    ),
    Variable(
        name="w",
        units="m s-1",
        standard_name="upward_air_velocity",
        long_name="vertical velocity at cell centres",
        label="vertical velocity",
        plausible=(-60.0, 60.0),
        required=True,
    ),
    Variable(
        name="qi",
        units=_KG,
        standard_name="cloud_ice_mixing_ratio",
        long_name="cloud ice mixing ratio",
        label="cloud ice mixing ratio",
        quantities={"mixing_ratio": Quantity(units=_KG), "mass_fraction": _MASS_FRACTION},
        plausible=(0.0, 0.02),
        negative_tolerance=1e-6,
        water=True,
    ),
    Variable(
        name="qr",
        units=_KG,
        standard_name="rain_water_mixing_ratio",
        long_name="rain water mixing ratio",
        label="rain water mixing ratio",
        quantities={"mixing_ratio": Quantity(units=_KG), "mass_fraction": _MASS_FRACTION},
        plausible=(0.0, 0.02),
        negative_tolerance=1e-5,
        water=True,
        precipitating=True,
    ),
    Variable(
        name="u",
        units="m s-1",
        standard_name="eastward_wind",
        long_name="x component of the wind at cell centres",
        label="x wind",
        plausible=(-150.0, 150.0),
        extra_attrs={"comment": "along the grid's x axis, taken as eastward"},
    ),
    Variable(
        name="v",
        units="m s-1",
        standard_name="northward_wind",
        long_name="y component of the wind at cell centres",
        label="y wind",
        plausible=(-150.0, 150.0),
        extra_attrs={"comment": "along the grid's y axis, taken as northward"},
    ),
    Variable(
        name="rh",
        kind="derived",
        units="1",
        standard_name="relative_humidity",
        long_name="relative humidity over liquid water (e/e_s, Bolton 1980)",
        label="relative humidity",
        derived_from=("p", "T", "qv"),
    ),
    Variable(
        name="qt",
        kind="derived",
        units=_KG,
        long_name="total water mixing ratio qv + qc (+ qi): vapour and cloud condensate, "
        "precipitating water (qr) excluded",
        label="total water mixing ratio",
        derived_from=("qv", "qc"),
        per_slab=True,
    ),
    Variable(
        name="theta_l",
        kind="derived",
        units="K",
        long_name="liquid water potential temperature (Betts 1973, warm phase)",
        label="liquid water potential temperature",
        derived_from=("p", "T", "qc"),
        per_slab=True,
    ),
    Variable(
        name="theta_il",
        kind="derived",
        units="K",
        long_name="liquid-ice potential temperature (Tripoli and Cotton 1981)",
        label="liquid-ice potential temperature",
        derived_from=("p", "T", "qc", "qi"),
        per_slab=True,
    ),
    Variable(
        name="theta_v",
        kind="derived",
        units="K",
        long_name="virtual potential temperature with condensate loading",
        label="virtual potential temperature",
        derived_from=("p", "T", "qv", "qc"),
        per_slab=True,
    ),
    Variable(
        name="cloud_mask",
        kind="derived",
        units="1",
        long_name="cloudy cell (qc > threshold)",
        label="cloud mask",
        derived_from=("qc",),
        moments=False,
        patches=False,
        extra_attrs={"flag_values": [0, 1], "flag_meanings": "clear cloudy"},
    ),
    Variable(
        name="lwp",
        kind="derived",
        units="kg m-2",
        standard_name="atmosphere_mass_content_of_cloud_liquid_water",
        long_name="liquid water path",
        label="liquid water path",
        derived_from=("p", "T", "qv", "qc"),
        moments=False,
        patches=False,
    ),
)
"""The variables lesprep ships with. ``rh``, ``cloud_mask`` and ``lwp`` are computed by
the fused per-cell pass of :mod:`lesprep.canonical.derived` (no ``formula`` here)."""

_REGISTRY: dict[str, Variable] = {}


def register(variable: Variable, *, replace: bool = False) -> Variable:
    """Add a variable to the catalogue.

    Parameters
    ----------
    variable
        The entry.
    replace
        Allow replacing an entry of the same name (default: an error).

    Returns
    -------
    Variable
        The registered entry.

    Raises
    ------
    ConfigError
        The name is taken (and ``replace`` is False), or a derived variable names an
        input the catalogue does not know.
    """
    if variable.name in _REGISTRY and not replace:
        raise ConfigError(
            f"variable {variable.name!r} is already in the catalogue",
            hint="pass replace=True to redefine it",
        )
    unknown = [v for v in variable.derived_from if v not in _REGISTRY]
    if unknown:
        raise ConfigError(
            f"derived variable {variable.name!r} is computed from {unknown}, which the "
            f"catalogue does not know; known: {sorted(_REGISTRY)}"
        )
    _REGISTRY[variable.name] = variable
    return variable


def unregister(name: str) -> None:
    """Remove a variable registered with :func:`register` (built-in ones stay)."""
    if name in {v.name for v in BUILTIN}:
        raise ConfigError(f"variable {name!r} is built in and cannot be removed")
    _REGISTRY.pop(name, None)


def get(name: str) -> Variable:
    """The entry of ``name`` (ConfigError naming the known variables if unknown)."""
    try:
        return _REGISTRY[name]
    except KeyError:
        raise ConfigError(
            f"variable {name!r} is not in the variable catalogue; known: {sorted(_REGISTRY)}",
            hint="register it with lesprep.catalogue.register (units, long_name, label)",
        ) from None


def known(name: str) -> bool:
    """Whether the catalogue has ``name``."""
    return name in _REGISTRY


def variables(*, kind: Kind | None = None) -> Iterator[Variable]:
    """Every entry, in registration order (optionally of one kind)."""
    return (v for v in list(_REGISTRY.values()) if kind is None or v.kind == kind)


def required_inputs() -> tuple[str, ...]:
    """Mapped variables every variable map must provide (those the derived fields need)."""
    return tuple(v.name for v in variables(kind="mapped") if v.required)


def negative_tolerances() -> dict[str, float]:
    """Default negative tolerance of every variable that has one (canonical units).

    qc and qv: 1e-6 kg kg-1, about 0.1 % of a typical in-cloud water content of 1 g/kg.
    This is common practice for screening LES output, not a published value; undershoots
    of non-positive-definite advection are usually orders of magnitude smaller (-1e-9 kg/kg
    in a few cells). Precipitating species run more negative and get larger tolerances:
    rain water ``qr`` 1e-5 kg kg-1 (common practice, from memory: rain fields of
    sedimentation schemes undershoot by more than cloud water; not a published value).
    """
    return {v.name: v.negative_tolerance for v in variables() if v.negative_tolerance is not None}


def plausible_ranges() -> dict[str, tuple[float, float]]:
    """Default plausibility range of every variable that has one (canonical units)."""
    return {v.name: v.plausible for v in variables() if v.plausible is not None}


def from_map(
    name: str, *, units: str, long_name: str, standard_name: str | None = None
) -> Variable:
    """An entry for a raw field a variable map adds under a name the catalogue does not
    know: it keeps its own units, may get moments and patches, and has no plausible range
    or negative tolerance (nothing is known about it). Not registered."""
    return Variable(
        name=name,
        units=units,
        long_name=long_name,
        label=long_name,
        standard_name=standard_name,
    )


def from_attrs(name: str, attrs: Mapping[str, object]) -> Variable:
    """The entry of a stored variable: the catalogue's when it knows ``name``, else one
    made from the store's CF attributes (``units``, ``long_name``, ``standard_name``)."""
    if known(name):
        return get(name)
    std = attrs.get("standard_name")
    return from_map(
        name,
        units=str(attrs.get("units", "1")),
        long_name=str(attrs.get("long_name", name)),
        standard_name=None if std is None else str(std),
    )


def check_names(names: list[str] | tuple[str, ...], *, what: str, use: str) -> tuple[str, ...]:
    """Check configured variable names against the catalogue.

    Parameters
    ----------
    names
        Variable names as configured.
    what
        The config key, for the message (``coarsen.moments``).
    use
        ``"moments"`` or ``"patches"``: the capability the names must have.

    A name the catalogue does not know passes: a variable map may add it, and the job
    that uses it checks that the case's store has it.

    Raises
    ------
    ConfigError
        A name that is not an identifier, or a known one that may not get ``use``.
    """
    for n in names:
        if not re.fullmatch(r"[A-Za-z][A-Za-z0-9_]*", str(n)):
            raise ConfigError(f"{what} lists {n!r}, which is not a variable name")
        if not known(n):
            continue  # a variable a variable map adds: checked against the store when used
        if not getattr(get(n), use):
            allowed = sorted(v.name for v in variables() if getattr(v, use))
            raise ConfigError(f"{what} lists {n!r}, which cannot get {use}; allowed: {allowed}")
    return tuple(names)


for _v in BUILTIN:
    register(_v)
