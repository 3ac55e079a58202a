"""Faults the service must survive: kill -9 mid-ingest, a locked database, a full disk.

Each test checks the two promises of the ingest path: a batch answered 200 is in the
journal (once) and stays there, and a batch answered 503 changed nothing; and after
the fault the estimates, latest and stored history, are those of a run that never
had it (``reference``: the service in-process, fed the same readings in the same
batches without a fault).
"""

from __future__ import annotations

import sqlite3
import threading
import time
from collections import Counter
from collections.abc import Callable, Iterator, Sequence
from contextlib import contextmanager
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import httpx
import numpy as np
import pytest
from fastapi.testclient import TestClient
from sqlalchemy import create_engine, event, text
from sqlalchemy.engine import make_url

from service.app import create_app
from service.migrations import prepare_schema
from service.settings import Settings
from service.store import Store
from tests.service.test_app import ADMIN, DEMO, NAME, URL, demo_readings
from tests.service.test_live import AUTH, Server
from tests.service.test_store import journal, write_lock_held

Reading = dict[str, object]
Batch = list[Reading]
Estimates = tuple[dict[str, Any], list[dict[str, Any]]]
Client = httpx.Client | TestClient  # a live service or the app in-process

#: The store's lock and connection timeout in the in-process tests [s]: short, so a
#: locked database answers quickly. The service itself opens its store with the
#: default (``Store(url)``, 5 s); no setting changes it.
SHORT_TIMEOUT = 0.3


def batches_of(readings: Sequence[Reading], size: int) -> list[Batch]:
    """Consecutive batches of ``size`` readings (the last may be shorter)."""
    return [list(readings[k : k + size]) for k in range(0, len(readings), size)]


def key(reading: Reading) -> tuple[str, float]:
    """A reading's journal key: (tag, time)."""
    return str(reading["tag"]), float(reading["time"])  # type: ignore[arg-type]


def journal_keys(database_url: str) -> Counter[tuple[str, float]]:
    """How often each (tag, time) is in the demo train's journal."""
    with Store(database_url) as store:
        record = store.get_train(NAME)
        assert record is not None
        rows = journal(store, record.id)
    return Counter((tag, t) for _, tag, t, _ in rows)


def journal_values(database_url: str) -> dict[tuple[str, float], float]:
    """The journaled value of each (tag, time) of the demo train."""
    with Store(database_url) as store:
        record = store.get_train(NAME)
        assert record is not None
        return {(tag, t): v for _, tag, t, v in journal(store, record.id)}


def assert_journal_holds_each_once(database_url: str, readings: Sequence[Reading]) -> None:
    """Every reading is journaled exactly once, with its value, and nothing else is."""
    counts = journal_keys(database_url)
    twice = {k: n for k, n in counts.items() if n != 1}
    assert not twice, f"journaled more than once: {sorted(twice)[:5]}"
    missing = [key(r) for r in readings if key(r) not in counts]
    assert not missing, f"{len(missing)} readings missing from the journal, e.g. {missing[:5]}"
    assert len(counts) == len(readings)
    values = journal_values(database_url)
    assert [values[key(r)] for r in readings] == [r["value"] for r in readings]


def post_batches(client: Client, batches: Sequence[Batch]) -> int:
    """Post each batch, expecting 200 with nothing refused; return the total accepted."""
    accepted = 0
    for batch in batches:
        r = client.post(f"{URL}/readings", json={"readings": batch})
        assert r.status_code == 200, r.text
        assert r.json()["refused"] == [], r.text
        accepted += int(r.json()["accepted"])
    return accepted


def estimates(client: Client) -> Estimates:
    """The latest estimate and every stored estimate row (no downsampling)."""
    latest = client.get(f"{URL}/estimates/latest")
    assert latest.status_code == 200, latest.text
    history = client.get(f"{URL}/estimates")
    assert history.status_code == 200, history.text
    return latest.json(), history.json()["data"]


@dataclass(frozen=True)
class Stream:
    """What every test posts: 12 h of the demo archive, in batches of 50.

    About 2,700 readings ending when the module starts; a batch spans about 13 min
    of plant time.
    """

    readings: list[Reading]
    batches: list[Batch]


@pytest.fixture(scope="module")
def stream() -> Stream:
    readings = demo_readings(12.0, time.time())
    return Stream(readings, batches_of(readings, 50))


