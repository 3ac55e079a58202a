"""The lifecycle of an alert: condition timing and the alarm states. Pure: no I/O.

An alert's *condition* is what its rule says about the plant: each evaluation gives
two tests, one to activate (the figure beyond its limit) and one to clear (the figure
back inside the limit less its deadband), and :class:`Condition` applies the
on-delay and off-delay to them in plant time, as OPC UA Part 9 (Alarms and
Conditions, sec. 5.8.18) defines ``OnDelay``, ``OffDelay`` and ``AlarmDeadband``
[V, REFERENCES.md sec. 6].

The *state* is what the operator sees, after ISA-18.2 and IEC 62682 [M,
REFERENCES.md sec. 6]::

    normal --condition active--> active_unacknowledged
    active_unacknowledged --acknowledge--> active_acknowledged
    active_unacknowledged --condition clears--> cleared_unacknowledged
    active_acknowledged --condition clears--> normal
    cleared_unacknowledged --acknowledge--> normal
    cleared_unacknowledged --condition active--> active_unacknowledged
    any but out_of_service --shelve--> shelved (until an expiry time)
    any --remove from service--> out_of_service
    shelved --unshelve or expiry--> what the condition dictates
    out_of_service --return to service--> what the condition dictates

"What the condition dictates" is ``active_unacknowledged`` when the condition is
active and ``normal`` otherwise. A shelved or out-of-service alert keeps tracking
its condition silently, so its state is right the moment it comes back.

:class:`AlertBook` holds every alert of a train and the ordered log of
:class:`AlertEvent` transitions; :mod:`estimator.alerts` decides when conditions
change and what the messages say.
"""

from __future__ import annotations

import math
from dataclasses import asdict, dataclass, replace
from datetime import UTC, datetime
from enum import StrEnum
from typing import Any

import numpy as np

from estimator.errors import StagewatchError
from estimator.model import FloatArray

__all__ = [
    "DISCLAIMER",
    "SYSTEM",
    "Alert",
    "AlertActionError",
    "AlertBook",
    "AlertEvent",
    "AlertState",
    "Condition",
    "Priority",
]

#: Ends every alert message: what stagewatch is and is not (DESIGN.md, "Safety").
DISCLAIMER = "stagewatch is a monitoring aid, not a safety system; follow your site's procedures."

#: ``who`` of the transitions stagewatch makes itself (activation, clearing, expiry).
SYSTEM = "stagewatch"

#: How many events :class:`AlertBook` keeps in memory and in its state dict.
EVENT_HISTORY = 10_000


class AlertState(StrEnum):
    """The alarm states of ISA-18.2 / IEC 62682 that stagewatch uses."""

    NORMAL = "normal"
    ACTIVE_UNACKNOWLEDGED = "active_unacknowledged"
    ACTIVE_ACKNOWLEDGED = "active_acknowledged"
    CLEARED_UNACKNOWLEDGED = "cleared_unacknowledged"
    SHELVED = "shelved"
    OUT_OF_SERVICE = "out_of_service"


class Priority(StrEnum):
    """How urgently an alert asks for attention, most urgent first."""

    HIGH = "high"
    WARNING = "warning"
    ADVISORY = "advisory"


_PRIORITY_ORDER = {Priority.HIGH: 0, Priority.WARNING: 1, Priority.ADVISORY: 2}
_ANNUNCIATED = (
    AlertState.ACTIVE_UNACKNOWLEDGED,
    AlertState.ACTIVE_ACKNOWLEDGED,
    AlertState.CLEARED_UNACKNOWLEDGED,
)


class AlertActionError(StagewatchError, ValueError):
    """An operator action that does not apply: unknown alert or wrong state."""


def format_time(time: float) -> str:
    """Epoch seconds as ISO 8601 in UTC to the minute, for messages (``2026-03-22T06:00Z``)."""
    if not math.isfinite(time):
        return "never"
    return datetime.fromtimestamp(time, UTC).strftime("%Y-%m-%dT%H:%MZ")


