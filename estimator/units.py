"""Quantities with units, written the way engineers write them, turned into SI floats.

Configuration files say ``"14 m^3"``, ``"12 m^3/h"``, ``"58 degC"`` or ``"62 kJ/mol"``;
everything past this module works in SI (m^3, m^3/s, K, J/mol, 1/s, mol/m^3, s).
A bare number is accepted only where the quantity is dimensionless, so that a
missing unit can never be silently read as the wrong one.

Readings from the plant carry the unit of their tag; :func:`unit_scale_offset`
gives the affine map ``SI = scale * value + offset`` that turns them into SI
without going through pint in the hot loop.
"""

from __future__ import annotations

import functools
import math
import re
from collections.abc import Mapping
from numbers import Real
from typing import Annotated, Any, NamedTuple, SupportsFloat, cast

import pint
from pydantic import BeforeValidator, ValidationInfo
from pydantic_core import PydanticCustomError

from estimator.errors import QuantityError

__all__ = [
    "DIMENSIONS",
    "UNITS_REQUIRED",
    "Concentration",
    "Dimensionless",
    "Duration",
    "EnergyPerMol",
    "Flow",
    "RateConstant",
    "Temperature",
    "Volume",
    "check_quantity",
    "format_quantity",
    "parse_quantity",
    "pydantic_quantity_error",
    "quantity",
    "si_unit",
    "unit_scale_offset",
    "units_required",
]


class _Dimension(NamedTuple):
    noun: str
    example: str
    si_unit: str


_DIMENSIONS: dict[str, _Dimension] = {
    "volume": _Dimension("a volume", "8 m^3", "m^3"),
    "flow": _Dimension("a volumetric flow", "20 m^3/h", "m^3/s"),
    "temperature": _Dimension("a temperature", "80 degC", "K"),
    "energy_per_mol": _Dimension("an energy per mole", "65 kJ/mol", "J/mol"),
    "rate_constant": _Dimension("a rate constant (1/time)", "0.9 1/h", "1/s"),
    "concentration": _Dimension("a concentration", "1.2 kmol/m^3", "mol/m^3"),
    "time": _Dimension("a duration", "4 min", "s"),
    "dimensionless": _Dimension("a dimensionless number", "1.05", ""),
}

#: The dimension names accepted by the functions of this module.
DIMENSIONS: tuple[str, ...] = tuple(_DIMENSIONS)

#: Validation-context key: when true, quantity fields refuse bare numbers (file input).
UNITS_REQUIRED = "units_required"

# A leading number (sign, decimals, exponent, or nan/inf so that they can be refused
# by name), then whatever follows as the unit text.
_NUMBER = re.compile(
    r"^\s*([+-]?(?:(?:\d+(?:\.\d*)?|\.\d+)(?:[eE][+-]?\d+)?|nan|inf(?:inity)?))(.*)$",
    re.IGNORECASE | re.DOTALL,
)


@functools.cache
def _registry() -> pint.UnitRegistry:
    # Built on first use: loading the definitions takes a few tenths of a second.
    return pint.UnitRegistry()


def _dimension(dimension: str) -> _Dimension:
    try:
        return _DIMENSIONS[dimension]
    except KeyError:
        known = ", ".join(DIMENSIONS)
        raise ValueError(f"unknown dimension {dimension!r}; use one of {known}") from None


def _normalise_unit(unit: str) -> str:
    unit = unit.strip()
    # "0.9 /h" is common shorthand for "0.9 1/h".
    return "1" + unit if unit.startswith("/") else unit


