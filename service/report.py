"""The replay report: what a replay found, and the HTML page and PNG plots that show it.

The result types live here (:class:`ReplaySummary` with its :class:`NisStatistics`,
:class:`Accuracy`, :class:`LabAccuracy` and :class:`AlertStatistics`; the binned
:class:`ReplaySeries` with its :class:`AlertInterval` list), and :mod:`service.replay`
re-exports them. :func:`write_report` turns a summary and
its series into ``report.html`` beside a ``plots/`` folder (the page links the
images by relative path, so the folder can be zipped and mailed as it is). The
plots:

- ``concentration-<vessel>.png``: each species' estimate with its 1-sigma band,
  and the truth when the replay had one;
- ``conversion-<vessel>.png``: the estimated reactant conversion with its band,
  beside what the design model expects at the same flow, temperature and feed;
- ``activity.png``: the catalyst activity with its band, and the truth;
- ``measurement-<tag>.png``: the readings of an analyzer or lab tag that the filter
  used, and those it gated (marked differently), over the estimate of the state
  the tag measures;
- ``alerts.png``: a timeline of the alerts raised, one row per alert, a bar from
  each activation to its clearing.

The conversion, activity and measurement plots carry the alerts about what they
show as shaded spans from activation to clearing, with a line at the activation:
colour, hatching and line style all tell the priority. The page's "Alerts"
section sets the alarm rates beside the published alarm-management guidance
(EEMUA 191, ISA-18.2), each figure with its confidence tag from the project's
REFERENCES.md.

Colours come from the Okabe-Ito palette, which stays distinguishable with the
common colour-vision deficiencies, and every distinction drawn in colour is
drawn in line style or marker shape too.
"""

from __future__ import annotations

import html
import math
import os
import re
from dataclasses import asdict, dataclass, field
from pathlib import Path
from typing import Any

import numpy as np

from estimator.alarm_state import AlertEvent
from estimator.model import FloatArray

__all__ = [
    "ALERT_LOG_ROWS",
    "DISCLAIMER",
    "RULE_KINDS",
    "Accuracy",
    "AlarmGuidance",
    "AlertInterval",
    "AlertStatistics",
    "LabAccuracy",
    "MeasurementSeries",
    "NisStatistics",
    "ReplaySeries",
    "ReplaySummary",
    "alarm_guidance",
    "nis_statistics",
    "write_report",
]

#: What stagewatch is and is not, as the report states it.
DISCLAIMER = (
    "stagewatch is a monitoring aid, not a safety system. Its estimates and this "
    "report support an engineer's judgement; they do not replace it. Act on site "
    "procedures, local codes and licensed engineering practice, never on this page "
    "alone."
)

# Okabe-Ito colours (M. Okabe and K. Ito, "Color Universal Design", 2008).
_BLUE = "#0072B2"
_ORANGE = "#E69F00"
_GREEN = "#009E73"
_VERMILLION = "#D55E00"
_PURPLE = "#CC79A7"
_SKY = "#56B4E9"
_BLACK = "#000000"

#: How each priority is drawn: colour, hatching of its span, line style at activation.
_PRIORITY_STYLE = {
    "high": (_VERMILLION, "////", "-"),
    "warning": (_ORANGE, "\\\\", "-."),
    "advisory": (_PURPLE, "..", ":"),
}
_PRIORITIES = tuple(_PRIORITY_STYLE)

#: Rows of the alert log the page shows (``alerts.csv`` holds every one).
ALERT_LOG_ROWS = 50

#: What each alert rule watches: the process, the estimator's health, or its inputs.
RULE_KINDS = {
    "conversion_shortfall_warning": "process",
    "conversion_shortfall_high": "process",
    "activity_low": "process",
    "activity_falling": "process",
    "tag_stale": "health",
    "tag_frozen": "health",
    "tag_spikes": "health",
    "model_mismatch": "health",
    "estimator_reinitialised": "health",
    "flow_low": "inputs",
    "temperature_range": "inputs",
}
# Rules about the whole train, drawn on every conversion plot and the activity plot.
_TRAIN_RULES = (
    "activity_low",
    "activity_falling",
    "model_mismatch",
    "estimator_reinitialised",
    "flow_low",
)
_TAG_RULES = ("tag_stale", "tag_frozen", "tag_spikes")
_TIMELINE_ROWS = 30

_WIDTH = 9.0  # figure width [in]
_PANEL = 2.6  # height of one panel [in]
_DPI = 110


# ---------------------------------------------------------------------- results


@dataclass(frozen=True)
class NisStatistics:
    """Time-averaged normalised innovation squared (NIS) per degree of freedom.

    Attributes
    ----------
    mean : float
        ``sum(NIS) / sum(dof)`` over the accepted updates [-]; 1 for a filter
        whose innovations match their predicted covariance (NaN when there were
        none).
    dof : int
        ``D = sum(dof)``, the degrees of freedom summed [-].
    updates : int
        Number of updates (one per reading group and time) [-].
    low, high : float
        The two-sided 95 % chi-square interval of ``mean``:
        ``chi2.ppf(0.025, D) / D`` and ``chi2.ppf(0.975, D) / D`` [-].
    inside : bool
        Whether ``low <= mean <= high``.

    Notes
    -----
    For a consistent filter ``sum(NIS)`` is chi-square with D degrees of freedom
    (Bar-Shalom, Li & Kirubarajan, *Estimation with Applications to Tracking and
    Navigation*, Wiley 2001, sec. 5.4.2, eq. 5.4.2-6). Readings rejected at the gate
    are not in the sum, which biases ``mean`` low by about 1 % at a 0.999 gate.
    """

    mean: float
    dof: int
    updates: int
    low: float
    high: float
    inside: bool


@dataclass(frozen=True)
class Accuracy:
    """Estimate against truth for one species in one vessel, after the warm-up.

    Attributes
    ----------
    vessel, species : str
        Where and what.
    measured : bool
        Whether an analyzer or lab result measures this species in this vessel.
    rmse : float
        Root-mean-square error of the estimate [mol/m^3].
    share : float
        ``rmse`` over the mean feed reactant concentration [-].
    bias : float
        Mean error, estimate minus truth [mol/m^3].
    z_rms : float
        Root mean square of error / estimated 1-sigma [-]; about 1 when the
        reported uncertainty is honest.
    rows : int
        Estimate rows scored.
    """

    vessel: str
    species: str
    measured: bool
    rmse: float
    share: float
    bias: float
    z_rms: float
    rows: int


