"""The bridge process: sources -> tag mapping -> spool -> service, and write-back.

Two ways to run (``stagewatch bridge --config BRIDGE.toml [--once]``):

- continuous: every source reads on its own schedule (CSV folders poll, OPC UA
  sources poll or subscribe), the forwarder drains the spool as readings
  arrive, write-back publishes every interval, and one status line is logged
  per ``status.interval``. SIGTERM or SIGINT stops it cleanly: sources stop,
  the batch in flight is finished and recorded, the spool is closed. A SIGKILL
  loses nothing either: what was read is in the spool, and what was posted but
  not recorded is posted again and counted by the service as a duplicate.
- once (for cron): every source is read once, the spool is drained (giving up
  after ``forward.once_attempts`` failed attempts in a row), the write-back CSV
  file is appended once, and the process exits: 0 when the spool is empty and
  every source could be read, 1 otherwise (what is left waits for the next run).
"""

from __future__ import annotations

import asyncio
import logging
import os
import signal
import time
from collections.abc import Sequence
from dataclasses import dataclass
from typing import Any

import httpx

from service.bridge.config import (
    BridgeConfig,
    CsvFolderSourceConfig,
    OpcUaSourceConfig,
)
from service.bridge.csv_source import CsvFolderSource
from service.bridge.forwarder import Forwarder
from service.bridge.mapping import TagMapper
from service.bridge.sources import Sink, Source, SourceReading
from service.bridge.spool import Spool, SpoolLocked
from service.bridge.status import BridgeStats, status_line
from service.bridge.writeback import Writeback

__all__ = [
    "Bridge",
    "BridgeSetupError",
    "OnceResult",
    "configure_logging",
    "read_api_key",
    "run_bridge",
]

log = logging.getLogger("stagewatch.bridge")


_FILE_KEYS = (
    "certificate",
    "private_key",
    "server_certificate",
    "password_file",
    "user_certificate",
    "user_private_key",
)


class BridgeSetupError(RuntimeError):
    """The bridge cannot start: the message names the key at fault and the reason."""


@dataclass(frozen=True)
class OnceResult:
    """What a ``--once`` run left behind."""

    pending: int
    failed_sources: list[str]

    @property
    def ok(self) -> bool:
        """Whether every source was read and the spool is empty."""
        return self.pending == 0 and not self.failed_sources


def read_api_key(config: BridgeConfig) -> str:
    """Read the service's API key from the file or variable the bridge file names.

    Raises
    ------
    BridgeSetupError
        The file cannot be read, the variable is not set, or the key is empty.
    """
    service = config.service
    if service.key_file is not None:
        try:
            with service.key_file.open(encoding="utf-8") as handle:
                key = handle.readline().strip()
        except OSError as exc:
            raise BridgeSetupError(
                f"service.key_file: cannot read {service.key_file}: {exc.strerror or exc}"
            ) from None
        if not key:
            raise BridgeSetupError(f"service.key_file: {service.key_file} holds no key")
        return key
    assert service.key_env is not None  # the config holds one of the two
    key = os.environ.get(service.key_env, "").strip()
    if not key:
        raise BridgeSetupError(
            f"service.key_env: the environment variable {service.key_env} is not set"
        )
    return key


def _check_setup(config: BridgeConfig) -> None:
    """Fail early on what would otherwise fail later: missing folders and secrets."""
    for i, source in enumerate(config.sources):
        if isinstance(source, CsvFolderSourceConfig) and not source.folder.is_dir():
            raise BridgeSetupError(f"sources[{i}].folder: {source.folder} is not a folder")
        if isinstance(source, OpcUaSourceConfig):
            for key in ("password_env", "private_key_password_env"):
                name = getattr(source, key)
                if name is not None and not os.environ.get(name):
                    raise BridgeSetupError(
                        f"sources[{i}].{key}: the environment variable {name} is not set"
                    )
            for key in _FILE_KEYS:
                path = getattr(source, key)
                if path is not None and not path.is_file():
                    raise BridgeSetupError(f"sources[{i}].{key}: {path} is not a file")


def _build_sources(config: BridgeConfig) -> list[Source]:
    sources: list[Source] = []
    for source in config.sources:
        if isinstance(source, CsvFolderSourceConfig):
            sources.append(CsvFolderSource(source))
        else:
            from service.bridge.opcua_source import OpcUaSource

            nodes = [t.source_tag for t in config.tags_of(source.name)]
            sources.append(OpcUaSource(source, nodes))
    return sources


