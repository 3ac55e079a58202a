"""The alert rules' settings of a train: the ``[alerts]`` table of its description.

One frozen pydantic model per rule (:mod:`estimator.alerts` evaluates them), each
refusing unknown keys and storing quantities as SI floats (s for times), like the
rest of the train description (:mod:`estimator.config`, which loads them).
"""

from __future__ import annotations

from typing import Annotated, Literal, Self

from pydantic import BaseModel, ConfigDict, Field, StrictBool, StrictInt, model_validator

from estimator.errors import raise_problems as _raise_if
from estimator.units import quantity

__all__ = [
    "ActivityFallingAlert",
    "ActivityLowAlert",
    "AlertsConfig",
    "ConversionShortfallAlert",
    "FlowLowAlert",
    "ModelMismatchAlert",
    "ReinitialisedAlert",
    "TagFrozenAlert",
    "TagSpikesAlert",
    "TagStaleAlert",
    "TemperatureRangeAlert",
]

_MODEL = ConfigDict(frozen=True, extra="forbid")
_MINUTE = 60.0
_HOUR = 3600.0
_DAY = 86400.0


class ConversionShortfallAlert(BaseModel):
    """Per vessel: the estimated conversion falls short of the expected one.

    The shortfall is ``expected - estimated`` conversion. The expectation is the
    design model's (design activity) driven by the measured inputs: ``"dynamic"``
    (default) runs its balances through the same flow, temperature and feed history,
    so a feed step or a throughput change moves the expectation as it moves the
    plant; ``"steady"`` takes its steady state at each moment's inputs (the product
    form), which runs ahead of the plant after every change. A band is exceeded only
    when the shortfall
    exceeds it by more than ``sigma_multiple`` times the estimate's own 1-sigma,
    ``shortfall - band > k * conversion_std``, and the alert clears once
    ``shortfall - (band - deadband) <= k * conversion_std``.

    Attributes
    ----------
    enabled : bool
        Evaluate this rule.
    warning_band : float
        Shortfall tolerated before a warning [-] (conversion, 0.01 = one point);
        default 0.01.
    high_band : float
        Shortfall tolerated before a high-priority alert [-]; above
        ``warning_band``; default 0.03.
    sigma_multiple : float
        k: how many of its own 1-sigma the shortfall must exceed a band by [-];
        default 2.
    deadband : float
        How far back inside a band the shortfall must come to clear [-]; at most
        ``warning_band``; default 0.005.
    on_delay, off_delay : float
        [s]; defaults 15 min and 30 min.
    expectation : {"dynamic", "steady"}
        How the expectation follows the inputs (above); default "dynamic".
    """

    model_config = _MODEL

    enabled: StrictBool = True
    expectation: Literal["dynamic", "steady"] = "dynamic"
    warning_band: Annotated[float, quantity("dimensionless", gt=0.0, lt=1.0)] = 0.01
    high_band: Annotated[float, quantity("dimensionless", gt=0.0, lt=1.0)] = 0.03
    sigma_multiple: Annotated[float, quantity("dimensionless", ge=0.0)] = 2.0
    deadband: Annotated[float, quantity("dimensionless", ge=0.0)] = 0.005
    on_delay: Annotated[float, quantity("time", ge=0.0)] = 15 * _MINUTE
    off_delay: Annotated[float, quantity("time", ge=0.0)] = 30 * _MINUTE

    @model_validator(mode="after")
    def _check_bands(self) -> Self:
        problems: list[tuple[str, str]] = []
        if not self.high_band > self.warning_band:
            problems.append(
                (
                    "high_band",
                    f"must exceed warning_band ({self.warning_band:g}), got {self.high_band:g}",
                )
            )
        if self.deadband > self.warning_band:
            problems.append(
                (
                    "deadband",
                    f"must not exceed warning_band ({self.warning_band:g}), got {self.deadband:g}",
                )
            )
        _raise_if(problems)
        return self


