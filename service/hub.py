"""The trains the service runs: one session each, fed from the journal.

The hub holds a :class:`~estimator.session.TrainSession` per train and carries a
posted batch through the one path that keeps the promise "no accepted reading is
lost": screen (unknown tag, not finite, out of range, too old, too far in the
future) -> journal (committed, idempotent) -> session -> estimates, gated readings
and alert events stored -> live subscribers and webhooks told. At start it restores
each train from its latest checkpoint and replays the journal after it, so a killed
service continues as if nothing happened.

Alerts: the session's alert engine raises and clears them as estimates arrive (a
shelving expires there too, in plant time). An operator's action (acknowledge,
shelve, unshelve, remove from or return to service) runs under the train's lock at
the wall-clock time of the request; its event and a checkpoint holding the new
state are stored in one transaction, so a restart keeps the action, and a failed
write leaves the alert as it was.

No FastAPI here: the routes in :mod:`service.app` call these methods.
"""

from __future__ import annotations

import asyncio
import functools
import hashlib
import logging
import math
import threading
import time
from collections.abc import Sequence
from dataclasses import dataclass, field
from datetime import UTC, datetime
from typing import Any, Literal

import numpy as np

from estimator.alerts import Alert, AlertActionError, AlertEngine, AlertEvent
from estimator.config import TrainConfig
from estimator.session import EstimateBatch, GatedReading, SessionOutput, TrainSession
from estimator.warmup import warm_up
from service.metrics import ServiceMetrics
from service.schemas import IngestResult, RefusedReading
from service.settings import Settings
from service.store import Store, StoreUnavailable, TrainRecord
from service.webhooks import WebhookSender

log = logging.getLogger("stagewatch.hub")


class UnknownTrain(LookupError):
    """No train of that name (or it is retired)."""


class UnknownAlert(LookupError):
    """The train has no alert of that id."""


class ShelveRefused(ValueError):
    """A shelving that ends before it starts or lasts beyond ``alerts.max_shelve``."""


AlertAction = Literal[
    "acknowledge", "shelve", "unshelve", "remove_from_service", "return_to_service"
]
"""An operator's action on an alert: the :class:`AlertEngine` method it calls."""

#: What a subscriber's queue carries: ("estimate", stored row) or ("alert", event).
LiveItem = tuple[Literal["estimate", "alert"], dict[str, Any]]

_PRIORITY_ORDER = {"high": 0, "warning": 1, "advisory": 2}

#: Least wall-clock time between two writes of a train's settled estimate rows [s].
SETTLE_EVERY_WALL = 5.0
#: Held estimate rows beyond which they are written whatever the wall-clock time.
SETTLE_MAX_HELD = 20_000

#: Readings whose quality code is below this are refused: OPC UA quality bytes put
#: bad at 0-63, uncertain at 64-191 (applied, like good) and good at 192-255.
BAD_QUALITY = 64


@dataclass
class Runtime:
    """One train in the running service."""

    name: str
    train_id: int
    version: int
    config: TrainConfig
    session: TrainSession
    lock: threading.Lock = field(default_factory=threading.Lock)
    journal_seq: int = 0
    checkpoint_time: float = -math.inf
    checkpoint_wall: float = -math.inf  # time.monotonic() of the last checkpoint [s]
    settle_wall: float = -math.inf  # time.monotonic() of the last write of settled rows [s]
    # The newest estimate: a row of the batch that brought it, held as (batch, row
    # index) and turned into its stored form only when read (see ``latest``); or,
    # after a restart, the newest stored row.
    latest_ref: tuple[EstimateBatch, int] | None = None
    latest_row: dict[str, Any] | None = None
    # Estimate rows not yet written: a reading with dead time revises the last few
    # minutes, so rows are stored once they are older than that (see Hub._settle).
    # Held as (batch, row index): a row is turned into its stored form only if it
    # is stored (see Hub._settle).
    unsettled: dict[float, tuple[EstimateBatch, int]] = field(default_factory=dict)
    subscribers: set[tuple[asyncio.AbstractEventLoop, asyncio.Queue[LiveItem]]] = field(
        default_factory=set
    )
    alerts: list[Alert] = field(default_factory=list)
    # Gated readings and alert events not yet written (a failed write leaves them).
    pending_gated: list[dict[str, Any]] = field(default_factory=list)
    pending_alerts: list[AlertEvent] = field(default_factory=list)

    @property
    def latest(self) -> dict[str, Any] | None:
        """The newest estimate in its stored form (see :func:`estimate_rows`), or None."""
        ref = self.latest_ref
        if ref is None:
            return self.latest_row
        return estimate_rows(self.config, ref[0], [ref[1]])[0]

    @property
    def latest_time(self) -> float | None:
        """Time of the newest estimate [s since the epoch], or None."""
        ref = self.latest_ref
        if ref is not None:
            return float(ref[0].time[ref[1]])
        return None if self.latest_row is None else float(self.latest_row["t"])


