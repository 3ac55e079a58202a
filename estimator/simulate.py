"""A plant simulator: the truth of a train under a scenario, and what its instruments read.

The plant is the same mole-balance model the filter uses, integrated exactly over
each simulation step with its inputs (flow, temperatures, feed) and activity held at
their values at the step's start (:func:`estimator.propagate.propagate_state`).
Instruments then sample the truth, tag by tag and vectorised over the whole run:

- flow and temperature transmitters at their period (default: every step), with
  small Gaussian noise (relative for the flow, absolute for temperatures);
- analyzers at their period with N(0, (noise_scale * std)^2) noise and their dead
  time: a reading stamped t is the sample taken at t - dead time;
- lab results on a schedule, stamped with their sample time and received hours
  later (``Simulation.received``);
- faults on any tag: dropouts (no readings in a window), a frozen output (the last
  value repeated through a window) and spikes (gross errors of many sigma).

Scenarios are piecewise-linear profiles (``Profile``) of the inputs and the
activity, so steps (two breakpoints at one time) and ramps are both written
directly; :mod:`estimator.scenario` builds them from a scenario file's events.
Everything random comes from one ``numpy.random.default_rng(seed)``, drawn in a
fixed order, so a seed gives the same run every time.
"""

from __future__ import annotations

from collections.abc import Mapping
from dataclasses import dataclass, field

import numpy as np
from numpy.typing import NDArray

from estimator.config import TemperatureTag, TrainConfig
from estimator.model import FloatArray, IntArray, TrainModel
from estimator.propagate import propagate_state

__all__ = [
    "FAULT_FROZEN",
    "FAULT_NONE",
    "FAULT_SPIKE",
    "LabSchedule",
    "Profile",
    "Scenario",
    "Simulation",
    "Spikes",
    "Window",
    "simulate",
]

#: ``Simulation.faults`` code of a reading that is the instrument's honest output.
FAULT_NONE = 0
#: ``Simulation.faults`` code of a spike (a gross error added to the reading).
FAULT_SPIKE = 1
#: ``Simulation.faults`` code of a reading repeated by a frozen instrument.
FAULT_FROZEN = 2


@dataclass(frozen=True)
class Profile:
    """A piecewise-linear signal of time [s]: breakpoints ``(time, value)`` in order.

    Two breakpoints at the same time make a step; before the first and after the
    last the signal is flat. At a step the signal takes the later value
    (right-continuous).
    """

    points: tuple[tuple[float, float], ...]

    def __post_init__(self) -> None:
        if not self.points:
            raise ValueError("a profile needs at least one breakpoint")
        times = [t for t, _ in self.points]
        if any(t1 < t0 for t0, t1 in zip(times, times[1:], strict=False)):
            raise ValueError(f"profile breakpoints must be in time order, got times {times}")

    @classmethod
    def constant(cls, value: float) -> Profile:
        """Return a flat signal."""
        return cls(((0.0, value),))

    def __call__(self, t: float) -> float:
        """Value at time ``t`` [s] (right-continuous at steps)."""
        return float(self.sample(np.array([t], dtype=np.float64))[0])

    def sample(self, times: NDArray[np.float64], *, left: bool = False) -> FloatArray:
        """Values at many times at once.

        Parameters
        ----------
        times : ndarray, shape (k,)
            Times [s], in any order.
        left : bool
            Give the value just before each time (the left limit) instead of the
            value at it; the two differ only at steps.

        Returns
        -------
        ndarray, shape (k,)
            The signal [its unit].
        """
        t_pts = np.array([p[0] for p in self.points], dtype=np.float64)
        v_pts = np.array([p[1] for p in self.points], dtype=np.float64)
        t = np.asarray(times, dtype=np.float64)
        # i is the breakpoint after t: t_pts[i-1] <= t < t_pts[i] (side "right"), so a
        # step's two breakpoints never form a segment and nothing divides by zero.
        i = np.searchsorted(t_pts, t, side="left" if left else "right")
        lo = np.clip(i - 1, 0, len(t_pts) - 1)
        hi = np.clip(i, 0, len(t_pts) - 1)
        span = t_pts[hi] - t_pts[lo]
        safe = np.where(span > 0.0, span, 1.0)
        frac = np.where(span > 0.0, (t - t_pts[lo]) / safe, 0.0)
        out = v_pts[lo] + (v_pts[hi] - v_pts[lo]) * frac
        out = np.where(i == 0, v_pts[0], out)
        return np.where(i >= len(t_pts), v_pts[-1], out)

    def __add__(self, other: Profile) -> Profile:
        """Return the sum of two signals, itself piecewise linear."""
        times = np.unique(np.array([p[0] for p in self.points + other.points]))
        before = self.sample(times, left=True) + other.sample(times, left=True)
        after = self.sample(times) + other.sample(times)
        points: list[tuple[float, float]] = []
        for t, b, a in zip(times, before, after, strict=True):
            if b != a:
                points.append((float(t), float(b)))
            points.append((float(t), float(a)))
        return Profile(tuple(points))