class ActivityLowAlert(BaseModel):
    """The catalyst activity is below a limit, beyond its own uncertainty.

    Active when ``activity + k * activity_std < limit``; clears once
    ``activity + k * activity_std >= limit + deadband``. Evaluated only when the
    activity is estimated.

    Attributes
    ----------
    enabled : bool
        Evaluate this rule.
    limit : float
        Activity below which to alert [-], on the scale of ``design_activity``;
        default 0.9.
    sigma_multiple : float
        k [-]; default 2.
    deadband : float
        [-]; default 0.02.
    on_delay, off_delay : float
        [s]; defaults 15 min and 30 min.
    """

    model_config = _MODEL

    enabled: StrictBool = True
    limit: Annotated[float, quantity("dimensionless", gt=0.0)] = 0.9
    sigma_multiple: Annotated[float, quantity("dimensionless", ge=0.0)] = 2.0
    deadband: Annotated[float, quantity("dimensionless", ge=0.0)] = 0.02
    on_delay: Annotated[float, quantity("time", ge=0.0)] = 15 * _MINUTE
    off_delay: Annotated[float, quantity("time", ge=0.0)] = 30 * _MINUTE


class ActivityFallingAlert(BaseModel):
    """The catalyst activity falls faster than a rate, beyond the rate's uncertainty.

    The rate is the slope of a least-squares line through the activity estimates
    of the last ``window``. Active when ``fall - k * se > rate_limit`` (``fall`` is
    minus the slope, ``se`` its standard error); clears once
    ``fall - k * se <= rate_limit - deadband``.

    Attributes
    ----------
    enabled : bool
        Evaluate this rule.
    rate_limit : float
        Fall of activity per unit time tolerated [1/s] (in a file e.g.
        ``"0.05 1/d"``: 5 % of a unit activity a day); default 0.05 1/d.
    window : float
        Span of the least-squares line [s]; default 2 h.
    sigma_multiple : float
        k [-]; default 2.
    deadband : float
        [1/s]; default 0.05 1/d.
    on_delay, off_delay : float
        [s]; defaults 5 min (the slope already averages a window of estimates) and
        30 min.
    """

    model_config = _MODEL

    enabled: StrictBool = True
    rate_limit: Annotated[float, quantity("rate_constant", ge=0.0)] = 0.05 / _DAY
    window: Annotated[float, quantity("time", gt=0.0)] = 2 * _HOUR
    sigma_multiple: Annotated[float, quantity("dimensionless", ge=0.0)] = 2.0
    deadband: Annotated[float, quantity("rate_constant", ge=0.0)] = 0.05 / _DAY
    on_delay: Annotated[float, quantity("time", ge=0.0)] = 5 * _MINUTE
    off_delay: Annotated[float, quantity("time", ge=0.0)] = 30 * _MINUTE


class TagStaleAlert(BaseModel):
    """A tag has sent no reading for too long.

    Attributes
    ----------
    enabled : bool
        Evaluate this rule.
    stale_after : float
        Longest gap between readings of a transmitter or analyzer [s]; default
        30 min.
    lab_stale_after : float
        The same for lab tags, whose time stamp is the sample time [s]; default
        24 h.
    on_delay, off_delay : float
        [s]; defaults 0 (``stale_after`` is the delay) and 10 min.
    """

    model_config = _MODEL

    enabled: StrictBool = True
    stale_after: Annotated[float, quantity("time", gt=0.0)] = 30 * _MINUTE
    lab_stale_after: Annotated[float, quantity("time", gt=0.0)] = 24 * _HOUR
    on_delay: Annotated[float, quantity("time", ge=0.0)] = 0.0
    off_delay: Annotated[float, quantity("time", ge=0.0)] = 10 * _MINUTE


class TagFrozenAlert(BaseModel):
    """A tag repeats exactly the same value: its output may be frozen.

    Lab tags and a flat zero (a stopped flow, covered by ``flow_low``) are not
    checked.

    Attributes
    ----------
    enabled : bool
        Evaluate this rule.
    samples : int
        Consecutive identical readings that make a tag frozen [-]; >= 2; default 12.
    on_delay, off_delay : float
        [s]; defaults 0 and 10 min.
    """

    model_config = _MODEL

    enabled: StrictBool = True
    samples: Annotated[StrictInt, Field(ge=2, le=10_000)] = 12
    on_delay: Annotated[float, quantity("time", ge=0.0)] = 0.0
    off_delay: Annotated[float, quantity("time", ge=0.0)] = 10 * _MINUTE


