"""Scenario files: what happens to a train, and to its instruments, over a simulated run.

A scenario is written in TOML beside the train it applies to. Every dimensional
number carries its unit; times of events are durations from the run's start
(``"76 h"``, ``"3.5 d"``). Sections, all optional except ``[scenario]``::

    [scenario]          title, start (ISO 8601 with offset, or epoch seconds),
                        duration, step, seed
    [noise]             analyzer_scale (times each analyzer's configured std),
                        flow (transmitter 1-sigma relative to the value),
                        temperature (transmitter 1-sigma)
    [flow]              a signal (below), in a flow unit
    [feed.<species>]    a signal, in a concentration unit
    [temperature.<vessel>]  a signal, in a temperature unit
    [activity]          initial, declines = [{start, end, shape, loss | rate}],
                        drops = [{at, loss}]
    [tags.<tag>]        period, dropouts = [{start, end}], frozen = [{start, end}],
                        spikes = {rate, times, size}, lab = {period, first, times, delay}

A signal starts at ``initial`` (default: the train's nominal) and follows
``changes = [{at, to, ramp}]`` (a step when ``ramp`` is absent); ``upsets =
[{at, by, ramp, hold, back}]`` move it by ``by`` over ``ramp``, hold, and return
over ``back`` (default: ``ramp``). Instead of ``initial`` and ``changes`` a signal
may list its breakpoints, ``points = [[time, value], ...]``.

Activity declines multiply: ``shape = "exponential"`` gives
``a(t) = a(start) exp(-k_d (t - start))`` up to ``end`` (give ``rate`` = k_d, or
``loss``, the fraction lost by ``end``); ``shape = "linear"`` loses ``loss``
evenly over the period. A drop multiplies the activity by ``1 - loss`` at ``at``.

Loading collects every problem and raises one
:class:`~estimator.errors.ConfigError` naming each key at fault
(``flow.changes[1].ramp: must not be negative``), as train files do.
"""

from __future__ import annotations

import datetime as dt
import math
import os
import tomllib
from collections.abc import Callable, Mapping, Sequence
from pathlib import Path
from typing import Any

import numpy as np

from estimator.config import TrainConfig
from estimator.errors import ConfigError, ConfigProblem, QuantityError
from estimator.model import FloatArray
from estimator.simulate import LabSchedule, Profile, Scenario, Spikes, Window
from estimator.units import parse_quantity, si_unit

__all__ = ["load_scenario", "parse_scenario"]

_SECTIONS = ("scenario", "noise", "flow", "feed", "temperature", "activity", "tags")
# Exponential declines are stored as breakpoints this close: the chord of
# exp(-k t) over h is off by at most (k h)^2 / 8, held below 1e-10 relative.
_CHORD = math.sqrt(8e-10)
_MAX_SPACING = 3600.0


