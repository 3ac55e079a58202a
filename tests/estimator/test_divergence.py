"""A filter that has lost the plant is re-initialised from the model, and says so.

The scenario: the demo train's catalyst loses half its activity at once, and the
filter is tuned as if the activity could hardly move (its random walk 1e-4 per
hour where the train's own tuning says 0.01). Such a filter is too sure of itself
to follow: the product analyzer's readings fall far on one side of its predictions
for hours (gated, then taken as steps that the model pulls away from again) while
its activity estimate creeps. That is divergence in the sense of Bar-Shalom, Li &
Kirubarajan, *Estimation with Applications to Tracking and Navigation*, Wiley 2001,
sec. 5.4: innovations inconsistent with their own covariance for a long window.
Re-initialising a diverged filter from the model with its start-up uncertainty is
common practice; the checks here are that it happens, once, after the loss, that
the filter then tracks the truth, that a normal run never triggers it, and that
the re-initialisation is part of the filter's deterministic history (the same
however the readings were batched, rewound or read back).
"""

from __future__ import annotations

import tomllib

import numpy as np
import pytest

from estimator.alarm_state import DISCLAIMER
from estimator.config import RandomWalk, TrainConfig, load_train_config, parse_train_config
from estimator.errors import ConfigError
from estimator.session import EstimateBatch, SessionOutput, TrainSession
from estimator.simulate import Profile, Scenario, simulate

DEMO = "replay_data/wrenfield/train.toml"
HOUR = 3600.0
LOSS_AT = 8 * HOUR  # [s from the start]
HOURS = 20.0
ALERT = "estimator_reinitialised:wrenfield-line2"


def overconfident(enabled: bool = True) -> TrainConfig:
    """The demo train with an activity random walk far too small, watch on or off."""
    config = load_train_config(DEMO)
    est = config.estimator
    est = est.model_copy(
        update={
            "activity_noise": RandomWalk(sigma=1e-4, per=HOUR),
            "divergence": est.divergence.model_copy(update={"enabled": enabled}),
        }
    )
    return config.model_copy(update={"estimator": est})


def readings(config: TrainConfig, loss: float = 0.5, seed: int = 5):
    """Simulated readings (SI): transmitters every 10 s, analyzers 2 and 4 min, lab 2 h."""
    model = TrainSession(config).model
    scenario = Scenario(
        duration=HOURS * HOUR,
        step=10.0,
        activity=Profile(((0.0, 1.0), (LOSS_AT, 1.0), (LOSS_AT, 1.0 - loss))),
        analyzer_period={"AI-203G": 240.0, "AI-200G": 120.0, "LAB-202F": 2 * HOUR},
    )
    return simulate(model, scenario, seed=seed, start=0.0).columns()


def feed(session: TrainSession, tags, times, values, chunk: int) -> list[SessionOutput]:
    return [
        session.ingest(tags[i : i + chunk], times[i : i + chunk], values[i : i + chunk], si=True)
        for i in range(0, len(times), chunk)
    ]


def final_rows(outs: list[SessionOutput]) -> EstimateBatch:
    """The last word on every estimate time (revisions replace earlier rows)."""
    batch = EstimateBatch.concat([o.estimates for o in outs])
    _, last = np.unique(batch.time[::-1], return_index=True)
    return batch.take(np.sort(len(batch) - 1 - last))


@pytest.fixture(scope="module")
def diverging() -> tuple[list[str], np.ndarray, np.ndarray]:
    return readings(overconfident())


def test_without_the_watch_the_overconfident_filter_stays_lost(diverging):
    # The premise of the other checks: this filter does diverge.
    tags, times, values = diverging
    rows = final_rows(feed(TrainSession(overconfident(enabled=False)), tags, times, values, 5000))
    end = rows.take(slice(-1, None))
    assert end.activity[0] - 0.5 > 0.3  # still near 0.9 twelve hours after the loss
    assert end.activity[0] - 0.5 > 20 * end.activity_std[0]  # and sure of it
    assert np.all(np.isnan(rows.reset_time))


def test_a_diverged_filter_is_reinitialised_once_and_then_tracks_the_plant(diverging):
    tags, times, values = diverging
    config = overconfident()
    session = TrainSession(config)
    rows = final_rows(feed(session, tags, times, values, 5000))
    resets = np.unique(rows.reset_time[np.isfinite(rows.reset_time)])
    assert len(resets) == 1
    reset = float(resets[0])
    # After the loss, within a few hours of it (the window is 2 h).
    assert LOSS_AT < reset < LOSS_AT + 4 * HOUR
    at = int(np.searchsorted(rows.time, reset))
    assert rows.time[at] == reset and np.all(np.isnan(rows.reset_time[:at]))
    watch = config.estimator.divergence
    assert rows.reset_nis[at] > watch.nis_ratio
    # The row at the reset shows the start-up state: design activity, start-up sigma.
    init = config.estimator.initial_std
    assert rows.activity[at] == config.estimator.design_activity
    assert rows.activity_std[at] == pytest.approx(init.activity, rel=1e-12)
    np.testing.assert_allclose(rows.concentration_std[at], init.concentration, rtol=1e-12)
    # Then the filter finds the plant again: four hours on, activity within 3 sigma
    # of the truth, and it stays there.
    later = rows.time >= reset + 4 * HOUR
    error = np.abs(rows.activity[later] - 0.5)
    assert np.all(error <= 3 * rows.activity_std[later] + 1e-3)
    assert np.max(error) < 0.03
    # Recorded as an alert: active from the reset, cleared after its settling time.
    assert session.alert_engine is not None
    events = [e for e in session.alert_engine.events if e.alert_id == ALERT]
    states = [(e.time, e.to_state) for e in events]
    settle = config.alerts.estimator_reinitialised.settle
    assert states[0] == (reset, "active_unacknowledged")
    assert states[1][1] == "cleared_unacknowledged"
    assert states[1][0] == pytest.approx(reset + settle, abs=60.0)
    assert "started again from the design model" in events[0].message
    assert events[0].message.endswith(DISCLAIMER)


