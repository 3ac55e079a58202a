"""Property tests: a perturbed train file, and any stream of readings into a session.

Two promises, checked on random input (hypothesis, fixed seeds, bounded examples):

- Parsing a train description gives a valid :class:`TrainConfig` or a
  :class:`ConfigError` whose every problem names a key and a reason -- never
  another exception -- and a description that parses builds a working session.
- A :class:`TrainSession` fed readings in any order, in batches of any size, with
  gaps, duplicates (same value or another), unknown tags, plausible values and
  values it must refuse (NaN, infinity, outside a tag's declared range, below
  absolute zero, concentrations more than ten analyzer sigma below zero or above
  any liquid's) never raises, and never produces a non-finite estimate, a
  negative concentration or activity, or a covariance that is not symmetric
  positive definite. Refused readings come back with a reason. Analyzer readings
  a little below zero (noise) and vanishingly small ones are taken.

Complements ``test_filter.py``'s random-readings test (the filter alone, on a
seven-state train, values in SI): here the whole session on the demo train, tag
units, the screening, and the alert engine on every output.
"""

from __future__ import annotations

import copy
import math
import tomllib
from pathlib import Path
from typing import Any

import numpy as np
import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from estimator.config import TrainConfig, load_train_config, parse_train_config
from estimator.errors import ConfigError
from estimator.session import SessionOutput, TrainSession

DEMO = Path("replay_data/wrenfield/train.toml")
DEMO_DATA: dict[str, Any] = tomllib.loads(DEMO.read_text())
T0 = 1_750_000_000.0  # any epoch time [s]
HOUR = 3600.0

# Plausible ranges of each tag, in its declared unit (the demo train's file).
PLAUSIBLE = {
    "FI-200": (0.0, 40.0),  # m^3/h
    "TI-201": (20.0, 90.0),  # degC
    "TI-202": (20.0, 90.0),  # degC
    "AI-200G": (0.0, 3000.0),  # mol/m^3
    "AI-203G": (0.0, 3000.0),  # mol/m^3
    "LAB-202F": (0.0, 3000.0),  # mol/m^3
}
TAGS = sorted(PLAUSIBLE)

MANY = settings(
    max_examples=100,
    deadline=None,
    derandomize=True,
    database=None,
    suppress_health_check=[HealthCheck.too_slow, HealthCheck.data_too_large],
)


# ---------------------------------------------------------------- config parsing


def _paths(node: Any, prefix: tuple[Any, ...] = ()) -> list[tuple[Any, ...]]:
    """Every path (keys and list positions) to an entry of a nested document."""
    out: list[tuple[Any, ...]] = []
    if isinstance(node, dict):
        for key, value in node.items():
            out.append((*prefix, key))
            out.extend(_paths(value, (*prefix, key)))
    elif isinstance(node, list):
        for i, value in enumerate(node):
            out.append((*prefix, i))
            out.extend(_paths(value, (*prefix, i)))
    return out


DEMO_PATHS = _paths(DEMO_DATA)

# Values an engineer (or a broken generator) might write anywhere in the file.
odd_values = st.one_of(
    st.none(),
    st.booleans(),
    st.integers(-(10**6), 10**6),
    st.floats(allow_nan=True, allow_infinity=True),
    st.text(max_size=12),
    st.sampled_from(
        [
            "",
            "-3 m^3",
            "0 m^3",
            "nan m^3",
            "inf 1/h",
            "1e400 m^3",
            "5 furlongs",
            "12 m^3/h",
            "58 degC",
            "-300 degC",
            "62 kJ/mol",
            "2.4 kmol/m^3",
            "0.8 1/h",
            "4 min",
            "R-201",
            "glucose",
            "feed",
            "reversible",
            "irreversible",
        ]
    ),
    st.lists(st.sampled_from(["45 degC", "70 degC", "glucose", 1.0]), max_size=3),
    st.dictionaries(st.sampled_from(["tag", "unit", "nominal", "std"]), st.text(max_size=6)),
)


SCALES = st.sampled_from([0.0, -1.0, 1e-9, 0.5, 0.999, 1.001, 2.0, 1e9])


def _rescaled(value: Any, factor: float) -> Any:
    """A number, or the number of a quantity such as "14 m^3", times ``factor``."""
    if isinstance(value, bool):
        return value
    if isinstance(value, int | float):
        return value * factor
    if isinstance(value, str):
        number, _, unit = value.partition(" ")
        try:
            return f"{float(number) * factor:g} {unit}".strip()
        except ValueError:
            return value
    return value