def _finite(value: float | None) -> float | None:
    """JSON-safe float: None for missing or non-finite values."""
    if value is None or not math.isfinite(value):
        return None
    return float(value)


@dataclass(frozen=True)
class AlertEvent:
    """One state transition of one alert.

    Attributes
    ----------
    sequence : int
        Position in the train's event log, from 1, never reused.
    alert_id : str
        The alert, ``"<rule>:<subject>"``.
    rule : str
        The rule that owns the alert (e.g. ``"conversion_shortfall_warning"``).
    subject : str
        The vessel, tag or train the alert is about.
    priority : str
        ``"high"``, ``"warning"`` or ``"advisory"``.
    time : float
        When the transition happened, in plant time [s since the epoch].
    from_state, to_state : str
        :class:`AlertState` values.
    who : str
        ``"stagewatch"`` for automatic transitions, else the person acting.
    why : str
        The reason: the timing that fired, or the operator's words.
    figure : float or None
        The rule's figure at the transition [``unit``] (a shortfall, a staleness).
    threshold : float or None
        The limit the figure is compared with [``unit``].
    unit : str
        Unit of ``figure`` and ``threshold`` (``""`` when dimensionless).
    message : str
        What happened in plain words, ending with :data:`estimator.alerts.DISCLAIMER`.
    """

    sequence: int
    alert_id: str
    rule: str
    subject: str
    priority: str
    time: float
    from_state: str
    to_state: str
    who: str
    why: str
    figure: float | None
    threshold: float | None
    unit: str
    message: str

    def to_dict(self) -> dict[str, Any]:
        """Return the event as JSON-safe builtins (non-finite numbers as None)."""
        out = asdict(self)
        out["figure"] = _finite(self.figure)
        out["threshold"] = _finite(self.threshold)
        return out

    @classmethod
    def from_dict(cls, data: dict[str, Any]) -> AlertEvent:
        """Rebuild an event from :meth:`to_dict` output."""
        return cls(**data)


@dataclass(frozen=True)
class Alert:
    """A snapshot of one alert, as :meth:`AlertBook.alerts` returns it.

    Attributes
    ----------
    alert_id, rule, subject, priority : str
        As in :class:`AlertEvent`.
    title : str
        What the alert watches, in a few words (``"R-201 conversion shortfall,
        warning band"``).
    state : str
        Its :class:`AlertState`.
    condition_active : bool
        Whether the rule's condition holds (after its delays), shelved or not.
    since : float or None
        Time of the last state change [s since the epoch].
    activated_at : float or None
        When the condition last became active [s since the epoch].
    figure, threshold : float or None
        The latest figure and limit reported [``unit``].
    unit : str
        Their unit.
    message : str
        What the rule last said about the plant, ending with :data:`DISCLAIMER`.
    shelved_until : float or None
        Expiry of the shelving [s since the epoch], when shelved.
    note : str
        The reason given with the latest operator action.
    """

    alert_id: str
    rule: str
    subject: str
    priority: str
    title: str
    state: str
    condition_active: bool
    since: float | None
    activated_at: float | None
    figure: float | None
    threshold: float | None
    unit: str
    message: str
    shelved_until: float | None
    note: str


