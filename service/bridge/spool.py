"""The local spool: every reading is committed here before it is posted.

One SQLite file (WAL, ``synchronous=FULL``: a commit survives a crash of the
process and of the machine) holds each reading with its state:

- ``pending``: waiting to be posted;
- ``sent``: the service took it (new or, after a restart, as a duplicate);
- ``refused``: the service refused it; the reason is kept;
- ``withheld``: never posted, with the reason (a bad quality, no value).

A reading is stored once: (train, tag, time, value) is unique, so a file read
again after a crash, or an OPC UA value polled twice with the same source
timestamp, adds nothing. Posting is at least once -- a bridge killed between a
post and its bookkeeping posts the batch again -- and the service's idempotent
ingest (the same reading twice is stored once, counted as a duplicate) makes
that exactly once as far as the service can tell.

The spool holds at most ``max_readings`` pending readings. Settled ones stay
for ``keep_sent`` (for inspection) or until their room is needed. Above
``warn_fraction`` of the limit it logs a warning; at the limit it refuses new
batches whole (:class:`~service.bridge.sources.SpoolFull`). Only one bridge may
use a spool at a time (an exclusive lock on ``<spool>.lock``).
"""

from __future__ import annotations

import fcntl
import logging
import os
import sqlite3
import time
from collections.abc import Sequence
from dataclasses import dataclass
from pathlib import Path
from typing import Any

from service.bridge.sources import SpoolFull

__all__ = ["AddResult", "Pending", "Spool", "SpoolCounts", "SpoolEntry", "SpoolLocked"]

log = logging.getLogger("stagewatch.bridge.spool")

_SCHEMA = """
CREATE TABLE IF NOT EXISTS readings (
    id INTEGER PRIMARY KEY,
    train TEXT NOT NULL,
    tag TEXT NOT NULL,
    time REAL NOT NULL,
    value REAL,
    quality INTEGER,
    status TEXT NOT NULL DEFAULT '',
    source TEXT NOT NULL,
    source_tag TEXT NOT NULL,
    read_at REAL NOT NULL,
    state TEXT NOT NULL,
    reason TEXT,
    settled_at REAL
);
CREATE UNIQUE INDEX IF NOT EXISTS readings_once
    ON readings (train, tag, time, ifnull(value, 'none'));
CREATE INDEX IF NOT EXISTS readings_by_state ON readings (state, train, id);
CREATE INDEX IF NOT EXISTS readings_settled ON readings (settled_at) WHERE state != 'pending';
CREATE TABLE IF NOT EXISTS batches (
    id INTEGER PRIMARY KEY,
    train TEXT NOT NULL,
    size INTEGER NOT NULL,
    accepted INTEGER NOT NULL,
    duplicates INTEGER NOT NULL,
    refused INTEGER NOT NULL,
    posted_at REAL NOT NULL
);
CREATE TABLE IF NOT EXISTS meta (key TEXT PRIMARY KEY, value TEXT NOT NULL);
"""
_INSERT = (
    "INSERT OR IGNORE INTO readings (train, tag, time, value, quality, status, source, "
    "source_tag, read_at, state, reason, settled_at) VALUES (?, ?, ?, ?, ?, ?, ?, ?, ?, ?, ?, ?)"
)


class SpoolLocked(RuntimeError):
    """Another bridge holds the spool."""


@dataclass(frozen=True, slots=True)
class SpoolEntry:
    """A reading mapped onto a train, ready to be spooled.

    Attributes
    ----------
    train, tag : str
        Where it goes.
    time : float
        Sample time, epoch seconds [s].
    value : float or None
        In the train tag's unit; None when the source gave none.
    quality : int or None
        Quality byte 0-255.
    status : str
        The source's word for the quality.
    source, source_tag : str
        Where it came from.
    withhold : str or None
        Why it must not be posted (stored as ``withheld``), or None.
    """

    train: str
    tag: str
    time: float
    value: float | None
    quality: int | None
    status: str
    source: str
    source_tag: str
    withhold: str | None = None