def test_normal_operation_never_reinitialises():
    # The train's own tuning over two simulated days of normal operation with feed
    # and throughput changes, and the slow catalyst ageing the tuning expects.
    config = load_train_config(DEMO)
    model = TrainSession(config).model
    q = config.feed.flow.nominal
    scenario = Scenario(
        duration=48 * HOUR,
        step=10.0,
        flow=Profile(((0.0, q), (10 * HOUR, q), (10 * HOUR, 0.8 * q), (30 * HOUR, 1.1 * q))),
        feed={"glucose": Profile(((0.0, 2400.0), (20 * HOUR, 2400.0), (20 * HOUR, 2200.0)))},
        activity=Profile(((0.0, 1.0), (48 * HOUR, 0.95))),
        analyzer_period={"AI-203G": 240.0, "AI-200G": 120.0, "LAB-202F": 2 * HOUR},
    )
    for seed in (1, 2):
        tags, times, values = simulate(model, scenario, seed=seed, start=0.0).columns()
        rows = final_rows(feed(TrainSession(config), tags, times, values, 5000))
        assert len(rows) > 10_000
        assert np.all(np.isnan(rows.reset_time)), f"seed {seed}"


def test_the_reinitialisation_does_not_depend_on_batching_or_restarts(diverging):
    tags, times, values = diverging
    config = overconfident()
    one = final_rows(feed(TrainSession(config), tags, times, values, len(times)))
    # Small batches, and a checkpoint/restore half way.
    half = len(times) // 2
    first = TrainSession(config)
    outs = feed(first, tags[:half], times[:half], values[:half], 700)
    resumed = TrainSession.restore(config, first.checkpoint())
    outs += feed(resumed, tags[half:], times[half:], values[half:], 700)
    other = final_rows(outs)
    np.testing.assert_array_equal(one.time, other.time)
    np.testing.assert_array_equal(one.reset_time, other.reset_time)
    np.testing.assert_array_equal(one.activity, other.activity)
    np.testing.assert_array_equal(one.concentration, other.concentration)


def test_a_late_result_rerun_across_the_reinitialisation_applies_it_again(diverging):
    tags, times, values = diverging
    config = overconfident()
    in_order = final_rows(feed(TrainSession(config), tags, times, values, 5000))
    reset = float(np.nanmax(in_order.reset_time))
    # Hold back the product analyzer's readings of the hour before the reset and
    # send them an hour after it: the filter rewinds across the reset.
    tag_arr = np.asarray(tags, dtype=object)
    late = (tag_arr == "AI-203G") & (times > reset - HOUR) & (times <= reset)
    first = ~late & (times <= reset + HOUR)
    rest = ~late & ~first
    session = TrainSession(config)
    outs = []
    for part in (first, late, rest):
        outs += feed(session, tag_arr[part].tolist(), times[part], values[part], 5000)
    # Without those readings the filter judged differently (later); with them it
    # reruns to the same history as in order.
    assert any(o.revised_from is not None and o.revised_from < reset for o in outs)
    rows = final_rows(outs)
    np.testing.assert_array_equal(rows.time, in_order.time)
    np.testing.assert_array_equal(rows.reset_time, in_order.reset_time)
    np.testing.assert_allclose(rows.activity, in_order.activity, rtol=0, atol=0)


@pytest.mark.parametrize(
    ("key", "value", "reason"),
    [
        ("nis_ratio", 1.0, "greater than 1"),
        ("bias", 0.0, "positive"),
        ("min_dof", 0.5, "at least 1"),
        ("window", "0 h", "positive"),
    ],
)
def test_bad_divergence_settings_name_the_key(key: str, value: object, reason: str):
    with open(DEMO, "rb") as fh:
        data = tomllib.load(fh)
    data.setdefault("estimator", {})["divergence"] = {key: value}
    with pytest.raises(ConfigError) as err:
        parse_train_config(data)
    text = str(err.value)
    assert f"estimator.divergence.{key}" in text
    assert reason in text


def test_disabled_watch_registers_no_alert():
    session = TrainSession(overconfident(enabled=False))
    assert session.alert_engine is not None
    ids = {a.alert_id for a in session.alert_engine.alerts()}
    assert ALERT not in ids
    assert ALERT in {a.alert_id for a in TrainSession(overconfident()).alert_engine.alerts()}