@dataclass(frozen=True)
class Window:
    """A time window ``[start, end)`` of a run [s from the run's start]."""

    start: float
    end: float

    def __post_init__(self) -> None:
        if not self.end > self.start:
            raise ValueError(f"a window must end after it starts, got [{self.start}, {self.end})")


@dataclass(frozen=True)
class Spikes:
    """Gross errors on one tag: a random rate, explicit times, or both.

    Attributes
    ----------
    rate : float
        Mean number of spikes per second, placed at random readings [1/s].
    times : tuple of float
        Spikes on the first reading stamped at or after each time [s from the start].
    size : tuple of float
        Each spike adds ``+/- U(low, high)`` times the tag's 1-sigma [sigma].
    """

    rate: float = 0.0
    times: tuple[float, ...] = ()
    size: tuple[float, float] = (8.0, 15.0)


@dataclass(frozen=True)
class LabSchedule:
    """When grab samples are taken for one lab tag and how late their results arrive.

    Attributes
    ----------
    period : float or None
        Sampling interval [s]; None for explicit ``times`` only.
    first : float
        Time of the first periodic sample [s from the start].
    times : tuple of float
        Extra sample times [s from the start].
    delay : tuple of float
        Each result is received ``U(low, high)`` after its sample, rounded to the
        second [s].
    """

    period: float | None = None
    first: float = 0.0
    times: tuple[float, ...] = ()
    delay: tuple[float, float] = (0.0, 0.0)

    def sample_times(self, duration: float) -> FloatArray:
        """Every sample time within a run of ``duration`` [s], sorted [s from the start]."""
        periodic = (
            np.arange(self.first, duration + 1e-9, self.period)
            if self.period is not None
            else np.empty(0)
        )
        extra = np.array([t for t in self.times if 0.0 <= t <= duration], dtype=np.float64)
        return np.unique(np.concatenate([periodic, extra]))