@functools.lru_cache(maxsize=512)
def _unit_info(unit: str) -> tuple[float, float, Any]:
    """Scale, offset and pint dimensionality of a normalised unit text."""
    registry = _registry()
    try:
        units = registry.parse_units(unit)
        offset = float(registry.Quantity(0.0, units).to_base_units().magnitude)
        if offset == 0.0:
            scale = float(registry.Quantity(1.0, units).to_base_units().magnitude)
        else:
            # Offset units (degC, degF): the root factor is exact, 1 degF - 0 degF is not.
            factor, root = registry.get_root_units(units)
            scale = float(cast(SupportsFloat, factor)) * float(
                registry.Quantity(1.0, root).to_base_units().magnitude
            )
    except pint.UndefinedUnitError:
        raise QuantityError(f"unknown unit {unit!r}") from None
    except Exception as exc:  # pint's parser raises a variety of types on bad text
        raise QuantityError(f"cannot read the unit {unit!r} ({exc})") from None
    return scale, offset, units.dimensionality


def _expected_dimensionality(dimension: str) -> Any:
    return _unit_info(_dimension(dimension).si_unit)[2]


def si_unit(dimension: str) -> str:
    """Return the SI unit in which a dimension is stored.

    Parameters
    ----------
    dimension : str
        One of :data:`DIMENSIONS`.

    Returns
    -------
    str
        The unit text, e.g. ``"m^3/s"`` for ``"flow"``; ``""`` for dimensionless.
    """
    return _dimension(dimension).si_unit


def _split(text: str, dim: _Dimension) -> tuple[float, str]:
    match = _NUMBER.match(text)
    if match is None:
        raise QuantityError(
            f"expected {dim.noun} such as {dim.example!r}: a number, then a unit; got {text!r}"
        )
    value = float(match.group(1))
    if not math.isfinite(value):
        raise QuantityError(f"must be a finite number, got {text!r}")
    return value, match.group(2).strip()


def _bare_number_refusal(dim: _Dimension, shown: str) -> QuantityError:
    return QuantityError(f"give a unit, e.g. {dim.example!r} (got the bare number {shown})")


def parse_quantity(
    text: str | int | float,
    dimension: str,
    *,
    key: str = "",
    difference: bool = False,
) -> float:
    """Parse a quantity written with its unit and return its SI magnitude.

    Parameters
    ----------
    text : str or int or float
        The quantity as written: ``"8 m^3"``, ``"20 m^3/h"``, ``"80 degC"``,
        ``"0.9 /h"`` (a leading slash means ``1/...``), ``"2 mol/L"``. A bare
        number (or a string holding only a number) is accepted only when
        ``dimension`` is ``"dimensionless"``.
    dimension : str
        What the quantity must be: one of :data:`DIMENSIONS`.
    key : str, optional
        Where the quantity came from (e.g. ``"reaction.k_ref"``); it prefixes the
        error message so that a caller need not wrap it.
    difference : bool, optional
        Read the quantity as a difference or a spread (a standard deviation, a
        tolerance), so offset units add no offset: ``"2 degC"`` is 2 K, not 275.15 K.

    Returns
    -------
    float
        The magnitude in the SI unit of ``dimension`` [m^3, m^3/s, K, J/mol,
        1/s, mol/m^3, s or 1].

    Raises
    ------
    QuantityError
        A :class:`ValueError` naming the fault: no unit where one is needed, an
        unknown unit, a unit of the wrong dimension, or a value that is not finite.
    """
    dim = _dimension(dimension)
    try:
        return _parse(text, dimension, dim, difference=difference)
    except QuantityError as exc:
        raise QuantityError(exc.reason, key=key) from None


def _parse(text: object, dimension: str, dim: _Dimension, *, difference: bool) -> float:
    if isinstance(text, bool) or not isinstance(text, str | Real):
        raise QuantityError(f"expected {dim.noun} such as {dim.example!r}, got {text!r}")
    if isinstance(text, Real):
        value = float(cast(SupportsFloat, text))
        if not math.isfinite(value):
            raise QuantityError(f"must be a finite number, got {text!r}")
        if dimension != "dimensionless":
            raise _bare_number_refusal(dim, repr(text))
        return value
    value, unit = _split(text, dim)
    if not unit:
        if dimension != "dimensionless":
            raise _bare_number_refusal(dim, repr(text.strip()))
        return value
    scale, offset, dimensionality = _unit_info(_normalise_unit(unit))
    if dimensionality != _expected_dimensionality(dimension):
        raise QuantityError(f"expected {dim.noun} such as {dim.example!r}, got {text.strip()!r}")
    si = scale * value if difference else scale * value + offset
    if not math.isfinite(si):
        raise QuantityError(f"must be a finite number, got {text.strip()!r}")
    return si


