"""The train session: units at the edge, gated readings in words, steps, revisions."""

from __future__ import annotations

import numpy as np
import pytest

from estimator.config import load_train_config
from estimator.session import EstimateBatch, RevisionBuffer, TrainSession
from estimator.simulate import Profile, Scenario, simulate

DEMO = "replay_data/wrenfield/train.toml"
HOUR = 3600.0


def demo_session(**estimator: object) -> TrainSession:
    config = load_train_config(DEMO)
    if estimator:
        config = config.model_copy(
            update={"estimator": config.estimator.model_copy(update=estimator)}
        )
    return TrainSession(config)


def feed_step_readings(hours: float = 8.0, seed: int = 5):
    session = demo_session()
    scenario = Scenario(
        duration=hours * HOUR,
        feed={"glucose": Profile(((0.0, 2400.0), (3 * HOUR, 2400.0), (3 * HOUR, 2200.0)))},
        analyzer_period={"AI-203G": 240.0, "AI-200G": 120.0, "LAB-202F": 4 * HOUR},
    )
    return simulate(session.model, scenario, seed=seed)


def test_readings_in_tag_units_equal_readings_in_si():
    # FI-200 is in m^3/h and TI-201/TI-202 in degC: the session converts at the edge.
    sim = feed_step_readings(hours=2.0)
    tags, times, values = sim.columns()
    si = demo_session().ingest(tags, times, values, si=True)
    session = demo_session()
    units = dict(zip(session.tags, session.units, strict=True))
    native = values.copy()
    for i, tag in enumerate(tags):
        if units[tag] == "m^3/h":
            native[i] = values[i] * 3600.0
        elif units[tag] == "degC":
            native[i] = values[i] - 273.15
    out = session.ingest(tags, times, native)
    np.testing.assert_allclose(out.estimates.concentration, si.estimates.concentration, rtol=1e-12)
    assert session.units[session.tags.index("TI-201")] == "degC"


def test_feed_step_is_taken_as_a_step_and_a_lone_spike_stays_gated():
    sim = feed_step_readings()
    tags, times, values = sim.columns()
    values = values.copy()
    spike = next(i for i, t in enumerate(tags) if t == "AI-200G" and times[i] > 1.5 * HOUR)
    values[spike] += 400.0  # 16 sigma of the feed analyzer, once
    out = demo_session().ingest(tags, times, values, si=True)
    gated_feed = [g for g in out.gated if g.tag == "AI-200G"]
    assert any(abs(g.sample_time - times[spike]) < 1e-9 for g in gated_feed)
    assert "sigma" in gated_feed[0].reason and gated_feed[0].unit == "mol/m^3"
    # The step of -200 mol/m^3 (8 sigma) at 3 h: three readings gated, then taken.
    assert len(out.steps) == 1
    step = out.steps[0]
    assert 3 * HOUR < step.sample_time < 3 * HOUR + 4 * 120.0 + 1
    assert "taken as a real step" in step.reason
    final_feed = out.estimates.feed[-1, 0]
    assert final_feed == pytest.approx(2200.0, abs=30.0)


def test_without_step_acceptance_the_filter_rejects_the_new_level_much_longer():
    sim = feed_step_readings()
    tags, times, values = sim.columns()
    strict = demo_session(step_persistence=0).ingest(tags, times, values, si=True)
    usual = demo_session().ingest(tags, times, values, si=True)
    assert len([g for g in strict.gated if g.tag == "AI-200G"]) > 5 * len(
        [g for g in usual.gated if g.tag == "AI-200G"]
    )


def test_shuffled_batches_give_the_in_order_estimates_with_a_step_in_the_data():
    sim = feed_step_readings()
    tags, times, values = sim.columns()
    in_order = demo_session()
    a = in_order.ingest(tags, times, values, si=True)
    late = demo_session()
    buffer = RevisionBuffer()
    rng = np.random.default_rng(3)
    order = np.argsort(times + rng.uniform(0.0, 900.0, len(times)))
    for chunk in np.array_split(order, 60):
        out = late.ingest([tags[i] for i in chunk], times[chunk], values[chunk], si=True)
        buffer.add(out.estimates)
    b = buffer.release()
    assert b is not None
    np.testing.assert_allclose(late.filter.x, in_order.filter.x, rtol=1e-10)
    np.testing.assert_array_equal(b.time, a.estimates.time)
    np.testing.assert_allclose(b.concentration, a.estimates.concentration, rtol=1e-9)


