"""A bridge killed mid-batch and restarted: every reading reaches the service exactly once."""

from __future__ import annotations

import time
from pathlib import Path

import pytest

from tests.bridge.support import (
    BridgeProcess,
    KillingProxy,
    base_config,
    journal,
    service_counter,
    spool_batches,
    spool_rows,
    toml_text,
    write_long_csv,
)
from tests.service.test_app import demo_readings
from tests.service.test_live import Server

BATCH = 50


@pytest.mark.slow
def test_sigkill_before_and_after_the_service_answers_loses_and_doubles_nothing(
    service: Server, train: str, folder: Path, tmp_path: Path
):
    readings = demo_readings(3.0, time.time())
    write_long_csv(folder / "export.csv", readings)
    proxy = KillingProxy(service.base)
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
                "train": train,
            }
        ],
    )
    data["service"]["url"] = proxy.base
    data["forward"]["batch_size"] = BATCH
    config = tmp_path / "bridge.toml"
    config.write_text(toml_text(data))
    accepted_before = service_counter(service, "stagewatch_readings_accepted_total")
    duplicates_before = service_counter(service, "stagewatch_readings_duplicate_total")
    # Third post: the bridge dies before the batch reaches the service. Seventh post
    # (the fourth of the second run): the service journals the batch and answers,
    # but the bridge dies before it can record that.
    proxy.kill_before = {3}
    proxy.kill_after = {7}
    try:
        for run in range(3):
            bridge = BridgeProcess(config, tmp_path / "bridge.log", once=True)
            proxy.victim = bridge
            try:
                status = bridge.proc.wait(timeout=300)
            finally:
                bridge.kill_if_running()
            if run < 2:
                assert status == -9, bridge.text()
            else:
                assert status == 0, bridge.text()
    finally:
        proxy.close()
    assert proxy.killed == [(3, "before"), (7, "after")]
    assert (folder / "done" / "export.csv").is_file()
    # The service holds each reading once, with the value read.
    got = journal(service, train)
    assert len(got) == len(readings)
    assert {(tag, t, v) for tag, t, v, _ in got} == {
        (r["tag"], r["time"], r["value"]) for r in readings
    }
    # ... and took each exactly once: the batch posted again after the second kill
    # was counted as duplicates, not accepted twice.
    accepted = service_counter(service, "stagewatch_readings_accepted_total") - accepted_before
    duplicates = (
        service_counter(service, "stagewatch_readings_duplicate_total") - duplicates_before
    )
    assert (accepted, duplicates) == (len(readings), BATCH)
    # The spool saw the same: every reading sent, and the answers it did record add up.
    assert len(spool_rows(tmp_path / "spool.db", "sent")) == len(readings)
    assert spool_rows(tmp_path / "spool.db", "pending") == []
    batches = spool_batches(tmp_path / "spool.db")
    assert sum(b["accepted"] for b in batches) == len(readings) - BATCH
    assert sum(b["duplicates"] for b in batches) == BATCH