@dataclass(frozen=True, slots=True)
class Pending:
    """A spooled reading waiting to be posted (value in the train tag's unit)."""

    id: int
    tag: str
    time: float
    value: float
    quality: int | None


@dataclass(frozen=True, slots=True)
class AddResult:
    """What :meth:`Spool.add` did: new pending rows, repeats ignored, rows withheld."""

    spooled: int
    duplicates: int
    withheld: int


@dataclass(frozen=True, slots=True)
class SpoolCounts:
    """Rows in the spool by state."""

    pending: int
    sent: int
    refused: int
    withheld: int

    @property
    def total(self) -> int:
        """Every row held."""
        return self.pending + self.sent + self.refused + self.withheld


class Spool:
    """The bridge's store and forward queue (see the module notes).

    Parameters
    ----------
    path : Path
        The SQLite file; its folder is created if missing.
    max_readings : int
        Most pending readings.
    warn_fraction : float
        Fill share above which it warns [-].
    keep_sent : float
        How long settled rows are kept [s].

    Raises
    ------
    SpoolLocked
        Another process holds the spool.
    """

    def __init__(
        self,
        path: Path,
        max_readings: int = 1_000_000,
        warn_fraction: float = 0.8,
        keep_sent: float = 86_400.0,
    ) -> None:
        self.path = path
        self.max_readings = max_readings
        self.warn_fraction = warn_fraction
        self.keep_sent = keep_sent
        path.parent.mkdir(parents=True, exist_ok=True)
        self._lock_fd = os.open(f"{path}.lock", os.O_RDWR | os.O_CREAT, 0o600)
        try:
            fcntl.flock(self._lock_fd, fcntl.LOCK_EX | fcntl.LOCK_NB)
        except BlockingIOError:
            os.close(self._lock_fd)
            raise SpoolLocked(f"another bridge is using the spool {path}") from None
        self._db = sqlite3.connect(path, isolation_level=None)
        self._db.execute("PRAGMA journal_mode=WAL")
        self._db.execute("PRAGMA synchronous=FULL")
        self._db.execute("PRAGMA busy_timeout=5000")
        self._db.executescript(_SCHEMA)
        self._counts = self._count()
        self._pending = self._count_pending()
        self._warned = False

    # ------------------------------------------------------------------ state

    def _count(self) -> dict[str, int]:
        counts = dict.fromkeys(("pending", "sent", "refused", "withheld"), 0)
        for state, n in self._db.execute("SELECT state, count(*) FROM readings GROUP BY state"):
            counts[str(state)] = int(n)
        return counts

    def _count_pending(self) -> dict[str, int]:
        rows = self._db.execute(
            "SELECT train, count(*) FROM readings WHERE state = 'pending' GROUP BY train"
        )
        return {str(train): int(n) for train, n in rows}

    def counts(self) -> SpoolCounts:
        """Rows by state (kept in memory, exact)."""
        c = self._counts
        return SpoolCounts(c["pending"], c["sent"], c["refused"], c["withheld"])

    @property
    def fill(self) -> float:
        """Pending readings as a share of ``max_readings`` [-]."""
        return self._counts["pending"] / self.max_readings

    @property
    def filling(self) -> bool:
        """Whether the fill is at or above ``warn_fraction``."""
        return self.fill >= self.warn_fraction

    def oldest_pending_read_at(self) -> float | None:
        """When the oldest pending reading was read, epoch seconds [s]; None if none."""
        # Per train, the first pending row by id is its oldest (the index serves it).
        oldest: float | None = None
        for train in self.pending_trains():
            row = self._db.execute(
                "SELECT read_at FROM readings WHERE state = 'pending' AND train = ? "
                "ORDER BY id LIMIT 1",
                (train,),
            ).fetchone()
            if row is not None and (oldest is None or row[0] < oldest):
                oldest = float(row[0])
        return oldest

    # ------------------------------------------------------------------ writing

    def add(self, entries: Sequence[SpoolEntry], now: float | None = None) -> AddResult:
        """Commit a batch of readings, whole or not at all.

        Parameters
        ----------
        entries : sequence of SpoolEntry
            Readings mapped onto trains; those with ``withhold`` set are stored
            as ``withheld``.
        now : float, optional
            Read time to record, epoch seconds [s]; default the clock.

        Returns
        -------
        AddResult
            New pending rows, repeats of stored readings (ignored), withheld rows.

        Raises
        ------
        SpoolFull
            Not enough room for the batch's readings; nothing was written.
        """
        now = time.time() if now is None else now
        room = self.max_readings - self._counts["pending"]
        if len(entries) > room:
            raise SpoolFull(len(entries), max(room, 0), self.max_readings)
        excess = self.counts().total + len(entries) - self.max_readings
        if excess > 0:
            self._make_room(excess)
        post = [e for e in entries if e.withhold is None]
        held = [e for e in entries if e.withhold is not None]
        by_train: dict[str, list[SpoolEntry]] = {}
        for e in post:
            by_train.setdefault(e.train, []).append(e)
        added: dict[str, int] = {}
        cursor = self._db.cursor()
        cursor.execute("BEGIN IMMEDIATE")
        try:
            for train, group in by_train.items():
                cursor.executemany(_INSERT, [_row(e, now, "pending", None) for e in group])
                added[train] = max(cursor.rowcount, 0)
            cursor.executemany(_INSERT, [_row(e, now, "withheld", now) for e in held])
            withheld = max(cursor.rowcount, 0) if held else 0
            cursor.execute("COMMIT")
        except BaseException:
            cursor.execute("ROLLBACK")
            raise
        spooled = sum(added.values())
        for train, n in added.items():
            if n:
                self._pending[train] = self._pending.get(train, 0) + n
        self._counts["pending"] += spooled
        self._counts["withheld"] += withheld
        self._check_fill()
        return AddResult(spooled, len(entries) - spooled - withheld, withheld)

    def _make_room(self, rows: int) -> None:
        """Delete the oldest settled rows, sent ones first."""
        for state in ("sent", "withheld", "refused"):
            if rows <= 0:
                return
            cursor = self._db.execute(
                "DELETE FROM readings WHERE id IN (SELECT id FROM readings WHERE state = ? "
                "ORDER BY settled_at LIMIT ?)",
                (state, rows),
            )
            self._counts[state] -= cursor.rowcount
            rows -= cursor.rowcount

    def _check_fill(self) -> None:
        if self.filling and not self._warned:
            self._warned = True
            log.warning(
                "spool %.0f%% full: %d of %d readings wait for the service (%s)",
                100 * self.fill,
                self._counts["pending"],
                self.max_readings,
                self.path,
            )
        elif self._warned and self.fill < 0.9 * self.warn_fraction:
            self._warned = False
            log.info("spool back to %.0f%% full", 100 * self.fill)

    # ------------------------------------------------------------------ forwarding

    def pending_trains(self) -> list[str]:
        """Trains with pending readings, in name order."""
        return sorted(train for train, n in self._pending.items() if n > 0)

    def next_batch(self, train: str, limit: int) -> list[Pending]:
        """Return the oldest pending readings of one train, in spool order.

        Parameters
        ----------
        train : str
            The train.
        limit : int
            Most readings.

        Returns
        -------
        list of Pending
            Possibly empty.
        """
        rows = self._db.execute(
            "SELECT id, tag, time, value, quality FROM readings "
            "WHERE state = 'pending' AND train = ? ORDER BY id LIMIT ?",
            (train, limit),
        )
        return [Pending(int(i), str(t), float(s), float(v), q) for i, t, s, v, q in rows]

    def settle(
        self,
        train: str,
        sent: Sequence[int],
        refused: Sequence[tuple[int, str]],
        *,
        accepted: int,
        duplicates: int,
        now: float | None = None,
    ) -> None:
        """Record what the service did with a posted batch, in one transaction.

        Parameters
        ----------
        train : str
            The batch's train.
        sent : sequence of int
            Spool ids the service took (new or duplicate).
        refused : sequence of (int, str)
            Spool ids the service refused, with its reason.
        accepted, duplicates : int
            The service's counts for the batch (kept in ``batches``).
        now : float, optional
            Epoch seconds [s]; default the clock.
        """
        now = time.time() if now is None else now
        cursor = self._db.cursor()
        cursor.execute("BEGIN IMMEDIATE")
        try:
            cursor.executemany(
                "UPDATE readings SET state = 'sent', settled_at = ? "
                "WHERE id = ? AND state = 'pending'",
                [(now, i) for i in sent],
            )
            n_sent = max(cursor.rowcount, 0) if sent else 0
            cursor.executemany(
                "UPDATE readings SET state = 'refused', reason = ?, settled_at = ? "
                "WHERE id = ? AND state = 'pending'",
                [(reason, now, i) for i, reason in refused],
            )
            n_refused = max(cursor.rowcount, 0) if refused else 0
            cursor.execute(
                "INSERT INTO batches (train, size, accepted, duplicates, refused, posted_at) "
                "VALUES (?, ?, ?, ?, ?, ?)",
                (train, len(sent) + len(refused), accepted, duplicates, len(refused), now),
            )
            cursor.execute("COMMIT")
        except BaseException:
            cursor.execute("ROLLBACK")
            raise
        self._pending[train] = self._pending.get(train, 0) - n_sent - n_refused
        self._counts["pending"] -= n_sent + n_refused
        self._counts["sent"] += n_sent
        self._counts["refused"] += n_refused
        self._check_fill()

    def prune(self, now: float | None = None) -> int:
        """Delete settled rows older than ``keep_sent``; return how many."""
        now = time.time() if now is None else now
        cursor = self._db.execute(
            "DELETE FROM readings WHERE state != 'pending' AND settled_at < ?",
            (now - self.keep_sent,),
        )
        if cursor.rowcount:
            self._counts = self._count()
        return max(cursor.rowcount, 0)

    # ------------------------------------------------------------------ inspection

    def rows(self, state: str | None = None, train: str | None = None) -> list[dict[str, Any]]:
        """Spooled rows as dicts, in spool order, for inspection and tests.

        Parameters
        ----------
        state : str, optional
            Only rows in this state.
        train : str, optional
            Only rows of this train.

        Returns
        -------
        list of dict
            Keys: the columns of the ``readings`` table.
        """
        clauses, params = [], []
        if state is not None:
            clauses.append("state = ?")
            params.append(state)
        if train is not None:
            clauses.append("train = ?")
            params.append(train)
        where = f" WHERE {' AND '.join(clauses)}" if clauses else ""
        cursor = self._db.execute(f"SELECT * FROM readings{where} ORDER BY id", params)
        names = [d[0] for d in cursor.description]
        return [dict(zip(names, row, strict=True)) for row in cursor]

    def get_meta(self, key: str) -> str | None:
        """Return a stored bookkeeping value (write-back progress), or None."""
        row = self._db.execute("SELECT value FROM meta WHERE key = ?", (key,)).fetchone()
        return None if row is None else str(row[0])

    def set_meta(self, key: str, value: str) -> None:
        """Store a bookkeeping value (committed at once)."""
        self._db.execute(
            "INSERT INTO meta (key, value) VALUES (?, ?) "
            "ON CONFLICT (key) DO UPDATE SET value = excluded.value",
            (key, value),
        )

    def close(self) -> None:
        """Close the database and release the lock."""
        self._db.close()
        fcntl.flock(self._lock_fd, fcntl.LOCK_UN)
        os.close(self._lock_fd)


def _row(entry: SpoolEntry, now: float, state: str, settled_at: float | None) -> tuple[Any, ...]:
    return (
        entry.train,
        entry.tag,
        entry.time,
        entry.value,
        entry.quality,
        entry.status,
        entry.source,
        entry.source_tag,
        now,
        state,
        entry.withhold,
        settled_at,
    )