class _Reader:
    """Reads nested tables, recording a problem under its dotted key instead of raising."""

    def __init__(self) -> None:
        self.problems: list[ConfigProblem] = []

    def fail(self, key: str, reason: str) -> None:
        self.problems.append(ConfigProblem(key, reason))

    def table(
        self, value: Any, key: str, allowed: Sequence[str], what: str = ""
    ) -> Mapping[str, Any] | None:
        if not isinstance(value, Mapping):
            self.fail(key, f"must be a table, got {value!r}")
            return None
        for name in value:
            if name in allowed:
                continue
            if what:
                reason = f"{name!r} is not {what} of the train ({', '.join(allowed)})"
            else:
                reason = f"unknown key (check the spelling); allowed here: {', '.join(allowed)}"
            self.fail(f"{key}.{name}", reason)
        return value

    def tables(
        self, value: Any, key: str, allowed: Sequence[str]
    ) -> list[tuple[str, Mapping[str, Any]]]:
        if not isinstance(value, list):
            self.fail(key, f"must be a list of tables, got {value!r}")
            return []
        out = []
        for i, item in enumerate(value):
            table = self.table(item, f"{key}[{i}]", allowed)
            if table is not None:
                out.append((f"{key}[{i}]", table))
        return out

    def quantity(
        self,
        value: Any,
        key: str,
        dimension: str,
        *,
        difference: bool = False,
        ge: float | None = None,
        gt: float | None = None,
    ) -> float | None:
        try:
            si = parse_quantity(value, dimension, difference=difference)
        except QuantityError as exc:
            self.fail(key, exc.reason)
            return None
        if ge is not None and si < ge:
            self.fail(key, "must not be negative" if ge == 0.0 else f"must be at least {ge:g}")
            return None
        if gt is not None and si <= gt:
            self.fail(key, "must be positive" if gt == 0.0 else f"must be more than {gt:g}")
            return None
        return si

    def time(
        self, table: Mapping[str, Any], key: str, name: str, default: float | None = None
    ) -> float | None:
        if name not in table:
            if default is None:
                self.fail(f"{key}.{name}", "required: a time from the start, e.g. '3.5 d'")
            return default
        return self.quantity(table[name], f"{key}.{name}", "time", ge=0.0)

    def fraction(self, value: Any, key: str) -> float | None:
        loss = self.quantity(value, key, "dimensionless", ge=0.0)
        if loss is not None and loss >= 1.0:
            self.fail(key, f"must be below 1 (100 %), got {value!r}")
            return None
        return loss


def _start(r: _Reader, value: Any, key: str) -> float:
    if isinstance(value, bool):
        r.fail(key, f"must be an ISO 8601 time with offset or epoch seconds, got {value!r}")
        return 0.0
    if isinstance(value, int | float):
        return float(value)
    when: dt.datetime | None = value if isinstance(value, dt.datetime) else None
    if isinstance(value, str):
        try:
            when = dt.datetime.fromisoformat(value)
        except ValueError:
            r.fail(
                key, f"cannot read {value!r} as an ISO 8601 time, e.g. '2026-03-02T00:00:00+00:00'"
            )
            return 0.0
    if when is None:
        r.fail(key, f"must be an ISO 8601 time with offset or epoch seconds, got {value!r}")
        return 0.0
    if when.tzinfo is None:
        r.fail(key, f"give a UTC offset, e.g. '{when.isoformat()}+00:00'")
        return 0.0
    return when.timestamp()


