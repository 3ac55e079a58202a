"""An OPC UA server standing in for a plant's gateway: asyncua on loopback, NoSecurity.

It runs in a thread with its own event loop, so tests (and bridges running in
the test's own loop) talk to it over real TCP. Every 0.1 s it writes new values
to its changing nodes, each with a source timestamp, and keeps the history of
what it wrote, so a test can check that what reached the service is exactly what
the server held, converted.
"""

from __future__ import annotations

import asyncio
import math
import threading
from dataclasses import dataclass, field
from datetime import UTC, datetime
from typing import Any

from asyncua import Server, ua

from tests.service.test_live import free_port

NAMESPACE = "urn:wrenfield:line2:gateway"
FLOW = "ns=2;s=Line2.FI200.PV"  # L/min, around 200 (12 m^3/h)
TEMPERATURE = "ns=2;s=Line2.TI201.PV"  # degF, around 136.4 (58 degC)
RAW = "ns=2;s=Line2.AI203G.Raw"  # counts; 0.125 mol/m^3 each
SENSOR_FAILED = "ns=2;s=Line2.TI202.PV"  # status BadSensorFailure, no value
UNCERTAIN = f"nsu={NAMESPACE};s=Line2.AI200G.PV"  # kmol/m^3, status UncertainLastUsableValue
CHANGING = (FLOW, TEMPERATURE, RAW)
TICK = 0.1  # seconds between changes


def _value(node: str, k: int) -> float:
    if node == FLOW:
        return 200.0 + 5.0 * math.sin(k / 5.0)
    if node == TEMPERATURE:
        return 136.4 + 0.9 * math.cos(k / 7.0)
    return float(3000 + (k * 37) % 400)  # RAW: 375..425 mol/m^3 once scaled


@dataclass
class PlantServer:
    """The server and the history of its changing nodes: node -> [(time [s], value)]."""

    port: int = field(default_factory=free_port)
    history: dict[str, list[tuple[float, float]]] = field(default_factory=dict)
    bad_time: float = 0.0
    uncertain_time: float = 0.0

    def __post_init__(self) -> None:
        self.endpoint = f"opc.tcp://127.0.0.1:{self.port}/plant/"
        self._loop = asyncio.new_event_loop()
        self._thread = threading.Thread(target=self._loop.run_forever, daemon=True)
        self._lock = threading.Lock()
        self._server: Server | None = None
        self._ticker: asyncio.Task[None] | None = None

    def start(self) -> None:
        self._thread.start()
        asyncio.run_coroutine_threadsafe(self._start(), self._loop).result(timeout=60)

    def stop(self) -> None:
        asyncio.run_coroutine_threadsafe(self._stop(), self._loop).result(timeout=60)
        self._loop.call_soon_threadsafe(self._loop.stop)
        self._thread.join(timeout=10)
        self._loop.close()

    def written(self, node: str) -> list[tuple[float, float]]:
        with self._lock:
            return list(self.history[node])

    async def _start(self) -> None:
        server = Server()
        await server.init()
        server.set_endpoint(self.endpoint)
        server.set_security_policy([ua.SecurityPolicyType.NoSecurity])
        index = await server.register_namespace(NAMESPACE)
        assert index == 2
        plant = await server.nodes.objects.add_object(index, "Line2")
        self._nodes: dict[str, Any] = {}
        for node in (*CHANGING, SENSOR_FAILED, UNCERTAIN):
            text = node.replace(f"nsu={NAMESPACE}", "ns=2")
            self._nodes[node] = await plant.add_variable(
                ua.NodeId.from_string(text), text.split("=")[-1], 0.0
            )
            self.history[node] = []
        now = datetime.now(UTC)
        self.bad_time = now.timestamp()
        await self._nodes[SENSOR_FAILED].write_value(
            ua.DataValue(
                ua.Variant(57.0, ua.VariantType.Double),
                StatusCode=ua.StatusCode(ua.StatusCodes.BadSensorFailure),
                SourceTimestamp=now,
            )
        )
        self.uncertain_time = now.timestamp()
        await self._nodes[UNCERTAIN].write_value(
            ua.DataValue(
                ua.Variant(2.4, ua.VariantType.Double),
                StatusCode=ua.StatusCode(ua.StatusCodes.UncertainLastUsableValue),
                SourceTimestamp=now,
            )
        )
        await server.start()
        self._server = server
        await self._tick(0)
        self._ticker = asyncio.create_task(self._run())

    async def _tick(self, k: int) -> None:
        now = datetime.now(UTC)
        for node in CHANGING:
            value = _value(node, k)
            await self._nodes[node].write_value(
                ua.DataValue(ua.Variant(value, ua.VariantType.Double), SourceTimestamp=now)
            )
            with self._lock:
                self.history[node].append((now.timestamp(), value))

    async def _run(self) -> None:
        k = 0
        while True:
            await asyncio.sleep(TICK)
            k += 1
            await self._tick(k)

    async def _stop(self) -> None:
        if self._ticker is not None:
            self._ticker.cancel()
            try:
                await self._ticker
            except asyncio.CancelledError:
                pass
        if self._server is not None:
            await self._server.stop()