@dataclass(frozen=True)
class Scenario:
    """Inputs, activity and instrument behaviour over a run.

    Times inside a scenario are seconds from the run's start; ``start`` places the
    run on the epoch time line.

    Attributes
    ----------
    duration : float
        Length of the run [s].
    step : float
        Simulation step, and the default sample interval of every tag [s].
    flow : Profile
        Feed flow [m^3/s]; the train's nominal when None.
    temperatures : mapping of str to Profile
        Per vessel name, its temperature [K]; vessels not listed use their nominal.
    feed : mapping of str to Profile
        Per species, its feed concentration [mol/m^3]; others use the nominal.
    activity : Profile
        True catalyst activity [-].
    analyzer_period : mapping of str to float
        Per tag (any tag, despite the name), its sampling interval [s], rounded to
        a whole number of steps (default: ``step``).
    title : str
        What the scenario is, for people.
    start : float
        Epoch time of the first step [s].
    seed : int
        Seed of the random generator.
    noise_scale : float
        Multiplier on every analyzer's and lab tag's configured std [-].
    flow_noise : float
        1-sigma noise of the flow transmitter relative to its value [-].
    temperature_noise : float
        1-sigma noise of the temperature transmitters [K].
    dropouts : mapping of str to tuple of Window
        Per tag, windows with no readings (by the reading's time stamp).
    frozen : mapping of str to tuple of Window
        Per tag, windows in which the instrument repeats its last value before
        the window.
    spikes : mapping of str to Spikes
        Per tag, gross errors.
    lab : mapping of str to LabSchedule
        Per lab tag, its sampling schedule and reporting delay; a lab tag without
        one is sampled at its ``analyzer_period`` and received at once.
    """

    duration: float
    step: float = 10.0
    flow: Profile | None = None
    temperatures: Mapping[str, Profile] = field(default_factory=dict)
    feed: Mapping[str, Profile] = field(default_factory=dict)
    activity: Profile = field(default_factory=lambda: Profile.constant(1.0))
    analyzer_period: Mapping[str, float] = field(default_factory=dict)
    title: str = ""
    start: float = 0.0
    seed: int = 0
    noise_scale: float = 1.0
    flow_noise: float = 0.005
    temperature_noise: float = 0.1
    dropouts: Mapping[str, tuple[Window, ...]] = field(default_factory=dict)
    frozen: Mapping[str, tuple[Window, ...]] = field(default_factory=dict)
    spikes: Mapping[str, Spikes] = field(default_factory=dict)
    lab: Mapping[str, LabSchedule] = field(default_factory=dict)


@dataclass
class Simulation:
    """Result of :func:`simulate`: the truth and the readings.

    Attributes
    ----------
    times : ndarray, shape (k,)
        Epoch time of every step [s].
    truth : ndarray, shape (k, N*S)
        True concentrations, vessel-major [mol/m^3].
    true_activity : ndarray, shape (k,)
        True catalyst activity [-].
    inputs : ndarray, shape (k, 1 + N + S)
        True inputs held over each step: flow [m^3/s], vessel temperatures [K],
        feed concentrations [mol/m^3].
    tag_names : tuple of str
        Every tag of the train, in :meth:`TrainConfig.tags` order.
    reading_tags : ndarray of int, shape (m,)
        Per reading, its tag as an index into ``tag_names``.
    reading_times : ndarray, shape (m,)
        Time stamp of each reading: report time for analyzers (sample time + dead
        time), sample time for lab results [epoch s].
    reading_values : ndarray, shape (m,)
        Values in SI [m^3/s, K, mol/m^3].
    received : ndarray, shape (m,)
        When each reading reached the historian [epoch s]; later than its time
        stamp only for delayed lab results.
    faults : ndarray of int, shape (m,)
        :data:`FAULT_NONE`, :data:`FAULT_SPIKE` or :data:`FAULT_FROZEN`.

    Readings are sorted by time, then by tag.
    """

    times: FloatArray
    truth: FloatArray
    true_activity: FloatArray
    inputs: FloatArray
    tag_names: tuple[str, ...]
    reading_tags: IntArray
    reading_times: FloatArray
    reading_values: FloatArray
    received: FloatArray
    faults: IntArray

    @property
    def readings(self) -> list[tuple[str, float, float]]:
        """The readings as ``(tag, time [epoch s], value [SI])`` tuples, in time order."""
        names = self.tag_names
        return [
            (names[c], t, v)
            for c, t, v in zip(
                self.reading_tags.tolist(),
                self.reading_times.tolist(),
                self.reading_values.tolist(),
                strict=True,
            )
        ]

    def columns(self) -> tuple[list[str], FloatArray, FloatArray]:
        """Return the readings as (tags, times [epoch s], values [SI]) columns for the filter."""
        names = np.array(self.tag_names, dtype=object)
        tags: list[str] = names[self.reading_tags].tolist() if len(names) else []
        return tags, self.reading_times.copy(), self.reading_values.copy()

    def of_tag(self, tag: str) -> tuple[FloatArray, FloatArray]:
        """Return one tag's readings as (times [epoch s], values [SI]).

        Raises
        ------
        ValueError
            The train has no such tag.
        """
        if tag not in self.tag_names:
            raise ValueError(f"unknown tag {tag!r}; tags: {', '.join(self.tag_names)}")
        sel = self.reading_tags == self.tag_names.index(tag)
        return self.reading_times[sel], self.reading_values[sel]


