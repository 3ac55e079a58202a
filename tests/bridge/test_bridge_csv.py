"""The CSV drop folder: layouts, times, decimal commas, each file once, failed with reasons."""

from __future__ import annotations

import asyncio
import os
import time
from collections.abc import Sequence
from datetime import UTC, datetime, timedelta, timezone
from pathlib import Path
from typing import Any

import pytest

from service.bridge.config import CsvFolderSourceConfig
from service.bridge.csv_source import CsvFileError, CsvFolderSource, read_csv_file
from service.bridge.sources import SourceReading, SpoolFull


def source(folder: Path, **fields: Any) -> CsvFolderSourceConfig:
    return CsvFolderSourceConfig.model_validate(
        {"kind": "csv_folder", "name": "exports", "folder": folder, "settle": 0.0, **fields}
    )


class Collect:
    """A sink that keeps what it is given (or refuses, like a full spool)."""

    def __init__(self, room: int | None = None) -> None:
        self.batches: list[list[SourceReading]] = []
        self.room = room

    def __call__(self, readings: Sequence[SourceReading]) -> int:
        if self.room is not None and len(readings) > self.room:
            raise SpoolFull(len(readings), self.room, 100)
        self.batches.append(list(readings))
        return len(readings)


def epoch(*args: int, offset_hours: int) -> float:
    return datetime(*args, tzinfo=timezone(timedelta(hours=offset_hours))).timestamp()


def test_long_form_with_decimal_comma_local_times_and_quality_words(tmp_path: Path):
    path = tmp_path / "line2.csv"
    path.write_text(
        "tag;time;value;quality;description\n"
        "WF2.FI200.PV;15.01.2026 08:30:00;201,5;good;feed flow\n"
        "WF2.TI201.PV;15.07.2026 08:30:00;136,40;uncertain;R-201 temperature\n"
        "WF2.TI202.PV;15.07.2026 08:30:05;;bad;sensor failed\n"
        "\n"
        "WF2.AI200G.PV;15.07.2026 08:31:00;-2,4e-1;17;\n",
        encoding="utf-8-sig",  # exports often start with a byte-order mark
    )
    config = source(
        tmp_path, time_format="%d.%m.%Y %H:%M:%S", time_zone="Europe/Vienna", decimal=","
    )
    got = read_csv_file(path, config)
    # Vienna is UTC+1 in January and UTC+2 (summer time) in July.
    assert got == [
        SourceReading(
            "WF2.FI200.PV", epoch(2026, 1, 15, 8, 30, offset_hours=1), 201.5, 192, "good"
        ),
        SourceReading(
            "WF2.TI201.PV", epoch(2026, 7, 15, 8, 30, offset_hours=2), 136.4, 64, "uncertain"
        ),
        SourceReading("WF2.TI202.PV", epoch(2026, 7, 15, 8, 30, 5, offset_hours=2), None, 0, "bad"),
        SourceReading("WF2.AI200G.PV", epoch(2026, 7, 15, 8, 31, offset_hours=2), -0.24, 17, "17"),
    ]


def test_wide_form_iso_times_and_empty_cells(tmp_path: Path):
    path = tmp_path / "wide.csv"
    path.write_text(
        "time,FI-200,TI-201\n"
        "2026-03-01T10:00:00Z,12.5,58.1\n"
        "2026-03-01 11:00:00,,58.2\n"  # no offset: read in the source's zone (UTC here)
        "2026-03-01T12:00:00+01:00,12.7,\n"
    )
    got = read_csv_file(path, source(tmp_path, form="wide"))
    t0 = datetime(2026, 3, 1, 10, tzinfo=UTC).timestamp()
    assert got == [
        SourceReading("FI-200", t0, 12.5),
        SourceReading("TI-201", t0, 58.1),
        SourceReading("TI-201", t0 + 3600.0, 58.2),
        SourceReading("FI-200", t0 + 3600.0, 12.7),
    ]


def test_configured_quality_codes_replace_the_defaults(tmp_path: Path):
    path = tmp_path / "q.csv"
    path.write_text("tag,time,value,quality\nA,1700000000,1.0,0\nB,1700000000,2.0,3\n")
    config = source(tmp_path, time_format="epoch", quality_codes={"0": 192, "3": 0})
    assert [r.quality for r in read_csv_file(path, config)] == [192, 0]
    path.write_text("tag,time,value,quality\nA,1700000000,1.0,9\n")
    with pytest.raises(CsvFileError, match=r"line 2: quality '9' is not one of the configured"):
        read_csv_file(path, config)


