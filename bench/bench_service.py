"""Benchmark: the REST service under load, beside a bare FastAPI endpoint in the same run.

Everything runs on loopback (127.0.0.1) against servers this script starts and
stops itself, each one uvicorn worker (uvicorn[standard]: uvloop and httptools),
with a SQLite database in a temporary folder (nothing is kept). Load comes from
``wrk`` (Debian's package; ``bash scripts/system-deps.sh --bench`` installs it)
with the Lua scripts in bench/wrk/, and from a small asyncio client in this file
where a fixed rate or a fixed schedule is needed (wrk cannot hold a rate). That
client speaks keep-alive HTTP/1.1 over asyncio streams instead of using httpx: on
a two-core machine httpx's own work per request (a millisecond or so) would show
up in the latencies it measures and cannot reach 1,000 requests/s.

Measured, in this order, each printed with its target:

0. In this process, first (it also brings numba's kernels into their on-disk
   cache, so that no server compiles on its first request): the memory one
   train's estimator holds at its full history horizon, the size and time of its
   checkpoint, and the time of one more second of readings there.
1. The ceiling: a bare FastAPI app defined here (one ``async def`` POST endpoint
   taking a small pydantic body and returning a small JSON), hammered by wrk;
   requests/s. The asyncio client also sends it 200 requests/s, so that the
   latency the client itself adds is known.
2. Bulk ingest into the real service (``python -m service.cli serve --train
   replay_data/wrenfield/train.toml``, a bootstrap key): wrk posts 100 readings
   per request, every request with new readings (bench/wrk/ingest.lua: one time
   point per second of reading time, FI-200, TI-201, TI-202 at each, AI-200G every
   2 min and AI-203G every 4 min of reading time, values near the demo's
   operating point, times strictly increasing and a week back so that none is in
   the future). Readings accepted per second, summed from the responses' own
   ``accepted`` counts and checked against the journal in the database
   afterwards. Target >= 20,000 readings/s.
3. Single-reading posts: at a steady 200 per second for 20 s from the asyncio
   client, after 5 s at the same rate while the trains' filters start (printed
   apart), latency counted from each request's scheduled send time (so a slow
   server cannot hide its backlog); target p99 < 25 ms. Then the most single
   posts per second wrk gets, and its ratio to the bare ceiling. Single posts
   come as a plant sends them, each tag of a train once a second of reading time
   (FI-200, TI-201, TI-202, AI-200G in turn, a time point every 0.25 s): the
   steady 200/s feeds 50 copies of the demo train in real time (reading time =
   the request's due wall time, 4 posts/s each); wrk, which keeps one time cursor,
   feeds one copy starting a week back, as fast as it answers. (One train fed 200
   readings a second of its own reading time is no plant's load: every product-
   analyzer reading then reruns 48,000 events of its 4-minute dead time.)
4. 1,000 trains live: a fresh server, 1,000 copies of the demo train registered
   through POST /api/v1/trains (wrenfield-b0000, ...), then every train's six tags
   once per second of wall time for 30 s (each second, 1,000 requests of 6
   readings from 16 connections). Reported: the server process's VmRSS and VmHWM
   (/proc/<pid>/status), whether the feed kept up, and how fast the server took
   it. Target RSS < 1 GB. A train registered seconds ago has little history; so
   that the figure is not mistaken for a steady state, the script then measures
   one train's request cost once its product analyzer's 4-minute dead time is
   inside its history (a train fed 7 minutes of readings first, through the
   server), and prints what that and part 0 imply for 1,000 trains, labelled as
   extrapolations.

Beside the service's figures, the script reads the service's /metrics counters
and prints how many estimate rows the service wrote per accepted reading
(revisions included: rows the estimator emitted again after running over them
once more), the figure that explains most of the cost per request.

Run ``python bench/bench_service.py`` (or ``make bench``); about 3 minutes. The
options shorten or lengthen each part (``--help``).
"""

from __future__ import annotations

import argparse
import asyncio
import json
import math
import os
import re
import secrets
import shutil
import signal
import socket
import sqlite3
import subprocess
import sys
import tempfile
import time
from collections import Counter
from collections.abc import Callable, Iterator, Sequence
from contextlib import contextmanager
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

from pydantic import BaseModel

REPO = Path(__file__).resolve().parent.parent
sys.path.insert(0, str(REPO))

TRAIN = REPO / "replay_data" / "wrenfield" / "train.toml"
DEMO = "wrenfield-line2"
WRK = Path(__file__).resolve().parent / "wrk"
HOST = "127.0.0.1"
API = "/api/v1"

TARGET_BULK = 20_000.0  # accepted readings/s
TARGET_P99 = 0.025  # s, single posts at a steady 200/s
TARGET_RSS = 1e9  # bytes, 1,000 trains live

# Operating point and 1-sigma noise of each tag, in its declared unit (train.toml):
# m^3/h, degC, degC, mol/m^3 (feed glucose), mol/m^3 (glucose leaving R-203),
# mol/m^3 (fructose in R-202, lab). The same numbers as bench/wrk/ingest.lua.
LEVEL = {
    "FI-200": (12.0, 0.06),
    "TI-201": (58.0, 0.1),
    "TI-202": (58.0, 0.1),
    "AI-200G": (2400.0, 25.0),
    "AI-203G": (1290.0, 20.0),
    "LAB-202F": (1020.0, 12.0),
}
SINGLE_TAGS = ("FI-200", "TI-201", "TI-202", "AI-200G")
# Single posts come as a plant sends them: each of a train's four rotating tags once
# a second of reading time, so one time point every 0.25 s.
SINGLE_STEP = 0.25  # s of reading time between a train's single posts
RATE_TRAINS = 50  # trains sharing the steady single-post rate (4 posts/s each at 200/s)


# ---------------------------------------------------------------------------- bare app


class BareReading(BaseModel):
    """The bare endpoint's body: one reading."""

    tag: str
    time: float
    value: float


def bare_app() -> Any:
    """Build the ceiling: one ``async def`` POST endpoint taking a small pydantic body."""
    from fastapi import FastAPI

    app = FastAPI()

    @app.post("/bare")
    async def bare(reading: BareReading) -> dict[str, int]:
        """Take one reading; answer how many were taken."""
        return {"accepted": 1}

    return app


