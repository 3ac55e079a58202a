"""One train's estimator session: readings in, estimates out. Pure: no I/O.

The session is the one object both drivers use (DESIGN.md, "Data flow"): the replay
hands it an archive's columns chunk by chunk, the service hands it each request's
batch. It converts readings from the units their tags declare to SI, feeds the
filter (which orders them, applies dead times and rewinds for late ones), and turns
what the filter produced into engineer-facing estimates: every vessel's
concentrations with 1-sigma, conversion beside the design expectation, the activity,
NIS, and gated readings with the reason in words.

Estimates after a rewind revise earlier ones: :class:`RevisionBuffer` keeps the
recent rows and releases a row once no late reading within the history horizon can
change it any more.
"""

from __future__ import annotations

import hashlib
import io
import json
import math
from collections.abc import Callable, Sequence
from dataclasses import dataclass, field

import numpy as np
from numpy.typing import ArrayLike

from estimator.alerts import AlertEngine, AlertEvent, HealthInput, carried_expectation
from estimator.config import TrainConfig
from estimator.conversion import DesignTwin, TwinMark, design_conversion, feed_inputs
from estimator.filter import (
    KIND_MEASUREMENT,
    STATUS_ACCEPTED,
    STATUS_GATED,
    STATUS_STEP,
    CascadeFilter,
    FilterRun,
    Refusal,
)
from estimator.model import FloatArray, TrainModel


@dataclass
class EstimateBatch:
    """Estimates at successive times, as columns, oldest first.

    Attributes
    ----------
    time : ndarray, shape (k,)
        Estimate time [s since the epoch].
    concentration, concentration_std : ndarray, shape (k, N, S)
        Each species in each vessel and its 1-sigma [mol/m^3].
    conversion, conversion_std : ndarray, shape (k, N)
        Reactant conversion after each vessel, ``1 - C_A,i / C_A,feed``, and its
        1-sigma [-].
    design_conversion : ndarray, shape (k, N)
        What the design model (design activity) expects of each vessel [-]: run
        through the same input history (``conversion_shortfall.expectation =
        "dynamic"``, the default) or at steady state at the row's inputs
        (``"steady"``). The alert rules judge the shortfall against this column.
    activity, activity_std : ndarray, shape (k,)
        Catalyst activity and its 1-sigma [-] (the design value and 0 when the
        activity is not estimated).
    feed : ndarray, shape (k, S)
        Feed concentration the model used [mol/m^3].
    inputs : ndarray, shape (k, 1 + N + S)
        Flow, temperatures and feed in SI [m^3/s, K, mol/m^3].
    reset_time, reset_nis : ndarray, shape (k,)
        When the filter was last re-initialised after diverging [s since the
        epoch], and the mean NIS per degree of freedom that judged it diverged [-];
        NaN before any re-initialisation (``estimator.divergence``).
    """

    time: FloatArray
    concentration: FloatArray
    concentration_std: FloatArray
    conversion: FloatArray
    conversion_std: FloatArray
    design_conversion: FloatArray
    activity: FloatArray
    activity_std: FloatArray
    feed: FloatArray
    inputs: FloatArray
    reset_time: FloatArray
    reset_nis: FloatArray

    def __len__(self) -> int:
        return int(self.time.shape[0])

    def take(self, rows: slice | np.ndarray) -> EstimateBatch:
        """Return the rows selected by a slice, index array or boolean mask."""
        return EstimateBatch(**{name: getattr(self, name)[rows] for name in _FIELDS})

    @classmethod
    def concat(cls, batches: Sequence[EstimateBatch]) -> EstimateBatch:
        """Join batches in order (all of one train)."""
        return cls(
            **{name: np.concatenate([getattr(b, name) for b in batches]) for name in _FIELDS}
        )


_FIELDS = tuple(EstimateBatch.__dataclass_fields__)
_CHECKPOINT_FORMAT = 3


