"""OPC UA sources against a real asyncua server: what reached the service is what it held."""

from __future__ import annotations

import asyncio
import time
from collections.abc import Callable
from pathlib import Path
from typing import Any

import pytest

from service.bridge.config import parse_bridge_config
from service.bridge.runner import Bridge
from tests.bridge.plant import (
    FLOW,
    RAW,
    SENSOR_FAILED,
    TEMPERATURE,
    UNCERTAIN,
    PlantServer,
)
from tests.bridge.support import base_config, journal
from tests.service.test_app import ADMIN
from tests.service.test_live import Server

# Each changing node, its train tag, and the conversion written out by hand [C]:
# 1 L/min = 0.06 m^3/h; degC = (degF - 32) * 5/9; 0.125 mol/m^3 per count.
CONVERSIONS: dict[str, tuple[str, Callable[[float], float]]] = {
    FLOW: ("FI-200", lambda v: v * 0.06),
    TEMPERATURE: ("TI-201", lambda v: (v - 32.0) * 5.0 / 9.0),
    RAW: ("AI-203G", lambda v: v * 0.125),
}


def bridge_file(service: Server, plant: PlantServer, train: str, folder: Path, mode: str) -> Any:
    def tag(node: str, name: str, **extra: object) -> dict[str, object]:
        return {"source": "gateway", "source_tag": node, "train": train, "tag": name, **extra}

    data = base_config(
        service,
        folder,
        sources=[
            {
                "kind": "opcua",
                "name": "gateway",
                "endpoint": plant.endpoint,
                "mode": mode,
                "interval": "0.3 s",
                "security_policy": "None",
                "anonymous": True,
            }
        ],
        tags=[
            tag(FLOW, "FI-200", unit="L/min", train_unit="m^3/h"),
            tag(TEMPERATURE, "TI-201", unit="degF", train_unit="degC"),
            tag(RAW, "AI-203G", scale=0.125),
            tag(SENSOR_FAILED, "TI-202"),
            tag(UNCERTAIN, "AI-200G", unit="kmol/m^3", train_unit="mol/m^3"),
        ],
    )
    return parse_bridge_config(data)


def run_until(bridge: Bridge, done: Callable[[], bool], timeout: float = 60.0) -> None:
    """Run the bridge in this thread's event loop until ``done()``; then stop it cleanly."""

    async def scenario() -> None:
        stop = asyncio.Event()
        task = asyncio.create_task(bridge.run(stop))
        deadline = time.monotonic() + timeout  # only so that a broken run cannot hang
        while not done() and time.monotonic() < deadline and not task.done():
            await asyncio.sleep(0.05)
        stop.set()
        await task

    asyncio.run(scenario())


Rows = list[tuple[str, float, float, int | None]]


def by_tag(rows: Rows) -> dict[str, list[tuple[float, float]]]:
    found: dict[str, list[tuple[float, float]]] = {}
    for tag, t, v, _ in rows:
        found.setdefault(tag, []).append((t, v))
    return found


def check_against_history(
    plant: PlantServer, got: dict[str, list[tuple[float, float]]]
) -> dict[str, list[float]]:
    """Every journaled value is one the server held, at its source time, converted."""
    times: dict[str, list[float]] = {}
    for node, (tag, convert) in CONVERSIONS.items():
        held = dict(plant.written(node))
        readings = sorted(got.get(tag, []))
        assert readings, f"no {tag} reached the service"
        for t, v in readings:
            assert t in held, f"{tag} at {t} is not a source time the server wrote"
            assert v == pytest.approx(convert(held[t]), rel=1e-12)
        times[node] = [t for t, _ in readings]
    return times


def check_quality(bridge: Bridge, service: Server, plant: PlantServer, train: str) -> None:
    rows = journal(service, train)
    assert "TI-202" not in {tag for tag, *_ in rows}  # a bad value never reaches the filter
    withheld = bridge.spool.rows(state="withheld")
    got = [(w["source_tag"], w["time"], w["value"], w["quality"], w["status"]) for w in withheld]
    assert got == [(SENSOR_FAILED, plant.bad_time, None, 0, "BadSensorFailure")]
    uncertain = [(t, v, q) for tag, t, v, q in rows if tag == "AI-200G"]
    # 2.4 kmol/m^3 = 2400 mol/m^3, quality 64 for status UncertainLastUsableValue.
    assert uncertain == [(plant.uncertain_time, pytest.approx(2400.0, rel=1e-12), 64)]


def test_polling_reads_source_times_converts_and_passes_status_as_quality(
    service: Server, plant: PlantServer, train: str, tmp_path: Path
):
    bridge = Bridge(bridge_file(service, plant, train, tmp_path, "poll"), ADMIN)
    try:
        run_until(bridge, lambda: len(by_tag(journal(service, train)).get("FI-200", [])) >= 4)
        times = check_against_history(plant, by_tag(journal(service, train)))
        assert all(len(set(t)) >= 3 for t in times.values())
        check_quality(bridge, service, plant, train)
        # The uncertain node keeps its source time, so later polls add nothing.
        assert bridge.stats.totals["duplicate"] > 0
        assert bridge.spool.counts().pending == 0
    finally:
        bridge.close()


def test_a_subscription_misses_no_change_between_its_first_and_last_value(
    service: Server, plant: PlantServer, train: str, tmp_path: Path
):
    bridge = Bridge(bridge_file(service, plant, train, tmp_path, "subscribe"), ADMIN)
    try:
        run_until(bridge, lambda: len(by_tag(journal(service, train)).get("FI-200", [])) >= 10)
        times = check_against_history(plant, by_tag(journal(service, train)))
        for node, seen in times.items():
            # The server queues every change between publishes: none is skipped.
            written = [t for t, _ in plant.written(node) if seen[0] <= t <= seen[-1]]
            assert seen == written
            assert len(seen) >= 10 if node == FLOW else len(seen) >= 2
        check_quality(bridge, service, plant, train)
    finally:
        bridge.close()
