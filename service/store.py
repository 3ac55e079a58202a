"""Persistence: trains, the readings journal, estimates, gated readings, checkpoints, keys.

One :class:`Store` over SQLAlchemy 2, on SQLite (the default, a single file) or
PostgreSQL (``postgresql+psycopg://``). Every public method is one transaction: it
commits before it returns, or rolls back and raises. Batches go to the database in
one statement, never a round trip per row.

What is kept:

- ``trains`` and ``train_versions``: a train's name and title, and every config it
  has had (the validated config as JSON in SI, and the text as posted). A config
  change adds a version; a version is never rewritten.
- ``readings``: the journal. Each reading (tag, time, value, quality) gets a journal
  id, increasing in the order readings were accepted and never reused; (train, tag,
  time) is unique, so posting a batch again stores nothing twice.
- ``estimates``: one JSON row per (train, time); a revision replaces the row.
- ``gated_readings``: readings the filter rejected, or took as a step, with reasons.
- ``checkpoints``: session state with the last journal id it includes; the newest
  three per train are kept.
- ``alert_events``: every transition of every alert of a train (the engine's
  sequence number, the states, who and why, the figure and the message), the
  durable log of the alert engine; the engine's current state travels in the
  checkpoints. An event is stored once: its (train, sequence) is unique.
- ``api_keys``: hashes of API keys with their role (the key itself is never stored).

Times of data (readings, estimates, gated readings) are floats, seconds since the
Unix epoch; the store keeps bookkeeping times (created, retired, revoked) as epoch
seconds too and hands them out as timezone-aware UTC datetimes.

A database that cannot take a write or answer a read -- SQLite locked by another
writer past the busy timeout, a full disk, PostgreSQL unreachable or past its lock
timeout -- raises :class:`StoreUnavailable` with the reason; the transaction is
rolled back, and what was committed before stays.

SQLite runs in WAL mode with ``synchronous=NORMAL`` by default: a commit survives a
crash of the process, and the database is never corrupted, but a power cut or an
operating-system crash may lose the last commits before the WAL is synced. Pass
``sqlite_synchronous="FULL"`` for commits that survive those too, at the cost of an
fsync per transaction.
"""

from __future__ import annotations

import functools
import itertools
import json
import logging
import math
import sqlite3
import threading
import time
from collections.abc import Callable, Iterable, Iterator, Mapping, Sequence
from contextlib import contextmanager
from dataclasses import dataclass
from datetime import UTC, datetime
from typing import Any, Literal, NamedTuple, ParamSpec, TypedDict, TypeVar

import numpy as np
from numpy.typing import NDArray
from sqlalchemy import (
    BigInteger,
    CheckConstraint,
    Double,
    ForeignKey,
    Index,
    Integer,
    LargeBinary,
    SmallInteger,
    String,
    Text,
    UniqueConstraint,
    case,
    cast,
    create_engine,
    delete,
    event,
    func,
    select,
    text,
    update,
)
from sqlalchemy.dialects import postgresql, sqlite
from sqlalchemy.engine import URL, Connection, Engine, make_url
from sqlalchemy.exc import DBAPIError, IntegrityError, InterfaceError, OperationalError
from sqlalchemy.exc import TimeoutError as PoolTimeoutError
from sqlalchemy.orm import DeclarativeBase, Mapped, mapped_column
from sqlalchemy.sql.elements import ColumnElement

from estimator.alarm_state import AlertEvent
from estimator.config import TrainConfig

__all__ = [
    "AppendResult",
    "ApiKeyRecord",
    "Checkpoint",
    "GatedRow",
    "PruneCounts",
    "ReadingBatch",
    "Store",
    "StoreUnavailable",
    "TrainExists",
    "TrainNotFound",
    "TrainRecord",
    "TrainVersion",
]

_P = ParamSpec("_P")
_R = TypeVar("_R")

log = logging.getLogger("stagewatch.store")

#: Interval of the background checkpoints of SQLite's write-ahead log [s]
#: (:meth:`Store.start_wal_checkpoints`).
WAL_CHECKPOINT_EVERY = 0.25

#: How many checkpoints per train :meth:`Store.save_checkpoint` keeps.
CHECKPOINTS_KEPT = 3

# Key space of the PostgreSQL advisory locks that serialise journal appends per
# train ("SW"); the second key is the train id.
_JOURNAL_LOCK_SPACE = 0x5357
# Connection execution option marking a writing transaction (SQLite: BEGIN IMMEDIATE).
_WRITE = "stagewatch_write"
_SMALLINT = (-32768, 32767)
_GATED_FIELDS = (
    "tag",
    "time",
    "sample_time",
    "value",
    "predicted",
    "unit",
    "nis",
    "reason",
    "decision",
)
_DECISIONS = ("gated", "step")
# Columns of alert_events in the order of AlertEvent's fields ("seq" is "sequence").
_ALERT_COLUMNS = (
    "seq",
    "alert_id",
    "rule",
    "subject",
    "priority",
    "time",
    "from_state",
    "to_state",
    "who",
    "why",
    "figure",
    "threshold",
    "unit",
    "message",
)

# PostgreSQL journal statements: one array per column instead of a placeholder per
# value, so that a batch is a short statement (psycopg re-parses long ones each time).
_PG_APPEND = text(
    "INSERT INTO readings (train_id, tag, time, value, quality, received_at) "
    "SELECT :train_id, k.tag, k.time, k.value, k.quality, :received_at "
    "FROM unnest(CAST(:tags AS text[]), CAST(:times AS float8[]), "
    "CAST(:values AS float8[]), CAST(:qualities AS int2[])) AS k(tag, time, value, quality) "
    "ON CONFLICT (train_id, tag, time) DO NOTHING "
    "RETURNING id, tag, time"
)
_PG_STORED = text(
    "SELECT r.tag, r.time, r.value "
    "FROM unnest(CAST(:tags AS text[]), CAST(:times AS float8[])) AS k(tag, time) "
    "JOIN readings r ON r.train_id = :train_id AND r.tag = k.tag AND r.time = k.time"
)

# Estimate writes, the same text on both backends and built once: a statement built
# per call (and its cache key) cost more than the few rows a call writes.
_ESTIMATES_DELETE = text(
    "DELETE FROM estimates WHERE train_id = :train_id AND time >= :start AND time <= :stop"
)
_ESTIMATES_UPSERT = text(
    "INSERT INTO estimates (train_id, time, payload) VALUES (:train_id, :time, :payload) "
    "ON CONFLICT (train_id, time) DO UPDATE SET payload = excluded.payload"
)

IntArray = NDArray[np.int64]
FloatArray = NDArray[np.float64]


class StoreUnavailable(Exception):
    """The database cannot take the write or answer the read now; nothing was changed.

    ``reason`` says why (locked, disk full, unreachable) in words for a 503 answer.
    """

    def __init__(self, reason: str) -> None:
        super().__init__(reason)
        self.reason = reason


class TrainNotFound(LookupError):
    """No train of that name (or no active one, where a retired train will not do)."""


class TrainExists(ValueError):
    """A train of that name is already stored (retired trains keep their names)."""


# ---------------------------------------------------------------------------- schema


class _Base(DeclarativeBase):
    pass


# SQLite makes only an INTEGER PRIMARY KEY an alias of its rowid.
_BIGID = BigInteger().with_variant(Integer(), "sqlite")


class _Train(_Base):
    __tablename__ = "trains"

    id: Mapped[int] = mapped_column(Integer, primary_key=True)
    name: Mapped[str] = mapped_column(String(64), unique=True)
    title: Mapped[str] = mapped_column(Text)
    created_at: Mapped[float] = mapped_column(Double)
    retired_at: Mapped[float | None] = mapped_column(Double)
    current_version: Mapped[int] = mapped_column(Integer)


