"""The bridge against the real service: refusals recorded, quality passed, --once for cron."""

from __future__ import annotations

import asyncio
import logging
import time
from pathlib import Path

import pytest
from typer.testing import CliRunner

from service.bridge.config import parse_bridge_config
from service.bridge.runner import Bridge
from service.cli import app
from tests.bridge.support import (
    KEY_ENV,
    base_config,
    journal,
    spool_rows,
    toml_text,
    write_long_csv,
)
from tests.service.test_app import ADMIN, demo_readings
from tests.service.test_live import Server, free_port

runner = CliRunner()


def csv_source(folder: Path, train: str) -> dict[str, object]:
    return {
        "kind": "csv_folder",
        "name": "exports",
        "folder": str(folder),
        "time_format": "epoch",
        "settle": "0 s",
        "train": train,  # the export already uses the train's tag names
    }


def test_refused_readings_are_recorded_and_the_others_go_on(
    service: Server, train: str, folder: Path, tmp_path: Path
):
    readings = demo_readings(1.0, time.time())
    now = time.time() - 2.0
    rows = [f"{r['tag']},{r['time']!r},{r['value']!r},good" for r in readings]
    rows += [
        f"XX-9,{now!r},1.5,good",  # a tag the train does not have
        f"{'L' * 300},{now!r},1.5,good",  # a tag the service's schema refuses (422)
        f"AI-200G,{now!r},2410.5,uncertain",
        f"FI-200,{now!r},99.0,bad",  # a bad value: kept in the spool, never posted
    ]
    (folder / "export.csv").write_text("tag,time,value,quality\n" + "\n".join(rows) + "\n")
    data = base_config(service, tmp_path, sources=[csv_source(folder, train)])
    data["forward"]["batch_size"] = 64
    bridge = Bridge(parse_bridge_config(data), ADMIN)
    try:
        result = asyncio.run(bridge.run_once())
        refused = bridge.spool.rows(state="refused")
        withheld = bridge.spool.rows(state="withheld")
        counts = bridge.spool.counts()
    finally:
        bridge.close()
    assert result.ok and result.pending == 0
    assert counts.sent == len(readings) + 1 and counts.refused == 2 and counts.withheld == 1
    reasons = {r["tag"][:5]: r["reason"] for r in refused}
    assert reasons["XX-9"] == "unknown tag for this train"
    # The 422 answer refuses its whole batch; the bridge splits it until the reading
    # at fault is alone, so only that one is refused.
    assert reasons["LLLLL"].startswith("the service answered 422")
    assert [(w["tag"], w["quality"], w["reason"]) for w in withheld] == [
        ("FI-200", 0, "bad quality 0 (bad)")
    ]
    got = {(tag, t, v): q for tag, t, v, q in journal(service, train)}
    expected = {(str(r["tag"]), float(r["time"]), float(r["value"])): 192 for r in readings}
    expected[("AI-200G", now, 2410.5)] = 64
    assert got == expected


def test_once_leaves_readings_for_the_next_run_while_the_service_is_away(
    service: Server,
    train: str,
    folder: Path,
    tmp_path: Path,
    monkeypatch: pytest.MonkeyPatch,
):
    # The command would send stagewatch's logs to stderr for good; not inside pytest.
    monkeypatch.setattr("service.bridge.runner.configure_logging", lambda json_lines: None)
    monkeypatch.setenv(KEY_ENV, ADMIN)
    readings = demo_readings(0.5, time.time())
    write_long_csv(folder / "export.csv", readings)
    data = base_config(service, tmp_path, sources=[csv_source(folder, train)])
    data["service"]["url"] = f"http://127.0.0.1:{free_port()}"  # nobody listens there
    config = tmp_path / "bridge.toml"
    config.write_text(toml_text(data))
    result = runner.invoke(app, ["bridge", "--config", str(config), "--once"])
    assert result.exit_code == 1
    assert len(spool_rows(tmp_path / "spool.db", "pending")) == len(readings)
    assert (folder / "done" / "export.csv").is_file()  # spooled: the file is done with
    assert journal(service, train) == []
    data["service"]["url"] = service.base
    config.write_text(toml_text(data))
    result = runner.invoke(app, ["bridge", "--config", str(config), "--once"])
    assert result.exit_code == 0
    assert spool_rows(tmp_path / "spool.db", "pending") == []
    got = {(tag, t, v) for tag, t, v, _ in journal(service, train)}
    assert got == {(r["tag"], r["time"], r["value"]) for r in readings}


def test_a_wrong_key_or_an_unknown_train_refuses_nothing_and_keeps_the_readings(
    service: Server, train: str, folder: Path, tmp_path: Path, caplog: pytest.LogCaptureFixture
):
    # Neither is the readings' fault: throwing them away would lose them. They wait.
    readings = demo_readings(0.25, time.time())
    write_long_csv(folder / "export.csv", readings)
    elsewhere = tmp_path / "other"
    elsewhere.mkdir()
    write_long_csv(elsewhere / "export.csv", readings[:10])
    data = base_config(
        service,
        tmp_path,
        sources=[
            csv_source(folder, train),
            {**csv_source(elsewhere, "bridge-not-registered"), "name": "other"},
        ],
    )
    config = parse_bridge_config(data)
    bridge = Bridge(config, "sw_not_a_key_of_this_service_0123456789")
    try:
        with caplog.at_level(logging.ERROR, logger="stagewatch.bridge"):
            result = asyncio.run(bridge.run_once())
        counts = bridge.spool.counts()
    finally:
        bridge.close()
    assert not result.ok and result.pending == len(readings) + 10
    assert (counts.sent, counts.refused) == (0, 0)
    assert any("refused the bridge's key (401" in r.getMessage() for r in caplog.records)
    caplog.clear()
    bridge = Bridge(config, ADMIN)
    try:
        with caplog.at_level(logging.ERROR, logger="stagewatch.bridge"):
            result = asyncio.run(bridge.run_once())
        counts = bridge.spool.counts()
    finally:
        bridge.close()
    assert result.pending == 10 and counts.sent == len(readings) and counts.refused == 0
    assert any(
        "train bridge-not-registered: the service answered 404" in r.getMessage()
        for r in caplog.records
    )
    assert len(journal(service, train)) == len(readings)