def _signal(
    r: _Reader, data: Any, key: str, dimension: str, nominal: float, low: float
) -> Profile | None:
    table = r.table(data, key, ("initial", "points", "changes", "upsets"))
    if table is None:
        return None
    points: list[tuple[float, float]] = []
    if "points" in table:
        if "initial" in table or "changes" in table:
            r.fail(f"{key}.points", "give either points or initial and changes, not both")
        raw = table["points"]
        if not isinstance(raw, list) or not raw:
            r.fail(f"{key}.points", f"must be a list of [time, value] pairs, got {raw!r}")
        else:
            for i, pair in enumerate(raw):
                where = f"{key}.points[{i}]"
                if not isinstance(pair, list) or len(pair) != 2:
                    r.fail(where, f"must be a pair [time, value], got {pair!r}")
                    continue
                t = r.quantity(pair[0], f"{where}[0]", "time", ge=0.0)
                v = r.quantity(pair[1], f"{where}[1]", dimension)
                if t is None or v is None:
                    continue
                if points and t < points[-1][0]:
                    r.fail(where, "breakpoints must be in time order")
                    continue
                points.append((t, v))
    else:
        initial = nominal
        if "initial" in table:
            given = r.quantity(table["initial"], f"{key}.initial", dimension)
            initial = nominal if given is None else given
        points.append((0.0, initial))
        current, busy_until = initial, 0.0
        for where, change in r.tables(
            table.get("changes", []), f"{key}.changes", ("at", "to", "ramp")
        ):
            at = r.time(change, where, "at")
            ramp = r.quantity(change.get("ramp", "0 s"), f"{where}.ramp", "time", ge=0.0)
            if "to" not in change:
                r.fail(f"{where}.to", "required: the value the signal changes to")
                continue
            to = r.quantity(change["to"], f"{where}.to", dimension)
            if at is None or ramp is None or to is None:
                continue
            if at < busy_until:
                r.fail(f"{where}.at", "changes must be in time order and must not overlap")
                continue
            points += [(at, current), (at + ramp, to)]
            current, busy_until = to, at + ramp
    if not points:
        return None
    profile = Profile(tuple(points))
    for where, upset in r.tables(
        table.get("upsets", []), f"{key}.upsets", ("at", "by", "ramp", "hold", "back")
    ):
        at = r.time(upset, where, "at")
        ramp = r.quantity(upset.get("ramp", "0 s"), f"{where}.ramp", "time", ge=0.0)
        hold = r.quantity(upset.get("hold", "0 s"), f"{where}.hold", "time", ge=0.0)
        back = ramp
        if "back" in upset:
            back = r.quantity(upset["back"], f"{where}.back", "time", ge=0.0)
        if "by" not in upset:
            r.fail(f"{where}.by", "required: how far the signal moves, e.g. '3 K'")
            continue
        by = r.quantity(upset["by"], f"{where}.by", dimension, difference=True)
        if at is None or ramp is None or hold is None or back is None or by is None:
            continue
        t1 = at + ramp
        t2 = t1 + hold
        delta = ((at, 0.0), (t1, by), (t2, by), (t2 + back, 0.0))
        profile = profile + Profile(delta)
    lowest = min(v for _, v in profile.points)
    if lowest < low:
        unit = si_unit(dimension)
        r.fail(
            key, f"goes down to {lowest:g} {unit}, below its lowest possible value {low:g} {unit}"
        )
    return profile


_Factor = Callable[[FloatArray, bool], FloatArray]
"""A multiplier on the activity at times t [s]; the bool asks for left limits."""


def _exponential(start: float, end: float, rate: float) -> _Factor:
    def factor(t: FloatArray, left: bool) -> FloatArray:
        return np.exp(-rate * np.clip(t - start, 0.0, end - start))

    return factor


def _linear(start: float, end: float, loss: float) -> _Factor:
    def factor(t: FloatArray, left: bool) -> FloatArray:
        return 1.0 - loss * np.clip((t - start) / (end - start), 0.0, 1.0)

    return factor


def _drop(at: float, loss: float) -> _Factor:
    def factor(t: FloatArray, left: bool) -> FloatArray:
        after = t > at if left else t >= at
        return np.where(after, 1.0 - loss, 1.0)

    return factor