class JournalReader:
    """Reads a train's taken readings back from the journal for its filter.

    Only journal ids up to the runtime's ``journal_seq`` (the last one applied):
    the batch being applied is not yet part of the filter's past.
    """

    def __init__(self, store: Store, train_id: int, tags: Sequence[str]) -> None:
        self.store = store
        self.train_id = train_id
        self.tags = tuple(tags)
        self.runtime: Runtime | None = None

    def __call__(self, start: float, stop: float) -> tuple[list[str], np.ndarray, np.ndarray]:
        """Return readings with reading time in [start, stop] [s], in their declared units."""
        upto = 0 if self.runtime is None else self.runtime.journal_seq
        return self.store.readings_between(self.train_id, self.tags, start, stop, upto=upto)


def estimate_rows(
    config: TrainConfig, batch: EstimateBatch, rows: Sequence[int] | None = None
) -> list[dict[str, Any]]:
    """Estimates as compact JSON-ready rows (the stored and streamed form).

    Keys: t (epoch s), c and cs (N x S concentrations and 1-sigma [mol/m^3]),
    x, xs, xd (N conversions, 1-sigma, design expectation [-]), a and as (activity
    and 1-sigma), f (S feed concentrations [mol/m^3]), q (flow [m^3/s]). ``rows``
    picks some rows of the batch (all by default).
    """
    if rows is not None:
        batch = batch.take(np.asarray(rows, dtype=np.int64))
    columns = {
        "t": batch.time.tolist(),
        "c": batch.concentration.tolist(),
        "cs": batch.concentration_std.tolist(),
        "x": batch.conversion.tolist(),
        "xs": batch.conversion_std.tolist(),
        "xd": batch.design_conversion.tolist(),
        "a": batch.activity.tolist(),
        "as": batch.activity_std.tolist(),
        "f": batch.feed.tolist(),
        "q": batch.inputs[:, 0].tolist(),
    }
    keys = tuple(columns)
    return [dict(zip(keys, values, strict=True)) for values in zip(*columns.values(), strict=True)]


def estimate_public(config: TrainConfig, row: dict[str, Any]) -> dict[str, Any]:
    """Turn a stored estimate row into the API's named form (:class:`EstimatePublic`)."""
    species = config.species
    vessels = []
    for i, vessel in enumerate(config.vessels):
        vessels.append(
            {
                "name": vessel.name,
                "concentration": {
                    s: {"value": row["c"][i][j], "std": row["cs"][i][j]}
                    for j, s in enumerate(species)
                },
                "conversion": {"value": row["x"][i], "std": row["xs"][i]},
                "design_conversion": row["xd"][i],
                "shortfall": row["xd"][i] - row["x"][i],
            }
        )
    return {
        "time": row["t"],
        "time_utc": datetime.fromtimestamp(row["t"], UTC).isoformat(),
        "vessels": vessels,
        "activity": {"value": row["a"], "std": row["as"]},
        "feed": dict(zip(species, row["f"], strict=True)),
        "flow": row["q"],
    }


def alert_event_public(train: str, event: AlertEvent) -> dict[str, Any]:
    """Return an alert event in the API's form (:class:`AlertEventPublic`), JSON-ready."""
    data = event.to_dict()
    return {
        "train": train,
        **data,
        "time_utc": datetime.fromtimestamp(event.time, UTC).isoformat(),
    }


def alert_order(alert: Alert) -> tuple[int, float]:
    """Sort key of alerts: most urgent first, then the earliest activated."""
    activated = alert.activated_at if alert.activated_at is not None else math.inf
    return _PRIORITY_ORDER.get(alert.priority, len(_PRIORITY_ORDER)), activated