def unit_scale_offset(unit: str, dimension: str) -> tuple[float, float]:
    """Return the affine map from a tag's reading unit to SI.

    Parameters
    ----------
    unit : str
        The unit readings arrive in, e.g. ``"degC"``, ``"m^3/h"``, ``"kmol/m^3"``.
    dimension : str
        What the tag measures: one of :data:`DIMENSIONS`.

    Returns
    -------
    scale : float
        SI units per reading unit.
    offset : float
        SI value of a reading of zero [SI unit]; non-zero only for offset
        temperature scales (degC: 273.15 K, degF: 255.372... K).

    Raises
    ------
    QuantityError
        A :class:`ValueError`: unknown unit, or a unit of the wrong dimension.

    Notes
    -----
    ``SI = scale * value + offset``. Applying the map is two floating-point
    operations, so the filter converts readings without touching pint.
    """
    dim = _dimension(dimension)
    text = _normalise_unit(unit)
    if not text:
        if dimension == "dimensionless":
            return 1.0, 0.0
        example_unit = dim.example.split(" ", 1)[1]
        raise QuantityError(f"give a unit for {dim.noun}, e.g. {example_unit!r}")
    scale, offset, dimensionality = _unit_info(text)
    if dimensionality != _expected_dimensionality(dimension):
        raise QuantityError(
            f"expected a unit of {dim.noun} such as {dim.example.split(' ', 1)[-1]!r}, "
            f"got {unit.strip()!r}"
        )
    return scale, offset


def format_quantity(value_si: float, unit: str) -> str:
    """Write an SI value in a chosen unit, for messages.

    Parameters
    ----------
    value_si : float
        The value in the SI unit of the quantity [SI unit].
    unit : str
        The unit to show it in, e.g. ``"m^3"``, ``"degC"``, ``"m^3/h"``;
        ``""`` for a dimensionless value.

    Returns
    -------
    str
        Six significant digits and the unit, e.g. ``"-3 m^3"`` or ``"58 degC"``.
    """
    text = _normalise_unit(unit)
    scale, offset = (1.0, 0.0) if not text else _unit_info(text)[:2]
    return f"{(value_si - offset) / scale:g} {unit.strip()}".rstrip()


def _bound_text(bound: float, dimension: str) -> str:
    return format_quantity(bound, si_unit(dimension))


def check_quantity(
    value: object,
    dimension: str,
    *,
    units_required: bool = True,
    gt: float | None = None,
    ge: float | None = None,
    lt: float | None = None,
    difference: bool = False,
) -> float:
    """Turn a configured quantity into SI and check it against bounds.

    Parameters
    ----------
    value : object
        A string with a unit, or a number.
    dimension : str
        One of :data:`DIMENSIONS`.
    units_required : bool, optional
        True for text written by a person (a file): bare numbers are refused
        unless dimensionless. False for Python callers, whose numbers are taken
        as already in SI.
    gt, ge, lt : float, optional
        Exclusive lower, inclusive lower and exclusive upper bounds [SI unit].
    difference : bool, optional
        Read the value as a difference (see :func:`parse_quantity`).

    Returns
    -------
    float
        The SI magnitude.

    Raises
    ------
    QuantityError
        A :class:`ValueError` whose message echoes the value as written.
    """
    dim = _dimension(dimension)
    if not units_required and isinstance(value, Real) and not isinstance(value, bool):
        si = float(cast(SupportsFloat, value))
        if not math.isfinite(si):
            raise QuantityError(f"must be a finite number, got {value!r}")
        shown = format_quantity(si, dim.si_unit)
    else:
        si = _parse(value, dimension, dim, difference=difference)
        shown = value.strip() if isinstance(value, str) else repr(value)
    if gt is not None and not si > gt:
        if gt == 0.0 and dimension == "temperature":
            raise QuantityError(f"must be above absolute zero, got {shown}")
        if gt == 0.0:
            raise QuantityError(f"must be positive, got {shown}")
        raise QuantityError(f"must be greater than {_bound_text(gt, dimension)}, got {shown}")
    if ge is not None and not si >= ge:
        if ge == 0.0:
            raise QuantityError(f"must not be negative, got {shown}")
        raise QuantityError(f"must be at least {_bound_text(ge, dimension)}, got {shown}")
    if lt is not None and not si < lt:
        raise QuantityError(f"must be less than {_bound_text(lt, dimension)}, got {shown}")
    return si


