"""The train description: vessels, feed, reaction, measurements and filter tuning.

A train is written in TOML (or JSON) with units on every dimensional quantity
(``volume = "14 m^3"``) and loaded with :func:`load_train_config` or
:func:`parse_train_config`. Every model here is frozen, refuses unknown keys (a
misspelled key is an error, never silently ignored) and stores its quantities as
SI floats: m^3, m^3/s, K, J/mol, 1/s, mol/m^3, s.

Loading collects every problem it can find and raises one
:class:`~estimator.errors.ConfigError` listing them, each under the dotted key of
the entry at fault (``vessels[1].volume``, ``estimator.initial_std.activity``).

Python callers may also build the models directly. They then pass numbers in SI
(``VesselConfig(name="R-1", volume=8.0, temperature=330.0)``) or strings with
units; only file input insists on a unit for every dimensional number. Direct
construction reports faults as pydantic ``ValidationError``.
"""

import json
import os
import re
import tomllib
from collections.abc import Mapping, Sequence
from pathlib import Path
from typing import Annotated, Any, ClassVar, Literal, Self

from pydantic import (
    AfterValidator,
    BaseModel,
    BeforeValidator,
    ConfigDict,
    Discriminator,
    Field,
    StrictBool,
    StrictInt,
    Tag,
    ValidationError,
    ValidationInfo,
    field_validator,
    model_validator,
)

from estimator.alert_config import (
    ActivityFallingAlert,
    ActivityLowAlert,
    AlertsConfig,
    ConversionShortfallAlert,
    FlowLowAlert,
    ModelMismatchAlert,
    ReinitialisedAlert,
    TagFrozenAlert,
    TagSpikesAlert,
    TagStaleAlert,
    TemperatureRangeAlert,
)
from estimator.errors import ConfigError, ConfigProblem, QuantityError
from estimator.errors import ConfigProblems as _Problems
from estimator.errors import config_error as _error
from estimator.errors import join_key as _join
from estimator.errors import raise_problems as _raise_if
from estimator.units import (
    UNITS_REQUIRED,
    check_quantity,
    format_quantity,
    pydantic_quantity_error,
    quantity,
    unit_scale_offset,
    units_required,
)

__all__ = [
    "ActivityFallingAlert",
    "ActivityLowAlert",
    "AlertsConfig",
    "ConcentrationTag",
    "ConcentrationWalk",
    "DivergenceWatch",
    "ConversionShortfallAlert",
    "EstimatorConfig",
    "FeedConfig",
    "FlowLowAlert",
    "FlowTag",
    "InitialStd",
    "MeasurementConfig",
    "ModelMismatchAlert",
    "RandomWalk",
    "ReactionConfig",
    "ReinitialisedAlert",
    "TagFrozenAlert",
    "TagInput",
    "TagSpikesAlert",
    "TagStaleAlert",
    "TemperatureRangeAlert",
    "TemperatureTag",
    "TrainConfig",
    "VesselConfig",
    "load_train_config",
    "parse_train_config",
]

_MODEL = ConfigDict(frozen=True, extra="forbid")

# Validation-context key set by parse_train_config, which runs the cross-checks
# itself on the raw data so that they are reported even when fields are invalid.
_DEFER_CROSS_CHECKS = "defer_cross_checks"

# Tags of the "tag table or fixed value" unions; dropped from error locations.
_TAG_TABLE = "tag table"
_FIXED_VALUE = "fixed value"

_SLUG = re.compile(r"[a-z0-9_-]{1,64}")
_MAX_SPECIES = 6
_MAX_VESSELS = 20
_HOUR = 3600.0


def _text(value: str, longest: int) -> str:
    if not value.strip():
        raise _error("must not be empty")
    if value != value.strip():
        raise _error(f"must not begin or end with spaces, got {value!r}")
    if len(value) > longest:
        raise _error(f"must be at most {longest} characters, got {len(value)}")
    return value


def _slug(value: str) -> str:
    if _SLUG.fullmatch(value) is None:
        raise _error(
            "must be 1 to 64 lowercase letters, digits, '-' or '_' "
            f"(e.g. 'wrenfield-line2'), got {value!r}"
        )
    return value


Name = Annotated[str, AfterValidator(lambda value: _text(value, 64))]
# Historian tags can be long (OPC UA node ids carry the whole browse path).
TagName = Annotated[str, AfterValidator(lambda value: _text(value, 256))]


def _si(
    value: Any,
    dimension: str,
    info: ValidationInfo,
    *,
    gt: float | None = None,
    ge: float | None = None,
    difference: bool = False,
) -> float:
    try:
        return check_quantity(
            value,
            dimension,
            units_required=units_required(info),
            gt=gt,
            ge=ge,
            difference=difference,
        )
    except QuantityError as exc:
        raise pydantic_quantity_error(exc) from None


def _pair(
    value: Any, dimension: str, info: ValidationInfo, *, gt: float | None = None
) -> tuple[float, float] | None:
    if value is None:
        return None
    if isinstance(value, str | bytes) or not isinstance(value, Sequence) or len(value) != 2:
        raise _error(f"must be a pair [low, high], got {value!r}")
    ends = []
    for end, item in zip(("low", "high"), value, strict=True):
        try:
            ends.append(check_quantity(item, dimension, units_required=units_required(info), gt=gt))
        except QuantityError as exc:
            raise _error(f"{end} end: {exc.reason}") from None
    return ends[0], ends[1]