class Condition:
    """On-delay and off-delay of one alert's condition, in plant time.

    The rule supplies, per evaluation time, ``on`` (the activation test: the figure
    beyond the limit) and ``off`` (the clearing test: the figure back inside the
    limit less the deadband; with a deadband of zero or more, ``off`` implies not
    ``on``). The condition becomes active at the first evaluation at which ``on``
    has held at every evaluation for at least ``on_delay``, and clears at the
    first at which ``off`` has held for at least ``off_delay``. An evaluation
    with neither (inside the deadband, or no figure) restarts both timers.

    Parameters
    ----------
    on_delay, off_delay : float
        [s]; zero acts at the first evaluation that passes the test.

    Notes
    -----
    OPC UA Part 9, sec. 5.8.18 (``OnDelay``: the value must stay beyond the limit
    this long before the alarm goes active; ``OffDelay``: it must stay back this
    long before it clears) [V, REFERENCES.md sec. 6]. Because two activations are
    at least ``off_delay + on_delay`` apart, delays of 30 s or more rule out the
    chattering criterion of 3 activations in 60 s [V, practitioner criterion].
    """

    def __init__(self, on_delay: float, off_delay: float) -> None:
        self.on_delay = float(on_delay)
        self.off_delay = float(off_delay)
        self.active = False
        self.pending_since: float | None = None
        self.clearing_since: float | None = None

    def run(self, times: FloatArray, on: np.ndarray, off: np.ndarray) -> list[tuple[int, bool]]:
        """Advance over evaluations in time order; return each change.

        Parameters
        ----------
        times : ndarray, shape (k,)
            Evaluation times, increasing [s].
        on, off : ndarray of bool, shape (k,)
            The activation and clearing tests at each time.

        Returns
        -------
        list of (int, bool)
            (index into ``times``, new condition) at every change, in order.
        """
        changes: list[tuple[int, bool]] = []
        n = len(times)
        if n == 0:
            return changes
        on_at = np.flatnonzero(on)
        off_at = np.flatnonzero(off)
        not_on = np.flatnonzero(~on)
        not_off = np.flatnonzero(~off)
        i = 0
        while i < n:
            if self.active:
                since, hits, misses, delay = self.clearing_since, off_at, not_off, self.off_delay
            else:
                since, hits, misses, delay = self.pending_since, on_at, not_on, self.on_delay
            if since is None:
                k = int(np.searchsorted(hits, i))
                if k == len(hits):
                    break
                i = int(hits[k])
                since = float(times[i])
            k = int(np.searchsorted(misses, i))
            end = int(misses[k]) if k < len(misses) else n
            fire = i + int(np.searchsorted(times[i:end], since + delay, side="left"))
            if fire < end:
                self.active = not self.active
                self.pending_since = None
                self.clearing_since = None
                changes.append((fire, self.active))
                i = fire + 1
                continue
            if end < n:
                since = None
                i = end
            else:
                i = n
            if self.active:
                self.clearing_since = since
            else:
                self.pending_since = since
        return changes

    def state(self) -> dict[str, Any]:
        """Timers and condition as JSON-safe builtins."""
        return {
            "active": self.active,
            "pending_since": self.pending_since,
            "clearing_since": self.clearing_since,
        }

    def load(self, data: dict[str, Any]) -> None:
        """Set timers and condition from :meth:`state` output."""
        self.active = bool(data["active"])
        self.pending_since = _optional_float(data.get("pending_since"))
        self.clearing_since = _optional_float(data.get("clearing_since"))


def _said(why: str) -> str:
    """Return an operator's reason as a clause (no closing full stop)."""
    return why.strip().rstrip(".") or "no reason given"


def _returned(record: _Record, action: str) -> str:
    """Message of an alert back from shelving or out of service."""
    if record.condition.active:
        return f"{record.title}: {action} The condition is active. {record.description}"
    return f"{record.title}: {action} The condition is clear."


def _with_disclaimer(body: str) -> str:
    body = body.strip()
    return f"{body} {DISCLAIMER}" if body else DISCLAIMER


def _optional_float(value: Any) -> float | None:
    return None if value is None else float(value)


