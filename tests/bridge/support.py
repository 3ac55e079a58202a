"""What the bridge tests share besides fixtures: bridge files, the journal, a proxy."""

from __future__ import annotations

import http.server
import json
import os
import signal
import sqlite3
import subprocess
import sys
import threading
import time
from collections.abc import Callable, Iterable, Mapping
from pathlib import Path
from typing import Any

import httpx

from tests.service.test_app import ADMIN, DEMO
from tests.service.test_live import Server, free_port

KEY_ENV = "STAGEWATCH_BRIDGE_TEST_KEY"


def _toml_value(value: Any) -> str:
    if isinstance(value, bool):
        return "true" if value else "false"
    if isinstance(value, int | float):
        return repr(value)
    if isinstance(value, str | Path):
        return json.dumps(str(value))
    if isinstance(value, list):
        return "[" + ", ".join(_toml_value(v) for v in value) + "]"
    if isinstance(value, dict):
        pairs = (f"{json.dumps(k)} = {_toml_value(v)}" for k, v in value.items())
        return "{" + ", ".join(pairs) + "}"
    raise TypeError(f"cannot write {value!r} as TOML")


def toml_text(data: Mapping[str, Any]) -> str:
    """Write a bridge file: top-level tables and arrays of tables of plain values."""
    lines: list[str] = []
    for name, section in data.items():
        if isinstance(section, list):
            for item in section:
                lines.append(f"[[{name}]]")
                lines += [f"{k} = {_toml_value(v)}" for k, v in item.items()]
        else:
            lines.append(f"[{name}]")
            nested = {k: v for k, v in section.items() if isinstance(v, dict)}
            lines += [f"{k} = {_toml_value(v)}" for k, v in section.items() if k not in nested]
            for sub, table in nested.items():
                lines.append(f"[{name}.{sub}]")
                lines += [f"{k} = {_toml_value(v)}" for k, v in table.items()]
    return "\n".join(lines) + "\n"


def base_config(service: Server, folder: Path, **sections: Any) -> dict[str, Any]:
    """A bridge file's content: the service, a spool in ``folder``, quick retries."""
    data: dict[str, Any] = {
        # A generous timeout: a cold service compiles its filter on the first batch, and
        # a timed-out post would be posted again (harmless, but it changes the counts).
        "service": {"url": service.base, "key_env": KEY_ENV, "timeout": "120 s"},
        "spool": {"path": str(folder / "spool.db")},
        "forward": {"retry_initial": "0.1 s", "retry_max": "0.5 s", "once_attempts": 2},
        "status": {"interval": "0.5 s"},
    }
    for name, value in sections.items():
        if isinstance(value, dict) and isinstance(data.get(name), dict):
            data[name] = {**data[name], **value}
        else:
            data[name] = value
    return data


def register_train(service: Server, name: str) -> str:
    """Register a copy of the demo train under ``name``; return the name."""
    text = DEMO.read_text().replace('name = "wrenfield-line2"', f'name = "{name}"', 1)
    r = httpx.post(
        f"{service.base}/api/v1/trains",
        json={"toml": text},
        headers={"Authorization": f"Bearer {ADMIN}"},
        timeout=30.0,
    )
    assert r.status_code == 201, r.text
    return name


def service_database(service: Server) -> Path:
    return Path(service.env["STAGEWATCH_DATABASE_URL"].removeprefix("sqlite:///"))


def journal(service: Server, train: str) -> list[tuple[str, float, float, int | None]]:
    """The service's journal of one train: (tag, time, value, quality), in journal order."""
    with sqlite3.connect(f"file:{service_database(service)}?mode=ro", uri=True) as db:
        rows = db.execute(
            "SELECT r.tag, r.time, r.value, r.quality FROM readings r "
            "JOIN trains t ON r.train_id = t.id WHERE t.name = ? ORDER BY r.id",
            (train,),
        ).fetchall()
    return [(str(a), float(b), float(c), d) for a, b, c, d in rows]


def service_counter(service: Server, name: str) -> float:
    """A counter from the service's /metrics (e.g. ``stagewatch_readings_accepted_total``)."""
    text = httpx.get(
        f"{service.base}/metrics", headers={"Authorization": f"Bearer {ADMIN}"}, timeout=30.0
    ).text
    for line in text.splitlines():
        if line.startswith(name + " "):
            return float(line.split()[1])
    raise AssertionError(f"{name} not in the service's metrics")


def spool_rows(path: Path, state: str | None = None) -> list[dict[str, Any]]:
    """Rows of a spool another process may hold (read-only; WAL lets us read)."""
    with sqlite3.connect(f"file:{path}?mode=ro", uri=True) as db:
        db.row_factory = sqlite3.Row
        where, params = ("WHERE state = ?", (state,)) if state else ("", ())
        rows = db.execute(f"SELECT * FROM readings {where} ORDER BY id", params).fetchall()
    return [dict(r) for r in rows]