def gated_rows(records: Sequence[GatedReading], decision: str) -> list[dict[str, Any]]:
    """Gated readings (or steps) as rows for the store."""
    return [
        {
            "tag": g.tag,
            "time": g.time,
            "sample_time": g.sample_time,
            "value": g.value,
            "predicted": g.predicted,
            "unit": g.unit,
            "nis": g.nis,
            "reason": g.reason,
            "decision": decision,
        }
        for g in records
    ]


class Hub:
    """Every train's session, the journal path, checkpoints and live subscribers."""

    def __init__(self, store: Store, settings: Settings) -> None:
        self.store = store
        self.settings = settings
        self.trains: dict[str, Runtime] = {}
        self._lock = threading.Lock()
        self.ready = False
        self.metrics = ServiceMetrics(self.estimate_times)
        self.webhooks: WebhookSender | None = None
        if settings.webhooks:
            self.webhooks = WebhookSender(settings.webhooks, registry=self.metrics.registry)

    # ------------------------------------------------------------------ lifecycle

    def start(self) -> None:
        """Load every live train: restore its checkpoint, replay the journal after it.

        First the filter's compiled kernels are loaded (:func:`warm_up`), so that
        readiness means no request will wait for them. Then the store's log
        checkpoints move to a thread of their own (:meth:`Store.start_wal_checkpoints`),
        off the thread that serves the requests; :meth:`stop` ends them.
        """
        took = warm_up()
        log.info("filter kernels loaded in %.1f s", took)
        for record in self.store.list_trains():
            self._load(record)
        self.store.start_wal_checkpoints()
        if self.webhooks is not None:
            self.webhooks.start()
        self.ready = True

    def stop(self) -> None:
        """Checkpoint every train (graceful shutdown) and stop the webhook sender.

        A train whose checkpoint cannot be written is logged and skipped (its
        journal brings it back at the next start); the others are still saved.
        """
        try:
            for runtime in list(self.trains.values()):
                with runtime.lock:
                    try:
                        self._checkpoint(runtime)
                    except StoreUnavailable as exc:
                        log.error("train %s: no checkpoint at shutdown: %s", runtime.name, exc)
        finally:
            self.store.stop_wal_checkpoints()
            if self.webhooks is not None:
                self.webhooks.stop()

    def _new_session(
        self, config: TrainConfig, train_id: int, data: bytes | None = None
    ) -> TrainSession:
        """Make a session (from checkpoint ``data`` if given) that reads back from the journal."""
        reader = JournalReader(self.store, train_id, list(config.tags()))
        memory = self.settings.event_memory
        if data is None:
            return TrainSession(config, memory=memory, journal=reader)
        return TrainSession.restore(config, data, memory=memory, journal=reader)

    def _load(self, record: TrainRecord) -> Runtime:
        config = record.train_config()
        saved = self.store.latest_checkpoint(record.id)
        session = None
        seq = 0
        if saved is not None:
            seq, data = saved
            try:
                session = self._new_session(config, record.id, data)
            except ValueError as exc:
                # A checkpoint of an earlier config version (or unreadable): the
                # readings after it belong to this version; start its filter afresh.
                log.warning("train %s: starting afresh after its checkpoint (%s)", record.name, exc)
        stored = self.store.last_alert_sequence(record.id)
        if session is None:
            session = self._new_session(config, record.id)
            if saved is not None:
                # The replay below starts past the journal's beginning, so the fresh
                # engine would not log the stored events again: number after them.
                _continue_sequence(session, stored)
        elif session.alert_engine is not None:
            # Events the checkpoint holds but the log lacks (a write lost after it).
            missing = [e for e in session.alert_engine.events if e.sequence > stored]
            if missing:
                self.store.append_alert_events(record.id, missing)
        runtime = Runtime(record.name, record.id, record.version, config, session, journal_seq=seq)
        _attach(runtime)
        for ids, tags, times, values in self.store.readings_after(record.id, seq):
            out = session.ingest(list(tags), times, values)
            self._store_output(runtime, out, live=False)
            runtime.journal_seq = int(ids[-1])
        # A replay that logged fewer events than the crashed run must not reuse numbers.
        _continue_sequence(session, self.store.last_alert_sequence(record.id))
        self._settle(runtime)  # what the journal replay re-derived
        runtime.latest_ref, runtime.latest_row = None, self.store.latest_estimate(record.id)
        runtime.checkpoint_time = session.filter.t
        _refresh_alerts(runtime)
        self.trains[record.name] = runtime
        return runtime

    # ------------------------------------------------------------------ trains

    def get(self, name: str) -> Runtime:
        """Return the running train of that name."""
        runtime = self.trains.get(name)
        if runtime is None:
            raise UnknownTrain(name)
        return runtime

    def create(self, config: TrainConfig, source_text: str) -> Runtime:
        """Register a new train and start its session."""
        record = self.store.create_train(
            config.name, config.title, config.model_dump_json(), source_text
        )
        with self._lock:
            return self._load(record)

    def update(self, name: str, config: TrainConfig, source_text: str) -> Runtime:
        """Start a new config version: history stays; the session starts afresh.

        The alerts carry over: their states (acknowledged, shelved, out of service),
        timers and event numbering continue under the new config, which may add
        alerts (they start normal) or drop some.
        """
        runtime = self.get(name)
        with runtime.lock:
            self._checkpoint(runtime)
            version = self.store.add_train_version(name, config.model_dump_json(), source_text)
            session = self._new_session(config, runtime.train_id)
            old = runtime.session.alert_engine
            if old is not None and session.alert_engine is not None:
                session.alert_engine = AlertEngine.from_state_dict(config, old.state_dict())
            fresh = Runtime(name, runtime.train_id, version, config, session)
            fresh.journal_seq = runtime.journal_seq
            _attach(fresh)
            fresh.subscribers = runtime.subscribers
            # A restart before the new filter's first checkpoint would otherwise find
            # only the old version's, which this config cannot restore.
            self._checkpoint(fresh, force=True)
            _refresh_alerts(fresh)
            self.trains[name] = fresh
        return fresh

    def retire(self, name: str) -> None:
        """Stop a train; its history stays in the store."""
        runtime = self.get(name)
        with runtime.lock:
            self._checkpoint(runtime)
            self.store.retire_train(name)
            del self.trains[name]

    # ------------------------------------------------------------------ ingest

    def ingest(
        self,
        name: str,
        tags: Sequence[str],
        times: Sequence[float] | np.ndarray,
        values: Sequence[float] | np.ndarray,
        qualities: Sequence[int | None] | None,
        now: float,
    ) -> IngestResult:
        """Screen, journal, apply and store a batch of readings for one train.

        Parameters
        ----------
        name : str
            The train.
        tags : sequence of str, length k
            Tag of each reading.
        times : sequence or ndarray of float, length k
            Reading time of each [s since the epoch].
        values : sequence or ndarray of float, length k
            Value of each, in its tag's declared unit.
        qualities : sequence of int or None, length k; or None
            Source quality code of each reading, or None; None for the whole
            column when no reading carries one.
        now : float
            When the batch arrived [s since the epoch] (wall clock).

        Returns
        -------
        IngestResult
            Readings accepted (journaled and applied), duplicates, and each refused
            reading with its reason.
        """
        runtime = self.get(name)
        t = np.asarray(times, dtype=np.float64)
        v = np.asarray(values, dtype=np.float64)
        if qualities is not None and all(q is None for q in qualities):
            qualities = None
        with runtime.lock:
            session = runtime.session
            codes = session.codes(tags)
            take, refusals = session.screen(codes, t, v, names=tags)

            def refuse(i: int, reason: str) -> RefusedReading:
                # Echoed with the value as posted (the tag's unit).
                value = _json(float(v[i]))
                return RefusedReading(
                    index=i, tag=tags[i], time=float(t[i]), value=value, reason=reason
                )

            refused = [
                refuse(i, r.reason)
                for i, r in zip(np.flatnonzero(~take).tolist(), refusals, strict=True)
            ]
            tolerance = self.settings.future_tolerance
            future = take & (t > now + tolerance)
            if qualities is not None:
                # OPC UA quality: below 64 the source itself calls the value bad.
                quality = np.array([BAD_QUALITY if q is None else q for q in qualities])
                bad = take & (quality < BAD_QUALITY)
                future &= ~bad
                take &= ~bad
                for i in np.flatnonzero(bad).tolist():
                    code = qualities[i]
                    reason = f"quality code {code} is bad (below {BAD_QUALITY}): not applied"
                    refused.append(refuse(i, reason))
            for i in np.flatnonzero(future).tolist():
                reason = f"time in the future beyond the tolerance ({tolerance:g} s)"
                refused.append(refuse(i, reason))
            keep = np.flatnonzero(take & ~future)
            if len(keep) == len(t):
                kept_tags: Sequence[str] = tags
                kept_qualities = qualities
            else:
                kept = keep.tolist()
                kept_tags = [tags[i] for i in kept]
                kept_qualities = None if qualities is None else [qualities[i] for i in kept]
            result = self.store.append_columns(
                runtime.train_id, kept_tags, t[keep], v[keep], kept_qualities, received_at=now
            )
            for j in result.conflicts:
                reason = "a different value is already journaled for this tag and time"
                refused.append(refuse(int(keep[j]), reason))
            new = np.asarray(result.new_positions, dtype=np.int64)
            if new.size:
                sel = keep if new.size == keep.size else keep[new]
                out = session.ingest_codes(codes[sel], t[sel], v[sel])
                # Journaled and applied: the batch is accepted, whatever follows.
                runtime.journal_seq = max(runtime.journal_seq, max(result.new_ids))
                try:
                    self._store_output(runtime, out)
                    if self._checkpoint_due(runtime):
                        self._checkpoint(runtime)
                except StoreUnavailable as exc:
                    # What could not be written waits on the runtime for the next write
                    # (and a restart re-derives it from the journal); refusing the batch
                    # now would misreport readings already journaled as not accepted.
                    self.metrics.deferred_writes.inc()
                    log.warning("train %s: writes deferred: %s", runtime.name, exc)
            self.metrics.accepted.inc(int(new.size))
            if result.duplicates:
                self.metrics.duplicates.inc(len(result.duplicates))
            for r in refused:
                self.metrics.refused.labels(_reason_key(r.reason)).inc()
        if len(refused) > 1:
            refused.sort(key=lambda r: r.index)
        return IngestResult(
            accepted=int(new.size), duplicates=len(result.duplicates), refused=refused
        )

    def _store_output(self, runtime: Runtime, out: SessionOutput, *, live: bool = True) -> None:
        """Store what an ingest produced; tell subscribers and webhooks when ``live``."""
        batch = out.estimates
        if not _all_finite(batch):
            # Never expected (the filter bounds its state); kept out of the store,
            # whose rows must be JSON numbers, rather than failing the request.
            finite = _finite_rows(batch)
            log.warning(
                "train %s: %d estimate rows with non-finite numbers not stored",
                runtime.name,
                int(np.count_nonzero(~finite)),
            )
            batch = batch.take(finite)
        n = len(batch)
        if n:
            for k, t in enumerate(batch.time.tolist()):
                runtime.unsettled[t] = (batch, k)
            newest = runtime.latest_time
            if newest is None or float(batch.time[-1]) >= newest:
                runtime.latest_ref = (batch, n - 1)
            if live and runtime.subscribers:
                self._publish(runtime, "estimate", estimate_rows(runtime.config, batch))
        runtime.pending_gated += gated_rows(out.gated, "gated") + gated_rows(out.steps, "step")
        runtime.pending_alerts += out.alerts
        if out.alerts:
            if live:
                self._announce(runtime, out.alerts)
            _refresh_alerts(runtime)  # an alert's snapshot changes only with its events
        self.metrics.estimates.inc(n)
        self._write_pending(runtime)

    def _write_pending(self, runtime: Runtime) -> None:
        """Write held gated readings and alert events, then settled estimate rows.

        Each is dropped from the runtime only once written, so a write that fails
        (StoreUnavailable) is tried again with the next one. Settled estimate rows
        are written at most once per :data:`SETTLE_EVERY_WALL` of wall-clock time
        (or once :data:`SETTLE_MAX_HELD` rows are held): a transaction per request
        cost more than the few rows each one stores. Nothing needs them sooner:
        the latest estimate and the live stream come from memory, a read of the
        history settles the train first, a checkpoint writes every held row before
        it is saved, and a restart re-derives the rows after the checkpoint from
        the journal.
        """
        if runtime.pending_gated:
            self.store.upsert_gated(runtime.train_id, runtime.pending_gated)
            runtime.pending_gated = []
        if runtime.pending_alerts:
            self.store.append_alert_events(runtime.train_id, runtime.pending_alerts)
            runtime.pending_alerts = []
        wall = time.monotonic()
        if wall >= runtime.settle_wall + SETTLE_EVERY_WALL or (
            len(runtime.unsettled) > SETTLE_MAX_HELD
        ):
            self._settle(runtime, runtime.session.filter.t - _settle_lag(runtime))
            runtime.settle_wall = wall

    def _settle(self, runtime: Runtime, before: float = math.inf) -> None:
        """Write the held estimate rows older than ``before`` (all by default).

        With ``estimate_every`` set, one row per interval of plant time is stored:
        the last of each interval, once the interval is over (a revision after a
        late reading re-emits every row from its rewind on, so it stores the same
        times again). Settling everything (before a checkpoint or a history read)
        also stores the last row of the interval under way.
        """
        every = self.settings.estimate_every
        if every and math.isfinite(before):
            before = math.floor(before / every) * every
        ready = sorted(t for t in runtime.unsettled if t < before)
        if not ready:
            return
        refs = [runtime.unsettled[t] for t in ready]
        if not every:
            self.store.write_estimates(runtime.train_id, _rows_of(runtime.config, refs))
            _forget(runtime, ready)
            return
        bucket = np.floor(np.array(ready) / every)
        last = np.append(bucket[1:] != bucket[:-1], True)
        rows = _rows_of(
            runtime.config, [r for r, keep in zip(refs, last.tolist(), strict=True) if keep]
        )
        # The held rows run without a gap from the first to the last (a revision
        # re-emits every row from its rewind on): what is stored from the first
        # one's interval to the last one is superseded.
        span = (float(bucket[0]) * every, ready[-1])
        self.store.write_estimates(runtime.train_id, rows, replace=span)
        _forget(runtime, ready)

    def settle(self, name: str) -> None:
        """Write every held estimate row of a train (before a read of its history)."""
        runtime = self.get(name)
        with runtime.lock:
            self._settle(runtime)

    def _checkpoint_due(self, runtime: Runtime) -> bool:
        """Whether a train's session should be saved now.

        Once per ``checkpoint_every`` of plant time (each train's intervals shifted
        by a phase of their own), and at most once per
        ``checkpoint_min_wall`` of wall-clock time: a historian back-filling days
        of readings moves plant time hundreds of times faster than the clock, and
        saving every few requests would cost more than replaying the journal.
        """
        settings = self.settings
        every = settings.checkpoint_every
        now, last = runtime.session.filter.t, runtime.checkpoint_time
        if math.isfinite(now) and math.isfinite(last):
            # Plant time is cut into intervals of checkpoint_every shifted by a
            # fraction of their length drawn from the train's name, and a checkpoint
            # is due in the first update of a new interval: trains fed the same
            # plant times (a bridge back-filling a plant's lines together) would
            # otherwise all save in the same request cycle, and their requests
            # would queue behind hundreds of checkpoints.
            shift = _phase(runtime.name) * every
            if math.floor((now - shift) / every) <= math.floor((last - shift) / every):
                return False
        elif now < last + every:
            return False
        return time.monotonic() >= runtime.checkpoint_wall + settings.checkpoint_min_wall

    def _checkpoint(
        self, runtime: Runtime, *, force: bool = False, alert_events: Sequence[AlertEvent] = ()
    ) -> None:
        """Save the session; ``force`` saves one whose filter has not started yet."""
        # What the journal before the checkpoint produced is never re-derived.
        self._write_pending(runtime)
        self._settle(runtime)
        initialized = runtime.session.filter.initialized
        if not (initialized or force):
            return
        self.store.save_checkpoint(
            runtime.train_id, runtime.journal_seq, runtime.session.checkpoint(), alert_events
        )
        if not initialized:
            return
        runtime.checkpoint_time = now = runtime.session.filter.t
        runtime.checkpoint_wall = time.monotonic()
        keep_readings = self.settings.retention_readings
        keep_estimates = self.settings.retention_estimates
        if keep_readings is not None or keep_estimates is not None:
            # The store never drops journal rows the latest checkpoint still needs.
            self.store.prune(
                runtime.train_id,
                readings_before=None if keep_readings is None else now - keep_readings,
                estimates_before=None if keep_estimates is None else now - keep_estimates,
            )

    def estimate_times(self) -> dict[str, float | None]:
        """Each train's newest estimate time [s since the epoch], or None."""
        return {name: r.latest_time for name, r in list(self.trains.items())}

    # ------------------------------------------------------------------ alerts

    def alerts(self, name: str) -> list[Alert]:
        """Every alert of a train as of its latest update, most urgent first."""
        return list(self.get(name).alerts)

    def alert_action(
        self,
        name: str,
        alert_id: str,
        action: AlertAction,
        *,
        who: str,
        why: str,
        now: float,
        until: float | None = None,
    ) -> tuple[AlertEvent, Alert]:
        """Apply an operator's action to an alert; store, checkpoint and announce it.

        Parameters
        ----------
        name : str
            The train.
        alert_id : str
            The alert, ``"<rule>:<subject>"``.
        action : AlertAction
            What to do.
        who : str
            Who acts (the API key's name), logged with the event.
        why : str
            The reason given, logged with the event.
        now : float
            When [s since the epoch]: the wall-clock time of the request.
        until : float, optional
            End of the shelving [s since the epoch]; ``shelve`` needs it.

        Returns
        -------
        (AlertEvent, Alert)
            The transition and the alert after it.

        Raises
        ------
        UnknownTrain, UnknownAlert
            No such train, or no such alert on it.
        ShelveRefused
            ``until`` not after ``now``, or beyond the train's ``alerts.max_shelve``.
        AlertActionError
            The action does not apply in the alert's state (the engine's words).
        StoreUnavailable
            The event could not be stored; the alert is left as it was.
        """
        runtime = self.get(name)
        with runtime.lock:
            session = runtime.session
            engine = session.alert_engine
            if engine is None:
                raise UnknownAlert(f"train {name!r} runs no alert rules")
            try:
                engine.alert(alert_id)
            except AlertActionError:
                raise UnknownAlert(f"train {name!r} has no alert {alert_id!r}") from None
            if action == "shelve":
                _check_shelving(runtime.config, now, until)
            before = engine.state_dict()
            last = engine.events[-1].sequence if engine.events else -1
            refused: AlertActionError | None = None
            try:
                if action == "shelve":
                    assert until is not None
                    engine.shelve(alert_id, until, now, who, why)
                else:
                    getattr(engine, action)(alert_id, now, who, why)
            except AlertActionError as exc:
                refused = exc
            # A shelving that had expired by now is logged before the action (or its
            # refusal): every new event is stored and announced.
            events = [e for e in engine.events if e.sequence > last]
            if events:
                try:
                    self._checkpoint(runtime, force=True, alert_events=events)
                except Exception:
                    session.alert_engine = AlertEngine.from_state_dict(runtime.config, before)
                    raise
                _refresh_alerts(runtime)
                self._announce(runtime, events)
            if refused is not None:
                raise refused
            return events[-1], engine.alert(alert_id)

    def _announce(self, runtime: Runtime, events: Sequence[AlertEvent]) -> None:
        """Send alert events to the live subscribers and the webhooks."""
        payloads = [alert_event_public(runtime.name, e) for e in events]
        self._publish(runtime, "alert", payloads)
        if self.webhooks is not None:
            for payload in payloads:
                self.webhooks.offer(payload)

    # ------------------------------------------------------------------ live

    def subscribe(self, name: str) -> asyncio.Queue[LiveItem]:
        """Return a queue that receives every new estimate row and alert event of a train.

        Items are ``("estimate", stored row)`` and ``("alert", AlertEventPublic data)``.
        """
        runtime = self.get(name)
        queue: asyncio.Queue[LiveItem] = asyncio.Queue(maxsize=1000)
        runtime.subscribers.add((asyncio.get_running_loop(), queue))
        return queue

    def unsubscribe(self, name: str, queue: asyncio.Queue[LiveItem]) -> None:
        """Stop sending to a queue."""
        runtime = self.trains.get(name)
        if runtime is None:
            return
        runtime.subscribers = {s for s in runtime.subscribers if s[1] is not queue}

    def _publish(
        self,
        runtime: Runtime,
        kind: Literal["estimate", "alert"],
        items: list[dict[str, Any]],
    ) -> None:
        for loop, queue in list(runtime.subscribers):
            for item in items:
                loop.call_soon_threadsafe(_offer, queue, (kind, item))