@dataclass
class _Record:
    """The mutable lifecycle of one alert (see :class:`Alert` for the fields)."""

    alert_id: str
    rule: str
    subject: str
    priority: Priority
    title: str
    condition: Condition
    state: AlertState = AlertState.NORMAL
    since: float | None = None
    activated_at: float | None = None
    figure: float | None = None
    threshold: float | None = None
    unit: str = ""
    description: str = ""
    shelved_until: float | None = None
    note: str = ""

    def snapshot(self) -> Alert:
        return Alert(
            self.alert_id,
            self.rule,
            self.subject,
            self.priority.value,
            self.title,
            self.state.value,
            self.condition.active,
            self.since,
            self.activated_at,
            self.figure,
            self.threshold,
            self.unit,
            _with_disclaimer(self.description),
            self.shelved_until,
            self.note,
        )

    def dictated(self) -> AlertState:
        """Return the state the condition alone calls for."""
        return AlertState.ACTIVE_UNACKNOWLEDGED if self.condition.active else AlertState.NORMAL

    def to_dict(self) -> dict[str, Any]:
        return {
            "condition": self.condition.state(),
            "state": self.state.value,
            "since": _finite(self.since),
            "activated_at": _finite(self.activated_at),
            "figure": _finite(self.figure),
            "threshold": _finite(self.threshold),
            "unit": self.unit,
            "description": self.description,
            "shelved_until": _finite(self.shelved_until),
            "note": self.note,
        }

    def load(self, data: dict[str, Any]) -> None:
        self.condition.load(data["condition"])
        self.state = AlertState(data["state"])
        self.since = _optional_float(data.get("since"))
        self.activated_at = _optional_float(data.get("activated_at"))
        self.figure = _optional_float(data.get("figure"))
        self.threshold = _optional_float(data.get("threshold"))
        self.unit = str(data.get("unit", ""))
        self.description = str(data.get("description", ""))
        self.shelved_until = _optional_float(data.get("shelved_until"))
        self.note = str(data.get("note", ""))