def _range_problem(pair: tuple[float, float], unit: str) -> str | None:
    low, high = pair
    if low < high:
        return None
    return (
        "low end must be below high end, got "
        f"[{format_quantity(low, unit)}, {format_quantity(high, unit)}]"
    )


class TagInput(BaseModel):
    """A quantity read from a plant tag, with the nominal value used until it is read.

    Use the subclasses :class:`FlowTag`, :class:`TemperatureTag` and
    :class:`ConcentrationTag`: they fix which dimension ``unit``, ``nominal``,
    ``range`` and ``std`` must have.

    Attributes
    ----------
    tag : str
        The historian tag, unique across the train.
    unit : str
        Unit the readings arrive in (e.g. ``"degC"``, ``"m^3/h"``); readings are
        converted with ``SI = scale * value + offset``.
    nominal : float
        Value assumed before the first reading [SI unit].
    range : tuple of float or None
        Instrument range (low, high) [SI unit]; low < high and the nominal inside.
    std : float or None
        1-sigma reading noise [SI unit]; required for feed analyzers filtered
        as states.
    dead_time : float
        Transport and analysis delay: a reading at t is for the sample at
        t - dead_time [s].
    bias : bool
        Estimate a constant-ish offset of this analyzer as a state (feed
        analyzers only).
    """

    model_config = _MODEL

    dimension: ClassVar[str] = ""
    nominal_gt: ClassVar[float | None] = None
    nominal_ge: ClassVar[float | None] = None
    allows_bias: ClassVar[bool] = False

    tag: TagName
    unit: str
    nominal: float
    range: tuple[float, float] | None = None
    std: float | None = None
    dead_time: Annotated[float, quantity("time", ge=0.0)] = 0.0
    bias: StrictBool = False

    @classmethod
    def _dimension(cls) -> str:
        if not cls.dimension:
            raise TypeError(
                "TagInput has no dimension: use FlowTag, TemperatureTag or ConcentrationTag"
            )
        return cls.dimension

    @field_validator("unit")
    @classmethod
    def _check_unit(cls, value: str) -> str:
        try:
            unit_scale_offset(value, cls._dimension())
        except QuantityError as exc:
            raise pydantic_quantity_error(exc) from None
        return value.strip()

    @field_validator("nominal", mode="before")
    @classmethod
    def _check_nominal(cls, value: Any, info: ValidationInfo) -> float:
        return _si(value, cls._dimension(), info, gt=cls.nominal_gt, ge=cls.nominal_ge)

    @field_validator("range", mode="before")
    @classmethod
    def _check_range(cls, value: Any, info: ValidationInfo) -> tuple[float, float] | None:
        return _pair(value, cls._dimension(), info)

    @field_validator("std", mode="before")
    @classmethod
    def _check_std(cls, value: Any, info: ValidationInfo) -> float | None:
        if value is None:
            return None
        return _si(value, cls._dimension(), info, gt=0.0, difference=True)

    @model_validator(mode="after")
    def _check_consistency(self) -> Self:
        problems: list[tuple[str, str]] = []
        if self.range is not None:
            reason = _range_problem(self.range, self.unit)
            if reason is not None:
                problems.append(("range", reason))
            elif not self.range[0] <= self.nominal <= self.range[1]:
                low, high = (format_quantity(v, self.unit) for v in self.range)
                shown = format_quantity(self.nominal, self.unit)
                problems.append(("nominal", f"must lie inside range [{low}, {high}], got {shown}"))
        if self.bias and not self.allows_bias:
            problems.append(("bias", "only feed composition analyzers can carry a bias state"))
        _raise_if(problems)
        return self

    @property
    def scale(self) -> float:
        """SI units per reading unit: ``SI = scale * value + offset``."""
        return unit_scale_offset(self.unit, self._dimension())[0]

    @property
    def offset(self) -> float:
        """SI value of a reading of zero [SI unit] (273.15 K for degC, else mostly 0)."""
        return unit_scale_offset(self.unit, self._dimension())[1]


class FlowTag(TagInput):
    """The feed flow transmitter; flows in [m^3/s], a nominal of zero allowed."""

    dimension: ClassVar[str] = "flow"
    nominal_ge: ClassVar[float | None] = 0.0


class TemperatureTag(TagInput):
    """A vessel temperature transmitter; temperatures in [K]."""

    dimension: ClassVar[str] = "temperature"
    nominal_gt: ClassVar[float | None] = 0.0


class ConcentrationTag(TagInput):
    """A feed composition analyzer; concentrations in [mol/m^3]."""

    dimension: ClassVar[str] = "concentration"
    nominal_ge: ClassVar[float | None] = 0.0
    allows_bias: ClassVar[bool] = True


def _tag_or_fixed(value: Any) -> str:
    return _TAG_TABLE if isinstance(value, Mapping | TagInput) else _FIXED_VALUE


