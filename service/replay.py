"""Replay an archive through the estimator: readings in, estimate files and a report out.

The replay is the offline driver of the one :class:`~estimator.session.TrainSession`
(DESIGN.md, "Data flow"): it streams an archive (CSV or Parquet, long or wide form,
see :mod:`service.archive`) in record batches, cuts it into chunks of arrival time
and hands each chunk to the session as columns. Readings are ordered by their
``received`` time when the archive has that column (a lab result reaches the
historian hours after its sample; the session rewinds for it) and by their time
stamp otherwise. The session's estimates pass through a
:class:`~estimator.session.RevisionBuffer`; once no late reading within the
history horizon can revise a row, it is written to ``estimates.parquet`` and
``estimates.csv``.

Memory stays bounded whatever the archive's length: the reader holds one record
batch and the readings of one chunk plus one horizon, the session its own bounded
history, and the plots a binned copy of every series (at most ``MAX_PLOT_POINTS``
bins, merged pairwise as the run grows).

Files written into ``out``:

``estimates.parquet``, ``estimates.csv``
    One row per estimate time: ``time`` [s since the epoch], ``time_utc`` (a UTC
    timestamp in Parquet, ISO 8601 text in CSV), ``<vessel>.<species>`` and
    ``<vessel>.<species>.std`` [mol/m^3], ``<vessel>.conversion``,
    ``<vessel>.conversion_std`` and ``<vessel>.design_conversion`` [-],
    ``activity`` and ``activity.std`` [-], ``feed.<species>`` [mol/m^3] and
    ``flow`` [m^3/s]. The CSV rounds each column to 9 significant digits of its
    largest magnitude in each release (a few rows to a few days); the Parquet file
    keeps every bit.
``gated.csv``, ``steps.csv``
    Readings rejected at the innovation gate, and readings taken as a real step
    after persistent gating, with their final decision (a rewind can re-decide).
``refused.csv``
    Readings the session did not take, with the reason.
``alerts.csv``
    Every alert transition the session's alert engine logged, in time order:
    ``time`` [s since the epoch], ``time_utc`` (ISO 8601), ``alert_id``, ``rule``,
    ``subject``, ``priority``, ``from_state``, ``to_state``, ``figure`` and
    ``threshold`` [``unit``; empty when there is none], ``unit`` and ``message``.
    Alerts are judged on the estimates as the session first produced them, chunk
    by chunk; the engine never re-judges a time it has evaluated, so a rewind for a
    late reading adds no repeated transitions.
``summary.json``
    :class:`ReplaySummary` as JSON (NaN written as null).
``report.html`` and ``plots/*.png``
    See :mod:`service.report`.

stagewatch is a monitoring aid, not a safety system: a replay shows how the
estimator would have read the plant, nothing more.
"""

from __future__ import annotations

import csv
import json
import math
import sys
import time as _time
from collections import Counter, deque
from collections.abc import Sequence
from dataclasses import dataclass
from pathlib import Path
from typing import IO, Any

import numpy as np
from numpy.typing import NDArray

from estimator.alarm_state import AlertEvent, AlertState
from estimator.config import TagInput, TrainConfig
from estimator.filter import Refusal
from estimator.model import FloatArray, IntArray
from estimator.session import (
    EstimateBatch,
    GatedReading,
    RevisionBuffer,
    SessionOutput,
    TrainSession,
)
from service.archive import ArchiveError
from service.archive_stream import ArchiveBatch, ArchiveStream
from service.report import (
    ALERT_LOG_ROWS,
    RULE_KINDS,
    Accuracy,
    AlarmGuidance,
    AlertInterval,
    AlertStatistics,
    LabAccuracy,
    MeasurementSeries,
    NisStatistics,
    ReplaySeries,
    ReplaySummary,
    alarm_guidance,
    nis_statistics,
)

__all__ = [
    "ALERT_FIELDS",
    "MAX_PLOT_POINTS",
    "Accuracy",
    "AlarmGuidance",
    "AlertInterval",
    "AlertStatistics",
    "LabAccuracy",
    "MeasurementSeries",
    "NisStatistics",
    "ReplaySeries",
    "ReplaySummary",
    "nis_statistics",
    "replay",
]

#: Most bins a plotted series keeps; a long replay merges bins pairwise to stay below.
MAX_PLOT_POINTS = 4000

#: Columns of ``alerts.csv``, one row per alert transition.
ALERT_FIELDS = (
    "time",
    "time_utc",
    "alert_id",
    "rule",
    "subject",
    "priority",
    "from_state",
    "to_state",
    "figure",
    "threshold",
    "unit",
    "message",
)

_CSV_DIGITS = 9
_GATED_PLOT_POINTS = 5000
_ALERT_PLOT_INTERVALS = 2000
_EVENT_FIELDS = ("tag", "time", "sample_time", "value", "predicted", "unit", "nis", "reason")
_TEN_MINUTES = 600.0
_DAY = 86400.0
_CHATTER_WINDOW = 60.0  # [s]: 3 or more activations of one alert within it is chattering
_CHATTER_COUNT = 3
_ACTIVE = (AlertState.ACTIVE_UNACKNOWLEDGED.value, AlertState.ACTIVE_ACKNOWLEDGED.value)


# ---------------------------------------------------------------------- binning


