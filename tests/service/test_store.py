"""The store, on SQLite and on PostgreSQL: trains, journal, estimates, gated, checkpoints.

Every test taking ``store`` runs on both backends (see ``database_url`` in
conftest.py). The last tests put the store in the states the service must survive:
locked, full, unreachable.
"""

from __future__ import annotations

import itertools
import math
import socket
import sqlite3
from collections.abc import Iterator
from contextlib import contextmanager
from pathlib import Path

import numpy as np
import psycopg
import pytest
from sqlalchemy import event, text
from sqlalchemy.engine import make_url

from estimator.config import load_train_config
from estimator.session import TrainSession
from estimator.simulate import Scenario, simulate
from service.store import (
    CHECKPOINTS_KEPT,
    GatedRow,
    ReadingBatch,
    Store,
    StoreUnavailable,
    TrainExists,
    TrainNotFound,
)

DEMO = Path(__file__).resolve().parents[2] / "replay_data" / "wrenfield" / "train.toml"
T0 = 1_767_225_600.0  # 2026-01-01T00:00:00Z, a multiple of every interval used below
HOUR = 3600.0


@pytest.fixture
def store(database_url: str) -> Iterator[Store]:
    clock = itertools.count(T0)  # one second per call: creation order shows in the times
    with Store(database_url, clock=lambda: float(next(clock))) as opened:
        opened.create_all()
        yield opened


def new_train(store: Store, name: str = "line-2") -> int:
    return store.create_train(name, f"Train {name}", '{"v": 1}', "# v1").id


def journal(
    store: Store, train_id: int, after: int = 0, **kw: int
) -> list[tuple[int, str, float, float]]:
    rows = []
    for batch in store.readings_after(train_id, after, **kw):
        ids, tags, times, values = batch
        rows += list(zip(ids.tolist(), tags, times.tolist(), values.tolist(), strict=True))
    return rows


def count(store: Store, table: str) -> int:
    with store.engine.connect() as conn:
        return int(conn.execute(text(f"SELECT count(*) FROM {table}")).scalar_one())


# ---------------------------------------------------------------------------- trains


def test_a_config_change_adds_a_version_and_keeps_the_old_one(store: Store):
    created = store.create_train("line-2", "Line 2", '{"v": 1}', "[train]\nname = 'line-2'")
    assert (created.name, created.title, created.version) == ("line-2", "Line 2", 1)
    assert created.retired_at is None and created.created_at.utcoffset() is not None

    assert store.add_train_version("line-2", '{"v": 2}', "# v2") == 2
    current = store.get_train("line-2")
    assert current is not None
    assert (current.id, current.version, current.config_json) == (created.id, 2, '{"v": 2}')
    assert current.source_text == "# v2"
    assert current.created_at == created.created_at

    versions = store.train_versions("line-2")
    assert [(v.version, v.config_json, v.source_text) for v in versions] == [
        (1, '{"v": 1}', "[train]\nname = 'line-2'"),
        (2, '{"v": 2}', "# v2"),
    ]
    assert versions[0].created_at < versions[1].created_at

    with pytest.raises(TrainExists, match="line-2"):
        store.create_train("line-2", "Again", "{}", "")
    assert store.get_train("line-9") is None
    with pytest.raises(TrainNotFound):
        store.add_train_version("line-9", "{}", "")
    with pytest.raises(TrainNotFound):
        store.train_versions("line-9")


def test_a_retired_train_leaves_the_list_but_keeps_its_name_and_history(store: Store):
    for name in ("line-2", "line-1", "line-3"):
        new_train(store, name)
    store.retire_train("line-2")
    assert [t.name for t in store.list_trains()] == ["line-1", "line-3"]
    every = store.list_trains(include_retired=True)
    assert [t.name for t in every] == ["line-1", "line-2", "line-3"]
    retired = every[1]
    assert retired.retired_at is not None

    store.retire_train("line-2")  # again: the first time stays
    again = store.get_train("line-2")
    assert again is not None and again.retired_at == retired.retired_at
    assert len(store.train_versions("line-2")) == 1
    with pytest.raises(TrainNotFound, match="active"):
        store.add_train_version("line-2", "{}", "")
    with pytest.raises(TrainExists):
        store.create_train("line-2", "Reborn", "{}", "")
    with pytest.raises(TrainNotFound):
        store.retire_train("line-9")


# ---------------------------------------------------------------------------- journal


