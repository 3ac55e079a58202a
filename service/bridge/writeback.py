"""Write-back: the latest estimates, published where operators already look.

Every ``writeback.interval`` the bridge asks the service for each configured
train's newest estimate (``GET .../estimates/latest``) and its alerts
(``GET .../alerts``), flattens them into named values and publishes them:

- as read-only variables of an OPC UA server the bridge runs, browsable as
  ``Objects/stagewatch/<train>/<vessel>/...`` with string node ids
  ``ns=<namespace>;s=<train>.<name>``, each value stamped with the estimate's
  time as its source timestamp;
- and/or as rows appended to a CSV file the historian imports (long form
  ``tag,time,value``, tag ``<train>.<name>``, time ISO 8601 UTC); a train's
  rows are written once per estimate time, also across restarts (the last time
  written is kept in the spool; only a crash between the append and that
  bookkeeping can repeat one estimate's rows).

Names, per train (concentrations [mol/m^3], conversions [-], activity [-]):

``<vessel>.concentration.<species>``, ``<vessel>.conversion``,
``<vessel>.design_conversion``, ``<vessel>.shortfall``, ``<vessel>.alert_level``
(0 none, 1 advisory, 2 warning, 3 high: the most urgent active alert about the
vessel), ``<vessel>.alert_state`` (its state, ``normal`` if none; OPC UA only),
``activity``, ``activity_std``, ``estimate_time`` (epoch seconds [s]),
``alerts.active``, ``alerts.unacknowledged`` and ``alerts.level``.
"""

from __future__ import annotations

import asyncio
import logging
import math
import os
from collections.abc import Mapping, Sequence
from datetime import UTC, datetime
from pathlib import Path
from typing import Any
from urllib.parse import quote

import httpx

from service.bridge.config import WritebackConfig, WritebackCsvConfig, WritebackOpcUaConfig
from service.bridge.spool import Spool
from service.bridge.status import BridgeStats

__all__ = ["EstimateServer", "Writeback", "estimate_values"]

log = logging.getLogger("stagewatch.bridge.writeback")

_LEVELS = {"high": 3, "warning": 2, "advisory": 1}
_ACTIVE = ("active_unacknowledged", "active_acknowledged")
_UNACKNOWLEDGED = ("active_unacknowledged", "cleared_unacknowledged")

Value = float | int | str


def _level(alert: Mapping[str, Any]) -> int:
    """Return an alert's priority as a level: 3 high, 2 warning, 1 advisory, 0 other."""
    return _LEVELS.get(str(alert.get("priority")), 0)


def estimate_values(
    latest: Mapping[str, Any], alerts: Sequence[Mapping[str, Any]]
) -> dict[str, Value]:
    """Flatten one train's newest estimate and its alerts into named values.

    Parameters
    ----------
    latest : Mapping
        The body of ``GET .../estimates/latest``.
    alerts : sequence of Mapping
        The ``data`` of ``GET .../alerts``.

    Returns
    -------
    dict
        Name -> value, names as in the module notes; floats in SI, levels and
        counts as int, states as str.
    """
    values: dict[str, Value] = {
        "estimate_time": float(latest["time"]),
        "activity": float(latest["activity"]["value"]),
        "activity_std": float(latest["activity"]["std"]),
    }
    active = [a for a in alerts if a.get("state") in _ACTIVE]
    for vessel in latest["vessels"]:
        name = str(vessel["name"])
        for species, figure in vessel["concentration"].items():
            values[f"{name}.concentration.{species}"] = float(figure["value"])
        values[f"{name}.conversion"] = float(vessel["conversion"]["value"])
        values[f"{name}.design_conversion"] = float(vessel["design_conversion"])
        values[f"{name}.shortfall"] = float(vessel["shortfall"])
        about = [a for a in alerts if a.get("subject") == name and a.get("state") != "normal"]
        about.sort(key=lambda a: (-_level(a), a.get("state") not in _ACTIVE))
        values[f"{name}.alert_level"] = max(
            (_level(a) for a in active if a.get("subject") == name), default=0
        )
        values[f"{name}.alert_state"] = str(about[0]["state"]) if about else "normal"
    values["alerts.active"] = len(active)
    values["alerts.unacknowledged"] = sum(1 for a in alerts if a.get("state") in _UNACKNOWLEDGED)
    values["alerts.level"] = max((_level(a) for a in active), default=0)
    return values