@functools.cache
def _phase(name: str) -> float:
    """Return a train's phase in [0, 1), drawn from its name (stable across restarts) [-]."""
    digest = hashlib.sha256(name.encode()).digest()
    return int.from_bytes(digest[:4], "big") / 2.0**32


def _settle_lag(runtime: Runtime) -> float:
    """How far back a reading arriving now can still revise estimates [s].

    The largest dead time plus the snapshot spacing the filter rewinds to; late
    lab results reach further and are written when they come.
    """
    dead = max((d.dead_time for d in runtime.session.filter.measurements), default=0.0)
    return dead + runtime.session.filter.snapshot_interval


def _offer(queue: asyncio.Queue[LiveItem], item: LiveItem) -> None:
    """Put without blocking; a subscriber too slow to keep up misses items, not the hub.

    What it misses are estimate rows (the latest is always readable): an alert
    event on a full queue takes the place of the oldest item.
    """
    try:
        queue.put_nowait(item)
    except asyncio.QueueFull:
        if item[0] != "alert":
            return
        try:
            queue.get_nowait()
        except asyncio.QueueEmpty:
            pass
        queue.put_nowait(item)


def _rows_of(
    config: TrainConfig, refs: Sequence[tuple[EstimateBatch, int]]
) -> list[dict[str, Any]]:
    """Return the stored rows of (batch, index) references, in the order given."""
    rows: list[dict[str, Any]] = []
    k = 0
    while k < len(refs):  # consecutive references into one batch are built together
        batch = refs[k][0]
        j = k
        while j < len(refs) and refs[j][0] is batch:
            j += 1
        rows += estimate_rows(config, batch, [i for _, i in refs[k:j]])
        k = j
    return rows


