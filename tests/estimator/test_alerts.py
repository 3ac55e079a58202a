"""Alert rules, their deadbands and delays, the alarm lifecycle, and the demo train.

The rule tests feed synthetic estimate streams built row by row, so every
activation and clearing time is known in advance. Sources: OPC UA Part 9 for
on-delay, off-delay and deadband; ISA-18.2 / IEC 62682 for the states; the
chattering criterion of 3 or more activations in 60 s is a practitioner's
(REFERENCES.md sec. 6, [V]).
"""

from __future__ import annotations

import json
from typing import Any

import numpy as np
import pytest

from estimator.alarm_state import Condition
from estimator.alerts import (
    DISCLAIMER,
    AlertActionError,
    AlertEngine,
    AlertEvent,
    AlertState,
    HealthInput,
)
from estimator.config import TrainConfig, load_train_config, parse_train_config
from estimator.errors import ConfigError
from estimator.session import EstimateBatch, TrainSession
from estimator.simulate import LabSchedule, Profile, Scenario, simulate

DEMO = "replay_data/wrenfield/train.toml"
T0 = 1_772_409_600.0  # 2026-03-02T00:00Z
MINUTE, HOUR, DAY = 60.0, 3600.0, 86400.0
# The rules' mechanics are checked on synthetic estimates that carry their design
# conversion: the steady-state expectation reads it from them (the dynamic one,
# the default, is checked on its own below).
_LOADED = load_train_config(DEMO)
_STEADY = _LOADED.alerts.conversion_shortfall.model_copy(update={"expectation": "steady"})
CONFIG = _LOADED.model_copy(
    update={"alerts": _LOADED.alerts.model_copy(update={"conversion_shortfall": _STEADY})}
)
VESSELS = [v.name for v in CONFIG.vessels]
N = len(VESSELS)
ACTIVE, ACKED = AlertState.ACTIVE_UNACKNOWLEDGED.value, AlertState.ACTIVE_ACKNOWLEDGED.value
NORMAL, CLEARED = AlertState.NORMAL.value, AlertState.CLEARED_UNACKNOWLEDGED.value
DESIGN = np.array([0.33, 0.43, 0.46])


def with_alerts(config: TrainConfig = CONFIG, **rules: dict[str, Any]) -> TrainConfig:
    """The demo train with some alert rules' fields changed."""
    changed = {name: getattr(config.alerts, name).model_copy(update=u) for name, u in rules.items()}
    alerts = config.alerts.model_copy(update=changed)
    return config.model_copy(update={"alerts": alerts})


def stream(
    minutes: float,
    *,
    start: float = 0.0,
    step: float = MINUTE,
    shortfall: Any = 0.0,
    conversion_std: Any = 0.002,
    activity: Any = 1.0,
    activity_std: Any = 0.01,
    flow: Any = None,
    temperature: Any = None,
    reset_time: Any = np.nan,
    reset_nis: Any = np.nan,
) -> EstimateBatch:
    """Estimates every ``step`` from ``start`` [min after T0]; arguments are scalars,
    per-row arrays or callables of the time in minutes; the shortfall is R-202's;
    ``reset_time`` is in epoch seconds."""
    t_min = start + np.arange(0.0, minutes, step / MINUTE)
    k = len(t_min)

    def col(value: Any) -> np.ndarray:
        v = value(t_min) if callable(value) else value
        return np.broadcast_to(np.asarray(v, dtype=float), (k,)).copy()

    design = np.tile(DESIGN, (k, 1))
    conversion = design.copy()
    conversion[:, 1] -= col(shortfall)
    inputs = np.zeros((k, 1 + N + 2))
    inputs[:, 0] = col(CONFIG.feed.flow.nominal if flow is None else flow)
    for i, vessel in enumerate(CONFIG.vessels):
        inputs[:, 1 + i] = col(vessel.nominal_temperature if temperature is None else temperature)
    inputs[:, 1 + N] = 2400.0
    return EstimateBatch(
        time=T0 + t_min * MINUTE,
        concentration=np.zeros((k, N, 2)),
        concentration_std=np.zeros((k, N, 2)),
        conversion=conversion,
        conversion_std=np.tile(col(conversion_std)[:, None], (1, N)),
        design_conversion=design,
        activity=col(activity),
        activity_std=col(activity_std),
        feed=np.tile([2400.0, 0.0], (k, 1)),
        inputs=inputs,
        reset_time=col(reset_time),
        reset_nis=col(reset_nis),
    )


def minutes(event: AlertEvent) -> float:
    return round((event.time - T0) / MINUTE, 6)


def of(events: list[AlertEvent], alert_id: str) -> list[tuple[float, str]]:
    return [(minutes(e), e.to_state) for e in events if e.alert_id == alert_id]


WARN = "conversion_shortfall_warning:R-202"
HIGH = "conversion_shortfall_high:R-202"


def step_up(at: float, size: float, back: float | None = None) -> Any:
    def f(t: np.ndarray) -> np.ndarray:
        on = t >= at if back is None else (t >= at) & (t < back)
        return np.where(on, size, 0.0)

    return f


# Conversion shortfall: deadband, on-delay and off-delay