class EstimateServer:
    """An OPC UA server holding the published estimates as read-only variables.

    Parameters
    ----------
    config : WritebackOpcUaConfig
        Endpoint, namespace and security.
    """

    def __init__(self, config: WritebackOpcUaConfig) -> None:
        self.config = config
        self._server: Any = None
        self._index = 0
        self._folders: dict[str, Any] = {}
        self._variables: dict[str, Any] = {}

    async def start(self) -> None:
        """Start listening on the endpoint."""
        from asyncua import Server, ua

        c = self.config
        server = Server()
        await server.init()
        server.set_endpoint(c.endpoint)
        server.set_server_name("stagewatch bridge estimates")
        if c.security_policy == "None":
            server.set_security_policy([ua.SecurityPolicyType.NoSecurity])
            log.warning(
                "write-back server %s runs without security (security_policy None): "
                "anyone who reaches it can read the estimates",
                c.endpoint,
            )
        else:
            assert c.certificate is not None and c.private_key is not None  # config checked
            await server.load_certificate(str(c.certificate))
            await server.load_private_key(str(c.private_key))
            policy = getattr(ua.SecurityPolicyType, f"{c.security_policy}_{c.security_mode}")
            server.set_security_policy([policy])
        self._index = await server.register_namespace(c.namespace)
        root = await server.nodes.objects.add_folder(
            ua.NodeId(ua.String("stagewatch"), ua.Int16(self._index)),
            ua.QualifiedName("stagewatch", self._index),
        )
        self._folders[""] = root
        await server.start()
        self._server = server
        log.info("write-back server listening on %s", c.endpoint)

    async def _folder(self, path: str) -> Any:
        from asyncua import ua

        if path in self._folders:
            return self._folders[path]
        parent_path, _, name = path.rpartition(".")
        parent = await self._folder(parent_path)
        folder = await parent.add_folder(
            ua.NodeId(ua.String(path), ua.Int16(self._index)),
            ua.QualifiedName(name, self._index),
        )
        self._folders[path] = folder
        return folder

    async def publish(self, train: str, stamp: float, values: Mapping[str, Value]) -> None:
        """Write one train's values, creating their variables on first use.

        Parameters
        ----------
        train : str
            The train.
        stamp : float
            The estimate's time, epoch seconds [s]: the values' source timestamp.
        values : Mapping
            Name -> value (see :func:`estimate_values`).
        """
        from asyncua import ua

        when = ua.DateTime.fromtimestamp(stamp, UTC)
        for name, value in values.items():
            kind = (
                ua.VariantType.String
                if isinstance(value, str)
                else ua.VariantType.Int32
                if isinstance(value, int)
                else ua.VariantType.Double
            )
            path = f"{train}.{name}"
            node = self._variables.get(path)
            if node is None:
                parent_path, _, leaf = path.rpartition(".")
                parent = await self._folder(parent_path)
                node = await parent.add_variable(
                    ua.NodeId(ua.String(path), ua.Int16(self._index)),
                    ua.QualifiedName(leaf, self._index),
                    ua.Variant(value, kind),
                )
                self._variables[path] = node
            await node.write_value(
                ua.DataValue(ua.Variant(value, kind), SourceTimestamp=when, ServerTimestamp=when)
            )

    async def stop(self) -> None:
        """Stop the server."""
        if self._server is not None:
            await self._server.stop()
            self._server = None


def _csv_number(value: float | int, decimal: str) -> str:
    text = repr(float(value)) if isinstance(value, float) else str(value)
    return text.replace(".", ",") if decimal == "," else text