class _TrainVersion(_Base):
    __tablename__ = "train_versions"

    train_id: Mapped[int] = mapped_column(ForeignKey("trains.id"), primary_key=True)
    version: Mapped[int] = mapped_column(Integer, primary_key=True)
    config_json: Mapped[str] = mapped_column(Text)
    source_text: Mapped[str] = mapped_column(Text)
    created_at: Mapped[float] = mapped_column(Double)


class _Reading(_Base):
    __tablename__ = "readings"
    # AUTOINCREMENT: SQLite would otherwise reuse the ids of deleted newest rows, and
    # a journal id must never come back once a checkpoint has passed it.
    __table_args__ = (
        UniqueConstraint("train_id", "tag", "time", name="uq_readings_train_tag_time"),
        Index("ix_readings_train_journal", "train_id", "id"),
        {"sqlite_autoincrement": True},
    )

    id: Mapped[int] = mapped_column(_BIGID, primary_key=True, autoincrement=True)
    train_id: Mapped[int] = mapped_column(ForeignKey("trains.id"))
    tag: Mapped[str] = mapped_column(String(256))
    time: Mapped[float] = mapped_column(Double)
    value: Mapped[float] = mapped_column(Double)
    quality: Mapped[int | None] = mapped_column(SmallInteger)
    received_at: Mapped[float] = mapped_column(Double)


class _Estimate(_Base):
    __tablename__ = "estimates"

    train_id: Mapped[int] = mapped_column(ForeignKey("trains.id"), primary_key=True)
    time: Mapped[float] = mapped_column(Double, primary_key=True)
    payload: Mapped[str] = mapped_column(Text)


class _Gated(_Base):
    __tablename__ = "gated_readings"
    __table_args__ = (
        UniqueConstraint(
            "train_id", "tag", "sample_time", "value", name="uq_gated_train_tag_sample_value"
        ),
        Index("ix_gated_train_sample_time", "train_id", "sample_time"),
        CheckConstraint("decision IN ('gated', 'step')", name="ck_gated_decision"),
    )

    id: Mapped[int] = mapped_column(_BIGID, primary_key=True, autoincrement=True)
    train_id: Mapped[int] = mapped_column(ForeignKey("trains.id"))
    tag: Mapped[str] = mapped_column(String(256))
    time: Mapped[float] = mapped_column(Double)
    sample_time: Mapped[float] = mapped_column(Double)
    value: Mapped[float] = mapped_column(Double)
    predicted: Mapped[float] = mapped_column(Double)
    unit: Mapped[str] = mapped_column(String(64))
    nis: Mapped[float] = mapped_column(Double)
    reason: Mapped[str] = mapped_column(Text)
    decision: Mapped[str] = mapped_column(String(8))


class _Checkpoint(_Base):
    __tablename__ = "checkpoints"
    __table_args__ = (Index("ix_checkpoints_train_seq", "train_id", "journal_seq"),)

    id: Mapped[int] = mapped_column(Integer, primary_key=True)
    train_id: Mapped[int] = mapped_column(ForeignKey("trains.id"))
    journal_seq: Mapped[int] = mapped_column(BigInteger)
    created_at: Mapped[float] = mapped_column(Double)
    data: Mapped[bytes] = mapped_column(LargeBinary)


class _AlertEvent(_Base):
    __tablename__ = "alert_events"
    __table_args__ = (
        Index("ix_alert_events_train_time", "train_id", "time"),
        Index("ix_alert_events_train_alert", "train_id", "alert_id", "seq"),
    )

    train_id: Mapped[int] = mapped_column(ForeignKey("trains.id"), primary_key=True)
    seq: Mapped[int] = mapped_column(BigInteger, primary_key=True, autoincrement=False)
    alert_id: Mapped[str] = mapped_column(String(400))
    rule: Mapped[str] = mapped_column(String(64))
    subject: Mapped[str] = mapped_column(String(256))
    priority: Mapped[str] = mapped_column(String(16))
    time: Mapped[float] = mapped_column(Double)
    from_state: Mapped[str] = mapped_column(String(32))
    to_state: Mapped[str] = mapped_column(String(32))
    who: Mapped[str] = mapped_column(String(128))
    why: Mapped[str] = mapped_column(Text)
    figure: Mapped[float | None] = mapped_column(Double)
    threshold: Mapped[float | None] = mapped_column(Double)
    unit: Mapped[str] = mapped_column(String(64))
    message: Mapped[str] = mapped_column(Text)


class _ApiKey(_Base):
    __tablename__ = "api_keys"

    id: Mapped[int] = mapped_column(Integer, primary_key=True)
    name: Mapped[str] = mapped_column(String(128))
    role: Mapped[str] = mapped_column(String(32))
    key_hash: Mapped[str] = mapped_column(String(128), unique=True)
    created_at: Mapped[float] = mapped_column(Double)
    revoked_at: Mapped[float | None] = mapped_column(Double)


# ---------------------------------------------------------------------------- records


def _utc(seconds: float | None) -> datetime | None:
    return None if seconds is None else datetime.fromtimestamp(seconds, UTC)


@dataclass(frozen=True, slots=True)
class TrainRecord:
    """A stored train with its current config version.

    Attributes
    ----------
    id : int
        Train id, the key of its journal, estimates and checkpoints.
    name, title : str
        The train's slug and title.
    version : int
        Current config version (1 for the config it was created with).
    config_json : str
        The current validated config as JSON, quantities in SI.
    source_text : str
        The current config as it was posted (TOML or JSON text).
    created_at : datetime
        When the train was created (UTC).
    retired_at : datetime or None
        When it was retired (UTC); None while it is active.
    """

    id: int
    name: str
    title: str
    version: int
    config_json: str
    source_text: str
    created_at: datetime
    retired_at: datetime | None

    def train_config(self) -> TrainConfig:
        """Return the current config, validated again from its stored JSON."""
        return TrainConfig.model_validate_json(self.config_json)


@dataclass(frozen=True, slots=True)
class TrainVersion:
    """One config version of a train: the JSON in SI, the posted text, when (UTC)."""

    version: int
    config_json: str
    source_text: str
    created_at: datetime


@dataclass(frozen=True, slots=True)
class AppendResult:
    """What :meth:`Store.append_readings` did with each row of a batch.

    Positions index the rows as passed.

    Attributes
    ----------
    new_positions : tuple of int
        Rows stored now, in ascending position.
    new_ids : tuple of int
        Journal id of each of those rows, in the same order.
    duplicates : tuple of int
        Rows identical (tag, time and value) to a stored reading, or to an earlier
        row of the batch: nothing to do.
    conflicts : tuple of int
        Rows whose tag and time are stored with a different value: refused.
    conflicting_values : tuple of float
        The stored value each conflict met, in the same order as ``conflicts``.
    """

    new_positions: tuple[int, ...]
    new_ids: tuple[int, ...]
    duplicates: tuple[int, ...]
    conflicts: tuple[int, ...]
    conflicting_values: tuple[float, ...]


class ReadingBatch(NamedTuple):
    """Journal rows in journal order, as columns (unpacks as a 4-tuple).

    Attributes
    ----------
    ids : ndarray of int64, shape (k,)
        Journal ids, increasing.
    tags : list of str, length k
        Tag of each reading.
    times : ndarray of float64, shape (k,)
        Reading time [s since the epoch].
    values : ndarray of float64, shape (k,)
        Value in the tag's declared unit, as posted.
    """

    ids: IntArray
    tags: list[str]
    times: FloatArray
    values: FloatArray


