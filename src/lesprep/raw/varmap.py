"""Variable maps: how one LES flavour's raw files provide the canonical variables.

A variable map is a YAML file (one per LES flavour, named in the case sheet)::

    flavour: alpha
    dims: {time: time, zc: z, zf: z_face, y: y, x: x}
    coords:
      time: {raw: time}
      z: {raw: zc}
      z_face: {raw: zf}
      y: {raw: y}
      x: {raw: x}
    variables:
      qc: {raw: liq, dims: [time, zc, y, x]}
      w:  {raw: wf, dims: [time, zf, y, x]}        # on faces: interpolated to centres
      p:  {raw: pref, dims: [z]}                   # a 1-D profile p(z)
      qv: {raw: sphum, dims: [time, x, y, z], quantity: specific_humidity}
      T:  {raw: theta, dims: [time, x, y, z], quantity: potential_temperature}

``dims`` maps each raw dimension to a canonical axis; an axis ending in ``_face`` marks
a staggered dimension. ``units`` on a variable is an assumption used only when the file
carries no units attribute.

Besides the required five, a map may carry any raw field, 3-D ``(time, z, y, x)`` or
2-D ``(time, y, x)`` (a surface field), under a name the user chooses. A name the
variable catalogue knows (``qi``, ``qr``, ``u``, ``v``) gets the catalogue's canonical
units, range and attributes; any other name keeps the field's own units (after checking
that they parse as UDUNITS) and takes ``standard_name``/``long_name`` from the map::

      qi:   {raw: ice, dims: [time, zc, y, x], quantity: mass_fraction}
      u:    {raw: uf, dims: [time, zc, y, xf], faces: {x: low}}
      shf:  {raw: sens_flux, dims: [time, y, x], standard_name:
             surface_upward_sensible_heat_flux, long_name: sensible heat flux}
"""

from __future__ import annotations

import hashlib
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import yaml

from lesprep import catalogue
from lesprep.config import _schema, validate
from lesprep.errors import ConfigError


@dataclass(frozen=True, kw_only=True)
class VariableSpec:
    """How one canonical variable is read from the raw files."""

    name: str
    raw: str
    dims: tuple[str, ...]
    units: str | None = None
    quantity: str = "direct"
    standard_name: str | None = None
    long_name: str | None = None
    faces: dict[str, str] = field(default_factory=dict)

    def axes(self, dim_roles: dict[str, str]) -> tuple[str, ...]:
        """Canonical axes of the raw dims, in file order."""
        return tuple(dim_roles[d] for d in self.dims)

    def staggered(self, dim_roles: dict[str, str]) -> tuple[str, ...]:
        """Axes on which this variable sits on cell faces (e.g. ``("z",)``)."""
        return tuple(a[: -len("_face")] for a in self.axes(dim_roles) if a.endswith("_face"))


@dataclass(frozen=True, kw_only=True)
class VariableMap:
    """A parsed, validated variable map."""

    flavour: str
    dims: dict[str, str]
    coords: dict[str, dict[str, str]]
    variables: dict[str, VariableSpec]
    path: str = ""
    sha256: str = ""
    text: str = field(default="", repr=False)

    def entry(self, name: str, *, units: str | None = None) -> catalogue.Variable:
        """The catalogue entry of a mapped variable; for a name the catalogue does not
        know, an entry made from the map (``units``: the field's units, found in the file
        or assumed by the map)."""
        if catalogue.known(name):
            return catalogue.get(name)
        spec = self.variables[name]
        return catalogue.from_map(
            name,
            units=units if units is not None else (spec.units or ""),
            long_name=spec.long_name or f"{name} (raw variable {spec.raw})",
            standard_name=spec.standard_name,
        )

    def is_2d(self, name: str) -> bool:
        """Whether a mapped variable has no vertical axis (a surface field)."""
        axes = self.variables[name].axes(self.dims)
        return not any(a.startswith("z") for a in axes)

    def raw_dim(self, axis: str) -> str | None:
        """Raw dimension name that holds a canonical axis (or None)."""
        for raw, role in self.dims.items():
            if role == axis:
                return raw
        return None

    def to_dict(self) -> dict[str, Any]:
        """Record for provenance: path, hash and the parsed content."""
        return {
            "path": self.path,
            "sha256": self.sha256,
            "flavour": self.flavour,
            "content": yaml.safe_load(self.text) if self.text else None,
        }


