"""The plant simulator and scenario files: determinism, and every event visible in the data."""

from __future__ import annotations

import dataclasses
import math
from functools import cache
from pathlib import Path

import numpy as np
import pytest

from estimator.config import TrainConfig, load_train_config
from estimator.errors import ConfigError
from estimator.model import TrainModel
from estimator.scenario import load_scenario, parse_scenario
from estimator.simulate import (
    FAULT_FROZEN,
    FAULT_NONE,
    FAULT_SPIKE,
    Profile,
    Scenario,
    Simulation,
    simulate,
)

DEMO = Path(__file__).resolve().parents[2] / "replay_data" / "wrenfield"
HOUR = 3600.0
DAY = 86400.0


@cache
def train() -> TrainConfig:
    return load_train_config(DEMO / "train.toml")


@cache
def model() -> TrainModel:
    return TrainModel.from_config(train())


# A two-day scenario with one event of every kind, at known times.
SCENARIO = {
    "scenario": {
        "start": "2026-03-02T00:00:00+00:00",
        "duration": "2 d",
        "step": "10 s",
        "seed": 11,
    },
    "flow": {"initial": "12 m^3/h", "changes": [{"at": "4 h", "to": "15 m^3/h", "ramp": "2 h"}]},
    "feed": {"glucose": {"changes": [{"at": "10 h", "to": "2.55 kmol/m^3"}]}},
    "temperature": {
        "R-201": {
            "upsets": [{"at": "20 h", "by": "-4 K", "ramp": "30 min", "hold": "3 h", "back": "1 h"}]
        }
    },
    "activity": {
        "declines": [{"start": "12 h", "end": "2 d", "shape": "exponential", "rate": "0.05 1/d"}],
        "drops": [{"at": "30 h", "loss": "15 %"}],
    },
    "tags": {
        "FI-200": {"period": "1 min"},
        "AI-203G": {
            "period": "4 min",
            "spikes": {"rate": "6 1/d", "size": [8, 15]},
            "dropouts": [{"start": "14 h", "end": "17 h"}],
            "frozen": [{"start": "26 h", "end": "29 h"}],
        },
        "LAB-202F": {"lab": {"first": "8 h", "period": "12 h", "delay": ["3 h", "5 h"]}},
    },
}


@cache
def scenario() -> Scenario:
    return parse_scenario(SCENARIO, train())


@cache
def run() -> Simulation:
    return simulate(model(), scenario())


def relative(sim: Simulation, tag: str) -> tuple[np.ndarray, np.ndarray]:
    times, values = sim.of_tag(tag)
    return times - sim.times[0], values


def test_same_seed_same_run_other_seed_other_noise_same_truth():
    a = run()
    b = simulate(model(), scenario())
    for field in dataclasses.fields(Simulation):
        np.testing.assert_array_equal(getattr(a, field.name), getattr(b, field.name))
    c = simulate(model(), scenario(), seed=12)
    np.testing.assert_array_equal(a.truth, c.truth)
    assert not np.array_equal(a.of_tag("AI-203G")[1], c.of_tag("AI-203G")[1])


def test_profile_steps_are_right_continuous_and_sum_keeps_steps():
    step = Profile(((0.0, 1.0), (10.0, 1.0), (10.0, 2.0), (20.0, 4.0)))
    assert step(9.999) == 1.0
    assert step(10.0) == 2.0
    assert step(15.0) == 3.0
    assert step(99.0) == 4.0
    np.testing.assert_array_equal(step.sample(np.array([10.0]), left=True), [1.0])
    total = step + Profile(((5.0, 0.0), (5.0, 10.0)))
    np.testing.assert_allclose(
        total.sample(np.array([0.0, 5.0, 9.0, 10.0, 15.0, 30.0])), [1, 11, 11, 12, 13, 14]
    )


def test_truth_starts_at_steady_state_and_keeps_the_mole_balance():
    sim = run()
    u0 = sim.inputs[0]
    x0 = model().steady_state(u0, activity=1.0)
    np.testing.assert_allclose(sim.truth[0], x0[: model().layout.n_concentrations], rtol=1e-12)
    # Reversible isomerisation conserves glucose + fructose: at steady state every
    # vessel holds the feed total (2.4 kmol/m^3 before the feed step at 10 h).
    totals = sim.truth[0].reshape(3, 2).sum(axis=1)
    np.testing.assert_allclose(totals, 2400.0, rtol=1e-12)
    assert np.all(sim.truth >= 0.0)