class Bridge:
    """One bridge: its sources, spool, forwarder, write-back and counts.

    Parameters
    ----------
    config : BridgeConfig
        The validated bridge file.
    api_key : str
        The service's API key (role ingest or higher).
    extra_sources : sequence of Source, optional
        A site's own sources (subclasses of :class:`~service.bridge.sources.Source`),
        run beside the configured ones. Their tags map through the ``[[tags]]``
        entries that name no source.

    Raises
    ------
    BridgeSetupError
        A CSV folder or a secret is missing, or another bridge holds the spool.
    """

    def __init__(
        self, config: BridgeConfig, api_key: str, extra_sources: Sequence[Source] = ()
    ) -> None:
        _check_setup(config)
        self.config = config
        self.api_key = api_key
        self.stats = BridgeStats()
        try:
            self.spool = Spool(
                config.spool.path,
                config.spool.max_readings,
                config.spool.warn_fraction,
                config.spool.keep_sent,
            )
        except SpoolLocked as exc:
            raise BridgeSetupError(f"spool.path: {exc}") from None
        except (OSError, ValueError) as exc:
            raise BridgeSetupError(f"spool.path: cannot open {config.spool.path}: {exc}") from None
        defaults = {
            s.name: s.train if isinstance(s, CsvFolderSourceConfig) else None
            for s in config.sources
        }
        self.mapper = TagMapper(config.tags, defaults, config.forward.bad_quality == "send")
        self.sources = _build_sources(config) + list(extra_sources)
        names = [s.name for s in self.sources]
        if len(set(names)) != len(names):
            raise BridgeSetupError(f"sources: two sources are named alike ({', '.join(names)})")
        self._dropped_seen = 0
        self._forwarder: Forwarder | None = None

    def sink(self, source: Source) -> Sink:
        """Make the sink one source hands its readings to: map, spool, count, wake the forwarder."""

        def take(readings: Sequence[SourceReading]) -> int:
            mapped = self.mapper.map(source.name, readings)
            result = self.spool.add(mapped.entries)  # SpoolFull: the source keeps or drops them
            self.stats.count(
                read=len(readings),
                unmapped=mapped.unmapped,
                spooled=result.spooled,
                duplicate=result.duplicates,
                withheld=result.withheld,
            )
            if self._forwarder is not None and result.spooled:
                self._forwarder.wake.set()
            return len(readings)

        return take

    def _client(self) -> httpx.AsyncClient:
        service = self.config.service
        return httpx.AsyncClient(
            base_url=service.url,
            headers={"Authorization": f"Bearer {self.api_key}"},
            timeout=service.timeout,
        )

    def status(self, retry_at: float = 0.0) -> str:
        """Log one status line (a warning while the spool is filling); return it."""
        dropped = sum(s.dropped for s in self.sources)
        self.stats.count(dropped=dropped - self._dropped_seen)
        self._dropped_seen = dropped
        counts = self.stats.take_interval()
        pending = self.spool.counts().pending
        oldest = self.spool.oldest_pending_read_at()
        lag = 0.0 if oldest is None else max(0.0, time.time() - oldest)
        self.stats.set_spool(pending, self.spool.fill, lag)
        extra: dict[str, Any] = {}
        if retry_at > time.time():
            extra["service_retry_in"] = f"{retry_at - time.time():.1f} s"
        line = status_line(counts, pending, self.spool.fill, lag, **extra)
        level = logging.WARNING if self.spool.filling else logging.INFO
        log.log(level, line)
        return line

    async def run(self, stop: asyncio.Event) -> None:
        """Run until ``stop`` is set (see the module notes)."""
        metrics_server = self._start_metrics()
        async with self._client() as client:
            forwarder = self._forwarder = Forwarder(
                self.spool, client, self.config.forward, self.stats
            )
            writeback = None
            tasks = [
                asyncio.create_task(s.run(self.sink(s), stop), name=f"source {s.name}")
                for s in self.sources
            ]
            tasks.append(asyncio.create_task(forwarder.run(stop), name="forwarder"))
            tasks.append(asyncio.create_task(self._status_loop(stop), name="status"))
            try:
                if self.config.writeback is not None:
                    writeback = Writeback(self.config.writeback, client, self.spool, self.stats)
                    await writeback.start()
                    tasks.append(asyncio.create_task(writeback.run(stop), name="writeback"))
                log.info(
                    "bridge started: %d source(s), spool %s, service %s",
                    len(self.sources),
                    self.config.spool.path,
                    self.config.service.url,
                )
                await stop.wait()
            finally:
                stop.set()
                done, running = await asyncio.wait(tasks, timeout=30.0)
                for task in running:
                    task.cancel()
                await asyncio.gather(*tasks, return_exceptions=True)
                for task in done:
                    if not task.cancelled() and task.exception() is not None:
                        log.error("%s stopped: %s", task.get_name(), task.exception())
                if writeback is not None:
                    await writeback.close()
                for source in self.sources:
                    await source.close()
                self.status()
                self._forwarder = None
                if metrics_server is not None:
                    metrics_server.shutdown()
                    metrics_server.server_close()
        log.info("bridge stopped")

    async def run_once(self) -> OnceResult:
        """Read every source once, drain the spool, append the write-back file once."""
        failed: list[str] = []
        for source in self.sources:
            try:
                await source.read_once(self.sink(source))
            except Exception as exc:  # one source's trouble must not keep the others back
                failed.append(source.name)
                log.error("source %s: %s", source.name, f"{type(exc).__name__}: {exc}")
            finally:
                await source.close()
        async with self._client() as client:
            forwarder = self._forwarder = Forwarder(
                self.spool, client, self.config.forward, self.stats
            )
            await forwarder.drain(self.config.forward.once_attempts)
            self._forwarder = None
            if self.config.writeback is not None:
                writeback = Writeback(self.config.writeback, client, self.spool, self.stats)
                if self.config.writeback.opcua is not None:
                    log.info("write-back OPC UA server: runs only without --once")
                if self.config.writeback.csv is not None:
                    await writeback.publish_once()
        self.status()
        pending = self.spool.counts().pending
        if pending:
            log.error("%d reading(s) left in the spool for the next run", pending)
        return OnceResult(pending, failed)

    async def _status_loop(self, stop: asyncio.Event) -> None:
        while not stop.is_set():
            try:
                await asyncio.wait_for(stop.wait(), timeout=self.config.status.interval)
            except TimeoutError:
                pass
            if stop.is_set():
                return
            retry_at = self._forwarder.retry_at if self._forwarder is not None else 0.0
            try:
                self.status(retry_at)
                self.spool.prune()
            except Exception:  # a status line must never stop the bridge
                log.exception("status line failed")

    def _start_metrics(self) -> Any:
        port = self.config.status.metrics_port
        if port is None:
            return None
        from prometheus_client import start_http_server

        try:
            host = self.config.status.metrics_host
            server, _ = start_http_server(port, host, self.stats.registry)
        except OSError as exc:
            raise BridgeSetupError(
                f"status.metrics_port: cannot listen on {self.config.status.metrics_host}:{port}: "
                f"{exc.strerror or exc}"
            ) from None
        log.info("metrics at http://%s:%d/metrics", self.config.status.metrics_host, port)
        return server

    def close(self) -> None:
        """Close the spool."""
        self.spool.close()


