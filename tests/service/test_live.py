"""The real service on loopback: kill -9 and restart lose nothing; the live stream."""

from __future__ import annotations

import json
import os
import signal
import socket
import subprocess
import sys
import threading
import time
from collections.abc import Iterator
from pathlib import Path

import httpx
import numpy as np
import pytest

from estimator.config import load_train_config
from estimator.session import TrainSession
from tests.service.test_app import ADMIN, DEMO, URL, demo_readings

AUTH = {"Authorization": f"Bearer {ADMIN}"}


def free_port() -> int:
    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        return int(s.getsockname()[1])


class Server:
    """``stagewatch serve`` in a child process."""

    def __init__(self, database_url: str, data_dir: Path) -> None:
        self.port = free_port()
        self.base = f"http://127.0.0.1:{self.port}"
        self.env = {
            **os.environ,
            "STAGEWATCH_DATABASE_URL": database_url,
            "STAGEWATCH_DATA_DIR": str(data_dir),
            "STAGEWATCH_BOOTSTRAP_KEY": ADMIN,
            "STAGEWATCH_PORT": str(self.port),
            "STAGEWATCH_CHECKPOINT_EVERY": "1800",
        }
        self.log = data_dir / "service.log"
        self.proc: subprocess.Popen[bytes] | None = None

    def start(self) -> None:
        command = [sys.executable, "-m", "service.cli", "serve", "--train", str(DEMO)]
        with self.log.open("ab") as log:
            self.proc = subprocess.Popen(command, env=self.env, stderr=log, stdout=log)
        deadline = time.monotonic() + 120.0  # numba may compile on a cold cache
        while time.monotonic() < deadline:
            if self.proc.poll() is not None:
                raise RuntimeError(self.log.read_text())
            try:
                if httpx.get(f"{self.base}/readyz", timeout=1.0).status_code == 200:
                    return
            except httpx.HTTPError:
                pass
            time.sleep(0.2)
        raise RuntimeError("service did not become ready")

    def kill(self) -> None:
        assert self.proc is not None
        self.proc.send_signal(signal.SIGKILL)
        self.proc.wait(timeout=10)

    def stop(self) -> None:
        if self.proc is not None and self.proc.poll() is None:
            self.proc.send_signal(signal.SIGTERM)
            try:
                self.proc.wait(timeout=20)
            except subprocess.TimeoutExpired:
                self.proc.kill()


@pytest.fixture
def server(database_url: str, tmp_path: Path) -> Iterator[Server]:
    srv = Server(database_url, tmp_path)
    srv.start()
    try:
        yield srv
    finally:
        srv.stop()


def sse_events(response: httpx.Response) -> Iterator[dict[str, str]]:
    """Server-sent events of a streaming response, as field -> value dicts."""
    event: dict[str, str] = {}
    for line in response.iter_lines():
        if line == "":
            if "data" in event:
                yield event
            event = {}
        elif ":" in line and not line.startswith(":"):
            key, _, value = line.partition(":")
            event[key] = value.strip()


def post_all(base: str, readings: list[dict[str, object]], size: int = 100) -> None:
    with httpx.Client(base_url=base, headers=AUTH, timeout=30.0) as client:
        for k in range(0, len(readings), size):
            r = client.post(f"{URL}/readings", json={"readings": readings[k : k + size]})
            assert r.status_code == 200, r.text
            assert r.json()["refused"] == [], r.text


def test_kill_9_mid_stream_loses_no_accepted_reading(server: Server):
    # Accepted readings are journaled before the answer; a restart restores the last
    # checkpoint and replays the journal after it, so the estimates continue exactly
    # as an uninterrupted session's.
    readings = demo_readings(6.0, time.time())
    half = len(readings) // 2
    post_all(server.base, readings[:half])
    server.kill()
    server.start()
    post_all(server.base, readings[half:])
    latest = httpx.get(f"{server.base}{URL}/estimates/latest", headers=AUTH).json()
    session = TrainSession(load_train_config(DEMO))
    out = session.ingest(
        [str(r["tag"]) for r in readings],
        [float(r["time"]) for r in readings],  # type: ignore[arg-type]
        [float(r["value"]) for r in readings],  # type: ignore[arg-type]
    )
    assert latest["time"] == pytest.approx(out.estimates.time[-1], abs=1e-6)
    got = [v["concentration"]["glucose"]["value"] for v in latest["vessels"]]
    np.testing.assert_allclose(got, out.estimates.concentration[-1, :, 0], rtol=1e-9)
    assert latest["activity"]["value"] == pytest.approx(out.estimates.activity[-1], rel=1e-9)


def test_live_stream_sends_new_estimates_and_resumes_from_last_event_id(server: Server):
    readings = demo_readings(2.0, time.time())
    post_all(server.base, readings[:400])
    events: list[dict[str, str]] = []
    done = threading.Event()

    def listen() -> None:
        with httpx.stream("GET", f"{server.base}{URL}/stream", headers=AUTH, timeout=30.0) as r:
            for event in sse_events(r):
                events.append(event)
                if len(events) >= 3:
                    done.set()
                    return

    listener = threading.Thread(target=listen, daemon=True)
    listener.start()
    time.sleep(1.0)
    post_all(server.base, readings[400:])
    assert done.wait(30.0)
    first = events[0]
    assert first["event"] == "estimate"
    assert json.loads(first["data"])["time"] == pytest.approx(float(first["id"]))
    # Reconnecting with Last-Event-ID sends what came after that estimate, at once.
    headers = {**AUTH, "Last-Event-ID": first["id"]}
    with httpx.stream("GET", f"{server.base}{URL}/stream", headers=headers, timeout=30.0) as r:
        for line in r.iter_lines():
            if line.startswith("id:"):
                assert float(line[3:]) > float(first["id"])
                break


def test_live_demo_serves_the_demo_train_and_feeds_it(tmp_path: Path):
    from service.live_demo import run_live_demo

    result = run_live_demo(
        port=free_port(), speed=50_000.0, data_dir=tmp_path / "demo", stop_after=6.0, echo=False
    )
    assert int(result["posted"]) > 1000  # type: ignore[call-overload]
    assert (tmp_path / "demo" / "stagewatch.db").exists()
