import math

import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from pydantic import BaseModel, ValidationError

from estimator.errors import QuantityError
from estimator.units import (
    UNITS_REQUIRED,
    Dimensionless,
    Volume,
    check_quantity,
    format_quantity,
    parse_quantity,
    unit_scale_offset,
)


@pytest.mark.parametrize(
    ("text", "dimension", "expected"),
    [
        ("8 m^3", "volume", 8.0),
        ("1500 L", "volume", 1.5),
        ("20 m^3/h", "flow", 20.0 / 3600.0),
        ("80 degC", "temperature", 353.15),
        ("176 degF", "temperature", 353.15),
        ("300 K", "temperature", 300.0),
        ("65 kJ/mol", "energy_per_mol", 65_000.0),
        ("-20 kJ/mol", "energy_per_mol", -20_000.0),
        ("0.9 1/h", "rate_constant", 0.9 / 3600.0),
        ("0.9 /h", "rate_constant", 0.9 / 3600.0),
        ("1e-3 1/s", "rate_constant", 1e-3),
        ("1.2 kmol/m^3", "concentration", 1200.0),
        ("2 mol/L", "concentration", 2000.0),
        ("4 min", "time", 240.0),
        ("6 h", "time", 21_600.0),
        ("1.05", "dimensionless", 1.05),
        ("5 %", "dimensionless", 0.05),
        ("  12m^3/h ", "flow", 12.0 / 3600.0),
    ],
)
def test_parse_quantity_returns_si(text: str, dimension: str, expected: float) -> None:
    assert parse_quantity(text, dimension, key="k") == pytest.approx(expected, rel=1e-12)


def test_bare_numbers_are_accepted_only_when_dimensionless() -> None:
    assert parse_quantity(1.05, "dimensionless", key="k") == 1.05
    assert parse_quantity(2, "dimensionless", key="k") == 2.0
    with pytest.raises(ValueError, match=r"give a unit, e\.g\. '8 m\^3'"):
        parse_quantity(8, "volume", key="k")
    with pytest.raises(ValueError, match=r"give a unit, e\.g\. '8 m\^3'"):
        parse_quantity("8", "volume", key="k")
    # The example follows the dimension asked for.
    with pytest.raises(ValueError, match=r"give a unit, e\.g\. '20 m\^3/h'"):
        parse_quantity(12.0, "flow", key="k")


def test_wrong_dimension_names_what_was_expected_and_what_was_given() -> None:
    with pytest.raises(ValueError) as caught:
        parse_quantity("8 kg", "volume", key="")
    assert str(caught.value) == "expected a volume such as '8 m^3', got '8 kg'"
    with pytest.raises(ValueError, match="expected a temperature"):
        parse_quantity("58 m^3", "temperature", key="")


def test_key_prefixes_the_message() -> None:
    with pytest.raises(QuantityError) as caught:
        parse_quantity("8 kg", "volume", key="vessels[0].volume")
    assert str(caught.value).startswith("vessels[0].volume: expected a volume")
    assert caught.value.key == "vessels[0].volume"
    assert caught.value.reason.startswith("expected a volume")


def test_unknown_unit_is_named() -> None:
    with pytest.raises(ValueError, match="unknown unit 'furlong3'"):
        parse_quantity("8 furlong3", "volume", key="")
    with pytest.raises(ValueError, match=r"m\^\^3"):
        parse_quantity("8 m^^3", "volume", key="")


@pytest.mark.parametrize(
    ("value", "dimension"),
    [
        (math.nan, "dimensionless"),
        (math.inf, "dimensionless"),
        ("nan m^3", "volume"),
        ("NaN", "dimensionless"),
        ("inf degC", "temperature"),
        ("-inf", "dimensionless"),
        ("1e400 m^3", "volume"),
    ],
)
def test_non_finite_values_are_refused(value: str | float, dimension: str) -> None:
    with pytest.raises(ValueError, match="finite"):
        parse_quantity(value, dimension, key="")


@pytest.mark.parametrize("value", [True, None, [8, "m^3"], "m^3", "", "eight m^3"])
def test_text_without_a_leading_number_is_refused(value: object) -> None:
    with pytest.raises(ValueError, match="expected a volume such as '8 m\\^3'"):
        parse_quantity(value, "volume", key="")  # type: ignore[arg-type]


def test_unknown_dimension_name_is_a_programming_error() -> None:
    with pytest.raises(ValueError, match="unknown dimension 'mass'"):
        parse_quantity("8 kg", "mass", key="")


def test_difference_ignores_the_temperature_offset() -> None:
    assert parse_quantity("2 degC", "temperature", key="", difference=True) == 2.0
    assert parse_quantity("9 degF", "temperature", key="", difference=True) == pytest.approx(5.0)
    assert parse_quantity("2 degC", "temperature", key="") == pytest.approx(275.15)