@dataclass(frozen=True)
class LabAccuracy:
    """Estimate against the lab results of one lab tag.

    The estimate compared is the last one before the sample time (the filter's
    prediction, which has not yet seen that result).

    Attributes
    ----------
    tag, vessel, species : str
        The lab tag and what it measures.
    count : int
        Lab results compared.
    rmse, bias : float
        Root-mean-square and mean of estimate minus lab value [mol/m^3].
    """

    tag: str
    vessel: str
    species: str
    count: int
    rmse: float
    bias: float


@dataclass(frozen=True)
class AlarmGuidance:
    """One alarm-rate figure of a replay beside the published guidance for it.

    Attributes
    ----------
    metric : str
        What is counted, in words.
    value : float or None
        This replay's figure (None when it is not one number).
    measured : str
        The figure as the page shows it.
    guidance : str
        What the source recommends, in its own terms.
    limit : float or None
        The bound ``value`` is compared with (the acceptable level).
    source : str
        Where the guidance comes from.
    tag : str
        Confidence of the figure as REFERENCES.md tags it: ``"V"`` read in a
        retrieved text, ``"M"`` from memory, not confirmed, ``"CP"`` common practice.
    within : bool or None
        Whether ``value`` meets ``limit`` (None when there is nothing to compare).

    Notes
    -----
    The guidance is written for every alarm one operator position sees, over 30
    days or more; a train's stagewatch alerts are one contributor among many, so
    they should use a small part of it.
    """

    metric: str
    value: float | None
    measured: str
    guidance: str
    limit: float | None
    source: str
    tag: str
    within: bool | None


@dataclass
class AlertStatistics:
    """The alerts a replay raised, counted the way alarm-management metrics count them.

    An *activation* is a transition into ``active_unacknowledged``: one alarm
    annunciated to an operator. Rates use whole UTC-aligned periods.

    Attributes
    ----------
    events : int
        Transitions logged (rows of ``alerts.csv``).
    activations : int
        Of those, activations.
    clearings : int
        Transitions out of an active state because the condition cleared.
    by_rule, by_priority, by_alert : dict of str to int
        Activations per rule, per priority (every priority listed) and per alert id.
    by_kind : dict of str to int
        Activations of process, health and input rules (:data:`RULE_KINDS`).
    per_10_min_max, per_day_max : int
        Most activations in one 10-minute period, and in one UTC day.
    per_10_min_mean, per_day_mean : float
        Activations per 10 min and per day over the replayed span [1/(10 min), 1/d]
        (NaN when the span is empty).
    periods_10_min : int
        10-minute periods the replayed span touches.
    flood_periods : int
        Of those, periods with more than 10 activations (an alarm flood).
    chattering : int
        Alerts activated 3 or more times within 60 s at least once.
    chattering_alerts : list of str
        Their ids.
    active_at_end : list of str
        Alerts whose condition was still active when the replay ended.
    out_of_order : int
        Events stamped earlier than the event before them (0: the log is in time order).
    guidance : list of AlarmGuidance
        The rates beside EEMUA 191 and ISA-18.2 (:func:`alarm_guidance`).
    """

    events: int = 0
    activations: int = 0
    clearings: int = 0
    by_rule: dict[str, int] = field(default_factory=dict)
    by_priority: dict[str, int] = field(default_factory=lambda: dict.fromkeys(_PRIORITIES, 0))
    by_alert: dict[str, int] = field(default_factory=dict)
    by_kind: dict[str, int] = field(default_factory=dict)
    per_10_min_max: int = 0
    per_10_min_mean: float = math.nan
    per_day_max: int = 0
    per_day_mean: float = math.nan
    periods_10_min: int = 0
    flood_periods: int = 0
    chattering: int = 0
    chattering_alerts: list[str] = field(default_factory=list)
    active_at_end: list[str] = field(default_factory=list)
    out_of_order: int = 0
    guidance: list[AlarmGuidance] = field(default_factory=list)


@dataclass(frozen=True)
class AlertInterval:
    """One activation of one alert, for the plots.

    Attributes
    ----------
    alert_id, rule, subject, priority : str
        As in :class:`~estimator.alarm_state.AlertEvent`.
    start : float
        Activation time [s since the epoch].
    end : float
        When the condition cleared [s since the epoch]; NaN when it was still
        active at the end of the replay.
    """

    alert_id: str
    rule: str
    subject: str
    priority: str
    start: float
    end: float


def alarm_guidance(stats: AlertStatistics) -> list[AlarmGuidance]:
    """Set a replay's alarm rates beside EEMUA 191 and ISA-18.2.

    Parameters
    ----------
    stats : AlertStatistics
        The counts; ``guidance`` is not read.

    Returns
    -------
    list of AlarmGuidance
        One row per figure and source, tagged as REFERENCES.md sec. 6 tags it.

    References
    ----------
    EEMUA 191 (1999) and ISA-18.2 rates as quoted by D. Strobhar and C. Harvey,
    *Chemical Processing* (2011) [V]; the ISA-18.2 metric targets (per operator
    position, 30 days or more of data) [M]; the chattering criterion of 3 or more
    activations in 1 minute, a practitioner article [V].
    """
    s = stats
    quoted = "as quoted by Strobhar & Harvey, Chemical Processing 2011"
    isa_table = "ISA-18.2 metric targets, per operator position, 30 days or more"
    flood_share = s.flood_periods / s.periods_10_min if s.periods_10_min else math.nan
    total = sum(s.by_priority.values())
    split = " / ".join(
        f"{100 * s.by_priority.get(p, 0) / total:.0f} %" if total else "–"
        for p in ("advisory", "warning", "high")
    )

    def row(
        metric: str,
        value: float,
        measured: str,
        guidance: str,
        limit: float,
        source: str,
        tag: str,
        strict: bool = False,
    ) -> AlarmGuidance:
        within = None
        if math.isfinite(value):
            within = bool(value < limit) if strict else bool(value <= limit)
        return AlarmGuidance(metric, value, measured, guidance, limit, source, tag, within)

    mean10 = s.per_10_min_mean
    return [
        row(
            "alarms per 10 min, mean",
            mean10,
            _num(mean10, 3),
            "under 1 is the goal; 2 manageable; 5 likely excessive",
            1.0,
            f"EEMUA 191 (1999), {quoted}",
            "V",
            strict=True,
        ),
        row(
            "alarms per 10 min, mean",
            mean10,
            _num(mean10, 3),
            "about 1 to 2 in steady state",
            2.0,
            f"ISA-18.2, {quoted}",
            "V",
        ),
        row(
            "alarms in the busiest 10 min",
            float(s.per_10_min_max),
            f"{s.per_10_min_max:,}",
            "under 10 in the first 10 min after an upset is manageable; over 20 hard to cope with",
            10.0,
            f"EEMUA 191 (1999), {quoted}",
            "V",
            strict=True,
        ),
        row(
            "alarms in the busiest 10 min",
            float(s.per_10_min_max),
            f"{s.per_10_min_max:,}",
            "at most 10",
            10.0,
            isa_table,
            "M",
        ),
        row(
            "10-min periods in flood (more than 10 alarms)",
            flood_share,
            f"{s.flood_periods:,} of {s.periods_10_min:,}",
            "under about 1 % of the periods",
            0.01,
            isa_table,
            "M",
            strict=True,
        ),
        row(
            "alarms per day, mean",
            s.per_day_mean,
            _num(s.per_day_mean, 3),
            "about 150 acceptable, about 300 maximum",
            150.0,
            isa_table,
            "M",
        ),
        row(
            "alarms on the busiest day",
            float(s.per_day_max),
            f"{s.per_day_max:,}",
            "about 300 maximum",
            300.0,
            isa_table,
            "M",
        ),
        row(
            "chattering alarms (3 or more activations of one alert within 60 s)",
            float(s.chattering),
            f"{s.chattering:,}",
            "none (criterion of 3 in 1 min: a practitioner article [V])",
            0.0,
            isa_table,
            "M",
        ),
        AlarmGuidance(
            "priority split, advisory / warning / high",
            None,
            split,
            "about 80 % low / 15 % medium / 5 % high",
            None,
            isa_table,
            "M",
            None,
        ),
    ]