class Checkpoint(NamedTuple):
    """A stored session checkpoint: the last journal id it includes and its bytes."""

    journal_seq: int
    data: bytes


class PruneCounts(NamedTuple):
    """Rows :meth:`Store.prune` deleted, per table."""

    readings: int
    estimates: int
    gated: int


class GatedRow(TypedDict):
    """A gated reading as :meth:`Store.read_gated` returns it (and upserts take it).

    ``time`` is when the reading was stamped and ``sample_time`` when its sample
    was taken [s since the epoch]; ``value`` and ``predicted`` are in ``unit``;
    ``nis`` is the normalised innovation squared [-]; ``decision`` is ``"gated"``
    (rejected) or ``"step"`` (taken as a real step after persistent gating).
    """

    tag: str
    time: float
    sample_time: float
    value: float
    predicted: float
    unit: str
    nis: float
    reason: str
    decision: str


@dataclass(frozen=True, slots=True)
class ApiKeyRecord:
    """A stored API key (its hash, never the key), as ``service.auth`` reads it."""

    id: int
    name: str
    role: str
    key_hash: str
    created_at: datetime
    revoked_at: datetime | None


# ---------------------------------------------------------------------------- errors


def _unavailable_reason(exc: Exception) -> str:
    original = getattr(exc, "orig", None)
    text = str(original if original is not None else exc).strip()
    text = text.splitlines()[0] if text else type(exc).__name__
    low = text.lower()
    if "locked" in low or "lock timeout" in low or "busy" in low:
        return f"the database is locked by another writer ({text}); retry shortly"
    if "full" in low or "no space" in low:
        return f"the database's disk is full ({text}); free space, then retry"
    return f"the database cannot be reached ({text})"


def _guarded(method: Callable[_P, _R]) -> Callable[_P, _R]:
    """Turn the driver's "cannot do it now" errors into :class:`StoreUnavailable`."""

    @functools.wraps(method)
    def wrapper(*args: _P.args, **kwargs: _P.kwargs) -> _R:
        try:
            return method(*args, **kwargs)
        except (OperationalError, InterfaceError, PoolTimeoutError) as exc:
            raise StoreUnavailable(_unavailable_reason(exc)) from exc
        except DBAPIError as exc:
            if exc.connection_invalidated:
                raise StoreUnavailable(_unavailable_reason(exc)) from exc
            raise

    return wrapper


# ---------------------------------------------------------------------------- store


#: Most readings in one SQLite journal statement: 4 parameters each and 2 shared
#: stay under 999, the smallest limit on parameters an SQLite build may have.
_SQLITE_APPEND_ROWS = 200


@functools.lru_cache(maxsize=64)
def _sqlite_append_sql(rows: int) -> str:
    """Return the SQLite journal append of ``rows`` readings, as driver SQL.

    Numbered parameters: ?1 is the train id and ?2 the arrival time, shared by every
    row; each reading then has four (tag, time, value, quality). Driver SQL, built
    once per batch size, because SQLAlchemy's multi-row insert compiles and binds
    each row in Python, which cost more than SQLite's own work on the rows.
    """
    values = ",".join(f"(?1,?{k},?{k + 1},?{k + 2},?{k + 3},?2)" for k in range(3, 3 + 4 * rows, 4))
    return (
        "INSERT INTO readings (train_id, tag, time, value, quality, received_at) "
        f"VALUES {values} ON CONFLICT (train_id, tag, time) DO NOTHING "
        "RETURNING id, tag, time"
    )


def _sqlite_append(
    driver: sqlite3.Connection,
    train_id: int,
    received_at: float,
    rows: Iterable[tuple[str, float, float, int | None]],
    n: int,
) -> list[Any]:
    """Insert ``n`` journal rows on SQLite; return (id, tag, time) of those inserted."""
    inserted: list[Any] = []
    rows = iter(rows)
    for start in range(0, n, _SQLITE_APPEND_ROWS):
        count = min(_SQLITE_APPEND_ROWS, n - start)
        params: list[Any] = [train_id, received_at]
        for row in itertools.islice(rows, count):
            params += row
        inserted += _driver_execute(driver, _sqlite_append_sql(count), params)
    return inserted


def _sqlite_stored_values(
    driver: sqlite3.Connection, train_id: int, tags: list[str], times: list[float]
) -> dict[tuple[str, float], float]:
    """Return the stored value of each (tag, time) key that has one (SQLite driver).

    Two IN lists walk the unique index (a row-value IN scans the train's journal);
    the few extra rows they may match are ignored. Each list is cut into pieces of
    at most :data:`_SQLITE_APPEND_ROWS` values, to stay within SQLite's limit on
    parameters.
    """
    unique_tags = sorted(set(tags))
    unique_times = sorted(set(times))
    step = _SQLITE_APPEND_ROWS
    found: dict[tuple[str, float], float] = {}
    for i in range(0, len(unique_tags), step):
        some_tags = unique_tags[i : i + step]
        for j in range(0, len(unique_times), step):
            some_times = unique_times[j : j + step]
            sql = (
                "SELECT tag, time, value FROM readings WHERE train_id = ? "
                f"AND tag IN ({','.join('?' * len(some_tags))}) "
                f"AND time IN ({','.join('?' * len(some_times))})"
            )
            for tag, t, value in _driver_execute(driver, sql, [train_id, *some_tags, *some_times]):
                found[(tag, t)] = value
    return found


def _driver_execute(driver: Any, sql: str, params: Sequence[Any] = ()) -> list[Any]:
    """Run one statement on an SQLite driver connection; return its rows as tuples.

    For the statements of every ingest request: SQLAlchemy's execution path (an
    execution context, a result, a row object per row) cost more than SQLite's own
    work on them. A driver error is raised as SQLAlchemy raises it
    (``OperationalError``, ``IntegrityError``, ...), so :func:`_guarded` and the
    callers see no difference.
    """
    try:
        return list(driver.execute(sql, params).fetchall())
    except sqlite3.Error as exc:
        raise DBAPIError.instance(sql, list(params), exc, sqlite3.Error) from exc