class _Bins:
    """Running bin means of several series over time, at most ``max_bins`` bins.

    Bins start ``width`` seconds wide from the first time added; when a time falls
    beyond the last bin, neighbouring bins are merged pairwise (the width doubles)
    until it fits. Adding with ``sign=-1`` takes readings out again.
    """

    def __init__(self, n_series: int, max_bins: int = MAX_PLOT_POINTS, width: float = 1.0) -> None:
        self.max_bins = max_bins - max_bins % 2
        self.width = width
        self.origin: float | None = None
        self.count = np.zeros(self.max_bins)
        self.tsum = np.zeros(self.max_bins)
        self.sums = np.zeros((self.max_bins, n_series))

    def add(self, t: FloatArray, values: FloatArray, sign: float = 1.0) -> None:
        """Add rows ``values`` (k, n_series) at times ``t`` (k,) [s]."""
        if t.size == 0:
            return
        if self.origin is None:
            self.origin = float(np.min(t))
        rel = t - self.origin
        idx = np.maximum(np.floor(rel / self.width), 0).astype(np.int64)
        while int(idx.max()) >= self.max_bins:
            self._merge()
            idx //= 2
        m, n = self.sums.shape
        self.count += sign * np.bincount(idx, minlength=m)
        self.tsum += sign * np.bincount(idx, weights=rel, minlength=m)
        cell = (idx[:, None] * n + np.arange(n)).ravel()
        sums = np.bincount(cell, weights=values.ravel(), minlength=m * n)
        self.sums += sign * sums.reshape(m, n)

    def _merge(self) -> None:
        half = self.max_bins // 2
        for name in ("count", "tsum", "sums"):
            a = getattr(self, name)
            merged = a.reshape(half, 2, *a.shape[1:]).sum(axis=1)
            a[:half] = merged
            a[half:] = 0.0
        self.width *= 2.0

    def means(self) -> tuple[FloatArray, FloatArray]:
        """Mean time (k,) [s] and mean values (k, n_series) of the bins holding rows."""
        used = self.count > 0.5
        if self.origin is None or not np.any(used):
            return np.empty(0), np.empty((0, self.sums.shape[1]))
        n = self.count[used]
        return self.origin + self.tsum[used] / n, self.sums[used] / n[:, None]


# ---------------------------------------------------------------------- writing


def _estimate_columns(config: TrainConfig) -> list[str]:
    names = ["time", "time_utc"]
    for vessel in config.vessels:
        for species in config.species:
            names += [f"{vessel.name}.{species}", f"{vessel.name}.{species}.std"]
    for vessel in config.vessels:
        names += [
            f"{vessel.name}.conversion",
            f"{vessel.name}.conversion_std",
            f"{vessel.name}.design_conversion",
        ]
    names += ["activity", "activity.std"]
    names += [f"feed.{species}" for species in config.species]
    names += ["flow"]
    return names


def _estimate_matrix(batch: EstimateBatch) -> FloatArray:
    """Return the numeric columns of :func:`_estimate_columns` (after ``time_utc``), (k, m)."""
    k = len(batch)
    n_v = batch.concentration.shape[1]
    conc = np.stack([batch.concentration, batch.concentration_std], axis=-1).reshape(k, -1)
    conv = np.stack(
        [batch.conversion, batch.conversion_std, batch.design_conversion], axis=-1
    ).reshape(k, 3 * n_v)
    return np.column_stack(
        [conc, conv, batch.activity, batch.activity_std, batch.feed, batch.inputs[:, 0]]
    )


def _rounded(values: FloatArray, digits: int) -> FloatArray:
    """Round each column to ``digits`` significant digits of its largest magnitude.

    The same arithmetic as ``numpy.round`` with a number of decimals per column, so
    the results print as short decimals.
    """
    top = np.max(np.abs(values), axis=0) if len(values) else np.zeros(values.shape[1])
    exponent = np.floor(np.log10(np.where(top > 0, top, 1.0)))
    decimals = digits - 1 - exponent
    power = 10.0 ** np.abs(decimals)
    up = decimals >= 0
    return np.where(up, np.rint(values * power) / power, np.rint(values / power) * power)


class _EstimateFiles:
    """``estimates.parquet`` (one row group per release) and ``estimates.csv``.

    The files are written by a worker thread, so that Arrow's encoding and I/O
    (which release the GIL) overlap the filter; the queue between them holds at
    most two releases.
    """

    def __init__(self, out: Path, config: TrainConfig) -> None:
        import queue
        import threading

        import pyarrow as pa
        import pyarrow.csv as pa_csv
        import pyarrow.parquet as pq

        self.names = _estimate_columns(config)
        numeric = [pa.field(n, pa.float64()) for n in self.names[2:]]
        self.schema = pa.schema(
            [pa.field("time", pa.float64()), pa.field("time_utc", pa.timestamp("us", tz="UTC"))]
            + numeric
        )
        self.csv_schema = pa.schema(
            [pa.field("time", pa.float64()), pa.field("time_utc", pa.string())] + numeric
        )
        self.parquet_path = out / "estimates.parquet"
        self.csv_path = out / "estimates.csv"
        self._parquet = pq.ParquetWriter(
            self.parquet_path,
            self.schema,
            compression="zstd",
            use_byte_stream_split=[n for n in self.names if n != "time_utc"],
            use_dictionary=False,
        )
        self._csv = pa_csv.CSVWriter(self.csv_path, self.csv_schema)
        self.rows = 0
        self._queue: queue.Queue[tuple[FloatArray, FloatArray] | None] = queue.Queue(maxsize=2)
        self._error: BaseException | None = None
        self._worker = threading.Thread(target=self._work, name="estimate-files", daemon=True)
        self._worker.start()

    def write(self, time: FloatArray, values: FloatArray) -> None:
        """Queue rows: times (k,) [s] and the numeric columns (k, m) of ``_estimate_matrix``."""
        if self._error is not None:
            raise self._error
        if len(time):
            self._queue.put((time, values))
            self.rows += len(time)

    def _work(self) -> None:
        while (item := self._queue.get()) is not None:
            if self._error is None:
                try:
                    self._write(*item)
                except BaseException as exc:  # handed to the main thread
                    self._error = exc

    def _write(self, time: FloatArray, values: FloatArray) -> None:
        import pyarrow as pa

        micro = np.round(time * 1e6).astype(np.int64)
        stamps = pa.array(micro, pa.int64()).cast(pa.timestamp("us", tz="UTC"))
        columns = [pa.array(values[:, j]) for j in range(values.shape[1])]
        self._parquet.write_batch(
            pa.record_batch([pa.array(time), stamps, *columns], schema=self.schema)
        )
        text = np.datetime_as_string(micro.astype("datetime64[us]"), unit="ms", timezone="UTC")
        iso = pa.array(text.astype("S")).cast(pa.string())
        rounded = _rounded(values, _CSV_DIGITS)
        columns = [pa.array(rounded[:, j]) for j in range(rounded.shape[1])]
        self._csv.write_batch(
            pa.record_batch([pa.array(time), iso, *columns], schema=self.csv_schema)
        )

    def close(self) -> None:
        """Write what is queued and close both files."""
        self._queue.put(None)
        self._worker.join()
        self._parquet.close()
        self._csv.close()
        if self._error is not None:
            raise self._error