class TagSpikesAlert(BaseModel):
    """Too large a share of a tag's readings was rejected at the filter's gate.

    Attributes
    ----------
    enabled : bool
        Evaluate this rule.
    window : float
        Span over which the share is counted [s]; default 1 h.
    share : float
        Share of gated readings tolerated [-] (``"25 %"`` or 0.25); default 0.25.
    deadband : float
        [-]; default 0.1.
    min_readings : int
        Readings in the window needed to judge [-]; default 4.
    on_delay, off_delay : float
        [s]; defaults 0 and 15 min.
    """

    model_config = _MODEL

    enabled: StrictBool = True
    window: Annotated[float, quantity("time", gt=0.0)] = 1 * _HOUR
    share: Annotated[float, quantity("dimensionless", gt=0.0, lt=1.0)] = 0.25
    deadband: Annotated[float, quantity("dimensionless", ge=0.0)] = 0.1
    min_readings: Annotated[StrictInt, Field(ge=1, le=100_000)] = 4
    on_delay: Annotated[float, quantity("time", ge=0.0)] = 0.0
    off_delay: Annotated[float, quantity("time", ge=0.0)] = 15 * _MINUTE


class ModelMismatchAlert(BaseModel):
    """The analyzers disagree with the model more (or less) than their noise explains.

    The NIS of the accepted updates in the last ``window``, summed, is chi-square
    with the summed degrees of freedom D when the filter is consistent
    (Bar-Shalom, Li & Kirubarajan 2001, sec. 5.4); the alert compares NIS per dof
    with the two-sided ``probability`` bounds of chi2(D) / D.

    Attributes
    ----------
    enabled : bool
        Evaluate this rule.
    window : float
        [s]; default 6 h.
    probability : float
        Two-sided probability of the bounds [-]; default 0.999. The rule tests a
        sliding window continuously, so the chance that some window of a month
        strays outside its bounds is far larger than 1 - probability: with 2-h
        windows at 0.99 the demo train's simulated normal operation raised up to
        two per 30 days (bench/alert_figures.py), with 6-h windows at 0.999 at most
        one in 60 days (eight seeds).
    deadband : float
        How far inside the bounds NIS per dof must return to clear [-]; default 0.05.
    min_dof : int
        Degrees of freedom in the window needed to judge [-]; default 20.
    on_delay, off_delay : float
        [s]; defaults 1 h and 30 min (sliding windows overlap, so a window outside
        its bounds by chance tends to stay outside for a while).
    """

    model_config = _MODEL

    enabled: StrictBool = True
    window: Annotated[float, quantity("time", gt=0.0)] = 6 * _HOUR
    probability: Annotated[float, quantity("dimensionless", gt=0.5, lt=1.0)] = 0.999
    deadband: Annotated[float, quantity("dimensionless", ge=0.0)] = 0.05
    min_dof: Annotated[StrictInt, Field(ge=1, le=1_000_000)] = 20
    on_delay: Annotated[float, quantity("time", ge=0.0)] = 1 * _HOUR
    off_delay: Annotated[float, quantity("time", ge=0.0)] = 30 * _MINUTE


class ReinitialisedAlert(BaseModel):
    """The filter diverged and was started again from the model.

    Active from the re-initialisation (``estimator.divergence``) for ``settle``,
    while the estimates converge again; the event stays in the alert log until an
    operator acknowledges it. Registered only when the divergence watch is on.

    Attributes
    ----------
    enabled : bool
        Evaluate this rule.
    settle : float
        How long the estimates are announced as settling [s]; default 2 h.
    on_delay, off_delay : float
        [s]; defaults 0 and 0 (the re-initialisation is a fact, not a noisy figure).
    """

    model_config = _MODEL

    enabled: StrictBool = True
    settle: Annotated[float, quantity("time", gt=0.0)] = 2 * _HOUR
    on_delay: Annotated[float, quantity("time", ge=0.0)] = 0.0
    off_delay: Annotated[float, quantity("time", ge=0.0)] = 0.0