def test_shortfall_warning_waits_for_its_on_delay_and_clears_after_its_off_delay():
    # Defaults: band 0.01, k = 2, deadband 0.005, on-delay 15 min, off-delay 30 min.
    # A shortfall of 0.02 (1-sigma 0.002: 0.016 beyond k sigma) from minute 60 to 180.
    engine = AlertEngine(CONFIG)
    events = engine.update(stream(300, shortfall=step_up(60, 0.02, back=180)))
    assert of(events, WARN) == [(75.0, ACTIVE), (210.0, CLEARED)]
    assert of(events, HIGH) == []  # 0.02 - 2 * 0.002 is inside the high band 0.03
    raised = events[0]
    assert raised.figure == pytest.approx(0.02) and raised.threshold == 0.01
    assert raised.who == "stagewatch" and "on-delay of 15 min" in raised.why


def test_shortfall_must_exceed_its_band_by_k_sigma():
    # 0.015 short: beyond the band 0.01 by 0.005, which is 2.5 sigma at 0.002 but only
    # 1.25 sigma at 0.004 (k = 2).
    sure = AlertEngine(CONFIG).update(stream(60, shortfall=0.015, conversion_std=0.002))
    unsure = AlertEngine(CONFIG).update(stream(60, shortfall=0.015, conversion_std=0.004))
    assert of(sure, WARN) == [(15.0, ACTIVE)]
    assert of(unsure, WARN) == []


def test_shortfall_inside_the_deadband_neither_activates_again_nor_clears():
    # Active from minute 15; then 0.012 short: 0.008 after k sigma, below the band 0.01
    # but above band - deadband = 0.005, so it stays active; at 0.008 short (0.004) it
    # clears after the 30-min off-delay.
    def shortfall(t: np.ndarray) -> np.ndarray:
        return np.select([t < 60, t < 240], [0.02, 0.012], 0.008)

    events = AlertEngine(CONFIG).update(stream(360, shortfall=shortfall))
    assert of(events, WARN) == [(15.0, ACTIVE), (270.0, CLEARED)]


def test_on_delay_restarts_when_the_condition_breaks():
    # 14 min beyond the band, one row inside, 14 min beyond again: never 15 min.
    def shortfall(t: np.ndarray) -> np.ndarray:
        return np.where(((t >= 10) & (t < 24)) | ((t >= 25) & (t < 39)), 0.02, 0.0)

    assert of(AlertEngine(CONFIG).update(stream(120, shortfall=shortfall)), WARN) == []


def test_high_band_raises_both_priorities_and_is_listed_first():
    engine = AlertEngine(CONFIG)
    engine.update(stream(60, shortfall=0.05))
    listed = [(a.alert_id, a.priority) for a in engine.active()]
    assert listed == [(HIGH, "high"), (WARN, "warning")]


def test_shortfall_uses_the_expected_hook():
    # A dynamic expectation 0.02 below the design one removes a 0.02 shortfall.
    def expected(batch: EstimateBatch) -> np.ndarray:
        return batch.design_conversion - 0.02

    events = AlertEngine(CONFIG, expected=expected).update(stream(60, shortfall=0.02))
    assert of(events, WARN) == []


# Activity rules


def test_activity_low_is_raised_beyond_its_uncertainty_and_cleared_past_the_deadband():
    # Limit 0.9, k = 2, deadband 0.02; 1-sigma 0.01: active while a < 0.88, clear
    # once a >= 0.90.
    def activity(t: np.ndarray) -> np.ndarray:
        return np.select([t < 60, t < 180, t < 300], [0.95, 0.87, 0.89], 0.905)

    alert = f"activity_low:{CONFIG.name}"
    events = AlertEngine(CONFIG).update(stream(480, activity=activity))
    assert of(events, alert) == [(75.0, ACTIVE), (330.0, CLEARED)]


def test_activity_falling_is_judged_by_the_slope_and_its_standard_error():
    # Flat at 1 for 3 h, then falling at 0.6 per day for 6 h, then flat. The 2-h
    # least-squares slope reaches its full value 2 h into the fall; with 1-sigma
    # 0.002 its standard error is sqrt(2) * 0.002 / 2 h = 0.034 per day, so the
    # 0.05-per-day limit plus 2 standard errors is crossed about 0.5 h into the fall.
    def activity(t: np.ndarray) -> np.ndarray:
        return 1.0 - 0.6 / 1440.0 * np.clip(t - 180, 0, 360)

    alert = f"activity_falling:{CONFIG.name}"
    events = AlertEngine(CONFIG).update(stream(900, activity=activity, activity_std=0.002))
    (raised, raised_state), (cleared, cleared_state) = of(events, alert)
    assert (raised_state, cleared_state) == (ACTIVE, CLEARED)
    assert 180 + 20 < raised < 180 + 60
    # The slope falls to 0 within the 2 h after the fall ends, then the 30-min off-delay.
    assert 540 < cleared < 540 + 150
    message = next(e.message for e in events if e.alert_id == alert)
    assert "falling at 0." in message and "limit 0.05 per day" in message


def test_a_noisy_but_uncertain_activity_is_not_called_falling():
    # An estimate wandering about a constant activity as much as its reported
    # 1-sigma (0.014) says, with a correlation time of 3 h: no alert in a day.
    rng = np.random.default_rng(7)
    rho = np.exp(-1.0 / 180.0)
    wander = np.zeros(24 * 60)
    for i in range(1, len(wander)):
        wander[i] = rho * wander[i - 1] + np.sqrt(1 - rho**2) * 0.014 * rng.normal()
    alert = f"activity_falling:{CONFIG.name}"
    batch = stream(24 * 60, activity=1.0 + wander, activity_std=0.014)
    events = AlertEngine(CONFIG).update(batch)
    assert of(events, alert) == []


# Inputs outside the model's validity