def _forget(runtime: Runtime, times: Sequence[float]) -> None:
    """Drop held estimate rows once they are written."""
    for t in times:
        del runtime.unsettled[t]


_NUMBERS = ("concentration", "concentration_std", "conversion", "conversion_std",
            "design_conversion", "activity", "activity_std", "feed", "inputs")  # fmt: skip
"""The columns of an estimate batch that are stored (besides its times)."""


def _all_finite(batch: EstimateBatch) -> bool:
    """Whether every stored number of a batch is finite (one check per column)."""
    return all(bool(np.isfinite(getattr(batch, name)).all()) for name in _NUMBERS)


def _finite_rows(batch: EstimateBatch) -> np.ndarray:
    """Mask of the rows whose every number is finite."""
    ok = np.ones(len(batch), dtype=bool)
    if not len(batch):
        return ok
    for name in _NUMBERS:
        values = getattr(batch, name).reshape(len(batch), -1)
        ok &= np.isfinite(values).all(axis=1)
    return ok


def _attach(runtime: Runtime) -> None:
    """Point the session's journal reader at its runtime (for the applied journal id)."""
    reader = runtime.session.journal
    if isinstance(reader, JournalReader):
        reader.runtime = runtime


def _refresh_alerts(runtime: Runtime) -> None:
    """Take a snapshot of the train's alerts, for readers that must not wait for the lock."""
    engine = runtime.session.alert_engine
    runtime.alerts = [] if engine is None else sorted(engine.alerts(), key=alert_order)


