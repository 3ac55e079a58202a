"""Request and response bodies of the REST API (JSON; SI units unless a tag says).

Strict models: a string where a number belongs is refused with a 422 naming the
field, not coerced; unknown fields are refused too, so a misspelt key never passes
silently.
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from datetime import datetime
from typing import Annotated, Any, Literal, NotRequired

from pydantic import (
    AfterValidator,
    BaseModel,
    BeforeValidator,
    ConfigDict,
    Field,
    GetCoreSchemaHandler,
    TypeAdapter,
    ValidationError,
    with_config,
)
from pydantic_core import core_schema
from typing_extensions import TypedDict  # pydantic refuses typing's before Python 3.12

_STRICT = ConfigDict(strict=True, extra="forbid")


def _epoch_seconds(value: Any) -> Any:
    """Accept epoch seconds or an ISO 8601 time with an offset; return epoch seconds."""
    if isinstance(value, str):
        try:
            stamp = datetime.fromisoformat(value)
        except ValueError:
            raise ValueError(f"not an ISO 8601 time: {value!r}") from None
        if stamp.tzinfo is None:
            raise ValueError(f"time {value!r} needs an offset such as Z or +01:00")
        return stamp.timestamp()
    if isinstance(value, bool):
        raise ValueError("a time must be epoch seconds or ISO 8601 text")
    if isinstance(value, float) and not math.isfinite(value):
        raise ValueError(f"a time must be a finite number of epoch seconds, got {value!r}")
    return value


LAST_TIME = 253402300799.0
"""9999-12-31T23:59:59Z in epoch seconds [s]: the last time a timestamp may name."""

Time = Annotated[
    float,
    BeforeValidator(_epoch_seconds),
    Field(
        ge=0.0,
        le=LAST_TIME,
        allow_inf_nan=False,
        description="Epoch seconds, or ISO 8601 text with an offset, 1970 to 9999 [s]",
    ),
]


def text_problem(value: str) -> str | None:
    """Say why no database could store ``value`` as text, or None when it can.

    PostgreSQL refuses the NUL character in text, and neither backend can encode
    a lone UTF-16 surrogate (U+D800 to U+DFFF, which a JSON escape can produce)
    as UTF-8.
    """
    if "\x00" in value:
        return "must not contain the NUL character (U+0000)"
    if not value.isascii():
        try:
            value.encode("utf-8")
        except UnicodeEncodeError:
            return "must be valid Unicode: it holds a lone surrogate (U+D800 to U+DFFF)"
    return None


def _plain_text(value: str) -> str:
    """Refuse text with NUL or lone surrogates (see :func:`text_problem`)."""
    problem = text_problem(value)
    if problem is not None:
        raise ValueError(problem)
    return value


PlainText = Annotated[str, AfterValidator(_plain_text)]
"""Text a database can store: no NUL character, no lone surrogate."""


def document_text_problems(
    value: Any, loc: tuple[str | int, ...]
) -> list[tuple[tuple[str | int, ...], str]]:
    """Find every key or string in a nested document that fails :func:`text_problem`.

    Parameters
    ----------
    value : Any
        A parsed JSON or TOML document (dicts, lists, strings, numbers).
    loc : tuple
        Where the document sits in the request, e.g. ``("body", "config")``.

    Returns
    -------
    list of (loc, reason)
        One entry per offending key or string, with its full location.
    """
    found: list[tuple[tuple[str | int, ...], str]] = []
    if isinstance(value, str):
        problem = text_problem(value)
        if problem is not None:
            found.append((loc, problem))
    elif isinstance(value, dict):
        for key, item in value.items():
            key_text = str(key)
            problem = text_problem(key_text)
            if problem is not None:
                shown = key_text.encode("utf-8", "backslashreplace").decode()
                found.append(((*loc, shown), problem))
                continue
            found.extend(document_text_problems(item, (*loc, key_text)))
    elif isinstance(value, list):
        for i, item in enumerate(value):
            found.extend(document_text_problems(item, (*loc, i)))
    return found


def _number(value: Any) -> Any:
    """Let JSON integers through as floats; NaN and infinity are screened later."""
    if isinstance(value, bool):
        raise ValueError("a value must be a number")
    if isinstance(value, int):
        return float(value)
    return value


class ReadingIn(BaseModel):
    """One reading of one tag."""

    model_config = _STRICT

    tag: Annotated[PlainText, Field(min_length=1, max_length=256)]
    time: Time
    value: Annotated[
        float, BeforeValidator(_number), Field(description="In the tag's declared unit")
    ]
    quality: Annotated[int | None, Field(ge=0, le=255, description="Source quality code")] = None


class ReadingsIn(BaseModel):
    """A batch of readings for one train, in any order."""

    model_config = _STRICT

    readings: Annotated[list[ReadingIn], Field(min_length=1)]


@with_config(ConfigDict(strict=True, extra="forbid"))
class _PlainReading(TypedDict):
    """A reading :class:`ReadingIn` takes as it is: numbers only, any tag length it allows.

    The same types and bounds as :class:`ReadingIn`, without its Python validators
    (ISO 8601 times, the text check of tags), so that a batch of them is checked
    by pydantic's compiled code alone.
    """

    tag: Annotated[str, Field(min_length=1, max_length=256)]
    time: Annotated[float, Field(ge=0.0, le=LAST_TIME, allow_inf_nan=False)]
    value: float
    quality: NotRequired[Annotated[int | None, Field(ge=0, le=255)]]


_PLAIN_READINGS = TypeAdapter(list[_PlainReading])


@dataclass(frozen=True, slots=True)
class ReadingColumns:
    """A posted batch of readings (:class:`ReadingsIn`) as columns, validated.

    Validating a body into this type gives exactly the verdict, the errors and
    the OpenAPI description of :class:`ReadingsIn`, without a model object per
    reading. A batch of plain readings (numeric times, ASCII tags) is checked in
    one pass of pydantic's compiled code; any other body, valid or not, goes
    through :class:`ReadingsIn` itself, which gives the errors.

    Attributes
    ----------
    tags : list of str
        Tag of each reading.
    times : list of float
        Reading time of each [s since the epoch].
    values : list of float
        Value of each, in its tag's declared unit (NaN and infinity pass: the
        hub refuses them with a reason).
    qualities : list of (int or None), or None
        Source quality code of each reading; None when no reading has one.
    """

    tags: list[str]
    times: list[float]
    values: list[float]
    qualities: list[int | None] | None

    def __len__(self) -> int:
        return len(self.tags)

    @classmethod
    def __get_pydantic_core_schema__(
        cls, source: Any, handler: GetCoreSchemaHandler
    ) -> core_schema.CoreSchema:
        """Validate as :class:`ReadingsIn` (its schema, its errors), answering columns."""
        return core_schema.no_info_wrap_validator_function(cls._validate, handler(ReadingsIn))

    @classmethod
    def _validate(
        cls, value: Any, full: core_schema.ValidatorFunctionWrapHandler
    ) -> ReadingColumns:
        """Take plain readings directly; leave any other body to :class:`ReadingsIn`."""
        columns = cls._plain(value)
        if columns is not None:
            return columns
        model: ReadingsIn = full(value)
        readings = model.readings
        qualities = [r.quality for r in readings]
        return cls(
            [r.tag for r in readings],
            [r.time for r in readings],
            [r.value for r in readings],
            None if all(q is None for q in qualities) else qualities,
        )

    @staticmethod
    def _plain(value: Any) -> ReadingColumns | None:
        """Return the columns of a body of plain readings; None for any other body."""
        if type(value) is not dict or len(value) != 1:
            return None
        readings = value.get("readings")
        if type(readings) is not list or not readings:
            return None
        try:
            rows = _PLAIN_READINGS.validate_python(readings)
        except ValidationError:
            return None
        tags = [r["tag"] for r in rows]
        text = "".join(tags)
        if "\x00" in text or not text.isascii():  # see text_problem
            return None
        qualities = [r.get("quality") for r in rows]
        return ReadingColumns(
            tags,
            [r["time"] for r in rows],
            [r["value"] for r in rows],
            None if all(q is None for q in qualities) else qualities,
        )


class RefusedReading(BaseModel):
    """A reading that was not taken, with the reason in words."""

    index: int = Field(description="Position in the posted batch")
    tag: str
    time: float
    value: float | None
    reason: str


class IngestResult(BaseModel):
    """What became of a posted batch."""

    accepted: int = Field(description="Readings journaled and applied (new ones)")
    duplicates: int = Field(description="Readings already journaled with the same value")
    refused: list[RefusedReading]


class TrainIn(BaseModel):
    """A train description: TOML text, or the same document as JSON."""

    model_config = ConfigDict(extra="forbid")

    toml: PlainText | None = None
    config: dict[str, Any] | None = None


class TrainPublic(BaseModel):
    """A train as the service holds it."""

    name: str
    title: str
    version: int
    retired: bool
    vessels: list[str]
    species: list[str]
    tags: list[str]
    last_estimate_time: float | None


class TrainsPublic(BaseModel):
    """Trains, with their count."""

    data: list[TrainPublic]
    count: int


class ValueStd(BaseModel):
    """A value with its 1-sigma."""

    value: float
    std: float


class VesselEstimate(BaseModel):
    """One vessel's estimated contents and conversion."""

    name: str
    concentration: dict[str, ValueStd] = Field(description="Per species [mol/m^3]")
    conversion: ValueStd = Field(description="Reactant conversion after this vessel [-]")
    design_conversion: float = Field(description="Design-model expectation [-]")
    shortfall: float = Field(description="design_conversion - conversion [-]")


