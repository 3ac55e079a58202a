"""Fixtures for the bridge tests: the real service and a real OPC UA server, on loopback.

- ``service``: ``stagewatch serve`` in a child process (the same ``Server`` the
  service's own kill -9 test uses), SQLite in a temporary folder, once per
  session. Each test registers its own copy of the demo train (``train``), so
  tests never see each other's readings. A test may stop and start the service
  (same port, same database).
- ``plant``: an asyncua server with NoSecurity on a free port, once per session,
  changing values every 0.1 s (see ``tests/bridge/plant.py``).
"""

from __future__ import annotations

import itertools
from collections.abc import Iterator
from pathlib import Path

import pytest

from tests.bridge.plant import PlantServer
from tests.bridge.support import register_train
from tests.service.test_live import Server

_trains = itertools.count(1)


@pytest.fixture(scope="session")
def service(tmp_path_factory: pytest.TempPathFactory) -> Iterator[Server]:
    folder = tmp_path_factory.mktemp("service")
    server = Server(f"sqlite:///{folder / 'stagewatch.db'}", folder)
    server.start()
    try:
        yield server
    finally:
        server.stop()


@pytest.fixture
def train(service: Server) -> str:
    """A fresh copy of the demo train, registered in the service; its name."""
    if service.proc is None or service.proc.poll() is not None:
        service.start()  # a test that stopped the service failed before restarting it
    return register_train(service, f"bridge-{next(_trains)}")


@pytest.fixture(scope="session")
def plant() -> Iterator[PlantServer]:
    server = PlantServer()
    server.start()
    try:
        yield server
    finally:
        server.stop()


@pytest.fixture
def folder(tmp_path: Path) -> Path:
    """A drop folder for CSV exports."""
    path = tmp_path / "incoming"
    path.mkdir()
    return path
