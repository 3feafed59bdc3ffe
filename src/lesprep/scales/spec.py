"""Target scales: from the config's lengths or factors to each case's block factor.

A scale is written as a length with units (``"400 m"``, ``"2 km"``) or as an integer
block factor. For a case with horizontal spacing ``dx`` a length ``L`` resolves to the
factor ``f = L / dx``, which must be a whole number and divide ``nx`` and ``ny`` (blocks
never straddle the periodic edge). Stores are labelled by the length in metres
(``scale-400m``); a scale given as a factor is labelled ``scale-f<f>`` because its length
depends on each case's grid (the store's attrs give the length).
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from typing import Any

from lesprep.errors import ConfigError, ScaleError
from lesprep.units import parse_quantity


@dataclass(frozen=True, kw_only=True)
class ScaleSpec:
    """One configured scale, before it meets a case's grid."""

    text: str
    length_m: float | None = None
    factor: int | None = None

    @property
    def label(self) -> str:
        """Store label: ``400m`` for lengths, ``f8`` for factors."""
        if self.factor is not None:
            return f"f{self.factor}"
        assert self.length_m is not None
        return f"{self.length_m:.6g}m".replace("+", "")

    def to_dict(self) -> dict[str, Any]:
        """Plain form; :meth:`from_dict` inverts it without parsing the text again."""
        return {"text": self.text, "length_m": self.length_m, "factor": self.factor}

    @classmethod
    def from_dict(cls, d: dict[str, Any]) -> ScaleSpec:
        """Inverse of :meth:`to_dict`."""
        return cls(text=d["text"], length_m=d["length_m"], factor=d["factor"])

    def resolve(self, dx: float, nx: int, ny: int, *, case: str) -> Scale | None:
        """Block factor for a grid, or raise ScaleError naming what would fit."""
        if self.factor is not None:
            f = self.factor
        else:
            assert self.length_m is not None
            ratio = self.length_m / dx
            f = round(ratio)
            if f < 1 or not math.isclose(ratio, f, rel_tol=1e-9, abs_tol=1e-9):
                raise ScaleError(
                    f"scale {self.text!r} is {ratio:g} grid cells of dx = {dx:g} m, not a whole "
                    f"number; scales that fit this domain ({nx} x {ny} points): "
                    f"{fitting_scales(dx, nx, ny)}",
                    case=case,
                    hint="choose one of the listed scales, or set coarsen.on_misfit: skip",
                )
        if nx % f or ny % f:
            raise ScaleError(
                f"scale {self.text!r} is a block of {f} x {f} cells, which does not divide the "
                f"{nx} x {ny} domain (dx = {dx:g} m); scales that fit: "
                f"{fitting_scales(dx, nx, ny)}",
                case=case,
                hint="choose one of the listed scales, or set coarsen.on_misfit: skip",
            )
        return Scale(label=self.label, factor=f, length_m=f * dx, dx=dx, text=self.text)


@dataclass(frozen=True, kw_only=True)
class Scale:
    """A scale resolved for one case's grid."""

    label: str
    factor: int
    length_m: float
    dx: float
    text: str


def fitting_scales(dx: float, nx: int, ny: int) -> str:
    """The lengths whose block factor divides both nx and ny, as text."""
    g = math.gcd(nx, ny)
    fs = [f for f in range(1, g + 1) if g % f == 0]
    return ", ".join(f"{f * dx:g} m" for f in fs)


def parse_scale(value: Any) -> ScaleSpec:
    """Parse one configured scale (a length with units or an integer factor)."""
    if isinstance(value, bool):
        raise ConfigError(f"scale {value!r} is neither a length nor a factor")
    if isinstance(value, int):
        if value < 1:
            raise ConfigError(f"scale factor {value} must be >= 1")
        return ScaleSpec(text=str(value), factor=value)
    text = str(value).strip()
    if text.isdigit():
        return ScaleSpec(text=text, factor=int(text))
    length = parse_quantity(text, "m", name=f"scale {text!r}")
    if length <= 0:
        raise ConfigError(f"scale {text!r} must be positive")
    return ScaleSpec(text=text, length_m=length)


def parse_scales(values: list[Any]) -> list[ScaleSpec]:
    """Parse the config's scale list; labels must be unique."""
    specs = [parse_scale(v) for v in values]
    labels = [s.label for s in specs]
    dup = {lab for lab in labels if labels.count(lab) > 1}
    if dup:
        raise ConfigError(f"coarsen.scales lists the same scale twice: {sorted(dup)}")
    return specs
