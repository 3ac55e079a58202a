"""Alert rules of a train: when a vessel falls short, and why. Pure: no I/O.

:class:`AlertEngine` reads the estimates a :class:`~estimator.session.TrainSession`
produced, in time order, and evaluates every rule at every new estimate time, in
plant time:

- ``conversion_shortfall_warning`` and ``conversion_shortfall_high``, per vessel:
  the estimated conversion falls short of the expected one by more than a band,
  and by more than its own uncertainty allows (``shortfall - band > k sigma``);
- ``activity_low``: the catalyst activity is below a limit beyond its uncertainty;
- ``activity_falling``: the activity falls faster than a rate, judged by the slope
  of a least-squares line over a window and the slope's standard error;
- ``tag_stale``, ``tag_frozen``, ``tag_spikes``, per tag, and ``model_mismatch``
  for the train: the estimator's health, from a :class:`HealthInput`;
- ``estimator_reinitialised``: the filter diverged and was started again from the
  model (``estimator.divergence``); active while the estimates settle;
- ``flow_low`` and ``temperature_range`` (per vessel): inputs outside where the
  model holds.

Each alert's condition passes through its deadband and on/off delays
(:class:`~estimator.alarm_state.Condition`) and drives the ISA-18.2 lifecycle of
:class:`~estimator.alarm_state.AlertBook`. Every message names the vessel or tag,
the figure, the threshold and a likely cause, and ends with :data:`DISCLAIMER`.
The limits are the train's ``[alerts]`` table (:class:`~estimator.config.AlertsConfig`).

Notes
-----
Sources of the checks (tags as in the project's REFERENCES.md):

- States, shelving (time-limited) and out of service: ISA-18.2 / IEC 62682 [M].
- On-delay, off-delay and deadband: OPC UA Part 9, Alarms and Conditions [V].
- Chattering, 3 or more activations of one alert in 60 s: practitioner criterion
  [V]; the delays rule it out (two activations are at least on-delay + off-delay
  apart).
- A deadband of about twice the figure's repeatability, and a delay of a couple
  of analyzer cycles, for analyzer-based alarms [CP].
- ``shortfall - band > k sigma`` with k = 2: a one-sided test at about 2.3 % per
  evaluation, before the on-delay [CP].
- Windowed NIS: the sum of NIS over K updates is chi-square with the summed
  degrees of freedom when the filter is consistent and the innovations white
  (Bar-Shalom, Li & Kirubarajan, *Estimation with Applications to Tracking and
  Navigation*, Wiley 2001, sec. 5.4) [V via van der Heijden et al. 2004].
- The slope's standard error: consecutive filter estimates are strongly
  correlated, so ordinary least squares alone is overconfident; the filter's own
  1-sigma at the window's ends bounds it [CP, checked on simulated normal runs].
"""

from __future__ import annotations

import math
from collections.abc import Callable, Iterator
from dataclasses import dataclass, field
from typing import TYPE_CHECKING, Any

import numpy as np
from scipy.stats import chi2

from estimator.alarm_state import (
    DISCLAIMER,
    SYSTEM,
    Alert,
    AlertActionError,
    AlertBook,
    AlertEvent,
    AlertState,
    Condition,
    Priority,
    format_time,
)
from estimator.alert_windows import (
    BINS_PER_WINDOW,
    ROWS_PER_WINDOW,
    fold_counts,
    fold_nis,
    grid_first,
    merge_nis,
    merge_series,
    rolling_slope,
)
from estimator.config import TemperatureTag, TrainConfig
from estimator.conversion import DesignTwin
from estimator.health import HealthInput, empty_rows
from estimator.model import FloatArray, TrainModel

if TYPE_CHECKING:
    from estimator.session import EstimateBatch

__all__ = [
    "DISCLAIMER",
    "SYSTEM",
    "Alert",
    "AlertActionError",
    "AlertEngine",
    "AlertEvent",
    "AlertState",
    "ExpectedConversion",
    "HealthInput",
    "Priority",
    "carried_expectation",
    "design_expectation",
]

_MINUTE = 60.0
_HOUR = 3600.0
_DAY = 86400.0
_STATE_FORMAT = 2

ExpectedConversion = Callable[["EstimateBatch"], FloatArray]
"""What each vessel should convert at each estimate: batch -> array (k, N) [-]."""


def carried_expectation(estimates: EstimateBatch) -> FloatArray:
    """Return the expectation each row already carries, ``design_conversion`` (k, N) [-].

    A :class:`~estimator.session.TrainSession` fills that column with the
    expectation the train's ``conversion_shortfall.expectation`` asks for, so the
    rules judge what the API and the dashboard show.
    """
    return np.asarray(estimates.design_conversion, dtype=np.float64)


def design_expectation(estimates: EstimateBatch) -> FloatArray:
    """Return the design model's steady-state conversion at each row's inputs.

    The default ``expected`` of :class:`AlertEngine`; a dynamic expectation (the
    design model run through the same input history) can replace it.

    Parameters
    ----------
    estimates : EstimateBatch
        Rows of estimates.

    Returns
    -------
    ndarray, shape (k, N)
        Expected conversion after each vessel [-].
    """
    return estimates.design_conversion


@dataclass
class _Eval:
    """One alert's tests over the new rows, and how to word a change."""

    alert_id: str
    on: np.ndarray
    off: np.ndarray
    figure: FloatArray
    threshold: FloatArray
    unit: str
    describe: Callable[[int, bool], str]


@dataclass
class _Rows:
    """The new rows of one update and what the rules derive from them."""

    estimates: EstimateBatch
    time: FloatArray
    expected: FloatArray  # (k, N)
    # Per alert id, its condition at each row (for the causes of other alerts).
    condition: dict[str, np.ndarray] = field(default_factory=dict)
    # Per vessel, (times, prefix sums, prefix counts) of the expectation, remembered
    # rows first (built on first use by AlertEngine._expectation_moved).
    expected_sums: dict[int, tuple[FloatArray, FloatArray, np.ndarray]] = field(
        default_factory=dict
    )
    # Which rows join the thinned activity series (AlertEngine._activity_kept).
    activity_kept: np.ndarray | None = None