def _inputs(model: TrainModel, scenario: Scenario, rel: FloatArray) -> FloatArray:
    """Return the true inputs at each time of ``rel`` [s from the start], shape (k, 1 + N + S)."""
    cfg = model.config
    u = np.tile(model.nominal_inputs(), (len(rel), 1))
    if scenario.flow is not None:
        u[:, 0] = scenario.flow.sample(rel)
    for i, vessel in enumerate(cfg.vessels):
        if vessel.name in scenario.temperatures:
            u[:, 1 + i] = scenario.temperatures[vessel.name].sample(rel)
    for s, name in enumerate(cfg.species):
        if name in scenario.feed:
            u[:, 1 + len(cfg.vessels) + s] = scenario.feed[name].sample(rel)
    return u


@dataclass(frozen=True)
class _Instrument:
    """How one tag turns a true signal into readings."""

    tag: str
    signal: FloatArray  # true value at every step [SI]
    std: float | FloatArray  # 1-sigma noise per step [SI]
    sigma: float | FloatArray  # the 1-sigma spikes are measured in [SI]
    dead_time: float  # [s]
    non_negative: bool
    lab: bool


def _instruments(
    model: TrainModel, scenario: Scenario, inputs: FloatArray, truth: FloatArray, scale: float
) -> list[_Instrument]:
    cfg = model.config
    lay = model.layout
    flow = inputs[:, 0]
    out = [
        _Instrument(
            cfg.feed.flow.tag,
            flow,
            scenario.flow_noise * np.abs(flow),
            cfg.feed.flow.std or scenario.flow_noise * np.abs(flow),
            0.0,
            True,
            False,
        )
    ]
    for i, vessel in enumerate(cfg.vessels):
        if isinstance(vessel.temperature, TemperatureTag):
            tag = vessel.temperature
            out.append(
                _Instrument(
                    tag.tag,
                    inputs[:, 1 + i],
                    scenario.temperature_noise,
                    tag.std or scenario.temperature_noise,
                    0.0,
                    False,
                    False,
                )
            )
    for s, name in enumerate(cfg.species):
        source = cfg.feed.composition.get(name)
        if source is None or isinstance(source, float):
            continue
        std = source.std or 0.0
        out.append(
            _Instrument(
                source.tag,
                inputs[:, 1 + lay.n_vessels + s],
                std * scale,
                std,
                source.dead_time,
                True,
                False,
            )
        )
    for meas in cfg.measurements:
        col = lay.concentration(cfg.vessel_index(meas.location), cfg.species_index(meas.species))
        lab = meas.kind == "lab"
        dead = 0.0 if lab else meas.dead_time
        out.append(
            _Instrument(meas.tag, truth[:, col], meas.std * scale, meas.std, dead, True, lab)
        )
    return out