def test_flow_near_zero_and_temperature_outside_the_valid_range():
    nominal = CONFIG.feed.flow.nominal

    def flow(t: np.ndarray) -> np.ndarray:
        return np.where((t >= 30) & (t < 60), 0.05 * nominal, nominal)

    def temperature(t: np.ndarray) -> np.ndarray:
        # valid_temperature is 45..70 degC; 44.8 degC is outside, 45.3 inside the
        # 0.5 K deadband, 45.6 degC clear.
        return 273.15 + np.select([t < 100, t < 130, t < 160], [58.0, 44.8, 45.3], 45.6)

    events = AlertEngine(CONFIG).update(stream(240, flow=flow, temperature=temperature))
    assert of(events, "flow_low:FI-200") == [(31.0, ACTIVE), (65.0, CLEARED)]
    assert of(events, "temperature_range:R-201") == [(101.0, ACTIVE), (165.0, CLEARED)]
    message = next(e.message for e in events if e.alert_id == "flow_low:FI-200")
    assert "FI-200 flow 0.6 m^3/h is below 10% of the nominal 12 m^3/h" in message


# Estimator health


def readings(tag: str, times_min: np.ndarray, values: Any = None) -> HealthInput:
    t = T0 + np.asarray(times_min, dtype=float) * MINUTE
    v = np.arange(len(t), dtype=float) + 1.0 if values is None else np.asarray(values, float)
    return HealthInput(reading_tags=(tag,) * len(t), reading_times=t, reading_values=v)


def test_a_tag_without_readings_goes_stale_and_recovers():
    # AI-203G every 4 min until minute 60, silent until 150, then again. Stale after
    # 30 min without a reading (on-delay 0), clear 10 min after readings resume.
    engine = AlertEngine(CONFIG)
    times = np.concatenate([np.arange(0, 61, 4), np.arange(150, 240, 4)])
    events = engine.update(stream(240), readings("AI-203G", times))
    assert of(events, "tag_stale:AI-203G") == [(91.0, ACTIVE), (160.0, CLEARED)]
    # Tags never read go stale 30 min after monitoring started (lab tags after 24 h).
    assert of(events, "tag_stale:FI-200") == [(31.0, ACTIVE)]
    assert of(events, "tag_stale:LAB-202F") == []
    text = next(e.message for e in events if e.alert_id == "tag_stale:AI-203G")
    assert "No reading from AI-203G for 31 min" in text and "limit 30 min" in text


def test_a_frozen_output_is_caught_after_the_configured_count():
    # Values change every reading, then repeat from minute 40: the 12th identical
    # reading is at minute 40 + 11 * 4 = 84.
    t = np.arange(0, 200, 4)
    values = np.where(t < 40, 1000.0 + t, 1040.0)
    values[t >= 140] = 1000.0 + t[t >= 140]
    events = AlertEngine(CONFIG).update(stream(200), readings("AI-203G", t, values))
    # Changing again at minute 140: clear after the 10-min off-delay.
    assert of(events, "tag_frozen:AI-203G") == [(84.0, ACTIVE), (150.0, CLEARED)]
    text = of_messages(events, "tag_frozen:AI-203G")[0]
    assert "AI-203G repeated 1040 mol/m^3 for 12 readings in a row (limit 12)" in text


def test_a_large_share_of_gated_readings_raises_a_spike_alert():
    # 15 readings an hour; 4 of them gated within minutes 100..112: 4/15 > 25 %.
    t = np.arange(0, 300, 4)
    gated = T0 + np.array([100.0, 104.0, 108.0, 112.0]) * MINUTE
    health = HealthInput(
        reading_tags=("AI-203G",) * len(t),
        reading_times=T0 + t * MINUTE,
        reading_values=1000.0 + t,
        gated_tags=("AI-203G",) * 4,
        gated_times=gated,
    )
    events = AlertEngine(CONFIG).update(stream(300), health)
    # Active from the 4th gated reading. The window is (t - 1 h, t]: at minute 164 the
    # readings of minutes 100 and 104 have left it, 2 of 15 = 13 % is at or below
    # share - deadband = 15 %, and the 15-min off-delay ends at 179.
    assert of(events, "tag_spikes:AI-203G") == [(112.0, ACTIVE), (179.0, CLEARED)]


def test_windowed_nis_outside_its_chi_square_bounds_is_a_model_mismatch():
    # One 1-dof update every 2 min with NIS 1 (consistent), 3 from minute 120 to 300.
    t = np.arange(0, 480, 2.0)
    nis = np.where((t >= 120) & (t < 300), 3.0, 1.0)
    rows = np.column_stack([T0 + t * MINUTE, nis, np.ones_like(t), np.zeros_like(t)])
    health = HealthInput(nis=rows)
    alert = f"model_mismatch:{CONFIG.name}"
    # A 2-h window at 99 % (the defaults are 6 h at 99.9 %), for numbers worked by hand.
    config = with_alerts(model_mismatch={"window": 2 * HOUR, "probability": 0.99})
    events = AlertEngine(config).update(stream(480), health)
    (raised, s1), (cleared, s2) = of(events, alert)
    assert (s1, s2) == (ACTIVE, CLEARED)
    # 99 % bounds for 60 dof (a 2-h window): chi2.ppf([.005, .995], 60) / 60 =
    # [0.588, 1.525] [C]. The window mean passes 1.525 after about 32 min of NIS 3;
    # then the 1-h on-delay.
    assert 120 + 60 + 25 < raised < 120 + 60 + 40
    assert 300 < cleared < 300 + 120 + 30
    low = np.column_stack([T0 + t * MINUTE, np.full_like(t, 0.3), np.ones_like(t), 0 * t])
    quiet = AlertEngine(config).update(stream(480), HealthInput(nis=low))
    assert "better than their stated noise" in of_messages(quiet, alert)[0]