@dataclass
class _TagHistory:
    """Recent readings of one tag: times [s] ascending, values [SI], gated times.

    Readings older than the engine's fold age are kept only as counts per bin
    (``binned``: rows of (bin end time [s], readings)), enough for the spike rule.
    """

    times: FloatArray = field(default_factory=empty_rows)
    values: FloatArray = field(default_factory=empty_rows)
    gated: FloatArray = field(default_factory=empty_rows)
    binned: FloatArray = field(default_factory=lambda: np.empty((0, 2)))


def _duration(seconds: float) -> str:
    """Write a duration in the unit an engineer would say it in."""
    if seconds < 2 * _MINUTE:
        return f"{seconds:.0f} s"
    if seconds < 2 * _HOUR:
        return f"{seconds / _MINUTE:.0f} min"
    if seconds < 2 * _DAY:
        return f"{seconds / _HOUR:.3g} h"
    return f"{seconds / _DAY:.3g} d"


def _delay_why(delay: float, activating: bool) -> str:
    if activating:
        if delay <= 0.0:
            return "limit exceeded (no on-delay)"
        return f"limit exceeded for the on-delay of {_duration(delay)}"
    if delay <= 0.0:
        return "back inside the limit less its deadband (no off-delay)"
    return f"back inside the limit less its deadband for the off-delay of {_duration(delay)}"