TemperatureSource = Annotated[
    Annotated[TemperatureTag, Tag(_TAG_TABLE)]
    | Annotated[
        Annotated[float, quantity("temperature", gt=0.0)],
        Tag(_FIXED_VALUE),
    ],
    Discriminator(_tag_or_fixed),
]
"""A measured temperature (a tag table) or a fixed one [K]."""

CompositionSource = Annotated[
    Annotated[ConcentrationTag, Tag(_TAG_TABLE)]
    | Annotated[
        Annotated[float, quantity("concentration", ge=0.0)],
        Tag(_FIXED_VALUE),
    ],
    Discriminator(_tag_or_fixed),
]
"""A feed analyzer (a tag table) or a fixed feed concentration [mol/m^3]."""


def _vessel_name(value: str) -> str:
    if value == "feed":
        raise _error("'feed' is reserved for the train's inlet; choose another vessel name")
    return value


class VesselConfig(BaseModel):
    """One stirred vessel of the train, in flow order.

    Attributes
    ----------
    name : str
        Unique vessel name (e.g. ``"R-201"``), used as a measurement location.
    volume : float
        Liquid volume, constant (overflow) [m^3]; > 0.
    temperature : TemperatureTag or float
        The vessel temperature transmitter, or a fixed temperature [K] for a
        vessel without one; > 0 K.
    """

    model_config = _MODEL

    name: Annotated[Name, AfterValidator(_vessel_name)]
    volume: Annotated[float, quantity("volume", gt=0.0)]
    temperature: TemperatureSource

    @property
    def nominal_temperature(self) -> float:
        """Temperature assumed before any reading: the fixed value or the tag's nominal [K]."""
        if isinstance(self.temperature, TemperatureTag):
            return self.temperature.nominal
        return self.temperature


class FeedConfig(BaseModel):
    """The feed to the first vessel: flow and composition.

    Attributes
    ----------
    flow : FlowTag
        Volumetric feed flow, common to every vessel (overflow) [m^3/s].
    model : {"state", "input"}
        ``"state"``: each analyzed feed concentration is a random-walk state the
        filter updates with the analyzer readings (each analyzer needs ``std``).
        ``"input"``: readings are used as-is and held between samples.
    composition : dict of str to ConcentrationTag or float
        Per species, an analyzer or a fixed concentration [mol/m^3]. Loading a
        :class:`TrainConfig` fills species left out with a fixed 0.0 and orders
        the entries as the species are declared.
    """

    model_config = _MODEL

    flow: FlowTag
    model: Literal["state", "input"] = "state"
    composition: dict[str, CompositionSource] = {}

    @model_validator(mode="after")
    def _check_analyzers(self) -> Self:
        problems: list[tuple[str, str]] = []
        for species, source in self.composition.items():
            if not isinstance(source, ConcentrationTag):
                continue
            if self.model == "state" and source.std is None:
                problems.append(
                    (
                        f"composition.{species}.std",
                        "required when feed.model = 'state': the analyzer's 1-sigma noise, "
                        "e.g. '25 mol/m^3'",
                    )
                )
            if self.model == "input" and source.bias:
                problems.append(
                    (
                        f"composition.{species}.bias",
                        "an analyzer bias is estimated only when feed.model = 'state'",
                    )
                )
        _raise_if(problems)
        return self


class ReactionConfig(BaseModel):
    """The one reaction A -> B or A <=> B, first order, Arrhenius in temperature.

    Attributes
    ----------
    kind : {"irreversible", "reversible"}
        ``r = a k(T) C_A`` or ``r = a k(T) (C_A - C_B / K_eq(T))``.
    reactant, product : str
        Declared species A and B; different.
    k_ref : float
        Rate constant at ``T_ref`` and design activity [1/s]; > 0.
    T_ref : float
        Reference temperature [K]; > 0.
    activation_energy : float
        Arrhenius activation energy [J/mol]; >= 0.
    equilibrium_constant_ref : float or None
        ``K_eq`` at ``T_ref`` [-]; > 0; required for, and only for, reversible.
    reaction_enthalpy : float
        Reaction enthalpy for the van 't Hoff dependence of ``K_eq`` [J/mol].
    valid_temperature : tuple of float or None
        Temperatures (low, high) where the kinetics are known to hold [K].

    Notes
    -----
    ``k(T) = k_ref exp(-E_a / R (1/T - 1/T_ref))`` and
    ``K_eq(T) = K_eq,ref exp(-dH_r / R (1/T - 1/T_ref))``.
    """

    model_config = _MODEL

    kind: Literal["irreversible", "reversible"]
    reactant: str
    product: str
    k_ref: Annotated[float, quantity("rate_constant", gt=0.0)]
    T_ref: Annotated[float, quantity("temperature", gt=0.0)]
    activation_energy: Annotated[float, quantity("energy_per_mol", ge=0.0)]
    equilibrium_constant_ref: Annotated[float | None, quantity("dimensionless", gt=0.0)] = None
    reaction_enthalpy: Annotated[float, quantity("energy_per_mol")] = 0.0
    valid_temperature: Annotated[
        tuple[float, float] | None,
        BeforeValidator(lambda value, info: _pair(value, "temperature", info, gt=0.0)),
    ] = None

    @model_validator(mode="after")
    def _check_kind(self) -> Self:
        problems: list[tuple[str, str]] = []
        if self.kind == "reversible" and self.equilibrium_constant_ref is None:
            problems.append(
                ("equilibrium_constant_ref", "required when kind = 'reversible' (K_eq at T_ref)")
            )
        if self.kind == "irreversible" and self.equilibrium_constant_ref is not None:
            problems.append(
                ("equilibrium_constant_ref", "applies only when kind = 'reversible'; remove it")
            )
        if self.valid_temperature is not None:
            reason = _range_problem(self.valid_temperature, "degC")
            if reason is not None:
                problems.append(("valid_temperature", reason))
        _raise_if(problems)
        return self


