"""The service away for a while: the spool fills, warns, holds back, and drains on return."""

from __future__ import annotations

import time
from pathlib import Path

import pytest

from tests.bridge.support import (
    BridgeProcess,
    base_config,
    journal,
    spool_rows,
    toml_text,
    wait_for,
    write_long_csv,
)
from tests.service.test_app import demo_readings
from tests.service.test_live import Server

CAPACITY = 700


@pytest.mark.slow
def test_the_spool_fills_while_the_service_is_away_and_drains_when_it_is_back(
    service: Server, train: str, folder: Path, tmp_path: Path
):
    readings = demo_readings(4.0, time.time())
    first, second = readings[:300], readings[300:]
    assert 300 + len(second) > CAPACITY >= len(second)
    data = base_config(
        service,
        tmp_path,
        sources=[
            {
                "kind": "csv_folder",
                "name": "exports",
                "folder": str(folder),
                "time_format": "epoch",
                "settle": "0 s",
                "poll": "0.2 s",
                "train": train,
            }
        ],
        spool={"max_readings": CAPACITY, "warn_fraction": 0.4},
        status={"interval": "0.3 s"},
    )
    config = tmp_path / "bridge.toml"
    config.write_text(toml_text(data))
    spool = tmp_path / "spool.db"
    service.stop()
    bridge = BridgeProcess(config, tmp_path / "bridge.log")
    try:
        write_long_csv(folder / "a.csv", first)
        wait_for(lambda: (folder / "done" / "a.csv").exists(), "the first file to be spooled")
        wait_for(lambda: "next try in" in bridge.text(), "a failed post")
        write_long_csv(folder / "b.csv", second)
        wait_for(lambda: "b.csv stays in the folder" in bridge.text(), "the spool to hold back")
        # Loud while filling: the crossing itself, then every status line.
        wait_for(
            lambda: "sent 0, refused 0, pending 300 (42.9% of the spool)" in bridge.text(),
            "a status line with the spool's fill",
        )
        assert len(spool_rows(spool, "pending")) == len(first)
        assert (folder / "b.csv").exists()
        lines = bridge.text().splitlines()
        assert any("WARNING spool 43% full: 300 of 700 readings wait" in line for line in lines)
        assert all(" WARNING " in line for line in lines if "% of the spool)" in line)
        assert any("cannot reach the service: ConnectError" in line for line in lines)
        assert journal(service, train) == []
        service.start()
        wait_for(lambda: (folder / "done" / "b.csv").exists(), "the second file to be taken")
        wait_for(lambda: not spool_rows(spool, "pending"), "the spool to drain")
    finally:
        if service.proc is None or service.proc.poll() is not None:
            service.start()
        status = bridge.terminate()
    assert status == 0, bridge.text()
    got = journal(service, train)
    assert len(got) == len(readings)
    assert {(tag, t, v) for tag, t, v, _ in got} == {
        (r["tag"], r["time"], r["value"]) for r in readings
    }
    # Sent readings made room for the second file: the spool never held more than its limit.
    rows = spool_rows(spool)
    assert len(rows) == CAPACITY and {r["state"] for r in rows} == {"sent"}
    assert "the service takes readings again after" in bridge.text()
    assert bridge.text().rstrip().endswith("bridge stopped")