def _activity(r: _Reader, data: Any, key: str) -> Profile | None:
    table = r.table(data, key, ("initial", "declines", "drops"))
    if table is None:
        return None
    initial = 1.0
    if "initial" in table:
        initial = r.quantity(table["initial"], f"{key}.initial", "dimensionless", gt=0.0) or 1.0
    factors: list[_Factor] = []
    times: list[float] = [0.0]
    allowed = ("start", "end", "shape", "loss", "rate")
    for where, decline in r.tables(table.get("declines", []), f"{key}.declines", allowed):
        start = r.time(decline, where, "start")
        end = r.time(decline, where, "end")
        shape = decline.get("shape", "exponential")
        if shape not in ("exponential", "linear"):
            r.fail(f"{where}.shape", f"must be 'exponential' or 'linear', got {shape!r}")
            continue
        if start is None or end is None:
            continue
        if end <= start:
            r.fail(f"{where}.end", "must be after start")
            continue
        span = end - start
        if ("loss" in decline) == ("rate" in decline):
            r.fail(where, "give either loss (fraction lost by end) or rate (k_d, e.g. '0.002 1/d')")
            continue
        if "rate" in decline and shape == "linear":
            r.fail(f"{where}.rate", "a linear decline is given by its loss, e.g. loss = '4 %'")
            continue
        if "rate" in decline:
            k = r.quantity(decline["rate"], f"{where}.rate", "rate_constant", ge=0.0)
        else:
            loss = r.fraction(decline["loss"], f"{where}.loss")
            k = (
                None
                if loss is None
                else (-math.log1p(-loss) / span if shape == "exponential" else loss)
            )
        if k is None:
            continue
        if shape == "exponential":
            h = min(_MAX_SPACING, _CHORD / k) if k > 0.0 else span
            times += np.linspace(start, end, int(math.ceil(span / h)) + 1).tolist()
            factors.append(_exponential(start, end, k))
        else:
            # Linear declines may overlap one another, and a product of two ramps
            # is curved: breakpoints every hour keep it close.
            times += np.linspace(start, end, int(math.ceil(span / _MAX_SPACING)) + 1).tolist()
            factors.append(_linear(start, end, k))
    for where, drop in r.tables(table.get("drops", []), f"{key}.drops", ("at", "loss")):
        at = r.time(drop, where, "at")
        if "loss" not in drop:
            r.fail(f"{where}.loss", "required: the fraction of activity lost, e.g. '15 %'")
            continue
        loss = r.fraction(drop["loss"], f"{where}.loss")
        if at is None or loss is None:
            continue
        times.append(at)
        factors.append(_drop(at, loss))
    grid = np.unique(np.array(times))
    before = np.full(len(grid), initial)
    after = np.full(len(grid), initial)
    for factor in factors:
        before *= factor(grid, True)
        after *= factor(grid, False)
    points: list[tuple[float, float]] = []
    for t, b, a in zip(grid.tolist(), before.tolist(), after.tolist(), strict=True):
        if b != a:
            points.append((t, b))
        points.append((t, a))
    return Profile(tuple(points))


def _tag(r: _Reader, data: Any, key: str, is_lab: bool, step: float) -> dict[str, Any]:
    table = r.table(data, key, ("period", "dropouts", "frozen", "spikes", "lab"))
    out: dict[str, Any] = {}
    if table is None:
        return out
    if "period" in table:
        period = r.quantity(table["period"], f"{key}.period", "time", gt=0.0)
        if period is not None and period < step:
            r.fail(f"{key}.period", f"must be at least the simulation step ({step:g} s)")
        elif period is not None:
            out["period"] = period
    for name in ("dropouts", "frozen"):
        windows = []
        for where, w in r.tables(table.get(name, []), f"{key}.{name}", ("start", "end")):
            start = r.time(w, where, "start")
            end = r.time(w, where, "end")
            if start is None or end is None:
                continue
            if end <= start:
                r.fail(f"{where}.end", "must be after start")
                continue
            windows.append(Window(start, end))
        if windows:
            out[name] = tuple(windows)
    if "spikes" in table:
        spec = r.table(table["spikes"], f"{key}.spikes", ("rate", "times", "size"))
        if spec is not None:
            out["spikes"] = _spikes(r, spec, f"{key}.spikes")
    if "lab" in table:
        if not is_lab:
            r.fail(f"{key}.lab", "only a measurement of kind 'lab' has a lab schedule")
        else:
            spec = r.table(table["lab"], f"{key}.lab", ("period", "first", "times", "delay"))
            if spec is not None:
                out["lab"] = _lab(r, spec, f"{key}.lab")
    return out


def _times(r: _Reader, value: Any, key: str) -> tuple[float, ...]:
    if not isinstance(value, list):
        r.fail(key, f"must be a list of times from the start, got {value!r}")
        return ()
    parsed = [r.quantity(v, f"{key}[{i}]", "time", ge=0.0) for i, v in enumerate(value)]
    return tuple(sorted(t for t in parsed if t is not None))