@dataclass(frozen=True)
class GatedReading:
    """A reading the filter rejected at its innovation gate, kept with the reason.

    ``value`` and ``predicted`` are in the tag's own unit; ``time`` is when the
    reading was stamped and ``sample_time`` when its sample was taken.
    """

    tag: str
    time: float
    sample_time: float
    value: float
    predicted: float
    unit: str
    nis: float
    reason: str


@dataclass
class SessionOutput:
    """What one :meth:`TrainSession.ingest` call produced.

    ``estimates`` are new rows and, after a rewind, revisions of rows from
    ``estimates.time[0]`` on. ``gated`` are gated readings in the (re)run span (a
    reading re-run after a rewind appears again with its current decision);
    ``refused`` readings were not taken. ``nis`` holds (sample time, NIS, degrees
    of freedom, measurement group) of each accepted update in the span; a group is
    an index into the filter's ``measurements`` (the group's first reading), so
    (time, group) identifies an update when a rewind runs it again. ``steps`` are
    readings taken as a real step after persistent gating (their prior was widened
    to accept them).
    """

    estimates: EstimateBatch
    gated: list[GatedReading] = field(default_factory=list)
    steps: list[GatedReading] = field(default_factory=list)
    refused: list[Refusal] = field(default_factory=list)
    nis: FloatArray = field(default_factory=lambda: np.empty((0, 4)))
    revised_from: float | None = None
    alerts: list[AlertEvent] = field(default_factory=list)


Journal = Callable[[float, float], tuple[Sequence[str], ArrayLike, ArrayLike]]
"""``journal(start, stop)``: every reading the session has already taken whose
reading time lies in [start, stop] [s since the epoch], as (tags, times [s], values
in each tag's declared unit). The service reads them from its readings journal."""