@pytest.fixture(scope="module")
def reference(stream: Stream, tmp_path_factory: pytest.TempPathFactory) -> Estimates:
    """The estimates of the service in-process on a fresh SQLite file, fed the stream."""
    folder = tmp_path_factory.mktemp("reference")
    config = Settings(
        data_dir=folder, database_url=f"sqlite:///{folder / 'reference.db'}", bootstrap_key=ADMIN
    )
    with TestClient(create_app(config)) as client:
        client.headers["Authorization"] = f"Bearer {ADMIN}"
        assert client.post("/api/v1/trains", json={"toml": DEMO.read_text()}).status_code == 201
        post_batches(client, stream.batches)
        return estimates(client)


def numbers(value: Any, path: str = "") -> Iterator[tuple[str, Any]]:
    """Flatten an estimate's JSON into (path, leaf) pairs in a fixed order."""
    if isinstance(value, dict):
        for name in sorted(value):
            yield from numbers(value[name], f"{path}.{name}")
    elif isinstance(value, list):
        for i, item in enumerate(value):
            yield from numbers(item, f"{path}[{i}]")
    else:
        yield path, value


def assert_same_estimates(got: Estimates, want: Estimates, rtol: float) -> None:
    """Latest and history agree row by row: the same times and fields, numbers to ``rtol``."""
    got_latest, got_rows = got
    want_latest, want_rows = want
    assert [r["time"] for r in got_rows] == [r["time"] for r in want_rows]
    for got_row, want_row in zip([got_latest, *got_rows], [want_latest, *want_rows], strict=True):
        a, b = list(numbers(got_row)), list(numbers(want_row))
        assert [p for p, _ in a] == [p for p, _ in b]
        number = [isinstance(x, float | int) and not isinstance(x, bool) for _, x in b]
        assert [x for (_, x), n in zip(a, number, strict=True) if not n] == [
            y for (_, y), n in zip(b, number, strict=True) if not n
        ]
        np.testing.assert_allclose(
            [x for (_, x), n in zip(a, number, strict=True) if n],
            [y for (_, y), n in zip(b, number, strict=True) if n],
            rtol=rtol,
            atol=0.0,
            err_msg=f"estimate at {want_row['time']}",
        )


# ---------------------------------------------------------------------------- kill -9


class Poster(threading.Thread):
    """A client posting batches back to back, from batch ``first``, until one fails.

    ``acked`` is the number of leading batches answered 200 (the client is
    sequential, so they are a prefix); ``sending`` is the batch whose post was
    started and not yet answered, if any; ``failure`` is what stopped it. ``state``
    guards the two counters, so a reader sees them as one consistent pair.
    """

    def __init__(self, base: str, batches: Sequence[Batch], first: int = 0) -> None:
        super().__init__(daemon=True)
        self.base = base
        self.batches = batches
        self.state = threading.Lock()
        self.acked = first
        self.sending: int | None = None
        self.failure: BaseException | None = None

    def run(self) -> None:
        with httpx.Client(base_url=self.base, headers=AUTH, timeout=120.0) as client:
            for i in range(self.acked, len(self.batches)):
                with self.state:
                    self.sending = i
                try:
                    r = client.post(f"{URL}/readings", json={"readings": self.batches[i]})
                except httpx.TransportError as exc:
                    self.failure = exc
                    return
                if r.status_code != 200 or r.json()["refused"]:
                    self.failure = AssertionError(f"batch {i}: {r.status_code} {r.text}")
                    return
                with self.state:
                    self.acked = i + 1
                    self.sending = None


def kill_during_post(
    server: Server, poster: Poster, after: int, journaled: Callable[[Batch], bool] | None = None
) -> int:
    """SIGKILL the service during a post, once ``after`` batches are acknowledged.

    The kill happens under the poster's state lock while a post is started and not
    yet acknowledged, so the client has a request out (or an answer it has not read
    yet) when the service dies. With ``journaled``, only once that says the batch
    being posted is in the journal: the service dies after its commit and before
    the client has the answer. Returns the batch in flight. Polls every half
    millisecond; the 120 s bound only keeps a broken run from hanging.
    """
    deadline = time.monotonic() + 120.0
    while time.monotonic() < deadline and poster.is_alive():
        with poster.state:
            sending = poster.sending if poster.acked >= after else None
        if sending is not None and (journaled is None or journaled(poster.batches[sending])):
            with poster.state:
                if poster.sending == sending:
                    server.kill()
                    return sending
        time.sleep(0.0005)
    raise AssertionError(f"no kill after batch {after}: {poster.failure!r}")


