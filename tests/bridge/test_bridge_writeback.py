"""Write-back and operation: estimates readable over OPC UA and in the CSV file; metrics."""

from __future__ import annotations

import asyncio
import csv
import logging
import time
from datetime import UTC, datetime
from pathlib import Path
from typing import Any

import httpx
import pytest
from asyncua import Client

from service.bridge.config import parse_bridge_config
from service.bridge.runner import Bridge
from tests.bridge.support import base_config, journal, write_long_csv
from tests.service.test_app import ADMIN, demo_readings
from tests.service.test_live import Server, free_port

NAMESPACE = "urn:wrenfield:line2:estimates"


def csv_rows(path: Path) -> list[dict[str, str]]:
    if not path.exists():
        return []
    with path.open(newline="") as handle:
        return list(csv.DictReader(handle))


async def read_variables(endpoint: str, train: str, names: list[str]) -> dict[str, Any]:
    async with Client(endpoint, timeout=10) as client:
        index = await client.get_namespace_index(NAMESPACE)
        nodes = [client.get_node(f"ns={index};s={train}.{name}") for name in names]
        values = await client.read_attributes(nodes)
    return {
        name: (v.Value.Value, v.SourceTimestamp) for name, v in zip(names, values, strict=True)
    }


@pytest.mark.slow
def test_estimates_are_published_over_opcua_and_to_csv_and_metrics_count(
    service: Server, train: str, folder: Path, tmp_path: Path, caplog: pytest.LogCaptureFixture
):
    readings = demo_readings(2.0, time.time())
    write_long_csv(folder / "export.csv", readings)
    endpoint = f"opc.tcp://127.0.0.1:{free_port()}/stagewatch/"
    metrics_port = free_port()
    estimates_csv = tmp_path / "imports" / "estimates.csv"
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
        status={"interval": "0.3 s", "metrics_port": metrics_port},
    )
    data["writeback"] = {
        "trains": [train],
        "interval": "0.3 s",
        "opcua": {"endpoint": endpoint, "namespace": NAMESPACE, "security_policy": "None"},
        "csv": {"path": str(estimates_csv)},
    }
    bridge = Bridge(parse_bridge_config(data), ADMIN)
    auth = {"Authorization": f"Bearer {ADMIN}"}
    names = [
        "R-201.concentration.glucose",
        "R-203.concentration.fructose",
        "R-202.conversion",
        "R-203.design_conversion",
        "R-203.alert_level",
        "R-203.alert_state",
        "activity",
        "alerts.active",
        "alerts.level",
    ]

    async def scenario() -> tuple[dict[str, Any], dict[str, Any], str]:
        stop = asyncio.Event()
        task = asyncio.create_task(bridge.run(stop))
        try:
            deadline = time.monotonic() + 90.0  # only so that a broken run cannot hang
            latest: dict[str, Any] = {}
            async with httpx.AsyncClient(base_url=service.base, headers=auth) as http:
                while time.monotonic() < deadline and not task.done():
                    await asyncio.sleep(0.1)
                    if len(journal(service, train)) < len(readings):
                        continue
                    answer = await http.get(f"/api/v1/trains/{train}/estimates/latest")
                    if answer.status_code != 200:
                        continue  # journaled, but the filter has not run on them yet
                    latest = answer.json()
                    stamp = datetime.fromtimestamp(latest["time"], UTC)
                    text = stamp.isoformat(timespec="milliseconds").replace("+00:00", "Z")
                    if any(r["time"] == text for r in csv_rows(estimates_csv)):
                        break
                published = await read_variables(endpoint, train, names)
                # The spool gauge follows the forwarder's next pass: wait for it.
                while True:
                    metrics = (await http.get(f"http://127.0.0.1:{metrics_port}/metrics")).text
                    if "stagewatch_bridge_spool_pending 0.0" in metrics:
                        break
                    if time.monotonic() >= deadline or task.done():
                        break
                    await asyncio.sleep(0.1)
            await asyncio.sleep(0.7)  # a few more publications of the same estimate
            return latest, published, metrics
        finally:
            stop.set()
            await task

    with caplog.at_level(logging.INFO, logger="stagewatch"):
        try:
            latest, published, metrics = asyncio.run(scenario())
        finally:
            bridge.close()
    when = datetime.fromtimestamp(latest["time"], UTC)
    vessels = {v["name"]: v for v in latest["vessels"]}
    expected = {
        "R-201.concentration.glucose": vessels["R-201"]["concentration"]["glucose"]["value"],
        "R-203.concentration.fructose": vessels["R-203"]["concentration"]["fructose"]["value"],
        "R-202.conversion": vessels["R-202"]["conversion"]["value"],
        "R-203.design_conversion": vessels["R-203"]["design_conversion"],
        "R-203.alert_level": 0,
        "R-203.alert_state": "normal",
        "activity": latest["activity"]["value"],
        "alerts.active": 0,
        "alerts.level": 0,
    }
    assert {name: value for name, (value, _) in published.items()} == expected
    assert {stamp for _, stamp in published.values()} == {when}
    # The CSV file: one row per name and estimate time, never the same time twice.
    rows = csv_rows(estimates_csv)
    activity = [r for r in rows if r["tag"] == f"{train}.activity"]
    assert len({r["time"] for r in activity}) == len(activity)
    last = {r["tag"]: r for r in rows if r["time"] == activity[-1]["time"]}
    assert float(last[f"{train}.R-202.conversion"]["value"]) == expected["R-202.conversion"]
    assert f"{train}.R-203.alert_state" not in last  # text stays out of the historian's file
    # Metrics and the status line count what happened.
    sent = f'stagewatch_bridge_readings_total{{outcome="sent"}} {float(len(readings))}'
    assert sent in metrics
    assert 'stagewatch_bridge_readings_total{outcome="refused"} 0.0' in metrics
    assert "stagewatch_bridge_spool_pending 0.0" in metrics
    lines = [r.getMessage() for r in caplog.records if r.getMessage().startswith("bridge: ")]
    assert sum(int(line.split("sent ")[1].split(",")[0]) for line in lines) == len(readings)
    assert any("write-back server" in r.getMessage() and "without security" in r.getMessage()
               for r in caplog.records if r.levelno == logging.WARNING)