def configure_logging(json_lines: bool = False) -> None:
    """Log the bridge's lines to stderr (with time and level, or as JSON lines).

    asyncua's own loggers go to the same place at error level only: its
    warnings repeat what the bridge says in its own words.
    """
    from service.metrics import JsonFormatter

    handler = logging.StreamHandler()
    if json_lines:
        handler.setFormatter(JsonFormatter())
    else:
        handler.setFormatter(
            logging.Formatter("%(asctime)s %(levelname)s %(message)s", "%Y-%m-%dT%H:%M:%S%z")
        )
    for name, level in (("stagewatch", logging.INFO), ("asyncua", logging.ERROR)):
        logger = logging.getLogger(name)
        logger.handlers[:] = [handler]
        logger.setLevel(level)
        logger.propagate = False


def run_bridge(config: BridgeConfig, *, once: bool = False) -> int:
    """Run the bridge in this process until stopped (or once); return the exit status.

    Parameters
    ----------
    config : BridgeConfig
        The validated bridge file.
    once : bool
        Read every source once, drain, and return.

    Returns
    -------
    int
        0 on a clean stop or a complete ``--once`` run, 1 when a ``--once`` run
        left readings in the spool or could not read a source.

    Raises
    ------
    BridgeSetupError
        The bridge cannot start (key, spool, folder, secret, metrics port).
    """
    bridge = Bridge(config, read_api_key(config))
    try:
        if once:
            return 0 if asyncio.run(bridge.run_once()).ok else 1
        asyncio.run(_until_signalled(bridge))
        return 0
    finally:
        bridge.close()


async def _until_signalled(bridge: Bridge) -> None:
    stop = asyncio.Event()
    loop = asyncio.get_running_loop()
    for signum in (signal.SIGTERM, signal.SIGINT):
        loop.add_signal_handler(signum, stop.set)
    await bridge.run(stop)