def serve_bare(port: int) -> None:
    """Run the bare app as the service runs (``uvicorn.run``, one worker, warnings only)."""
    import uvicorn

    uvicorn.run(bare_app(), host=HOST, port=port, log_level="warning")


# ---------------------------------------------------------------------------- servers


def free_port() -> int:
    """Return a TCP port free on loopback now."""
    with socket.socket() as s:
        s.bind((HOST, 0))
        return int(s.getsockname()[1])


class Server:
    """A server in a child process, on loopback; stopped by :meth:`stop`.

    Parameters
    ----------
    command : list of str
        The child's command line.
    env : dict
        Its environment.
    log : pathlib.Path
        File for its standard output and error.
    port : int
        The port it listens on.
    """

    def __init__(self, command: list[str], env: dict[str, str], log: Path, port: int) -> None:
        self.command = command
        self.env = env
        self.log = log
        self.port = port
        self.base = f"http://{HOST}:{port}"
        self.proc: subprocess.Popen[bytes] | None = None

    @property
    def pid(self) -> int:
        """Process id of the running server."""
        assert self.proc is not None
        return self.proc.pid

    def start(self, ready: str, timeout: float = 180.0) -> float:
        """Start the child and wait until ``ready`` answers 200; return the seconds taken."""
        import httpx

        began = time.perf_counter()
        with self.log.open("ab") as log:
            self.proc = subprocess.Popen(
                self.command, env=self.env, stdout=log, stderr=log, cwd=REPO
            )
        deadline = time.monotonic() + timeout  # numba may compile on a cold cache
        while time.monotonic() < deadline:
            if self.proc.poll() is not None:
                raise RuntimeError(f"server exited:\n{self.log.read_text()[-3000:]}")
            try:
                if httpx.get(self.base + ready, timeout=1.0).status_code == 200:
                    return time.perf_counter() - began
            except httpx.HTTPError:
                pass
            time.sleep(0.1)
        self.stop()
        raise RuntimeError(f"server not ready after {timeout:g} s")

    def stop(self, timeout: float = 20.0) -> None:
        """SIGTERM, then SIGKILL if it is still running after ``timeout`` seconds."""
        if self.proc is None or self.proc.poll() is not None:
            return
        self.proc.send_signal(signal.SIGTERM)
        try:
            self.proc.wait(timeout=timeout)
        except subprocess.TimeoutExpired:
            self.proc.kill()
            self.proc.wait(timeout=10)

    def memory(self) -> tuple[int, int]:
        """(VmRSS, VmHWM) of the server process [bytes]."""
        values = {}
        with open(f"/proc/{self.pid}/status") as status:
            for line in status:
                name, _, rest = line.partition(":")
                if name in ("VmRSS", "VmHWM"):
                    values[name] = int(rest.split()[0]) * 1024
        return values["VmRSS"], values["VmHWM"]

    def cpu_seconds(self) -> float:
        """CPU time the server process has used (user + system) [s]."""
        with open(f"/proc/{self.pid}/stat") as stat:
            fields = stat.read().rpartition(")")[2].split()
        return (int(fields[11]) + int(fields[12])) / os.sysconf("SC_CLK_TCK")

    def wait_idle(self, timeout: float = 60.0) -> float:
        """Wait until the server uses under 5 % of a core (work queued before is done).

        Returns the seconds waited; gives up after ``timeout``.
        """
        began = time.monotonic()
        last = self.cpu_seconds()
        while time.monotonic() - began < timeout:
            time.sleep(0.5)
            now = self.cpu_seconds()
            if now - last < 0.025:
                break
            last = now
        return time.monotonic() - began


def service_env(data: Path, port: int, key: str) -> dict[str, str]:
    """Return the service's environment: this run's STAGEWATCH_* settings, the numba cache."""
    env = {k: v for k, v in os.environ.items() if not k.startswith("STAGEWATCH_")}
    env.update(
        STAGEWATCH_CACHE_DIR=os.environ.get("STAGEWATCH_CACHE_DIR", str(REPO / ".cache")),
        STAGEWATCH_DATA_DIR=str(data),
        STAGEWATCH_DATABASE_URL=f"sqlite:///{data / 'stagewatch.db'}",
        STAGEWATCH_BOOTSTRAP_KEY=key,
        STAGEWATCH_HOST=HOST,
        STAGEWATCH_PORT=str(port),
    )
    env["PYTHONPATH"] = str(REPO) + os.pathsep + env.get("PYTHONPATH", "")
    return env


def start_service(folder: Path, key: str) -> tuple[Server, float]:
    """Start ``stagewatch serve`` with the demo train, data in ``folder``; (server, start s)."""
    folder.mkdir(parents=True)
    port = free_port()
    command = [sys.executable, "-m", "service.cli", "serve", "--train", str(TRAIN)]
    server = Server(command, service_env(folder, port, key), folder / "service.log", port)
    return server, server.start("/readyz")


def journal_count(database: Path, train: str) -> int:
    """Count the readings journaled for ``train``, straight from the SQLite file."""
    with sqlite3.connect(f"file:{database}?mode=ro", uri=True, timeout=30.0) as db:
        row = db.execute(
            "SELECT count(*) FROM readings r JOIN trains t ON r.train_id = t.id WHERE t.name = ?",
            (train,),
        ).fetchone()
    return int(row[0])


def server_counts(server: Server, key: str) -> tuple[float, float] | None:
    """Return (readings accepted, estimate rows produced) from the service's /metrics.

    Estimate rows include revisions: rows the estimator emitted again after a late
    reading made it run over them once more. None when /metrics does not say.
    """
    import httpx

    try:
        text = httpx.get(
            server.base + "/metrics", headers={"Authorization": f"Bearer {key}"}, timeout=60.0
        ).text
    except httpx.HTTPError:
        return None
    found = {}
    for line in text.splitlines():
        name, _, value = line.partition(" ")
        if name in ("stagewatch_readings_accepted_total", "stagewatch_estimates_total"):
            found[name] = float(value)
    if len(found) != 2:
        return None
    return found["stagewatch_readings_accepted_total"], found["stagewatch_estimates_total"]