def test_nis_rows_count_one_update_each():
    sim = feed_step_readings(hours=3.0)
    tags, times, values = sim.columns()
    out = demo_session().ingest(tags, times, values, si=True)
    measured = sum(1 for t in tags if t in ("AI-203G", "AI-200G", "LAB-202F"))
    gated = len(out.gated) + len(out.steps)
    assert len(out.nis) == measured - gated
    assert set(out.nis[:, 2].tolist()) == {1.0}
    assert np.all(np.diff(out.nis[:, 0]) >= 0)


def test_revision_buffer_replaces_revised_rows_and_releases_in_order():
    def batch(times: list[float], level: float) -> EstimateBatch:
        k = len(times)
        return EstimateBatch(
            time=np.array(times),
            concentration=np.full((k, 1, 1), level),
            concentration_std=np.zeros((k, 1, 1)),
            conversion=np.zeros((k, 1)),
            conversion_std=np.zeros((k, 1)),
            design_conversion=np.zeros((k, 1)),
            activity=np.ones(k),
            activity_std=np.zeros(k),
            feed=np.zeros((k, 1)),
            inputs=np.zeros((k, 3)),
            reset_time=np.full(k, np.nan),
            reset_nis=np.full(k, np.nan),
        )

    buf = RevisionBuffer()
    buf.add(batch([0, 10, 20, 30], 1.0))
    buf.add(batch([20, 30, 40], 2.0))  # a rewind revised 20 and 30
    first = buf.release(before=25.0)
    assert first is not None
    assert first.time.tolist() == [0, 10, 20]
    assert first.concentration[:, 0, 0].tolist() == [1.0, 1.0, 2.0]
    rest = buf.release()
    assert rest is not None and rest.time.tolist() == [30, 40]
    assert buf.release() is None


def test_checkpoint_and_restore_continue_exactly():
    # A session stopped mid-stream and resumed from its checkpoint gives the same
    # estimates as one that never stopped, late lab results included.
    sim = feed_step_readings(hours=8.0)
    tags, times, values = sim.columns()
    half = times < 4 * HOUR
    whole = demo_session()
    whole.ingest(tags, times, values, si=True)
    first = demo_session()
    first.ingest(
        [t for t, h in zip(tags, half, strict=True) if h], times[half], values[half], si=True
    )
    resumed = TrainSession.restore(first.config, first.checkpoint())
    rest = ~half
    resumed.ingest(
        [t for t, r in zip(tags, rest, strict=True) if r], times[rest], values[rest], si=True
    )
    np.testing.assert_allclose(resumed.filter.x, whole.filter.x, rtol=1e-12)
    np.testing.assert_allclose(resumed.filter.cov, whole.filter.cov, rtol=1e-10, atol=1e-14)


def test_restore_refuses_bytes_that_are_not_a_checkpoint():
    with pytest.raises(ValueError, match="not a session checkpoint"):
        TrainSession.restore(demo_session().config, b"hello")


def test_restore_refuses_a_checkpoint_of_another_configuration():
    session = demo_session()
    sim = feed_step_readings(hours=1.0)
    session.ingest(*sim.columns(), si=True)
    other = session.config.model_copy(
        update={"reaction": session.config.reaction.model_copy(update={"k_ref": 1e-4})}
    )
    with pytest.raises(ValueError, match="another train configuration"):
        TrainSession.restore(other, session.checkpoint())


def test_session_raises_alerts_and_keeps_them_across_a_checkpoint():
    # A sudden 25 % activity loss: the session's alert engine raises an alert within
    # two total residence times (2 x 29 m^3 / 12 m^3/h = 4.8 h), and a restored
    # session carries the active alert on instead of raising it again.
    session = demo_session()
    scenario = Scenario(
        duration=12 * HOUR,
        activity=Profile(((0.0, 1.0), (4 * HOUR, 1.0), (4 * HOUR, 0.75))),
        analyzer_period={"AI-203G": 240.0, "AI-200G": 120.0, "LAB-202F": 12 * HOUR},
    )
    sim = simulate(session.model, scenario, seed=2)
    tags, times, values = sim.columns()
    events = []
    for lo in np.arange(0.0, 12 * HOUR, HOUR):
        sel = (times >= lo) & (times < lo + HOUR)
        out = session.ingest(
            [t for t, k in zip(tags, sel, strict=True) if k], times[sel], values[sel], si=True
        )
        events += out.alerts
    raised = [e for e in events if str(e.to_state).startswith("active")]
    assert raised, "no alert for a 25 % activity loss"
    assert raised[0].time - 4 * HOUR < 2 * 29.0 / 12.0 * HOUR
    restored = TrainSession.restore(session.config, session.checkpoint())
    assert restored.alert_engine is not None and session.alert_engine is not None
    assert [a.alert_id for a in restored.alert_engine.active()] == [
        a.alert_id for a in session.alert_engine.active()
    ]
