"""Archives: round trips in every layout and format, clear errors, counts, the demo files."""

from __future__ import annotations

import dataclasses
import gzip
from functools import cache
from pathlib import Path

import numpy as np
import pytest
from typer.testing import CliRunner

from estimator.scenario import load_scenario
from estimator.simulate import Scenario, Simulation, simulate
from service.archive import (
    ArchiveColumns,
    ArchiveError,
    archive_stats,
    read_archive,
    read_truth,
    simulation_columns,
    to_si,
    write_archive,
    write_truth,
)
from service.cli import app
from tests.estimator.test_simulate import DAY, DEMO, HOUR, model, train


@cache
def demo_scenario() -> Scenario:
    return load_scenario(DEMO / "scenario.toml", train())


@cache
def short_run() -> Simulation:
    # The demo month's first 12 hours, which include a lab result and spikes.
    return simulate(model(), dataclasses.replace(demo_scenario(), duration=12 * HOUR))


def assert_same(a: ArchiveColumns, b: ArchiveColumns) -> None:
    np.testing.assert_array_equal(a.tags, b.tags)
    np.testing.assert_array_equal(a.times, b.times)
    np.testing.assert_array_equal(a.values, b.values)
    if a.received is None or b.received is None:
        assert a.received is None and b.received is None
    else:
        np.testing.assert_array_equal(a.received, b.received)


@pytest.mark.parametrize("suffix", ["csv", "csv.gz", "parquet"])
@pytest.mark.parametrize("form", ["long", "wide"])
@pytest.mark.parametrize("time_format", ["epoch", "iso"])
def test_round_trip_gives_identical_columns(tmp_path, suffix, form, time_format):
    columns = simulation_columns(short_run(), train())
    if form == "wide":
        columns = dataclasses.replace(columns, received=None)
    path = tmp_path / f"archive.{suffix}"
    write_archive(path, columns, form=form, time_format=time_format)
    back = read_archive(path)
    assert_same(columns, back)
    if suffix == "csv.gz":
        with gzip.open(path, "rt") as fh:
            assert fh.readline().startswith("time,")


def test_long_archive_keeps_lab_arrival_times(tmp_path):
    columns = simulation_columns(short_run(), train())
    write_archive(tmp_path / "a.parquet", columns)
    back = read_archive(tmp_path / "a.parquet")
    assert back.received is not None
    lab = back.tags == "LAB-202F"
    assert np.count_nonzero(lab) == 1  # the 08:00 sample
    assert 3 * HOUR <= back.received[lab][0] - back.times[lab][0] <= 5 * HOUR


def test_wide_form_refuses_late_readings_and_repeats(tmp_path):
    columns = simulation_columns(short_run(), train())
    with pytest.raises(ArchiveError, match="wide form has no 'received' column"):
        write_archive(tmp_path / "w.csv", columns, form="wide")
    twice = ArchiveColumns.from_readings(["A", "A"], [1.0, 1.0], [2.0, 3.0])
    with pytest.raises(ArchiveError, match="two readings at one time"):
        write_archive(tmp_path / "w.csv", twice, form="wide")


def test_values_are_in_tag_units_and_convert_back_to_si():
    sim = short_run()
    columns = simulation_columns(sim, train())
    flow = columns.values[columns.tags == "FI-200"]
    temp = columns.values[columns.tags == "TI-201"]
    assert np.median(flow) == pytest.approx(12.0, rel=0.01)  # m^3/h
    assert np.median(temp) == pytest.approx(58.0, abs=0.1)  # degC
    np.testing.assert_allclose(to_si(columns, train()).values, sim.reading_values, rtol=1e-12)


def write_text(tmp_path: Path, text: str) -> Path:
    path = tmp_path / "bad.csv"
    path.write_text(text)
    return path


@pytest.mark.parametrize(
    ("header", "missing"),
    [("tag,value", "time"), ("time,value", "tag"), ("time,tag", "value")],
)
def test_missing_long_column_is_named(tmp_path, header, missing):
    row = ",".join({"time": "0", "tag": "FI-200", "value": "12"}[c] for c in header.split(","))
    path = write_text(tmp_path, f"{header}\n{row}\n")
    with pytest.raises(ArchiveError) as info:
        read_archive(path)
    message = str(info.value)
    assert str(path) in message and f"no {missing!r} column" in message
    assert "\n" not in message


def test_wide_archive_without_time_is_refused(tmp_path):
    path = write_text(tmp_path, "stamp,FI-200\n0,12\n")
    with pytest.raises(ArchiveError, match="no 'time' column"):
        read_archive(path)


@pytest.mark.parametrize(
    ("cell", "expected"),
    [
        ("yesterday", "cannot read 'yesterday' at data row 2 as a time"),
        ("2026-03-02T00:00:10", "at data row 2 has no UTC offset"),
        ("", "no time at data row 2"),
    ],
)
def test_unreadable_time_is_named(tmp_path, cell, expected):
    path = write_text(
        tmp_path, f"time,tag,value\n2026-03-02T00:00:00+00:00,FI-200,12\n{cell},FI-200,12\n"
    )
    with pytest.raises(ArchiveError) as info:
        read_archive(path)
    assert "column 'time'" in str(info.value)
    assert expected in str(info.value)


def test_non_numeric_value_is_named(tmp_path):
    path = write_text(tmp_path, "time,tag,value\n0,FI-200,12\n10,FI-200,twelve\n")
    with pytest.raises(
        ArchiveError, match="column 'value': 'twelve' at data row 2 is not a number"
    ):
        read_archive(path)