def rows_per_reading(before: tuple[float, float] | None, after: tuple[float, float] | None) -> str:
    """Describe estimate rows written per accepted reading between two counts, for people."""
    if before is None or after is None or after[0] <= before[0]:
        return "estimate rows per reading: not known (no /metrics counters)"
    rows = after[1] - before[1]
    return (
        f"the server wrote {rows:,.0f} estimate rows, {rows / (after[0] - before[0]):.1f} "
        "per accepted reading"
    )


def demo_toml(name: str) -> str:
    """Return the demo train's TOML with another train name."""
    text = TRAIN.read_text()
    renamed, count = re.subn(r'(?m)^name = "[^"]*"', f'name = "{name}"', text, count=1)
    if count != 1:
        raise RuntimeError(f"no train name line in {TRAIN}")
    return renamed


# ---------------------------------------------------------------------------- wrk


@dataclass
class WrkResult:
    """What one wrk run reported (from the WRKJSON line of bench/wrk/*.lua)."""

    seconds: float
    requests: int
    ok: int
    bad: int
    refusing: int
    accepted: int
    points: int
    socket_errors: int
    p50: float
    p99: float
    worst: float
    first_bad: str

    @property
    def rate(self) -> float:
        """Completed requests per second."""
        return self.requests / self.seconds


def run_wrk(
    url: str, script: str, seconds: float, connections: int, args: Sequence[str] = ()
) -> WrkResult:
    """Run wrk with one thread (the Lua scripts keep one time cursor) and parse its totals."""
    command = [
        "wrk", "-t1", f"-c{connections}", f"-d{seconds:g}s", "--timeout", "30s",
        "-s", str(WRK / script), url,
    ]  # fmt: skip
    if args:
        command += ["--", *args]
    done = subprocess.run(
        command, capture_output=True, text=True, timeout=seconds + 90, check=False
    )
    line = next((x for x in done.stdout.splitlines() if x.startswith("WRKJSON ")), None)
    if done.returncode != 0 or line is None:
        raise RuntimeError(f"wrk failed ({done.returncode}):\n{done.stdout}\n{done.stderr}")
    d = json.loads(line.removeprefix("WRKJSON "))
    return WrkResult(
        seconds=d["duration_us"] / 1e6,
        requests=d["requests"],
        ok=d["ok"],
        bad=d["bad"],
        refusing=d["refusing"],
        accepted=d["accepted"],
        points=d["points"],
        socket_errors=d["socket_errors"],
        p50=d["p50_us"] / 1e6,
        p99=d["p99_us"] / 1e6,
        worst=d["max_us"] / 1e6,
        first_bad=d["first_bad"],
    )


# ---------------------------------------------------------------------------- asyncio client

_LENGTH = re.compile(rb"\r\ncontent-length:[ \t]*(\d+)", re.IGNORECASE)


class Http:
    """One keep-alive HTTP/1.1 connection to the server: a request, then its answer.

    Parameters
    ----------
    port : int
        The server's port on 127.0.0.1.
    key : str
        API key sent as a bearer token.
    """

    def __init__(self, port: int, key: str) -> None:
        self.port = port
        self.key = key
        self.reader: asyncio.StreamReader | None = None
        self.writer: asyncio.StreamWriter | None = None

    async def open(self) -> None:
        """Connect (with TCP_NODELAY, as asyncio sets it)."""
        self.reader, self.writer = await asyncio.open_connection(HOST, self.port)

    def close(self) -> None:
        """Close the connection."""
        if self.writer is not None:
            self.writer.close()
            self.writer = None

    async def post(self, path: str, body: bytes, timeout: float = 120.0) -> tuple[int, bytes]:
        """POST a JSON body; return (status, response body). TimeoutError after ``timeout`` s."""
        if self.writer is None:
            await self.open()
        assert self.reader is not None and self.writer is not None
        head = (
            f"POST {path} HTTP/1.1\r\nHost: {HOST}\r\nAuthorization: Bearer {self.key}\r\n"
            f"Content-Type: application/json\r\nContent-Length: {len(body)}\r\n\r\n"
        )
        self.writer.write(head.encode("ascii") + body)
        try:
            async with asyncio.timeout(timeout):
                answer = await self.reader.readuntil(b"\r\n\r\n")
                length = _LENGTH.search(answer)
                if length is None:
                    raise RuntimeError(f"an answer without Content-Length: {answer[:200]!r}")
                content = await self.reader.readexactly(int(length.group(1)))
        except BaseException:
            self.close()  # half-read: never reuse
            raise
        return int(answer[9:12]), content


def run_async(coroutine: Any) -> Any:
    """Run a coroutine on uvloop when it is installed (it is, with uvicorn[standard])."""
    try:
        import uvloop
    except ImportError:
        return asyncio.run(coroutine)
    with asyncio.Runner(loop_factory=uvloop.new_event_loop) as runner:
        return runner.run(coroutine)


def reading_json(tag: str, t: float, rng: Any) -> str:
    """One reading near the operating point, as JSON text."""
    level, sigma = LEVEL[tag]
    return f'{{"tag":"{tag}","time":{t:.3f},"value":{level + sigma * rng.gauss():.4f}}}'


def batch_body(readings: Sequence[str]) -> bytes:
    """Build a readings request body from readings' JSON texts."""
    return ('{"readings":[' + ",".join(readings) + "]}").encode()


@dataclass
class Tally:
    """Answers to ingest requests, added up."""

    completed: int = 0
    accepted: int = 0
    bad: int = 0
    first_bad: str = ""
    refused: Counter[str] = field(default_factory=Counter)

    def add(self, status: int, body: bytes) -> None:
        """Count one answer."""
        self.completed += 1
        if status != 200:
            self.bad += 1
            self.first_bad = self.first_bad or f"{status} {body[:300]!r}"
            return
        answer = json.loads(body)
        self.accepted += answer["accepted"]
        for r in answer["refused"]:
            self.refused[f"{r['tag']}: {r['reason']}"] += 1