class EstimatePublic(BaseModel):
    """The estimate of a train at one time."""

    time: float = Field(description="Epoch seconds [s]")
    time_utc: str
    vessels: list[VesselEstimate]
    activity: ValueStd = Field(description="Catalyst activity [-]")
    feed: dict[str, float] = Field(description="Feed concentration per species [mol/m^3]")
    flow: float = Field(description="Feed flow [m^3/s]")


class EstimatesPublic(BaseModel):
    """Estimates over a time range, oldest first."""

    data: list[EstimatePublic]
    count: int


class GatedPublic(BaseModel):
    """A reading the filter rejected at its gate, or took as a step."""

    tag: str
    time: float
    sample_time: float
    value: float
    predicted: float
    unit: str
    nis: float
    reason: str
    decision: str


class GatedListPublic(BaseModel):
    """Gated readings, with their count."""

    data: list[GatedPublic]
    count: int


class ObservabilityPublic(BaseModel):
    """Which states the train's measurements can determine."""

    observable: bool
    rank: int
    n_states: int
    unobservable: list[str]
    suggestions: list[str]
    message: str


AlertStateName = Literal[
    "normal",
    "active_unacknowledged",
    "active_acknowledged",
    "cleared_unacknowledged",
    "shelved",
    "out_of_service",
]
"""The ISA-18.2 / IEC 62682 states an alert can be in."""