class _EventFile:
    """A CSV of gated readings, steps or refusals, written as they become final."""

    def __init__(self, path: Path, header: Sequence[str]) -> None:
        self.path = path
        self._file: IO[str] = open(path, "w", encoding="utf-8", newline="")
        self._writer = csv.writer(self._file)
        self._writer.writerow(header)
        self.rows = 0

    def write(self, rows: Sequence[Sequence[Any]]) -> None:
        self._writer.writerows(rows)
        self.rows += len(rows)

    def close(self) -> None:
        self._file.close()


def _event_row(event: GatedReading) -> list[Any]:
    return [
        event.tag,
        _repr(event.time),
        _repr(event.sample_time),
        _repr(event.value),
        _repr(event.predicted),
        event.unit,
        _repr(event.nis),
        event.reason,
    ]


def _repr(value: float) -> str:
    return repr(float(value))


def _iso(time: float) -> str:
    """Epoch seconds as ISO 8601 UTC to the millisecond, as ``estimates.csv`` writes them."""
    stamp = np.array([round(time * 1e6)], dtype=np.int64).astype("datetime64[us]")
    return str(np.datetime_as_string(stamp, unit="ms", timezone="UTC")[0])


class _AlertLog:
    """``alerts.csv``, written as the session raises events, and the summary's tallies.

    Holds only what stays small whatever the replay's length: counters, the last
    two activation times of each alert (for chattering), the first rows of the log
    and the first few thousand activations for the plots.

    An activation is a transition into ``active_unacknowledged``; an interval runs
    from it to the next transition of the same alert out of the active states.
    """

    def __init__(self, path: Path) -> None:
        self.file = _EventFile(path, ALERT_FIELDS)
        self.head: list[AlertEvent] = []
        self.activations = 0
        self.clearings = 0
        self.by_rule: Counter[str] = Counter()
        self.by_priority: Counter[str] = Counter()
        self.by_alert: Counter[str] = Counter()
        self.by_kind: Counter[str] = Counter()
        self.ten_minutes: Counter[int] = Counter()
        self.days: Counter[int] = Counter()
        self.recent: dict[str, deque[float]] = {}
        self.chattering: dict[str, None] = {}  # an ordered set
        self.open: dict[str, AlertEvent] = {}
        self.intervals: list[AlertInterval] = []
        self.last_time = -math.inf
        self.out_of_order = 0

    def add(self, events: Sequence[AlertEvent]) -> None:
        """Write and count one output's events (the engine gives them in time order)."""
        if not events:
            return
        self.file.write([_alert_row(e) for e in events])
        room = ALERT_LOG_ROWS - len(self.head)
        if room > 0:
            self.head.extend(events[:room])
        for e in events:
            if e.time < self.last_time:
                self.out_of_order += 1
            self.last_time = max(self.last_time, e.time)
            if e.to_state == AlertState.ACTIVE_UNACKNOWLEDGED.value:
                self._activation(e)
            elif e.from_state in _ACTIVE and e.to_state not in _ACTIVE:
                self._clearing(e)

    def _activation(self, e: AlertEvent) -> None:
        self.activations += 1
        self.by_rule[e.rule] += 1
        self.by_priority[e.priority] += 1
        self.by_alert[e.alert_id] += 1
        self.by_kind[RULE_KINDS.get(e.rule, "other")] += 1
        self.ten_minutes[math.floor(e.time / _TEN_MINUTES)] += 1
        self.days[math.floor(e.time / _DAY)] += 1
        recent = self.recent.setdefault(e.alert_id, deque(maxlen=_CHATTER_COUNT - 1))
        if len(recent) == _CHATTER_COUNT - 1 and e.time - recent[0] <= _CHATTER_WINDOW:
            self.chattering[e.alert_id] = None
        recent.append(e.time)
        self.open[e.alert_id] = e

    def _clearing(self, e: AlertEvent) -> None:
        self.clearings += 1
        start = self.open.pop(e.alert_id, None)
        if start is not None:
            self._interval(start, e.time)

    def _interval(self, start: AlertEvent, end: float) -> None:
        if len(self.intervals) < _ALERT_PLOT_INTERVALS:
            self.intervals.append(
                AlertInterval(start.alert_id, start.rule, start.subject, start.priority,
                              start.time, end)
            )  # fmt: skip

    def close(self) -> None:
        """Close the file; activations still open become intervals without an end."""
        self.file.close()
        for start in self.open.values():
            self._interval(start, math.nan)
        self.intervals.sort(key=lambda i: i.start)

    def statistics(self, first: float, last: float) -> AlertStatistics:
        """Return the counts and rates over the replayed span ``first`` to ``last`` [s]."""
        span = last - first if math.isfinite(first) and math.isfinite(last) else math.nan
        periods = 0
        if math.isfinite(span):
            periods = math.floor(last / _TEN_MINUTES) - math.floor(first / _TEN_MINUTES) + 1
        stats = AlertStatistics(
            events=self.file.rows,
            activations=self.activations,
            clearings=self.clearings,
            by_rule=dict(sorted(self.by_rule.items())),
            by_priority={p: self.by_priority.get(p, 0) for p in ("high", "warning", "advisory")},
            by_alert=dict(sorted(self.by_alert.items())),
            by_kind=dict(sorted(self.by_kind.items())),
            per_10_min_max=max(self.ten_minutes.values(), default=0),
            per_10_min_mean=self.activations / (span / _TEN_MINUTES) if span > 0 else math.nan,
            per_day_max=max(self.days.values(), default=0),
            per_day_mean=self.activations / (span / _DAY) if span > 0 else math.nan,
            periods_10_min=periods,
            flood_periods=sum(1 for n in self.ten_minutes.values() if n > 10),
            chattering=len(self.chattering),
            chattering_alerts=list(self.chattering),
            active_at_end=sorted(self.open),
            out_of_order=self.out_of_order,
        )
        stats.guidance = alarm_guidance(stats)
        return stats


