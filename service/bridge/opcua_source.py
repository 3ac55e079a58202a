"""OPC UA: read configured nodes by polling or by subscription (asyncua).

Each value keeps its source timestamp (the server's timestamp when the source
gave none, the bridge's clock when neither did) and its status code. The
status code's severity becomes the quality byte: good 192, uncertain 64, bad 0.
A bad value carries no value at all -- OPC UA says a client must ignore the
value of a bad status -- so it is spooled as withheld with its status name
(``BadSensorFailure``), never posted as a number.

Polling reads every node each interval; the same value with the same source
timestamp read twice is stored once by the spool. A subscription asks the
server to queue up to ``queue_size`` changes per node between publishes, so
quick changes are not lost; the connection is checked each interval by reading
the server's clock. On a lost connection the source reconnects, waiting longer
each time (up to ``reconnect_max``).

Security: a security policy other than None signs and, with
``SignAndEncrypt``, encrypts the channel with the bridge's certificate. Login is
by user and password, by user certificate, or anonymous -- the last only when
the bridge file says ``anonymous = true``. Without a security policy the
source logs a warning when it connects.
"""

from __future__ import annotations

import asyncio
import logging
import math
import os
import random
import time
from collections.abc import Sequence
from datetime import UTC, datetime
from typing import Any

from asyncua import Client, ua
from asyncua.crypto import security_policies

from service.bridge.config import OpcUaSourceConfig
from service.bridge.sources import (
    BAD,
    GOOD,
    UNCERTAIN,
    Sink,
    Source,
    SourceReading,
    SpoolFull,
)

__all__ = ["OpcUaSource", "reading_from_data_value"]

log = logging.getLogger("stagewatch.bridge.opcua")

_CLIENT_URI = "urn:stagewatch:bridge"
_READ_CHUNK = 500


def _epoch(stamp: datetime | None) -> float | None:
    if stamp is None:
        return None
    if stamp.tzinfo is None:
        stamp = stamp.replace(tzinfo=UTC)  # OPC UA times are UTC
    return stamp.timestamp()


def reading_from_data_value(
    source_tag: str, value: ua.DataValue, now: float | None = None
) -> SourceReading:
    """Turn one OPC UA data value into a reading.

    Parameters
    ----------
    source_tag : str
        The node id as the bridge file writes it.
    value : asyncua.ua.DataValue
        As read or as notified.
    now : float, optional
        The bridge's clock, epoch seconds [s], used when the value has neither
        a source nor a server timestamp.

    Returns
    -------
    SourceReading
        Quality 192, 64 or 0 by the status code's severity; no value when the
        status is bad or the value is not a finite number.
    """
    status = value.StatusCode if value.StatusCode is not None else ua.StatusCode(ua.UInt32(0))
    stamp = _epoch(value.SourceTimestamp)
    if stamp is None:
        stamp = _epoch(value.ServerTimestamp)
    if stamp is None:
        stamp = time.time() if now is None else now
    name = status.name
    if status.is_bad():
        return SourceReading(source_tag, stamp, None, BAD, name)
    quality = UNCERTAIN if status.is_uncertain() else GOOD
    raw: Any = value.Value.Value if value.Value is not None else None
    if isinstance(raw, bool | int | float) and math.isfinite(float(raw)):
        return SourceReading(source_tag, stamp, float(raw), quality, name)
    shown = repr(raw) if len(repr(raw)) <= 40 else repr(raw)[:37] + "..."
    return SourceReading(source_tag, stamp, None, BAD, f"{name}, not a finite number: {shown}")


class _Changes:
    """Subscription handler: collects data changes until the source takes them."""

    def __init__(self) -> None:
        self.items: list[tuple[ua.NodeId, ua.DataValue]] = []

    def datachange_notification(self, node: Any, val: Any, data: Any) -> None:
        """Keep one notified value (asyncua calls this)."""
        self.items.append((node.nodeid, data.monitored_item.Value))

    def take(self) -> list[tuple[ua.NodeId, ua.DataValue]]:
        taken, self.items = self.items, []
        return taken


