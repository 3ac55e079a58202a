"""The trains the service runs: one session each, fed from the journal.

The hub holds a :class:`~estimator.session.TrainSession` per train and carries a
posted batch through the one path that keeps the promise "no accepted reading is
lost": screen (unknown tag, not finite, out of range, too old, too far in the
future) -> journal (committed, idempotent) -> session -> estimates and gated
readings stored -> live subscribers told. At start it restores each train from its
latest checkpoint and replays the journal after it, so a killed service continues
as if nothing happened.

No FastAPI here: the routes in :mod:`service.app` call these methods.
"""

from __future__ import annotations

import asyncio
import logging
import math
import threading
from collections.abc import Sequence
from dataclasses import dataclass, field
from datetime import UTC, datetime
from typing import Any

import numpy as np

from estimator.config import TrainConfig
from estimator.session import EstimateBatch, GatedReading, SessionOutput, TrainSession
from service.metrics import ServiceMetrics
from service.schemas import IngestResult, RefusedReading
from service.settings import Settings
from service.store import Store, TrainRecord

log = logging.getLogger("stagewatch.hub")


class UnknownTrain(LookupError):
    """No train of that name (or it is retired)."""


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
    latest: dict[str, Any] | None = None
    subscribers: set[tuple[asyncio.AbstractEventLoop, asyncio.Queue[dict[str, Any]]]] = field(
        default_factory=set
    )