def _alert_row(e: AlertEvent) -> list[str]:
    return [
        _repr(e.time),
        _iso(e.time),
        e.alert_id,
        e.rule,
        e.subject,
        e.priority,
        e.from_state,
        e.to_state,
        "" if e.figure is None or not math.isfinite(e.figure) else _repr(e.figure),
        "" if e.threshold is None or not math.isfinite(e.threshold) else _repr(e.threshold),
        e.unit,
        e.message,
    ]


# ---------------------------------------------------------------------- session side


class _Decisions:
    """Gated readings, steps and NIS rows: the open span, and totals of the settled past.

    A rewind re-runs the filter from a snapshot and re-decides every reading after
    it, so everything at or after the re-run's first time is replaced by what the
    re-run reports. Once settled (older than the newest time minus the horizon,
    where no rewind can reach), entries are flushed and only their totals kept.
    """

    def __init__(self, group_names: Sequence[str]) -> None:
        self.settled = -math.inf
        self.gated: dict[tuple[str, float, float], GatedReading] = {}
        self.steps: dict[tuple[str, float, float], GatedReading] = {}
        self.nis = np.empty((0, 4))  # time, NIS, dof, group
        self.group_names = list(group_names)
        self.nis_sum = 0.0
        self.nis_dof = 0
        self.nis_updates = 0
        self.group_sum = np.zeros(len(group_names))
        self.group_dof = np.zeros(len(group_names), dtype=np.int64)
        self.group_updates = np.zeros(len(group_names), dtype=np.int64)

    def update(self, out: SessionOutput) -> None:
        """Replace what the output re-ran with its decisions.

        The re-run covers everything after its first time, but at that first time
        only the readings after the snapshot it resumed from: a late reading that
        shares its time stamp with readings already applied resumes the filter
        between them. So entries strictly after the first time are replaced
        wholesale, and entries at it by key.
        """
        if len(out.estimates) == 0:
            return
        first = float(out.estimates.time[0])
        if first < self.settled:
            # Everything unsettled lies after the re-run's first time.
            first, by_key = self.settled, False
        else:
            by_key = True
        for store, fresh in ((self.gated, out.gated), (self.steps, out.steps)):
            new = {(g.tag, g.sample_time, g.value): g for g in fresh if g.sample_time >= first}
            stale = [
                k
                for k, g in store.items()
                if g.sample_time > first or (g.sample_time == first and (k in new or not by_key))
            ]
            for k in stale:
                del store[k]
            store.update(new)
        fresh_nis = out.nis[out.nis[:, 0] >= first]
        t = self.nis[:, 0]
        keep = t < first
        if by_key:
            at_first = fresh_nis[fresh_nis[:, 0] == first, 3]
            keep |= (t == first) & ~np.isin(self.nis[:, 3], at_first)
        self.nis = np.vstack([self.nis[keep], fresh_nis])

    def settle(self, before: float) -> tuple[list[GatedReading], list[GatedReading]]:
        """Flush what is older than ``before`` [s]: returns its gated readings and steps."""
        if before <= self.settled:
            return [], []
        flushed: list[list[GatedReading]] = []
        for store in (self.gated, self.steps):
            done = sorted(
                (g for g in store.values() if g.sample_time < before),
                key=lambda g: (g.sample_time, g.tag),
            )
            for g in done:
                del store[(g.tag, g.sample_time, g.value)]
            flushed.append(done)
        old = self.nis[self.nis[:, 0] < before]
        self.nis = self.nis[self.nis[:, 0] >= before]
        self.nis_sum += float(old[:, 1].sum())
        self.nis_dof += int(round(float(old[:, 2].sum())))
        self.nis_updates += len(old)
        group = old[:, 3].astype(np.int64)
        n = len(self.group_names)
        self.group_sum += np.bincount(group, weights=old[:, 1], minlength=n)
        dof = np.bincount(group, weights=old[:, 2], minlength=n)
        self.group_dof += np.round(dof).astype(np.int64)
        self.group_updates += np.bincount(group, minlength=n)
        self.settled = before
        return flushed[0], flushed[1]


# ---------------------------------------------------------------------- scoring


@dataclass
class _TagInfo:
    """What the replay needs to know about each tag of the train, by session code.

    ``scale`` and ``offset`` convert a reading to SI (``SI = scale * value +
    offset``); ``dead_time`` [s] moves an analyzer reading to its sample time;
    ``measured`` lists (tag, location, species, code, kind) of every measured tag,
    ``location`` being a vessel or ``"feed"``; ``lab_state`` maps a lab tag's code
    to the index of the state it measures in a row of concentrations (N*S,).
    """

    scale: FloatArray
    offset: FloatArray
    dead_time: FloatArray
    is_measurement: NDArray[np.bool_]
    measured: list[tuple[str, str, str, int, str]]
    lab_state: dict[int, int]


def _tag_info(session: TrainSession) -> _TagInfo:
    config = session.config
    n = len(session.tags)
    scale, offset, dead = np.ones(n), np.zeros(n), np.zeros(n)
    measured: list[tuple[str, str, str, int, str]] = []
    for species, feed_source in config.feed.composition.items():
        if isinstance(feed_source, TagInput):
            if config.feed.model == "state":
                code = int(session.codes([feed_source.tag])[0])
                measured.append((feed_source.tag, "feed", species, code, "feed analyzer"))
    lab_state: dict[int, int] = {}
    for meas in config.measurements:
        code = int(session.codes([meas.tag])[0])
        measured.append((meas.tag, meas.location, meas.species, code, meas.kind))
        if meas.kind == "lab":
            vessel = config.vessel_index(meas.location)
            lab_state[code] = vessel * len(config.species) + config.species_index(meas.species)
    for tag, (_, tag_scale, tag_offset) in config.tag_units().items():
        code = int(session.codes([tag])[0])
        scale[code], offset[code] = tag_scale, tag_offset
        kind = session.filter.classify(tag)
        dead[code] = kind[2] if kind is not None else 0.0
    is_meas = np.zeros(n, dtype=bool)
    is_meas[[m[3] for m in measured]] = True
    return _TagInfo(scale, offset, dead, is_meas, measured, lab_state)


