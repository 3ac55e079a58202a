"""The ingest body: ReadingColumns gives exactly ReadingsIn's verdict, values and errors.

The route validates a posted batch straight into columns (service.schemas.
ReadingColumns), taking plain readings in one pass of pydantic's compiled code and
leaving every other body to the ReadingsIn model. These tests hold the two to the
same answer on generated bodies, valid and not, and on the edge cases by name.
"""

from __future__ import annotations

import json
import math
from typing import Any

import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from pydantic import TypeAdapter, ValidationError

from service.schemas import LAST_TIME, ReadingColumns, ReadingsIn

COLUMNS = TypeAdapter(ReadingColumns)

TEXTS = ["FI-200", "", "a" * 256, "a" * 257, "a\x00b", "Ä-1", "\ud800", " "]
TIMES = [
    1.7e9,
    0,
    0.0,
    -1.0,
    -0.0,
    LAST_TIME,
    LAST_TIME + 1.0,
    2**70,
    math.nan,
    math.inf,
    -math.inf,
    True,
    "2026-01-01T00:00:00Z",
    "2026-01-01T00:00:00",
    "yesterday",
    None,
    [],
]
VALUES = [12.5, 0, -3, 2**70, 1e308, math.nan, math.inf, -math.inf, False, "12", None, {}]
QUALITIES = [0, 63, 64, 192, 255, 256, -1, 64.0, True, None, "192"]


def reading() -> st.SearchStrategy[dict[str, Any]]:
    """A reading as a client might send it: usually plain, sometimes anything but."""
    tag = st.one_of(st.sampled_from(TEXTS), st.text(max_size=4), st.integers(), st.none())
    time = st.one_of(
        st.sampled_from(TIMES),
        st.floats(min_value=0.0, max_value=LAST_TIME),
        st.floats(),
        st.integers(min_value=-10, max_value=2 * int(LAST_TIME)),
    )
    value = st.one_of(st.sampled_from(VALUES), st.floats(), st.integers())
    quality = st.one_of(st.sampled_from(QUALITIES), st.integers(min_value=-5, max_value=300))
    base = st.fixed_dictionaries({"tag": tag, "time": time, "value": value})
    extra = st.dictionaries(
        st.sampled_from(["tag", "time", "value", "quality", "unit"]),
        st.one_of(quality, tag),
        max_size=2,
    )
    return st.one_of(
        base,
        st.builds(lambda r, q: {**r, "quality": q}, base, quality),
        st.builds(lambda r, e: {**r, **e}, base, extra),
        st.builds(
            lambda r, k: {x: v for x, v in r.items() if x != k},
            base,
            st.sampled_from(["tag", "time", "value"]),
        ),  # fmt: skip
    )


def body() -> st.SearchStrategy[Any]:
    """A posted body: a batch of readings, or now and then something else entirely."""
    batch = st.lists(reading(), max_size=6)
    return st.one_of(
        st.builds(lambda rs: {"readings": rs}, batch),
        st.builds(lambda rs: {"readings": rs, "train": "x"}, batch),
        st.sampled_from([{}, [], None, "readings", 3, {"readings": None}, {"readings": {}}]),
    )


def model_answer(value: Any) -> tuple[str, Any]:
    """What ReadingsIn says (as the framework calls it), in the form ReadingColumns answers."""
    try:
        model = ReadingsIn.model_validate(value, from_attributes=True)
    except ValidationError as exc:
        return "errors", exc.errors(include_url=False)
    rs = model.readings
    qualities = [r.quality for r in rs]
    return "columns", ReadingColumns(
        [r.tag for r in rs],
        [r.time for r in rs],
        [r.value for r in rs],
        None if all(q is None for q in qualities) else qualities,
    )


def columns_answer(value: Any) -> tuple[str, Any]:
    """What ReadingColumns says."""
    try:
        return "columns", COLUMNS.validate_python(value, from_attributes=True)
    except ValidationError as exc:
        return "errors", exc.errors(include_url=False)


def same(a: tuple[str, Any], b: tuple[str, Any]) -> bool:
    """Equal answers: repr compares NaN inputs and the errors' exception contexts by value."""
    if a[0] != b[0]:
        return False
    if a[0] == "columns":
        x, y = a[1], b[1]
        if repr((x.tags, x.times, x.values, x.qualities)) != repr(
            (y.tags, y.times, y.values, y.qualities)
        ):
            return False
        return all(
            type(p) is type(q) for p, q in zip(x.times + x.values, y.times + y.values, strict=True)
        )
    return repr(a[1]) == repr(b[1])


@settings(max_examples=400, derandomize=True, deadline=None)
@given(body())
def test_columns_give_the_models_verdict_values_and_errors(value: Any):
    assert same(columns_answer(value), model_answer(value))


@pytest.mark.parametrize(
    "value",
    [
        {"readings": [{"tag": "FI-200", "time": 1.7e9, "value": 12.0}]},
        {"readings": [{"tag": "FI-200", "time": 1_700_000_000, "value": 12}]},  # integers
        {"readings": [{"tag": "FI-200", "time": 1.7e9, "value": math.nan}]},  # hub refuses
        {"readings": [{"tag": "FI-200", "time": "2026-01-01T00:00:00+01:00", "value": 1.0}]},
        {"readings": [{"tag": "FI-200", "time": 1.7e9, "value": 1.0, "quality": 192}]},
        {"readings": [{"tag": "FI-200", "time": 1.7e9, "value": 1.0, "quality": None}]},
        {"readings": [{"tag": "Ä-1", "time": 1.7e9, "value": 1.0}]},  # not ASCII: the model
        {"readings": [{"tag": "a\x00", "time": 1.7e9, "value": 1.0}]},  # NUL: refused
        {"readings": [{"tag": "\ud800", "time": 1.7e9, "value": 1.0}]},  # lone surrogate
        {"readings": [{"tag": "FI-200", "time": True, "value": 1.0}]},
        {"readings": [{"tag": "FI-200", "time": 1.7e9, "value": False}]},
        {"readings": [{"tag": "FI-200", "time": math.inf, "value": 1.0}]},
        {"readings": [{"tag": "FI-200", "time": 1.7e9, "value": 1.0, "quality": 64.0}]},
        {"readings": [{"tag": "FI-200", "time": 1.7e9, "value": 1.0, "unit": "degC"}]},
        {"readings": []},
        {"readings": [], "more": 1},
        [],
        None,
    ],
)
def test_columns_and_model_agree_on_the_edge_cases(value: Any):
    got, want = columns_answer(value), model_answer(value)
    assert same(got, want), (got, want)


def test_plain_readings_come_back_as_columns_of_floats():
    text = json.dumps(
        {
            "readings": [
                {"tag": "FI-200", "time": 1_700_000_000, "value": 12},
                {"tag": "TI-201", "time": 1.7e9 + 0.5, "value": 58.25, "quality": 192},
            ]
        }
    )
    got = COLUMNS.validate_python(json.loads(text))
    assert got == ReadingColumns(
        ["FI-200", "TI-201"], [1.7e9, 1.7e9 + 0.5], [12.0, 58.25], [None, 192]
    )
    assert all(type(x) is float for x in got.times + got.values)
    assert len(got) == 2