def _range(
    r: _Reader, value: Any, key: str, dimension: str, default: tuple[float, float]
) -> tuple[float, float]:
    items = value if isinstance(value, list) else [value, value]
    if len(items) != 2:
        r.fail(key, f"must be one value or a pair [low, high], got {value!r}")
        return default
    low = r.quantity(items[0], f"{key}[0]", dimension, ge=0.0)
    high = r.quantity(items[1], f"{key}[1]", dimension, ge=0.0)
    if low is None or high is None:
        return default
    if high < low:
        r.fail(key, "the high end must not be below the low end")
        return default
    return low, high


def _spikes(r: _Reader, spec: Mapping[str, Any], key: str) -> Spikes:
    rate = 0.0
    if "rate" in spec:
        rate = r.quantity(spec["rate"], f"{key}.rate", "rate_constant", ge=0.0) or 0.0
    times = _times(r, spec["times"], f"{key}.times") if "times" in spec else ()
    if "rate" not in spec and "times" not in spec:
        r.fail(key, "give a rate (e.g. '3 1/d') or times, or both")
    size = Spikes().size
    if "size" in spec:
        size = _range(r, spec["size"], f"{key}.size", "dimensionless", size)
    return Spikes(rate=rate, times=times, size=size)


def _lab(r: _Reader, spec: Mapping[str, Any], key: str) -> LabSchedule:
    period = None
    if "period" in spec:
        period = r.quantity(spec["period"], f"{key}.period", "time", gt=0.0)
    first = r.time(spec, key, "first", default=0.0) or 0.0
    times = _times(r, spec["times"], f"{key}.times") if "times" in spec else ()
    if "period" not in spec and "times" not in spec:
        r.fail(key, "give a sampling period (e.g. '12 h') or sample times, or both")
    delay = (0.0, 0.0)
    if "delay" in spec:
        delay = _range(r, spec["delay"], f"{key}.delay", "time", delay)
    return LabSchedule(period=period, first=first, times=times, delay=delay)