@dataclass
class ReplaySummary:
    """What a replay did and how well the estimator read the plant.

    Times are [s since the epoch], durations [s], concentrations [mol/m^3].

    Attributes
    ----------
    train, title : str
        The train's slug and title.
    archive : str
        The archive replayed.
    form : {"long", "wide"}
        Its layout.
    ordered_by : {"received", "time"}
        The arrival order the replay used.
    out : str
        Folder written into.
    first_time, last_time : float
        First and last estimate time (NaN when none).
    rows : int
        Data rows in the archive.
    readings : int
        Readings handed to the session (wide-form empty cells are no readings).
    time_steps : int
        Estimate rows written (one per distinct event time).
    unsorted : int
        Readings stamped earlier than a reading above them in the file.
    duplicates : int
        Exact repeats (tag, time and value) of a reading within one chunk; taken once.
    conflicts : int
        Further different values of a tag at a time it already has.
    unknown : int
        Readings of tags the train does not have (skipped with ``ignore_unknown``).
    unknown_tags : list of str
        Those tags.
    refused : int
        Readings the session refused (see ``refused.csv``).
    measurement_readings : int
        Analyzer and lab readings the session took.
    gated : int
        Of those, rejected at the innovation gate (final decisions).
    steps : int
        Of those, taken as a real step after persistent gating.
    gated_share : float
        ``gated / measurement_readings`` [-].
    nis : NisStatistics
        Over every accepted update.
    nis_by_tag : dict of str to NisStatistics
        Per measurement tag (or reading group).
    residence_time : float
        Total residence time at nominal flow, sum of volumes / nominal flow.
    warm_up : float
        Estimates earlier than ``first_time + warm_up`` are not scored.
    truth : str or None
        Truth file, when given.
    feed_reactant_mean : float
        Mean estimated feed reactant concentration over the scored rows.
    accuracy : list of Accuracy
        Per vessel and species, against the truth.
    activity_rmse, activity_max_error : float or None
        Activity error against the truth after the warm-up [-].
    lab : list of LabAccuracy
        Estimates against lab results.
    alerts : AlertStatistics
        The alerts the session raised (see ``alerts.csv``).
    elapsed : float
        Wall time of the replay, report included.
    report_seconds : float
        Of that, the time spent writing the report and its plots.
    steps_per_second : float
        ``time_steps / elapsed`` [1/s].
    files : dict of str to str
        What was written, by role.
    """

    train: str
    title: str
    archive: str
    form: str
    ordered_by: str
    out: str
    first_time: float = math.nan
    last_time: float = math.nan
    rows: int = 0
    readings: int = 0
    time_steps: int = 0
    unsorted: int = 0
    duplicates: int = 0
    conflicts: int = 0
    unknown: int = 0
    unknown_tags: list[str] = field(default_factory=list)
    refused: int = 0
    measurement_readings: int = 0
    gated: int = 0
    steps: int = 0
    gated_share: float = 0.0
    nis: NisStatistics | None = None
    nis_by_tag: dict[str, NisStatistics] = field(default_factory=dict)
    residence_time: float = math.nan
    warm_up: float = math.nan
    truth: str | None = None
    feed_reactant_mean: float = math.nan
    accuracy: list[Accuracy] = field(default_factory=list)
    activity_rmse: float | None = None
    activity_max_error: float | None = None
    lab: list[LabAccuracy] = field(default_factory=list)
    alerts: AlertStatistics = field(default_factory=AlertStatistics)
    elapsed: float = 0.0
    report_seconds: float = 0.0
    steps_per_second: float = 0.0
    files: dict[str, str] = field(default_factory=dict)

    def to_dict(self) -> dict[str, Any]:
        """Return the summary as plain JSON-ready values (NaN and infinities as None)."""
        return _json_ready(asdict(self))


@dataclass
class MeasurementSeries:
    """One measured tag for the plots: readings used, and those gated, at sample time.

    Attributes
    ----------
    tag : str
        The tag.
    location : str
        The vessel measured, or ``"feed"`` for a feed analyzer.
    species : str
        The species measured.
    kind : str
        ``"analyzer"``, ``"lab"`` or ``"feed analyzer"``.
    time, value : ndarray, shape (k,)
        Bin means of the readings used [s since the epoch, mol/m^3].
    gated_time, gated_value : ndarray, shape (g,)
        Gated readings (at most a few thousand kept) [s, mol/m^3].
    step_time, step_value : ndarray, shape (h,)
        Readings taken as a real step [s, mol/m^3].
    gated_total : int
        All gated readings of the tag, kept or not.
    """

    tag: str
    location: str
    species: str
    kind: str
    time: FloatArray
    value: FloatArray
    gated_time: FloatArray
    gated_value: FloatArray
    step_time: FloatArray
    step_value: FloatArray
    gated_total: int