def spool_batches(path: Path) -> list[dict[str, Any]]:
    with sqlite3.connect(f"file:{path}?mode=ro", uri=True) as db:
        db.row_factory = sqlite3.Row
        return [dict(r) for r in db.execute("SELECT * FROM batches ORDER BY id")]


def write_long_csv(path: Path, readings: Iterable[Mapping[str, Any]]) -> None:
    """Long form, epoch times and values written exactly (repr)."""
    lines = ["tag,time,value"]
    lines += [f"{r['tag']},{r['time']!r},{r['value']!r}" for r in readings]
    tmp = path.with_suffix(".tmp")
    tmp.write_text("\n".join(lines) + "\n")
    tmp.rename(path)  # appears whole, as a historian's export should


def wait_for(condition: Callable[[], bool], what: str, timeout: float = 90.0) -> None:
    """Poll ``condition`` every 50 ms; fail if it has not held after ``timeout`` [s].

    The timeout only keeps a broken run from hanging; no test depends on speed.
    """
    deadline = time.monotonic() + timeout
    while not condition():
        if time.monotonic() > deadline:
            raise AssertionError(f"timed out waiting for {what}")
        time.sleep(0.05)


class BridgeProcess:
    """``stagewatch bridge`` in a child process, its log in a file."""

    def __init__(self, config: Path, log: Path, once: bool = False) -> None:
        command = [sys.executable, "-m", "service.cli", "bridge", "--config", str(config)]
        if once:
            command.append("--once")
        env = {**os.environ, KEY_ENV: ADMIN}
        with log.open("ab") as out:
            self.proc = subprocess.Popen(command, env=env, stdout=out, stderr=out)
        self.log = log

    def text(self) -> str:
        return self.log.read_text(errors="replace")

    def terminate(self) -> int:
        if self.proc.poll() is None:
            self.proc.send_signal(signal.SIGTERM)
        return self.proc.wait(timeout=60)

    def kill(self) -> None:
        self.proc.send_signal(signal.SIGKILL)

    def kill_if_running(self) -> None:
        """Clean-up after a failed test: no bridge outlives it."""
        if self.proc.poll() is None:
            self.kill()
        self.proc.wait(timeout=30)


class KillingProxy:
    """An HTTP proxy in front of the service that SIGKILLs a bridge on chosen posts.

    ``kill_before[n]``: the n-th post (from 1) never reaches the service; the bridge
    dies waiting. ``kill_after[n]``: the n-th post reaches the service, which
    journals it and answers, but the bridge dies before it hears the answer.
    """

    def __init__(self, target: str) -> None:
        self.target = target
        self.port = free_port()
        self.base = f"http://127.0.0.1:{self.port}"
        self.posts = 0
        self.victim: BridgeProcess | None = None
        self.kill_before: set[int] = set()
        self.kill_after: set[int] = set()
        self.killed: list[tuple[int, str]] = []
        self._client = httpx.Client(base_url=target, timeout=30.0)
        proxy = self

        class Handler(http.server.BaseHTTPRequestHandler):
            def log_message(self, format: str, *args: Any) -> None:
                pass

            def _relay(self, method: str) -> None:
                length = int(self.headers.get("Content-Length", "0"))
                body = self.rfile.read(length) if length else b""
                number = 0
                if method == "POST":
                    proxy.posts += 1
                    number = proxy.posts
                if number in proxy.kill_before:
                    proxy._kill(number, "before")
                    self.close_connection = True
                    return
                wanted = ("authorization", "content-type")
                headers = {k: v for k, v in self.headers.items() if k.lower() in wanted}
                answer = proxy._client.request(method, self.path, content=body, headers=headers)
                if number in proxy.kill_after:
                    proxy._kill(number, "after")
                    self.close_connection = True
                    return
                self.send_response(answer.status_code)
                self.send_header("Content-Type", answer.headers.get("content-type", "text/plain"))
                self.send_header("Content-Length", str(len(answer.content)))
                self.end_headers()
                self.wfile.write(answer.content)

            def do_POST(self) -> None:
                self._relay("POST")

            def do_GET(self) -> None:
                self._relay("GET")

        self._server = http.server.ThreadingHTTPServer(("127.0.0.1", self.port), Handler)
        self._thread = threading.Thread(target=self._server.serve_forever, daemon=True)
        self._thread.start()

    def _kill(self, number: int, when: str) -> None:
        assert self.victim is not None
        self.victim.kill()
        self.victim.proc.wait(timeout=30)
        self.killed.append((number, when))

    def close(self) -> None:
        self._server.shutdown()
        self._server.server_close()
        self._client.close()