def test_flow_ramp_shape_and_transmitter_noise():
    sim = run()
    rel = sim.times - sim.times[0]
    flow = sim.inputs[:, 0] * HOUR
    assert np.all(flow[rel < 4 * HOUR] == pytest.approx(12.0))
    ramp = (rel >= 4 * HOUR) & (rel <= 6 * HOUR)
    np.testing.assert_allclose(flow[ramp], 12.0 + 3.0 * (rel[ramp] - 4 * HOUR) / (2 * HOUR))
    assert np.all(flow[rel >= 6 * HOUR] == pytest.approx(15.0))
    # The transmitter reads once a minute with 0.5 % noise (the default).
    t, v = relative(sim, "FI-200")
    np.testing.assert_array_equal(np.diff(t), 60.0)
    true = np.interp(t, rel, sim.inputs[:, 0])
    ratio = v / true - 1.0
    assert np.std(ratio) == pytest.approx(0.005, rel=0.05)
    _, temp = relative(sim, "TI-202")
    assert np.std(temp - 331.15) == pytest.approx(0.1, rel=0.05)


def test_feed_step_and_temperature_upset_shapes():
    sim = run()
    rel = sim.times - sim.times[0]
    feed = sim.inputs[:, 4]
    assert np.all(feed[rel < 10 * HOUR] == 2400.0)
    assert np.all(feed[rel >= 10 * HOUR] == 2550.0)
    temp = sim.inputs[:, 1]
    base = 331.15
    at = {h: temp[np.searchsorted(rel, h * HOUR)] for h in (19.9, 20.25, 21.0, 23.5, 24.0, 25.0)}
    assert at[19.9] == pytest.approx(base)
    assert at[20.25] == pytest.approx(base - 2.0)  # half way down the 30 min ramp
    assert at[21.0] == pytest.approx(base - 4.0)
    assert at[23.5] == pytest.approx(base - 4.0)
    assert at[24.0] == pytest.approx(base - 2.0)  # half way back over 1 h
    assert at[25.0] == pytest.approx(base)


def test_exponential_decline_and_sudden_loss_of_activity():
    sim = run()
    rel = sim.times - sim.times[0]
    k = 0.05 / DAY
    decay = np.exp(-k * np.clip(rel - 12 * HOUR, 0.0, None))
    expected = np.where(rel >= 30 * HOUR, 0.85, 1.0) * decay
    np.testing.assert_allclose(sim.true_activity, expected, rtol=1e-9)
    # The loss shows in the truth: the last vessel's glucose rises after the drop.
    i = np.searchsorted(rel, 30 * HOUR)
    c_a = sim.truth[:, 4]
    assert c_a[i + 360] > c_a[i - 1] + 20.0


def test_analyzer_reports_after_its_dead_time():
    quiet = dataclasses.replace(scenario(), spikes={}, frozen={}, noise_scale=0.0)
    sim = simulate(model(), quiet)
    t, v = relative(sim, "AI-203G")
    dead = 4 * 60.0  # train.toml: dead_time = "4 min"
    rel = sim.times - sim.times[0]
    sample = np.searchsorted(rel, t - dead)
    np.testing.assert_array_equal(v, sim.truth[sample, 4])
    assert t[0] == dead


def test_spikes_deviate_by_many_sigma():
    quiet = dataclasses.replace(scenario(), noise_scale=0.0)
    sim = simulate(model(), quiet)
    tag = sim.tag_names.index("AI-203G")
    mine = sim.reading_tags == tag
    spikes = mine & (sim.faults == FAULT_SPIKE)
    clean = mine & (sim.faults == FAULT_NONE)
    rel = sim.times - sim.times[0]
    sample = np.searchsorted(rel, sim.reading_times - sim.times[0] - 240.0)
    error = sim.reading_values - sim.truth[np.clip(sample, 0, len(rel) - 1), 4]
    sigma = 20.0  # train.toml: std = "20 mol/m^3"
    # 6 a day for 2 days, Poisson: a handful to a score.
    assert 4 <= np.count_nonzero(spikes) <= 25
    assert np.all(np.abs(error[spikes]) >= 8 * sigma - 1e-9)
    assert np.all(np.abs(error[spikes]) <= 15 * sigma + 1e-9)
    assert np.any(error[spikes] > 0) and np.any(error[spikes] < 0)
    np.testing.assert_allclose(error[clean], 0.0, atol=1e-9)


def test_frozen_window_repeats_the_last_value():
    sim = run()
    t, v = relative(sim, "AI-203G")
    faults = sim.faults[sim.reading_tags == sim.tag_names.index("AI-203G")]
    inside = (t >= 26 * HOUR) & (t < 29 * HOUR)
    assert np.count_nonzero(inside) == 3 * 15  # a reading every 4 min
    before = v[np.flatnonzero(inside)[0] - 1]
    assert np.all(v[inside] == before)
    assert np.all(faults[inside] == FAULT_FROZEN)
    assert len(np.unique(v[~inside])) == np.count_nonzero(~inside)


def test_dropout_window_has_no_readings():
    sim = run()
    t, _ = relative(sim, "AI-203G")
    assert not np.any((t >= 14 * HOUR) & (t < 17 * HOUR))
    gap = np.max(np.diff(t))
    assert gap == pytest.approx(3 * HOUR + 240.0, abs=240.0)