class AlertEngine:
    """The alert rules and lifecycle of one train, fed estimates in time order.

    Parameters
    ----------
    config : TrainConfig
        The train; its ``alerts`` table sets the rules and limits.
    expected : callable, optional
        ``EstimateBatch -> (k, N)`` expected conversion [-]; the design
        expectation (:func:`design_expectation`) when omitted.

    Attributes
    ----------
    config : TrainConfig
        The train.
    last_time : float or None
        The newest estimate time evaluated [s since the epoch].

    Notes
    -----
    Alert ids are ``"<rule>:<subject>"``, e.g. ``"conversion_shortfall_warning:R-202"``,
    ``"tag_stale:AI-203G"`` or ``"model_mismatch:<train name>"``. Every alert of
    the configuration exists from the start, in the normal state, so an operator
    can shelve or remove from service one that has never been active.
    """

    def __init__(self, config: TrainConfig, *, expected: ExpectedConversion | None = None) -> None:
        self.config = config
        dynamic = config.alerts.conversion_shortfall.expectation == "dynamic"
        if expected is None:
            expected = DesignTwin(TrainModel.from_config(config)) if dynamic else None
        self.expected: ExpectedConversion = expected or design_expectation
        # What messages call the expectation.
        carried = self.expected is carried_expectation
        if self.expected is design_expectation or (carried and not dynamic):
            self._expectation = "design"
        elif isinstance(self.expected, DesignTwin) or carried:
            self._expectation = "design model's"
        else:
            self._expectation = "expected"
        self._book = AlertBook(config.alerts.max_shelve)
        self.last_time: float | None = None
        self._health_since: float | None = None
        self._vessels = [v.name for v in config.vessels]
        self._n = len(self._vessels)
        # NIS rows and reading times older than this are only kept as sums per bin
        # [s]: the longest analyzer dead time (the reach of the rewinds that rerun
        # them) and 5 min. A late result rerun from further back leaves the folded
        # sums as they were.
        dead = [m.dead_time for m in config.measurements if m.kind == "analyzer"]
        dead += [c.dead_time for c in config.feed.composition.values() if not isinstance(c, float)]
        self._fold_age = max(dead, default=0.0) + 300.0
        self._folded_until = -math.inf
        # Two total residence times at nominal flow: how long a vessel needs to settle.
        q = config.feed.flow.nominal
        self._settle = 2.0 * sum(v.volume for v in config.vessels) / q if q > 0.0 else 0.0
        self._lab = {m.tag for m in config.measurements if m.kind == "lab"}
        self._tags = list(config.tags())
        self._units = config.tag_units()
        self._history = {tag: _TagHistory() for tag in self._tags}
        # Rows of (sample time, measurement group, NIS, degrees of freedom), sorted by
        # (time, group), one per update: a rewind's rerun replaces its rows.
        self._nis = np.empty((0, 4))
        self._activity = np.empty((0, 3))  # rows of (time, activity, activity_std)
        self._expected = np.empty((0, 1 + self._n))  # rows of (time, expected per vessel)
        # (tail probability, degrees of freedom) -> NIS-per-dof bounds (_nis_bounds).
        self._bounds: dict[tuple[float, float], tuple[float, float]] = {}
        self._register()

    def _register(self) -> None:
        cfg = self.config
        a = cfg.alerts
        train, vessels, tags = [cfg.name], self._vessels, self._tags
        activity = train if cfg.estimator.estimate_activity else []
        has_flow = [cfg.feed.flow.tag] if cfg.feed.flow.nominal > 0.0 else []
        has_range = vessels if cfg.reaction.valid_temperature is not None else []
        unlabbed = [tag for tag in tags if tag not in self._lab]
        warning, high, advisory = Priority.WARNING, Priority.HIGH, Priority.ADVISORY
        specs: list[tuple[str, Any, Priority, list[str], str]] = [
            ("model_mismatch", a.model_mismatch, advisory, train, "Analyzers and model disagree"),
            (
                "estimator_reinitialised",
                a.estimator_reinitialised,
                warning,
                train if cfg.estimator.divergence.enabled else [],
                "Estimator re-initialised after diverging",
            ),
            ("tag_stale", a.tag_stale, advisory, tags, "{} readings stale"),
            ("tag_frozen", a.tag_frozen, advisory, unlabbed, "{} output frozen"),
            ("tag_spikes", a.tag_spikes, advisory, tags, "{} readings rejected"),
            ("flow_low", a.flow_low, advisory, has_flow, "{} feed flow near zero"),
            (
                "temperature_range",
                a.temperature_range,
                advisory,
                has_range,
                "{} temperature outside the kinetics' valid range",
            ),
            ("activity_low", a.activity_low, warning, activity, "Catalyst activity low"),
            (
                "activity_falling",
                a.activity_falling,
                warning,
                activity,
                "Catalyst activity falling",
            ),
            (
                "conversion_shortfall_warning",
                a.conversion_shortfall,
                warning,
                vessels,
                "{} conversion shortfall, warning band",
            ),
            (
                "conversion_shortfall_high",
                a.conversion_shortfall,
                high,
                vessels,
                "{} conversion shortfall, high band",
            ),
        ]
        for rule, conf, priority, subjects, title in specs:
            if not conf.enabled:
                continue
            for subject in subjects:
                condition = Condition(conf.on_delay, conf.off_delay)
                self._book.add(
                    f"{rule}:{subject}", rule, subject, priority, title.format(subject), condition
                )

    @property
    def events(self) -> list[AlertEvent]:
        """Every transition so far (the most recent 10,000), oldest first."""
        return self._book.events

    def active(self) -> list[Alert]:
        """Alerts an operator must see: active, or cleared but not yet acknowledged.

        Most urgent first (high, warning, advisory), then by activation time.
        """
        return self._book.annunciated()

    def alerts(self) -> list[Alert]:
        """Every alert of the train, whatever its state."""
        return self._book.alerts()

    def alert(self, alert_id: str) -> Alert:
        """Return one alert.

        Raises
        ------
        AlertActionError
            No alert has that id.
        """
        return self._book.get(alert_id)

    def acknowledge(self, alert_id: str, time: float, who: str, why: str) -> AlertEvent:
        """Acknowledge an alert at ``time`` [s since the epoch].

        Active unacknowledged -> active acknowledged; cleared unacknowledged ->
        normal.

        Raises
        ------
        AlertActionError
            Unknown alert, or nothing to acknowledge.
        """
        self._expire_before_action(alert_id, time)
        return self._book.acknowledge(alert_id, time, who, why)

    def shelve(self, alert_id: str, until: float, time: float, who: str, why: str) -> AlertEvent:
        """Shelve an alert from ``time`` until ``until`` [s since the epoch].

        At the expiry it takes the state its condition dictates.

        Raises
        ------
        AlertActionError
            Unknown alert, already shelved or out of service, or an expiry not
            after ``time`` or beyond ``alerts.max_shelve``.
        """
        self._expire_before_action(alert_id, time)
        return self._book.shelve(alert_id, until, time, who, why)

    def unshelve(self, alert_id: str, time: float, who: str, why: str) -> AlertEvent:
        """End a shelving early.

        Raises
        ------
        AlertActionError
            Unknown alert, or not shelved.
        """
        self._expire_before_action(alert_id, time)
        return self._book.unshelve(alert_id, time, who, why)

    def remove_from_service(self, alert_id: str, time: float, who: str, why: str) -> AlertEvent:
        """Take an alert out of service: suppressed until returned to service.

        Raises
        ------
        AlertActionError
            Unknown alert, or already out of service.
        """
        self._expire_before_action(alert_id, time)
        return self._book.remove_from_service(alert_id, time, who, why)

    def return_to_service(self, alert_id: str, time: float, who: str, why: str) -> AlertEvent:
        """Return an alert to service; it takes the state its condition dictates.

        Raises
        ------
        AlertActionError
            Unknown alert, or not out of service.
        """
        return self._book.return_to_service(alert_id, time, who, why)

    def _expire_before_action(self, alert_id: str, time: float) -> None:
        self._book.get(alert_id)  # raises for an unknown id
        self._book.expire_shelf(alert_id, time)

    def update(
        self, estimates: EstimateBatch, health: HealthInput | None = None
    ) -> list[AlertEvent]:
        """Evaluate every rule at each new estimate time; return the transitions.

        Parameters
        ----------
        estimates : EstimateBatch
            Estimates in time order. Rows at or before :attr:`last_time` are
            ignored: a batch revised after a late reading may start earlier than
            the last one, and alerts are never re-judged in the past.
        health : HealthInput, optional
            The update's readings, gated readings and NIS rows. Health rules run
            once the engine has been given one.

        Returns
        -------
        list of AlertEvent
            The new transitions, in time order (also appended to :attr:`events`).
        """
        if health is not None:
            self._absorb(health)
        times = np.asarray(estimates.time, dtype=np.float64)
        new = np.isfinite(times)
        if self.last_time is not None:
            new &= times > self.last_time
        if not new.any():
            return []
        rows = estimates.take(np.flatnonzero(new))
        if health is not None and self._health_since is None:
            first = [float(rows.time[0])]
            if len(health.reading_times):
                first.append(float(np.min(health.reading_times)))
            self._health_since = min(first)
        expected = np.asarray(self.expected(rows), dtype=np.float64).reshape(len(rows), self._n)
        ctx = _Rows(rows, np.asarray(rows.time, dtype=np.float64), expected)
        logged: list[AlertEvent] = []
        for ev in self._evaluations(ctx):
            logged += self._apply(ctx, ev)
        events = self._book.renumber(logged)
        self._remember(ctx)
        return events

    def _apply(self, ctx: _Rows, ev: _Eval) -> list[AlertEvent]:
        """Run one alert's condition over the rows, move its lifecycle, return the events."""
        book = self._book
        logged: list[AlertEvent | None] = []
        condition = book.condition(ev.alert_id)
        was = condition.active
        changes = condition.run(ctx.time, ev.on, ev.off)
        state = np.full(len(ctx.time), was)
        active = was
        for index, now_active in changes:
            t = float(ctx.time[index])
            logged.append(book.expire_shelf(ev.alert_id, t, active))
            delay = condition.on_delay if now_active else condition.off_delay
            event = book.set_condition(
                ev.alert_id,
                t,
                now_active,
                why=_delay_why(delay, now_active),
                figure=_float(ev.figure[index]),
                threshold=_float(ev.threshold[index]),
                unit=ev.unit,
                description=ev.describe(index, now_active),
            )
            logged.append(event)
            state[index:] = now_active
            active = now_active
        logged.append(book.expire_shelf(ev.alert_id, float(ctx.time[-1]), active))
        ctx.condition[ev.alert_id] = state
        return [e for e in logged if e is not None]

    def _activity_kept(self, ctx: _Rows) -> np.ndarray:
        """Mask of the update's rows that join the thinned activity series (once)."""
        if ctx.activity_kept is None:
            held = self._activity
            prev = float(held[-1, 0]) if len(held) else -math.inf
            step = self.config.alerts.activity_falling.window / ROWS_PER_WINDOW
            ctx.activity_kept = grid_first(ctx.time, prev, step)
        return ctx.activity_kept

    def _remember(self, ctx: _Rows) -> None:
        """Keep what the next update's windows need; forget the rest."""
        rows = ctx.estimates
        now = float(ctx.time[-1])
        self.last_time = now
        a = self.config.alerts
        # One row per interval of the activity and expectation series (see
        # ROWS_PER_WINDOW); the rules evaluate the same thinned series.
        keep = self._activity_kept(ctx)
        act = np.column_stack([ctx.time, rows.activity, rows.activity_std])[keep]
        self._activity = np.concatenate([self._activity, act])
        self._activity = self._activity[self._activity[:, 0] >= now - a.activity_falling.window]
        prev = float(self._expected[-1, 0]) if len(self._expected) else -math.inf
        keep = grid_first(ctx.time, prev, self._settle / ROWS_PER_WINDOW)
        exp = np.column_stack([ctx.time, ctx.expected])[keep]
        self._expected = np.concatenate([self._expected, exp])
        self._expected = self._expected[self._expected[:, 0] >= now - self._settle]
        # Tag histories serve the staleness, frozen and spike rules (the spike window
        # and the last samples); NIS rows the mismatch window.
        keep_from = now - a.tag_spikes.window
        # Folded once a quarter of the fold age has gathered past it (amortised).
        fold_until = now - self._fold_age
        if fold_until < self._folded_until + 0.25 * self._fold_age:
            fold_until = -math.inf
        spike_bin = a.tag_spikes.window / BINS_PER_WINDOW
        for hist in self._history.values():
            cut = max(
                0,
                min(
                    int(np.searchsorted(hist.times, keep_from)),
                    len(hist.times) - (a.tag_frozen.samples + 1),
                ),
            )
            hist.times, hist.values = hist.times[cut:], hist.values[cut:]
            hist.gated = hist.gated[hist.gated >= keep_from]
            fold = min(
                int(np.searchsorted(hist.times, fold_until)),
                len(hist.times) - (a.tag_frozen.samples + 1),
            )
            if fold > 0:
                hist.binned = fold_counts(hist.binned, hist.times[:fold], spike_bin)
                hist.times, hist.values = hist.times[fold:], hist.values[fold:]
            hist.binned = hist.binned[hist.binned[:, 0] > keep_from]
        window = a.model_mismatch.window
        self._nis = fold_nis(self._nis, fold_until, window / BINS_PER_WINDOW)
        self._folded_until = max(self._folded_until, fold_until)
        self._nis = self._nis[self._nis[:, 0] >= now - window]

    def _absorb(self, health: HealthInput) -> None:
        """Add an update's readings, gated readings and NIS rows to the windows."""
        tags = np.asarray(health.reading_tags, dtype=object)
        times = np.asarray(health.reading_times, dtype=np.float64)
        values = np.asarray(health.reading_values, dtype=np.float64)
        for tag, hist in self._history.items():
            sel = (tags == tag) & np.isfinite(times) & np.isfinite(values)
            if sel.any():
                hist.times, hist.values = merge_series(
                    hist.times, hist.values, times[sel], values[sel]
                )
        gated_tags = np.asarray(health.gated_tags, dtype=object)
        gated_times = np.asarray(health.gated_times, dtype=np.float64)
        for tag, hist in self._history.items():
            sel = gated_tags == tag
            if sel.any():
                hist.gated = np.unique(np.concatenate([hist.gated, gated_times[sel]]))
        rows = np.asarray(health.nis, dtype=np.float64).reshape(-1, 4)
        ok = np.isfinite(rows[:, 0]) & np.isfinite(rows[:, 1]) & (rows[:, 2] > 0)
        ok &= rows[:, 0] >= self._folded_until
        if ok.any():
            self._nis = merge_nis(self._nis, rows[ok][:, [0, 3, 1, 2]])

    def _evaluations(self, ctx: _Rows) -> Iterator[_Eval]:
        """Every registered alert's tests; health and inputs first (causes use them)."""
        book = self._book
        if self._health_since is not None:
            yield from (e for e in self._health(ctx) if e.alert_id in book)
        yield from (e for e in self._inputs(ctx) if e.alert_id in book)
        yield from (e for e in self._reinitialised(ctx) if e.alert_id in book)
        yield from (e for e in self._activity_rules(ctx) if e.alert_id in book)
        yield from (e for e in self._shortfall(ctx) if e.alert_id in book)

    def _shortfall(self, ctx: _Rows) -> Iterator[_Eval]:
        rule = self.config.alerts.conversion_shortfall
        if not rule.enabled:
            return
        rows = ctx.estimates
        shortfall = ctx.expected - rows.conversion
        sigma = rows.conversion_std
        lower = shortfall - rule.sigma_multiple * sigma
        for i, name in enumerate(self._vessels):
            for band_name, band in (("warning", rule.warning_band), ("high", rule.high_band)):
                yield _Eval(
                    f"conversion_shortfall_{band_name}:{name}",
                    lower[:, i] > band,
                    lower[:, i] <= band - rule.deadband,
                    shortfall[:, i],
                    np.full(len(ctx.time), band),
                    "",
                    self._shortfall_words(ctx, i, band_name, band),
                )

    def _shortfall_words(
        self, ctx: _Rows, i: int, band_name: str, band: float
    ) -> Callable[[int, bool], str]:
        rule = self.config.alerts.conversion_shortfall
        name = self._vessels[i]
        rows = ctx.estimates

        def describe(m: int, active: bool) -> str:
            x = float(rows.conversion[m, i])
            e = float(ctx.expected[m, i])
            s = e - x
            sigma = float(rows.conversion_std[m, i])
            if not active:
                return (
                    f"{name} conversion {x:.3f} is back within its {band_name} band: {s:.3f} "
                    f"below the {self._expectation} {e:.3f} (clears at "
                    f"{band - rule.deadband:.3f} plus {rule.sigma_multiple:g} sigma, 1-sigma "
                    f"{sigma:.2g})."
                )
            inputs, cause = self._shortfall_cause(ctx, m, i)
            return (
                f"{name} conversion {x:.3f} is {s:.3f} below the {self._expectation} {e:.3f} "
                f"({band_name} band {band:.3f}, 1-sigma {sigma:.2g}) {inputs}: {cause}."
            )

        return describe

    def _input_problems(self, ctx: _Rows, m: int) -> list[str]:
        """Return the inputs outside the model's validity at row ``m``, in words."""
        cfg = self.config
        u = ctx.estimates.inputs[m]
        problems = []
        q_nominal = cfg.feed.flow.nominal
        if q_nominal > 0.0 and u[0] < cfg.alerts.flow_low.fraction * q_nominal:
            problems.append(f"the flow near zero ({self._show_flow(float(u[0]))})")
        valid = cfg.reaction.valid_temperature
        if valid is not None:
            for i, name in enumerate(self._vessels):
                temperature = float(u[1 + i])
                if not valid[0] <= temperature <= valid[1]:
                    shown = self._show_temperature(i, temperature)
                    problems.append(f"{name} at {shown}, outside the kinetics' valid range")
        return problems

    def _health_problems(self, ctx: _Rows, m: int) -> list[str]:
        """Return the health alerts whose condition holds at row ``m``, in words."""
        words = {
            "tag_stale": "{} stale",
            "tag_frozen": "{} frozen",
            "tag_spikes": "{} readings rejected",
            "model_mismatch": "analyzers disagreeing with the model",
        }
        out = []
        for alert_id, state in ctx.condition.items():
            rule, _, subject = alert_id.partition(":")
            if rule in words and state[m]:
                out.append(words[rule].format(subject))
        return out

    def _shortfall_cause(self, ctx: _Rows, m: int, i: int) -> tuple[str, str]:
        """Return the inputs clause and the likely cause of vessel i's shortfall at row m.

        In order: estimator health problems (the estimate may be wrong), inputs
        outside the model's validity (the expectation may be wrong), an activity
        estimate significantly below design, an expectation that moved recently
        (the vessel may still be settling), else what remains.
        """
        rows = ctx.estimates
        rule = self.config.alerts.conversion_shortfall
        problems = self._input_problems(ctx, m)
        inputs = (
            "with " + "; ".join(problems)
            if problems
            else "while flow and temperatures are within range"
        )
        health = self._health_problems(ctx, m)
        if health:
            return inputs, (
                f"the estimate itself may be off ({', '.join(health[:3])}); check the "
                "analyzers before acting on it"
            )
        if problems:
            return inputs, "the design expectation does not hold outside the model's validity"
        design = self.config.estimator.design_activity
        a, sa = float(rows.activity[m]), float(rows.activity_std[m])
        if self.config.estimator.estimate_activity and design - a > rule.sigma_multiple * sa:
            return inputs, (
                f"possible loss of catalyst activity (estimated {a:.3f}, 1-sigma {sa:.2g}, "
                f"design {design:.2f})"
            )
        moved = self._expectation_moved(ctx, m, i)
        if moved is not None and moved[1] - moved[0] > 0.5 * rule.warning_band:
            return inputs, (
                f"the design expectation moved between {moved[0]:.3f} and {moved[1]:.3f} in "
                f"the last {_duration(self._settle)} (a change in flow, feed or temperature): "
                "the vessel may still be settling"
            )
        return inputs, (
            "the activity estimate is near design, so possibly an analyzer bias, a feed "
            "composition change or poor mixing; compare with a lab sample"
        )

    def _expectation_moved(self, ctx: _Rows, m: int, i: int) -> tuple[float, float] | None:
        """Return the range of vessel i's expectation over the settling time before row m.

        The expectation follows the measured inputs and carries their noise, so it
        is averaged in eight blocks of the settling time first [-].
        """
        if self._settle <= 0.0:
            return None
        if i not in ctx.expected_sums:
            times = np.concatenate([self._expected[:, 0], ctx.time])
            values = np.concatenate([self._expected[:, 1 + i], ctx.expected[:, i]])
            finite = np.isfinite(values)
            sums = np.concatenate([[0.0], np.cumsum(np.where(finite, values, 0.0))])
            counts = np.concatenate([[0], np.cumsum(finite)])
            ctx.expected_sums[i] = (times, sums, counts)
        times, sums, counts = ctx.expected_sums[i]
        end = len(self._expected) + m + 1
        t = float(ctx.time[m])
        edges = t - self._settle * np.linspace(1.0, 0.0, 9)
        at = np.searchsorted(times[:end], edges, side="left")
        at[-1] = end
        n = np.diff(counts[at])
        if not n.any():
            return None
        means = np.diff(sums[at])[n > 0] / n[n > 0]
        return float(means.min()), float(means.max())

    def _activity_rules(self, ctx: _Rows) -> Iterator[_Eval]:
        if not self.config.estimator.estimate_activity:
            return
        a = self.config.alerts
        rows = ctx.estimates
        act, std = rows.activity, rows.activity_std
        k = len(ctx.time)
        low = a.activity_low
        if low.enabled:
            upper = act + low.sigma_multiple * std
            yield _Eval(
                f"activity_low:{self.config.name}",
                upper < low.limit,
                upper >= low.limit + low.deadband,
                act,
                np.full(k, low.limit),
                "",
                self._activity_low_words(ctx),
            )
        fall = a.activity_falling
        if fall.enabled:
            # The slope runs over the thinned series (one row per window/720): at a
            # row that opens an interval it is computed; the others carry it on.
            held = self._activity
            keep = self._activity_kept(ctx)
            t = np.concatenate([held[:, 0], ctx.time[keep]])
            y = np.concatenate([held[:, 1], act[keep]])
            s = np.concatenate([held[:, 2], std[keep]])
            start = max(len(held) - 1, 0)
            slope, se, ok = rolling_slope(t, y, s, fall.window, start)
            at = np.cumsum(keep) - (0 if len(held) else 1)
            slope, se, ok = slope[at], se[at], ok[at]
            rate = -slope
            lower = rate - fall.sigma_multiple * se
            yield _Eval(
                f"activity_falling:{self.config.name}",
                ok & (lower > fall.rate_limit),
                ok & (lower <= fall.rate_limit - fall.deadband),
                rate,
                np.full(k, fall.rate_limit),
                "1/s",
                self._activity_falling_words(ctx, rate, se),
            )

    def _activity_low_words(self, ctx: _Rows) -> Callable[[int, bool], str]:
        rule = self.config.alerts.activity_low
        design = self.config.estimator.design_activity
        rows = ctx.estimates

        def describe(m: int, active: bool) -> str:
            a, sa = float(rows.activity[m]), float(rows.activity_std[m])
            if not active:
                return (
                    f"Catalyst activity {a:.3f} (1-sigma {sa:.2g}) is back above the limit "
                    f"{rule.limit:.3f} plus its deadband {rule.deadband:g}."
                )
            cause = "catalyst ageing or poisoning; conversion will fall short of design"
            health = self._health_problems(ctx, m)
            if health:
                cause = "or an estimate thrown off by " + ", ".join(health[:3])
                cause = "catalyst ageing or poisoning, " + cause
            return (
                f"Catalyst activity {a:.3f} (1-sigma {sa:.2g}) is below the limit "
                f"{rule.limit:.3f} (design {design:.2f}, {rule.sigma_multiple:g} sigma): {cause}."
            )

        return describe

    def _activity_falling_words(
        self, ctx: _Rows, rate: FloatArray, se: FloatArray
    ) -> Callable[[int, bool], str]:
        rule = self.config.alerts.activity_falling
        rows = ctx.estimates

        def describe(m: int, active: bool) -> str:
            a, sa = float(rows.activity[m]), float(rows.activity_std[m])
            fall, err = float(rate[m]) * _DAY, float(se[m]) * _DAY
            over = f"over the last {_duration(rule.window)}"
            if not active:
                return (
                    f"Catalyst activity {a:.3f} is no longer falling fast: {fall:.3f} per day "
                    f"{over} (standard error {err:.2g} per day)."
                )
            cause = (
                "possible sudden deactivation, e.g. a poison or inhibitor in the feed, or a "
                "temperature reading in error; check recent feed batches and the transmitters"
            )
            health = self._health_problems(ctx, m)
            if health:
                cause = "the estimate may be off (" + ", ".join(health[:3]) + "); " + cause
            return (
                f"Catalyst activity is falling at {fall:.3f} per day {over} (standard error "
                f"{err:.2g}; limit {rule.rate_limit * _DAY:.3g} per day), now {a:.3f} "
                f"(1-sigma {sa:.2g}): {cause}."
            )

        return describe

    def _inputs(self, ctx: _Rows) -> Iterator[_Eval]:
        cfg = self.config
        a = cfg.alerts
        u = ctx.estimates.inputs
        k = len(ctx.time)
        q_nominal = cfg.feed.flow.nominal
        if a.flow_low.enabled and q_nominal > 0.0:
            rule = a.flow_low
            ratio = u[:, 0] / q_nominal
            tag = cfg.feed.flow.tag

            def flow_words(m: int, active: bool) -> str:
                q = self._show_flow(float(u[m, 0]))
                nominal = self._show_flow(q_nominal)
                if not active:
                    back = rule.fraction + rule.deadband
                    return f"{tag} flow {q} is back above {back:.0%} of the nominal {nominal}."
                return (
                    f"{tag} flow {q} is below {rule.fraction:.0%} of the nominal {nominal}: near "
                    "zero flow, the vessels are barely fed and the design expectation and "
                    "conversion estimates are unreliable."
                )

            yield _Eval(
                f"flow_low:{tag}",
                ratio < rule.fraction,
                ratio >= rule.fraction + rule.deadband,
                u[:, 0],
                np.full(k, rule.fraction * q_nominal),
                "m^3/s",
                flow_words,
            )
        valid = cfg.reaction.valid_temperature
        if a.temperature_range.enabled and valid is not None:
            low, high = valid
            db = a.temperature_range.deadband
            for i, name in enumerate(self._vessels):
                temperature = u[:, 1 + i]
                nearer = np.where(temperature < 0.5 * (low + high), low, high)
                yield _Eval(
                    f"temperature_range:{name}",
                    (temperature < low) | (temperature > high),
                    (temperature >= low + db) & (temperature <= high - db),
                    temperature,
                    nearer,
                    "K",
                    self._temperature_words(ctx, i, low, high),
                )

    def _temperature_words(
        self, ctx: _Rows, i: int, low: float, high: float
    ) -> Callable[[int, bool], str]:
        name = self._vessels[i]
        u = ctx.estimates.inputs

        def describe(m: int, active: bool) -> str:
            shown = self._show_temperature(i, float(u[m, 1 + i]))
            valid = f"{self._show_temperature(i, low)} to {self._show_temperature(i, high)}"
            if not active:
                return f"{name} temperature {shown} is back inside the valid range {valid}."
            return (
                f"{name} temperature {shown} is outside the kinetics' valid range {valid}: the "
                "design expectation and the activity estimate do not apply there (check the "
                "temperature control and its transmitter)."
            )

        return describe

    def _health(self, ctx: _Rows) -> Iterator[_Eval]:
        a = self.config.alerts
        t = ctx.time
        k = len(t)
        since = self._health_since if self._health_since is not None else float(t[0])
        for tag in self._tags:
            hist = self._history[tag]
            idx = np.searchsorted(hist.times, t, side="right") - 1
            has = idx >= 0
            if a.tag_stale.enabled:
                limit = a.tag_stale.lab_stale_after if tag in self._lab else a.tag_stale.stale_after
                seen = hist.times[np.maximum(idx, 0)] if len(hist.times) else np.full(k, since)
                last = np.where(has, seen, since)
                age = t - last
                yield _Eval(
                    f"tag_stale:{tag}",
                    age > limit,
                    age <= limit,
                    age,
                    np.full(k, limit),
                    "s",
                    self._stale_words(tag, age, last, limit),
                )
            if a.tag_frozen.enabled and tag not in self._lab:
                yield self._frozen(tag, hist, idx, has, k)
            if a.tag_spikes.enabled:
                yield self._spikes(tag, hist, t)
        if a.model_mismatch.enabled:
            yield self._mismatch(t)

    def _stale_words(
        self, tag: str, age: FloatArray, last: FloatArray, limit: float
    ) -> Callable[[int, bool], str]:
        def describe(m: int, active: bool) -> str:
            if not active:
                return f"{tag} is reporting again (last reading {format_time(float(last[m]))})."
            seen = self._history[tag].times
            when = (
                f"since {format_time(float(last[m]))}"
                if len(seen) and seen[0] <= last[m]
                else "since monitoring started"
            )
            return (
                f"No reading from {tag} for {_duration(float(age[m]))} ({when}; limit "
                f"{_duration(limit)}): the instrument or its historian link may be down, and "
                "the estimates lean on the model alone."
            )

        return describe

    def _frozen(
        self, tag: str, hist: _TagHistory, idx: np.ndarray, has: np.ndarray, k: int
    ) -> _Eval:
        samples = self.config.alerts.tag_frozen.samples
        v = hist.values
        run = np.ones(len(v), dtype=np.int64)
        if len(v) > 1:
            same = v[1:] == v[:-1]
            # Length of the run of equal values ending at each reading.
            breaks = np.flatnonzero(np.concatenate([[True], ~same]))
            starts = np.repeat(breaks, np.diff(np.append(breaks, len(v))))
            run = np.arange(len(v)) - starts + 1
        at = np.maximum(idx, 0)
        length = np.where(has, run[at] if len(v) else 0, 0)
        value = np.where(has, v[at] if len(v) else 0.0, 0.0)
        frozen = (length >= samples) & (value != 0.0)
        unit, scale, offset = self._units.get(tag, ("SI", 1.0, 0.0))

        def describe(m: int, active: bool) -> str:
            if not active:
                return f"{tag} is changing again."
            shown = (float(value[m]) - offset) / scale
            return (
                f"{tag} repeated {shown:.6g} {unit} for {int(length[m])} readings in a row "
                f"(limit {samples}): its output may be frozen; the filter is fed a constant."
            )

        return _Eval(
            f"tag_frozen:{tag}",
            frozen,
            has & ~frozen,
            length.astype(np.float64),
            np.full(k, float(samples)),
            "",
            describe,
        )

    def _spikes(self, tag: str, hist: _TagHistory, t: FloatArray) -> _Eval:
        rule = self.config.alerts.tag_spikes
        w = rule.window
        count = np.searchsorted(hist.times, t, side="right") - np.searchsorted(
            hist.times, t - w, side="right"
        )
        if len(hist.binned):  # older readings, counted per bin (by the bin's end)
            ends = hist.binned[:, 0]
            sums = np.concatenate([[0.0], np.cumsum(hist.binned[:, 1])])
            hi = np.searchsorted(ends, t, side="right")
            lo = np.searchsorted(ends, t - w, side="right")
            count = count + (sums[hi] - sums[lo]).astype(np.int64)
        gated = np.searchsorted(hist.gated, t, side="right") - np.searchsorted(
            hist.gated, t - w, side="right"
        )
        share = gated / np.maximum(count, 1)
        enough = count >= rule.min_readings

        def describe(m: int, active: bool) -> str:
            if not active:
                return (
                    f"{tag}: rejected readings are back to {share[m]:.0%} of the last "
                    f"{_duration(w)}."
                )
            return (
                f"{tag}: {int(gated[m])} of {int(count[m])} readings in the last {_duration(w)} "
                f"were rejected as implausible ({share[m]:.0%}, limit {rule.share:.0%}): "
                "analyzer noise or sampling trouble, or a real change the model does not follow."
            )

        return _Eval(
            f"tag_spikes:{tag}",
            enough & (share > rule.share),
            ~enough | (share <= rule.share - rule.deadband),
            share,
            np.full(len(t), rule.share),
            "",
            describe,
        )

    def _mismatch(self, t: FloatArray) -> _Eval:
        rule = self.config.alerts.model_mismatch
        times, vals = self._nis[:, 0], self._nis[:, 2:]
        s_nis = np.concatenate([[0.0], np.cumsum(vals[:, 0])])
        s_dof = np.concatenate([[0.0], np.cumsum(vals[:, 1])])
        hi_i = np.searchsorted(times, t, side="right")
        lo_i = np.searchsorted(times, t - rule.window, side="right")
        dof = s_dof[hi_i] - s_dof[lo_i]
        nis = s_nis[hi_i] - s_nis[lo_i]
        enough = dof >= rule.min_dof
        safe = np.where(enough, dof, 1.0)
        per = nis / safe
        tail = 0.5 * (1.0 - rule.probability)
        lower, upper = self._nis_bounds(tail, safe)
        db = rule.deadband
        on = enough & ((per > upper) | (per < lower))
        off = ~enough | ((per <= upper - db) & (per >= lower + db))
        threshold = np.where(per >= 1.0, upper, lower)

        def describe(m: int, active: bool) -> str:
            figures = (
                f"NIS per degree of freedom {per[m]:.2f} over the last {_duration(rule.window)} "
                f"({rule.probability:.0%} bounds {lower[m]:.2f} to {upper[m]:.2f}, "
                f"{dof[m]:.0f} dof)"
            )
            if not active:
                return f"Analyzers and model agree again: {figures}."
            if per[m] > upper[m]:
                cause = (
                    "the analyzers disagree with the model more than their noise explains: "
                    "kinetics no longer right, an analyzer out of calibration, or an "
                    "unmodelled disturbance"
                )
            else:
                cause = (
                    "the analyzers agree with the model better than their stated noise: the "
                    "configured analyzer noise may be too large"
                )
            return f"{figures}: {cause}."

        return _Eval(f"model_mismatch:{self.config.name}", on, off, per, threshold, "", describe)

    def _reinitialised(self, ctx: _Rows) -> Iterator[_Eval]:
        rule = self.config.alerts.estimator_reinitialised
        watch = self.config.estimator.divergence
        if not rule.enabled:
            return
        rows = ctx.estimates
        since = ctx.time - rows.reset_time  # NaN before any re-initialisation
        on = since < rule.settle
        ratio = np.asarray(rows.reset_nis, dtype=np.float64)

        def describe(m: int, active: bool) -> str:
            when = format_time(float(rows.reset_time[m]))
            if not active:
                return (
                    f"The estimates have had {_duration(rule.settle)} to settle since the "
                    f"re-initialisation at {when}."
                )
            return (
                f"The estimator lost the plant and was started again from the design model "
                f"at {when}: over about the last {_duration(watch.window)} its analyzers "
                f"disagreed with it by a mean NIS per degree of freedom of {ratio[m]:.1f} "
                f"(limit {watch.nis_ratio:g}). Its estimates are settling for about "
                f"{_duration(rule.settle)}: judge them with care, and look for the cause (a "
                "sudden upset, an analyzer out of calibration, kinetics no longer right)."
            )

        yield _Eval(
            f"estimator_reinitialised:{self.config.name}",
            on,
            ~on,
            ratio,
            np.full(len(ctx.time), watch.nis_ratio),
            "",
            describe,
        )

    def _nis_bounds(self, tail: float, dof: FloatArray) -> tuple[FloatArray, FloatArray]:
        """Chi-square bounds of NIS per degree of freedom, ``tail`` outside each [-].

        Remembered per number of degrees of freedom: a window's count changes little
        between evaluations, and scipy's quantile costs more than the whole rule.
        """
        cache = self._bounds
        if len(cache) > 4096:
            cache.clear()
        keys = np.unique(dof)
        new = np.array([k for k in keys.tolist() if (tail, k) not in cache], dtype=np.float64)
        if new.size:
            lows = chi2.ppf(tail, new) / new
            highs = chi2.ppf(1.0 - tail, new) / new
            for k, lo, hi in zip(new.tolist(), lows.tolist(), highs.tolist(), strict=True):
                cache[(tail, k)] = (lo, hi)
        pairs = np.array([cache[(tail, k)] for k in keys.tolist()], dtype=np.float64)
        at = np.searchsorted(keys, dof)
        return pairs[at, 0], pairs[at, 1]

    def _show_flow(self, q: float) -> str:
        unit, scale, offset = self._units.get(self.config.feed.flow.tag, ("m^3/s", 1.0, 0.0))
        return f"{(q - offset) / scale:.3g} {unit}"

    def _show_temperature(self, i: int, temperature: float) -> str:
        source = self.config.vessels[i].temperature
        if isinstance(source, TemperatureTag):
            unit, scale, offset = source.unit, source.scale, source.offset
        else:
            unit, scale, offset = "degC", 1.0, 273.15
        return f"{(temperature - offset) / scale:.1f} {unit}"

    def window_bytes(self) -> int:
        """Bytes held in the rules' windows (activity, expectation, tag histories, NIS)."""
        held = self._activity.nbytes + self._expected.nbytes + self._nis.nbytes
        for h in self._history.values():
            held += h.times.nbytes + h.values.nbytes + h.gated.nbytes
        return held

    def state_dict(self) -> dict[str, Any]:
        """Return the engine's whole state as JSON-safe builtins.

        Holds every alert's lifecycle and timers, the event log and the windows the
        rules need, so :meth:`from_state_dict` continues exactly where this stopped.
        """
        return {
            "format": _STATE_FORMAT,
            "train": self.config.name,
            "last_time": self.last_time,
            "health_since": self._health_since,
            "book": self._book.state_dict(),
            "activity": self._activity.tolist(),
            "expected": self._expected.tolist(),
            "tags": {
                tag: {
                    "times": h.times.tolist(),
                    "values": h.values.tolist(),
                    "gated": h.gated.tolist(),
                    "binned": h.binned.tolist(),
                }
                for tag, h in self._history.items()
            },
            "nis": self._nis.tolist(),
            "folded_until": self._folded_until if math.isfinite(self._folded_until) else None,
            "twin": self.expected.state_dict() if isinstance(self.expected, DesignTwin) else None,
        }

    @classmethod
    def from_state_dict(
        cls,
        config: TrainConfig,
        data: dict[str, Any],
        *,
        expected: ExpectedConversion | None = None,
    ) -> AlertEngine:
        """Build an engine of ``config`` resumed from :meth:`state_dict` output.

        Alerts the configuration no longer has are dropped; new ones start normal.

        Raises
        ------
        ValueError
            The data are not a state of this version, or of another train.
        """
        engine = cls(config, expected=expected)
        try:
            if int(data["format"]) != _STATE_FORMAT:
                raise ValueError("alert engine state of another format version")
            if data["train"] != config.name:
                raise ValueError(
                    f"alert engine state of train {data['train']!r}, not {config.name!r}"
                )
            engine.last_time = _opt(data["last_time"])
            engine._health_since = _opt(data["health_since"])
            engine._book.load(data["book"])
            if isinstance(engine.expected, DesignTwin) and data.get("twin") is not None:
                engine.expected.load(data["twin"])
            engine._activity = np.array(data["activity"], dtype=np.float64).reshape(-1, 3)
            engine._expected = np.array(data["expected"], dtype=np.float64).reshape(
                -1, 1 + engine._n
            )
            for tag, saved in data["tags"].items():
                if tag in engine._history:
                    engine._history[tag] = _TagHistory(
                        np.array(saved["times"], dtype=np.float64),
                        np.array(saved["values"], dtype=np.float64),
                        np.array(saved["gated"], dtype=np.float64),
                        np.array(saved["binned"], dtype=np.float64).reshape(-1, 2),
                    )
            folded = data["folded_until"]
            engine._folded_until = -math.inf if folded is None else float(folded)
            engine._nis = merge_nis(
                np.empty((0, 4)), np.array(data["nis"], dtype=np.float64).reshape(-1, 4)
            )
        except (KeyError, TypeError) as exc:
            raise ValueError(f"not an alert engine state: missing or malformed {exc}") from None
        return engine


def _opt(value: Any) -> float | None:
    return None if value is None else float(value)


def _float(value: Any) -> float | None:
    number = float(value)
    return number if math.isfinite(number) else None