def parse_scenario(
    data: Mapping[str, Any], config: TrainConfig, source: str = "scenario"
) -> Scenario:
    """Validate a scenario already read into Python objects, for one train.

    Parameters
    ----------
    data : Mapping
        The document as read from TOML (sections as in the module docstring).
    config : TrainConfig
        The train it applies to: its vessels, species and tags are the names the
        scenario may use, and its nominal values the defaults of the signals.
    source : str, optional
        What to call the document in the error (a file path).

    Returns
    -------
    Scenario
        Times in [s from the start], quantities in SI.

    Raises
    ------
    ConfigError
        Listing every problem found, each under its dotted key.
    """
    r = _Reader()
    root = r.table(data, "<file>", _SECTIONS) or {}
    head = r.table(
        root.get("scenario", {}), "scenario", ("title", "start", "duration", "step", "seed")
    )
    head = head or {}
    if "scenario" not in root:
        r.fail("scenario", "required: a [scenario] table with at least duration, e.g. '30 d'")
    title = head.get("title", "")
    if not isinstance(title, str):
        r.fail("scenario.title", f"must be a string, got {title!r}")
        title = ""
    duration = 0.0
    if "duration" in head:
        duration = r.quantity(head["duration"], "scenario.duration", "time", gt=0.0) or 0.0
    elif "scenario" in root:
        r.fail("scenario.duration", "required: the length of the run, e.g. '30 d'")
    step = r.quantity(head.get("step", "10 s"), "scenario.step", "time", gt=0.0) or 10.0
    start = _start(r, head["start"], "scenario.start") if "start" in head else 0.0
    seed = head.get("seed", 0)
    if isinstance(seed, bool) or not isinstance(seed, int) or seed < 0:
        r.fail("scenario.seed", f"must be a whole number >= 0, got {seed!r}")
        seed = 0

    noise = r.table(root.get("noise", {}), "noise", ("analyzer_scale", "flow", "temperature")) or {}
    scale = r.quantity(
        noise.get("analyzer_scale", 1.0), "noise.analyzer_scale", "dimensionless", ge=0.0
    )
    flow_noise = r.quantity(noise.get("flow", "0.5 %"), "noise.flow", "dimensionless", ge=0.0)
    temperature_noise = r.quantity(
        noise.get("temperature", "0.1 K"),
        "noise.temperature",
        "temperature",
        difference=True,
        ge=0.0,
    )

    flow = None
    if "flow" in root:
        flow = _signal(r, root["flow"], "flow", "flow", config.feed.flow.nominal, 0.0)
    feed: dict[str, Profile] = {}
    for name, spec in (
        r.table(root.get("feed", {}), "feed", config.species, "a species") or {}
    ).items():
        if name not in config.species:
            continue
        source_cfg = config.feed.composition.get(name, 0.0)
        nominal = source_cfg if isinstance(source_cfg, float) else source_cfg.nominal
        profile = _signal(r, spec, f"feed.{name}", "concentration", nominal, 0.0)
        if profile is not None:
            feed[name] = profile
    temperatures: dict[str, Profile] = {}
    vessels = [v.name for v in config.vessels]
    for name, spec in (
        r.table(root.get("temperature", {}), "temperature", vessels, "a vessel") or {}
    ).items():
        if name not in vessels:
            continue
        vessel = config.vessels[vessels.index(name)]
        profile = _signal(
            r, spec, f"temperature.{name}", "temperature", vessel.nominal_temperature, 1e-9
        )
        if profile is not None:
            temperatures[name] = profile
    activity = Profile.constant(1.0)
    if "activity" in root:
        activity = _activity(r, root["activity"], "activity") or activity

    periods: dict[str, float] = {}
    lists: dict[str, dict[str, Any]] = {"dropouts": {}, "frozen": {}, "spikes": {}, "lab": {}}
    tags = list(config.tags())
    lab_tags = {m.tag for m in config.measurements if m.kind == "lab"}
    tag_table = r.table(root.get("tags", {}), "tags", tags, "a tag") or {}
    for tag, spec in tag_table.items():
        if tag not in tags:
            continue
        parsed = _tag(r, spec, f"tags.{tag}", tag in lab_tags, step)
        if "period" in parsed:
            periods[tag] = parsed.pop("period")
        for name, value in parsed.items():
            lists[name][tag] = value

    if r.problems:
        raise ConfigError(list(dict.fromkeys(r.problems)), source)
    return Scenario(
        duration=duration,
        step=step,
        flow=flow,
        temperatures=temperatures,
        feed=feed,
        activity=activity,
        analyzer_period=periods,
        title=title,
        start=start,
        seed=seed,
        noise_scale=1.0 if scale is None else scale,
        flow_noise=0.005 if flow_noise is None else flow_noise,
        temperature_noise=0.1 if temperature_noise is None else temperature_noise,
        dropouts=lists["dropouts"],
        frozen=lists["frozen"],
        spikes=lists["spikes"],
        lab=lists["lab"],
    )


def load_scenario(path: str | os.PathLike[str], config: TrainConfig) -> Scenario:
    """Read and validate a scenario file (TOML) for a train.

    Parameters
    ----------
    path : str or os.PathLike
        The ``.toml`` file.
    config : TrainConfig
        The train the scenario applies to.

    Returns
    -------
    Scenario
        See :func:`parse_scenario`.

    Raises
    ------
    ConfigError
        The file cannot be read or parsed (key ``<file>``), or its content has
        problems (see :func:`parse_scenario`).
    """
    file = Path(path)
    source = str(file)
    try:
        text = file.read_text(encoding="utf-8")
    except (OSError, UnicodeDecodeError) as exc:
        raise ConfigError(
            [ConfigProblem("<file>", f"cannot read the file: {exc}")], source
        ) from exc
    try:
        data = tomllib.loads(text)
    except tomllib.TOMLDecodeError as exc:
        raise ConfigError([ConfigProblem("<file>", f"TOML syntax: {exc}")], source) from exc
    return parse_scenario(data, config, source=source)