def test_the_same_reading_is_stored_once_and_a_different_value_is_a_conflict(store: Store):
    train = new_train(store)
    first = store.append_readings(
        train,
        [("FI-200", T0, 20.0, 192), ("TI-201", T0, 80.0, None), ("FI-200", T0, 20.0, 192)],
        received_at=T0 + 1,
    )
    assert first.new_positions == (0, 1)
    assert len(first.new_ids) == 2 and first.new_ids[0] < first.new_ids[1]
    assert first.duplicates == (2,)  # a repeat within the batch is a duplicate too
    assert first.conflicts == ()

    # The bridge posts the batch again after a timeout: nothing new.
    again = store.append_readings(
        train, [("FI-200", T0, 20.0, 192), ("TI-201", T0, 80.0, None)], received_at=T0 + 2
    )
    assert (again.new_positions, again.duplicates, again.conflicts) == ((), (0, 1), ())

    changed = store.append_readings(
        train, [("TI-201", T0, 81.5, None), ("TI-201", T0 + 10, 80.2, None)], received_at=T0 + 3
    )
    assert changed.new_positions == (1,)
    assert changed.conflicts == (0,)
    assert changed.conflicting_values == (80.0,)
    assert [(tag, t, v) for _, tag, t, v in journal(store, train)] == [
        ("FI-200", T0, 20.0),
        ("TI-201", T0, 80.0),
        ("TI-201", T0 + 10, 80.2),
    ]


def test_the_journal_replays_in_acceptance_order_after_any_id(store: Store):
    a, b = new_train(store, "line-a"), new_train(store, "line-b")
    posted = []
    # Out of time order, as a late lab result and a historian backfill arrive.
    for k, times in enumerate([(50.0, 60.0), (10.0,), (70.0, 20.0, 80.0)]):
        rows = [("AI-203G", T0 + t, float(t), None) for t in times]
        result = store.append_readings(a, rows, received_at=T0 + k)
        store.append_readings(b, [("X", T0 + k, 1.0, None)], received_at=T0 + k)
        posted += [(i, T0 + t) for i, t in zip(result.new_ids, times, strict=True)]

    replay = journal(store, a)
    assert [(i, t) for i, _, t, _ in replay] == posted
    ids = [i for i, *_ in replay]
    assert ids == sorted(ids)
    assert {tag for _, tag, _, _ in replay} == {"AI-203G"}

    after = ids[2]  # a checkpoint that included the first three readings
    assert [i for i, *_ in journal(store, a, after)] == ids[3:]
    assert journal(store, a, ids[-1]) == []

    batches = list(store.readings_after(a, 0, batch_size=2))
    assert [len(batch.ids) for batch in batches] == [2, 2, 2]
    assert isinstance(batches[0], ReadingBatch) and batches[0].times.dtype == np.float64


def test_append_refuses_non_finite_readings_and_unknown_trains(store: Store):
    train = new_train(store)
    with pytest.raises(ValueError, match="finite"):
        store.append_readings(train, [("A", T0, 1.0, None), ("A", T0 + 1, math.nan, None)], T0)
    with pytest.raises(ValueError, match="quality"):
        store.append_readings(train, [("A", T0, 1.0, 70000)], T0)
    assert journal(store, train) == []
    with pytest.raises(TrainNotFound):
        store.append_readings(train + 100, [("A", T0, 1.0, None)], T0)
    assert store.append_readings(train, [], T0).new_ids == ()