class Store:
    """The service's database: SQLite file or PostgreSQL, one transaction per call.

    Parameters
    ----------
    url : str
        SQLAlchemy URL: ``sqlite:///path/to/file.db`` or
        ``postgresql+psycopg://user@host:port/database`` (a bare ``postgresql://``
        URL uses psycopg 3 too).
    timeout : float, optional
        How long to wait for a lock held by another writer (SQLite's busy timeout,
        PostgreSQL's lock_timeout) or for a connection, before the call raises
        :class:`StoreUnavailable` [s].
    sqlite_synchronous : {"NORMAL", "FULL"}, optional
        SQLite's ``synchronous`` setting (see the module notes).
    clock : callable, optional
        Returns the time for bookkeeping columns [s since the epoch]; ``time.time``.

    Notes
    -----
    The constructor makes the engine and connects nowhere; :meth:`create_all`
    makes any missing table. Call :meth:`close` (or use the store as a context
    manager) to release the connections.
    """

    def __init__(
        self,
        url: str,
        *,
        timeout: float = 5.0,
        sqlite_synchronous: Literal["NORMAL", "FULL"] = "NORMAL",
        clock: Callable[[], float] = time.time,
    ) -> None:
        if not (math.isfinite(timeout) and timeout > 0):
            raise ValueError(f"timeout must be a positive number of seconds, got {timeout!r}")
        if sqlite_synchronous not in ("NORMAL", "FULL"):
            raise ValueError(
                f"sqlite_synchronous must be NORMAL or FULL, got {sqlite_synchronous!r}"
            )
        parsed = make_url(url)
        backend = parsed.get_backend_name()
        self._clock = clock
        if backend == "sqlite":
            self._engine = _sqlite_engine(parsed, timeout, sqlite_synchronous)
        elif backend == "postgresql":
            self._engine = _postgresql_engine(parsed, timeout)
        else:
            raise ValueError(
                f"unsupported database URL {parsed.render_as_string(hide_password=True)!r}: "
                "use sqlite:///<file> or postgresql+psycopg://<user>@<host>/<database>"
            )
        self._postgresql = backend == "postgresql"
        self._writer = self._engine.execution_options(**{_WRITE: True})
        self._sqlite_file = backend == "sqlite" and parsed.database not in (None, "", ":memory:")
        self._wal_thread: threading.Thread | None = None
        self._wal_stop = threading.Event()

    @property
    def engine(self) -> Engine:
        """The SQLAlchemy engine (for migrations and diagnostics)."""
        return self._engine

    @property
    def dialect(self) -> str:
        """``"sqlite"`` or ``"postgresql"``."""
        return "postgresql" if self._postgresql else "sqlite"

    @_guarded
    def create_all(self) -> None:
        """Create every missing table and index (existing ones are left alone)."""
        _Base.metadata.create_all(self._writer)

    def close(self) -> None:
        """Stop the background log checkpoints, if any, and close every pooled connection."""
        self.stop_wal_checkpoints()
        self._engine.dispose()

    def start_wal_checkpoints(self, every: float = WAL_CHECKPOINT_EVERY) -> None:
        """Checkpoint SQLite's write-ahead log from a background thread (a file database only).

        Parameters
        ----------
        every : float, optional
            Interval between checkpoints [s].

        Notes
        -----
        SQLite copies the log into the database file (with an fsync of each) in
        the commit that takes the log past 1,000 pages, so that one writer of the
        service waited milliseconds now and then, on the thread that serves every
        request. Checkpointed this often from a thread of its own (PASSIVE: it
        never waits for, nor blocks, a reader or the writer; SQLite releases the
        GIL meanwhile), the log stays below that size under load and no commit
        does the copy. Durability is unchanged: a commit is in the log when it
        returns, as before. :meth:`stop_wal_checkpoints` (or :meth:`close`) stops
        the thread; on PostgreSQL this does nothing.
        """
        if not self._sqlite_file or self._wal_thread is not None:
            return
        if not (math.isfinite(every) and every > 0):
            raise ValueError(f"every must be a positive number of seconds, got {every!r}")
        self._wal_stop.clear()
        self._wal_thread = threading.Thread(
            target=self._checkpoint_wal, args=(every,), name="stagewatch-wal", daemon=True
        )
        self._wal_thread.start()

    def stop_wal_checkpoints(self) -> None:
        """Stop the thread :meth:`start_wal_checkpoints` started (nothing if none runs)."""
        thread, self._wal_thread = self._wal_thread, None
        if thread is not None:
            self._wal_stop.set()
            thread.join()

    @_guarded
    def checkpoint_wal_once(self) -> tuple[int, int, int]:
        """Checkpoint SQLite's write-ahead log once (PASSIVE), on a pooled connection.

        Returns
        -------
        (int, int, int)
            SQLite's answer: 1 if a lock stopped the checkpoint short (else 0), the
            pages in the log, the pages copied into the database file so far; all
            -1 on PostgreSQL, which keeps no such log.
        """
        if not self._sqlite_file:
            return (-1, -1, -1)
        fairy = self._engine.raw_connection()
        try:
            (row,) = _driver_execute(fairy.driver_connection, "PRAGMA wal_checkpoint(PASSIVE)")
        finally:
            fairy.close()
        busy, logged, copied = row
        return int(busy), int(logged), int(copied)

    def _checkpoint_wal(self, every: float) -> None:
        failing = False
        while not self._wal_stop.wait(every):
            try:
                self.checkpoint_wal_once()
                failing = False
            except Exception as exc:  # a busy or full database: the next round tries again
                if not failing:
                    log.warning("SQLite log checkpoint failed (tried again): %s", exc)
                failing = True

    def __enter__(self) -> Store:
        return self

    def __exit__(self, *exc: object) -> None:
        self.close()

    @contextmanager
    def _write(self) -> Iterator[Connection]:
        with self._writer.begin() as conn:
            yield conn

    @contextmanager
    def _sqlite_write(self) -> Iterator[sqlite3.Connection]:
        """Give a write transaction on a pooled SQLite connection's own driver.

        BEGIN IMMEDIATE, then COMMIT when the block ends, ROLLBACK if it raises:
        what :meth:`_write` does, without SQLAlchemy's connection and transaction
        objects and events, which cost more than an ingest request's journal
        insert. The connection comes from the engine's pool (configured by its
        connect hook, replaced by :meth:`close` and ``dispose``) and goes back to
        it; driver errors are raised as SQLAlchemy raises them (see
        :func:`_driver_execute`).
        """
        fairy = self._engine.raw_connection()
        try:
            driver = fairy.driver_connection
            assert isinstance(driver, sqlite3.Connection)
            _driver_execute(driver, "BEGIN IMMEDIATE")
            try:
                yield driver
                _driver_execute(driver, "COMMIT")
            except BaseException:
                if driver.in_transaction:
                    driver.rollback()
                raise
        finally:
            fairy.close()

    @contextmanager
    def _read(self) -> Iterator[Connection]:
        with self._engine.connect() as conn:
            yield conn

    def _insert(self, entity: type[_Base]) -> sqlite.Insert | postgresql.Insert:
        if self._postgresql:
            return postgresql.insert(entity)
        return sqlite.insert(entity)

    # ------------------------------------------------------------------ trains

    @_guarded
    def create_train(
        self, name: str, title: str, config_json: str, source_text: str
    ) -> TrainRecord:
        """Store a new train with its first config version.

        Parameters
        ----------
        name, title : str
            The train's slug and title.
        config_json : str
            The validated config as JSON (``TrainConfig.model_dump_json()``).
        source_text : str
            The config as posted (TOML or JSON text).

        Returns
        -------
        TrainRecord
            The stored train, version 1.

        Raises
        ------
        TrainExists
            A train of that name is stored, active or retired.
        """
        now = self._clock()
        try:
            with self._write() as conn:
                train_id = conn.execute(
                    self._insert(_Train)
                    .values(
                        name=name, title=title, created_at=now, retired_at=None, current_version=1
                    )
                    .returning(_Train.id)
                ).scalar_one()
                conn.execute(
                    self._insert(_TrainVersion).values(
                        train_id=train_id,
                        version=1,
                        config_json=config_json,
                        source_text=source_text,
                        created_at=now,
                    )
                )
        except IntegrityError:
            raise TrainExists(f"a train named {name!r} is already stored") from None
        return TrainRecord(train_id, name, title, 1, config_json, source_text, _utc_now(now), None)

    @_guarded
    def add_train_version(self, name: str, config_json: str, source_text: str) -> int:
        """Store a new config version of an active train and make it current.

        Returns
        -------
        int
            The new version number.

        Raises
        ------
        TrainNotFound
            No active train of that name.
        """
        now = self._clock()
        with self._write() as conn:
            # One UPDATE picks the next number and locks the train row, so two
            # concurrent changes get consecutive versions instead of a clash.
            row = conn.execute(
                update(_Train)
                .where(_Train.name == name, _Train.retired_at.is_(None))
                .values(current_version=_Train.current_version + 1)
                .returning(_Train.id, _Train.current_version)
            ).one_or_none()
            if row is None:
                raise TrainNotFound(f"no active train named {name!r}")
            train_id, version = row
            conn.execute(
                self._insert(_TrainVersion).values(
                    train_id=train_id,
                    version=version,
                    config_json=config_json,
                    source_text=source_text,
                    created_at=now,
                )
            )
        return int(version)

    def _train_select(self) -> Any:
        return select(
            _Train.id,
            _Train.name,
            _Train.title,
            _Train.current_version,
            _TrainVersion.config_json,
            _TrainVersion.source_text,
            _Train.created_at,
            _Train.retired_at,
        ).join(
            _TrainVersion,
            (_TrainVersion.train_id == _Train.id)
            & (_TrainVersion.version == _Train.current_version),
        )

    @_guarded
    def get_train(self, name: str) -> TrainRecord | None:
        """Return the train of that name (active or retired), or None."""
        with self._read() as conn:
            row = conn.execute(self._train_select().where(_Train.name == name)).one_or_none()
        return None if row is None else _train_record(row)

    @_guarded
    def list_trains(self, include_retired: bool = False) -> list[TrainRecord]:
        """Return the active trains (and retired ones if asked), by name."""
        query = self._train_select().order_by(_Train.name)
        if not include_retired:
            query = query.where(_Train.retired_at.is_(None))
        with self._read() as conn:
            return [_train_record(row) for row in conn.execute(query)]

    @_guarded
    def retire_train(self, name: str) -> None:
        """Mark a train retired; its history stays. Retiring again keeps the first time.

        Raises
        ------
        TrainNotFound
            No train of that name.
        """
        now = self._clock()
        with self._write() as conn:
            result = conn.execute(
                update(_Train)
                .where(_Train.name == name)
                .values(retired_at=func.coalesce(_Train.retired_at, now))
            )
            if result.rowcount == 0:
                raise TrainNotFound(f"no train named {name!r}")

    @_guarded
    def train_versions(self, name: str) -> list[TrainVersion]:
        """Return every config version of a train, oldest first.

        Raises
        ------
        TrainNotFound
            No train of that name.
        """
        with self._read() as conn:
            train_id = conn.execute(
                select(_Train.id).where(_Train.name == name)
            ).scalar_one_or_none()
            if train_id is None:
                raise TrainNotFound(f"no train named {name!r}")
            rows = conn.execute(
                select(
                    _TrainVersion.version,
                    _TrainVersion.config_json,
                    _TrainVersion.source_text,
                    _TrainVersion.created_at,
                )
                .where(_TrainVersion.train_id == train_id)
                .order_by(_TrainVersion.version)
            ).all()
        return [TrainVersion(v, c, s, _utc_now(t)) for v, c, s, t in rows]

    # ------------------------------------------------------------------ journal

    def append_readings(
        self,
        train_id: int,
        rows: Sequence[tuple[str, float, float, int | None]],
        received_at: float,
    ) -> AppendResult:
        """Journal a batch of readings given as rows (tag, time, value, quality).

        :meth:`append_columns` with the batch as rows: the same parameters (but
        ``rows``), result, errors and durability.
        """
        if not rows:
            return AppendResult((), (), (), (), ())
        tags, times, values, qualities = zip(*rows, strict=True)
        return self.append_columns(train_id, tags, times, values, qualities, received_at)

    @_guarded
    def append_columns(
        self,
        train_id: int,
        tags: Sequence[str],
        times: Sequence[float] | FloatArray,
        values: Sequence[float] | FloatArray,
        qualities: Sequence[int | None] | None,
        received_at: float,
    ) -> AppendResult:
        """Journal a batch of readings given as columns; committed when this returns.

        Parameters
        ----------
        train_id : int
            The train's id.
        tags : sequence of str, length k
            Tag of each reading.
        times : sequence or ndarray of float, length k
            Reading time [s since the epoch].
        values : sequence or ndarray of float, length k
            Value in the tag's declared unit.
        qualities : sequence of int or None, length k; or None
            Source quality code of each reading (-32768..32767) or None; None for
            the whole column when no reading has one.
        received_at : float
            When the batch arrived [s since the epoch].

        Returns
        -------
        AppendResult
            Which rows are new (with their journal ids), which repeat a stored
            reading exactly, and which conflict with a stored value.

        Raises
        ------
        ValueError
            A time or value is not finite, or a quality does not fit in 16 bits.
        TrainNotFound
            No train has that id.

        Notes
        -----
        One INSERT ... ON CONFLICT DO NOTHING RETURNING for the whole batch (on
        SQLite a multi-row VALUES written as driver SQL, in statements of at most
        :data:`_SQLITE_APPEND_ROWS` rows; on PostgreSQL a SELECT from ``unnest`` of
        one array per column, a short statement the driver need not parse at
        length); only when some rows were not inserted does a second statement read
        the stored values to tell duplicates from conflicts. Journal ids increase
        but may skip numbers (a refused insert can use one up). On PostgreSQL
        appends to one train are serialised by an advisory lock, so journal ids
        become visible in increasing order and a reader never skips an id
        committed later.
        """
        n = len(tags)
        if not n:
            return AppendResult((), (), (), (), ())
        t_array = np.asarray(times, dtype=np.float64)
        v_array = np.asarray(values, dtype=np.float64)
        if t_array.shape != (n,) or v_array.shape != (n,):
            raise ValueError(f"times and values must have one entry per tag ({n})")
        finite = np.isfinite(t_array) & np.isfinite(v_array)
        if not finite.all():
            position = int(np.argmin(finite))
            raise ValueError(
                f"reading {position} ({tags[position]!r}): time and value must be finite, "
                f"got time {float(t_array[position])!r}, value {float(v_array[position])!r}"
            )
        quality_column: list[int | None]
        if qualities is None:
            quality_column = [None] * n
        else:
            quality_column = list(qualities)
            if len(quality_column) != n:
                raise ValueError(f"qualities must have one entry per tag ({n})")
            for position, quality in enumerate(quality_column):
                if quality is not None and not _SMALLINT[0] <= quality <= _SMALLINT[1]:
                    raise ValueError(
                        f"reading {position} ({tags[position]!r}): quality must be "
                        f"-32768..32767, got {quality}"
                    )
        tag_list = list(tags)
        time_list: list[float] = t_array.tolist()
        value_list: list[float] = v_array.tolist()
        keys = list(zip(tag_list, time_list, strict=True))
        # The first position of each (tag, time): later ones overwrite earlier ones.
        first = dict(zip(reversed(keys), range(n - 1, -1, -1), strict=True))
        stored: dict[tuple[str, float], float] = {}
        try:
            if self._postgresql:
                with self._write() as conn:
                    conn.execute(select(func.pg_advisory_xact_lock(_JOURNAL_LOCK_SPACE, train_id)))
                    inserted: Sequence[Any] = conn.execute(
                        _PG_APPEND,
                        {
                            "train_id": train_id,
                            "received_at": float(received_at),
                            "tags": tag_list,
                            "times": time_list,
                            "values": value_list,
                            "qualities": quality_column,
                        },
                    ).all()
                    new = {first[(tag, t)]: int(journal_id) for journal_id, tag, t in inserted}
                    if len(new) < n:
                        missed = [i for i in range(n) if i not in new]
                        stored = self._stored_values(
                            conn,
                            train_id,
                            [tag_list[i] for i in missed],
                            [time_list[i] for i in missed],
                        )
            else:
                with self._sqlite_write() as driver:
                    inserted = _sqlite_append(
                        driver,
                        train_id,
                        float(received_at),
                        zip(tag_list, time_list, value_list, quality_column, strict=True),
                        n,
                    )
                    new = {first[(tag, t)]: int(journal_id) for journal_id, tag, t in inserted}
                    if len(new) < n:
                        missed = [i for i in range(n) if i not in new]
                        stored = _sqlite_stored_values(
                            driver,
                            train_id,
                            [tag_list[i] for i in missed],
                            [time_list[i] for i in missed],
                        )
        except IntegrityError as exc:
            if "foreign key" in str(exc.orig).lower():
                raise TrainNotFound(f"no train with id {train_id}") from None
            raise
        positions = sorted(new)
        duplicates: list[int] = []
        conflicts: list[int] = []
        conflicting: list[float] = []
        if len(new) < n:
            for position, key in enumerate(keys):
                if position in new:
                    continue
                value = stored[key]
                if value == value_list[position]:
                    duplicates.append(position)
                else:
                    conflicts.append(position)
                    conflicting.append(value)
        return AppendResult(
            tuple(positions),
            tuple(new[i] for i in positions),
            tuple(duplicates),
            tuple(conflicts),
            tuple(conflicting),
        )

    def _stored_values(
        self, conn: Connection, train_id: int, tags: list[str], times: list[float]
    ) -> dict[tuple[str, float], float]:
        """Return the stored value of each (tag, time) key that has one (PostgreSQL)."""
        rows = conn.execute(_PG_STORED, {"train_id": train_id, "tags": tags, "times": times}).all()
        return {(tag, t): value for tag, t, value in rows}

    def readings_after(
        self, train_id: int, journal_seq: int, *, batch_size: int = 10_000
    ) -> Iterator[ReadingBatch]:
        """Yield the journal after ``journal_seq`` in journal order, in batches.

        Parameters
        ----------
        train_id : int
            The train's id.
        journal_seq : int
            Last journal id already applied (0 for the whole journal).
        batch_size : int, optional
            Most readings per batch.

        Yields
        ------
        ReadingBatch
            (ids, tags, times, values) columns; every batch is non-empty.

        Notes
        -----
        Each batch is read in its own short transaction (keyset paging on the
        journal id), so a long replay holds no snapshot open and sees readings
        appended while it runs.
        """
        if batch_size < 1:
            raise ValueError(f"batch_size must be at least 1, got {batch_size}")
        after = journal_seq
        while True:
            rows = self._journal_page(train_id, after, batch_size)
            if not rows:
                return
            ids, tags, times, values = zip(*rows, strict=True)
            yield ReadingBatch(
                np.array(ids, dtype=np.int64),
                list(tags),
                np.array(times, dtype=np.float64),
                np.array(values, dtype=np.float64),
            )
            if len(rows) < batch_size:
                return
            after = int(ids[-1])

    @_guarded
    @_guarded
    def readings_between(
        self,
        train_id: int,
        tags: Sequence[str],
        start: float,
        stop: float,
        *,
        upto: int,
    ) -> tuple[list[str], np.ndarray, np.ndarray]:
        """Journaled readings of ``tags`` with start <= time <= stop, up to journal id ``upto``.

        What a train's filter reads back when a late reading needs events older than
        the ones it keeps in memory; ``upto`` (the last journal id applied) leaves out
        the batch being applied. Returns (tags, times [s], values in the tag's
        declared unit), in no particular order.
        """
        with self._read() as conn:
            rows = conn.execute(
                select(_Reading.tag, _Reading.time, _Reading.value).where(
                    _Reading.train_id == train_id,
                    _Reading.tag.in_(list(tags)),
                    _Reading.time >= start,
                    _Reading.time <= stop,
                    # "id + 0": a bare id bound let SQLite walk the train's whole
                    # journal on (train_id, id) instead of each tag's time range on
                    # (train_id, tag, time), a cost that grew with the journal.
                    _Reading.id + 0 <= upto,
                )
            ).all()
        return (
            [r[0] for r in rows],
            np.array([r[1] for r in rows], dtype=np.float64),
            np.array([r[2] for r in rows], dtype=np.float64),
        )

    def _journal_page(
        self, train_id: int, after: int, limit: int
    ) -> Sequence[tuple[int, str, float, float]]:
        with self._read() as conn:
            rows = conn.execute(
                select(_Reading.id, _Reading.tag, _Reading.time, _Reading.value)
                .where(_Reading.train_id == train_id, _Reading.id > after)
                .order_by(_Reading.id)
                .limit(limit)
            ).all()
        return [(r[0], r[1], r[2], r[3]) for r in rows]

    # ------------------------------------------------------------------ estimates

    @_guarded
    def write_estimates(
        self,
        train_id: int,
        rows: Sequence[Mapping[str, Any]],
        *,
        replace: tuple[float, float] | None = None,
    ) -> int:
        """Store estimate rows, replacing any stored row at the same time.

        Parameters
        ----------
        train_id : int
            The train's id.
        rows : sequence of mapping
            JSON-ready rows, each with its time under ``"t"`` [s since the epoch];
            the rest is stored as given. Within the batch the last row at a time
            wins.
        replace : (float, float), optional
            A time span [s] whose stored rows the new ones replace: every stored row
            with start <= time <= stop is deleted in the same transaction (the
            service keeps one row per interval, and a revision supersedes them).

        Returns
        -------
        int
            Rows written.

        Raises
        ------
        ValueError
            A row has no finite ``"t"``, or holds NaN, infinity or something JSON
            cannot encode (no NaN is ever stored).
        """
        by_time: dict[float, str] = {}
        for k, row in enumerate(rows):
            t = row.get("t")
            if not isinstance(t, int | float) or not math.isfinite(t):
                raise ValueError(f"estimate row {k}: 't' must be a finite time [s], got {t!r}")
            try:
                by_time[float(t)] = json.dumps(row, separators=(",", ":"), allow_nan=False)
            except (TypeError, ValueError) as exc:
                raise ValueError(f"estimate row {k} (t = {t!r}): {exc}") from None
        if not by_time:
            return 0
        params = [{"train_id": train_id, "time": t, "payload": p} for t, p in by_time.items()]
        with self._write() as conn:
            if replace is not None:
                span = {"train_id": train_id, "start": replace[0], "stop": replace[1]}
                conn.execute(_ESTIMATES_DELETE, span)
            conn.execute(_ESTIMATES_UPSERT, params)
        return len(params)

    @_guarded
    def read_estimates(
        self,
        train_id: int,
        start: float | None = None,
        end: float | None = None,
        every: float | None = None,
    ) -> list[dict[str, Any]]:
        """Return stored estimate rows with start <= time < end, oldest first.

        Parameters
        ----------
        train_id : int
            The train's id.
        start, end : float or None
            Range [s since the epoch]; None leaves that side open.
        every : float or None
            Downsampling interval [s]: only the last row in each interval
            [n * every, (n + 1) * every) is returned, intervals counted from the
            epoch so that they do not move with ``start``. None returns every row.

        Returns
        -------
        list of dict
            The rows as written by :meth:`write_estimates`.
        """
        where = [_Estimate.train_id == train_id, *_time_range(_Estimate.time, start, end)]
        if every is None:
            query = select(_Estimate.payload).where(*where).order_by(_Estimate.time)
        else:
            if not (math.isfinite(every) and every > 0):
                raise ValueError(f"every must be a positive interval [s], got {every!r}")
            bucket = self._floor(_Estimate.time / every)
            last = (
                select(func.max(_Estimate.time).label("time"))
                .where(*where)
                .group_by(bucket)
                .subquery()
            )
            query = (
                select(_Estimate.payload)
                .join(last, _Estimate.time == last.c.time)
                .where(_Estimate.train_id == train_id)
                .order_by(_Estimate.time)
            )
        with self._read() as conn:
            payloads = conn.execute(query).scalars().all()
        return [json.loads(p) for p in payloads]

    def _floor(self, x: ColumnElement[float]) -> ColumnElement[Any]:
        # SQLAlchemy gives SQLite floor() as a Python function, called per row; the
        # cast (toward zero) corrected for negative values is native and the same.
        if self._postgresql:
            return func.floor(x)
        truncated = cast(x, Integer)
        return truncated - case((x < truncated, 1), else_=0)

    @_guarded
    def latest_estimate(self, train_id: int) -> dict[str, Any] | None:
        """Return the newest estimate row of a train, or None when it has none."""
        with self._read() as conn:
            payload = conn.execute(
                select(_Estimate.payload)
                .where(_Estimate.train_id == train_id)
                .order_by(_Estimate.time.desc())
                .limit(1)
            ).scalar_one_or_none()
        return None if payload is None else dict(json.loads(payload))

    # ------------------------------------------------------------------ gated readings

    @_guarded
    def upsert_gated(self, train_id: int, records: Sequence[Mapping[str, Any]]) -> int:
        """Store gated readings; one already stored (same tag, sample time, value) is updated.

        Parameters
        ----------
        train_id : int
            The train's id.
        records : sequence of mapping
            Each with the keys of :class:`GatedRow`; ``decision`` is ``"gated"`` or
            ``"step"``. A reading re-run after a rewind comes back with its current
            decision, reason and NIS, which replace the stored ones.

        Returns
        -------
        int
            Records written.

        Raises
        ------
        ValueError
            A record lacks a key or has an unknown decision.
        """
        by_key: dict[tuple[str, float, float], dict[str, Any]] = {}
        for k, record in enumerate(records):
            missing = [name for name in _GATED_FIELDS if name not in record]
            if missing:
                raise ValueError(f"gated record {k}: missing {', '.join(missing)}")
            if record["decision"] not in _DECISIONS:
                raise ValueError(
                    f"gated record {k}: decision must be 'gated' or 'step', "
                    f"got {record['decision']!r}"
                )
            row = {name: record[name] for name in _GATED_FIELDS}
            row["train_id"] = train_id
            by_key[(row["tag"], float(row["sample_time"]), float(row["value"]))] = row
        if not by_key:
            return 0
        insert = self._insert(_Gated)
        changed = ("time", "predicted", "unit", "nis", "reason", "decision")
        statement = insert.on_conflict_do_update(
            index_elements=["train_id", "tag", "sample_time", "value"],
            set_={name: insert.excluded[name] for name in changed},
        )
        with self._write() as conn:
            conn.execute(statement, list(by_key.values()))
        return len(by_key)

    @_guarded
    def read_gated(
        self, train_id: int, start: float | None = None, end: float | None = None
    ) -> list[GatedRow]:
        """Return gated readings with start <= sample time < end, oldest sample first.

        Parameters
        ----------
        train_id : int
            The train's id.
        start, end : float or None
            Range of sample times [s since the epoch]; None leaves that side open.
        """
        query = (
            select(*(getattr(_Gated, name) for name in _GATED_FIELDS))
            .where(_Gated.train_id == train_id, *_time_range(_Gated.sample_time, start, end))
            .order_by(_Gated.sample_time, _Gated.tag, _Gated.id)
        )
        with self._read() as conn:
            rows = conn.execute(query).all()
        return [
            GatedRow(
                tag=r[0],
                time=r[1],
                sample_time=r[2],
                value=r[3],
                predicted=r[4],
                unit=r[5],
                nis=r[6],
                reason=r[7],
                decision=r[8],
            )
            for r in rows
        ]

    # ------------------------------------------------------------------ alert events

    @_guarded
    def append_alert_events(self, train_id: int, events: Sequence[AlertEvent]) -> int:
        """Store alert events; an event already stored (same train and sequence) stays.

        Parameters
        ----------
        train_id : int
            The train's id.
        events : sequence of AlertEvent
            Transitions as the alert engine logged them; ``sequence`` numbers them
            within the train. A journal replayed after a crash logs the same
            events again: they are not stored twice, and the stored ones (those
            that were announced) are kept.

        Returns
        -------
        int
            Events stored now.
        """
        with self._write() as conn:
            return self._insert_alert_events(conn, train_id, events)

    def _insert_alert_events(
        self, conn: Connection, train_id: int, events: Sequence[AlertEvent]
    ) -> int:
        rows: dict[int, dict[str, Any]] = {}
        for item in events:
            rows.setdefault(int(item.sequence), _alert_event_row(train_id, item))
        if not rows:
            return 0
        statement = (
            self._insert(_AlertEvent)
            .on_conflict_do_nothing(index_elements=["train_id", "seq"])
            .returning(_AlertEvent.seq)
        )
        return len(conn.execute(statement, list(rows.values())).all())

    @_guarded
    def read_alert_events(
        self,
        train_id: int,
        start: float | None = None,
        end: float | None = None,
        alert_id: str | None = None,
    ) -> list[AlertEvent]:
        """Return alert events with start <= time < end, in sequence order.

        Parameters
        ----------
        train_id : int
            The train's id.
        start, end : float or None
            Range of event times [s since the epoch]; None leaves that side open.
        alert_id : str or None
            Only this alert's events (``"<rule>:<subject>"``); None for every alert.
        """
        where = [_AlertEvent.train_id == train_id, *_time_range(_AlertEvent.time, start, end)]
        if alert_id is not None:
            where.append(_AlertEvent.alert_id == alert_id)
        query = select(*(getattr(_AlertEvent, name) for name in _ALERT_COLUMNS)).where(*where)
        with self._read() as conn:
            rows = conn.execute(query.order_by(_AlertEvent.seq)).all()
        return [AlertEvent(*row) for row in rows]

    @_guarded
    def last_alert_sequence(self, train_id: int) -> int:
        """Return the highest stored alert event sequence of a train (0 when none)."""
        with self._read() as conn:
            seq = conn.execute(
                select(func.max(_AlertEvent.seq)).where(_AlertEvent.train_id == train_id)
            ).scalar_one_or_none()
        return 0 if seq is None else int(seq)

    # ------------------------------------------------------------------ checkpoints

    @_guarded
    def save_checkpoint(
        self,
        train_id: int,
        journal_seq: int,
        data: bytes,
        alert_events: Sequence[AlertEvent] = (),
    ) -> None:
        """Store a session checkpoint and drop all but the newest three of the train.

        Parameters
        ----------
        train_id : int
            The train's id.
        journal_seq : int
            The last journal id the checkpoint includes.
        data : bytes
            ``TrainSession.checkpoint()``.
        alert_events : sequence of AlertEvent, optional
            Alert events to store in the same transaction (as
            :meth:`append_alert_events`): an operator's action and the state that
            holds it become durable together, or not at all.
        """
        with self._write() as conn:
            self._insert_alert_events(conn, train_id, alert_events)
            conn.execute(
                self._insert(_Checkpoint).values(
                    train_id=train_id,
                    journal_seq=journal_seq,
                    created_at=self._clock(),
                    data=bytes(data),
                )
            )
            kept = (
                select(_Checkpoint.id)
                .where(_Checkpoint.train_id == train_id)
                .order_by(_Checkpoint.journal_seq.desc(), _Checkpoint.id.desc())
                .limit(CHECKPOINTS_KEPT)
            )
            conn.execute(
                delete(_Checkpoint).where(
                    _Checkpoint.train_id == train_id, _Checkpoint.id.not_in(kept.scalar_subquery())
                )
            )

    @_guarded
    def latest_checkpoint(self, train_id: int) -> Checkpoint | None:
        """Return the checkpoint with the highest journal id, or None when there is none."""
        with self._read() as conn:
            row = conn.execute(
                select(_Checkpoint.journal_seq, _Checkpoint.data)
                .where(_Checkpoint.train_id == train_id)
                .order_by(_Checkpoint.journal_seq.desc(), _Checkpoint.id.desc())
                .limit(1)
            ).one_or_none()
        return None if row is None else Checkpoint(int(row[0]), bytes(row[1]))

    # ------------------------------------------------------------------ retention

    @_guarded
    def prune(
        self,
        train_id: int,
        readings_before: float | None = None,
        estimates_before: float | None = None,
    ) -> PruneCounts:
        """Delete old history of a train.

        Parameters
        ----------
        train_id : int
            The train's id.
        readings_before : float or None
            Delete journal readings with time < this [s since the epoch], but only
            those the latest checkpoint includes (journal id <= its journal_seq):
            the readings a restart replays are never deleted. With no checkpoint no
            reading is deleted. None keeps every reading.
        estimates_before : float or None
            Delete estimates with time < this, and gated readings with sample
            time < this [s since the epoch]. None keeps them.

        Returns
        -------
        PruneCounts
            Rows deleted per table.
        """
        readings = estimates = gated = 0
        with self._write() as conn:
            if readings_before is not None:
                seq = conn.execute(
                    select(func.max(_Checkpoint.journal_seq)).where(
                        _Checkpoint.train_id == train_id
                    )
                ).scalar_one_or_none()
                if seq is not None:
                    readings = conn.execute(
                        delete(_Reading).where(
                            _Reading.train_id == train_id,
                            _Reading.id <= seq,
                            _Reading.time < readings_before,
                        )
                    ).rowcount
            if estimates_before is not None:
                estimates = conn.execute(
                    delete(_Estimate).where(
                        _Estimate.train_id == train_id, _Estimate.time < estimates_before
                    )
                ).rowcount
                gated = conn.execute(
                    delete(_Gated).where(
                        _Gated.train_id == train_id, _Gated.sample_time < estimates_before
                    )
                ).rowcount
        return PruneCounts(readings, estimates, gated)

    # ------------------------------------------------------------------ API keys

    @_guarded
    def add_api_key(self, name: str, role: str, key_hash: str) -> int:
        """Store a key's hash under a name and role; return the key's id.

        Raises
        ------
        ValueError
            A key with that hash is already stored.
        """
        try:
            with self._write() as conn:
                key_id = conn.execute(
                    self._insert(_ApiKey)
                    .values(
                        name=name,
                        role=role,
                        key_hash=key_hash,
                        created_at=self._clock(),
                        revoked_at=None,
                    )
                    .returning(_ApiKey.id)
                ).scalar_one()
        except IntegrityError:
            raise ValueError("an API key with this hash is already stored") from None
        return int(key_id)

    @_guarded
    def find_api_key_by_hash(self, key_hash: str) -> ApiKeyRecord | None:
        """Return the key with this hash, revoked or not; None when there is none."""
        with self._read() as conn:
            row = conn.execute(_api_key_select().where(_ApiKey.key_hash == key_hash)).one_or_none()
        return None if row is None else _api_key_record(row)

    @_guarded
    def revoke_api_key(self, key_id_or_name: int | str) -> bool:
        """Revoke a key by id, or every valid key of a name; False when none was valid."""
        match = (
            _ApiKey.id == key_id_or_name
            if isinstance(key_id_or_name, int)
            else (_ApiKey.name == key_id_or_name)
        )
        with self._write() as conn:
            result = conn.execute(
                update(_ApiKey)
                .where(match, _ApiKey.revoked_at.is_(None))
                .values(revoked_at=self._clock())
            )
        return result.rowcount > 0

    @_guarded
    def list_api_keys(self) -> list[ApiKeyRecord]:
        """Return every key, revoked ones included, by id."""
        with self._read() as conn:
            return [
                _api_key_record(r) for r in conn.execute(_api_key_select().order_by(_ApiKey.id))
            ]