def test_lab_results_carry_sample_time_and_arrive_late():
    sim = run()
    lab = sim.reading_tags == sim.tag_names.index("LAB-202F")
    rel = sim.reading_times[lab] - sim.times[0]
    np.testing.assert_array_equal(rel, [8 * HOUR, 20 * HOUR, 32 * HOUR, 44 * HOUR])
    delay = sim.received[lab] - sim.reading_times[lab]
    assert np.all((delay >= 3 * HOUR) & (delay <= 5 * HOUR))
    np.testing.assert_array_equal(delay, np.round(delay))
    others = ~lab
    np.testing.assert_array_equal(sim.received[others], sim.reading_times[others])


def test_readings_are_sorted_and_columns_match():
    sim = run()
    assert np.all(np.diff(sim.reading_times) >= 0.0)
    tags, times, values = sim.columns()
    assert len(tags) == len(times) == len(values) == len(sim.readings)
    assert sim.readings[0] == (tags[0], times[0], values[0])
    assert set(tags) == set(train().tags())


def test_defaults_keep_the_old_keyword_interface():
    # Callers that build Scenario directly (the demo, the benchmark) still work.
    short = Scenario(duration=HOUR, step=10.0, analyzer_period={"AI-203G": 240.0})
    sim = simulate(model(), short, seed=3, start=1000.0, noise_scale=0.5)
    assert sim.times[0] == 1000.0
    assert len(sim.times) == 361
    t, _ = sim.of_tag("LAB-202F")
    np.testing.assert_array_equal(np.diff(t), 10.0)


def test_the_demo_scenario_loads():
    demo = load_scenario(DEMO / "scenario.toml", train())
    assert demo.duration == 30 * DAY
    assert demo.step == 10.0
    assert demo.start == 1772409600.0  # 2026-03-02T00:00:00+00:00
    assert demo.activity(30 * DAY) == pytest.approx(0.96 * 0.85, rel=1e-12)


@pytest.mark.parametrize(
    ("edit", "key", "reason"),
    [
        (("tags", "AI-203G", "dropuots"), "tags.AI-203G.dropuots", "unknown key"),
        (("tags", "TI-999"), "tags.TI-999", "is not a tag of the train"),
        (("temperature", "R-999"), "temperature.R-999", "is not a vessel"),
        (("flow", "changes"), "flow.changes[0].to", "expected a volumetric flow"),
        (("activity", "drops"), "activity.drops[0].loss", "must be below 1"),
        (("tags", "AI-203G", "lab"), "tags.AI-203G.lab", "only a measurement of kind 'lab'"),
        (("scenario", "start"), "scenario.start", "give a UTC offset"),
    ],
)
def test_scenario_problems_name_the_key(edit, key, reason):
    data = {**SCENARIO, "tags": dict(SCENARIO["tags"]), "activity": dict(SCENARIO["activity"])}
    data["scenario"] = dict(SCENARIO["scenario"])
    data["flow"] = dict(SCENARIO["flow"])
    data["temperature"] = dict(SCENARIO["temperature"])
    section, name, *rest = edit
    if section == "tags" and rest:
        data["tags"][name] = {**data["tags"][name], rest[0]: {"first": "1 h"}}
    elif section == "tags":
        data["tags"][name] = {"period": "1 min"}
    elif section == "temperature":
        data["temperature"][name] = {"initial": "50 degC"}
    elif section == "flow":
        data["flow"]["changes"] = [{"at": "1 h", "to": "15 degC"}]
    elif section == "activity":
        data["activity"]["drops"] = [{"at": "1 h", "loss": 1.5}]
    elif section == "scenario":
        data["scenario"]["start"] = "2026-03-02T00:00:00"
    with pytest.raises(ConfigError) as info:
        parse_scenario(data, train(), source="s.toml")
    problems = {p.key: p.reason for p in info.value.problems}
    assert key in problems, problems
    assert reason in problems[key]


def test_overlapping_changes_and_missing_duration_are_refused():
    data = {
        "scenario": {"step": "10 s"},
        "flow": {
            "changes": [
                {"at": "1 h", "to": "13 m^3/h", "ramp": "2 h"},
                {"at": "2 h", "to": "14 m^3/h"},
            ]
        },
    }
    with pytest.raises(ConfigError) as info:
        parse_scenario(data, train())
    keys = [p.key for p in info.value.problems]
    assert keys == ["scenario.duration", "flow.changes[1].at"]


def test_linear_decline_loses_its_fraction_evenly():
    data = {
        "scenario": {"duration": "1 d"},
        "activity": {"declines": [{"start": "6 h", "end": "18 h", "shape": "linear", "loss": 0.1}]},
    }
    act = parse_scenario(data, train()).activity
    assert act(6 * HOUR) == 1.0
    assert act(12 * HOUR) == pytest.approx(0.95, rel=1e-12)
    assert act(18 * HOUR) == pytest.approx(0.9, rel=1e-12)
    assert math.isclose(act(23 * HOUR), 0.9)