PriorityName = Literal["high", "warning", "advisory"]
"""How urgently an alert asks for attention, most urgent first."""


class AlertPublic(BaseModel):
    """One alert of a train and its state now."""

    alert_id: str = Field(description="'<rule>:<subject>', e.g. 'conversion_shortfall_high:R-201'")
    rule: str
    subject: str = Field(description="The vessel, tag or train the alert is about")
    priority: PriorityName
    title: str
    state: AlertStateName
    condition_active: bool = Field(
        description="Whether the rule's condition holds (after its delays), shelved or not"
    )
    since: float | None = Field(description="Last state change, epoch seconds [s]")
    activated_at: float | None = Field(
        description="When the condition last became active, epoch seconds [s]"
    )
    figure: float | None = Field(description="The rule's latest figure [unit]")
    threshold: float | None = Field(description="The limit it is compared with [unit]")
    unit: str = Field(description="Unit of figure and threshold (SI; empty if dimensionless)")
    message: str = Field(description="What the rule says, ending with the monitoring-aid notice")
    shelved_until: float | None = Field(description="Shelving expiry, epoch seconds [s]")
    note: str = Field(description="The reason given with the latest operator action")


class AlertsPublic(BaseModel):
    """Alerts, most urgent first, with their count."""

    data: list[AlertPublic]
    count: int


class AlertEventPublic(BaseModel):
    """One state transition of one alert (also the data of SSE and webhook events)."""

    train: str
    sequence: int = Field(description="Position in the train's alert event log, from 1")
    alert_id: str
    rule: str
    subject: str
    priority: PriorityName
    time: float = Field(description="When it happened, epoch seconds [s]")
    time_utc: str
    from_state: AlertStateName
    to_state: AlertStateName
    who: str = Field(description="'stagewatch' for automatic transitions, else the API key name")
    why: str = Field(description="The timing that fired, or the operator's reason")
    figure: float | None = Field(description="The rule's figure at the transition [unit]")
    threshold: float | None = Field(description="The limit [unit]")
    unit: str
    message: str = Field(description="What happened, ending with the monitoring-aid notice")


class AlertEventsPublic(BaseModel):
    """Alert events in log order, with their count."""

    data: list[AlertEventPublic]
    count: int


Reason = Annotated[
    PlainText,
    Field(min_length=1, max_length=2000, description="Why, in the operator's words (logged)"),
]


class AlertActionIn(BaseModel):
    """An operator's action on an alert, with the reason."""

    model_config = _STRICT

    reason: Reason


class ShelveIn(BaseModel):
    """Shelve an alert until a time, with the reason."""

    model_config = _STRICT

    until: Time
    reason: Reason


class AlertActionResult(BaseModel):
    """What an operator's action did: the transition and the alert after it."""

    event: AlertEventPublic
    alert: AlertPublic


class Problem(BaseModel):
    """An error answer: what was wrong, in words."""

    detail: Any


def finite_or_none(value: float) -> float | None:
    """JSON has no NaN: report a non-finite number as null."""
    return value if math.isfinite(value) else None