class MeasurementConfig(BaseModel):
    """An analyzer or lab result of one species in one vessel.

    Attributes
    ----------
    tag : str
        The historian tag, unique across the train.
    species : str
        Declared species measured.
    location : str
        Name of the vessel sampled (feed analyzers belong in ``feed.composition``).
    std : float
        1-sigma measurement noise [mol/m^3]; > 0.
    dead_time : float
        Analyzer delay: a reading at t is for the sample at t - dead_time [s].
    unit : str
        Unit the readings arrive in; ``SI = scale * value + offset``.
    kind : {"analyzer", "lab"}
        ``"lab"``: the reading's time stamp is the sample time.
    range : tuple of float or None
        Instrument range (low, high) [mol/m^3].
    """

    model_config = _MODEL

    tag: TagName
    species: str
    location: str
    std: Annotated[float, quantity("concentration", gt=0.0, difference=True)]
    dead_time: Annotated[float, quantity("time", ge=0.0)] = 0.0
    unit: str = "mol/m^3"
    kind: Literal["analyzer", "lab"] = "analyzer"
    range: Annotated[
        tuple[float, float] | None,
        BeforeValidator(lambda value, info: _pair(value, "concentration", info)),
    ] = None

    @field_validator("unit")
    @classmethod
    def _check_unit(cls, value: str) -> str:
        try:
            unit_scale_offset(value, "concentration")
        except QuantityError as exc:
            raise pydantic_quantity_error(exc) from None
        return value.strip()

    @model_validator(mode="after")
    def _check_range(self) -> Self:
        if self.range is not None:
            reason = _range_problem(self.range, self.unit)
            _raise_if([("range", reason)] if reason is not None else [])
        return self

    @property
    def scale(self) -> float:
        """SI units per reading unit: ``SI = scale * value + offset``."""
        return unit_scale_offset(self.unit, "concentration")[0]

    @property
    def offset(self) -> float:
        """SI value of a reading of zero [mol/m^3]."""
        return unit_scale_offset(self.unit, "concentration")[1]


class RandomWalk(BaseModel):
    """Tuning of a random-walk state: 1-sigma growth ``sigma`` over the time ``per``.

    This class is for dimensionless states (the activity);
    :class:`ConcentrationWalk` is the same for concentrations.

    Attributes
    ----------
    sigma : float
        1-sigma change accumulated over ``per`` [state unit]; >= 0.
    per : float
        The time over which ``sigma`` accrues [s]; > 0.
    """

    model_config = _MODEL

    dimension: ClassVar[str] = "dimensionless"

    sigma: float
    per: Annotated[float, quantity("time", gt=0.0)]

    @field_validator("sigma", mode="before")
    @classmethod
    def _check_sigma(cls, value: Any, info: ValidationInfo) -> float:
        return _si(value, cls.dimension, info, ge=0.0, difference=True)

    @property
    def intensity(self) -> float:
        """Continuous white-noise intensity ``sigma**2 / per`` [state unit^2/s]."""
        return self.sigma**2 / self.per


class ConcentrationWalk(RandomWalk):
    """Random-walk tuning of a concentration state; ``sigma`` in [mol/m^3]."""

    dimension: ClassVar[str] = "concentration"


class InitialStd(BaseModel):
    """1-sigma uncertainty of each kind of state when the filter starts.

    Attributes
    ----------
    concentration : float
        Vessel concentrations [mol/m^3].
    activity : float
        Catalyst activity [-].
    feed : float
        Feed concentrations filtered as states [mol/m^3].
    bias : float
        Feed analyzer biases [mol/m^3].
    """

    model_config = _MODEL

    concentration: Annotated[float, quantity("concentration", ge=0.0, difference=True)] = 150.0
    activity: Annotated[float, quantity("dimensionless", ge=0.0)] = 0.2
    feed: Annotated[float, quantity("concentration", ge=0.0, difference=True)] = 50.0
    bias: Annotated[float, quantity("concentration", ge=0.0, difference=True)] = 20.0