def estimate_rows(config: TrainConfig, batch: EstimateBatch) -> list[dict[str, Any]]:
    """Estimates as compact JSON-ready rows (the stored and streamed form).

    Keys: t (epoch s), c and cs (N x S concentrations and 1-sigma [mol/m^3]),
    x, xs, xd (N conversions, 1-sigma, design expectation [-]), a and as (activity
    and 1-sigma), f (S feed concentrations [mol/m^3]), q (flow [m^3/s]).
    """
    rows = []
    for k in range(len(batch)):
        rows.append(
            {
                "t": float(batch.time[k]),
                "c": batch.concentration[k].tolist(),
                "cs": batch.concentration_std[k].tolist(),
                "x": batch.conversion[k].tolist(),
                "xs": batch.conversion_std[k].tolist(),
                "xd": batch.design_conversion[k].tolist(),
                "a": float(batch.activity[k]),
                "as": float(batch.activity_std[k]),
                "f": batch.feed[k].tolist(),
                "q": float(batch.inputs[k, 0]),
            }
        )
    return rows


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

    # ------------------------------------------------------------------ lifecycle

    def start(self) -> None:
        """Load every live train: restore its checkpoint, replay the journal after it."""
        for record in self.store.list_trains():
            self._load(record)
        self.ready = True

    def stop(self) -> None:
        """Checkpoint every train (graceful shutdown)."""
        for runtime in list(self.trains.values()):
            with runtime.lock:
                self._checkpoint(runtime)

    def _load(self, record: TrainRecord) -> Runtime:
        config = record.train_config()
        saved = self.store.latest_checkpoint(record.id)
        session = None
        seq = 0
        if saved is not None:
            seq, data = saved
            try:
                session = TrainSession.restore(config, data)
            except ValueError as exc:
                # A checkpoint of an earlier config version (or unreadable): the
                # readings after it belong to this version; start its filter afresh.
                log.warning("train %s: starting afresh after its checkpoint (%s)", record.name, exc)
        if session is None:
            session = TrainSession(config)
        runtime = Runtime(record.name, record.id, record.version, config, session, journal_seq=seq)
        for ids, tags, times, values in self.store.readings_after(record.id, seq):
            out = session.ingest(list(tags), times, values)
            self._store_output(runtime, out)
            runtime.journal_seq = int(ids[-1])
        latest = self.store.latest_estimate(record.id)
        runtime.latest = latest
        runtime.checkpoint_time = session.filter.t
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
        """Start a new config version: history stays; the session starts afresh."""
        runtime = self.get(name)
        with runtime.lock:
            self._checkpoint(runtime)
            version = self.store.add_train_version(name, config.model_dump_json(), source_text)
            fresh = Runtime(name, runtime.train_id, version, config, TrainSession(config))
            fresh.journal_seq = runtime.journal_seq
            fresh.subscribers = runtime.subscribers
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
        times: Sequence[float],
        values: Sequence[float],
        qualities: Sequence[int | None],
        now: float,
    ) -> IngestResult:
        """Screen, journal, apply and store a batch of readings for one train."""
        runtime = self.get(name)
        t = np.asarray(times, dtype=np.float64)
        v = np.asarray(values, dtype=np.float64)
        with runtime.lock:
            session = runtime.session
            codes = session.codes(tags)
            take, refusals = session.screen(codes, t, v, names=tags)
            refused = [
                RefusedReading(
                    index=i, tag=r.tag, time=r.time, value=_json(r.value), reason=r.reason
                )
                for i, r in zip(np.flatnonzero(~take).tolist(), refusals, strict=True)
            ]
            tolerance = self.settings.future_tolerance
            future = take & (t > now + tolerance)
            for i in np.flatnonzero(future).tolist():
                refused.append(
                    RefusedReading(
                        index=i,
                        tag=tags[i],
                        time=float(t[i]),
                        value=_json(float(v[i])),
                        reason=f"time in the future beyond the tolerance ({tolerance:g} s)",
                    )
                )
            keep = np.flatnonzero(take & ~future)
            rows = [(tags[i], float(t[i]), float(v[i]), qualities[i]) for i in keep.tolist()]
            result = self.store.append_readings(runtime.train_id, rows, received_at=now)
            for j in result.conflicts:
                i = int(keep[j])
                refused.append(
                    RefusedReading(
                        index=i,
                        tag=tags[i],
                        time=float(t[i]),
                        value=_json(float(v[i])),
                        reason="a different value is already journaled for this tag and time",
                    )
                )
            new = np.asarray(result.new_positions, dtype=np.int64)
            if new.size:
                sel = keep[new]
                out = session.ingest_codes(codes[sel], t[sel], v[sel])
                self._store_output(runtime, out)
                runtime.journal_seq = max(runtime.journal_seq, max(result.new_ids))
                if session.filter.t >= runtime.checkpoint_time + self.settings.checkpoint_every:
                    self._checkpoint(runtime)
            self.metrics.accepted.inc(int(new.size))
            self.metrics.duplicates.inc(len(result.duplicates))
            for r in refused:
                self.metrics.refused.labels(_reason_key(r.reason)).inc()
        refused.sort(key=lambda r: r.index)
        return IngestResult(
            accepted=int(new.size), duplicates=len(result.duplicates), refused=refused
        )

    def _store_output(self, runtime: Runtime, out: SessionOutput) -> None:
        rows = estimate_rows(runtime.config, out.estimates)
        if rows:
            self.store.write_estimates(runtime.train_id, rows)
            runtime.latest = rows[-1]
            self._publish(runtime, rows)
        gated = gated_rows(out.gated, "gated") + gated_rows(out.steps, "step")
        if gated:
            self.store.upsert_gated(runtime.train_id, gated)
        self.metrics.estimates.inc(len(rows))

    def _checkpoint(self, runtime: Runtime) -> None:
        if not runtime.session.filter.initialized:
            return
        self.store.save_checkpoint(
            runtime.train_id, runtime.journal_seq, runtime.session.checkpoint()
        )
        runtime.checkpoint_time = now = runtime.session.filter.t
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
        return {
            name: None if r.latest is None else float(r.latest["t"])
            for name, r in list(self.trains.items())
        }

    # ------------------------------------------------------------------ live

    def subscribe(self, name: str) -> asyncio.Queue[dict[str, Any]]:
        """Return a queue that receives every new estimate row of a train."""
        runtime = self.get(name)
        queue: asyncio.Queue[dict[str, Any]] = asyncio.Queue(maxsize=1000)
        runtime.subscribers.add((asyncio.get_running_loop(), queue))
        return queue

    def unsubscribe(self, name: str, queue: asyncio.Queue[dict[str, Any]]) -> None:
        """Stop sending to a queue."""
        runtime = self.trains.get(name)
        if runtime is None:
            return
        runtime.subscribers = {s for s in runtime.subscribers if s[1] is not queue}

    def _publish(self, runtime: Runtime, rows: list[dict[str, Any]]) -> None:
        for loop, queue in list(runtime.subscribers):
            for row in rows:
                loop.call_soon_threadsafe(_offer, queue, row)


def _offer(queue: asyncio.Queue[dict[str, Any]], row: dict[str, Any]) -> None:
    """Put without blocking; a subscriber too slow to keep up misses rows, not the hub."""
    try:
        queue.put_nowait(row)
    except asyncio.QueueFull:
        pass


def _json(value: float) -> float | None:
    return value if math.isfinite(value) else None


def _reason_key(reason: str) -> str:
    """Return a short metric label for a refusal reason."""
    for key in ("unknown tag", "not a finite", "future", "horizon", "different value", "range"):
        if key in reason:
            return key.replace(" ", "_")
    return "physical"