@dataclass
class ReplaySeries:
    """Bin means of the estimates (and the truth) for the plots.

    Attributes
    ----------
    vessels, species : tuple of str
        Names in model order.
    reactant : str
        The reaction's reactant.
    time : ndarray, shape (k,)
        Mean time of each bin [s since the epoch].
    concentration, concentration_std : ndarray, shape (k, N, S)
        [mol/m^3].
    conversion, conversion_std, design_conversion : ndarray, shape (k, N)
        [-].
    activity, activity_std : ndarray, shape (k,)
        [-].
    feed : ndarray, shape (k, S)
        Feed concentration the model used [mol/m^3].
    truth_time : ndarray, shape (m,) or None
        Bin means of the truth's times [s].
    truth_concentration : ndarray, shape (m, N, S) or None
        [mol/m^3]; NaN where the truth file lacks a column.
    truth_activity : ndarray, shape (m,) or None
        [-].
    measurements : list of MeasurementSeries
        Every measured tag.
    alert_intervals : list of AlertInterval
        Activations to draw, in time order (the first few thousand).
    alert_log : list of AlertEvent
        The first :data:`ALERT_LOG_ROWS` alert transitions, for the page's table.
    """

    vessels: tuple[str, ...]
    species: tuple[str, ...]
    reactant: str
    time: FloatArray
    concentration: FloatArray
    concentration_std: FloatArray
    conversion: FloatArray
    conversion_std: FloatArray
    design_conversion: FloatArray
    activity: FloatArray
    activity_std: FloatArray
    feed: FloatArray
    truth_time: FloatArray | None = None
    truth_concentration: FloatArray | None = None
    truth_activity: FloatArray | None = None
    measurements: list[MeasurementSeries] = field(default_factory=list)
    alert_intervals: list[AlertInterval] = field(default_factory=list)
    alert_log: list[AlertEvent] = field(default_factory=list)


def nis_statistics(nis_sum: float, dof: int, updates: int) -> NisStatistics:
    """Time-averaged NIS per degree of freedom with its 95 % chi-square interval.

    Parameters
    ----------
    nis_sum : float
        Sum of the NIS of every update [-].
    dof : int
        Sum of their degrees of freedom, D [-].
    updates : int
        Number of updates [-].

    Returns
    -------
    NisStatistics
        ``mean = nis_sum / D`` and ``[chi2.ppf(0.025, D) / D, chi2.ppf(0.975, D) / D]``.

    References
    ----------
    Y. Bar-Shalom, X. R. Li, T. Kirubarajan, *Estimation with Applications to
    Tracking and Navigation*, Wiley 2001, sec. 5.4.2.

    Examples
    --------
    With D = 100 the interval is [0.74, 1.30] (chi-square table, 95 % two-sided):

    >>> s = nis_statistics(95.0, 100, 100)
    >>> round(s.low, 2), round(s.high, 2), s.inside
    (0.74, 1.3, True)
    """
    if dof <= 0:
        return NisStatistics(math.nan, 0, updates, math.nan, math.nan, False)
    from scipy.stats import chi2

    mean = nis_sum / dof
    low = float(chi2.ppf(0.025, dof)) / dof
    high = float(chi2.ppf(0.975, dof)) / dof
    return NisStatistics(mean, int(dof), int(updates), low, high, bool(low <= mean <= high))


# ---------------------------------------------------------------------- report


def write_report(out: Path, summary: ReplaySummary, series: ReplaySeries) -> Path:
    """Write ``out/report.html`` and its plots into ``out/plots``.

    Parameters
    ----------
    out : pathlib.Path
        The replay's output folder.
    summary : ReplaySummary
        Counts, consistency and accuracy figures of the replay.
    series : ReplaySeries
        Bin means of the estimates (and truth) over time, for the plots;
        concentrations in [mol/m^3], times in [s since the epoch].

    Returns
    -------
    pathlib.Path
        The HTML page.
    """
    import matplotlib

    matplotlib.use("Agg")
    plots = Path(out) / "plots"
    plots.mkdir(parents=True, exist_ok=True)
    figures: list[tuple[str, str, str]] = []  # section, file name, caption
    timeline: str | None = None
    if len(series.time):
        for i, vessel in enumerate(series.vessels):
            name = f"concentration-{_slug(vessel)}.png"
            _concentration_plot(plots / name, series, i)
            figures.append(
                (
                    "Concentrations",
                    name,
                    f"{vessel}: estimated concentration of each species, shaded 1-sigma band"
                    + ("; dashed: truth" if series.truth_concentration is not None else ""),
                )
            )
        for i, vessel in enumerate(series.vessels):
            name = f"conversion-{_slug(vessel)}.png"
            drawn = _conversion_plot(plots / name, series, i)
            figures.append(
                (
                    "Conversion against design",
                    name,
                    f"{vessel}: {series.reactant} conversion estimated (band: 1-sigma) and "
                    "expected by the design model at the same inputs (dashed)"
                    + _alert_caption(drawn, f"about {vessel} or the whole train"),
                )
            )
        drawn = _activity_plot(plots / "activity.png", series)
        figures.append(
            (
                "Catalyst activity",
                "activity.png",
                "Estimated activity, shaded 1-sigma band"
                + ("; dashed: truth" if series.truth_activity is not None else "")
                + _alert_caption(drawn, "about the whole train"),
            )
        )
        for meas in series.measurements:
            name = f"measurement-{_slug(meas.tag)}.png"
            drawn = _measurement_plot(plots / name, series, meas)
            where = "the feed" if meas.location == "feed" else meas.location
            figures.append(
                (
                    "Measurements used and rejected",
                    name,
                    f"{meas.tag} ({meas.kind}, {meas.species} in {where}): readings used "
                    f"(dots, bin means) and gated ({meas.gated_total}, crosses) against the "
                    "estimate at their sample time" + _alert_caption(drawn, f"about {meas.tag}"),
                )
            )
        if series.alert_intervals:
            timeline = "alerts.png"
            _alert_timeline(plots / timeline, series)
    page = Path(out) / "report.html"
    page.write_text(_page(summary, figures, series.alert_log, timeline), encoding="utf-8")
    return page


def _alert_caption(drawn: dict[str, int], about: str) -> str:
    """Caption words for the alert spans a plot carries (empty when it carries none)."""
    if not drawn:
        return ""
    counts = ", ".join(f"{drawn[p]} {p}" for p in _PRIORITIES if drawn.get(p))
    return (
        f"; shaded from activation to clearing, a line at each activation: alerts {about} "
        f"({counts}; colour, hatching and line style by priority)"
    )


# ---------------------------------------------------------------------- plots


def _slug(name: str) -> str:
    return re.sub(r"[^A-Za-z0-9_.-]+", "_", name)


def _dates(t: np.ndarray) -> np.ndarray:
    """Epoch seconds as numpy datetimes, which matplotlib puts on a date axis."""
    return (np.asarray(t) * 1e3).round().astype("datetime64[ms]")


