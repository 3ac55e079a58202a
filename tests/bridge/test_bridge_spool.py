"""The spool: once per reading, committed before it returns, a limit that warns and holds."""

from __future__ import annotations

import asyncio
import logging
from pathlib import Path

import pytest

from service.bridge.config import TagMapConfig, parse_bridge_config
from service.bridge.mapping import TagMapper
from service.bridge.runner import Bridge
from service.bridge.sources import Sink, Source, SourceReading, SpoolFull
from service.bridge.spool import Spool, SpoolEntry, SpoolLocked


def entry(k: int, train: str = "l2", tag: str = "FI-200", **fields: object) -> SpoolEntry:
    values: dict[str, object] = {
        "train": train,
        "tag": tag,
        "time": 1_700_000_000.0 + k,
        "value": 12.0 + k,
        "quality": None,
        "status": "",
        "source": "exports",
        "source_tag": tag,
    }
    values.update(fields)
    return SpoolEntry(**values)  # type: ignore[arg-type]


def test_a_reading_is_stored_once_and_survives_a_reopen(tmp_path: Path):
    spool = Spool(tmp_path / "spool.db")
    first = spool.add([entry(0), entry(1), entry(1, value=None, withhold="no value")])
    assert (first.spooled, first.duplicates, first.withheld) == (2, 0, 1)
    again = spool.add([entry(0), entry(1), entry(2), entry(1, value=None, withhold="no value")])
    assert (again.spooled, again.duplicates, again.withheld) == (1, 3, 0)
    spool.close()  # what was committed is there after a restart
    spool = Spool(tmp_path / "spool.db")
    assert spool.counts().pending == 3 and spool.counts().withheld == 1
    assert [p.value for p in spool.next_batch("l2", 10)] == [12.0, 13.0, 14.0]
    spool.close()


def test_settling_marks_sent_and_refused_and_keeps_the_reason(tmp_path: Path):
    spool = Spool(tmp_path / "spool.db")
    spool.add([entry(k) for k in range(3)] + [entry(0, train="l3")])
    assert spool.pending_trains() == ["l2", "l3"]
    batch = spool.next_batch("l2", 10)
    spool.settle(
        "l2", [batch[0].id, batch[2].id], [(batch[1].id, "unknown tag")], accepted=2, duplicates=0
    )
    assert spool.counts().pending == 1 and spool.pending_trains() == ["l3"]
    refused = spool.rows(state="refused")
    assert [(r["time"], r["reason"]) for r in refused] == [(1_700_000_001.0, "unknown tag")]
    spool.close()


def test_the_limit_warns_when_filling_and_refuses_a_batch_whole(
    tmp_path: Path, caplog: pytest.LogCaptureFixture
):
    spool = Spool(tmp_path / "spool.db", max_readings=10, warn_fraction=0.8)
    with caplog.at_level(logging.WARNING, logger="stagewatch.bridge.spool"):
        spool.add([entry(k) for k in range(7)])
        assert not caplog.records
        spool.add([entry(k) for k in range(7, 9)])
    assert [r.getMessage().split(":")[0] for r in caplog.records] == ["spool 90% full"]
    assert spool.filling
    with pytest.raises(SpoolFull) as caught:
        spool.add([entry(k) for k in range(9, 12)])
    assert (caught.value.needed, caught.value.room, caught.value.capacity) == (3, 1, 10)
    assert spool.counts().pending == 9  # nothing of the refused batch was written
    # Settled rows make room for new ones.
    batch = spool.next_batch("l2", 9)
    spool.settle("l2", [p.id for p in batch], [], accepted=9, duplicates=0)
    spool.add([entry(k) for k in range(100, 110)])
    counts = spool.counts()
    assert (counts.pending, counts.total) == (10, 10)
    spool.close()


def test_only_one_bridge_holds_a_spool(tmp_path: Path):
    spool = Spool(tmp_path / "spool.db")
    with pytest.raises(SpoolLocked, match="another bridge is using the spool"):
        Spool(tmp_path / "spool.db")
    spool.close()
    Spool(tmp_path / "spool.db").close()