def _continue_sequence(session: TrainSession, after: int) -> None:
    """Make the session's alert engine number its next events after ``after``."""
    engine = session.alert_engine
    if engine is None:
        return
    if engine.events and engine.events[-1].sequence >= after:
        return
    state = engine.state_dict()
    if int(state["book"]["sequence"]) >= after:
        return
    state["book"]["sequence"] = after
    session.alert_engine = AlertEngine.from_state_dict(session.config, state)


def _check_shelving(config: TrainConfig, now: float, until: float | None) -> None:
    """Refuse a shelving that ends before it starts or lasts too long."""
    if until is None or not math.isfinite(until):
        raise ShelveRefused("give 'until', the time the shelving ends")
    limit = config.alerts.max_shelve
    if until <= now:
        raise ShelveRefused(
            f"'until' ({_utc(until)}) must be after now ({_utc(now)}): shelving ends "
            "after it starts"
        )
    if until - now > limit:
        raise ShelveRefused(
            f"shelving is limited to {limit / 3600.0:g} h on this train (alerts.max_shelve); "
            f"'until' ({_utc(until)}) is {(until - now) / 3600.0:.3g} h from now"
        )


def _utc(seconds: float) -> str:
    return datetime.fromtimestamp(seconds, UTC).isoformat(timespec="seconds")


def _json(value: float) -> float | None:
    return value if math.isfinite(value) else None


def _reason_key(reason: str) -> str:
    """Return a short metric label for a refusal reason."""
    keys = (
        "unknown tag",
        "not a finite",
        "future",
        "horizon",
        "different value",
        "range",
        "quality",
    )
    for key in keys:
        if key in reason:
            return key.replace(" ", "_")
    return "physical"