def of_messages(events: list[AlertEvent], alert_id: str) -> list[str]:
    return [e.message for e in events if e.alert_id == alert_id]


def test_health_rules_wait_for_a_health_input():
    events = AlertEngine(CONFIG).update(stream(120))
    assert events == []


# Chattering


def count_max_in_window(times: np.ndarray, window: float) -> int:
    times = np.sort(times)
    if len(times) == 0:
        return 0
    return int(np.max(np.searchsorted(times, times + window, side="left") - np.arange(len(times))))


def test_no_chattering_on_a_noisy_shortfall_hovering_at_its_limit():
    # R-202 shortfall hovering at the activation limit (band + k sigma = 0.014) with
    # noise of 1-sigma 0.003, a new estimate every second for 12 h. Chattering is 3 or
    # more activations of one alert in 60 s [V, practitioner criterion, REFERENCES.md
    # sec. 6]; with the default deadband and delays there must be fewer.
    rng = np.random.default_rng(20260302)
    k = 12 * 3600
    shortfall = 0.014 + rng.normal(0.0, 0.003, k)
    batch = stream(k / 60.0, step=1.0, shortfall=shortfall)
    events = AlertEngine(CONFIG).update(batch)
    activations = np.array([e.time for e in events if e.to_state == ACTIVE])
    assert count_max_in_window(activations, 60.0) < 3
    # Against the same signal without deadband or delays, which does chatter.
    bare = with_alerts(conversion_shortfall={"deadband": 0.0, "on_delay": 0.0, "off_delay": 0.0})
    raw = AlertEngine(bare).update(batch)
    raw_on = np.array([e.time for e in raw if e.alert_id == WARN and e.to_state == ACTIVE])
    assert count_max_in_window(raw_on, 60.0) >= 3


# Lifecycle (ISA-18.2 / IEC 62682 states)


def instant() -> AlertEngine:
    """An engine whose shortfall alerts act at once (no delays)."""
    return AlertEngine(with_alerts(conversion_shortfall={"on_delay": 0.0, "off_delay": 0.0}))


def test_acknowledged_while_active_then_cleared_returns_to_normal():
    engine = instant()
    engine.update(stream(10, shortfall=0.02))
    ack = engine.acknowledge(WARN, T0 + 10 * MINUTE, "ana", "seen, checking the lab")
    assert (ack.from_state, ack.to_state, ack.who) == (ACTIVE, ACKED, "ana")
    events = engine.update(stream(10, start=10, shortfall=0.0))
    assert of(events, WARN) == [(10.0, NORMAL)]
    assert engine.active() == []


def test_clearing_unacknowledged_waits_for_an_acknowledgement():
    engine = instant()
    engine.update(stream(10, shortfall=0.02))
    events = engine.update(stream(10, start=10, shortfall=0.0))
    assert of(events, WARN) == [(10.0, CLEARED)]
    assert [a.alert_id for a in engine.active()] == [WARN]  # still shown until acknowledged
    ack = engine.acknowledge(WARN, T0 + 30 * MINUTE, "ana", "seen")
    assert (ack.from_state, ack.to_state) == (CLEARED, NORMAL)


def test_reactivation_while_cleared_unacknowledged_is_unacknowledged_again():
    engine = instant()
    events = engine.update(stream(30, shortfall=step_up(0, 0.02, back=10)))
    events += engine.update(stream(10, start=30, shortfall=0.02))
    assert of(events, WARN) == [(0.0, ACTIVE), (10.0, CLEARED), (30.0, ACTIVE)]
    assert engine.alert(WARN).state == ACTIVE


def test_nothing_to_acknowledge_and_unknown_alerts_are_refused():
    engine = instant()
    with pytest.raises(AlertActionError, match="nothing to acknowledge"):
        engine.acknowledge(WARN, T0, "ana", "")
    with pytest.raises(AlertActionError, match="no alert"):
        engine.acknowledge("conversion_shortfall_warning:R-999", T0, "ana", "")


def test_shelving_suppresses_until_expiry_then_the_condition_decides():
    engine = instant()
    engine.update(stream(10, shortfall=0.02))
    until = T0 + 70 * MINUTE
    shelved = engine.shelve(WARN, until, T0 + 10 * MINUTE, "ben", "analyzer recalibration")
    assert (shelved.from_state, shelved.to_state) == (ACTIVE, AlertState.SHELVED.value)
    assert engine.alert(WARN).shelved_until == until and engine.active() == []
    # The condition clears and comes back while shelved: no transitions.
    quiet = engine.update(stream(50, start=10, shortfall=step_up(20, 0.02, back=40)))
    assert of(quiet, WARN) == []
    # Still active at the expiry: back to active unacknowledged, at the expiry time.
    expired = engine.update(stream(20, start=60, shortfall=0.02))
    assert [(minutes(e), e.from_state, e.to_state, e.who) for e in expired] == [
        (70.0, AlertState.SHELVED.value, ACTIVE, "stagewatch")
    ]
    assert "expired" in expired[0].why


