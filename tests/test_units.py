"""Unit conversion against pint, and quantity parsing."""

from __future__ import annotations

import pint
import pytest

from lesprep.errors import ConfigError, UnitError
from lesprep.units import conversion, parse_quantity


@pytest.mark.parametrize(
    "found, expected, value",
    [
        ("g/kg", "kg kg-1", 8.5),
        ("g kg-1", "kg kg-1", 0.3),
        ("hPa", "Pa", 1013.25),
        ("mbar", "Pa", 850.0),
        ("degC", "K", 21.4),
        ("K", "K", 288.0),
        ("cm/s", "m s-1", 35.0),
        ("km", "m", 1.2),
    ],
)
def test_conversion_matches_plain_pint(found: str, expected: str, value: float) -> None:
    # reference: pint's own default registry with unambiguous spellings
    ureg = pint.UnitRegistry()
    plain = {"g/kg": "g/kg", "g kg-1": "g/kg", "kg kg-1": "kg/kg", "m s-1": "m/s"}
    ref = ureg.Quantity(value, plain.get(found, found)).to(plain.get(expected, expected))
    conv = conversion(variable="v", raw_variable="raw", found=found, expected=expected)
    assert conv.apply(value) == pytest.approx(ref.magnitude, rel=1e-12)


def test_wrong_dimension_names_everything() -> None:
    with pytest.raises(UnitError) as err:
        conversion(
            variable="T", raw_variable="tempc", found="m s-1", expected="K", case="c1", file="a.nc"
        )
    msg = str(err.value)
    for part in ("c1", "a.nc", "tempc", "m s-1", "'K'"):
        assert part in msg


def test_missing_units_error_and_assumption() -> None:
    with pytest.raises(UnitError, match="no units"):
        conversion(variable="qc", raw_variable="liq", found=None, expected="kg kg-1")
    conv = conversion(
        variable="qc", raw_variable="liq", found="", expected="kg kg-1", assumed="g/kg"
    )
    assert conv.assumed and conv.factor == pytest.approx(1e-3)


def test_unparsable_units() -> None:
    with pytest.raises(UnitError, match="not a UDUNITS"):
        conversion(
            variable="qc", raw_variable="liq", found="furlongs per gobbet", expected="kg kg-1"
        )


@pytest.mark.parametrize(
    "text, expected, value",
    [
        ("2 h", "s", 7200.0),
        ("90 min", "s", 5400.0),
        ("1e-5 kg/kg", "kg kg-1", 1e-5),
        ("0.01 g/kg", "kg kg-1", 1e-5),
    ],
)
def test_parse_quantity(text: str, expected: str, value: float) -> None:
    assert parse_quantity(text, expected, name="x") == pytest.approx(value, rel=1e-12)


@pytest.mark.parametrize("text", [2, "2", "1e-5", 3.5])
def test_quantity_without_units_is_refused(text: object) -> None:
    with pytest.raises(ConfigError, match="no units"):
        parse_quantity(text, "s", name="spinup")


def test_quantity_wrong_dimension() -> None:
    with pytest.raises(ConfigError, match="compatible"):
        parse_quantity("2 m", "s", name="spinup")