class _Scores:
    """Running error sums against the truth and the lab results."""

    def __init__(
        self, config: TrainConfig, truth: dict[str, FloatArray] | None, lab: dict[int, int]
    ) -> None:
        self.truth = truth
        n_v, n_s = len(config.vessels), len(config.species)
        self.reactant = config.species.index(config.reaction.reactant)
        self.start: float | None = None
        self.warm_up = sum(v.volume for v in config.vessels) / config.feed.flow.nominal
        self.sq = np.zeros((n_v, n_s))
        self.err = np.zeros((n_v, n_s))
        self.zsq = np.zeros((n_v, n_s))
        self.rows = np.zeros((n_v, n_s), dtype=np.int64)
        self.feed_sum = 0.0
        self.feed_rows = 0
        self.act_sq = 0.0
        self.act_max = 0.0
        self.act_rows = 0
        self.lab_state = lab
        self.lab_codes = list(lab)
        self.lab_pending = np.empty((0, 3))  # code, sample time, SI value
        self.lab_sq: dict[int, float] = dict.fromkeys(lab, 0.0)
        self.lab_err: dict[int, float] = dict.fromkeys(lab, 0.0)
        self.lab_n: dict[int, int] = dict.fromkeys(lab, 0)
        self.last_row: FloatArray | None = None
        self.columns: list[tuple[int, int, FloatArray]] = []
        self.truth_time = np.empty(0)
        self.truth_activity: FloatArray | None = None
        if truth is not None:
            self.truth_time = truth["time"]
            for i, vessel in enumerate(config.vessels):
                for s, species in enumerate(config.species):
                    self.columns.append((i, s, truth[f"{vessel.name}.{species}"]))
            self.truth_activity = truth.get("activity")

    def add(self, batch: EstimateBatch) -> None:
        """Score released estimate rows (in time order, each row once)."""
        if len(batch) == 0:
            return
        if self.start is None:
            self.start = float(batch.time[0])
        self._labs(batch)
        warm = batch.time >= self.start + self.warm_up
        if self.truth is not None and len(self.truth_time):
            warm &= (batch.time >= self.truth_time[0]) & (batch.time <= self.truth_time[-1])
        if not np.any(warm):
            return
        t = batch.time[warm]
        self.feed_sum += float(batch.feed[warm, self.reactant].sum())
        self.feed_rows += int(t.size)
        if self.truth is None:
            return
        for i, s, column in self.columns:
            e = batch.concentration[warm, i, s] - np.interp(t, self.truth_time, column)
            sd = batch.concentration_std[warm, i, s]
            self.sq[i, s] += float(e @ e)
            self.err[i, s] += float(e.sum())
            z = e / np.where(sd > 0, sd, np.inf)
            self.zsq[i, s] += float(z @ z)
            self.rows[i, s] += int(t.size)
        if self.truth_activity is not None:
            e = batch.activity[warm] - np.interp(t, self.truth_time, self.truth_activity)
            self.act_sq += float(e @ e)
            self.act_max = max(self.act_max, float(np.max(np.abs(e))))
            self.act_rows += int(t.size)

    def add_labs(
        self, codes: IntArray, sample_times: FloatArray, si_values: FloatArray, sign: float
    ) -> None:
        """Queue lab results until the estimates around their sample time are final.

        With ``sign`` < 0, drop queued results again (the session refused them).
        """
        if not self.lab_codes:
            return
        lab = np.isin(codes, self.lab_codes)
        if not np.any(lab):
            return
        rows = np.column_stack([codes[lab], sample_times[lab], si_values[lab]])
        if sign > 0:
            self.lab_pending = np.vstack([self.lab_pending, rows])
            return
        pending = self.lab_pending
        drop = (pending[:, None, :] == rows[None, :, :]).all(axis=2).any(axis=1)
        self.lab_pending = pending[~drop]

    def _labs(self, batch: EstimateBatch) -> None:
        conc = batch.concentration.reshape(len(batch), -1)
        if len(self.lab_pending):
            due = self.lab_pending[:, 1] <= batch.time[-1]
            for code, t, value in self.lab_pending[due].tolist():
                i = int(np.searchsorted(batch.time, t, side="left")) - 1
                row = conc[i] if i >= 0 else self.last_row
                if row is None:
                    continue
                j = self.lab_state[int(code)]
                e = float(row[j]) - value
                self.lab_sq[int(code)] += e * e
                self.lab_err[int(code)] += e
                self.lab_n[int(code)] += 1
            self.lab_pending = self.lab_pending[~due]
        self.last_row = conc[-1].copy()


def _read_truth(path: Path, config: TrainConfig) -> dict[str, FloatArray]:
    from service.archive import read_truth

    truth = read_truth(path)
    needed = [f"{v.name}.{s}" for v in config.vessels for s in config.species]
    for name in needed:
        if name not in truth:
            raise ArchiveError(
                f"{path}: no {name!r} column; a truth file needs time and "
                "<vessel>.<species> for every vessel and species [mol/m^3]"
            )
    order = np.argsort(truth["time"], kind="stable")
    return {name: np.asarray(col, dtype=np.float64)[order] for name, col in truth.items()}


# ---------------------------------------------------------------------- the replay