class DivergenceWatch(BaseModel):
    """When the filter has lost the plant, and is started again from the model.

    Per analyzer (measurement group), every update's NIS capped at its gate (a
    gated reading counts as the gate, so one wild spike weighs no more than a
    just-rejected reading), its signed normalised innovation ``nu / sqrt(S)`` (of
    that capped size) and its degrees of freedom are summed with weights that fade
    as exp(-age / window). The filter has diverged when one analyzer's readings fall
    both far from the predictions and on one side of them: its faded mean NIS per
    degree of freedom exceeds ``nis_ratio`` and its faded mean signed innovation
    exceeds ``bias`` in size, over at least ``min_dof`` faded degrees of freedom,
    and at least one window has passed since the filter started or was last
    re-initialised. It is then re-initialised as at start-up, from the design
    steady state at the inputs held then with the start-up uncertainty, and the
    time is recorded (the ``estimator_reinitialised`` alert).

    Why these figures: a consistent filter's normalised innovations have mean 0
    and variance 1, its NIS mean 1 per degree of freedom (Bar-Shalom, Li &
    Kirubarajan 2001, sec. 5.4); faded sums with weight W have about 2W effective
    samples, so at ``min_dof`` 10 the mean signed innovation has a 1-sigma of about
    0.22, and 1.5 lies near 7 sigma out. A spiky analyzer's rejections fall on
    both sides and leave the signed mean near 0; a filter that has lost the plant
    gates reading after reading on the same side, with the persistence rule's steps
    (NIS about 1) between them. Model mismatch milder than this is the
    ``model_mismatch`` alert's business, not a reason to start again.

    Attributes
    ----------
    enabled : bool
        Watch for divergence; default true.
    window : float
        Fading time constant of the sums, and the least time between two
        re-initialisations [s]; default 2 h.
    nis_ratio : float
        Mean NIS per degree of freedom above which an analyzer shows divergence
        [-]; default 4; above 1.
    bias : float
        Mean signed normalised innovation above which (in size) its readings fall
        on one side [-]; default 1.5.
    min_dof : float
        Least faded degrees of freedom of the analyzer to judge [-]; default 10.
    """

    model_config = _MODEL

    enabled: StrictBool = True
    window: Annotated[float, quantity("time", gt=0.0)] = 2 * _HOUR
    nis_ratio: Annotated[float, quantity("dimensionless", gt=1.0)] = 4.0
    bias: Annotated[float, quantity("dimensionless", gt=0.0)] = 1.5
    min_dof: Annotated[float, quantity("dimensionless", ge=1.0)] = 10.0


class EstimatorConfig(BaseModel):
    """Filter tuning.

    Attributes
    ----------
    estimate_activity : bool
        Estimate the catalyst activity as a state; otherwise hold it at
        ``design_activity``.
    design_activity : float
        Activity of the design model and the filter's starting value [-]; > 0.
    gate_probability : float
        A reading whose normalised innovation lies outside this probability
        of the chi-square distribution is rejected [-]; in (0.5, 1).
    horizon : float
        How far back late readings are still applied; older ones are refused [s].
    step_persistence : int
        After this many consecutive gated readings of one analyzer, all on the same
        side of the prediction, the filter takes them as a real step (a feed change,
        say), not a spike: it widens the measured state's uncertainty and accepts
        the next one [-]; 0 turns this off.
    concentration_noise, activity_noise, feed_noise, bias_noise : RandomWalk
        Process noise of each kind of state.
    initial_std : InitialStd
        Start-up uncertainty of each kind of state.
    divergence : DivergenceWatch
        When to re-initialise a filter that has lost the plant.
    """

    model_config = _MODEL

    estimate_activity: StrictBool = True
    design_activity: Annotated[float, quantity("dimensionless", gt=0.0)] = 1.0
    gate_probability: Annotated[float, quantity("dimensionless", gt=0.5, lt=1.0)] = 0.999
    horizon: Annotated[float, quantity("time", gt=0.0)] = 6 * _HOUR
    step_persistence: Annotated[StrictInt, Field(ge=0, le=1000)] = 3
    concentration_noise: ConcentrationWalk = ConcentrationWalk(sigma=5.0, per=_HOUR)
    activity_noise: RandomWalk = RandomWalk(sigma=0.01, per=_HOUR)
    feed_noise: ConcentrationWalk = ConcentrationWalk(sigma=30.0, per=_HOUR)
    bias_noise: ConcentrationWalk = ConcentrationWalk(sigma=1.0, per=_HOUR)
    initial_std: InitialStd = InitialStd()
    divergence: DivergenceWatch = DivergenceWatch()


def _check_species_list(value: tuple[str, ...]) -> tuple[str, ...]:
    problems: list[tuple[str, str]] = []
    if not 1 <= len(value) <= _MAX_SPECIES:
        problems.append(("", f"declare 1 to {_MAX_SPECIES} species, got {len(value)}"))
    seen: set[str] = set()
    for i, name in enumerate(value):
        if not name.isidentifier():
            problems.append((f"[{i}]", f"must be a name like 'glucose', got {name!r}"))
        elif name in seen:
            problems.append((f"[{i}]", f"{name!r} is declared twice"))
        seen.add(name)
    _raise_if(problems)
    return value


def _check_vessel_count(value: tuple[VesselConfig, ...]) -> tuple[VesselConfig, ...]:
    if not 1 <= len(value) <= _MAX_VESSELS:
        raise _error(f"declare 1 to {_MAX_VESSELS} vessels, got {len(value)}")
    return value