def percentile(ordered: Sequence[float], q: float) -> float:
    """Nearest-rank percentile of sorted values (inf counts as a request never answered)."""
    if not ordered:
        return math.nan
    return ordered[max(0, math.ceil(q / 100.0 * len(ordered)) - 1)]


@dataclass
class RateResult:
    """A fixed-rate run: latencies from the scheduled send times, sorted (inf: no answer)."""

    scheduled: int
    seconds: float
    latencies: list[float]
    tally: Tally
    most_in_flight: int

    @property
    def answered(self) -> int:
        """Requests answered before the run gave up waiting."""
        return sum(1 for x in self.latencies if math.isfinite(x))


async def constant_rate(
    port: int,
    key: str,
    path: str | Callable[[int], str],
    body_for: Callable[[int, float], bytes],
    rate: float,
    seconds: float,
    connections: int,
    drain: float,
    on_answer: Callable[[int, float, float, int, bytes], None] | None = None,
) -> RateResult:
    """Send ``rate`` requests per second for ``seconds``, on schedule, whatever the answers.

    Request i is due at start + i / rate; it goes to ``path`` (or ``path(i)``) with
    the body ``body_for(i, due wall time)``.
    A request waits for a free connection when all ``connections`` are busy, and
    that wait counts in its latency, which runs from its due time to its answer.
    Requests unanswered ``drain`` seconds after the last is due count as infinite.
    ``on_answer``, when given, is called with each answer as it arrives: (i, due
    time, answer time, status, body), both times on ``time.perf_counter``'s clock [s].
    """
    conns = [Http(port, key) for _ in range(connections)]
    await asyncio.gather(*(c.open() for c in conns))
    pool: asyncio.Queue[Http] = asyncio.Queue()
    for c in conns:
        pool.put_nowait(c)
    n = max(1, round(rate * seconds))
    latencies = [math.inf] * n
    tally = Tally()
    in_flight = 0
    most = 0
    clock = time.perf_counter  # the loop's clock may be cached per iteration (uvloop: 1 ms)
    begin = clock() + 0.2
    wall = time.time() + (begin - clock())

    async def one(i: int, due: float) -> None:
        nonlocal in_flight, most
        in_flight += 1
        most = max(most, in_flight)
        conn = await pool.get()
        try:
            target = path(i) if callable(path) else path
            status, body = await conn.post(target, body_for(i, wall + (due - begin)))
            answered = clock()
            latencies[i] = answered - due
            tally.add(status, body)
            if on_answer is not None:
                on_answer(i, due, answered, status, body)
        finally:
            in_flight -= 1
            pool.put_nowait(conn)

    tasks = []
    for i in range(n):
        due = begin + i / rate
        wait = due - clock()
        if wait > 0:
            await asyncio.sleep(wait)
        tasks.append(asyncio.create_task(one(i, due)))
    _, pending = await asyncio.wait(tasks, timeout=drain)
    for task in pending:
        task.cancel()
    await asyncio.gather(*tasks, return_exceptions=True)
    for c in conns:
        c.close()
    return RateResult(n, n / rate, sorted(latencies), tally, most)


async def post_many(
    port: int, key: str, requests: Sequence[tuple[str, bytes]], connections: int, budget: float
) -> tuple[list[int | None], float]:
    """POST each (path, body) from a few connections, in order, within ``budget`` seconds.

    Returns each request's status (None: not sent in time) and the seconds taken.
    """
    loop = asyncio.get_running_loop()
    began = loop.time()
    statuses: list[int | None] = [None] * len(requests)
    items = iter(enumerate(requests))

    async def worker() -> None:
        conn = Http(port, key)
        try:
            for i, (path, body) in items:
                if loop.time() - began > budget:
                    return
                statuses[i], _ = await conn.post(path, body)
        finally:
            conn.close()

    await asyncio.gather(*(worker() for _ in range(connections)))
    return statuses, loop.time() - began


@dataclass
class FeedResult:
    """A live feed of many trains at one request per train per second."""

    trains: int
    seconds: int
    sent: int
    tally: Tally
    latencies: list[float]
    tick_lag: list[float]
    elapsed: float

    @property
    def kept_up(self) -> bool:
        """Every second's requests were all answered within that second."""
        return all(math.isfinite(x) and x <= 1.0 for x in self.tick_lag)


async def feed_trains(
    port: int, key: str, names: Sequence[str], seconds: int, connections: int, drain: float
) -> FeedResult:
    """Each second of wall time, one request per train with its six tags at that second.

    The schedule does not wait for the server: a second's requests are queued at
    their time even if earlier ones are still waiting. After the last second the
    queue may drain for ``drain`` seconds; what is left is not sent.
    """
    import random

    rng = random.Random(7)
    paths = [f"{API}/trains/{n}/readings" for n in names]
    wall0 = math.floor(time.time()) + 1.0
    clock = time.perf_counter  # the loop's clock may be cached per iteration (uvloop: 1 ms)
    begin = clock() + (wall0 - time.time())
    queue: asyncio.Queue[tuple[int, int]] = asyncio.Queue()
    left = [len(names)] * seconds
    tick_lag = [math.inf] * seconds
    latencies: list[float] = []
    tally = Tally()
    sent = 0
    last = begin

    async def worker() -> None:
        nonlocal sent, last
        conn = Http(port, key)
        try:
            while True:
                i, s = await queue.get()
                t = wall0 + s
                body = batch_body([reading_json(tag, t, rng) for tag in LEVEL])
                sent += 1
                status, answer = await conn.post(paths[i], body)
                now = clock()
                last = now
                latencies.append(now - (begin + s))
                tally.add(status, answer)
                left[s] -= 1
                if left[s] == 0:
                    tick_lag[s] = now - (begin + s)
                queue.task_done()
        finally:
            conn.close()

    workers = [asyncio.create_task(worker()) for _ in range(connections)]
    for s in range(seconds):
        wait = begin + s - clock()
        if wait > 0:
            await asyncio.sleep(wait)
        for i in range(len(names)):
            queue.put_nowait((i, s))
    try:
        await asyncio.wait_for(queue.join(), timeout=begin + seconds - clock() + drain)
    except TimeoutError:
        pass
    for w in workers:
        w.cancel()
    for outcome in await asyncio.gather(*workers, return_exceptions=True):
        if not isinstance(outcome, asyncio.CancelledError):
            raise RuntimeError("a feeding connection failed") from outcome
    return FeedResult(len(names), seconds, sent, tally, sorted(latencies), tick_lag, last - begin)