def _figure(panels: int) -> tuple[Any, list[Any]]:
    import matplotlib.dates as mdates
    import matplotlib.pyplot as plt

    height = _PANEL * panels + 0.4
    fig, axes = plt.subplots(panels, 1, figsize=(_WIDTH, height), sharex=True, squeeze=False)
    # Fixed margins [in]: much faster than tight_layout, and the same on every page.
    fig.subplots_adjust(
        left=1.0 / _WIDTH,
        right=1 - 0.25 / _WIDTH,
        bottom=0.62 / height,
        top=1 - 0.38 / height,
        hspace=0.45 / (_PANEL - 0.5),
    )
    axes_list = [ax for row in axes for ax in row]
    for ax in axes_list:
        ax.grid(True, color="#dddddd", linewidth=0.6)
        ax.set_axisbelow(True)
        for side in ("top", "right"):
            ax.spines[side].set_visible(False)
    locator = mdates.AutoDateLocator()
    axes_list[-1].xaxis.set_major_locator(locator)
    axes_list[-1].xaxis.set_major_formatter(mdates.ConciseDateFormatter(locator))
    axes_list[-1].set_xlabel("time (UTC)")
    return fig, axes_list


def _save(fig: Any, path: Path) -> None:
    import matplotlib.pyplot as plt

    fig.savefig(path, dpi=_DPI)
    plt.close(fig)


def _band(ax: Any, t: np.ndarray, mean: np.ndarray, std: np.ndarray, label: str) -> None:
    x = _dates(t)
    ax.fill_between(x, mean - std, mean + std, color=_SKY, alpha=0.35, linewidth=0, label="±1σ")
    ax.plot(x, mean, color=_BLUE, linewidth=1.2, label=label)


def _concentration_plot(path: Path, series: ReplaySeries, vessel: int) -> None:
    fig, axes = _figure(len(series.species))
    for s, (ax, species) in enumerate(zip(axes, series.species, strict=True)):
        _band(
            ax,
            series.time,
            series.concentration[:, vessel, s],
            series.concentration_std[:, vessel, s],
            "estimate",
        )
        truth = series.truth_concentration
        if truth is not None and series.truth_time is not None:
            ax.plot(
                _dates(series.truth_time),
                truth[:, vessel, s],
                color=_BLACK,
                linestyle="--",
                linewidth=0.9,
                label="truth",
            )
        ax.set_ylabel(f"{species}\n[mol/m³]")
        ax.legend(loc="best", fontsize="small", frameon=False)
    axes[0].set_title(f"{series.vessels[vessel]}: concentrations", loc="left")
    _save(fig, path)


def _conversion_plot(path: Path, series: ReplaySeries, vessel: int) -> dict[str, int]:
    fig, axes = _figure(1)
    ax = axes[0]
    _band(
        ax,
        series.time,
        100 * series.conversion[:, vessel],
        100 * series.conversion_std[:, vessel],
        "estimated",
    )
    ax.plot(
        _dates(series.time),
        100 * series.design_conversion[:, vessel],
        color=_BLACK,
        linestyle="--",
        linewidth=1.4,
        label="design expectation",
    )
    drawn = _draw_alerts(ax, series, _alerts_about(series, vessel=series.vessels[vessel]))
    ax.set_ylabel(f"{series.reactant} conversion\n[%]")
    _legend(ax, drawn)
    ax.set_title(f"{series.vessels[vessel]}: conversion after this vessel", loc="left")
    _save(fig, path)
    return drawn


def _activity_plot(path: Path, series: ReplaySeries) -> dict[str, int]:
    fig, axes = _figure(1)
    ax = axes[0]
    _band(ax, series.time, series.activity, series.activity_std, "estimate")
    if series.truth_activity is not None and series.truth_time is not None:
        ax.plot(
            _dates(series.truth_time),
            series.truth_activity,
            color=_BLACK,
            linestyle="--",
            linewidth=0.9,
            label="truth",
        )
    drawn = _draw_alerts(ax, series, _alerts_about(series))
    ax.set_ylabel("activity [-]")
    _legend(ax, drawn)
    ax.set_title("Catalyst activity (1 = design)", loc="left")
    _save(fig, path)
    return drawn


def _measurement_plot(path: Path, series: ReplaySeries, meas: MeasurementSeries) -> dict[str, int]:
    fig, axes = _figure(1)
    ax = axes[0]
    s = series.species.index(meas.species)
    if meas.location == "feed":
        estimate = series.feed[:, s]
        std = None
    else:
        i = series.vessels.index(meas.location)
        estimate = series.concentration[:, i, s]
        std = series.concentration_std[:, i, s]
    ax.plot(
        _dates(meas.time),
        meas.value,
        linestyle="none",
        marker="o",
        markersize=5.0 if meas.kind == "lab" else 2.5,
        color=_GREEN,
        alpha=0.7,
        label="readings used",
        zorder=2,
    )
    if std is not None:
        _band(ax, series.time, estimate, std, "estimate")
    else:
        ax.plot(_dates(series.time), estimate, color=_BLUE, linewidth=1.2, label="estimate")
    if len(meas.step_time):
        ax.plot(
            _dates(meas.step_time),
            meas.step_value,
            linestyle="none",
            marker="D",
            markersize=5,
            markerfacecolor="none",
            color=_PURPLE,
            label="taken as a step",
            zorder=4,
        )
    if len(meas.gated_time):
        ax.plot(
            _dates(meas.gated_time),
            meas.gated_value,
            linestyle="none",
            marker="x",
            markersize=6,
            markeredgewidth=1.4,
            color=_VERMILLION,
            label="gated (rejected)",
            zorder=4,
        )
    # Keep the axis on the process: a gross spike would flatten everything else.
    # Gated readings are not in meas.value; the estimate's start-up transient is trimmed.
    if estimate.size:
        low, high = np.nanpercentile(estimate, [0.5, 99.5])
        if len(meas.value):
            low, high = min(low, np.nanmin(meas.value)), max(high, np.nanmax(meas.value))
        pad = 0.15 * max(high - low, 1e-9)
        ax.set_ylim(low - pad, high + pad)
        outside = np.count_nonzero((meas.gated_value < low - pad) | (meas.gated_value > high + pad))
        if outside:
            ax.set_title(
                f"{outside} gated reading(s) off scale", loc="right", fontsize="small",
                color=_VERMILLION,
            )  # fmt: skip
    drawn = _draw_alerts(ax, series, _alerts_about(series, tag=meas.tag))
    where = "feed" if meas.location == "feed" else meas.location
    ax.set_ylabel(f"{meas.species}, {where}\n[mol/m³]")
    ax.legend(loc="best", fontsize="small", framealpha=0.85, ncol=2)
    ax.set_title(f"{meas.tag}: readings against the estimate", loc="left")
    _save(fig, path)
    return drawn