@contextmanager
def journal_probe(database_url: str) -> Iterator[Callable[[Batch], bool]]:
    """A quick test of whether a batch's last reading is in the demo train's journal.

    A batch is journaled in one transaction, so its last reading stands for all.
    """
    engine = create_engine(database_url)
    query = text(
        "SELECT count(*) FROM readings r JOIN trains t ON r.train_id = t.id "
        "WHERE t.name = :train AND r.tag = :tag AND r.time = :time"
    )
    try:
        with engine.connect() as conn:

            def journaled(batch: Batch) -> bool:
                tag, t = key(batch[-1])
                found = conn.execute(query, {"train": NAME, "tag": tag, "time": t}).scalar_one()
                conn.rollback()  # the next look sees every commit since
                return bool(found)

            yield journaled
    finally:
        engine.dispose()


def check_journal_after_kill(
    database_url: str, batches: Sequence[Batch], acked: int, in_flight: int
) -> Counter[tuple[str, float]]:
    """Every acknowledged reading is journaled once; nothing else but the batch in flight."""
    counts = journal_keys(database_url)
    acknowledged = {key(r) for batch in batches[:acked] for r in batch}
    assert all(counts[k] == 1 for k in acknowledged)
    assert set(counts) - acknowledged <= {key(r) for r in batches[in_flight]}
    return counts


def resume(server: Server, batches: Sequence[Batch], first: int) -> Poster:
    """Restart the service on its database and a client posting from batch ``first``."""
    server.start()  # same database: restore the checkpoint, replay the journal
    poster = Poster(server.base, batches, first)
    poster.start()
    return poster


def stopped_by_the_kill(poster: Poster, in_flight: int) -> int:
    """Wait for the client to fail; return how many batches it had acknowledged."""
    poster.join(timeout=120.0)
    assert not poster.is_alive()
    # The client's connection failed; the first batch without an answer is the one
    # in flight at the kill, or (if its answer was already on the wire) the next.
    assert isinstance(poster.failure, httpx.TransportError), repr(poster.failure)
    assert poster.sending == poster.acked
    assert poster.acked in (in_flight, in_flight + 1)
    return poster.acked


@pytest.mark.slow
def test_kill_9_during_sustained_ingest_keeps_every_acknowledged_reading_once(
    database_url: str, tmp_path: Path, stream: Stream, reference: Estimates
):
    # One client posts the stream back to back; the service is killed twice.
    readings, batches = stream.readings, stream.batches
    third = len(batches) // 3
    server = Server(database_url, tmp_path)
    try:
        # First kill: as soon as a post is under way (before its batch is journaled,
        # as a rule).
        poster = resume(server, batches, 0)
        in_flight = kill_during_post(server, poster, after=third)
        acked = stopped_by_the_kill(poster, in_flight)
        check_journal_after_kill(database_url, batches, acked, in_flight)

        # Second kill: after the batch in flight is committed to the journal, before
        # the client has its answer. The client posts it again after the restart.
        poster = resume(server, batches, acked)
        with journal_probe(database_url) as journaled:
            in_flight = kill_during_post(server, poster, 2 * third, journaled)
        acked = stopped_by_the_kill(poster, in_flight)
        counts = check_journal_after_kill(database_url, batches, acked, in_flight)
        assert all(counts[key(r)] == 1 for r in batches[in_flight])

        # The client resumes after its last acknowledged batch; posting the one in
        # flight again is harmless (ingest is idempotent).
        server.start()
        with httpx.Client(base_url=server.base, headers=AUTH, timeout=120.0) as client:
            accepted = post_batches(client, batches[acked:])
            assert accepted == len(readings) - len(counts)
            got = estimates(client)
    finally:
        server.stop()

    assert_journal_holds_each_once(database_url, readings)
    # Exact, not to a tolerance. After a restart the filter resumes from a
    # checkpoint, which keeps the state's doubles as they are, and re-applies the
    # journal after it in the store's pages rather than in the batches as posted;
    # the session's numbers do not depend on how readings are split into batches
    # (the same readings in one batch or in batches of 7, 50 or 333 give identical
    # estimates), nor on when checkpoints are taken (every 30 min of plant time in
    # the killed service, 5 min in the reference). JSON text and both databases
    # carry doubles exactly. So "continues as if nothing happened" holds bit for
    # bit, and any difference, even at rounding level, means a restart did not
    # resume the filter it had.
    assert_same_estimates(got, reference, rtol=0.0)


