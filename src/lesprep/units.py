"""Unit parsing and conversion with a CF/UDUNITS-aware pint registry.

Raw ``units`` strings are parsed with the unit registry of cf-xarray, which reads
UDUNITS/CF spellings such as ``"kg kg-1"``, ``"m s-1"`` or ``"degC"`` (plain pint would
read ``"kg kg-1"`` as kg squared). Every conversion is affine, ``canonical = factor *
raw + offset``; the two numbers are derived from pint (never from a hand-written
table) and recorded so provenance shows exactly what was done.
"""

from __future__ import annotations

import math
import re
from dataclasses import asdict, dataclass
from typing import Any

import numpy as np
import pint
from cf_xarray.units import units as _registry

from lesprep._jit import HAVE_NUMBA, Engine, njit, prange, resolve_engine
from lesprep.errors import ConfigError, UnitError

_BARE_NUMBER = re.compile(r"\s*[-+]?(\d+\.?\d*|\.\d+)([eE][-+]?\d+)?\s*")

ureg: pint.UnitRegistry = _registry
"""The shared unit registry (cf-xarray's, CF-aware)."""


@dataclass(frozen=True, kw_only=True)
class Conversion:
    """One affine unit conversion applied to a raw variable.

    Attributes
    ----------
    variable
        Canonical variable name the conversion produced.
    raw_variable
        Name of the variable in the raw file.
    from_units, to_units
        Unit strings as found in the file (or as assumed by the map) and as stored.
    factor, offset
        ``canonical = factor * raw + offset``.
    assumed
        True when the file had no units and the variable map's assumption was used.
    """

    variable: str
    raw_variable: str
    from_units: str
    to_units: str
    factor: float
    offset: float
    assumed: bool = False

    @property
    def is_identity(self) -> bool:
        """True when the conversion changes no value."""
        return self.factor == 1.0 and self.offset == 0.0

    def apply(self, values: Any) -> Any:
        """Convert an array (numpy, dask or xarray) with float64 arithmetic."""
        if self.is_identity:
            return values
        return values * self.factor + self.offset

    def convert(
        self,
        values: np.ndarray,
        dtype: Any = np.float64,
        *,
        out: np.ndarray | None = None,
        engine: Engine = "auto",
    ) -> np.ndarray:
        """Convert a numpy array into an array of ``dtype``, with float64 arithmetic.

        Each value is computed as ``float64(raw) * factor + offset`` and rounded once to
        ``dtype``. An identity conversion of an array already of ``dtype`` returns it
        unchanged (no copy). ``out`` (C-contiguous, the shape of ``values``; it may be
        ``values`` itself) receives the result instead of a new array, and its dtype wins.
        The numba engine does it in one parallel pass; the numpy engine is the reference.
        """
        a = np.asarray(values)
        dt = np.dtype(dtype) if out is None else out.dtype
        if self.is_identity and a.dtype == dt:
            if out is not None and out is not a:
                out[...] = a
                return out
            return a
        if out is not None and (out.shape != a.shape or not out.flags.c_contiguous):
            raise ValueError(f"out must be C-contiguous of shape {a.shape}")
        eng = resolve_engine(engine)
        if eng == "numpy" or dt.char not in "fd" or a.dtype.char not in "fd":
            res = np.asarray(self.apply(a.astype(np.float64)), dtype=dt)
            if out is None:
                return res
            out[...] = res
            return out
        src = np.ascontiguousarray(a)
        res = np.empty(src.shape, dtype=dt) if out is None else out
        _nb_affine(src.reshape(-1), float(self.factor), float(self.offset), res.reshape(-1))
        return res

    def to_dict(self) -> dict[str, Any]:
        """Plain-dict form for provenance."""
        return asdict(self)

    @classmethod
    def from_dict(cls, data: dict[str, Any]) -> Conversion:
        """Inverse of :meth:`to_dict`."""
        return cls(**data)