class TrainConfig(BaseModel):
    """A cascade of stirred vessels in series: what it is and how to watch it.

    In a file, ``name``, ``title`` and ``species`` sit under ``[train]``; the
    model itself is flat.

    Attributes
    ----------
    name : str
        Slug naming the train: lowercase letters, digits, '-' and '_', 1..64.
    title : str
        Human-readable title.
    species : tuple of str
        The species tracked, 1..6 unique names; state order within a vessel.
    vessels : tuple of VesselConfig
        The vessels in flow order, 1..20, unique names.
    feed : FeedConfig
        Feed flow and composition.
    reaction : ReactionConfig
        The reaction and its kinetics.
    measurements : tuple of MeasurementConfig
        Analyzers and lab results on the vessels.
    estimator : EstimatorConfig
        Filter tuning.
    alerts : AlertsConfig
        Alert rules and their limits.
    """

    model_config = _MODEL

    name: Annotated[str, AfterValidator(_slug)]
    title: str = ""
    species: Annotated[tuple[str, ...], AfterValidator(_check_species_list)]
    vessels: Annotated[tuple[VesselConfig, ...], AfterValidator(_check_vessel_count)]
    feed: FeedConfig
    reaction: ReactionConfig
    measurements: tuple[MeasurementConfig, ...] = ()
    estimator: EstimatorConfig = EstimatorConfig()
    alerts: AlertsConfig = AlertsConfig()

    @model_validator(mode="before")
    @classmethod
    def _complete_feed(cls, data: Any) -> Any:
        # Species without a feed entry get a fixed zero, so that downstream code can
        # index the composition by every species, in declaration order.
        if not isinstance(data, Mapping):
            return data
        species = data.get("species")
        if not isinstance(species, list | tuple) or not all(isinstance(s, str) for s in species):
            return data
        feed = data.get("feed")
        if isinstance(feed, FeedConfig):
            composition = _in_species_order(feed.composition, species, 0.0)
            return {**data, "feed": feed.model_copy(update={"composition": composition})}
        if isinstance(feed, Mapping):
            composition = feed.get("composition", {})
            if isinstance(composition, Mapping):
                filled = _in_species_order(composition, species, "0 mol/m^3")
                return {**data, "feed": {**feed, "composition": filled}}
        return data

    @model_validator(mode="after")
    def _cross_check(self, info: ValidationInfo) -> Self:
        context = info.context
        if isinstance(context, Mapping) and context.get(_DEFER_CROSS_CHECKS):
            return self
        problems = _cross_check(self.model_dump())
        _raise_if([(p.key, p.reason) for p in problems])
        return self

    def species_index(self, name: str) -> int:
        """Return the position of a species in ``species`` (its state order).

        Parameters
        ----------
        name : str
            A declared species.

        Returns
        -------
        int
            Zero-based index.

        Raises
        ------
        ValueError
            The species is not declared.
        """
        try:
            return self.species.index(name)
        except ValueError:
            raise ValueError(
                f"unknown species {name!r}; declared: {', '.join(self.species)}"
            ) from None

    def vessel_index(self, name: str) -> int:
        """Return the position of a vessel in flow order.

        Parameters
        ----------
        name : str
            A vessel name.

        Returns
        -------
        int
            Zero-based index (0 is the vessel the feed enters).

        Raises
        ------
        ValueError
            No vessel has that name.
        """
        for index, vessel in enumerate(self.vessels):
            if vessel.name == name:
                return index
        names = ", ".join(v.name for v in self.vessels)
        raise ValueError(f"unknown vessel {name!r}; vessels: {names}")

    def tags(self) -> dict[str, str]:
        """Map every tag of the train to its role.

        Returns
        -------
        dict of str to str
            Roles are ``"flow"``, ``"temperature:<vessel>"``, ``"feed:<species>"``
            and ``"measurement:<tag>"``, in that order.
        """
        roles = {self.feed.flow.tag: "flow"}
        for vessel in self.vessels:
            if isinstance(vessel.temperature, TemperatureTag):
                roles[vessel.temperature.tag] = f"temperature:{vessel.name}"
        for species, source in self.feed.composition.items():
            if isinstance(source, ConcentrationTag):
                roles[source.tag] = f"feed:{species}"
        for measurement in self.measurements:
            roles[measurement.tag] = f"measurement:{measurement.tag}"
        return roles

    def tag_units(self) -> dict[str, tuple[str, float, float]]:
        """Map every tag to the unit its readings come in: ``(unit, scale, offset)``.

        ``SI = scale * value + offset``; the order is that of :meth:`tags`.
        """
        sources: list[TagInput | MeasurementConfig] = [self.feed.flow]
        sources += [v.temperature for v in self.vessels if isinstance(v.temperature, TagInput)]
        sources += [s for s in self.feed.composition.values() if isinstance(s, TagInput)]
        sources += list(self.measurements)
        return {s.tag: (s.unit, s.scale, s.offset) for s in sources}


def _in_species_order(
    composition: Mapping[str, Any], species: Sequence[str], zero: Any
) -> dict[str, Any]:
    ordered = {name: composition.get(name, zero) for name in species}
    # Undeclared species stay (after the declared ones) for the cross-check to report.
    ordered.update({k: v for k, v in composition.items() if k not in ordered})
    return ordered