# ---------------------------------------------------------------------------- locked


@contextmanager
def exclusive_lock(database_url: str) -> Iterator[None]:
    """Another connection holding the database's write lock until the block ends.

    SQLite: ``BEGIN EXCLUSIVE`` on the file (in WAL mode readers still read).
    PostgreSQL: ``LOCK TABLE readings IN EXCLUSIVE MODE`` (``write_lock_held``).
    """
    url = make_url(database_url)
    if url.get_backend_name() != "sqlite":
        with write_lock_held(database_url):
            yield
        return
    other = sqlite3.connect(str(url.database), isolation_level=None)
    try:
        other.execute("BEGIN EXCLUSIVE")
        yield
    finally:
        other.rollback()
        other.close()


@contextmanager
def service_on(store: Store, folder: Path, **settings: Any) -> Iterator[TestClient]:
    """The service in-process on an open store, the demo train registered."""
    url = store.engine.url.render_as_string(hide_password=False)
    config = Settings(data_dir=folder, database_url=url, bootstrap_key=ADMIN, **settings)
    with TestClient(create_app(config, store=store)) as client:
        client.headers["Authorization"] = f"Bearer {ADMIN}"
        assert client.post("/api/v1/trains", json={"toml": DEMO.read_text()}).status_code == 201
        yield client


def test_a_locked_database_answers_503_with_the_reason_and_loses_nothing(
    database_url: str, tmp_path: Path, stream: Stream, reference: Estimates
):
    readings, batches = stream.readings, stream.batches
    half = len(batches) // 2
    store = Store(database_url, timeout=SHORT_TIMEOUT)
    prepare_schema(store)
    try:
        with service_on(store, tmp_path) as client:
            post_batches(client, batches[:half])
            before = estimates(client)[0]
            with exclusive_lock(database_url):
                # The lock is held for longer than the store waits for it.
                r = client.post(f"{URL}/readings", json={"readings": batches[half]})
                assert r.status_code == 503, r.text
                assert "database is locked" in r.json()["detail"]
                assert int(r.headers["Retry-After"]) > 0
                # Reads that need no write lock still answer, unchanged.
                assert client.get(f"{URL}/estimates/latest").json() == before
            # Nothing of the refused batch was journaled; all before it was.
            counts = journal_keys(database_url)
            assert not any(key(r) in counts for r in batches[half])
            assert_journal_holds_each_once(database_url, [r for b in batches[:half] for r in b])
            # Released: the same batch is taken whole, then the rest.
            r = client.post(f"{URL}/readings", json={"readings": batches[half]})
            assert r.status_code == 200, r.text
            assert r.json() == {"accepted": len(batches[half]), "duplicates": 0, "refused": []}
            post_batches(client, batches[half + 1 :])
            got = estimates(client)
    finally:
        store.close()
    assert_journal_holds_each_once(database_url, readings)
    # Exact: the refused post changed nothing, so the service took the same batches
    # through the same code as the reference (and both databases store doubles
    # exactly).
    assert_same_estimates(got, reference, rtol=0.0)


# ---------------------------------------------------------------------------- disk full


class PageCap:
    """Caps a SQLite store's file at ``pages`` pages (None: no cap), on every connection.

    ``PRAGMA max_page_count`` holds per connection, so it is set at each checkout of
    a pooled connection; a write that needs a page beyond the cap fails with
    SQLITE_FULL, "database or disk is full", as on a full disk.
    """

    NO_CAP = 0xFFFFFFFE  # the largest max_page_count SQLite takes (it clamps larger ones)

    def __init__(self, store: Store) -> None:
        self.pages: int | None = None
        self.path = Path(str(store.engine.url.database))
        event.listen(store.engine, "checkout", self._apply)

    def _apply(self, dbapi_connection: sqlite3.Connection, _record: Any, _proxy: Any) -> None:
        limit = self.NO_CAP if self.pages is None else self.pages
        dbapi_connection.execute(f"PRAGMA max_page_count = {limit}")

    def page_count(self) -> int:
        with sqlite3.connect(f"file:{self.path}?mode=ro", uri=True) as db:
            return int(db.execute("PRAGMA page_count").fetchone()[0])