def _legend(ax: Any, drawn: dict[str, int]) -> None:
    """Legend of a time plot; framed when alert spans lie under it."""
    if drawn:
        ax.legend(loc="best", fontsize="small", framealpha=0.85, ncol=2)
    else:
        ax.legend(loc="best", fontsize="small", frameon=False)


def _alerts_about(
    series: ReplaySeries, *, vessel: str | None = None, tag: str | None = None
) -> list[AlertInterval]:
    """Return the activations a plot carries.

    A tag's plot: the tag's health alerts. Otherwise the alerts about the whole
    train (activity, model agreement, feed flow), and with ``vessel`` also those
    about that vessel (conversion shortfall, temperature range).
    """
    if tag is not None:
        return [i for i in series.alert_intervals if i.rule in _TAG_RULES and i.subject == tag]
    return [
        i
        for i in series.alert_intervals
        if i.rule in _TRAIN_RULES
        or (vessel is not None and i.subject == vessel and i.rule not in _TAG_RULES)
    ]


def _draw_alerts(ax: Any, series: ReplaySeries, intervals: list[AlertInterval]) -> dict[str, int]:
    """Shade each activation to its clearing and mark the activation; return counts by priority.

    Spans are clipped to the plotted time range; one still active at the end runs
    to it. The first span of each priority carries the legend entry. Drawn below
    the estimates, the most urgent on top.
    """
    drawn: dict[str, int] = {}
    if not intervals or not len(series.time):
        return drawn
    t0, t1 = float(series.time[0]), float(series.time[-1])
    rank = {p: i for i, p in enumerate(_PRIORITIES)}
    for interval in sorted(intervals, key=lambda i: -rank.get(i.priority, len(rank))):
        end = interval.end if math.isfinite(interval.end) else t1
        start, end = max(interval.start, t0), min(end, t1)
        if end < start:
            continue
        colour, hatch, style = _PRIORITY_STYLE.get(interval.priority, (_BLACK, "xx", "--"))
        first = interval.priority not in drawn
        x0, x1 = _dates(np.array([start, end]))
        ax.axvspan(
            x0,
            x1,
            facecolor=colour,
            edgecolor=colour,
            alpha=0.22,
            hatch=hatch,
            linewidth=0.0,
            label=f"{interval.priority} alert" if first else "_nolegend_",
            zorder=0.6,
        )
        ax.axvline(x0, color=colour, linestyle=style, linewidth=1.3, zorder=1.5)
        drawn[interval.priority] = drawn.get(interval.priority, 0) + 1
    return drawn


def _alert_timeline(path: Path, series: ReplaySeries) -> None:
    """One row per alert, a bar from each activation to its clearing, by priority."""
    import matplotlib.dates as mdates
    import matplotlib.pyplot as plt
    from matplotlib.legend_handler import HandlerTuple
    from matplotlib.lines import Line2D
    from matplotlib.patches import Patch

    intervals = series.alert_intervals
    count: dict[str, int] = {}
    first: dict[str, float] = {}
    for interval in intervals:
        count[interval.alert_id] = count.get(interval.alert_id, 0) + 1
        first.setdefault(interval.alert_id, interval.start)
    ids = sorted(count, key=lambda a: (-count[a], first[a]))[:_TIMELINE_ROWS]
    ids.sort(key=lambda a: first[a])
    row = {a: i for i, a in enumerate(ids)}
    height = 1.3 + 0.3 * len(ids)
    fig, ax = plt.subplots(figsize=(_WIDTH, height))
    fig.subplots_adjust(
        left=3.0 / _WIDTH, right=1 - 0.25 / _WIDTH, bottom=0.62 / height, top=1 - 0.45 / height
    )
    t0, t1 = float(series.time[0]), float(series.time[-1])
    x_first, x_last = mdates.date2num(_dates(np.array([t0, t1])))
    markers = {"high": "D", "warning": "^", "advisory": "o"}
    for interval in intervals:
        if interval.alert_id not in row:
            continue
        y = row[interval.alert_id]
        end = interval.end if math.isfinite(interval.end) else t1
        x0, x1 = mdates.date2num(_dates(np.array([interval.start, max(end, interval.start)])))
        colour, hatch, _ = _PRIORITY_STYLE.get(interval.priority, (_BLACK, "xx", "--"))
        ax.barh(
            y, x1 - x0, left=x0, height=0.6, color=colour, alpha=0.45, hatch=hatch,
            edgecolor=colour, linewidth=0.8,
        )  # fmt: skip
        ax.plot(
            [x0], [y], linestyle="none", marker=markers.get(interval.priority, "s"),
            color=colour, markersize=5, markeredgecolor=_BLACK, markeredgewidth=0.5,
        )  # fmt: skip
    ax.set_yticks(range(len(ids)), ids, fontsize="small")
    ax.set_ylim(len(ids) - 0.5, -0.5)
    ax.set_xlim(x_first, x_last)
    locator = mdates.AutoDateLocator()
    ax.xaxis.set_major_locator(locator)
    ax.xaxis.set_major_formatter(mdates.ConciseDateFormatter(locator))
    ax.set_xlabel("time (UTC)")
    ax.grid(True, axis="x", color="#dddddd", linewidth=0.6)
    ax.set_axisbelow(True)
    for side in ("top", "right"):
        ax.spines[side].set_visible(False)
    present = [p for p in _PRIORITIES if any(i.priority == p for i in intervals)]
    handles: list[Any] = []
    for p in present:
        colour, hatch, _ = _PRIORITY_STYLE[p]
        bar = Patch(facecolor=colour, alpha=0.45, hatch=hatch, edgecolor=colour)
        mark = Line2D(
            [], [], linestyle="none", marker=markers[p], color=colour, markeredgecolor=_BLACK,
            markeredgewidth=0.5,
        )  # fmt: skip
        handles.append((bar, mark))
    ax.legend(
        handles, [f"{p}: activation to clearing" for p in present],
        handler_map={tuple: HandlerTuple(ndivide=None)}, loc="lower left",
        bbox_to_anchor=(0.0, 1.0), ncol=max(len(handles), 1), fontsize="small", frameon=False,
    )  # fmt: skip
    if len(count) > len(ids):
        ax.set_xlabel(
            f"time (UTC); the {len(ids)} alerts activated most often of {len(count)} shown"
        )
    _save(fig, path)


# ---------------------------------------------------------------------- page