def test_a_large_batch_as_columns_is_journaled_in_order_across_statements(store: Store):
    # 450 readings: more than one SQLite statement's worth, with repeats and conflicts
    # whose first occurrence lies in another statement's piece of the batch.
    train = new_train(store)
    tags = [f"T-{k % 7}" for k in range(450)]
    times = np.array([T0 + k // 7 for k in range(450)], dtype=np.float64)
    values = np.arange(450, dtype=np.float64)
    first = store.append_columns(train, tags, times, values, None, received_at=T0)
    assert first.new_positions == tuple(range(450))
    assert list(first.new_ids) == sorted(first.new_ids)
    assert [v for *_, v in journal(store, train)] == values.tolist()

    again = [(tags[k], float(times[k]), float(values[k]), None) for k in (3, 449, 200)]
    changed = [("T-0", T0, 99.0, None), ("T-6", float(times[440]), 1.0, 7)]
    fresh = [("T-9", T0 + 1000.0 + k, float(k), 192) for k in range(300)]
    rows = fresh[:150] + again + changed + fresh[150:] + fresh[:2]  # 2 repeats of new rows
    result = store.append_readings(train, rows, received_at=T0 + 1)
    assert result.new_positions == tuple(range(150)) + tuple(range(155, 305))
    assert result.duplicates == (150, 151, 152, 305, 306)
    assert result.conflicts == (153, 154)
    assert result.conflicting_values == (0.0, 440.0)
    stored = journal(store, train)
    assert len(stored) == 750
    assert [v for *_, v in stored[450:]] == [float(k) for k in range(300)]


def test_append_columns_checks_each_column(store: Store):
    train = new_train(store)
    with pytest.raises(ValueError, match=r"reading 1 \('B'\): time and value must be finite"):
        store.append_columns(train, ["A", "B"], [T0, T0], [1.0, math.inf], None, T0)
    with pytest.raises(ValueError, match="one entry per tag"):
        store.append_columns(train, ["A", "B"], [T0], [1.0], None, T0)
    with pytest.raises(ValueError, match=r"reading 0 \('A'\): quality must be"):
        store.append_columns(train, ["A"], [T0], [1.0], [40000], T0)
    assert journal(store, train) == []


def test_a_late_reading_reads_back_by_tag_and_time_not_the_whole_journal(tmp_path: Path):
    # The filter reads the journal back for a reading older than its memory. SQLite
    # must walk each tag's time range on (train, tag, time), not every journal row of
    # the train up to the applied id on (train, id): that grew with the journal.
    with Store(f"sqlite:///{tmp_path / 'plan.db'}") as store:
        store.create_all()
        train = new_train(store)
        store.append_readings(train, [("TI-201", T0 + s, 80.0, None) for s in range(50)], T0)
        seen: list[tuple[str, tuple[object, ...]]] = []

        @event.listens_for(store.engine, "before_cursor_execute")
        def _keep(_c: object, _cur: object, sql: str, params: object, *_: object) -> None:
            if "FROM readings" in sql:
                seen.append((sql, tuple(params)))  # type: ignore[arg-type]

        tags, times, _ = store.readings_between(
            train, ["TI-201", "FI-200"], T0 + 10, T0 + 19, upto=10**9
        )
        assert sorted(times.tolist()) == [T0 + s for s in range(10, 20)] and set(tags) == {"TI-201"}
        ((sql, params),) = seen
        with store.engine.connect() as conn:
            plan = " ".join(
                str(row[-1]) for row in conn.exec_driver_sql("EXPLAIN QUERY PLAN " + sql, params)
            )
        assert "ix_readings_train_journal" not in plan, plan
        assert "tag=?" in plan and "time>?" in plan, plan


def test_the_log_is_checkpointed_in_the_background_and_the_thread_stops(tmp_path: Path):
    with Store(f"sqlite:///{tmp_path / 'wal.db'}") as store:
        store.create_all()
        train = new_train(store)
        store.append_readings(train, [("TI-201", T0 + s, 80.0, None) for s in range(500)], T0)
        busy, logged, copied = store.checkpoint_wal_once()
        assert busy == 0 and logged > 0 and copied == logged  # one round copies the log
        store.start_wal_checkpoints(every=0.01)
        thread = store._wal_thread
        assert thread is not None and thread.is_alive()
        store.start_wal_checkpoints(every=0.01)  # a second start changes nothing
        assert store._wal_thread is thread
    assert store._wal_thread is None and not thread.is_alive()  # close() stopped it


def test_background_log_checkpoints_are_sqlite_only(database_url: str):
    with Store(database_url) as store:
        store.start_wal_checkpoints()
        assert (store._wal_thread is not None) == (store.dialect == "sqlite")
        if store.dialect == "postgresql":
            assert store.checkpoint_wal_once() == (-1, -1, -1)


# ---------------------------------------------------------------------------- estimates


def estimate(t: float, activity: float) -> dict[str, object]:
    return {"t": t, "c": [[1.5, 0.25]], "a": activity}


def test_a_revision_replaces_estimates_and_downsampling_keeps_each_intervals_last(store: Store):
    train = new_train(store)
    assert store.latest_estimate(train) is None
    store.write_estimates(train, [estimate(T0 + s, 1.0) for s in range(0, 600, 10)])
    # A late lab result rewound the filter: rows from 300 s on are revised.
    assert store.write_estimates(train, [estimate(T0 + s, 0.9) for s in range(300, 660, 10)]) == 36

    rows = store.read_estimates(train)
    assert [r["t"] for r in rows] == [T0 + s for s in range(0, 660, 10)]
    assert [r["a"] for r in rows] == [1.0] * 30 + [0.9] * 36
    assert rows[0] == estimate(T0, 1.0)

    window = store.read_estimates(train, T0 + 100, T0 + 200)
    assert [r["t"] for r in window] == [T0 + s for s in range(100, 200, 10)]

    # The last row of each minute, minutes counted from the epoch.
    minutes = store.read_estimates(train, None, None, 60.0)
    assert [r["t"] for r in minutes] == [T0 + s for s in range(50, 660, 60)]
    assert [r["a"] for r in minutes] == [1.0] * 5 + [0.9] * 6
    within = store.read_estimates(train, T0 + 95, T0 + 300, 60.0)
    assert [r["t"] for r in within] == [T0 + 110, T0 + 170, T0 + 230, T0 + 290]

    assert store.latest_estimate(train) == estimate(T0 + 650, 0.9)
    with pytest.raises(ValueError, match="every"):
        store.read_estimates(train, None, None, 0.0)


def test_downsampling_intervals_are_whole_multiples_of_every_on_both_sides_of_zero(store: Store):
    # Simulated runs start at t = 0; an interval holding negative times must not
    # merge with [0, every): the bucket is floor(t / every), not truncation.
    train = new_train(store)
    store.write_estimates(train, [estimate(float(t), 1.0) for t in (-25, -15, -5, 0, 5, 15)])
    assert [r["t"] for r in store.read_estimates(train, None, None, 10.0)] == [
        -25.0,
        -15.0,
        -5.0,
        5.0,
        15.0,
    ]


def test_estimates_with_nan_are_refused_whole(store: Store):
    train = new_train(store)
    with pytest.raises(ValueError, match="row 1"):
        store.write_estimates(train, [estimate(T0, 1.0), estimate(T0 + 10, math.nan)])
    with pytest.raises(ValueError, match="'t'"):
        store.write_estimates(train, [{"a": 1.0}])
    assert store.read_estimates(train) == []


# ---------------------------------------------------------------------------- gated readings


def gated(tag: str, sample: float, value: float, decision: str = "gated") -> GatedRow:
    return GatedRow(
        tag=tag,
        time=sample + 240.0,
        sample_time=sample,
        value=value,
        predicted=value - 40.0,
        unit="mol/m^3",
        nis=25.0,
        reason="+40 mol/m^3 from the prediction, 5.0 sigma",
        decision=decision,
    )


def test_gated_readings_upsert_on_tag_sample_time_and_value(store: Store):
    train = new_train(store)
    store.upsert_gated(train, [gated("AI-203G", T0 + 60, 900.0), gated("AI-200G", T0, 2400.0)])
    # After a rewind the same reading comes back, now taken as a step.
    step = {**gated("AI-203G", T0 + 60, 900.0, "step"), "reason": "taken as a real step"}
    assert store.upsert_gated(train, [step]) == 1
    rows = store.read_gated(train)
    assert [(r["tag"], r["sample_time"], r["decision"]) for r in rows] == [
        ("AI-200G", T0, "gated"),
        ("AI-203G", T0 + 60, "step"),
    ]
    assert rows[1] == step
    assert store.read_gated(train, T0 + 30, T0 + 90) == [step]
    assert store.read_gated(train, None, T0 + 60) == [gated("AI-200G", T0, 2400.0)]
    with pytest.raises(ValueError, match="decision"):
        store.upsert_gated(train, [gated("AI-203G", T0, 1.0, "maybe")])
    with pytest.raises(ValueError, match="missing reason"):
        store.upsert_gated(train, [{k: v for k, v in step.items() if k != "reason"}])


# ---------------------------------------------------------------------------- checkpoints


def test_checkpoints_keep_the_latest_few(store: Store):
    a, b = new_train(store, "line-a"), new_train(store, "line-b")
    assert store.latest_checkpoint(a) is None
    for seq in (10, 20, 30, 40):
        store.save_checkpoint(a, seq, f"state after {seq}".encode())
    store.save_checkpoint(b, 5, b"b state")
    assert store.latest_checkpoint(a) == (40, b"state after 40")
    seq, data = store.latest_checkpoint(b) or (None, None)
    assert (seq, data) == (5, b"b state")
    assert count(store, "checkpoints") == CHECKPOINTS_KEPT + 1


def test_prune_never_deletes_readings_a_restart_replays(store: Store):
    train = new_train(store)
    ids = store.append_readings(
        train, [("TI-201", T0 + s, 80.0 + s, None) for s in range(10)], T0 + 20
    ).new_ids
    assert store.prune(train, readings_before=T0 + 100).readings == 0  # no checkpoint yet

    store.save_checkpoint(train, ids[5], b"state")
    pruned = store.prune(train, readings_before=T0 + 100)
    assert pruned.readings == 6
    assert [i for i, *_ in journal(store, train)] == list(ids[6:])
    assert store.prune(train, readings_before=T0 + 100).readings == 0

    # A checkpoint past every reading lets them all go; journal ids still never repeat.
    store.save_checkpoint(train, ids[-1], b"state")
    assert store.prune(train, readings_before=T0 + 100).readings == 4
    later = store.append_readings(train, [("TI-201", T0 + 50, 81.0, None)], T0 + 60).new_ids
    assert later[0] > ids[-1]


def test_prune_deletes_old_estimates_and_gated_readings(store: Store):
    train = new_train(store)
    store.write_estimates(train, [estimate(T0 + s, 1.0) for s in range(0, 100, 10)])
    store.upsert_gated(train, [gated("AI-203G", T0 + 15, 1.0), gated("AI-203G", T0 + 55, 2.0)])
    counts = store.prune(train, estimates_before=T0 + 50)
    assert (counts.readings, counts.estimates, counts.gated) == (0, 5, 1)
    assert store.read_estimates(train)[0]["t"] == T0 + 50
    assert [r["sample_time"] for r in store.read_gated(train)] == [T0 + 55]


def test_a_session_checkpoint_round_trips_through_the_store(store: Store, database_url: str):
    config = load_train_config(DEMO)
    record = store.create_train(
        config.name, config.title, config.model_dump_json(), DEMO.read_text()
    )
    live = TrainSession(config)
    tags, times, values = simulate(live.model, Scenario(duration=2 * HOUR), seed=11).columns()
    order = np.argsort(times, kind="stable")
    first, rest = order[: len(order) // 2], order[len(order) // 2 :]

    def post(part: np.ndarray) -> int:
        last = 0
        for chunk in np.array_split(part, np.arange(100, len(part), 100)):
            rows = [(tags[i], float(times[i]), float(values[i]), None) for i in chunk.tolist()]
            result = store.append_readings(record.id, rows, received_at=T0)
            assert len(result.new_ids) == len(rows)
            last = result.new_ids[-1]
        return last

    # The service: journal, feed the session, checkpoint; then more readings arrive.
    seq = post(first)
    live.ingest([tags[i] for i in first], times[first], values[first], si=True)
    store.save_checkpoint(record.id, seq, live.checkpoint())
    at_checkpoint = (live.filter.x.copy(), live.filter.cov.copy())
    post(rest)

    # A restart: a new store on the same database, the config from its stored JSON.
    with Store(database_url) as reopened:
        stored = reopened.get_train(config.name)
        assert stored is not None
        assert stored.train_config() == config
        saved = reopened.latest_checkpoint(stored.id)
        assert saved is not None and saved.journal_seq == seq
        resumed = TrainSession.restore(stored.train_config(), saved.data)
        np.testing.assert_array_equal(resumed.filter.x, at_checkpoint[0])
        np.testing.assert_array_equal(resumed.filter.cov, at_checkpoint[1])
        replayed = 0
        for _, batch_tags, batch_times, batch_values in reopened.readings_after(stored.id, seq):
            resumed.ingest(batch_tags, batch_times, batch_values, si=True)
            replayed += len(batch_tags)
    assert replayed == len(rest)

    live.ingest([tags[i] for i in rest], times[rest], values[rest], si=True)
    # The same readings in the same order from the checkpoint on give the same filter
    # state (the tolerances of the session's own checkpoint test).
    np.testing.assert_allclose(resumed.filter.x, live.filter.x, rtol=1e-12)
    np.testing.assert_allclose(resumed.filter.cov, live.filter.cov, rtol=1e-10, atol=1e-14)


# ---------------------------------------------------------------------------- API keys


def test_api_keys_are_found_by_hash_and_revoked_by_id_or_name(store: Store):
    reader = store.add_api_key("dashboard", "read", "a" * 64)
    bridge = store.add_api_key("bridge", "ingest", "b" * 64)
    found = store.find_api_key_by_hash("b" * 64)
    assert found is not None and (found.id, found.name, found.role) == (bridge, "bridge", "ingest")
    assert found.revoked_at is None
    assert store.find_api_key_by_hash("c" * 64) is None
    with pytest.raises(ValueError, match="hash"):
        store.add_api_key("copy", "admin", "a" * 64)

    assert store.revoke_api_key(reader)
    assert not store.revoke_api_key(reader)  # no longer valid
    assert store.revoke_api_key("bridge")
    assert not store.revoke_api_key("nobody")
    keys = store.list_api_keys()
    assert [(k.id, k.revoked_at is not None) for k in keys] == [(reader, True), (bridge, True)]
    revoked = store.find_api_key_by_hash("a" * 64)
    assert revoked is not None and revoked.revoked_at is not None


# ---------------------------------------------------------------------------- failures


@contextmanager
def write_lock_held(url: str) -> Iterator[None]:
    """Another writer holding the lock an append needs, until the block ends."""
    parsed = make_url(url)
    if parsed.get_backend_name() == "sqlite":
        other = sqlite3.connect(str(parsed.database), isolation_level=None)
        other.execute("BEGIN IMMEDIATE")
        try:
            yield
        finally:
            other.rollback()
            other.close()
        return
    with psycopg.connect(
        host=parsed.host, port=parsed.port, user=parsed.username, dbname=parsed.database
    ) as other:
        other.execute("LOCK TABLE readings IN EXCLUSIVE MODE")
        yield
        other.rollback()


def test_a_locked_database_is_unavailable_and_loses_nothing(database_url: str):
    with Store(database_url, timeout=0.2) as store:
        store.create_all()
        train = new_train(store)
        store.append_readings(train, [("FI-200", T0, 20.0, None)], T0)
        later = [("FI-200", T0 + 10, 21.0, None)]
        with write_lock_held(database_url), pytest.raises(StoreUnavailable, match="locked"):
            store.append_readings(train, later, T0 + 10)
        assert [t for _, _, t, _ in journal(store, train)] == [T0]
        assert store.append_readings(train, later, T0 + 11).new_positions == (0,)
        assert [t for _, _, t, _ in journal(store, train)] == [T0, T0 + 10]


def test_a_full_sqlite_disk_is_unavailable_and_loses_nothing(tmp_path: Path):
    with Store(f"sqlite:///{tmp_path / 'full.db'}") as store:
        store.create_all()
        train = new_train(store)
        store.append_readings(train, [("FI-200", T0, 20.0, None)], T0)

        # Cap the file at its present size: the next page SQLite needs is "disk full".
        @event.listens_for(store.engine, "connect")
        def _cap(dbapi_connection: sqlite3.Connection, _record: object) -> None:
            pages = dbapi_connection.execute("PRAGMA page_count").fetchone()[0]
            dbapi_connection.execute(f"PRAGMA max_page_count = {pages}")

        store.engine.dispose()
        many = [(f"TAG-{i}", T0 + 1, float(i), None) for i in range(2000)]
        with pytest.raises(StoreUnavailable, match="full") as caught:
            store.append_readings(train, many, T0 + 1)
        assert "disk is full" in caught.value.reason
        assert [t for _, _, t, _ in journal(store, train)] == [T0]


def test_an_unreachable_postgresql_is_unavailable():
    with socket.socket() as probe:  # bound, never listening: connections are refused
        probe.bind(("127.0.0.1", 0))
        port = probe.getsockname()[1]
        # A bare postgresql:// URL is taken as psycopg 3.
        with Store(f"postgresql://postgres@127.0.0.1:{port}/none", timeout=1.0) as store:
            with pytest.raises(StoreUnavailable, match="cannot be reached"):
                store.create_all()


def test_sqlite_runs_in_wal_mode_with_foreign_keys(tmp_path: Path):
    with Store(f"sqlite:///{tmp_path / 'x.db'}", timeout=2.5) as store:
        store.create_all()
        with store.engine.connect() as conn:
            pragma = {
                name: conn.exec_driver_sql(f"PRAGMA {name}").scalar_one()
                for name in ("journal_mode", "synchronous", "foreign_keys", "busy_timeout")
            }
    assert pragma == {
        "journal_mode": "wal",
        "synchronous": 1,
        "foreign_keys": 1,
        "busy_timeout": 2500,
    }


def test_only_sqlite_and_postgresql_urls_are_taken():
    with pytest.raises(ValueError, match="unsupported database URL"):
        Store("mysql://user@localhost/db")