def replay(
    archive: Path,
    config: Path | TrainConfig,
    out: Path,
    *,
    truth: Path | None = None,
    chunk_seconds: float = 86400.0,
    progress: bool = True,
    ignore_unknown: bool = False,
    report: bool = True,
) -> ReplaySummary:
    """Replay an archive through one estimator session; write estimates, events and a report.

    Parameters
    ----------
    archive : pathlib.Path
        ``.csv``, ``.csv.gz`` or ``.parquet``, long form (``time, tag, value``
        and optionally ``received``) or wide form (``time`` and a column per tag).
        Times in epoch seconds [s] or ISO 8601 with a UTC offset; values in each
        tag's configured unit.
    config : pathlib.Path or TrainConfig
        The train (a TOML or JSON file, or the loaded description).
    out : pathlib.Path
        Folder for the files (created; files in it are replaced).
    truth : pathlib.Path, optional
        A truth file (wide: ``time``, ``<vessel>.<species>`` [mol/m^3] and
        optionally ``activity`` [-]) to score the estimates against.
    chunk_seconds : float
        Length of each chunk of arrival time handed to the session [s].
    progress : bool
        Show a progress bar (only on a terminal).
    ignore_unknown : bool
        Skip and count readings of tags the train does not have, instead of
        refusing the archive.
    report : bool
        Also write ``report.html`` and its plots.

    Returns
    -------
    ReplaySummary
        Counts, accuracy and consistency figures; also written to ``summary.json``.

    Raises
    ------
    service.archive.ArchiveError
        The archive or truth file is missing or unreadable, lacks a column, holds
        a value that is no number or a time that is no time, or names tags the
        train does not have (unless ``ignore_unknown``); one line naming the file.
    estimator.errors.ConfigError
        The train file is invalid.
    ValueError
        ``chunk_seconds`` is not a positive number.
    """
    began = _time.perf_counter()
    if not (math.isfinite(chunk_seconds) and chunk_seconds > 0):
        raise ValueError(f"chunk length must be a positive number of seconds, got {chunk_seconds}")
    if not isinstance(config, TrainConfig):
        from estimator.config import load_train_config

        config = load_train_config(config)
    archive, out = Path(archive), Path(out)
    stream = ArchiveStream(archive)
    session = TrainSession(config)
    known = set(session.tags)
    unknown_tags = [name for name in stream.tag_names() if name not in known]
    if unknown_tags and not ignore_unknown:
        shown = ", ".join(unknown_tags[:8]) + (", ..." if len(unknown_tags) > 8 else "")
        raise ArchiveError(
            f"{archive}: {len(unknown_tags)} tag(s) not in train {config.name!r}: {shown}; "
            "fix the tag names or replay with --ignore-unknown to skip them"
        )
    truth_data = _read_truth(Path(truth), config) if truth is not None else None

    out.mkdir(parents=True, exist_ok=True)
    summary = ReplaySummary(
        train=config.name,
        title=config.title,
        archive=str(archive),
        form=stream.form,
        ordered_by="received" if stream.has_received else "time",
        out=str(out),
        truth=None if truth is None else str(truth),
        unknown_tags=unknown_tags,
    )
    run = _Run(session, stream, out, summary, truth_data, chunk_seconds)
    try:
        run.execute(progress and sys.stderr.isatty())
    finally:
        run.close()
    run.finish()
    _clock(summary, began)  # the report shows the time taken up to it
    if report:
        from service.report import write_report

        before = summary.elapsed
        summary.files["report"] = str(write_report(out, summary, run.series()))
        _clock(summary, began)
        summary.report_seconds = summary.elapsed - before
    summary_path = out / "summary.json"
    summary.files["summary"] = str(summary_path)
    summary_path.write_text(json.dumps(summary.to_dict(), indent=2) + "\n", encoding="utf-8")
    return summary


def _clock(summary: ReplaySummary, began: float) -> None:
    summary.elapsed = _time.perf_counter() - began
    summary.steps_per_second = summary.time_steps / summary.elapsed


