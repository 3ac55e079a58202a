"""A plant simulator: the truth of a train under a scenario, and what its instruments read.

The plant is the same mole-balance model the filter uses, integrated exactly over
each simulation step with its inputs (flow, temperatures, feed) and activity held at
their values at the step's start. Instruments sample the truth: flow and
temperature transmitters every step, analyzers at their own cycle with Gaussian
noise and their dead time (a reading stamped t is the sample taken at t - dead time).

Scenarios are piecewise-linear profiles (``Profile``) of the inputs and the
activity, so steps (two breakpoints at one time) and ramps are both written
directly.
"""

from __future__ import annotations

from collections.abc import Mapping, Sequence
from dataclasses import dataclass, field

import numpy as np

from estimator.model import FloatArray, TrainModel
from estimator.propagate import propagate_state


@dataclass(frozen=True)
class Profile:
    """A piecewise-linear signal of time [s]: breakpoints ``(time, value)`` in order.

    Two breakpoints at the same time make a step; before the first and after the
    last the signal is flat.
    """

    points: tuple[tuple[float, float], ...]

    @classmethod
    def constant(cls, value: float) -> Profile:
        """Return a flat signal."""
        return cls(((0.0, value),))

    def __call__(self, t: float) -> float:
        """Value at time ``t`` [s] (right-continuous at steps)."""
        pts = self.points
        if t < pts[0][0]:
            return pts[0][1]
        for (t0, v0), (t1, v1) in zip(pts, pts[1:], strict=False):
            if t0 <= t < t1:
                return v0 + (v1 - v0) * (t - t0) / (t1 - t0)
        return pts[-1][1]


@dataclass(frozen=True)
class Scenario:
    """Inputs, activity and instrument behaviour over a run.

    Attributes
    ----------
    duration : float
        Length of the run [s].
    step : float
        Simulation and transmitter sample interval [s].
    flow : Profile
        Feed flow [m^3/s].
    temperatures : mapping of str to Profile
        Per vessel name, its temperature [K]; vessels not listed use their nominal.
    feed : mapping of str to Profile
        Per species, its feed concentration [mol/m^3]; others use the nominal.
    activity : Profile
        True catalyst activity [-].
    analyzer_period : mapping of str to float
        Per measurement tag, its sampling interval [s] (default: ``step``).
    """

    duration: float
    step: float = 10.0
    flow: Profile | None = None
    temperatures: Mapping[str, Profile] = field(default_factory=dict)
    feed: Mapping[str, Profile] = field(default_factory=dict)
    activity: Profile = field(default_factory=lambda: Profile.constant(1.0))
    analyzer_period: Mapping[str, float] = field(default_factory=dict)


@dataclass
class Simulation:
    """Result of :func:`simulate`.

    ``times`` (k,) [s] and ``truth`` (k, N*S) are the true concentrations,
    vessel-major, with ``true_activity`` (k,); ``readings`` are what the historian
    would hold, (tag, time [s], value [SI]) in time order.
    """

    times: FloatArray
    truth: FloatArray
    true_activity: FloatArray
    readings: list[tuple[str, float, float]]

    def columns(self) -> tuple[list[str], FloatArray, FloatArray]:
        """Return the readings as (tags, times, values) columns for the filter."""
        tags = [r[0] for r in self.readings]
        times = np.array([r[1] for r in self.readings])
        values = np.array([r[2] for r in self.readings])
        return tags, times, values


def _inputs(model: TrainModel, scenario: Scenario, t: float) -> FloatArray:
    cfg = model.config
    u = model.nominal_inputs()
    if scenario.flow is not None:
        u[0] = scenario.flow(t)
    for i, vessel in enumerate(cfg.vessels):
        if vessel.name in scenario.temperatures:
            u[1 + i] = scenario.temperatures[vessel.name](t)
    for s, name in enumerate(cfg.species):
        if name in scenario.feed:
            u[1 + len(cfg.vessels) + s] = scenario.feed[name](t)
    return u