def _secret(env: str | None, file: os.PathLike[str] | None, what: str) -> str | None:
    if env is not None:
        value = os.environ.get(env)
        if not value:
            raise RuntimeError(f"{what}: the environment variable {env} is not set")
        return value
    if file is not None:
        try:
            with open(file, encoding="utf-8") as handle:
                return handle.readline().strip()
        except OSError as exc:
            raise RuntimeError(f"{what}: cannot read {file}: {exc.strerror or exc}") from None
    return None


class OpcUaSource(Source):
    """Reads an OPC UA server's nodes (see the module notes).

    Parameters
    ----------
    config : OpcUaSourceConfig
        The source's entry of the bridge file.
    node_ids : sequence of str
        The node ids to read, as the ``[[tags]]`` entries write them.
    rng : random.Random, optional
        Source of the reconnection jitter.
    """

    def __init__(
        self,
        config: OpcUaSourceConfig,
        node_ids: Sequence[str],
        rng: random.Random | None = None,
    ) -> None:
        super().__init__(config.name, config.interval)
        self.config = config
        self.node_ids = list(dict.fromkeys(node_ids))
        self.rng = rng or random.Random()
        self.connected = False
        self._warned_insecure = False

    async def _connect(self) -> tuple[Client, dict[ua.NodeId, str]]:
        """Connect, log in, and resolve the node ids (``nsu=`` URIs to indexes)."""
        c = self.config
        client = Client(c.endpoint, timeout=c.timeout)
        client.application_uri = c.application_uri or _CLIENT_URI
        client.name = client.description = "stagewatch bridge"
        if c.security_policy == "None":
            if not self._warned_insecure:
                self._warned_insecure = True
                log.warning(
                    "source %s: connecting to %s without security (security_policy None): "
                    "values travel unsigned and unencrypted",
                    self.name,
                    c.endpoint,
                )
        else:
            assert c.certificate is not None and c.private_key is not None  # config checked
            policy = getattr(security_policies, f"SecurityPolicy{c.security_policy}")
            await client.set_security(
                policy,
                str(c.certificate),
                str(c.private_key),
                _secret(c.private_key_password_env, None, f"source {self.name}"),
                None if c.server_certificate is None else str(c.server_certificate),
                getattr(ua.MessageSecurityMode, c.security_mode),
            )
        if c.user is not None:
            client.set_user(c.user)
            password = _secret(c.password_env, c.password_file, f"source {self.name}")
            if password is not None:
                client.set_password(password)
        elif c.user_certificate is not None and c.user_private_key is not None:
            await client.load_client_certificate(str(c.user_certificate))
            await client.load_private_key(c.user_private_key)
        await client.connect()
        try:
            nodes = await self._resolve(client)
        except BaseException:
            await _disconnect(client)
            raise
        self.connected = True
        return client, nodes

    async def _resolve(self, client: Client) -> dict[ua.NodeId, str]:
        nodes: dict[ua.NodeId, str] = {}
        for text in self.node_ids:
            parsed = ua.NodeId.from_string(text)
            uri = getattr(parsed, "NamespaceUri", None)
            if uri:
                index = await client.get_namespace_index(uri)
                parsed = ua.NodeId(parsed.Identifier, ua.Int16(index), parsed.NodeIdType)
            plain = ua.NodeId(parsed.Identifier, parsed.NamespaceIndex, parsed.NodeIdType)
            nodes[plain] = text
        return nodes

    async def _poll(self, client: Client, nodes: dict[ua.NodeId, str], sink: Sink) -> int:
        ids = list(nodes)
        readings: list[SourceReading] = []
        now = time.time()
        for start in range(0, len(ids), _READ_CHUNK):
            chunk = [client.get_node(i) for i in ids[start : start + _READ_CHUNK]]
            values = await client.read_attributes(chunk)
            readings += [
                reading_from_data_value(nodes[n.nodeid], v, now)
                for n, v in zip(chunk, values, strict=True)
            ]
        return self._hand_over(readings, sink)

    def _hand_over(self, readings: list[SourceReading], sink: Sink) -> int:
        if not readings:
            return 0
        try:
            sink(readings)
        except SpoolFull as exc:
            self.dropped += len(readings)
            log.error("source %s: %d values lost: %s", self.name, len(readings), exc)
        return len(readings)

    async def read_once(self, sink: Sink) -> int:
        """Connect, read every node once, disconnect.

        Parameters
        ----------
        sink : Sink
            Takes the readings into the spool.

        Returns
        -------
        int
            Values read.
        """
        client, nodes = await self._connect()
        try:
            return await self._poll(client, nodes, sink)
        finally:
            await _disconnect(client)
            self.connected = False

    async def run(self, sink: Sink, stop: asyncio.Event) -> None:
        """Poll or subscribe until ``stop`` is set; reconnect after a lost connection."""
        failures = 0
        while not stop.is_set():
            client: Client | None = None
            try:
                client, nodes = await self._connect()
                if failures:
                    log.info("source %s: connected again to %s", self.name, self.config.endpoint)
                failures = 0
                if self.config.mode == "poll":
                    await self._run_polling(client, nodes, sink, stop)
                else:
                    await self._run_subscription(client, nodes, sink, stop)
            except Exception as exc:  # any trouble: log, wait, connect again
                failures += 1
                delay = min(self.config.reconnect_max, 2.0 ** min(failures - 1, 30))
                delay *= self.rng.uniform(0.5, 1.0)
                log.error(
                    "source %s: %s: %s; reconnecting in %.1f s",
                    self.name,
                    self.config.endpoint,
                    f"{type(exc).__name__} {exc}".strip(),
                    delay,
                )
                await _sleep(stop, delay)
            finally:
                self.connected = False
                if client is not None:
                    await _disconnect(client)

    async def _run_polling(
        self, client: Client, nodes: dict[ua.NodeId, str], sink: Sink, stop: asyncio.Event
    ) -> None:
        while not stop.is_set():
            began = time.monotonic()
            await self._poll(client, nodes, sink)
            await _sleep(stop, max(0.0, self.interval - (time.monotonic() - began)))

    async def _run_subscription(
        self, client: Client, nodes: dict[ua.NodeId, str], sink: Sink, stop: asyncio.Event
    ) -> None:
        changes = _Changes()
        subscription = await client.create_subscription(self.interval * 1000.0, changes)
        handles = await subscription.subscribe_data_change(
            [client.get_node(i) for i in nodes], queuesize=self.config.queue_size
        )
        for handle, text in zip(handles, nodes.values(), strict=True):
            if isinstance(handle, ua.StatusCode):
                log.error("source %s: cannot subscribe to %s: %s", self.name, text, handle.name)
        clock = client.get_node(ua.NodeId(ua.Int32(ua.ObjectIds.Server_ServerStatus_CurrentTime)))
        try:
            while not stop.is_set():
                await _sleep(stop, self.interval)
                now = time.time()
                taken = changes.take()
                self._hand_over(
                    [reading_from_data_value(nodes[i], v, now) for i, v in taken if i in nodes],
                    sink,
                )
                await clock.read_value()  # raises when the connection is gone
        finally:
            taken = changes.take()
            now = time.time()
            self._hand_over(
                [reading_from_data_value(nodes[i], v, now) for i, v in taken if i in nodes], sink
            )
            try:
                await subscription.delete()
            except Exception:  # the connection may be gone already; nothing to clean up then
                pass


async def _disconnect(client: Client) -> None:
    try:
        await client.disconnect()
    except Exception:  # a broken connection cannot be closed politely; drop it
        try:
            client.disconnect_socket()
        except Exception:  # already closed
            pass


async def _sleep(stop: asyncio.Event, seconds: float) -> None:
    try:
        await asyncio.wait_for(stop.wait(), timeout=seconds)
    except TimeoutError:
        pass