def test_a_malformed_file_lists_each_line_at_fault(tmp_path: Path):
    path = tmp_path / "bad.csv"
    path.write_text(
        "tag,time,value\n"
        "FI-200,2026-03-01T10:00:00Z,12.5\n"
        "FI-200,31.02.2026,12.5\n"
        "TI-201,2026-03-01T10:00:00Z,58,1\n"
        ",2026-03-01T10:00:00Z,1\n"
        "TI-201,2026-03-01T10:00:00Z,nan\n"
        "TI-201,2026-03-01T10:00:00Z,\n"
    )
    with pytest.raises(CsvFileError) as caught:
        read_csv_file(path, source(tmp_path))
    assert caught.value.problems == [
        "line 3: time '31.02.2026' does not match ISO 8601",
        "line 4: 4 fields, the header has 3",
        "line 5: the tag is empty",
        "line 6: not a finite number: 'nan'",
        "line 7: the value is empty",
    ]
    path.write_text("when,tag,reading\n1,A,2\n")
    with pytest.raises(CsvFileError, match=r"line 1: the header lacks the column\(s\) 'time', "):
        read_csv_file(path, source(tmp_path))
    path.write_bytes(b"tag,time,value\nA,2026-03-01T10:00:00Z,\xff\n")
    with pytest.raises(CsvFileError, match="not utf-8-sig text"):
        read_csv_file(path, source(tmp_path))


def test_each_file_is_taken_once_and_a_bad_one_goes_to_failed_with_its_reason(tmp_path: Path):
    incoming = tmp_path / "incoming"
    incoming.mkdir()
    (incoming / "a.csv").write_text(
        "tag,time,value\nFI-200,1700000000,12.5\nTI-201,1700000000,58\n"
    )
    (incoming / "b.csv").write_text("tag,time,value\nFI-200,yesterday,12.5\n")
    (incoming / "notes.txt").write_text("not an export")
    feed = CsvFolderSource(source(incoming, time_format="epoch"))
    sink = Collect()
    assert asyncio.run(feed.read_once(sink)) == 2
    assert [len(b) for b in sink.batches] == [2]
    assert (incoming / "done" / "a.csv").is_file()
    assert (incoming / "failed" / "b.csv").is_file()
    reason = (incoming / "failed" / "b.csv.reason.txt").read_text()
    assert "nothing of it was spooled" in reason
    assert "line 2: not epoch seconds: 'yesterday'" in reason
    assert sorted(p.name for p in incoming.iterdir() if p.is_file()) == ["notes.txt"]
    assert asyncio.run(feed.read_once(sink)) == 0  # nothing is taken twice
    # A new export with an old name does not overwrite the one already done.
    (incoming / "a.csv").write_text("tag,time,value\nFI-200,1700000060,12.6\n")
    assert asyncio.run(feed.read_once(sink)) == 1
    assert len(list((incoming / "done").glob("a*.csv"))) == 2


def test_a_file_still_being_written_is_left_alone(tmp_path: Path):
    (tmp_path / "a.csv").write_text("tag,time,value\nFI-200,1700000000,12.5\n")
    feed = CsvFolderSource(source(tmp_path, time_format="epoch", settle="30 s"))
    assert feed.ready_files() == []
    past = time.time() - 60.0
    os.utime(tmp_path / "a.csv", (past, past))
    assert feed.ready_files() == [tmp_path / "a.csv"]


def test_a_full_spool_leaves_the_file_and_one_too_big_ever_goes_to_failed(tmp_path: Path):
    (tmp_path / "a.csv").write_text("tag,time,value\nA,1700000000,1\nB,1700000000,2\n")
    feed = CsvFolderSource(source(tmp_path, time_format="epoch"))
    assert asyncio.run(feed.read_once(Collect(room=1))) == 0
    assert (tmp_path / "a.csv").is_file()  # waits for room
    big = "tag,time,value\n" + "".join(f"A,{1700000000 + k},1\n" for k in range(101))
    (tmp_path / "a.csv").unlink()
    (tmp_path / "big.csv").write_text(big)
    asyncio.run(feed.read_once(Collect(room=50)))
    reason = (tmp_path / "failed" / "big.csv.reason.txt").read_text()
    assert "holds 101 readings, more than the spool can ever hold (100)" in reason