@dataclass
class FullDiskRun:
    """What the client saw while the disk was full, and the estimates after it."""

    url: str
    capped: range  # the batches posted while the disk was full
    # (batch, detail, Retry-After, readings of the batch in the journal after the 503)
    refusals: list[tuple[int, str, str | None, int]]
    accepted: int  # readings the capped batches' 200 answers called new
    duplicates: int  # readings the capped batches' 200 answers called already taken
    after: list[tuple[int, dict[str, Any]]]  # answers once space was back
    got: Estimates


@pytest.fixture(scope="module")
def full_disk(tmp_path_factory: pytest.TempPathFactory, stream: Stream) -> FullDiskRun:
    """The service on a SQLite file that fills up part-way through the stream.

    A batch spans about 13 min of plant time, so nearly every batch also writes a
    checkpoint (every 5 min by default) besides its journal rows and estimate rows:
    the full disk is met by all three kinds of write.
    """
    folder = tmp_path_factory.mktemp("full-disk")
    batches = stream.batches
    capped = range(4, len(batches) - 4)
    url = f"sqlite:///{folder / 'stagewatch.db'}"
    store = Store(url, timeout=SHORT_TIMEOUT)
    prepare_schema(store)
    cap = PageCap(store)
    refusals: list[tuple[int, str, str | None, int]] = []
    accepted = duplicates = 0
    try:
        with service_on(store, folder) as client:
            post_batches(client, batches[: capped.start])
            # The disk is full: the file may not grow. Each time the service refuses
            # a batch a little space comes back (4 pages) and the client posts the
            # same batch again, so the cap falls on many different writes.
            cap.pages = cap.page_count()
            i = capped.start
            while i < capped.stop:
                assert len(refusals) < 500, "the cap never let the ingest go on"
                r = client.post(f"{URL}/readings", json={"readings": batches[i]})
                if r.status_code == 200:
                    assert r.json()["refused"] == [], r.text
                    accepted += int(r.json()["accepted"])
                    duplicates += int(r.json()["duplicates"])
                    i += 1
                    continue
                assert r.status_code == 503, r.text
                counts = journal_keys(url)
                taken = sum(counts[key(x)] for x in batches[i])
                refusals.append((i, r.json()["detail"], r.headers.get("Retry-After"), taken))
                cap.pages = cap.page_count() + 4
            cap.pages = None  # space is back
            after = []
            for batch in batches[capped.stop :]:
                r = client.post(f"{URL}/readings", json={"readings": batch})
                after.append((r.status_code, r.json()))
            got = estimates(client)
    finally:
        store.close()
    return FullDiskRun(url, capped, refusals, accepted, duplicates, after, got)


def test_a_full_disk_answers_503_naming_it_and_the_service_goes_on_once_space_is_back(
    full_disk: FullDiskRun, stream: Stream, reference: Estimates
):
    run = full_disk
    assert len(run.refusals) >= 3  # the cap did refuse, more than once
    for _, detail, retry_after, _ in run.refusals:
        assert "disk is full" in detail
        assert retry_after is not None and int(retry_after) > 0
    # Once space is back every batch is taken whole.
    batches = stream.batches[run.capped.stop :]
    assert run.after == [
        (200, {"accepted": len(b), "duplicates": 0, "refused": []}) for b in batches
    ]
    # Every reading is in the journal once, and the newest estimate is that of a run
    # whose disk never filled (exactly: the same readings in the same batches).
    assert_journal_holds_each_once(run.url, stream.readings)
    assert_same_estimates((run.got[0], []), (reference[0], []), rtol=0.0)


def test_a_batch_refused_for_a_full_disk_leaves_nothing_in_the_journal(
    full_disk: FullDiskRun, stream: Stream
):
    run = full_disk
    assert run.refusals  # not vacuous
    # (batch, readings journaled) for every 503 after which some of the batch was
    # in the journal: none, if the refusal refused the batch whole.
    assert [(i, taken) for i, _, _, taken in run.refusals if taken] == []
    # So the client that posts the batch again is told its readings are new.
    assert run.duplicates == 0
    assert run.accepted == sum(len(stream.batches[i]) for i in run.capped)


def test_a_full_disk_loses_no_stored_estimate_of_an_accepted_reading(
    full_disk: FullDiskRun, reference: Estimates
):
    # Latest and the whole stored history as if the disk had never filled: exact,
    # as for the locked database (the same readings through the same code).
    assert_same_estimates(full_disk.got, reference, rtol=0.0)