_FILES = (
    ("estimates.parquet", "every estimate time: concentrations, 1-sigma, conversion, activity"),
    ("estimates.csv", "the same, each column to 9 significant digits of its largest value"),
    ("gated.csv", "readings rejected at the innovation gate, with the reason"),
    ("steps.csv", "readings taken as a real step after repeated gating"),
    ("refused.csv", "readings not taken (unknown, out of range, too old), with the reason"),
    ("alerts.csv", "every alert transition: time, alert, priority, states, figure, message"),
    ("summary.json", "the figures on this page"),
)

_STYLE = """
body { font-family: system-ui, sans-serif; max-width: 62rem; margin: 2rem auto;
       padding: 0 1rem; color: #1a1a1a; line-height: 1.45; }
h1 { font-size: 1.5rem; margin-bottom: 0.2rem; }
h2 { font-size: 1.15rem; margin-top: 2rem; border-bottom: 1px solid #ccc; }
.sub { color: #555; margin-top: 0; }
.notice { border-left: 4px solid #E69F00; background: #fff8e6; padding: 0.6rem 1rem; }
table { border-collapse: collapse; margin: 0.6rem 0; }
th, td { padding: 0.25rem 0.7rem; border-bottom: 1px solid #e4e4e4; text-align: left; }
td.n { text-align: right; font-variant-numeric: tabular-nums; }
.ok { font-weight: 600; }
.no { font-weight: 600; text-decoration: underline; }
figure { margin: 1rem 0 1.6rem; }
figure img { max-width: 100%; }
figcaption { color: #444; font-size: 0.92rem; }
"""


def _e(text: object) -> str:
    return html.escape(str(text))


def _num(value: float | None, digits: int = 4) -> str:
    if value is None or not math.isfinite(value):
        return "–"
    return f"{value:.{digits}g}"


def _when(epoch: float) -> str:
    if not math.isfinite(epoch):
        return "–"
    return str(np.datetime_as_string(_dates(np.array([epoch]))[0], unit="s")) + "Z"


def _table(head: list[str], rows: list[list[str]], numeric: set[int] | None = None) -> str:
    numeric = numeric or set()
    out = ["<table>", "<tr>" + "".join(f"<th>{_e(h)}</th>" for h in head) + "</tr>"]
    for row in rows:
        cells = "".join(
            f'<td class="n">{c}</td>' if j in numeric else f"<td>{c}</td>"
            for j, c in enumerate(row)
        )
        out.append(f"<tr>{cells}</tr>")
    out.append("</table>")
    return "\n".join(out)


def _verdict(inside: bool) -> str:
    return '<span class="ok">inside</span>' if inside else '<span class="no">outside</span>'


def _nis_row(name: str, stats: NisStatistics) -> list[str]:
    return [
        _e(name),
        _num(stats.mean),
        f"[{_num(stats.low)}, {_num(stats.high)}]",
        _verdict(stats.inside) if stats.dof else "–",
        f"{stats.dof:,}",
    ]


def _page(
    summary: ReplaySummary,
    figures: list[tuple[str, str, str]],
    alert_log: list[AlertEvent] | None = None,
    timeline: str | None = None,
) -> str:
    s = summary
    parts = [
        "<!DOCTYPE html>",
        '<html lang="en"><head><meta charset="utf-8">',
        f"<title>Replay of {_e(s.train)}</title>",
        f"<style>{_STYLE}</style></head><body>",
        f"<h1>Replay: {_e(s.title or s.train)}</h1>",
        f'<p class="sub">{_e(s.archive)}, {_when(s.first_time)} to {_when(s.last_time)}</p>',
        f'<p class="notice">{_e(DISCLAIMER)}</p>',
        "<h2>What was replayed</h2>",
    ]
    facts = [
        ["Train", _e(f"{s.train} ({s.title})" if s.title else s.train)],
        ["Archive", _e(f"{s.archive} ({s.form} form, ordered by {s.ordered_by})")],
        ["Rows in the archive", f"{s.rows:,}"],
        ["Readings handed to the estimator", f"{s.readings:,}"],
        ["Estimate times written", f"{s.time_steps:,}"],
        ["Unsorted readings (accepted, put in order)", f"{s.unsorted:,}"],
        ["Exact duplicates (taken once)", f"{s.duplicates:,}"],
        ["Conflicting values at one time", f"{s.conflicts:,}"],
        [
            "Readings of unknown tags (skipped)",
            f"{s.unknown:,}" + (f" ({_e(', '.join(s.unknown_tags))})" if s.unknown_tags else ""),
        ],
        ["Readings refused (see refused.csv)", f"{s.refused:,}"],
        [
            "Analyzer and lab readings gated (see gated.csv)",
            f"{s.gated:,} of {s.measurement_readings:,} ({100 * s.gated_share:.2f} %)",
        ],
        ["Readings taken as a real step (see steps.csv)", f"{s.steps:,}"],
        [
            "Replay time, before this report",
            f"{s.elapsed:.1f} s ({s.steps_per_second:,.0f} estimate times/s)",
        ],
    ]
    parts.append(_table(["", ""], facts))

    parts.append("<h2>Consistency: normalised innovations</h2>")
    parts.append(
        "<p>The time-averaged NIS per degree of freedom is about 1 when the innovations "
        "match the spread the filter predicts for them; the interval is its two-sided "
        "95 % chi-square interval for the degrees of freedom seen (Bar-Shalom, Li &amp; "
        "Kirubarajan 2001, sec. 5.4). Below the interval the filter is more cautious "
        "than it needs to be; above it, over-confident. Gated readings are not in the "
        "sum.</p>"
    )
    nis_rows = []
    if s.nis is not None:
        nis_rows.append(_nis_row("all updates", s.nis))
    nis_rows += [_nis_row(tag, stats) for tag, stats in s.nis_by_tag.items()]
    parts.append(
        _table(["", "NIS / dof", "95 % interval", "", "degrees of freedom"], nis_rows, {1, 4})
    )

    parts.append("<h2>Accuracy</h2>")
    if s.accuracy:
        parts.append(
            f"<p>Against the truth in {_e(s.truth)}, after a warm-up of one total residence "
            f"time at nominal flow ({s.warm_up / 3600:.2f} h). Share: RMSE over the mean "
            "estimated feed reactant concentration "
            f"({_num(s.feed_reactant_mean)} mol/m³). z: RMS of error over the estimated "
            "1-sigma (about 1 when the stated uncertainty is honest).</p>"
        )
        rows = [
            [
                _e(a.vessel),
                _e(a.species),
                "measured" if a.measured else "estimated only",
                _num(a.rmse),
                f"{100 * a.share:.2f} %" if math.isfinite(a.share) else "–",
                _num(a.bias, 3),
                f"{a.z_rms:.2f}" if math.isfinite(a.z_rms) else "–",
            ]
            for a in s.accuracy
        ]
        parts.append(
            _table(
                ["vessel", "species", "", "RMSE [mol/m³]", "share", "bias [mol/m³]", "z"],
                rows,
                {3, 4, 5, 6},
            )
        )
        if s.activity_rmse is not None:
            parts.append(
                f"<p>Activity: RMSE {_num(s.activity_rmse, 3)}, largest error "
                f"{_num(s.activity_max_error, 3)} (after the warm-up; sudden changes "
                "take a few residence times to show).</p>"
            )
    else:
        parts.append("<p>No truth file was given.</p>")
    if s.lab:
        parts.append(
            "<p>Against the lab results: the estimate just before each sample time (the "
            "filter's prediction, before it saw the result) minus the lab value.</p>"
        )
        rows = [
            [
                _e(x.tag),
                _e(f"{x.species} in {x.vessel}"),
                f"{x.count:,}",
                _num(x.rmse),
                _num(x.bias, 3),
            ]
            for x in s.lab
        ]
        parts.append(
            _table(["lab tag", "measures", "results", "RMSE [mol/m³]", "bias"], rows, {2, 3, 4})
        )

    parts += _alerts_section(s, alert_log or [], timeline)

    section = None
    for title, name, caption in figures:
        if title != section:
            parts.append(f"<h2>{_e(title)}</h2>")
            section = title
        parts.append(
            f'<figure><img src="plots/{_e(name)}" alt="{_e(caption)}">'
            f"<figcaption>{_e(caption)}</figcaption></figure>"
        )
    parts.append("<h2>Files beside this page</h2>")
    parts.append(_table(["file", "holds"], [[_e(n), _e(d)] for n, d in _FILES]))
    parts.append(f'<p class="notice">{_e(DISCLAIMER)}</p>')
    parts.append("</body></html>")
    return "\n".join(parts) + "\n"