def test_iso_times_with_offsets_read_as_epoch_seconds(tmp_path):
    path = write_text(
        tmp_path,
        "time,tag,value\n"
        "2026-03-02T01:00:00+01:00,FI-200,12\n"
        "2026-03-02T00:00:10Z,FI-200,12.5\n"
        "2026-03-01T19:00:20.5-05:00,FI-200,\n",
    )
    back = read_archive(path)
    np.testing.assert_array_equal(back.times, 1772409600.0 + np.array([0.0, 10.0, 20.5]))
    assert np.isnan(back.values[2])  # an empty cell is kept, as NaN, for the replay to refuse


def test_archive_stats_counts_disorder_and_duplicates():
    columns = ArchiveColumns.from_readings(
        ["A", "B", "A", "A", "B", "A", "A"],
        [10.0, 10.0, 20.0, 15.0, 10.0, 20.0, 20.0],
        [1.0, 2.0, 3.0, 4.0, 2.0, 3.0, 9.0],
        received=[10.0, 10.0, 20.0, 15.0, 99.0, 20.0, 20.0],
    )
    stats = archive_stats(columns)
    # Row 4 (t=15) and row 5 (t=10) come after t=20; rows 5 and 6 repeat rows 2 and 3;
    # row 7 gives A at t=20 a second value.
    assert stats["rows"] == 7
    assert stats["tags"] == 2
    assert stats["unsorted"] == 2
    assert stats["duplicates"] == 2
    assert stats["conflicts"] == 1
    assert stats["late"] == 1
    assert stats["first_time"] == 10.0 and stats["last_time"] == 20.0


def test_unsorted_and_duplicate_rows_are_read_not_refused(tmp_path):
    path = write_text(tmp_path, "time,tag,value\n20,A,1\n10,A,1\n10,A,1\n")
    stats = archive_stats(read_archive(path))
    assert (stats["unsorted"], stats["duplicates"]) == (2, 1)


def test_truth_round_trip(tmp_path):
    sim = short_run()
    rows = write_truth(tmp_path / "truth.csv", sim, model(), every=60.0)
    truth = read_truth(tmp_path / "truth.csv")
    assert rows == 12 * 60 + 1
    np.testing.assert_array_equal(truth["time"], sim.times[::6])
    np.testing.assert_array_equal(truth["R-202.fructose"], sim.truth[::6, 3])
    np.testing.assert_array_equal(truth["activity"], sim.true_activity[::6])


def test_committed_demo_files_match_the_scenario():
    scenario = demo_scenario()
    archive = read_archive(DEMO / "archive.parquet")
    truth = read_truth(DEMO / "truth.parquet")
    start, end = scenario.start, scenario.start + 30 * DAY
    assert scenario.step == 10.0 and scenario.duration == 30 * DAY
    # Truth: one row a minute for 30 days, from the steady state at the start.
    np.testing.assert_array_equal(truth["time"], start + 60.0 * np.arange(30 * 24 * 60 + 1))
    assert truth["activity"][-1] == pytest.approx(0.96 * 0.85, rel=1e-9)
    head = simulate(model(), dataclasses.replace(scenario, duration=HOUR))
    np.testing.assert_array_equal(truth["R-203.glucose"][:61], head.truth[::6, 4])
    # Archive: every tag of the train, only real readings, within the month.
    assert set(archive.names) == set(train().tags())
    assert np.all(np.isfinite(archive.values))
    assert archive.times.min() == start and archive.times.max() <= end + 240.0
    stats = archive_stats(archive)
    assert stats["unsorted"] == 0 and stats["duplicates"] == 0
    assert stats["late"] == 60  # two lab samples a day
    product = archive.times[archive.tags == "AI-203G"] - start
    assert not np.any((product >= 342 * HOUR) & (product < 350 * HOUR))


def test_cli_simulate_writes_archive_and_truth(tmp_path):
    result = CliRunner().invoke(
        app,
        [
            "simulate",
            "--config", str(DEMO / "train.toml"),
            "--scenario", str(DEMO / "scenario.toml"),
            "--out", str(tmp_path),
            "--days", "0.25",
            "--seed", "5",
            "--format", "csv",
        ],
    )  # fmt: skip
    assert result.exit_code == 0, result.output
    assert "seed 5" in result.output
    archive = read_archive(tmp_path / "archive.csv")
    truth = read_truth(tmp_path / "truth.csv")
    assert len(truth["time"]) == 6 * 60 + 1
    assert archive.received is not None
    assert set(archive.names) <= set(train().tags())


def test_cli_simulate_names_a_bad_scenario_key_and_exits_2(tmp_path):
    text = (DEMO / "scenario.toml").read_text().replace('ramp = "4 h"', 'rampp = "4 h"')
    bad = tmp_path / "bad.toml"
    bad.write_text(text)
    args = ["simulate", "--config", str(DEMO / "train.toml"), "--scenario", str(bad)]
    result = CliRunner().invoke(app, [*args, "--out", str(tmp_path)])
    assert result.exit_code == 2
    assert result.output.strip().count("\n") == 0
    assert "flow.changes[0].rampp: unknown key" in result.output
    missing = CliRunner().invoke(
        app, ["simulate", "--config", str(DEMO / "train.toml"), "--scenario", "nope.toml",
              "--out", str(tmp_path)],
    )  # fmt: skip
    assert missing.exit_code == 2
    assert "nope.toml does not exist" in missing.output


def test_nan_time_is_refused(tmp_path):
    path = write_text(tmp_path, "time,tag,value\n0,FI-200,12\nnan,FI-200,12\n")
    with pytest.raises(ArchiveError, match="column 'time': 'nan' at data row 2 is not a time"):
        read_archive(path)