def units_required(info: ValidationInfo) -> bool:
    """Tell whether a pydantic validation was asked to refuse bare numbers.

    Parameters
    ----------
    info : pydantic.ValidationInfo
        The validation info handed to a validator.

    Returns
    -------
    bool
        True when the validation context maps :data:`UNITS_REQUIRED` to true.
    """
    context = info.context
    return isinstance(context, Mapping) and bool(context.get(UNITS_REQUIRED, False))


def pydantic_quantity_error(exc: QuantityError) -> PydanticCustomError:
    """Wrap a :class:`QuantityError` so pydantic reports it at the field's location.

    Parameters
    ----------
    exc : QuantityError
        The error raised by :func:`check_quantity` or :func:`parse_quantity`.

    Returns
    -------
    pydantic_core.PydanticCustomError
        Of type ``"quantity"``, with the reason as its message.
    """
    # The reason travels as context so braces in unit text are never formatted.
    return PydanticCustomError("quantity", "{reason}", {"reason": exc.reason})


def quantity(
    dimension: str,
    *,
    gt: float | None = None,
    ge: float | None = None,
    lt: float | None = None,
    difference: bool = False,
) -> BeforeValidator:
    """Build the pydantic validator of a quantity field stored as an SI float.

    Use it as metadata: ``volume: Annotated[float, quantity("volume", gt=0.0)]``.

    Parameters
    ----------
    dimension : str
        One of :data:`DIMENSIONS`.
    gt, ge, lt : float, optional
        Bounds [SI unit], see :func:`check_quantity`.
    difference : bool, optional
        Read the value as a difference (see :func:`parse_quantity`).

    Returns
    -------
    pydantic.BeforeValidator
        Accepts a string with a unit; a bare number only when dimensionless or,
        outside file input (no :data:`UNITS_REQUIRED` context), as an SI value.
        None is passed on, for optional fields.
    """
    _dimension(dimension)

    def validate(value: Any, info: ValidationInfo) -> float | None:
        if value is None:
            # Left to the field's type: None is fine where the field is optional.
            return None
        try:
            return check_quantity(
                value,
                dimension,
                units_required=units_required(info),
                gt=gt,
                ge=ge,
                lt=lt,
                difference=difference,
            )
        except QuantityError as exc:
            raise pydantic_quantity_error(exc) from None

    return BeforeValidator(validate)


Volume = Annotated[float, quantity("volume")]
"""A volume stored in [m^3]."""
Flow = Annotated[float, quantity("flow")]
"""A volumetric flow stored in [m^3/s]."""
Temperature = Annotated[float, quantity("temperature")]
"""An absolute temperature stored in [K]."""
EnergyPerMol = Annotated[float, quantity("energy_per_mol")]
"""A molar energy stored in [J/mol]."""
RateConstant = Annotated[float, quantity("rate_constant")]
"""A first-order rate constant stored in [1/s]."""
Concentration = Annotated[float, quantity("concentration")]
"""A molar concentration stored in [mol/m^3]."""
Duration = Annotated[float, quantity("time")]
"""A duration stored in [s]."""
Dimensionless = Annotated[float, quantity("dimensionless")]
"""A plain number [1]."""