def parse_unit(text: str, *, where: dict[str, str | None] | None = None) -> pint.Unit:
    """Parse a CF/UDUNITS unit string.

    Parameters
    ----------
    text
        The unit string, e.g. ``"g kg-1"``.
    where
        Keyword context for the error (``case``, ``file``, ``variable``).

    Raises
    ------
    UnitError
        If the string is not a unit the registry knows.
    """
    where = where or {}
    try:
        return ureg.Unit(text.strip()) if text.strip() else ureg.Unit("")
    except (pint.UndefinedUnitError, pint.DefinitionSyntaxError, ValueError, TypeError) as exc:
        raise UnitError(
            f"units {text!r} are not a UDUNITS/CF unit ({exc})",
            hint="fix the file's units attribute or declare 'units:' in the variable map",
            **where,
        ) from None


def conversion(
    *,
    variable: str,
    raw_variable: str,
    found: str | None,
    expected: str,
    assumed: str | None = None,
    case: str | None = None,
    file: str | None = None,
) -> Conversion:
    """Build the conversion from a raw variable's units to the canonical units.

    Parameters
    ----------
    variable
        Canonical name (for the record and errors).
    raw_variable
        Name in the raw file.
    found
        The raw ``units`` attribute, or None/empty when missing.
    expected
        Canonical units.
    assumed
        Units declared by the variable map for files that carry none.
    case, file
        Context for error messages.

    Raises
    ------
    UnitError
        Missing units with nothing assumed, or units of the wrong dimensionality.
    """
    where = {"case": case, "file": file, "variable": raw_variable}
    used_assumption = False
    if found is None or not str(found).strip():
        if assumed is None:
            raise UnitError(
                f"has no units attribute; expected units compatible with {expected!r}",
                hint="add 'units: <unit>' for this variable in the variable map",
                **where,
            )
        found = assumed
        used_assumption = True
    src = parse_unit(str(found), where=where)
    dst = parse_unit(expected, where=where)
    if src.dimensionality != dst.dimensionality:
        raise UnitError(
            f"has units {found!r} ({src.dimensionality}); expected units compatible with "
            f"{expected!r} ({dst.dimensionality}) for canonical {variable!r}",
            hint="check the variable map points at the right raw variable",
            **where,
        )
    zero = ureg.Quantity(0.0, src).to(dst).magnitude
    one = ureg.Quantity(1.0, src).to(dst).magnitude
    factor = float(one - zero)
    offset = float(zero)
    # snap round-off so identities stay identities (e.g. kg/kg -> kg kg-1)
    if math.isclose(factor, 1.0, rel_tol=1e-12):
        factor = 1.0
    if abs(offset) < 1e-12:
        offset = 0.0
    return Conversion(
        variable=variable,
        raw_variable=raw_variable,
        from_units=str(found),
        to_units=expected,
        factor=factor,
        offset=offset,
        assumed=used_assumption,
    )


def parse_quantity(text: Any, expected: str, *, name: str) -> float:
    """Parse a quantity with units (``"2 h"``, ``"1e-5 kg/kg"``) into ``expected`` units.

    Parameters
    ----------
    text
        The configured value. A bare number is refused: lesprep never guesses units.
    expected
        Units the value is returned in, e.g. ``"s"``.
    name
        Config key, for the error message.

    Returns
    -------
    float
        The magnitude in ``expected`` units.

    Raises
    ------
    ConfigError
        If the value has no units, cannot be parsed or has the wrong dimensionality.
    """
    if isinstance(text, (int, float, np.number)) and not isinstance(text, bool):
        raise ConfigError(
            f"{name} = {text!r} has no units; expected a quantity such as '{text} {expected}'",
            hint="write the value with its units",
        )
    try:
        q = ureg.Quantity(str(text).strip())
    except Exception as exc:  # pint raises several unrelated types here
        raise ConfigError(
            f"{name} = {text!r} is not a quantity with units ({exc})",
            hint=f"write e.g. '1 {expected}'",
        ) from None
    if _BARE_NUMBER.fullmatch(str(text)):
        raise ConfigError(
            f"{name} = {text!r} has no units; expected a quantity in {expected!r}",
            hint="write the value with its units",
        )
    try:
        return float(q.to(expected).magnitude)
    except pint.DimensionalityError:
        raise ConfigError(
            f"{name} = {text!r} has units of {q.dimensionality}; expected units compatible "
            f"with {expected!r}",
        ) from None


if HAVE_NUMBA:

    @njit(parallel=True, cache=True, fastmath=False)
    def _nb_affine(src, factor, offset, out):  # pragma: no cover - compiled
        for i in prange(src.size):
            out[i] = np.float64(src[i]) * factor + offset