@pytest.mark.parametrize(
    ("unit", "dimension", "scale", "offset"),
    [
        ("degC", "temperature", 1.0, 273.15),
        # 0 degF = (0 + 459.67) * 5/9 K
        ("degF", "temperature", 5.0 / 9.0, 459.67 * 5.0 / 9.0),
        ("K", "temperature", 1.0, 0.0),
        ("m^3/h", "flow", 1.0 / 3600.0, 0.0),
        ("m^3/s", "flow", 1.0, 0.0),
        ("kmol/m^3", "concentration", 1000.0, 0.0),
        ("mol/m^3", "concentration", 1.0, 0.0),
        ("/h", "rate_constant", 1.0 / 3600.0, 0.0),
        ("", "dimensionless", 1.0, 0.0),
    ],
)
def test_unit_scale_offset(unit: str, dimension: str, scale: float, offset: float) -> None:
    got_scale, got_offset = unit_scale_offset(unit, dimension)
    assert got_scale == pytest.approx(scale, rel=1e-14)
    assert got_offset == pytest.approx(offset, rel=1e-14, abs=0.0)


def test_scale_offset_map_water_boiling_point() -> None:
    scale, offset = unit_scale_offset("degF", "temperature")
    assert scale * 212.0 + offset == pytest.approx(373.15, rel=1e-14)


@pytest.mark.parametrize(
    ("unit", "dimension", "message"),
    [
        ("kg", "temperature", "expected a unit of a temperature"),
        ("m^3", "flow", "expected a unit of a volumetric flow"),
        ("g/L", "concentration", "expected a unit of a concentration"),
        ("furlong3", "volume", "unknown unit 'furlong3'"),
        ("", "concentration", "give a unit"),
    ],
)
def test_unit_scale_offset_refuses_bad_units(unit: str, dimension: str, message: str) -> None:
    with pytest.raises(ValueError, match=message):
        unit_scale_offset(unit, dimension)


def test_format_quantity_for_messages() -> None:
    assert format_quantity(-3.0, "m^3") == "-3 m^3"
    assert format_quantity(331.15, "degC") == "58 degC"
    assert format_quantity(1.0 / 300.0, "m^3/h") == "12 m^3/h"
    assert format_quantity(1.05, "") == "1.05"


def test_check_quantity_bounds_echo_the_value_as_written() -> None:
    with pytest.raises(QuantityError) as caught:
        check_quantity("-3 m^3", "volume", gt=0.0)
    assert caught.value.reason == "must be positive, got -3 m^3"
    with pytest.raises(QuantityError, match="must not be negative, got -1 m\\^3/h"):
        check_quantity("-1 m^3/h", "flow", ge=0.0)
    with pytest.raises(QuantityError, match="must be above absolute zero, got -300 degC"):
        check_quantity("-300 degC", "temperature", gt=0.0)
    with pytest.raises(QuantityError, match="must be less than 1, got 1.5"):
        check_quantity(1.5, "dimensionless", gt=0.5, lt=1.0)
    assert check_quantity("0 m^3/h", "flow", ge=0.0) == 0.0


def test_check_quantity_takes_python_numbers_as_si_when_units_are_not_required() -> None:
    assert check_quantity(8.0, "volume", units_required=False) == 8.0
    with pytest.raises(QuantityError, match="must be positive, got -3 m\\^3"):
        check_quantity(-3, "volume", units_required=False, gt=0.0)
    with pytest.raises(QuantityError, match="give a unit"):
        check_quantity(8.0, "volume", units_required=True)


class _Tank(BaseModel):
    volume: Volume
    ratio: Dimensionless = 1.0


def test_pydantic_fields_report_unit_errors_at_their_location() -> None:
    assert _Tank.model_validate({"volume": "8 m^3"}).volume == 8.0
    with pytest.raises(ValidationError) as caught:
        _Tank.model_validate({"volume": "8 kg", "ratio": "x"}, context={UNITS_REQUIRED: True})
    errors = {e["loc"]: e["msg"] for e in caught.value.errors()}
    assert errors == {
        ("volume",): "expected a volume such as '8 m^3', got '8 kg'",
        ("ratio",): "expected a dimensionless number such as '1.05': a number, then a unit; "
        "got 'x'",
    }


def test_pydantic_fields_refuse_bare_numbers_only_for_file_input() -> None:
    assert _Tank(volume=8.0).volume == 8.0
    with pytest.raises(ValidationError, match="give a unit"):
        _Tank.model_validate({"volume": 8}, context={UNITS_REQUIRED: True})


_UNITS = [
    ("m^3/h", "flow"),
    ("L/min", "flow"),
    ("degC", "temperature"),
    ("degF", "temperature"),
    ("kmol/m^3", "concentration"),
    ("kJ/mol", "energy_per_mol"),
    ("min", "time"),
]


@settings(max_examples=60, deadline=None)
@given(
    value=st.floats(min_value=-1e6, max_value=1e6, allow_nan=False),
    unit=st.sampled_from(_UNITS),
)
def test_parsed_text_agrees_with_the_reading_map(value: float, unit: tuple[str, str]) -> None:
    text, dimension = unit
    scale, offset = unit_scale_offset(text, dimension)
    parsed = parse_quantity(f"{value!r} {text}", dimension, key="")
    assert parsed == pytest.approx(scale * value + offset, rel=1e-12, abs=1e-9)