_TAG_WORDS = {
    "V": "read in a retrieved text",
    "M": "from memory, not confirmed",
    "CP": "common practice, no source",
}


def _alerts_section(
    summary: ReplaySummary, log: list[AlertEvent], timeline: str | None
) -> list[str]:
    """Return the page's "Alerts" section: counts, rates against guidance, timeline, log."""
    a = summary.alerts
    parts = ["<h2>Alerts</h2>"]
    parts.append(
        f"<p>The session ran the train's alert rules on every estimate as it was first "
        f"produced: {a.activations:,} activation(s) and {a.events:,} transition(s) in "
        "all (see alerts.csv). An alert is judged once, in plant time; a later revision "
        "of the estimates (after a late lab result) does not re-judge it. Alerts are "
        "advice from a monitoring aid: they do not replace the plant's alarm system.</p>"
    )
    if a.out_of_order:
        parts.append(
            f'<p class="notice">{a.out_of_order:,} alert transition(s) were stamped '
            "earlier than the one before them.</p>"
        )
    if a.by_alert:
        kinds = {"process": "process", "health": "estimator health", "inputs": "model inputs"}
        active = set(a.active_at_end)
        rows = [
            [
                _e(alert_id),
                _e(kinds.get(RULE_KINDS.get(alert_id.partition(":")[0], ""), "other")),
                f"{n:,}",
                "active" if alert_id in active else "",
            ]
            for alert_id, n in a.by_alert.items()
        ]
        parts.append(_table(["alert", "watches", "activations", "at the end"], rows, {2}))
    by_priority = ", ".join(f"{p} {a.by_priority.get(p, 0):,}" for p in _PRIORITIES)
    by_kind = ", ".join(f"{k} {n:,}" for k, n in a.by_kind.items()) or "none"
    parts.append(
        f"<p>Activations by priority: {_e(by_priority)}. By what the rule watches: "
        f"{_e(by_kind)}. Chattering alerts (3 or more activations of one alert within "
        f"60 s): {a.chattering:,}"
        + (f" ({_e(', '.join(a.chattering_alerts))})" if a.chattering_alerts else "")
        + ".</p>"
    )
    parts.append(
        "<p>Alarm rates beside the alarm-management guidance. Rates count activations "
        "in whole 10-minute periods and UTC days over the replayed span. The guidance "
        "is written for every alarm one operator position sees, over 30 days or more: a "
        "train's stagewatch alerts are one contributor and should use a small part of it. "
        "Confidence as the project's references tag it: [V] read in a retrieved text, "
        "[M] from memory, not confirmed.</p>"
    )
    rows = []
    for g in a.guidance:
        verdict = "–" if g.within is None else _verdict_words(g.within)
        rows.append(
            [
                _e(g.metric),
                _e(g.measured),
                _e(g.guidance),
                _e(g.source),
                _e(f"[{g.tag}] {_TAG_WORDS.get(g.tag, '')}".strip()),
                verdict,
            ]
        )
    parts.append(
        _table(["figure", "this replay", "guidance", "source", "confidence", ""], rows, {1})
    )
    if timeline is not None:
        caption = (
            "Alerts raised: one row per alert, a bar from each activation to its clearing "
            "(to the end when still active), colour, hatching and marker by priority"
        )
        parts.append(
            f'<figure><img src="plots/{_e(timeline)}" alt="{_e(caption)}">'
            f"<figcaption>{_e(caption)}</figcaption></figure>"
        )
    if log:
        parts.append(
            f"<p>The alert log: the first {len(log):,} of {a.events:,} transition(s), "
            "oldest first (alerts.csv holds every one).</p>"
        )
        rows = [
            [
                _e(_when(e.time)),
                _e(e.alert_id),
                _e(e.priority),
                _e(f"{e.from_state} → {e.to_state}"),
                _num(e.figure),
                _num(e.threshold),
                _e(e.unit),
                _e(e.message),
            ]
            for e in log
        ]
        parts.append(
            _table(
                ["time (UTC)", "alert", "priority", "change", "figure", "limit", "unit", "message"],
                rows,
                {4, 5},
            )  # fmt: skip
        )
    else:
        parts.append("<p>No alert was raised.</p>")
    return parts


def _verdict_words(within: bool) -> str:
    return '<span class="ok">within</span>' if within else '<span class="no">beyond</span>'


def _json_ready(value: Any) -> Any:
    if isinstance(value, dict):
        return {str(k): _json_ready(v) for k, v in value.items()}
    if isinstance(value, list | tuple):
        return [_json_ready(v) for v in value]
    if isinstance(value, float | np.floating):
        f = float(value)
        return f if math.isfinite(f) else None
    if isinstance(value, np.integer):
        return int(value)
    if isinstance(value, np.bool_):
        return bool(value)
    if isinstance(value, os.PathLike):
        return os.fspath(value)
    return value