class FlowLowAlert(BaseModel):
    """The feed flow is near zero: below a fraction of its nominal value.

    Attributes
    ----------
    enabled : bool
        Evaluate this rule (skipped when the nominal flow is zero).
    fraction : float
        Flow / nominal flow below which to alert [-]; default 0.1.
    deadband : float
        [-] of the nominal; default 0.05.
    on_delay, off_delay : float
        [s]; defaults 1 min and 5 min.
    """

    model_config = _MODEL

    enabled: StrictBool = True
    fraction: Annotated[float, quantity("dimensionless", gt=0.0, lt=1.0)] = 0.1
    deadband: Annotated[float, quantity("dimensionless", ge=0.0)] = 0.05
    on_delay: Annotated[float, quantity("time", ge=0.0)] = 1 * _MINUTE
    off_delay: Annotated[float, quantity("time", ge=0.0)] = 5 * _MINUTE


class TemperatureRangeAlert(BaseModel):
    """A vessel temperature is outside ``reaction.valid_temperature``.

    Skipped when the reaction declares no valid range.

    Attributes
    ----------
    enabled : bool
        Evaluate this rule.
    deadband : float
        How far inside the range the temperature must return to clear [K];
        default 0.5 K.
    on_delay, off_delay : float
        [s]; defaults 1 min and 5 min.
    """

    model_config = _MODEL

    enabled: StrictBool = True
    deadband: Annotated[float, quantity("temperature", ge=0.0, difference=True)] = 0.5
    on_delay: Annotated[float, quantity("time", ge=0.0)] = 1 * _MINUTE
    off_delay: Annotated[float, quantity("time", ge=0.0)] = 5 * _MINUTE


class AlertsConfig(BaseModel):
    """The alert rules of a train and their limits (:mod:`estimator.alerts`).

    Every rule has its own table; every key is optional.

    Attributes
    ----------
    conversion_shortfall : ConversionShortfallAlert
    activity_low : ActivityLowAlert
    activity_falling : ActivityFallingAlert
    tag_stale : TagStaleAlert
    tag_frozen : TagFrozenAlert
    tag_spikes : TagSpikesAlert
    model_mismatch : ModelMismatchAlert
    estimator_reinitialised : ReinitialisedAlert
    flow_low : FlowLowAlert
    temperature_range : TemperatureRangeAlert
    max_shelve : float
        Longest an operator may shelve an alert [s]; default 24 h.
    evaluate_every : float
        The rules run once this much plant time has passed since they last ran,
        over every estimate since [s]; default 10 s, 0 for every update. Each
        estimate is judged at its own time either way (delays and windows are in
        plant time); the interval only sets how soon after its reading an alert
        is announced, and how often the rules' cost is paid.
    """

    model_config = _MODEL

    conversion_shortfall: ConversionShortfallAlert = ConversionShortfallAlert()
    activity_low: ActivityLowAlert = ActivityLowAlert()
    activity_falling: ActivityFallingAlert = ActivityFallingAlert()
    tag_stale: TagStaleAlert = TagStaleAlert()
    tag_frozen: TagFrozenAlert = TagFrozenAlert()
    tag_spikes: TagSpikesAlert = TagSpikesAlert()
    model_mismatch: ModelMismatchAlert = ModelMismatchAlert()
    estimator_reinitialised: ReinitialisedAlert = ReinitialisedAlert()
    flow_low: FlowLowAlert = FlowLowAlert()
    temperature_range: TemperatureRangeAlert = TemperatureRangeAlert()
    max_shelve: Annotated[float, quantity("time", gt=0.0)] = 24 * _HOUR
    evaluate_every: Annotated[float, quantity("time", ge=0.0)] = 10.0