def append_csv(
    config: WritebackCsvConfig, train: str, stamp: float, values: Mapping[str, Value]
) -> int:
    """Append one train's numeric values to the write-back CSV file.

    Parameters
    ----------
    config : WritebackCsvConfig
        The file and its separators.
    train : str
        The train (the tag prefix).
    stamp : float
        The estimate's time, epoch seconds [s].
    values : Mapping
        Name -> value; text values are left out.

    Returns
    -------
    int
        Rows written.
    """
    path: Path = config.path
    path.parent.mkdir(parents=True, exist_ok=True)
    when = datetime.fromtimestamp(stamp, UTC).isoformat(timespec="milliseconds")
    when = when.replace("+00:00", "Z")
    sep = config.delimiter
    rows = [
        f"{train}.{name}{sep}{when}{sep}{_csv_number(value, config.decimal)}\n"
        for name, value in values.items()
        if not isinstance(value, str) and math.isfinite(value)
    ]
    new = not path.exists() or path.stat().st_size == 0
    with path.open("a", encoding="utf-8", newline="") as handle:
        if new:
            handle.write(f"tag{sep}time{sep}value\n")
        handle.writelines(rows)
        handle.flush()
        os.fsync(handle.fileno())
    return len(rows)


class Writeback:
    """Fetches the latest estimates and publishes them (see the module notes).

    Parameters
    ----------
    config : WritebackConfig
        Trains, interval and targets.
    client : httpx.AsyncClient
        The service client (base URL and key set).
    spool : Spool
        Keeps the last estimate time written to the CSV file per train.
    stats : BridgeStats
        Counts publications.
    """

    def __init__(
        self, config: WritebackConfig, client: httpx.AsyncClient, spool: Spool, stats: BridgeStats
    ) -> None:
        self.config = config
        self.client = client
        self.spool = spool
        self.stats = stats
        self.server: EstimateServer | None = None
        self._waiting: set[str] = set()

    async def start(self, serve: bool = True) -> None:
        """Start the OPC UA server if one is configured and ``serve`` is true."""
        if serve and self.config.opcua is not None:
            self.server = EstimateServer(self.config.opcua)
            await self.server.start()

    async def fetch(self, train: str) -> tuple[float, dict[str, Value]] | None:
        """Fetch one train's newest estimate time [s] and values; None before the first."""
        base = f"/api/v1/trains/{quote(train, safe='')}"
        latest = await self.client.get(f"{base}/estimates/latest")
        if latest.status_code == 404:
            if train not in self._waiting:
                self._waiting.add(train)
                log.info("write-back: train %s has no estimate yet", train)
            return None
        latest.raise_for_status()
        alerts = await self.client.get(f"{base}/alerts")
        alerts.raise_for_status()
        self._waiting.discard(train)
        body = latest.json()
        return float(body["time"]), estimate_values(body, alerts.json()["data"])

    async def publish_once(self) -> int:
        """Publish every train once; return how many trains were published.

        A train whose fetch fails is logged and skipped; the others go on.
        """
        published = 0
        for train in self.config.trains:
            try:
                got = await self.fetch(train)
            except (httpx.HTTPError, ValueError, KeyError) as exc:
                log.warning("write-back: cannot fetch the estimates of %s: %s", train, exc)
                continue
            if got is None:
                continue
            stamp, values = got
            if self.server is not None:
                await self.server.publish(train, stamp, values)
            if self.config.csv is not None:
                key = f"writeback.csv.{train}"
                last = self.spool.get_meta(key)
                if last is None or stamp > float(last):
                    await asyncio.to_thread(append_csv, self.config.csv, train, stamp, values)
                    self.spool.set_meta(key, repr(stamp))
            published += 1
            self.stats.writeback.inc()
        return published

    async def run(self, stop: asyncio.Event) -> None:
        """Publish every interval until ``stop`` is set."""
        while not stop.is_set():
            try:
                await self.publish_once()
            except Exception as exc:  # write-back trouble must not stop the bridge
                log.error("write-back: %s", exc)
            try:
                await asyncio.wait_for(stop.wait(), timeout=self.config.interval)
            except TimeoutError:
                pass

    async def close(self) -> None:
        """Stop the OPC UA server."""
        if self.server is not None:
            await self.server.stop()
            self.server = None