def _check_tags(config: TrainConfig, scenario: Scenario) -> None:
    known = config.tags()
    lab_tags = {m.tag for m in config.measurements if m.kind == "lab"}
    for what, mapping in (
        ("analyzer_period", scenario.analyzer_period),
        ("dropouts", scenario.dropouts),
        ("frozen", scenario.frozen),
        ("spikes", scenario.spikes),
        ("lab", scenario.lab),
    ):
        for tag in mapping:
            if tag not in known:
                raise ValueError(
                    f"scenario {what}: unknown tag {tag!r}; the train's tags: {', '.join(known)}"
                )
            if what == "lab" and tag not in lab_tags:
                raise ValueError(f"scenario lab: tag {tag!r} is not a lab measurement")
    vessels = {v.name for v in config.vessels}
    for name in scenario.temperatures:
        if name not in vessels:
            raise ValueError(f"scenario temperatures: unknown vessel {name!r}")
    for name in scenario.feed:
        if name not in config.species:
            raise ValueError(f"scenario feed: unknown species {name!r}")


def simulate(
    model: TrainModel,
    scenario: Scenario,
    *,
    seed: int | None = None,
    start: float | None = None,
    noise_scale: float | None = None,
) -> Simulation:
    """Simulate the plant and its instruments; deterministic for a seed.

    The plant starts at steady state at the scenario's first inputs and activity,
    then is propagated exactly over each step with the inputs and activity held
    at their values at the step's start.

    Parameters
    ----------
    model : TrainModel
        The train.
    scenario : Scenario
        Inputs, activity and instrument behaviour.
    seed : int, optional
        Seed of the random generator; the scenario's when None.
    start : float, optional
        Epoch time of the first step [s]; the scenario's when None.
    noise_scale : float, optional
        Multiplier on every analyzer's configured standard deviation [-]; the
        scenario's when None.

    Returns
    -------
    Simulation
        The truth at every step and the readings.

    Raises
    ------
    ValueError
        The scenario names a tag, vessel or species the train does not have, or
        its duration or step is not positive.

    Notes
    -----
    Per step the state moves by ``x(t + h) = exp(L h) x(t) + int_0^h exp(L s) ds c``
    with L and c from the held inputs (see :mod:`estimator.propagate`): exact for
    piecewise-constant inputs whatever the step.
    """
    if not (scenario.duration > 0.0 and scenario.step > 0.0):
        raise ValueError(
            f"scenario duration and step must be positive, got {scenario.duration} s "
            f"and {scenario.step} s"
        )
    cfg = model.config
    _check_tags(cfg, scenario)
    rng = np.random.default_rng(scenario.seed if seed is None else seed)
    t0 = scenario.start if start is None else start
    scale = scenario.noise_scale if noise_scale is None else noise_scale

    n_steps = int(round(scenario.duration / scenario.step))
    rel = scenario.step * np.arange(n_steps + 1, dtype=np.float64)
    inputs = _inputs(model, scenario, rel)
    activity = scenario.activity.sample(rel)
    truth = _integrate(model, inputs, activity, scenario.step)

    instruments = _instruments(model, scenario, inputs, truth, scale)
    names = tuple(inst.tag for inst in instruments)
    parts = [_read(inst, scenario, rel, rng) for inst in instruments]
    codes = np.concatenate([np.full(len(p[0]), c, dtype=np.int64) for c, p in enumerate(parts)])
    stamps = t0 + np.concatenate([p[0] for p in parts])
    values = np.concatenate([p[1] for p in parts])
    received = t0 + np.concatenate([p[2] for p in parts])
    faults = np.concatenate([p[3] for p in parts])
    order = np.lexsort((codes, stamps))
    return Simulation(
        times=t0 + rel,
        truth=truth,
        true_activity=activity,
        inputs=inputs,
        tag_names=names,
        reading_tags=codes[order],
        reading_times=stamps[order],
        reading_values=values[order],
        received=received[order],
        faults=faults[order],
    )