def simulate(
    model: TrainModel,
    scenario: Scenario,
    *,
    seed: int = 0,
    start: float = 0.0,
    noise_scale: float = 1.0,
) -> Simulation:
    """Simulate the plant and its instruments; deterministic for a seed.

    The plant starts at steady state at the scenario's first inputs and activity.
    Flow and temperature transmitters report the held input of each step exactly
    (their noise is small beside the analyzers'); analyzers report the true
    concentration plus N(0, (noise_scale * std)^2) at their period, stamped at
    sample time + dead time (lab tags at the sample time).

    Parameters
    ----------
    model : TrainModel
        The train.
    scenario : Scenario
        Inputs, activity and analyzer periods.
    seed : int
        Seed of the noise generator.
    start : float
        Epoch time of the first step [s].
    noise_scale : float
        Multiplier on every analyzer's configured standard deviation.
    """
    rng = np.random.default_rng(seed)
    cfg = model.config
    lay = model.layout
    n_steps = int(round(scenario.duration / scenario.step))
    times: FloatArray = start + scenario.step * np.arange(n_steps + 1, dtype=np.float64)
    n_conc = lay.n_concentrations
    truth = np.empty((n_steps + 1, n_conc))
    activity = np.empty(n_steps + 1)

    # The plant's own state: concentrations plus the activity slot, no feed states.
    plant = TrainModel.from_config(
        cfg.model_copy(
            update={
                "feed": cfg.feed.model_copy(update={"model": "input"}),
                "estimator": cfg.estimator.model_copy(update={"estimate_activity": True}),
            }
        )
    )
    u = _inputs(model, scenario, 0.0)
    x = plant.steady_state(u, activity=scenario.activity(0.0))
    inputs = np.empty((n_steps + 1, model.n_inputs))
    for k in range(n_steps + 1):
        rel = k * scenario.step
        u = _inputs(model, scenario, rel)
        x[n_conc] = scenario.activity(rel)
        truth[k] = x[:n_conc]
        activity[k] = x[n_conc]
        inputs[k] = u
        if k < n_steps:
            x = propagate_state(x, u, scenario.step, plant.ip, plant.fp)

    readings: list[tuple[str, float, float]] = []
    for k in range(n_steps + 1):
        readings.append((cfg.feed.flow.tag, float(times[k]), float(inputs[k, 0])))
        for i, vessel in enumerate(cfg.vessels):
            if not isinstance(vessel.temperature, float):
                readings.append((vessel.temperature.tag, float(times[k]), float(inputs[k, 1 + i])))
    for s, name in enumerate(cfg.species):
        source = cfg.feed.composition.get(name)
        if source is None or isinstance(source, float):
            continue
        values = inputs[:, 1 + lay.n_vessels + s]
        std = (source.std or 0.0) * noise_scale
        readings += _analyzer(source.tag, times, values, std, source.dead_time, scenario, rng)
    for meas in cfg.measurements:
        col = lay.concentration(cfg.vessel_index(meas.location), cfg.species_index(meas.species))
        dead = meas.dead_time if meas.kind == "analyzer" else 0.0
        readings += _analyzer(
            meas.tag, times, truth[:, col], meas.std * noise_scale, dead, scenario, rng
        )
    readings.sort(key=lambda r: (r[1], r[0]))
    return Simulation(times, truth, activity, readings)


def _analyzer(
    tag: str,
    times: FloatArray,
    values: FloatArray,
    std: float,
    dead_time: float,
    scenario: Scenario,
    rng: np.random.Generator,
) -> Sequence[tuple[str, float, float]]:
    period = scenario.analyzer_period.get(tag, scenario.step)
    every = max(1, int(round(period / scenario.step)))
    out = []
    for k in range(0, len(times), every):
        value = max(values[k] + std * rng.standard_normal(), 0.0)
        out.append((tag, float(times[k] + dead_time), float(value)))
    return out
