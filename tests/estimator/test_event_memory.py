"""A short in-memory event log read back from a journal gives the full log's numbers.

The service keeps only the last minutes of each train's event log in memory and
reads older readings back from its journal when a late one (a lab result hours
after its sample) needs them. Whatever the window, the filter must run exactly the
same operations as with the whole history horizon in memory: the check is
equality of every estimate, not closeness.
"""

from __future__ import annotations

from collections.abc import Sequence

import numpy as np

from estimator.config import TrainConfig, load_train_config
from estimator.session import SessionOutput, TrainSession
from estimator.simulate import Profile, Scenario, simulate

DEMO = "replay_data/wrenfield/train.toml"
HOUR = 3600.0
MEMORY = 600.0  # [s]


class ListJournal:
    """What the service's journal holds: every reading taken so far, in tag units."""

    def __init__(self) -> None:
        self.tags: list[str] = []
        self.times: list[float] = []
        self.values: list[float] = []
        self.reads = 0

    def add(self, tags: Sequence[str], times: np.ndarray, values: np.ndarray) -> None:
        self.tags += list(tags)
        self.times += times.tolist()
        self.values += values.tolist()

    def __call__(self, start: float, stop: float) -> tuple[list[str], np.ndarray, np.ndarray]:
        self.reads += 1
        t = np.array(self.times)
        sel = np.flatnonzero((t >= start) & (t <= stop))
        return [self.tags[i] for i in sel], t[sel], np.array(self.values)[sel]


def plant_batches(hours: float = 7.0) -> list[tuple[list[str], np.ndarray, np.ndarray]]:
    """Readings in tag units, batched as a historian sends them, lab results hours late.

    Transmitters every 10 s and analyzers every 2 and 4 min in 10-minute batches; the
    middle vessel's lab result (every 45 min) arrives 2 h after its sample, one of
    them 5 h after (inside the 6 h horizon).
    """
    config = load_train_config(DEMO)
    model = TrainSession(config).model
    scenario = Scenario(
        duration=hours * HOUR,
        step=10.0,
        feed={"glucose": Profile(((0.0, 2400.0), (3 * HOUR, 2400.0), (3 * HOUR, 2250.0)))},
        analyzer_period={"AI-203G": 240.0, "AI-200G": 120.0, "LAB-202F": 0.75 * HOUR},
    )
    tags, times, si = simulate(model, scenario, seed=17).columns()
    session = TrainSession(config)
    unit_of = dict(zip(session.tags, session.units, strict=True))
    values = si.copy()
    for i, tag in enumerate(tags):  # the tags' declared units (the journal's)
        if unit_of[tag] == "m^3/h":
            values[i] = si[i] * 3600.0
        elif unit_of[tag] == "degC":
            values[i] = si[i] - 273.15
    tags = np.asarray(tags, dtype=object)
    lab = tags == "LAB-202F"
    lab_times = times[lab]
    arrive = lab_times + 2 * HOUR
    arrive[len(arrive) // 2] = lab_times[len(arrive) // 2] + 5 * HOUR
    batches = []
    t0 = float(times.min())
    for end in np.arange(t0 + 600.0, t0 + hours * HOUR + 6 * HOUR, 600.0):
        now = (~lab) & (times >= end - 600.0) & (times < end)
        late = np.flatnonzero(lab)[(arrive >= end - 600.0) & (arrive < end)]
        pick = np.concatenate([np.flatnonzero(now), late])
        if pick.size:
            batches.append((tags[pick].tolist(), times[pick], values[pick]))
    return batches


def run(session: TrainSession, batches, journal: ListJournal | None) -> list[SessionOutput]:
    outs = []
    for tags, times, values in batches:
        outs.append(session.ingest(tags, times, values))
        if journal is not None:
            journal.add(tags, times, values)
    return outs


def run_restarted(config: TrainConfig, batches) -> list[SessionOutput]:
    """Run the batches through a short-memory session restored from a checkpoint half way."""
    journal = ListJournal()
    half = len(batches) // 2
    first = TrainSession(config, memory=MEMORY, journal=journal)
    outs = run(first, batches[:half], journal)
    resumed = TrainSession.restore(config, first.checkpoint(), memory=MEMORY, journal=journal)
    return outs + run(resumed, batches[half:], journal)


def assert_same(a: list[SessionOutput], b: list[SessionOutput]) -> None:
    """Same estimates, call by call.

    After reading back from the journal, the filter may rerun from a snapshot
    earlier than the one the whole log would allow (the one strictly before the
    late sample, so readings at that very time keep their canonical order): it
    then re-emits a few more (identical) rows before the ones compared here.
    """
    assert len(a) == len(b)
    for x, y in zip(a, b, strict=True):
        n = len(x.estimates)
        assert len(y.estimates) >= n
        tail = y.estimates.take(slice(len(y.estimates) - n, None))
        np.testing.assert_array_equal(x.estimates.time, tail.time)
        np.testing.assert_array_equal(x.estimates.concentration, tail.concentration)
        np.testing.assert_array_equal(x.estimates.activity_std, tail.activity_std)
        # Gated readings: the same ones after the first compared row; at or before it,
        # the longer rerun may report a few more again.
        start = x.estimates.time[0] if n else np.inf
        seen_x = [(g.tag, g.sample_time, g.nis) for g in x.gated]
        seen_y = [(g.tag, g.sample_time, g.nis) for g in y.gated]
        assert set(seen_x) <= set(seen_y)
        assert [g for g in seen_x if g[1] > start] == [g for g in seen_y if g[1] > start]


def test_short_memory_with_a_journal_gives_the_full_logs_estimates():
    batches = plant_batches()
    config = load_train_config(DEMO)
    full = TrainSession(config)
    expected = run(full, batches, None)
    journal = ListJournal()
    short = TrainSession(config, memory=MEMORY, journal=journal)
    got = run(short, batches, journal)
    assert_same(expected, got)
    # The late lab results did rewind before the window, and the journal was read.
    assert journal.reads >= 5
    assert any(o.revised_from is not None and o.revised_from < o.estimates.time[-1] - HOUR
               for o in got)  # fmt: skip
    # And memory holds a fraction of the log: 600 s (up to 4/3 of it) of 6 h.
    held = len(short.filter.events()["time"])
    assert held < len(full.filter.events()["time"]) / 10


def test_a_restored_short_memory_session_continues_identically():
    batches = plant_batches(hours=5.0)
    config = load_train_config(DEMO)
    journal = ListJournal()
    straight = TrainSession(config, memory=MEMORY, journal=journal)
    expected = run(straight, batches, journal)
    assert_same(expected, run_restarted(config, batches))


def test_without_a_journal_the_whole_horizon_stays_in_memory():
    config = load_train_config(DEMO)
    session = TrainSession(config, memory=MEMORY)  # no journal: memory is ignored
    assert session.filter.memory == config.estimator.horizon
    floor = TrainSession(config, memory=1.0, journal=ListJournal())
    # The window never drops below the largest dead time (4 min) + two snapshots.
    assert floor.filter.memory == 240.0 + 2 * 60.0