class _Run:
    """The state of one replay: the pool of pending readings, the outputs, the tallies."""

    def __init__(
        self,
        session: TrainSession,
        stream: ArchiveStream,
        out: Path,
        summary: ReplaySummary,
        truth: dict[str, FloatArray] | None,
        chunk_seconds: float,
    ) -> None:
        config = session.config
        self.session = session
        self.stream = stream
        self.summary = summary
        self.chunk = chunk_seconds
        self.horizon = config.estimator.horizon
        self.info = _tag_info(session)
        # A NIS row's group is the index of the group's first measurement.
        measurements = session.filter.measurements
        names: dict[int, list[str]] = {}
        for m in measurements:
            names.setdefault(m.group, []).append(m.tag)
        first = {g: min(i for i, m in enumerate(measurements) if m.group == g) for g in names}
        group_names = [""] * len(measurements)
        for g, tags in names.items():
            group_names[first[g]] = "+".join(tags)
        self.decisions = _Decisions(group_names)
        self.scores = _Scores(config, truth, self.info.lab_state)
        self.buffer = RevisionBuffer()
        self.released_to = -math.inf
        self.last_time = -math.inf
        n_v, n_s = len(config.vessels), len(config.species)
        width = 2 * n_v * n_s + 3 * n_v + 2 + n_s + 1
        self.est_bins = _Bins(width)
        self.meas_bins = {code: _Bins(1) for _, _, _, code, _ in self.info.measured}
        self.gated_points: dict[str, list[tuple[float, float]]] = {}
        self.step_points: dict[str, list[tuple[float, float]]] = {}
        self.gated_count: dict[str, int] = {}
        self.files = _EstimateFiles(out, config)
        header = list(_EVENT_FIELDS)
        self.gated_file = _EventFile(out / "gated.csv", header)
        self.steps_file = _EventFile(out / "steps.csv", header)
        self.refused_file = _EventFile(out / "refused.csv", ["tag", "time", "value", "reason"])
        self.alert_log = _AlertLog(out / "alerts.csv")
        # Pool of read, not yet ingested readings: session code, time, value, order key.
        self.pool = np.empty((0, 4))
        self.next_edge = math.nan
        self.max_time = -math.inf
        self.watermark = -math.inf

    # -- reading and chunking

    def execute(self, show: bool) -> None:
        """Read the archive batch by batch and feed the session chunk by chunk."""
        stream = self.stream
        code_of = np.empty(0, dtype=np.int64)
        progress, task = _progress(show, stream)
        try:
            for batch in stream:
                if len(code_of) < len(stream.names):
                    code_of = self.session.codes(stream.names)
                self.summary.rows += batch.rows
                self._take(batch, code_of[batch.codes])
                while self.watermark >= self.next_edge + self.horizon:
                    self._chunk(self.next_edge)
                if progress is not None:
                    progress.update(task, completed=batch.progress)
            while len(self.pool):
                self._chunk(self.next_edge)
            # The alert rules run once per interval of plant time: judge the last.
            self.alert_log.add(self.session.flush_alerts())
        finally:
            if progress is not None:
                progress.stop()
        self._release(math.inf)

    def _take(self, batch: ArchiveBatch, codes: IntArray) -> None:
        n = len(batch.times)
        if n == 0:
            return
        times = batch.times
        running = np.maximum.accumulate(np.concatenate([[self.max_time], times]))
        self.summary.unsorted += int(np.count_nonzero(times < running[:-1]))
        self.max_time = float(running[-1])
        unknown = codes < 0
        if np.any(unknown):
            self.summary.unknown += int(np.count_nonzero(unknown))
        key = times
        if batch.received is not None:
            key = np.where(np.isfinite(batch.received), batch.received, times)
        keep = ~unknown
        rows = np.column_stack([codes[keep], times[keep], batch.values[keep], key[keep]])
        if not len(rows):
            return
        rows = rows[np.argsort(rows[:, 3], kind="stable")]
        if math.isnan(self.next_edge):
            self.next_edge = float(rows[0, 3]) + self.chunk
        pool = self.pool
        self.pool = np.vstack([pool, rows]) if len(pool) else rows
        if len(pool) and rows[0, 3] < pool[-1, 3]:
            # Arrival order goes back across batches: keep the pool sorted by it.
            self.pool = self.pool[np.argsort(self.pool[:, 3], kind="stable")]
        self.watermark = max(self.watermark, float(rows[-1, 3]))

    def _chunk(self, edge: float) -> None:
        """Ingest the pooled readings that arrived before ``edge``; advance the edge."""
        pool = self.pool  # sorted by arrival
        n = int(np.searchsorted(pool[:, 3], edge, side="left"))
        if n == 0:
            # Skip empty stretches of arrival time in whole chunks.
            skip = math.floor((float(pool[0, 3]) - edge) / self.chunk) + 1
            self.next_edge = edge + self.chunk * max(skip, 1)
            return
        rows, self.pool = pool[:n], pool[n:]
        self.next_edge = edge + self.chunk
        rows = self._deduplicate(rows)
        codes = rows[:, 0].astype(np.int64)
        times, values = rows[:, 1], rows[:, 2]
        self.summary.readings += len(rows)
        self._bin_readings(codes, times, values, 1.0)
        output = self.session.ingest_codes(codes, times, values)
        self._absorb(output)
        cut = self.last_time - self.horizon
        self._release(cut)

    def _deduplicate(self, rows: FloatArray) -> FloatArray:
        """Order rows by (time, tag), drop exact repeats; count repeats and conflicts.

        A repeat has the tag, time and value of an earlier row; a conflict the tag
        and time but another value (the session takes both values).
        """
        rows = rows[np.lexsort((rows[:, 0], rows[:, 1]))]
        same_key = np.zeros(len(rows), dtype=bool)
        same_key[1:] = (rows[1:, 0] == rows[:-1, 0]) & (rows[1:, 1] == rows[:-1, 1])
        if not np.any(same_key):
            return rows
        # Rare: order by value within each (time, tag) too, comparing bit patterns
        # so that NaN repeats NaN.
        bits = rows[:, 2].view(np.int64)
        order = np.lexsort((bits, rows[:, 0], rows[:, 1]))
        rows, bits = rows[order], bits[order]
        same_key[1:] = (rows[1:, 0] == rows[:-1, 0]) & (rows[1:, 1] == rows[:-1, 1])
        repeat = same_key.copy()
        repeat[1:] &= bits[1:] == bits[:-1]
        self.summary.duplicates += int(np.count_nonzero(repeat))
        self.summary.conflicts += int(np.count_nonzero(same_key & ~repeat))
        return rows[~repeat]

    # -- what the session said

    def _absorb(self, output: SessionOutput) -> None:
        if output.refused:
            self._refused(output.refused)
        self.alert_log.add(output.alerts)
        self.buffer.add(output.estimates)
        if len(output.estimates):
            self.last_time = max(self.last_time, float(output.estimates.time[-1]))
        self.decisions.update(output)

    def _refused(self, refused: list[Refusal]) -> None:
        self.summary.refused += len(refused)
        self.refused_file.write([[r.tag, _repr(r.time), _repr(r.value), r.reason] for r in refused])
        codes = self.session.codes([r.tag for r in refused])
        known = codes >= 0
        if np.any(known):
            times = np.array([r.time for r in refused])[known]
            values = np.array([r.value for r in refused])[known]
            self._bin_readings(codes[known], times, values, -1.0)

    def _bin_readings(
        self,
        codes: IntArray,
        times: FloatArray,
        values: FloatArray,
        sign: float,
    ) -> None:
        """Add (or take out) measurement readings, in SI at sample time, for the plots."""
        info = self.info
        meas = info.is_measurement[codes] & np.isfinite(values) & np.isfinite(times)
        if not np.any(meas):
            return
        c = codes[meas]
        si = info.scale[c] * values[meas] + info.offset[c]
        sample = times[meas] - info.dead_time[c]
        self.summary.measurement_readings += int(sign) * int(c.size)
        self.scores.add_labs(c, sample, si, sign)
        for code in np.unique(c).tolist():
            sel = c == code
            self.meas_bins[code].add(sample[sel], si[sel, None], sign)

    def _release(self, before: float) -> None:
        """Write the estimates older than ``before`` [s] and settle their decisions."""
        batch = self.buffer.release(before)
        if batch is not None and batch.time[0] < self.released_to:
            # A rewind to a snapshot just before the last cut re-sent written rows.
            batch = batch.take(batch.time >= self.released_to)
        if batch is not None and len(batch):
            values = _estimate_matrix(batch)
            self.files.write(batch.time, values)
            self.est_bins.add(batch.time, values)
            self.scores.add(batch)
            self.summary.time_steps += len(batch)
            if math.isnan(self.summary.first_time):
                self.summary.first_time = float(batch.time[0])
            self.summary.last_time = float(batch.time[-1])
        if before > self.released_to:
            self.released_to = before
        gated, steps = self.decisions.settle(before)
        if gated:
            self.gated_file.write([_event_row(g) for g in gated])
            self._gated_points(gated, self.gated_points, count=True)
        if steps:
            self.steps_file.write([_event_row(g) for g in steps])
            self._gated_points(steps, self.step_points, count=False)

    def _gated_points(
        self, events: list[GatedReading], store: dict[str, list[tuple[float, float]]], count: bool
    ) -> None:
        info = self.info
        codes = self.session.codes([g.tag for g in events])
        for g, code in zip(events, codes.tolist(), strict=True):
            si = info.scale[code] * g.value + info.offset[code]
            if count:
                self.gated_count[g.tag] = self.gated_count.get(g.tag, 0) + 1
                self.meas_bins[code].add(np.array([g.sample_time]), np.array([[si]]), -1.0)
            points = store.setdefault(g.tag, [])
            if len(points) < _GATED_PLOT_POINTS:
                points.append((g.sample_time, si))

    # -- the end

    def close(self) -> None:
        self.files.close()
        for f in (self.gated_file, self.steps_file, self.refused_file):
            f.close()
        self.alert_log.close()

    def finish(self) -> None:
        """Fill the summary's figures from the tallies."""
        s = self.summary
        config = self.session.config
        d = self.decisions
        s.gated = self.gated_file.rows
        s.steps = self.steps_file.rows
        s.gated_share = s.gated / s.measurement_readings if s.measurement_readings else 0.0
        s.nis = nis_statistics(d.nis_sum, d.nis_dof, d.nis_updates)
        s.nis_by_tag = {
            name: nis_statistics(
                float(d.group_sum[g]), int(d.group_dof[g]), int(d.group_updates[g])
            )
            for g, name in enumerate(d.group_names)
            if name
        }
        sc = self.scores
        s.residence_time = sc.warm_up
        s.warm_up = sc.warm_up
        s.feed_reactant_mean = sc.feed_sum / sc.feed_rows if sc.feed_rows else math.nan
        measured = {(loc, sp) for _, loc, sp, _, _ in self.info.measured}
        if sc.truth is not None:
            for i, vessel in enumerate(config.vessels):
                for j, species in enumerate(config.species):
                    n = int(sc.rows[i, j])
                    rmse = math.sqrt(sc.sq[i, j] / n) if n else math.nan
                    s.accuracy.append(
                        Accuracy(
                            vessel=vessel.name,
                            species=species,
                            measured=(vessel.name, species) in measured,
                            rmse=rmse,
                            share=rmse / s.feed_reactant_mean if n else math.nan,
                            bias=float(sc.err[i, j]) / n if n else math.nan,
                            z_rms=math.sqrt(sc.zsq[i, j] / n) if n else math.nan,
                            rows=n,
                        )
                    )
            if sc.act_rows:
                s.activity_rmse = math.sqrt(sc.act_sq / sc.act_rows)
                s.activity_max_error = sc.act_max
        for tag, loc, sp, code, kind in self.info.measured:
            if kind != "lab":
                continue
            n = sc.lab_n[code]
            s.lab.append(
                LabAccuracy(
                    tag=tag,
                    vessel=loc,
                    species=sp,
                    count=n,
                    rmse=math.sqrt(sc.lab_sq[code] / n) if n else math.nan,
                    bias=sc.lab_err[code] / n if n else math.nan,
                )
            )
        s.alerts = self.alert_log.statistics(s.first_time, s.last_time)
        s.files.update(
            estimates_parquet=str(self.files.parquet_path),
            estimates_csv=str(self.files.csv_path),
            gated=str(self.gated_file.path),
            steps=str(self.steps_file.path),
            refused=str(self.refused_file.path),
            alerts=str(self.alert_log.file.path),
        )

    def series(self) -> ReplaySeries:
        """Return the binned series for the plots."""
        config = self.session.config
        n_v, n_s = len(config.vessels), len(config.species)
        t, m = self.est_bins.means()
        k = len(t)
        conc = m[:, : 2 * n_v * n_s].reshape(k, n_v, n_s, 2)
        c0 = 2 * n_v * n_s
        conv = m[:, c0 : c0 + 3 * n_v].reshape(k, n_v, 3)
        a0 = c0 + 3 * n_v
        series = ReplaySeries(
            vessels=tuple(v.name for v in config.vessels),
            species=tuple(config.species),
            reactant=config.reaction.reactant,
            time=t,
            concentration=conc[..., 0],
            concentration_std=conc[..., 1],
            conversion=conv[..., 0],
            conversion_std=conv[..., 1],
            design_conversion=conv[..., 2],
            activity=m[:, a0],
            activity_std=m[:, a0 + 1],
            feed=m[:, a0 + 2 : a0 + 2 + n_s],
            alert_intervals=list(self.alert_log.intervals),
            alert_log=list(self.alert_log.head),
        )
        truth = self.scores.truth
        if truth is not None and self.est_bins.origin is not None:
            bins = _Bins(n_v * n_s + 1, width=self.est_bins.width)
            bins.origin = self.est_bins.origin
            tt = truth["time"]
            inside = (tt >= t[0]) & (tt <= t[-1]) if k else np.zeros(len(tt), dtype=bool)
            cols = [truth[f"{v.name}.{sp}"] for v in config.vessels for sp in config.species]
            cols.append(truth.get("activity", np.full(len(tt), np.nan)))
            bins.add(tt[inside], np.column_stack(cols)[inside])
            bt, bm = bins.means()
            series.truth_time = bt
            series.truth_concentration = bm[:, : n_v * n_s].reshape(len(bt), n_v, n_s)
            if "activity" in truth:
                series.truth_activity = bm[:, -1]
        for tag, loc, sp, code, kind in self.info.measured:
            mt, mv = self.meas_bins[code].means()
            gated = np.array(self.gated_points.get(tag, []), dtype=float).reshape(-1, 2)
            steps = np.array(self.step_points.get(tag, []), dtype=float).reshape(-1, 2)
            series.measurements.append(
                MeasurementSeries(
                    tag=tag,
                    location=loc,
                    species=sp,
                    kind=kind,
                    time=mt,
                    value=mv[:, 0],
                    gated_time=gated[:, 0],
                    gated_value=gated[:, 1],
                    step_time=steps[:, 0],
                    step_value=steps[:, 1],
                    gated_total=self.gated_count.get(tag, 0),
                )
            )
        return series


def _progress(show: bool, stream: ArchiveStream) -> tuple[Any, Any]:
    """Start a rich progress bar on stderr (or return None when not shown)."""
    if not show:
        return None, None
    from rich.console import Console
    from rich.progress import (
        BarColumn,
        Progress,
        TaskProgressColumn,
        TextColumn,
        TimeRemainingColumn,
    )

    progress = Progress(
        TextColumn("replaying {task.description}"),
        BarColumn(),
        TaskProgressColumn(),
        TimeRemainingColumn(),
        console=Console(stderr=True),
        transient=True,
    )
    task = progress.add_task(stream.path.name, total=stream.total)
    progress.start()
    return progress, task