class TrainSession:
    """Readings in any order -> estimates, for one train (no I/O).

    Parameters
    ----------
    config : TrainConfig
        The train description.
    snapshot_interval : float
        Spacing of the filter's rewind snapshots [s].
    alerts : bool
        Run the train's alert rules on every output (``SessionOutput.alerts``).
    memory : float, optional
        Span of the filter's in-memory event log [s] (see
        :class:`~estimator.filter.CascadeFilter`); only with ``journal``. Without
        one the whole history horizon stays in memory.
    journal : Journal, optional
        Where the filter reads taken readings back when a late one is sampled
        before its in-memory window.
    """

    def __init__(
        self,
        config: TrainConfig,
        *,
        snapshot_interval: float = 60.0,
        alerts: bool = True,
        memory: float | None = None,
        journal: Journal | None = None,
    ) -> None:
        self.config = config
        self.model = TrainModel.from_config(config)
        # The design expectation of each row: the design model run through the
        # input history ("dynamic"), or its steady state at each row's inputs. The
        # twin goes back to its mark at the filter's snapshot when a rewind revises
        # rows, so revised rows get the same expectation as rows run in order.
        dynamic = config.alerts.conversion_shortfall.expectation == "dynamic"
        self._twin = DesignTwin(self.model) if dynamic else None
        self._twin_marks: dict[float, TwinMark] = {}
        self.alert_engine = AlertEngine(config, expected=carried_expectation) if alerts else None
        # Estimates and instrument activity not yet judged by the alert rules (they
        # run once per alerts.evaluate_every of plant time; see _judge).
        self._held_rows: EstimateBatch | None = None
        self._held_health: list[HealthInput] = []
        digest = hashlib.sha256(config.name.encode()).digest()
        self._judge_phase = int.from_bytes(digest[:4], "big") / 2.0**32  # [0, 1)
        self.journal = journal
        self.filter = CascadeFilter(
            self.model,
            snapshot_interval=snapshot_interval,
            memory=memory,
            backfill=None if journal is None else self._backfill,
        )
        names = self.filter.tag_names
        scale = np.ones(len(names))
        offset = np.zeros(len(names))
        units = ["SI"] * len(names)
        for tag, (unit, tag_scale, tag_offset) in config.tag_units().items():
            code = self.filter.tag_code[tag]
            scale[code], offset[code], units[code] = tag_scale, tag_offset, unit
        self._scale = scale
        self._offset = offset
        self.units: tuple[str, ...] = tuple(units)

    def checkpoint(self) -> bytes:
        """Return the session's state as bytes, to store and later :meth:`restore`.

        Holds the filter's in-memory event log and its snapshots within the history
        horizon, so a restored session (given the same journal) applies late
        readings exactly as this one would.
        """
        buffer = io.BytesIO()
        arrays = self.filter.state_arrays()
        arrays["format"] = np.array(_CHECKPOINT_FORMAT)
        arrays["config"] = np.array(_fingerprint(self.config))
        if self._twin is not None:
            twin = {
                "now": self._twin.state_dict(),
                "marks": [[t, m.to_dict()] for t, m in self._twin_marks.items()],
            }
            arrays["twin"] = np.frombuffer(json.dumps(twin).encode(), dtype=np.uint8)
        if self.alert_engine is not None:
            state = self.alert_engine.state_dict()
            held = self._held_rows
            state["held"] = {
                "rows": None
                if held is None
                else {name: getattr(held, name).tolist() for name in _FIELDS},
                "health": [h.to_dict() for h in self._held_health],
            }
            arrays["alerts"] = np.frombuffer(json.dumps(state).encode(), dtype=np.uint8)
        # Uncompressed: a service checkpoints inside a request, and zlib would cost
        # more time than the bytes it saves are worth.
        np.savez(buffer, **arrays)  # type: ignore[arg-type]  # stub types kwds as bool
        return buffer.getvalue()

    def _backfill(self, start: float, stop: float) -> tuple[ArrayLike, ArrayLike, ArrayLike]:
        """Read :attr:`journal` back for the filter: tag codes and SI values."""
        assert self.journal is not None
        tags, times, values = self.journal(start, stop)
        codes = self.codes(tags)
        return codes, times, self.to_si(codes, values)

    @classmethod
    def restore(
        cls,
        config: TrainConfig,
        data: bytes,
        *,
        memory: float | None = None,
        journal: Journal | None = None,
    ) -> TrainSession:
        """Build a session of ``config`` resumed from :meth:`checkpoint` bytes.

        ``memory`` and ``journal`` are as for the constructor (not saved).

        Raises
        ------
        ValueError
            When the bytes are not a checkpoint of this version or of this train's
            state layout.
        """
        session = cls(config, snapshot_interval=60.0, memory=memory, journal=journal)
        try:
            with np.load(io.BytesIO(data), allow_pickle=False) as saved:
                arrays = {name: saved[name] for name in saved.files}
        except (OSError, ValueError) as exc:
            raise ValueError(f"not a session checkpoint: {exc}") from None
        if int(arrays.pop("format", -1)) != _CHECKPOINT_FORMAT:
            raise ValueError("session checkpoint of another format version")
        if str(arrays.pop("config", "")) != _fingerprint(config):
            raise ValueError("session checkpoint of another train configuration")
        alerts = arrays.pop("alerts", None)
        twin = arrays.pop("twin", None)
        session.filter.load_state(arrays)
        if twin is not None and session._twin is not None:
            saved_twin = json.loads(np.asarray(twin, dtype=np.uint8).tobytes().decode())
            session._twin.load(saved_twin["now"])
            session._twin_marks = {float(t): TwinMark.from_dict(m) for t, m in saved_twin["marks"]}
        if alerts is not None:
            state = json.loads(np.asarray(alerts, dtype=np.uint8).tobytes().decode())
            held = state.pop("held", None)
            session.alert_engine = AlertEngine.from_state_dict(
                config, state, expected=carried_expectation
            )
            if held is not None:
                rows = held["rows"]
                if rows is not None:
                    empty = session._no_rows()
                    session._held_rows = EstimateBatch(
                        **{
                            name: np.array(rows[name], dtype=np.float64).reshape(
                                (-1, *getattr(empty, name).shape[1:])
                            )
                            for name in _FIELDS
                        }
                    )
                session._held_health = [HealthInput.from_dict(h) for h in held["health"]]
        return session

    @property
    def tags(self) -> tuple[str, ...]:
        """Every tag the train reads, in code order."""
        return self.filter.tag_names

    def codes(self, tags: Sequence[str]) -> np.ndarray:
        """Code of each tag (-1 for a tag this train does not have)."""
        return np.array([self.filter.tag_code.get(t, -1) for t in tags], dtype=np.int64)

    def ingest(
        self,
        tags: Sequence[str],
        times: ArrayLike,
        values: ArrayLike,
        *,
        si: bool = False,
    ) -> SessionOutput:
        """Take readings (tag, time [s since the epoch], value) in any order.

        Values are in each tag's declared unit, or SI when ``si`` is true.
        """
        return self.ingest_codes(self.codes(tags), times, values, si=si, names=tags)

    def to_si(self, codes: ArrayLike, values: ArrayLike) -> FloatArray:
        """Values from each tag's declared unit to SI (unknown codes pass through)."""
        code = np.asarray(codes, dtype=np.int64)
        v = np.asarray(values, dtype=np.float64)
        safe = np.clip(code, 0, len(self._scale) - 1)
        return np.where(code >= 0, self._scale[safe] * v + self._offset[safe], v)

    def screen(
        self,
        codes: ArrayLike,
        times: ArrayLike,
        values: ArrayLike,
        *,
        si: bool = False,
        names: Sequence[str] | None = None,
    ) -> tuple[np.ndarray, list[Refusal]]:
        """Which readings :meth:`ingest_codes` would take now, and the others' reasons.

        Changes nothing: the service screens a batch, journals what passes, then
        ingests it.
        """
        v = np.asarray(values, dtype=np.float64) if si else self.to_si(codes, values)
        return self.filter.screen(codes, times, v, names)

    def ingest_codes(
        self,
        codes: ArrayLike,
        times: ArrayLike,
        values: ArrayLike,
        *,
        si: bool = False,
        names: Sequence[str] | None = None,
    ) -> SessionOutput:
        """:meth:`ingest` with tags as codes (indices into :attr:`tags`), vectorised."""
        code = np.asarray(codes, dtype=np.int64)
        v = np.asarray(values, dtype=np.float64) if si else self.to_si(code, values)
        run = self.filter.add_columns(code, times, v, names=names)
        output = self._output(run)
        if self.alert_engine is not None:
            tags = names if names is not None else [
                self.tags[c] if 0 <= c < len(self.tags) else "" for c in code.tolist()
            ]  # fmt: skip
            health = HealthInput.from_session(self, tags, times, v, output, si=True)
            output.alerts = self._judge(output.estimates, health)
        return output

    def _judge(self, estimates: EstimateBatch, health: HealthInput) -> list[AlertEvent]:
        """Hold new estimates for the alert rules; run them once an interval is over.

        The rules run when the newest estimate lies in a later ``evaluate_every``
        interval of plant time than their last run, over every estimate held (a
        revision replaces the held rows it covers). Each row is judged at its own
        time, so how readings were batched does not change the events.
        """
        held = self._held_rows
        if len(estimates):
            if held is None:
                held = estimates
            else:
                start = float(estimates.time[0])
                held = EstimateBatch.concat([held.take(held.time < start), estimates])
        self._held_rows = held
        self._held_health.append(health)
        engine = self.alert_engine
        assert engine is not None
        every = self.config.alerts.evaluate_every
        if held is None or len(held) == 0:
            return []
        last = engine.last_time
        if every > 0.0 and last is not None:
            # Each train's intervals are shifted by a fraction of their length drawn
            # from its name, so that trains fed at the same moments do not all run
            # their rules at once (a service's requests would queue behind them).
            shift = self._judge_phase * every
            newest = float(held.time[-1])
            if math.floor((newest - shift) / every) == math.floor((last - shift) / every):
                return []
        return self.flush_alerts()

    def flush_alerts(self) -> list[AlertEvent]:
        """Run the alert rules now over every held estimate; return the transitions.

        Called by :meth:`ingest` once an interval is over, and at the end of an
        archive (a replay) so the last estimates are judged too.
        """
        engine = self.alert_engine
        if engine is None or (self._held_rows is None and not self._held_health):
            return []
        rows = self._held_rows
        health = HealthInput.concat(self._held_health) if self._held_health else None
        self._held_rows, self._held_health = None, []
        return engine.update(rows if rows is not None else self._no_rows(), health)

    def _no_rows(self) -> EstimateBatch:
        """Return an empty estimate batch shaped for this train."""
        lay = self.model.layout
        n_v, n_s, n_u = lay.n_vessels, lay.n_species, self.model.n_inputs
        shapes = {
            "concentration": (0, n_v, n_s),
            "concentration_std": (0, n_v, n_s),
            "conversion": (0, n_v),
            "conversion_std": (0, n_v),
            "design_conversion": (0, n_v),
            "feed": (0, n_s),
            "inputs": (0, n_u),
        }
        return EstimateBatch(**{name: np.empty(shapes.get(name, (0,))) for name in _FIELDS})

    def _output(self, run: FilterRun) -> SessionOutput:
        model = self.model
        lay = model.layout
        k = len(run.times)
        n_v, n_s = lay.n_vessels, lay.n_species
        conc = run.states[:, : lay.n_concentrations].reshape(k, n_v, n_s)
        conc_std = run.std[:, : lay.n_concentrations].reshape(k, n_v, n_s)
        if lay.activity >= 0:
            activity = run.states[:, lay.activity]
            activity_std = run.std[:, lay.activity]
        else:
            activity = np.full(k, model.config.estimator.design_activity)
            activity_std = np.zeros(k)
        inputs = feed_inputs(model, run.inputs, run.states)
        estimates = EstimateBatch(
            time=run.times,
            concentration=conc,
            concentration_std=conc_std,
            conversion=run.conversion,
            conversion_std=run.conversion_std,
            design_conversion=self._expectation(run.times, inputs),
            activity=activity,
            activity_std=activity_std,
            feed=inputs[:, 1 + n_v :],
            inputs=inputs,
            reset_time=run.reset_time,
            reset_nis=run.reset_nis,
        )
        gated, steps, nis = self._events(run)
        return SessionOutput(estimates, gated, steps, run.refused, nis, run.rewound_to)

    def _expectation(self, times: FloatArray, inputs: FloatArray) -> FloatArray:
        """Return the design expectation of each row [-], shape (k, N) (see ``__init__``)."""
        twin = self._twin
        if twin is None:
            return design_conversion(self.model, inputs)
        if len(times) and float(times[0]) <= twin.t:
            # A revision: back to the twin as it was after the row before it (the
            # filter reran from its snapshot at that row's time).
            before = [t for t in self._twin_marks if t < float(times[0])]
            twin.resume(self._twin_marks[max(before)] if before else None)
        out = np.empty((len(times), self.model.layout.n_vessels))
        snap_t = self.filter._snap_t
        fresh = len(times) and len(snap_t) and snap_t[-1] >= times[0]
        snaps = np.intersect1d(snap_t, times) if fresh else snap_t[:0]
        lo = 0
        for s in snaps.tolist():
            hi = int(np.searchsorted(times, s, side="right"))
            out[lo:hi] = twin.run(times[lo:hi], inputs[lo:hi])
            self._twin_marks[s] = twin.mark()
            lo = hi
        out[lo:] = twin.run(times[lo:], inputs[lo:])
        if len(snaps) or len(self._twin_marks) > len(self.filter._snap_t):
            kept = set(self.filter._snap_t.tolist())
            self._twin_marks = {t: m for t, m in self._twin_marks.items() if t in kept}
        return out

    def _events(self, run: FilterRun) -> tuple[list[GatedReading], list[GatedReading], FloatArray]:
        ev = run.events
        if ev is None or len(ev["time"]) == 0:
            return [], [], np.empty((0, 4))
        filt = self.filter
        meas = ev["kind"] == KIND_MEASUREMENT
        gated: list[GatedReading] = []
        steps: list[GatedReading] = []
        gate_sigma = math.sqrt(float(filt._gates[0]))
        persist = self.config.estimator.step_persistence
        flagged = meas & ((ev["status"] == STATUS_GATED) | (ev["status"] == STATUS_STEP))
        for i in np.flatnonzero(flagged).tolist():
            j = int(ev["index"][i])
            tag = filt.measurements[j].tag
            code = filt.tag_code[tag]
            scale, offset = self._scale[code], self._offset[code]
            value = (float(ev["value"][i]) - offset) / scale
            innovation = float(ev["innovation"][i]) / scale
            nis = float(ev["nis"][i])
            unit = self.units[code]
            is_step = ev["status"][i] == STATUS_STEP
            if is_step:
                reason = (
                    f"taken as a real step of {innovation:+.4g} {unit} after {persist} "
                    "gated readings on the same side; the estimate's uncertainty was widened"
                )
            else:
                reason = (
                    f"{innovation:+.4g} {unit} from the prediction, {math.sqrt(nis):.1f} "
                    f"sigma (gate {gate_sigma:.1f} sigma at "
                    f"p = {self.config.estimator.gate_probability:g})"
                )
            sample = float(ev["time"][i])
            (steps if is_step else gated).append(
                GatedReading(
                    tag,
                    sample + filt.measurements[j].dead_time,
                    sample,
                    value,
                    value - innovation,
                    unit,
                    nis,
                    reason,
                )
            )
        # One NIS per update: readings of a group at one time share theirs.
        ok = np.flatnonzero(meas & (ev["status"] == STATUS_ACCEPTED))
        if ok.size == 0:
            return gated, steps, np.empty((0, 4))
        group = filt._m_group[ev["index"][ok]]
        key = np.column_stack([ev["time"][ok], group])
        _, first, counts = np.unique(key, axis=0, return_index=True, return_counts=True)
        rows = ok[first]
        nis_rows = np.column_stack(
            [ev["time"][rows], ev["nis"][rows], counts.astype(float), group[first].astype(float)]
        )
        return gated, steps, nis_rows[np.argsort(nis_rows[:, 0], kind="stable")]