def test_shelving_that_expires_with_the_condition_clear_returns_to_normal():
    engine = instant()
    engine.update(stream(10, shortfall=0.02))
    engine.shelve(WARN, T0 + 30 * MINUTE, T0 + 10 * MINUTE, "ben", "known")
    events = engine.update(stream(40, start=10, shortfall=0.0))
    assert of(events, WARN) == [(30.0, NORMAL)]


def test_shelving_is_time_limited_and_unshelving_restores_the_dictated_state():
    engine = instant()
    engine.update(stream(10, shortfall=0.02))
    with pytest.raises(AlertActionError, match="limited to 24 h"):
        engine.shelve(WARN, T0 + 2 * DAY, T0, "ben", "too long")
    with pytest.raises(AlertActionError, match="must end after it starts"):
        engine.shelve(WARN, T0, T0 + MINUTE, "ben", "backwards")
    engine.shelve(WARN, T0 + 5 * HOUR, T0 + 10 * MINUTE, "ben", "known")
    back = engine.unshelve(WARN, T0 + 20 * MINUTE, "ben", "fixed sooner")
    assert (back.from_state, back.to_state) == (AlertState.SHELVED.value, ACTIVE)


def test_out_of_service_suppresses_until_returned_to_service():
    engine = instant()
    out = engine.remove_from_service(WARN, T0, "cara", "analyzer replaced, model under review")
    assert (out.from_state, out.to_state) == (NORMAL, AlertState.OUT_OF_SERVICE.value)
    assert of(engine.update(stream(60, shortfall=0.02)), WARN) == []
    assert engine.alert(WARN).state == AlertState.OUT_OF_SERVICE.value
    assert engine.alert(WARN).condition_active  # tracked silently
    with pytest.raises(AlertActionError, match="already out of service"):
        engine.remove_from_service(WARN, T0 + HOUR, "cara", "again")
    with pytest.raises(AlertActionError, match="unshelve or return it to service"):
        engine.shelve(WARN, T0 + 2 * HOUR, T0 + HOUR, "cara", "")
    back = engine.return_to_service(WARN, T0 + HOUR, "cara", "model confirmed")
    assert (back.from_state, back.to_state) == (AlertState.OUT_OF_SERVICE.value, ACTIVE)


def test_events_are_in_order_and_carry_who_why_figure_threshold_and_message():
    engine = instant()
    engine.update(stream(10, shortfall=0.05))
    engine.acknowledge(HIGH, T0 + 10 * MINUTE, "ana", "checking")
    engine.update(stream(10, start=10, shortfall=0.0))
    events = engine.events
    assert [e.sequence for e in events] == list(range(1, len(events) + 1))
    assert all(b.time >= a.time for a, b in zip(events, events[1:], strict=False))
    for e in events:
        assert e.message.endswith(DISCLAIMER) and e.who and e.why
        assert e.subject == "R-202" and e.rule.startswith("conversion_shortfall")
    assert events[0].figure == pytest.approx(0.05)


# Messages


def test_a_shortfall_message_names_vessel_figure_threshold_cause_and_disclaimer():
    # Activity estimated 0.86 +/- 0.01 (design 1): the likely cause is the catalyst.
    events = AlertEngine(CONFIG).update(stream(30, shortfall=0.02, activity=0.86))
    text = of_messages(events, WARN)[0]
    assert text.startswith("R-202 conversion 0.410 is 0.020 below the design 0.430")
    assert "(warning band 0.010, 1-sigma 0.002)" in text
    assert "while flow and temperatures are within range: possible loss of catalyst" in text
    assert text.endswith(DISCLAIMER)
    assert DISCLAIMER.startswith("stagewatch is a monitoring aid, not a safety system")


def test_a_shortfall_message_points_at_inputs_outside_the_model():
    events = AlertEngine(CONFIG).update(stream(30, shortfall=0.02, temperature=273.15 + 72.0))
    text = of_messages(events, WARN)[0]
    assert "with R-201 at 72.0 degC, outside the kinetics' valid range" in text
    assert "the design expectation does not hold outside the model's validity" in text


def test_a_shortfall_message_doubts_the_estimate_when_an_analyzer_is_stale():
    # Every tag reads each minute, except AI-203G, silent after minute 4 (stale from
    # minute 35); the shortfall starts at minute 60.
    tags, times = [], []
    for tag in CONFIG.tags():
        t = np.arange(0, 5) if tag == "AI-203G" else np.arange(0, 120)
        tags += [tag] * len(t)
        times.append(T0 + t * MINUTE)
    t_all = np.concatenate(times)
    health = HealthInput(tuple(tags), t_all, np.arange(len(t_all), dtype=float))
    events = AlertEngine(CONFIG).update(stream(120, shortfall=step_up(60, 0.02)), health)
    assert [a for a, _ in of(events, "tag_stale:AI-203G")] == [35.0]
    text = of_messages(events, WARN)[0]
    assert "the estimate itself may be off (AI-203G stale)" in text


# Engine mechanics: revisions and persistence


def test_rows_at_or_before_the_last_evaluated_time_are_ignored():
    whole = AlertEngine(CONFIG).update(stream(240, shortfall=step_up(60, 0.02, back=150)))
    engine = AlertEngine(CONFIG)
    first = engine.update(stream(100, shortfall=step_up(60, 0.02)))
    # A revision from minute 50 on (after a late reading): rows up to 99 are skipped.
    revised = engine.update(stream(190, start=50, shortfall=step_up(60, 0.02, back=150)))
    assert [(e.alert_id, e.time, e.to_state) for e in first + revised] == [
        (e.alert_id, e.time, e.to_state) for e in whole
    ]
    assert engine.update(stream(10, start=0)) == []