def parse_varmap(text: str, *, path: str = "<string>") -> VariableMap:
    """Parse and validate a variable map from YAML text.

    Raises
    ------
    ConfigError
        Schema violations, dims not declared in ``dims``, a quantity that does not fit
        the canonical variable.
    """
    data = yaml.safe_load(text) or {}
    validate(data, _schema("varmap.schema.yaml"), what=f"variable map {path}")
    roles: dict[str, str] = dict(data["dims"])
    for axis in ("time", "z", "y", "x"):
        if axis not in roles.values():
            raise ConfigError(
                f"variable map {path}: no raw dimension is mapped to axis {axis!r}",
                hint="add it under 'dims:'",
            )
    variables: dict[str, VariableSpec] = {}
    for name, spec in data["variables"].items():
        for d in spec["dims"]:
            if d not in roles:
                raise ConfigError(
                    f"variable map {path}: variable {name!r} names dimension {d!r}, which is "
                    f"not declared under 'dims:' (declared: {sorted(roles)})",
                )
        known = catalogue.known(name)
        if known and catalogue.get(name).kind != "mapped":
            raise ConfigError(
                f"variable map {path}: {name!r} is a variable lesprep derives itself; "
                "a raw field cannot be mapped to it",
                hint="map the raw field under another name",
            )
        quantity = spec.get("quantity", "direct")
        allowed = list(catalogue.get(name).quantities) if known else ["direct"]
        if quantity not in allowed:
            raise ConfigError(
                f"variable map {path}: quantity {quantity!r} does not fit {name!r}; "
                f"allowed: {allowed}",
            )
        variables[name] = VariableSpec(
            name=name,
            raw=spec["raw"],
            dims=tuple(spec["dims"]),
            units=spec.get("units"),
            quantity=quantity,
            standard_name=None if known else spec.get("standard_name"),
            long_name=None if known else spec.get("long_name"),
            faces=dict(spec.get("faces", {})),
        )
        axes = variables[name].axes(roles)
        base = [a.removesuffix("_face") for a in axes]
        if len(set(base)) != len(base):
            raise ConfigError(f"variable map {path}: {name!r} maps two dims to one axis: {axes}")
        for axis in variables[name].faces:
            if f"{axis}_face" not in axes:
                raise ConfigError(
                    f"variable map {path}: {name!r} states where its {axis} faces lie, but "
                    f"its dims {list(spec['dims'])} have no dimension mapped to {axis}_face",
                    hint=f"map the staggered dimension to {axis}_face under 'dims:', or "
                    "drop 'faces:'",
                )
        if name == "p":
            if sorted(base) not in (["x", "y", "z"], ["time", "x", "y", "z"], ["z"]):
                raise ConfigError(
                    f"variable map {path}: p must be 3-D (optionally with time) or a 1-D "
                    f"profile over z; found axes {axes}",
                )
        elif sorted(base) != ["time", "x", "y", "z"] and (
            known or sorted(base) != ["time", "x", "y"]
        ):
            shapes = "time, z, y, x" if known else "time, z, y, x (3-D) or time, y, x (2-D)"
            raise ConfigError(
                f"variable map {path}: {name!r} must have axes {shapes}; found {axes}",
            )
    missing = [n for n in catalogue.required_inputs() if n not in variables]
    if missing:
        raise ConfigError(
            f"variable map {path}: required variable(s) {missing} are not mapped",
            hint="every variable map must provide " + ", ".join(catalogue.required_inputs()),
        )
    return VariableMap(
        flavour=data.get("flavour", ""),
        dims=roles,
        coords={k: dict(v) for k, v in data["coords"].items()},
        variables=variables,
        path=path,
        sha256=hashlib.sha256(text.encode()).hexdigest(),
        text=text,
    )


def load_varmap(path: str | Path) -> VariableMap:
    """Read a variable map file (YAML, safe-loaded) and validate it."""
    path = Path(path)
    try:
        text = path.read_text(encoding="utf-8")
    except OSError as exc:
        raise ConfigError(f"cannot read variable map {path}: {exc.strerror}") from None
    return parse_varmap(text, path=str(path))