def _integrate(
    model: TrainModel, inputs: FloatArray, activity: FloatArray, step: float
) -> FloatArray:
    """Return the true concentrations at every step, shape (k, N*S) [mol/m^3].

    A Python loop over the compiled propagation: about 4 us a step, so a month at
    10 s (259,200 steps) takes about a second.
    """
    cfg = model.config
    # The plant's own state: concentrations plus the activity slot, no feed states.
    plant = TrainModel.from_config(
        cfg.model_copy(
            update={
                "feed": cfg.feed.model_copy(update={"model": "input"}),
                "estimator": cfg.estimator.model_copy(update={"estimate_activity": True}),
            }
        )
    )
    n_conc = plant.layout.n_concentrations
    i_act = plant.layout.activity
    truth = np.empty((len(inputs), n_conc))
    x = plant.steady_state(inputs[0], activity=float(activity[0]))
    ip, fp = plant.ip, plant.fp
    last = len(inputs) - 1
    for k in range(len(inputs)):
        x[i_act] = activity[k]
        truth[k] = x[:n_conc]
        if k < last:
            x = propagate_state(x, inputs[k], step, ip, fp)
    return truth


def _in_windows(rel: FloatArray, windows: tuple[Window, ...]) -> NDArray[np.bool_]:
    mask = np.zeros(len(rel), dtype=bool)
    for w in windows:
        mask |= (rel >= w.start) & (rel < w.end)
    return mask


def _read(
    inst: _Instrument, scenario: Scenario, rel: FloatArray, rng: np.random.Generator
) -> tuple[FloatArray, FloatArray, FloatArray, IntArray]:
    """One tag's readings: (stamp [s from start], value [SI], received [s], fault code)."""
    step = scenario.step
    n_steps = len(rel) - 1
    schedule = scenario.lab.get(inst.tag) if inst.lab else None
    if schedule is not None:
        sample = schedule.sample_times(rel[-1])
        idx = np.clip(np.round(sample / step).astype(np.int64), 0, n_steps)
        stamp = rel[idx]
        lo, hi = schedule.delay
        received = stamp + np.round(rng.uniform(lo, hi, len(idx)))
    else:
        period = scenario.analyzer_period.get(inst.tag, step)
        every = max(1, int(round(period / step)))
        idx = np.arange(0, n_steps + 1, every, dtype=np.int64)
        stamp = rel[idx] + inst.dead_time
        received = stamp.copy()
    std = np.broadcast_to(np.asarray(inst.std, dtype=np.float64), rel.shape)[idx]
    sigma = np.broadcast_to(np.asarray(inst.sigma, dtype=np.float64), rel.shape)[idx]
    values = inst.signal[idx] + std * rng.standard_normal(len(idx))
    if inst.non_negative:
        values = np.maximum(values, 0.0)
    faults = np.full(len(idx), FAULT_NONE, dtype=np.int64)

    frozen = np.zeros(len(idx), dtype=bool)
    for w in scenario.frozen.get(inst.tag, ()):
        inside = np.flatnonzero((stamp >= w.start) & (stamp < w.end))
        if inside.size:
            held = values[inside[0] - 1] if inside[0] > 0 else values[inside[0]]
            values[inside] = held
            frozen[inside] = True
    faults[frozen] = FAULT_FROZEN
    dropped = _in_windows(stamp, scenario.dropouts.get(inst.tag, ()))

    spikes = scenario.spikes.get(inst.tag)
    if spikes is not None:
        eligible = np.flatnonzero(~frozen & ~dropped)
        chosen = np.empty(0, dtype=np.int64)
        if spikes.rate > 0.0 and eligible.size:
            count = min(int(rng.poisson(spikes.rate * rel[-1])), eligible.size)
            chosen = rng.choice(eligible, size=count, replace=False)
        if spikes.times:
            at = np.searchsorted(stamp[eligible], np.array(spikes.times, dtype=np.float64))
            chosen = np.union1d(chosen, eligible[at[at < eligible.size]])
        chosen = np.sort(chosen)
        sign = rng.choice(np.array([-1.0, 1.0]), size=chosen.size)
        size = rng.uniform(spikes.size[0], spikes.size[1], chosen.size)
        values[chosen] += sign * size * sigma[chosen]
        faults[chosen] = FAULT_SPIKE

    keep = ~dropped
    return stamp[keep], values[keep], received[keep], faults[keep]