def _fingerprint(config: TrainConfig) -> str:
    """Digest what the filter depends on: a checkpoint is only valid for its own.

    The alert settings are left out: changing a limit does not change the filter.
    """
    return hashlib.sha256(config.model_dump_json(exclude={"alerts"}).encode()).hexdigest()


class RevisionBuffer:
    """Holds recent estimates until no late reading can revise them.

    Add each :class:`SessionOutput`'s estimates; rows from the first new time on
    replace what was held. :meth:`release` hands back, in order, the rows older than
    a cut-off (the newest time minus the history horizon, or everything at the end).
    """

    def __init__(self) -> None:
        self._held: list[EstimateBatch] = []

    def add(self, estimates: EstimateBatch) -> None:
        """Take new and revised rows."""
        if len(estimates) == 0:
            return
        start = float(estimates.time[0])
        kept = [b.take(b.time < start) for b in self._held]
        self._held = [b for b in kept if len(b)] + [estimates]

    def release(self, before: float = math.inf) -> EstimateBatch | None:
        """Rows with time < ``before``, removed from the buffer (None if there are none)."""
        if not self._held:
            return None
        held = EstimateBatch.concat(self._held) if len(self._held) > 1 else self._held[0]
        out = held.take(held.time < before)
        rest = held.take(held.time >= before)
        self._held = [rest] if len(rest) else []
        return out if len(out) else None