@st.composite
def perturbed_documents(draw: st.DrawFn) -> dict[str, Any]:
    """The demo train's document with one to three random edits."""
    doc = copy.deepcopy(DEMO_DATA)
    for _ in range(draw(st.integers(1, 3))):
        paths = _paths(doc)
        if not paths:
            break
        path = draw(st.sampled_from(paths))
        parent = doc
        for step in path[:-1]:
            parent = parent[step]
        key = path[-1]
        edits = ["rescale", "rescale", "replace", "delete", "rename", "duplicate"]
        edit = draw(st.sampled_from(edits))
        if edit == "rescale":
            parent[key] = _rescaled(parent[key], draw(SCALES))
        elif edit == "replace":
            parent[key] = draw(odd_values)
        elif edit == "delete":
            del parent[key]
        elif edit == "rename" and isinstance(parent, dict):
            parent[key + draw(st.sampled_from(["_", "s", "X"]))] = parent.pop(key)
        elif edit == "duplicate" and isinstance(parent, list):
            parent.append(copy.deepcopy(parent[key]))
    return doc


def _check_parse(doc: dict[str, Any]) -> TrainConfig | None:
    try:
        config = parse_train_config(doc)
    except ConfigError as exc:
        assert exc.problems, "a ConfigError without problems"
        for problem in exc.problems:
            assert problem.key.strip(), f"problem without a key: {problem}"
            assert problem.reason.strip(), f"problem without a reason: {problem}"
        return None
    assert isinstance(config, TrainConfig)
    return config


def test_demo_paths_cover_every_section():
    # The perturbations reach every part of the file, lists included.
    tops = {p[0] for p in DEMO_PATHS}
    assert {"train", "vessels", "feed", "reaction", "measurements", "estimator", "alerts"} <= tops
    assert ("vessels", 1, "temperature", "tag") in DEMO_PATHS


def test_perturbed_train_documents_parse_or_name_the_key() -> None:
    parsed: list[bool] = []

    @MANY
    @given(perturbed_documents())
    def check(doc: dict[str, Any]) -> None:
        config = _check_parse(doc)
        parsed.append(config is not None)
        if config is not None:
            # What parses must also run: a session starts and takes a reading.
            session = TrainSession(config)
            out = session.ingest(list(session.tags[:1]), [T0], [1.0])
            assert len(out.refused) <= 1

    check()
    # Both branches ran: some edits leave a valid train, most do not.
    assert 0 < sum(parsed) < len(parsed), f"{sum(parsed)} of {len(parsed)} parsed"


@settings(max_examples=60, deadline=None, derandomize=True, database=None)
@given(data=st.data())
def test_edited_train_text_loads_or_names_the_key(
    tmp_path_factory: pytest.TempPathFactory, data: st.DataObject
) -> None:
    text = DEMO.read_text()
    for _ in range(data.draw(st.integers(1, 3), label="edits")):
        at = data.draw(st.integers(0, len(text)), label="at")
        cut = data.draw(st.integers(0, 8), label="cut")
        insert = data.draw(st.sampled_from(["", "=", "[", "]", '"', "\n", "#", "x", "0", "{"]))
        text = text[:at] + insert + text[at + cut :]
    path = tmp_path_factory.mktemp("train") / "train.toml"
    path.write_text(text, encoding="utf-8")
    try:
        load_train_config(path)
    except ConfigError as exc:
        assert exc.problems and all(p.key.strip() and p.reason.strip() for p in exc.problems)


# ---------------------------------------------------------------- session


def plausible_value(tag: str) -> st.SearchStrategy[float]:
    """A value in the tag's plausible range, to a millionth of its unit."""
    lo, hi = PLAUSIBLE[tag]
    return st.floats(lo, hi).map(lambda v: round(v, 6))


# Values a transmitter, a historian or a client bug can send, which the session
# refuses: not finite anywhere; outside the declared range where a tag has one
# (FI-200 0..40 m^3/h, TI-201 0..95 degC); below absolute zero for TI-202; for the
# analyzers (1-sigma 25, 20 and 15 mol/m^3) more than 10 sigma below zero or above
# 1e5 mol/m^3.
ANALYZER_REFUSED = [-1000.0, -1.83e20, 1.5e5, 1e200]
REFUSED_VALUES = {
    tag: [math.nan, math.inf, -math.inf]
    + {
        "FI-200": [-1.0, 40.5, 1e6],
        "TI-201": [-0.5, 95.5, 1e6],
        "TI-202": [-300.0, -1e6],
        "AI-200G": ANALYZER_REFUSED,
        "AI-203G": ANALYZER_REFUSED,
        "LAB-202F": ANALYZER_REFUSED,
    }.get(tag, [])
    for tag in TAGS
}
# Odd values the analyzers may send that are taken: noise a little below zero,
# vanishingly small, zero.
ANALYZER_EDGE = [-100.0, -1e-3, 0.0, 1e-160, 1e-12, 9.9e4]