# ---------------------------------------------------------------------------- printing


def mb(n: float) -> str:
    """Bytes as MB (kB below one MB) for people."""
    return f"{n / 1e6:,.0f} MB" if n >= 1e6 else f"{n / 1e3:,.0f} kB"


def ms(s: float) -> str:
    """Seconds as milliseconds for people (inf: a request not answered in time)."""
    return "unanswered" if math.isinf(s) else f"{s * 1e3:,.1f} ms"


def verdict(ok: bool) -> str:
    """'met' or 'NOT met'."""
    return "met" if ok else "NOT met"


@contextmanager
def phase(title: str) -> Iterator[None]:
    """Print a phase's title, then its wall time when it ends."""
    print(f"\n== {title}", flush=True)
    began = time.perf_counter()
    yield
    print(f"   ({time.perf_counter() - began:.0f} s)", flush=True)


def top_refusals(tally: Tally, limit: int = 3) -> str:
    """Return the commonest refusal reasons, for a line of output."""
    return "; ".join(f"{n:,} x {reason}" for reason, n in tally.refused.most_common(limit))


# ---------------------------------------------------------------------------- the parts


def part_bare(folder: Path, args: argparse.Namespace, key: str) -> dict[str, Any]:
    """Part 1: the bare endpoint's ceiling under wrk, and the asyncio client's floor."""
    port = free_port()
    command = [sys.executable, str(Path(__file__).resolve()), "--serve-bare", str(port)]
    env = dict(os.environ)
    server = Server(command, env, folder / "bare.log", port)
    server.start("/docs")
    try:
        run_wrk(server.base + "/bare", "bare.lua", 2, args.connections)  # warm-up
        w = run_wrk(server.base + "/bare", "bare.lua", args.seconds, args.connections)
        body = b'{"tag":"FI-200","time":1767225600.0,"value":12.0}'
        floor = run_async(
            constant_rate(
                port, key, "/bare", lambda i, t: body, args.rate, args.floor_seconds, 64, 10.0
            )
        )
    finally:
        server.stop()
    print(
        f"bare async POST (pydantic body), 1 worker, wrk -c{args.connections}: "
        f"{w.rate:,.0f} req/s (p50 {ms(w.p50)}, p99 {ms(w.p99)}; {w.bad} non-200, "
        f"{w.socket_errors} socket errors)  (the ceiling; no target)"
    )
    print(
        f"bare at a steady {args.rate:g}/s from the asyncio client: p50 "
        f"{ms(percentile(floor.latencies, 50))}, p99 {ms(percentile(floor.latencies, 99))} "
        f"(what the client and a trivial endpoint take; the floor of part 3)"
    )
    return {"bare_rate": w.rate, "floor_p99": percentile(floor.latencies, 99)}