def mapper(send_bad: bool = False) -> TagMapper:
    tags = [
        TagMapConfig(
            source_tag="WF2.FI200.PV", train="l2", tag="FI-200", unit="L/min", train_unit="m^3/h"
        ),
        TagMapConfig(source_tag="WF2.FI200.PV", train="l3", tag="FI-300"),
        TagMapConfig(source="gw", source_tag="ns=2;s=T", train="l2", tag="TI-201", scale=0.1),
    ]
    return TagMapper(tags, {"exports": None, "drop": "l9"}, send_bad=send_bad)


def test_mapping_converts_fans_out_and_passes_unmapped_tags_to_a_default_train():
    batch = mapper().map(
        "exports",
        [SourceReading("WF2.FI200.PV", 1.0, 200.0), SourceReading("XX-1", 1.0, 5.0)],
    )
    assert batch.unmapped == 1
    got = [(e.train, e.tag, e.value) for e in batch.entries]
    assert got == [("l2", "FI-200", pytest.approx(12.0, rel=1e-12)), ("l3", "FI-300", 200.0)]
    # An entry naming its source applies to that source only.
    assert mapper().map("exports", [SourceReading("ns=2;s=T", 1.0, 581.0)]).unmapped == 1
    assert mapper().map("gw", [SourceReading("ns=2;s=T", 1.0, 581.0)]).entries[0].value == 58.1
    passed = mapper().map("drop", [SourceReading("XX-1", 1.0, 5.0)]).entries
    assert [(e.train, e.tag, e.value) for e in passed] == [("l9", "XX-1", 5.0)]


def test_bad_quality_is_withheld_unless_asked_and_no_value_always_is():
    readings = [
        SourceReading("WF2.FI200.PV", 1.0, 200.0, 0, "bad"),
        SourceReading("WF2.FI200.PV", 2.0, None, 0, "BadSensorFailure"),
        SourceReading("WF2.FI200.PV", 3.0, 200.0, 64, "uncertain"),
    ]
    held = [e.withhold for e in mapper().map("exports", readings).entries if e.train == "l2"]
    assert held == ["bad quality 0 (bad)", "no value: quality 0 (BadSensorFailure)", None]
    held = [e.withhold for e in mapper(True).map("exports", readings).entries if e.train == "l2"]
    assert held == [None, "no value: quality 0 (BadSensorFailure)", None]


class Counter(Source):
    """A site's own source: a counter that reads 1, 2, 3, ... once per call."""

    def __init__(self) -> None:
        super().__init__("site-counter", interval=1.0)
        self.k = 0

    async def read_once(self, sink: Sink) -> int:
        self.k += 1
        return sink([SourceReading("SITE.COUNT", 1_700_000_000.0 + self.k, float(self.k))])


def test_a_site_source_plugs_into_the_bridge(tmp_path: Path):
    (tmp_path / "in").mkdir()
    config = parse_bridge_config(
        {
            "service": {"url": "http://127.0.0.1:9", "key_env": "K"},  # nobody listens
            "spool": {"path": "spool.db"},
            "forward": {"once_attempts": 1},
            "sources": [{"kind": "csv_folder", "name": "exports", "folder": "in"}],
            "tags": [{"source_tag": "SITE.COUNT", "train": "l2", "tag": "FI-200", "scale": 2.0}],
        },
        base_dir=tmp_path,
    )
    bridge = Bridge(config, "key", extra_sources=[Counter()])
    try:
        result = asyncio.run(bridge.run_once())
        rows = bridge.spool.rows(state="pending")
    finally:
        bridge.close()
    assert result.pending == 1 and not result.ok
    assert [(r["source"], r["train"], r["tag"], r["value"]) for r in rows] == [
        ("site-counter", "l2", "FI-200", 2.0)
    ]