@st.composite
def reading_streams(draw: st.DrawFn) -> list[list[tuple[str, float, float]]]:
    """Batches of (tag, time [s], value in the tag's unit), in any order.

    Times cover up to a day with gaps (the horizon is 6 h, so some readings come
    too late); some readings are repeated exactly, some repeat a (tag, time) with
    another value; a few are of a tag the train does not have.
    """
    count = draw(st.integers(1, 60), label="count")
    span = draw(st.sampled_from([600.0, 2 * HOUR, 24 * HOUR]), label="span")
    readings: list[tuple[str, float, float]] = []
    for _ in range(count):
        kind = draw(st.sampled_from(["plausible"] * 6 + ["refused", "repeat", "unknown", "edge"]))
        if kind == "repeat" and readings:
            tag, t, v = draw(st.sampled_from(readings))
            if tag in PLAUSIBLE and draw(st.booleans()):
                v = draw(plausible_value(tag))
            readings.append((tag, t, v))
            continue
        tag = "XX-999" if kind == "unknown" else draw(st.sampled_from(TAGS))
        t = T0 + draw(st.floats(0.0, span))
        if tag not in PLAUSIBLE:
            v = draw(st.floats(allow_nan=True, allow_infinity=True))
        elif kind == "refused":
            v = draw(st.sampled_from(REFUSED_VALUES[tag]))
        elif kind == "edge" and tag.startswith(("AI-", "LAB-")):
            v = draw(st.sampled_from(ANALYZER_EDGE))
        else:
            v = draw(plausible_value(tag))
        readings.append((tag, t, v))
    order = draw(st.permutations(range(len(readings))), label="order")
    shuffled = [readings[i] for i in order]
    cuts = sorted(draw(st.lists(st.integers(1, max(1, len(shuffled) - 1)), max_size=6)))
    batches, start = [], 0
    for cut in [*cuts, len(shuffled)]:
        if cut > start:
            batches.append(shuffled[start:cut])
            start = cut
    return batches


def _check_output(session: TrainSession, out: SessionOutput) -> None:
    e = out.estimates
    for name in (
        "time",
        "concentration",
        "concentration_std",
        "conversion",
        "conversion_std",
        "design_conversion",
        "activity",
        "activity_std",
        "feed",
        "inputs",
    ):
        values = getattr(e, name)
        assert np.all(np.isfinite(values)), f"non-finite {name}: {values}"
    assert np.all(e.concentration >= 0.0), e.concentration.min()
    assert np.all(e.activity >= 0.0), e.activity.min()
    assert np.all(e.concentration_std >= 0.0)
    for refusal in out.refused:
        assert refusal.reason.strip()
    for gated in out.gated + out.steps:
        assert math.isfinite(gated.nis) and gated.reason.strip()
    filt = session.filter
    if filt.initialized:
        assert np.all(np.isfinite(filt.x)) and np.all(np.isfinite(filt.cov))
        assert np.allclose(filt.cov, filt.cov.T, rtol=1e-9, atol=0.0)
        np.linalg.cholesky(filt.cov)  # raises unless positive definite


def _run(batches: list[list[tuple[str, float, float]]]) -> TrainSession:
    session = TrainSession(load_train_config(DEMO))
    for batch in batches:
        tags = [r[0] for r in batch]
        out = session.ingest(tags, [r[1] for r in batch], [r[2] for r in batch])
        _check_output(session, out)
    return session


@pytest.fixture(scope="module")
def warm() -> None:
    # Compile (or load) the filter core once, outside hypothesis' timing.
    _run([[("FI-200", T0, 12.0), ("TI-201", T0, 58.0), ("AI-200G", T0, 2400.0)]])


def test_any_order_gaps_duplicates_and_refused_values_keep_the_invariants(warm: None) -> None:
    started: list[bool] = []

    @MANY
    @given(reading_streams())
    def check(batches: list[list[tuple[str, float, float]]]) -> None:
        # _run checks every output and the filter's state after each batch.
        started.append(_run(batches).filter.initialized)

    check()
    # The invariants only say something if the streams start the filter.
    assert sum(started) >= len(started) / 4, f"{sum(started)} of {len(started)} started"
