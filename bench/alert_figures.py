"""Alert figures on simulated operation of the demo train: false alarms and warning time.

Not a speed benchmark: it measures what the alert rules say over long simulated
runs of the demo train (replay_data/wrenfield/train.toml, its alert defaults), the
figures issue-level targets are stated in:

1. Normal operation, 60 days, several seeds: transmitters every minute, the feed
   analyzer every 2 min, the product analyzer every 4 min (4 min dead time), a lab
   result twice a day 3-5 h late, noise as the train file states it, slow enzyme
   ageing off (activity at design). Every activation (to "active unacknowledged")
   per rule, the rate per 30 days, and chattering (three or more activations of
   one alert within a minute). Target: at most one alert per 30 days per train,
   no chattering.
2. Slow deactivation: the activity falls linearly by 30 % over 30 days from day 2.
   The first activity or conversion-shortfall alert, and the true shortfall at
   that moment (the design model's conversion at the true inputs minus the true
   conversion, in the vessel where it is largest). Target: alerted before the
   shortfall exceeds 5 percentage points.

The session is fed in 1-hour batches by arrival time, as a replay would.

Run ``python bench/alert_figures.py`` (about a minute a 60-day seed on this
machine's kind); ``--seeds`` and ``--days`` shorten it.
"""

from __future__ import annotations

import argparse
import math
import sys
import time
from collections import Counter
from pathlib import Path

import numpy as np

REPO = Path(__file__).resolve().parent.parent
sys.path.insert(0, str(REPO))

from estimator.alerts import AlertEvent  # noqa: E402
from estimator.config import load_train_config  # noqa: E402
from estimator.conversion import design_conversion  # noqa: E402
from estimator.session import TrainSession  # noqa: E402
from estimator.simulate import LabSchedule, Profile, Scenario, Simulation, simulate  # noqa: E402

TRAIN = REPO / "replay_data" / "wrenfield" / "train.toml"
HOUR = 3600.0
DAY = 86400.0
PERIODS = {"FI-200": 60.0, "TI-201": 60.0, "TI-202": 60.0, "AI-200G": 120.0, "AI-203G": 240.0}
LAB = {"LAB-202F": LabSchedule(period=12 * HOUR, first=8 * HOUR, delay=(3 * HOUR, 5 * HOUR))}
ACTIVE = "active_unacknowledged"


def run(scenario: Scenario) -> tuple[list[AlertEvent], Simulation, float]:
    """Simulate, feed a session in 1-h batches by arrival; (events, simulation, start)."""
    config = load_train_config(TRAIN)
    session = TrainSession(config)
    sim = simulate(session.model, scenario)
    tags, times, values = sim.columns()
    tag_array = np.array(tags, dtype=object)
    order = np.argsort(sim.received, kind="stable")
    received = sim.received[order]
    start = float(sim.times[0])
    events: list[AlertEvent] = []
    edges = np.searchsorted(received, start + np.arange(0.0, scenario.duration + HOUR, HOUR))
    for lo, hi in zip(edges[:-1], np.append(edges[1:-1], len(order)), strict=True):
        pick = order[lo:hi]
        if len(pick):
            out = session.ingest(tag_array[pick].tolist(), times[pick], values[pick], si=True)
            events += out.alerts
    events += session.flush_alerts()
    return events, sim, start


def chattering(events: list[AlertEvent]) -> int:
    """Alerts activated three or more times within one minute (count of such bursts)."""
    bursts = 0
    by_alert: dict[str, list[float]] = {}
    for e in events:
        if e.to_state == ACTIVE:
            by_alert.setdefault(e.alert_id, []).append(e.time)
    for times in by_alert.values():
        t = np.array(times)
        if len(t) >= 3 and np.any(t[2:] - t[:-2] <= 60.0):
            bursts += 1
    return bursts


def normal_operation(days: float, seeds: list[int]) -> None:
    """Part 1: activations per rule and per 30 days over normal operation."""
    print(f"\n== 1. normal operation, {days:g} days, seeds {seeds}")
    total = 0
    worst = 0.0
    for seed in seeds:
        began = time.perf_counter()
        scenario = Scenario(duration=days * DAY, analyzer_period=PERIODS, lab=LAB, seed=seed)
        events, _, start = run(scenario)
        raised = [e for e in events if e.to_state == ACTIVE]
        per30 = len(raised) / days * 30.0
        worst = max(worst, per30)
        total += len(raised)
        rules = Counter(e.rule for e in raised)
        when = ", ".join(f"{e.rule} at day {(e.time - start) / DAY:.1f}" for e in raised)
        print(
            f"seed {seed}: {len(raised)} activations = {per30:.2f} per 30 days "
            f"({dict(rules) or 'none'}); chattering bursts {chattering(events)}; "
            f"{time.perf_counter() - began:.0f} s" + (f"\n  {when}" if when else "")
        )
    mean = total / (days * len(seeds)) * 30.0
    verdict = "met" if worst <= 1.0 else "NOT met"
    print(
        f"all seeds: {mean:.2f} per 30 days on average, worst seed {worst:.2f} "
        f"(target <= 1 per 30 days per train: {verdict})"
    )


def slow_deactivation(seeds: list[int]) -> None:
    """Part 2: the true shortfall when the first activity or shortfall alert comes."""
    print("\n== 2. slow deactivation: activity -30 % over 30 days from day 2")
    config = load_train_config(TRAIN)
    model = TrainSession(config).model
    lay = model.layout
    ia = config.species_index(config.reaction.reactant)
    for seed in seeds:
        scenario = Scenario(
            duration=32 * DAY,
            activity=Profile(((0.0, 1.0), (2 * DAY, 1.0), (32 * DAY, 0.7))),
            analyzer_period=PERIODS,
            lab=LAB,
            seed=seed,
        )
        events, sim, start = run(scenario)
        watched = ("activity", "conversion_shortfall")
        first = next(
            (e for e in events if e.to_state == ACTIVE and e.rule.startswith(watched)), None
        )
        if first is None:
            print(f"seed {seed}: no activity or shortfall alert in 32 days")
            continue
        k = int(np.searchsorted(sim.times, first.time))
        k = min(k, len(sim.times) - 1)
        feed = sim.inputs[k, 1 + lay.n_vessels + ia]
        true_x = 1.0 - sim.truth[k].reshape(lay.n_vessels, lay.n_species)[:, ia] / feed
        expected = design_conversion(model, sim.inputs[k : k + 1])[0]
        gap = float(np.max(expected - true_x))
        loss = 1.0 - float(sim.true_activity[k])
        verdict = "met" if gap < 0.05 else "NOT met"
        print(
            f"seed {seed}: first alert {first.rule} ({first.subject}) at day "
            f"{(first.time - start) / DAY:.2f}, activity down {loss:.1%}; true shortfall "
            f"then {gap * 100:.2f} points (target < 5 points: {verdict})"
        )


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--days", type=float, default=60.0, help="normal-operation days")
    parser.add_argument("--seeds", type=int, default=3, help="seeds 1..N")
    args = parser.parse_args()
    seeds = list(range(1, args.seeds + 1))
    began = time.perf_counter()
    normal_operation(args.days, seeds)
    slow_deactivation(seeds)
    print(f"\n({time.perf_counter() - began:.0f} s in all; {math.ceil(args.days)}-day runs)")


if __name__ == "__main__":
    main()