def _entries(value: Any) -> list[tuple[int, Mapping[str, Any]]]:
    if isinstance(value, str) or not isinstance(value, Sequence):
        return []
    return [(i, item) for i, item in enumerate(value) if isinstance(item, Mapping)]


def _cross_check(data: Mapping[str, Any]) -> list[ConfigProblem]:
    """Check what no single entry can: names that refer to each other, unique tags.

    Works on the flat raw mapping and skips whatever is malformed (the field
    checks report that), so it runs even when some fields are invalid.
    """
    problems: list[ConfigProblem] = []
    raw_species = data.get("species")
    species: list[str] | None = None
    if isinstance(raw_species, list | tuple):
        # An empty list is reported by the field check; measuring every reference
        # against it would only bury that one fault under many.
        species = [s for s in raw_species if isinstance(s, str)] or None
    declared = ", ".join(species or [])

    def check_species(key: str, value: Any) -> None:
        if species is not None and isinstance(value, str) and value not in species:
            problems.append(
                ConfigProblem(key, f"{value!r} is not a declared species (declared: {declared})")
            )

    vessel_names: dict[str, int] = {}
    vessels = _entries(data.get("vessels"))
    for i, vessel in vessels:
        name = vessel.get("name")
        if not isinstance(name, str):
            continue
        if name in vessel_names:
            problems.append(
                ConfigProblem(
                    f"vessels[{i}].name",
                    f"{name!r} is already the name of vessels[{vessel_names[name]}]",
                )
            )
        else:
            vessel_names[name] = i

    reaction = data.get("reaction")
    if isinstance(reaction, Mapping):
        reactant, product = reaction.get("reactant"), reaction.get("product")
        check_species("reaction.reactant", reactant)
        check_species("reaction.product", product)
        if isinstance(reactant, str) and reactant == product:
            problems.append(ConfigProblem("reaction.product", "must differ from the reactant"))

    feed = data.get("feed")
    feed = feed if isinstance(feed, Mapping) else {}
    composition = feed.get("composition")
    composition = composition if isinstance(composition, Mapping) else {}
    for name in composition:
        check_species(f"feed.composition.{name}", name)

    measurements = _entries(data.get("measurements"))
    for i, measurement in measurements:
        check_species(f"measurements[{i}].species", measurement.get("species"))
        location = measurement.get("location")
        if location == "feed":
            problems.append(
                ConfigProblem(
                    f"measurements[{i}].location",
                    "feed analyzers are declared in feed.composition, not as measurements",
                )
            )
        elif isinstance(location, str) and vessels and location not in vessel_names:
            problems.append(
                ConfigProblem(
                    f"measurements[{i}].location",
                    f"{location!r} is not a vessel (vessels: {', '.join(vessel_names)})",
                )
            )

    tagged: list[tuple[str, Any]] = []
    flow = feed.get("flow")
    if isinstance(flow, Mapping):
        tagged.append(("feed.flow", flow.get("tag")))
    for i, vessel in vessels:
        temperature = vessel.get("temperature")
        if isinstance(temperature, Mapping):
            tagged.append((f"vessels[{i}].temperature", temperature.get("tag")))
    for name, source in composition.items():
        if isinstance(source, Mapping):
            tagged.append((f"feed.composition.{name}", source.get("tag")))
    tagged.extend((f"measurements[{i}]", m.get("tag")) for i, m in measurements)
    owners: dict[str, str] = {}
    for where, tag in tagged:
        if not isinstance(tag, str):
            continue
        if tag in owners:
            problems.append(
                ConfigProblem(f"{where}.tag", f"tag {tag!r} is already used by {owners[tag]}")
            )
        else:
            owners[tag] = where
    return problems


_TRAIN_FIELDS = frozenset({"name", "title", "species"})
_SECTIONS = frozenset(TrainConfig.model_fields) - _TRAIN_FIELDS


def _flatten(data: Mapping[str, Any]) -> tuple[dict[str, Any], set[str], list[ConfigProblem]]:
    """Lift the ``[train]`` table into the top level.

    Returns the flat mapping, the top-level keys to report as ``train.<key>``,
    and the problems found doing it.
    """
    flat = {k: v for k, v in data.items() if k != "train"}
    # Keys written at the top level keep their place in messages; the rest belong
    # under [train], where the file layout puts them.
    under_train = set(_TRAIN_FIELDS - flat.keys())
    problems: list[ConfigProblem] = []
    train = data.get("train")
    if train is None:
        return flat, under_train, problems
    if not isinstance(train, Mapping):
        problems.append(ConfigProblem("train", "must be a table holding name, title and species"))
        return flat, under_train, problems
    for key, value in train.items():
        if key in _SECTIONS:
            problems.append(
                ConfigProblem(f"train.{key}", f"'{key}' is a section of its own, not a train key")
            )
        elif key in flat:
            problems.append(
                ConfigProblem(f"train.{key}", "given both under [train] and at the top level")
            )
        else:
            flat[key] = value
            under_train.add(key)
    return flat, under_train, problems