# ---------------------------------------------------------------------------- helpers


def _utc_now(seconds: float) -> datetime:
    return datetime.fromtimestamp(seconds, UTC)


def _train_record(row: Any) -> TrainRecord:
    train_id, name, title, version, config_json, source_text, created, retired = row
    return TrainRecord(
        train_id, name, title, version, config_json, source_text, _utc_now(created), _utc(retired)
    )


def _alert_event_row(train_id: int, item: AlertEvent) -> dict[str, Any]:
    """Return an alert event as a row of ``alert_events`` (non-finite figures as NULL)."""
    data = item.to_dict()
    if not math.isfinite(float(data["time"])):
        raise ValueError(f"alert event {item.sequence}: time must be finite, got {item.time!r}")
    row = {name: data[name] for name in _ALERT_COLUMNS if name != "seq"}
    row["seq"] = int(data["sequence"])
    row["train_id"] = train_id
    return row


def _api_key_select() -> Any:
    return select(
        _ApiKey.id,
        _ApiKey.name,
        _ApiKey.role,
        _ApiKey.key_hash,
        _ApiKey.created_at,
        _ApiKey.revoked_at,
    )


def _api_key_record(row: Any) -> ApiKeyRecord:
    key_id, name, role, key_hash, created, revoked = row
    return ApiKeyRecord(key_id, name, role, key_hash, _utc_now(created), _utc(revoked))