def test_state_dict_round_trip_continues_exactly():
    def health(start: float, stop: float) -> HealthInput:
        return readings("AI-203G", np.arange(start, stop, 4))

    def shortfall(t: np.ndarray) -> np.ndarray:
        return np.where((t >= 30) & (t < 200), 0.05, 0.0)

    rng = np.random.default_rng(3)
    walk = 1.0 - np.cumsum(np.abs(rng.normal(0, 0.001, 400)))
    a = stream(200, shortfall=shortfall, activity=walk[:200], activity_std=0.002)
    b = stream(200, start=200, shortfall=shortfall, activity=walk[200:], activity_std=0.002)
    straight = AlertEngine(CONFIG)
    straight.update(a, health(0, 200))
    straight.acknowledge(WARN, T0 + 200 * MINUTE, "ana", "seen")
    straight.shelve(HIGH, T0 + 260 * MINUTE, T0 + 200 * MINUTE, "ana", "known")
    saved = json.loads(json.dumps(straight.state_dict(), allow_nan=False))
    resumed = AlertEngine.from_state_dict(CONFIG, saved)
    expected = straight.update(b, health(260, 400))
    got = resumed.update(b, health(260, 400))
    assert got == expected and len(expected) > 2
    assert resumed.alerts() == straight.alerts()
    assert resumed.events == straight.events


def test_state_dict_of_another_train_is_refused():
    other = CONFIG.model_copy(update={"name": "another-line"})
    with pytest.raises(ValueError, match="another-line"):
        AlertEngine.from_state_dict(other, AlertEngine(CONFIG).state_dict())
    with pytest.raises(ValueError, match="not an alert engine state"):
        AlertEngine.from_state_dict(CONFIG, {"format": 2, "train": CONFIG.name})


# Configuration


def test_alerts_table_reads_units_and_rejects_inconsistent_bands():
    document = {
        "train": {"name": "t", "species": ["A", "B"]},
        "vessels": [{"name": "R-1", "volume": "2 m^3", "temperature": "350 K"}],
        "feed": {"flow": {"tag": "F", "unit": "m^3/h", "nominal": "3 m^3/h"}},
        "reaction": {
            "kind": "irreversible",
            "reactant": "A",
            "product": "B",
            "k_ref": "1 1/h",
            "T_ref": "350 K",
            "activation_energy": "50 kJ/mol",
        },
        "alerts": {
            "activity_falling": {"rate_limit": "0.1 1/d", "window": "3 h"},
            "tag_spikes": {"share": "30 %"},
            "temperature_range": {"deadband": "1 degC"},
        },
    }
    config = parse_train_config(document)
    assert config.alerts.activity_falling.rate_limit == pytest.approx(0.1 / DAY)
    assert config.alerts.activity_falling.window == 3 * HOUR
    assert config.alerts.tag_spikes.share == pytest.approx(0.3)
    assert config.alerts.temperature_range.deadband == pytest.approx(1.0)
    document["alerts"] = {"conversion_shortfall": {"warning_band": 0.03, "high_band": 0.02}}
    with pytest.raises(ConfigError, match="alerts.conversion_shortfall.high_band: must exceed"):
        parse_train_config(document)
    document["alerts"] = {"conversion_shortfal": {}}
    with pytest.raises(ConfigError, match="alerts.conversion_shortfal: unknown key"):
        parse_train_config(document)


def test_the_demo_train_states_the_defaults():
    assert _LOADED.alerts == type(_LOADED.alerts)()


# The demo train, through the session (estimator.simulate)

PERIODS = {"FI-200": 60.0, "TI-201": 60.0, "TI-202": 60.0, "AI-200G": 120.0, "AI-203G": 240.0}
LAB = {"LAB-202F": LabSchedule(period=12 * HOUR, first=8 * HOUR, delay=(3 * HOUR, 5 * HOUR))}


def feed_hourly(session: TrainSession, scenario: Scenario) -> tuple[list[AlertEvent], Any]:
    """Simulate a scenario and feed its readings to the session in 1-h batches by
    arrival, as a replay would; then judge what is held. (events, simulation)."""
    sim = simulate(session.model, scenario)
    tags, times, values = sim.columns()
    tag_array = np.array(tags, dtype=object)
    events: list[AlertEvent] = []
    for start in np.arange(0.0, scenario.duration + 1.0, HOUR):
        part = (sim.received >= start) & (sim.received < start + HOUR)
        out = session.ingest(tag_array[part].tolist(), times[part], values[part], si=True)
        events += out.alerts
    events += session.flush_alerts()
    return events, sim


def test_demo_train_sudden_activity_loss_is_flagged_within_two_residence_times():
    # 15 % of the activity lost at once after a day of normal operation; an activity or
    # conversion alert within two total residence times at nominal flow,
    # 2 * (14 + 9 + 6) m^3 / 12 m^3/h = 4.83 h. Seed 1 is the first seed, not a chosen
    # one: over seeds 1..20 of this scenario the first such alert came after a median
    # 2.16 h, within 2.42 h (one residence time) in 13 and within 4.83 h in 19; in the
    # other the activity estimate fell too slowly for the rate rule and the R-201
    # shortfall warning came at 7.85 h.
    loss = DAY
    scenario = Scenario(
        duration=DAY + 12 * HOUR,
        activity=Profile(((0.0, 1.0), (loss, 1.0), (loss, 0.85))),
        analyzer_period=PERIODS,
        lab=LAB,
        seed=1,
    )
    events, _ = feed_hourly(TrainSession(CONFIG), scenario)
    raised = [e for e in events if e.to_state == ACTIVE]
    watched = ("conversion_shortfall", "activity")
    first = next(e for e in raised if e.rule.startswith(watched))
    delay = first.time - loss
    total_residence = sum(v.volume for v in CONFIG.vessels) / CONFIG.feed.flow.nominal
    assert total_residence == pytest.approx(29 / 12 * HOUR)
    assert first.rule == "activity_falling"
    assert 0.0 < delay <= 2 * total_residence
    assert not any(e.rule.startswith(watched) and e.time < loss for e in raised)
    # The conversion shortfall follows once the vessels have settled lower, and names
    # the catalyst as the likely cause.
    shortfall = next(e for e in raised if e.rule == "conversion_shortfall_warning")
    assert "possible loss of catalyst activity" in shortfall.message