def part_service(folder: Path, args: argparse.Namespace, key: str) -> dict[str, Any]:
    """Parts 2 and 3: bulk ingest, then single posts at a fixed rate and flat out."""
    server, took = start_service(folder, key)
    print(f"service ready in {took:.1f} s (pid {server.pid})")
    database = folder / "stagewatch.db"
    out: dict[str, Any] = {}
    try:
        # Part 2: bulk ingest, 100 readings per request, into the demo train. Warm-up
        # runs start the stream (the first second on one connection: the batch the
        # server takes first starts the train's history, and readings older than
        # that would be refused); the measured run continues it.
        path = f"{API}/trains/{DEMO}/readings"
        start = math.floor(time.time()) - 7 * 86400
        points = 0
        runs = []
        for seconds, connections in ((1.0, 1), (args.warm_up, 8)):
            runs.append(
                run_wrk(
                    server.base, "ingest.lua", seconds, connections,
                    [path, key, str(start + points), "1", "100", "plant"],
                )
            )  # fmt: skip
            points += runs[-1].points
            server.wait_idle()
        before = journal_count(database, DEMO)
        counts = server_counts(server, key)
        w = run_wrk(
            server.base, "ingest.lua", args.seconds, 8,
            [path, key, str(start + points), "1", "100", "plant"],
        )  # fmt: skip
        waited = server.wait_idle()
        amplification = rows_per_reading(counts, server_counts(server, key))
        runs.append(w)
        bad = sum(x.bad for x in runs)
        refusing = sum(x.refusing for x in runs)
        first_bad = next((x.first_bad for x in runs if x.first_bad), "")
        journaled = journal_count(database, DEMO) - before
        rate = w.accepted / w.seconds
        out["bulk_rate"] = rate
        print(
            f"bulk ingest, 100 readings/request, wrk -c8 for {w.seconds:.1f} s after "
            f"{sum(x.seconds for x in runs[:-1]):.0f} s of warm-up: {w.rate:,.1f} req/s, "
            f"{w.accepted:,} readings "
            f"accepted in the answers = {rate:,.0f} readings/s (target >= {TARGET_BULK:,.0f}: "
            f"{verdict(rate >= TARGET_BULK)})"
        )
        print(
            f"  check: {journaled:,} readings in the journal once the server was idle "
            f"({waited:.1f} s later; answers not read before wrk stopped count there "
            f"only); {(points + w.points) / 3600:.1f} h of reading time sent in all "
            f"(the train's history horizon is 6 h); latency p50 {ms(w.p50)}, "
            f"p99 {ms(w.p99)}; warm-up and measured runs: {bad} non-200, {refusing} "
            "answers with refusals" + (f"; first: {first_bad}" if first_bad else "")
        )
        print(f"  {amplification}")

        import httpx

        with httpx.Client(
            base_url=server.base, headers={"Authorization": f"Bearer {key}"}, timeout=60.0
        ) as client:
            rate_trains = [f"bench-rate-{k:02d}" for k in range(RATE_TRAINS)]
            for name in ("bench-single-max", *rate_trains):
                r = client.post(f"{API}/trains", json={"toml": demo_toml(name)})
                r.raise_for_status()

        # Part 3b: flat out with wrk, one new reading per request.
        counts = server_counts(server, key)
        w1 = run_wrk(
            server.base, "ingest.lua", args.seconds, args.connections,
            [f"{API}/trains/bench-single-max/readings", key,
             f"{math.floor(time.time()) - 7 * 86400}", str(SINGLE_STEP), "1", "single"],
        )  # fmt: skip
        server.wait_idle()
        amplification = rows_per_reading(counts, server_counts(server, key))
        out["single_rate"] = w1.rate
        print(
            f"single posts flat out, wrk -c{args.connections} for {w1.seconds:.1f} s: "
            f"{w1.rate:,.1f} req/s ({w1.accepted:,} accepted; p50 {ms(w1.p50)}, "
            f"p99 {ms(w1.p99)}, slowest {ms(w1.worst)}; {w1.bad} non-200)"
        )
        print(f"  {amplification}")

        # Part 3a: a steady rate, latency from the scheduled send time.
        import random

        rng = random.Random(11)

        # Request i goes to train i mod 50, stamped with its due wall time: each
        # train gets its four tags in turn, every tag once a second, in real time.
        def single(i: int, t: float) -> bytes:
            tag = SINGLE_TAGS[(i // RATE_TRAINS) % len(SINGLE_TAGS)]
            return batch_body([reading_json(tag, t, rng)])

        def rate_path(i: int) -> str:
            return f"{API}/trains/{rate_trains[i % RATE_TRAINS]}/readings"

        # First a warm-up at the same rate: the 50 trains' filters start on their
        # first readings (steady state, first checkpoint), a one-off burst that
        # the steady figure leaves out; it is printed on its own.
        warm: RateResult = run_async(
            constant_rate(
                server.port, key, rate_path, single,
                args.rate, args.rate_warm_up, 64, args.drain,
            )
        )  # fmt: skip
        offset = len(warm.latencies)
        result: RateResult = run_async(
            constant_rate(
                server.port, key, lambda i: rate_path(i + offset),
                lambda i, t: single(i + offset, t),
                args.rate, args.rate_seconds, 64, args.drain,
            )
        )  # fmt: skip
        print(
            f"single posts, warm-up {args.rate_warm_up:g} s at {args.rate:g}/s while the "
            f"{RATE_TRAINS} trains start: p50 {ms(percentile(warm.latencies, 50))}, "
            f"p99 {ms(percentile(warm.latencies, 99))}"
        )
        p50, p99 = percentile(result.latencies, 50), percentile(result.latencies, 99)
        out.update(rate_p50=p50, rate_p99=p99, rate_answered=result.answered)
        out["rate_scheduled"] = result.scheduled
        for key_, value in (("rate_p50_text", p50), ("rate_p99_text", p99)):
            out[key_] = ms(value) if math.isfinite(value) else f"> {args.drain:g} s"
        print(
            f"single posts at a steady {args.rate:g}/s for {result.seconds:g} s "
            f"({result.scheduled:,} scheduled): p50 {out['rate_p50_text']}, "
            f"p99 {out['rate_p99_text']} "
            f"(target p99 < {TARGET_P99 * 1e3:g} ms: {verdict(p99 < TARGET_P99)})"
        )
        print(
            f"  {result.answered:,} answered within {args.drain:g} s of the last one's "
            f"due time, {result.tally.accepted:,} readings accepted, {result.tally.bad} "
            f"non-200; up to {result.most_in_flight} requests waiting or in flight at once"
        )
    finally:
        server.stop()
    return out


def part_trains(folder: Path, args: argparse.Namespace, key: str) -> dict[str, Any]:
    """Part 4: many trains registered and fed live; the server's memory; the steady state."""
    import random

    server, took = start_service(folder, key)
    # One request to the demo train first: the server loads its numba kernels on the
    # first readings, and that memory belongs in the baseline.
    rng = random.Random(9)
    t = math.floor(time.time()) - 10.0
    warm = [(f"{API}/trains/{DEMO}/readings", batch_body([reading_json(x, t, rng) for x in LEVEL]))]
    run_async(post_many(server.port, key, warm, 1, 60.0))
    rss0, _ = server.memory()
    print(f"service ready in {took:.1f} s; RSS {mb(rss0)} with the demo train fed one second")
    out: dict[str, Any] = {"rss_start": rss0}
    try:
        names = [f"wrenfield-b{i:04d}" for i in range(args.trains)]
        requests = [(f"{API}/trains", json.dumps({"toml": demo_toml(n)}).encode()) for n in names]
        statuses, took = run_async(post_many(server.port, key, requests, 4, args.register_budget))
        registered = [n for n, status in zip(names, statuses, strict=True) if status == 201]
        answered = sum(1 for status in statuses if status is not None)
        rss1, _ = server.memory()
        per_train = (rss1 - rss0) / max(1, len(registered))
        out.update(registered=len(registered), rss_registered=rss1)
        print(
            f"registered {len(registered):,} of {args.trains:,} trains in {took:.1f} s "
            f"({took / max(1, answered) * 1e3:.1f} ms each, 4 connections; "
            f"{answered - len(registered)} refused, {len(names) - answered} not sent within "
            f"{args.register_budget:g} s); RSS {mb(rss1)} (+{per_train / 1e3:,.0f} kB per train)"
        )
        if not registered:
            return out

        counts = server_counts(server, key)
        feed: FeedResult = run_async(
            feed_trains(server.port, key, registered, args.feed_seconds, 16, args.drain)
        )
        server.wait_idle(timeout=30.0)
        amplification = rows_per_reading(counts, server_counts(server, key))
        rss2, hwm2 = server.memory()
        out.update(rss=rss2, hwm=hwm2, kept_up=feed.kept_up)
        scheduled = feed.trains * feed.seconds
        answered = feed.tally.completed
        achieved = answered / feed.elapsed if feed.elapsed > 0 else 0.0
        out["fed_rate"] = achieved
        finite = [x for x in feed.tick_lag if math.isfinite(x)]
        print(
            f"fed {feed.trains:,} trains x 6 tags once a second for {feed.seconds} s: "
            f"{answered:,} of {scheduled:,} requests answered in {feed.elapsed:.1f} s = "
            f"{achieved:,.0f} requests/s ({6 * achieved:,.0f} readings/s); kept up: "
            f"{'yes' if feed.kept_up else 'NO'} (each second's last answer "
            f"{ms(max(finite)) if finite else 'never'} after its second began at worst, "
            f"{sum(1 for x in feed.tick_lag if math.isinf(x))} seconds never finished)"
        )
        print(
            f"  request latency from its second: p50 {ms(percentile(feed.latencies, 50))}, "
            f"p99 {ms(percentile(feed.latencies, 99))}; {feed.tally.accepted:,} readings "
            f"accepted, {feed.tally.bad} non-200; refused: "
            f"{top_refusals(feed.tally) or 'none'}; {amplification}"
        )
        print(
            f"server memory with {len(registered):,} trains live: VmRSS {mb(rss2)}, "
            f"VmHWM {mb(hwm2)} (target < {mb(TARGET_RSS)}: {verdict(hwm2 < TARGET_RSS)})"
        )
        out.update(steady_probe(server, key, args))
    finally:
        server.stop()
    return out


def steady_probe(server: Server, key: str, args: argparse.Namespace) -> dict[str, Any]:
    """One train's request cost once its history spans the product analyzer's dead time.

    A new train is fed 7 minutes of once-a-second readings of its six tags in one
    request, then sent one request per following second of reading time, one at a
    time; the answer time of each is the server's whole cost of one train-second.
    """
    import random

    import httpx

    rng = random.Random(5)
    name = "bench-steady"
    path = f"{API}/trains/{name}/readings"
    with httpx.Client(
        base_url=server.base, headers={"Authorization": f"Bearer {key}"}, timeout=60.0
    ) as client:
        client.post(f"{API}/trains", json={"toml": demo_toml(name)}).raise_for_status()
        warm = 420
        t0 = math.floor(time.time()) - warm - args.probe - 5
        history = [reading_json(tag, t0 + s, rng) for s in range(warm) for tag in LEVEL]
        client.post(
            path, content=batch_body(history), headers={"Content-Type": "application/json"}
        ).raise_for_status()
    bodies = [
        (path, batch_body([reading_json(tag, t0 + warm + s, rng) for tag in LEVEL]))
        for s in range(args.probe)
    ]

    async def sequential() -> list[float]:
        conn = Http(server.port, key)
        took = []
        try:
            for p, body in bodies:
                began = time.perf_counter()
                status, answer = await conn.post(p, body)
                if status != 200:
                    raise RuntimeError(f"steady probe: {status} {answer[:300]!r}")
                took.append(time.perf_counter() - began)
        finally:
            conn.close()
        return took

    counts = server_counts(server, key)
    took = sorted(run_async(sequential()))
    amplification = rows_per_reading(counts, server_counts(server, key))
    mean = sum(took) / len(took)
    trains = 1.0 / mean
    print(
        f"steady state, one train with 7 min of history (the AI-203G reading of each "
        f"second revises the last 4-5 min): {mean * 1e3:.1f} ms per 6-reading request "
        f"(p50 {ms(percentile(took, 50))}, {len(took)} requests one at a time); "
        f"{amplification}"
    )
    print(
        f"  extrapolated: one worker carries about {trains:,.0f} trains at one request "
        f"per train per second once each has 4 min of history"
    )
    return {"steady_ms": mean * 1e3, "steady_trains": trains}


def history_memory() -> dict[str, Any]:
    """Measure the memory one train's estimator holds at its full history horizon.

    In this process. A short warm-up session first brings numba's compiled kernels
    into its on-disk cache (or loads them from there). Then a session is fed its
    horizon (6 h for the demo train) of once-a-second readings of all six tags in
    one call, and the arrays it keeps (event log and snapshots) are added up; one
    checkpoint and one more second of readings are timed there.
    """
    import random

    import numpy as np

    from estimator.config import load_train_config
    from estimator.session import TrainSession

    began = time.perf_counter()
    config = load_train_config(TRAIN)
    warm = TrainSession(config)
    t = math.floor(time.time()) - 3600.0
    for s in range(300):  # in-order seconds, the analyzers' dead-time rewinds, single posts
        tags = list(LEVEL) if s < 290 else [SINGLE_TAGS[s % len(SINGLE_TAGS)]]
        warm.ingest(tags, [t + s] * len(tags), [LEVEL[x][0] for x in tags])
    kernels_s = time.perf_counter() - began
    horizon = config.estimator.horizon
    seconds = int(horizon)
    rng = random.Random(3)
    tags = list(LEVEL)
    t0 = math.floor(time.time()) - seconds - 60
    from service.settings import Settings

    def no_readings(start: float, stop: float) -> tuple[list[str], Any, Any]:
        return [], np.empty(0), np.empty(0)  # in-order readings never read back

    # As the service runs it: the event log kept for event_memory, older readings
    # read back from the journal (here never needed: the readings come in order).
    memory = float(Settings.model_fields["event_memory"].default)
    session = TrainSession(config, memory=memory, journal=no_readings)
    names = tags * seconds
    times = np.repeat(t0 + np.arange(seconds, dtype=np.float64), len(tags))
    values = [LEVEL[t][0] + LEVEL[t][1] * rng.gauss() for t in names]
    session.ingest(names, times, values)
    held_filter = sum(a.nbytes for a in session.filter.state_arrays().values())
    assert session.alert_engine is not None
    held_alerts = session.alert_engine.window_bytes()
    began = time.perf_counter()
    blob = session.checkpoint()
    checkpoint_s = time.perf_counter() - began
    costs = []
    for s in range(20):
        t = t0 + seconds + s
        vals = [LEVEL[x][0] + LEVEL[x][1] * rng.gauss() for x in tags]
        began = time.perf_counter()
        session.ingest(tags, [t] * len(tags), vals)
        costs.append(time.perf_counter() - began)
    return {
        "kernels_s": kernels_s,
        "horizon": horizon,
        "held": held_filter + held_alerts,
        "held_filter": held_filter,
        "held_alerts": held_alerts,
        "memory": memory,
        "checkpoint_bytes": len(blob),
        "checkpoint_s": checkpoint_s,
        "ingest_s": sorted(costs)[len(costs) // 2],
    }


# ---------------------------------------------------------------------------- main


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--seconds", type=float, default=15.0, help="each wrk run [s]")
    parser.add_argument("--warm-up", type=float, default=5.0, help="bulk warm-up run [s]")
    parser.add_argument("--connections", type=int, default=16, help="wrk connections")
    parser.add_argument("--rate", type=float, default=200.0, help="steady single posts [1/s]")
    parser.add_argument("--rate-seconds", type=float, default=20.0, help="steady run [s]")
    parser.add_argument(
        "--rate-warm-up", type=float, default=5.0, help="steady-rate warm-up, not counted [s]"
    )
    parser.add_argument("--floor-seconds", type=float, default=10.0, help="bare steady run [s]")
    parser.add_argument("--drain", type=float, default=10.0, help="wait after a schedule [s]")
    parser.add_argument("--trains", type=int, default=1000, help="trains registered")
    parser.add_argument("--register-budget", type=float, default=60.0, help="[s]")
    parser.add_argument("--feed-seconds", type=int, default=30, help="live feed [s]")
    parser.add_argument("--probe", type=int, default=60, help="steady-state requests")
    parser.add_argument("--serve-bare", type=int, metavar="PORT", help=argparse.SUPPRESS)
    args = parser.parse_args()
    if args.serve_bare:
        serve_bare(args.serve_bare)
        return
    if shutil.which("wrk") is None:
        sys.exit("bench_service: wrk is not installed; run: bash scripts/system-deps.sh --bench")
    os.environ.setdefault("STAGEWATCH_CACHE_DIR", str(REPO / ".cache"))
    key = "sw_bench_" + secrets.token_hex(16)
    began = time.perf_counter()
    results: dict[str, Any] = {}
    with phase("0. one train's estimator at its full history horizon, in this process"):
        # First, so that numba's on-disk cache holds every kernel before a server
        # needs one: a server that compiles on its first request stalls for seconds.
        h = history_memory()
        results.update(h)
        print(
            f"numba kernels compiled or loaded in {h['kernels_s']:.1f} s; one train's "
            f"session holds {mb(h['held'])} after {h['horizon'] / 3600:g} h of once-a-second "
            f"readings of 6 tags: the filter {mb(h['held_filter'])} (snapshots over the "
            f"horizon, events over the last {h['memory']:g} s; the log is trimmed once a "
            f"quarter of it can go, so up to 4/3 of its events), the alert rules' windows "
            f"{mb(h['held_alerts'])}; a checkpoint of it is {mb(h['checkpoint_bytes'])} "
            f"and takes {h['checkpoint_s'] * 1e3:.0f} ms; one more second of readings takes "
            f"{h['ingest_s'] * 1e3:.1f} ms (session only, no database)"
        )
    with tempfile.TemporaryDirectory(prefix="stagewatch-bench-") as tmp:
        folder = Path(tmp)
        with phase("1. ceiling: a bare FastAPI endpoint"):
            results.update(part_bare(folder, args, key))
        with phase("2-3. the service: bulk ingest, then single posts"):
            results.update(part_service(folder / "service", args, key))
        with phase(f"4. {args.trains:,} trains live"):
            results.update(part_trains(folder / "trains", args, key))

    from service.settings import Settings

    trains = max(1, results.get("registered", args.trains))
    base = results.get("rss_registered", 0)
    low = base + trains * h["held"]
    high = low + trains * h["held_filter"] / 3
    every = float(Settings.model_fields["checkpoint_every"].default)
    results["rss_extrapolated"] = (low, high)
    print(
        f"\nextrapolated from part 0: {trains:,} trains at their full history horizon need "
        f"about {mb(low)} to {mb(high)} (RSS after registering plus the histories); "
        f"checkpointing each every {every:g} s of reading time costs about "
        f"{trains * h['checkpoint_s'] / every:.2f} CPU-s per s and writes "
        f"{mb(trains * h['checkpoint_bytes'] / every)}/s"
    )

    r = results
    print(f"\n== summary (this machine, this run; {time.perf_counter() - began:.0f} s)")
    rows = [
        ("bare FastAPI ceiling (async POST, 1 worker, wrk)", f"{r['bare_rate']:,.0f} req/s",
         "reference"),
        ("bulk ingest, 100 readings/request", f"{r['bulk_rate']:,.0f} readings/s",
         f">= {TARGET_BULK:,.0f}: {verdict(r['bulk_rate'] >= TARGET_BULK)}"),
        (f"single posts at {args.rate:g}/s: p50 / p99",
         f"{r['rate_p50_text']} / {r['rate_p99_text']}",
         f"p99 < {TARGET_P99 * 1e3:g} ms: {verdict(r['rate_p99'] < TARGET_P99)}"),
        ("  answered of scheduled", f"{r['rate_answered']:,} / {r['rate_scheduled']:,}", ""),
        ("single posts flat out (wrk)", f"{r['single_rate']:,.1f} req/s",
         f"{r['single_rate'] / r['bare_rate']:.3f} x bare"),
    ]  # fmt: skip
    if "rss" in r:
        rows += [
            (f"{r['registered']:,} trains live {args.feed_seconds} s: VmRSS / VmHWM",
             f"{mb(r['rss'])} / {mb(r['hwm'])}",
             f"< {mb(TARGET_RSS)}: {verdict(r['hwm'] < TARGET_RSS)}"),
            ("  fed at one request per train per second",
             f"{r['fed_rate']:,.0f} requests/s", "kept up" if r["kept_up"] else "did NOT keep up"),
            ("  steady state per train-second (measured)", f"{r['steady_ms']:.1f} ms",
             f"~{r['steady_trains']:,.0f} trains/worker (extrapolated)"),
        ]  # fmt: skip
    low, high = r["rss_extrapolated"]
    rows.append(
        ("  at the full history horizon (extrapolated)", f"{mb(low)} to {mb(high)}",
         f"< {mb(TARGET_RSS)}: {verdict(high < TARGET_RSS)}")
    )  # fmt: skip
    for name, value, target in rows:
        print(f"  {name:<52} {value:>24}   {target}")


if __name__ == "__main__":
    main()