def _dotted(loc: Sequence[str | int], under_train: set[str]) -> str:
    key = ""
    for part in loc:
        if part in (_TAG_TABLE, _FIXED_VALUE):
            continue
        if isinstance(part, int):
            key += f"[{part}]"
        else:
            key = f"{key}.{part}" if key else str(part)
    if loc and isinstance(loc[0], str) and loc[0] in under_train:
        key = f"train.{key}"
    return key


def _shown(value: Any) -> str:
    text = repr(value)
    return text if len(text) <= 60 else text[:57] + "..."


def _reason(error: Mapping[str, Any]) -> str:
    kind = error["type"]
    context = error.get("ctx") or {}
    value = error.get("input")
    if kind == "missing":
        return "required"
    if kind == "extra_forbidden":
        return "unknown key (check the spelling)"
    if kind in ("quantity", "config"):
        return str(error["msg"])
    if kind == "value_error" and "error" in context:
        return str(context["error"])
    if kind == "literal_error":
        return f"must be {context.get('expected', 'one of the listed values')}, got {_shown(value)}"
    if kind == "string_type":
        return f"must be a string, got {_shown(value)}"
    if kind == "bool_type":
        return f"must be true or false, got {_shown(value)}"
    if kind in ("model_type", "model_attributes_type", "dict_type"):
        return f"must be a table, got {_shown(value)}"
    if kind in ("tuple_type", "list_type"):
        return f"must be a list, got {_shown(value)}"
    if kind in ("float_type", "float_parsing"):
        return f"must be a number or a quantity with its unit, got {_shown(value)}"
    message = str(error["msg"])
    return f"{message[:1].lower()}{message[1:]}, got {_shown(value)}"


def _translate(exc: ValidationError, under_train: set[str]) -> list[ConfigProblem]:
    problems: list[ConfigProblem] = []
    for error in exc.errors(include_url=False):
        key = _dotted(error["loc"], under_train)
        cause = (error.get("ctx") or {}).get("error")
        if isinstance(cause, _Problems):
            problems.extend(
                ConfigProblem(_join(key, rel), reason) for rel, reason in cause.problems
            )
        else:
            problems.append(ConfigProblem(key or "train config", _reason(error)))
    return problems


def parse_train_config(data: Mapping[str, Any], source: str = "train config") -> TrainConfig:
    """Validate a train description already read into Python objects.

    Parameters
    ----------
    data : Mapping
        The document as read from TOML or JSON: ``name``, ``title`` and
        ``species`` under ``"train"`` (or at the top level), then ``vessels``,
        ``feed``, ``reaction``, ``measurements``, ``estimator`` and ``alerts``.
        Dimensional quantities must carry units.
    source : str, optional
        What to call the document in the error (a file path).

    Returns
    -------
    TrainConfig
        The validated train, quantities in SI.

    Raises
    ------
    ConfigError
        Listing every problem found: field problems first, then the
        cross-checks (names that must refer to declared species and vessels,
        tags unique across the train).
    """
    if not isinstance(data, Mapping):
        raise ConfigError([ConfigProblem("<file>", "must hold a table (mapping) of keys")], source)
    flat, under_train, problems = _flatten(data)
    config: TrainConfig | None = None
    try:
        config = TrainConfig.model_validate(
            flat, context={UNITS_REQUIRED: True, _DEFER_CROSS_CHECKS: True}
        )
    except ValidationError as exc:
        problems.extend(_translate(exc, under_train))
    problems.extend(_cross_check(flat))
    unique = list(dict.fromkeys(problems))
    if unique or config is None:
        raise ConfigError(unique, source)
    return config


def load_train_config(path: str | os.PathLike[str]) -> TrainConfig:
    """Read and validate a train description file.

    Parameters
    ----------
    path : str or os.PathLike
        A ``.toml`` or ``.json`` file.

    Returns
    -------
    TrainConfig
        The validated train, quantities in SI.

    Raises
    ------
    ConfigError
        The file cannot be read or parsed (key ``<file>``, with the parser's
        line and column), or its content has problems (see
        :func:`parse_train_config`).
    """
    file = Path(path)
    source = str(file)
    suffix = file.suffix.lower()
    if suffix not in (".toml", ".json"):
        raise ConfigError(
            [
                ConfigProblem(
                    "<file>", f"unknown file type {suffix or '(none)'!r}: use .toml or .json"
                )
            ],
            source,
        )
    try:
        text = file.read_text(encoding="utf-8")
    except (OSError, UnicodeDecodeError) as exc:
        raise ConfigError(
            [ConfigProblem("<file>", f"cannot read the file: {exc}")], source
        ) from exc
    data: Any
    if suffix == ".toml":
        try:
            data = tomllib.loads(text)
        except tomllib.TOMLDecodeError as exc:
            raise ConfigError([ConfigProblem("<file>", f"TOML syntax: {exc}")], source) from exc
    else:
        try:
            data = json.loads(text)
        except json.JSONDecodeError as exc:
            reason = f"JSON syntax: {exc.msg} (at line {exc.lineno}, column {exc.colno})"
            raise ConfigError([ConfigProblem("<file>", reason)], source) from exc
    return parse_train_config(data, source=source)
