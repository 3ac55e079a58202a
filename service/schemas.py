"""Request and response bodies of the REST API (JSON; SI units unless a tag says).

Strict models: a string where a number belongs is refused with a 422 naming the
field, not coerced; unknown fields are refused too, so a misspelt key never passes
silently.
"""

from __future__ import annotations

import math
from datetime import datetime
from typing import Annotated, Any

from pydantic import BaseModel, BeforeValidator, ConfigDict, Field

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
    return value


Time = Annotated[
    float,
    BeforeValidator(_epoch_seconds),
    Field(description="Epoch seconds, or ISO 8601 text with an offset [s]"),
]


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

    tag: Annotated[str, Field(min_length=1, max_length=256)]
    time: Time
    value: Annotated[
        float, BeforeValidator(_number), Field(description="In the tag's declared unit")
    ]
    quality: Annotated[int | None, Field(ge=0, le=255, description="Source quality code")] = None


class ReadingsIn(BaseModel):
    """A batch of readings for one train, in any order."""

    model_config = _STRICT

    readings: Annotated[list[ReadingIn], Field(min_length=1)]


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

    toml: str | None = None
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


class Problem(BaseModel):
    """An error answer: what was wrong, in words."""

    detail: Any


def finite_or_none(value: float) -> float | None:
    """JSON has no NaN: report a non-finite number as null."""
    return value if math.isfinite(value) else None