def test_demo_train_normal_operation_raises_no_conversion_or_activity_alert():
    scenario = Scenario(duration=4 * DAY, analyzer_period=PERIODS, lab=LAB, seed=1)
    events, _ = feed_hourly(TrainSession(CONFIG), scenario)
    raised = [e for e in events if e.to_state == ACTIVE]
    assert not [e for e in raised if e.rule.startswith(("conversion_shortfall", "activity"))]


# Condition timing against a row-by-row reference


def reference_condition(times, on, off, on_delay, off_delay):
    """On-delay / off-delay evaluated one row at a time, the plain way."""
    active, since, changes = False, None, []
    for i, t in enumerate(times):
        if off[i] if active else on[i]:
            since = t if since is None else since
            if t - since >= (off_delay if active else on_delay):
                active, since = not active, None
                changes.append((i, active))
        else:
            since = None
    return changes


def test_condition_timing_equals_the_row_by_row_reference_in_any_batches():
    rng = np.random.default_rng(11)
    for _ in range(200):
        k = int(rng.integers(1, 300))
        times = np.cumsum(rng.uniform(1.0, 90.0, k))
        level = np.repeat(rng.normal(0.0, 1.0, k // 5 + 1), 5)[:k] + rng.normal(0.0, 0.3, k)
        on, off = level > 0.5, level <= 0.5 - rng.uniform(0.0, 0.5)
        on_delay, off_delay = rng.choice([0.0, 60.0, 300.0], 2)
        expected = reference_condition(times, on, off, on_delay, off_delay)
        condition = Condition(on_delay, off_delay)
        cuts = np.sort(rng.choice(np.arange(1, k + 1), size=min(k, 4), replace=False))
        got, start = [], 0
        for end in np.append(cuts, k):
            part = condition.run(times[start:end], on[start:end], off[start:end])
            got += [(start + i, a) for i, a in part]
            start = end
        assert got == expected


def test_health_input_from_a_session_leaves_out_refused_readings():
    session = TrainSession(CONFIG)
    # TI-201's range is 0..95 degC: 120 degC is refused; the other reading is taken.
    tags, times, values = ["TI-201", "TI-201"], [T0, T0 + 60.0], [58.0, 120.0]
    out = session.ingest(tags, times, values)
    assert [r.tag for r in out.refused] == ["TI-201"]
    health = HealthInput.from_session(session, tags, times, values, out)
    assert health.reading_tags == ("TI-201",)
    assert health.reading_values == pytest.approx([273.15 + 58.0])


def test_rule_windows_stay_bounded_at_one_reading_per_tag_per_second():
    # Every tag once a second (analyzers included, the heaviest feed the service is
    # sized for): the rules' windows hold thinned series and folded sums, so what
    # they keep stops growing once the longest window (2 h) is full.
    session = TrainSession(CONFIG)
    assert session.alert_engine is not None
    level = {"FI-200": 12.0, "TI-201": 58.0, "TI-202": 58.0, "AI-200G": 2400.0,
             "AI-203G": 1300.0, "LAB-202F": 900.0}  # fmt: skip
    rng = np.random.default_rng(4)
    held = {}
    t0 = 1.8e9
    for minute in range(4 * 60):
        seconds = t0 + 60.0 * minute + np.arange(60.0)
        tags = list(level) * 60
        noise = rng.normal(0.0, 0.002, len(tags))
        values = [level[t] * (1 + e) for t, e in zip(tags, noise, strict=True)]
        session.ingest(tags, np.repeat(seconds, 6), values)
        if minute + 1 in (150, 240):
            held[minute + 1] = session.alert_engine.window_bytes()
    assert held[240] <= 1.1 * held[150]
    # About 3 kB per minute of raw readings and NIS rows in the fold age (9 min),
    # plus 720 activity rows and the bins: far below the 2 h of raw rows (~1.3 MB).
    assert held[240] < 250_000


def test_throughput_and_feed_steps_raise_no_shortfall_with_the_dynamic_expectation():
    # Normal activity; the throughput up 25 % from 6 h to 12 h, the feed glucose down
    # from 2,400 to 2,150 mol/m^3 at 16 h. The steady-state expectation jumps to the
    # new steady state at each change and runs ahead of the vessels for hours: it
    # raises shortfall warnings and high alerts on every vessel. The design model run
    # through the same inputs moves as the vessels do: nothing.
    q = CONFIG.feed.flow.nominal  # 12 m^3/h [m^3/s]
    scenario = Scenario(
        duration=DAY,
        flow=Profile(((0.0, q), (6 * HOUR, q), (6 * HOUR, 1.25 * q), (12 * HOUR, 1.25 * q),
                      (12 * HOUR, q))),
        feed={"glucose": Profile(((0.0, 2400.0), (16 * HOUR, 2400.0), (16 * HOUR, 2150.0)))},
        analyzer_period=PERIODS,
        seed=3,
    )  # fmt: skip

    def shortfall_alerts(config: TrainConfig) -> list[AlertEvent]:
        events, _ = feed_hourly(TrainSession(config), scenario)
        return [e for e in events if e.rule.startswith("conversion_shortfall")]

    assert _LOADED.alerts.conversion_shortfall.expectation == "dynamic"
    assert shortfall_alerts(_LOADED) == []
    steady = shortfall_alerts(CONFIG)
    raised = {e.alert_id for e in steady if e.to_state == ACTIVE}
    assert {f"conversion_shortfall_warning:{v}" for v in VESSELS} <= raised


def test_rules_run_once_per_interval_and_a_checkpoint_keeps_what_they_have_not_judged():
    # Readings every 3 s one at a time: the rules run once per 10 s of plant time
    # (evaluate_every), and a checkpoint taken between runs carries the held
    # estimates, so a restored session raises exactly the straight run's events.
    scenario = Scenario(
        duration=2 * HOUR,
        step=3.0,
        activity=Profile(((0.0, 1.0), (HOUR, 1.0), (HOUR, 0.6))),
        analyzer_period={"FI-200": 3.0, "TI-201": 3.0, "TI-202": 3.0, "AI-200G": 120.0,
                         "AI-203G": 240.0},
        seed=5,
    )  # fmt: skip
    straight = TrainSession(_LOADED)
    sim = simulate(straight.model, scenario)
    tags, times, values = sim.columns()
    order = np.argsort(sim.received, kind="stable")
    runs = 0
    engine = straight.alert_engine
    assert engine is not None
    original = engine.update

    def counted(*args: Any, **kwargs: Any) -> list[AlertEvent]:
        nonlocal runs
        runs += 1
        return original(*args, **kwargs)

    engine.update = counted  # type: ignore[method-assign]
    expected: list[AlertEvent] = []
    for i in order.tolist():
        expected += straight.ingest([tags[i]], times[i : i + 1], values[i : i + 1], si=True).alerts
    expected += straight.flush_alerts()
    assert [e.rule for e in expected if e.to_state == ACTIVE]  # the loss is alerted
    assert runs <= scenario.duration / 10.0 + 2  # not once per reading (~7,300)

    first = TrainSession(_LOADED)
    got: list[AlertEvent] = []
    half = len(order) // 2 + 1  # a reading mid-interval
    for i in order[:half].tolist():
        got += first.ingest([tags[i]], times[i : i + 1], values[i : i + 1], si=True).alerts
    assert first._held_rows is not None and len(first._held_rows)
    resumed = TrainSession.restore(_LOADED, first.checkpoint())
    for i in order[half:].tolist():
        got += resumed.ingest([tags[i]], times[i : i + 1], values[i : i + 1], si=True).alerts
    got += resumed.flush_alerts()
    assert [e.to_dict() for e in got] == [e.to_dict() for e in expected]


def test_slow_deactivation_is_alerted_before_the_shortfall_reaches_five_points():
    # Activity down 30 % over 8 days: the first activity or shortfall alert must come
    # while the true shortfall (the design model at the true inputs minus the true
    # conversion, worst vessel) is still under 0.05. bench/alert_figures.py measures
    # the 30-day version: first alert at 1.1-1.3 points on eight seeds.
    from estimator.conversion import design_conversion

    scenario = Scenario(
        duration=5 * DAY,
        activity=Profile(((0.0, 1.0), (DAY, 1.0), (9 * DAY, 0.7))),
        analyzer_period=PERIODS,
        lab=LAB,
        seed=2,
    )
    session = TrainSession(_LOADED)
    events, sim = feed_hourly(session, scenario)
    watched = ("activity", "conversion_shortfall")
    first = next(e for e in events if e.to_state == ACTIVE and e.rule.startswith(watched))
    k = min(int(np.searchsorted(sim.times, first.time)), len(sim.times) - 1)
    lay = session.model.layout
    feed = sim.inputs[k, 1 + lay.n_vessels]
    true_x = 1.0 - sim.truth[k].reshape(lay.n_vessels, lay.n_species)[:, 0] / feed
    gap = float(np.max(design_conversion(session.model, sim.inputs[k : k + 1])[0] - true_x))
    assert first.time > sim.times[0] + DAY  # nothing before the decline starts
    assert 0.0 < gap < 0.05


def test_remembered_nis_bounds_equal_scipys_chi_square_quantiles():
    # The mismatch rule's two-sided bounds of NIS per degree of freedom are
    # chi2.ppf(tail, D) / D and chi2.ppf(1 - tail, D) / D (Bar-Shalom, Li &
    # Kirubarajan 2001, sec. 5.4); remembered per D, they must stay scipy's numbers.
    from scipy.stats import chi2

    engine = AlertEngine(CONFIG)
    dof = np.array([1.0, 20.0, 20.0, 37.0, 300.0, 1.0])
    for _ in range(2):  # computed, then remembered
        low, high = engine._nis_bounds(0.0005, dof)
        np.testing.assert_array_equal(low, chi2.ppf(0.0005, dof) / dof)
        np.testing.assert_array_equal(high, chi2.ppf(0.9995, dof) / dof)
    assert high[1] == pytest.approx(chi2.ppf(0.9995, 20) / 20) and low[0] < 1e-5