class AlertBook:
    """Every alert of one train, its state, and the ordered log of transitions.

    Parameters
    ----------
    max_shelve : float
        Longest time an alert may be shelved [s] (ISA-18.2: shelving is
        time-limited).
    """

    def __init__(self, max_shelve: float) -> None:
        self.max_shelve = float(max_shelve)
        self._records: dict[str, _Record] = {}
        self.events: list[AlertEvent] = []
        self.sequence = 0

    def add(
        self,
        alert_id: str,
        rule: str,
        subject: str,
        priority: Priority,
        title: str,
        condition: Condition,
    ) -> None:
        """Register an alert (normal, condition inactive)."""
        self._records[alert_id] = _Record(alert_id, rule, subject, priority, title, condition)

    def condition(self, alert_id: str) -> Condition:
        """Return the condition timing of an alert."""
        return self._records[alert_id].condition

    def __contains__(self, alert_id: object) -> bool:
        return alert_id in self._records

    def ids(self) -> list[str]:
        """Every alert id, in registration order."""
        return list(self._records)

    def get(self, alert_id: str) -> Alert:
        """Snapshot of one alert.

        Raises
        ------
        AlertActionError
            No alert has that id.
        """
        return self._record(alert_id).snapshot()

    def alerts(self) -> list[Alert]:
        """Snapshots of every alert, in registration order."""
        return [r.snapshot() for r in self._records.values()]

    def annunciated(self) -> list[Alert]:
        """Alerts an operator must see: active, or cleared but unacknowledged.

        Ordered most urgent first, then by activation time.
        """
        shown = [r for r in self._records.values() if r.state in _ANNUNCIATED]
        shown.sort(key=lambda r: (_PRIORITY_ORDER[r.priority], r.activated_at or 0.0))
        return [r.snapshot() for r in shown]

    def _record(self, alert_id: str) -> _Record:
        try:
            return self._records[alert_id]
        except KeyError:
            raise AlertActionError(f"no alert {alert_id!r} on this train") from None

    def _log(
        self, record: _Record, time: float, to_state: AlertState, who: str, why: str, body: str
    ) -> AlertEvent:
        self.sequence += 1
        event = AlertEvent(
            self.sequence,
            record.alert_id,
            record.rule,
            record.subject,
            record.priority.value,
            float(time),
            record.state.value,
            to_state.value,
            who,
            why,
            record.figure,
            record.threshold,
            record.unit,
            _with_disclaimer(body),
        )
        record.state = to_state
        record.since = float(time)
        self.events.append(event)
        if len(self.events) > EVENT_HISTORY:
            del self.events[: len(self.events) - EVENT_HISTORY]
        return event

    def set_condition(
        self,
        alert_id: str,
        time: float,
        active: bool,
        *,
        why: str,
        figure: float | None,
        threshold: float | None,
        unit: str,
        description: str,
    ) -> AlertEvent | None:
        """Apply a change of condition that :class:`Condition` reported.

        The condition object has already changed; this moves the state and logs
        the transition with ``description`` (the rule's words, without the
        disclaimer). Shelved and out-of-service alerts change no state (their
        figure is kept for when they return). Returns the event, if any.
        """
        record = self._records[alert_id]
        record.figure, record.threshold, record.unit = figure, threshold, unit
        record.description = description
        message = description
        if active:
            record.activated_at = float(time)
        state = record.state
        if state in (AlertState.SHELVED, AlertState.OUT_OF_SERVICE):
            return None
        if active and state in (AlertState.NORMAL, AlertState.CLEARED_UNACKNOWLEDGED):
            return self._log(record, time, AlertState.ACTIVE_UNACKNOWLEDGED, SYSTEM, why, message)
        if not active and state == AlertState.ACTIVE_UNACKNOWLEDGED:
            return self._log(record, time, AlertState.CLEARED_UNACKNOWLEDGED, SYSTEM, why, message)
        if not active and state == AlertState.ACTIVE_ACKNOWLEDGED:
            return self._log(record, time, AlertState.NORMAL, SYSTEM, why, message)
        return None

    def expire_shelf(
        self, alert_id: str, before: float, condition_active: bool | None = None
    ) -> AlertEvent | None:
        """End a shelving whose expiry is at or before ``before`` [s], at its expiry time.

        ``condition_active`` is the condition at the expiry (the current one when
        None); the alert takes the state it dictates.
        """
        record = self._records[alert_id]
        until = record.shelved_until
        if record.state != AlertState.SHELVED or until is None or until > before:
            return None
        record.shelved_until = None
        active = record.condition.active if condition_active is None else condition_active
        target = AlertState.ACTIVE_UNACKNOWLEDGED if active else AlertState.NORMAL
        why = f"shelving expired at {format_time(until)}"
        now = "still active" if active else "clear"
        message = f"{record.title}: shelving expired; the condition is {now}."
        if active:
            message += f" {record.description}"
        return self._log(record, until, target, SYSTEM, why, message)

    def shelved_until(self, alert_id: str) -> float | None:
        """Expiry of a shelved alert [s], else None."""
        record = self._records[alert_id]
        return record.shelved_until if record.state == AlertState.SHELVED else None

    def acknowledge(self, alert_id: str, time: float, who: str, why: str) -> AlertEvent:
        """Acknowledge an unacknowledged alert.

        Raises
        ------
        AlertActionError
            Unknown alert, or one with nothing to acknowledge.
        """
        record = self._record(alert_id)
        if record.state == AlertState.ACTIVE_UNACKNOWLEDGED:
            target = AlertState.ACTIVE_ACKNOWLEDGED
        elif record.state == AlertState.CLEARED_UNACKNOWLEDGED:
            target = AlertState.NORMAL
        else:
            raise AlertActionError(
                f"alert {alert_id!r} is {record.state.value}: there is nothing to acknowledge"
            )
        record.note = why
        message = f"{record.title}: acknowledged by {who}: {_said(why)}."
        return self._log(record, time, target, who, why, message)

    def shelve(self, alert_id: str, until: float, time: float, who: str, why: str) -> AlertEvent:
        """Shelve an alert until ``until`` [s since the epoch].

        Raises
        ------
        AlertActionError
            Unknown alert, already shelved or out of service, an expiry not after
            ``time``, or longer than the train's ``max_shelve``.
        """
        record = self._record(alert_id)
        if record.state in (AlertState.SHELVED, AlertState.OUT_OF_SERVICE):
            raise AlertActionError(
                f"alert {alert_id!r} is {record.state.value}; unshelve or return it to "
                "service first"
            )
        if not until > time:
            raise AlertActionError(
                f"shelving must end after it starts: until {format_time(until)} is not after "
                f"{format_time(time)}"
            )
        if until - time > self.max_shelve:
            raise AlertActionError(
                f"shelving is limited to {self.max_shelve / 3600.0:g} h (alerts.max_shelve); "
                f"asked for {(until - time) / 3600.0:.3g} h"
            )
        record.shelved_until = float(until)
        record.note = why
        message = f"{record.title}: shelved by {who} until {format_time(until)}: {_said(why)}."
        return self._log(record, time, AlertState.SHELVED, who, why, message)

    def unshelve(self, alert_id: str, time: float, who: str, why: str) -> AlertEvent:
        """End a shelving early; the alert takes the state its condition dictates.

        Raises
        ------
        AlertActionError
            Unknown alert, or one not shelved.
        """
        record = self._record(alert_id)
        if record.state != AlertState.SHELVED:
            raise AlertActionError(f"alert {alert_id!r} is {record.state.value}, not shelved")
        record.shelved_until = None
        record.note = why
        message = _returned(record, f"unshelved by {who}: {_said(why)}.")
        return self._log(record, time, record.dictated(), who, why, message)

    def remove_from_service(self, alert_id: str, time: float, who: str, why: str) -> AlertEvent:
        """Take an alert out of service (suppressed until returned).

        Raises
        ------
        AlertActionError
            Unknown alert, or one already out of service.
        """
        record = self._record(alert_id)
        if record.state == AlertState.OUT_OF_SERVICE:
            raise AlertActionError(f"alert {alert_id!r} is already out of service")
        record.shelved_until = None
        record.note = why
        message = f"{record.title}: removed from service by {who}: {_said(why)}."
        return self._log(record, time, AlertState.OUT_OF_SERVICE, who, why, message)

    def return_to_service(self, alert_id: str, time: float, who: str, why: str) -> AlertEvent:
        """Return an out-of-service alert; it takes the state its condition dictates.

        Raises
        ------
        AlertActionError
            Unknown alert, or one in service.
        """
        record = self._record(alert_id)
        if record.state != AlertState.OUT_OF_SERVICE:
            raise AlertActionError(
                f"alert {alert_id!r} is {record.state.value}, not out of service"
            )
        record.note = why
        message = _returned(record, f"returned to service by {who}: {_said(why)}.")
        return self._log(record, time, record.dictated(), who, why, message)

    def renumber(self, events: list[AlertEvent]) -> list[AlertEvent]:
        """Put a batch of just-logged events in time order and renumber them.

        Rules are evaluated alert by alert, so one update logs its events grouped
        by alert; this sorts them by time (stable) and gives them consecutive
        sequence numbers, in the log as in the returned list.
        """
        if len(events) < 2:
            return events
        first = events[0].sequence
        ordered = sorted(events, key=lambda e: e.time)
        renumbered = [replace(e, sequence=first + i) for i, e in enumerate(ordered)]
        kept = min(len(renumbered), len(self.events))
        self.events[len(self.events) - kept :] = renumbered[len(renumbered) - kept :]
        return renumbered

    def state_dict(self) -> dict[str, Any]:
        """Every alert's state and the event log as JSON-safe builtins."""
        return {
            "sequence": self.sequence,
            "alerts": {i: r.to_dict() for i, r in self._records.items()},
            "events": [e.to_dict() for e in self.events],
        }

    def load(self, data: dict[str, Any]) -> None:
        """Restore from :meth:`state_dict` output; alerts no longer configured are dropped."""
        self.sequence = int(data["sequence"])
        for alert_id, saved in data["alerts"].items():
            if alert_id in self._records:
                self._records[alert_id].load(saved)
        self.events = [AlertEvent.from_dict(e) for e in data["events"]]