def _time_range(column: Any, start: float | None, end: float | None) -> list[ColumnElement[bool]]:
    where: list[ColumnElement[bool]] = []
    if start is not None:
        where.append(column >= start)
    if end is not None:
        where.append(column < end)
    return where


def _sqlite_engine(url: URL, timeout: float, synchronous: str) -> Engine:
    # LIFO: the ingest path takes back the connection it used last, whose page cache
    # holds the journal's hot pages, rather than cycling through every pooled one
    # (each warming a cache of its own).
    engine = create_engine(
        url,
        connect_args={"timeout": timeout, "check_same_thread": False},
        pool_timeout=timeout,
        pool_use_lifo=True,
    )
    busy_ms = int(timeout * 1000)

    @event.listens_for(engine, "connect")
    def _configure(dbapi_connection: Any, _record: Any) -> None:
        # The driver's own transaction handling would BEGIN only before DML and
        # never IMMEDIATE; the "begin" hook below takes over.
        dbapi_connection.isolation_level = None
        cursor = dbapi_connection.cursor()
        try:
            cursor.execute(f"PRAGMA busy_timeout = {busy_ms}")
            cursor.execute("PRAGMA journal_mode = WAL")
            cursor.execute(f"PRAGMA synchronous = {synchronous}")
            cursor.execute("PRAGMA foreign_keys = ON")
        finally:
            cursor.close()

    @event.listens_for(engine, "begin")
    def _begin(conn: Connection) -> None:
        # A writer takes the write lock at BEGIN, waiting up to the busy timeout;
        # a deferred BEGIN that upgrades later can fail at once with "locked"
        # whatever the timeout. Readers stay deferred and never block in WAL.
        immediate = conn.get_execution_options().get(_WRITE, False)
        _driver_execute(
            conn.connection.driver_connection, "BEGIN IMMEDIATE" if immediate else "BEGIN"
        )

    return engine


def _postgresql_engine(url: URL, timeout: float) -> Engine:
    if url.drivername == "postgresql":
        url = url.set(drivername="postgresql+psycopg")
    return create_engine(
        url,
        pool_pre_ping=True,
        pool_timeout=timeout,
        connect_args={
            "connect_timeout": max(1, math.ceil(timeout)),
            "options": f"-c lock_timeout={int(timeout * 1000)}",
        },
    )
