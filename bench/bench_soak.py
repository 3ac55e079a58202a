"""Soak benchmark: the REST service under a steady ingest load, its memory and queue watched.

Run ``python bench/bench_soak.py`` (or ``make bench-soak``): 10 minutes by default,
``--minutes 1`` for a quick check (``--help`` for the rest). Not part of ``make
test`` or CI. It starts the real service as bench/bench_service.py does (``python
-m service.cli serve --train replay_data/wrenfield/train.toml``, one uvicorn
worker, a bootstrap key, SQLite in a temporary folder that is removed afterwards),
registers 200 copies of the demo train through ``POST /api/v1/trains``
(wrenfield-s0000, ...) and feeds them 5,000 readings per second from the asyncio
client of bench_service (``constant_rate``: a fixed schedule that never waits for
the server, latency counted from each request's scheduled send time, so a server
that falls behind cannot hide its backlog).

The load, and why it looks like this
------------------------------------
A plant sends each train's tags as it samples them: the flow and the two vessel
temperatures (FI-200, TI-201, TI-202) once a second, the feed analyzer AI-200G
every 2 min, the product analyzer AI-203G every 4 min (stamped at its analysis,
for the sample taken 4 min earlier: the filter rewinds over that dead time), and a
lab result on LAB-202F for a sample taken every 2 h, arriving 45 min after it was
taken (stamped with the sample time: a rewind past the service's in-memory event
log, read back from the journal). That is about 3.01 readings per second of
reading time, so 200 trains fed in real time give only ~600 readings/s. To offer
5,000 readings/s over 200 trains (25 per train per second) every train's reading
clock runs ahead of wall time, 5000 / 200 / 3.0126 = 8.30 s of reading time per
wall second, from a start two days (plus the run's span of reading time) back, so
no reading is ever in the future. Each train gets one request per wall second
carrying the readings of the reading seconds that wall second covers (8 or 9
seconds: 24 to 29 readings with the analyzers, 25 on average); the 200 requests of
each second are spread evenly over it (a request every 5 ms). The analyzers' and
the lab's phases are staggered across trains, so that their rewinds do not all
fall in the same second.

Per reading the server does what it does for a plant in real time (the filter's
work, the journal, one stored estimate per 10 s and one checkpoint per 5 min of
reading time): the load equals about 1,660 trains fed in real time, with the
in-memory state of 200. Over a 10-minute soak each train covers about 83 min of
reading time, less than its 6 h history horizon: its rewind snapshots older than
the in-memory window (one per 10 min of reading time) still accumulate, a few kB a
train, so a little growth is expected and legitimate.

Measured and printed
--------------------
- the server process's VmRSS (/proc/<pid>/status) every 10 s, with its CPU use and
  the client's; after the warm-up (the first 20 % of the run, at most 2 min), the
  memory target: every sample within 10 % of the first one after the warm-up
  (and its least-squares trend, MB/min, for information);
- readings accepted per second (from the answers' own ``accepted`` counts) against
  those offered, over the measured span (after the warm-up);
- the queue: requests due by their schedule but not yet answered, computed for
  each second of the measured span from the send schedule and the answer times.
  At most ``--connections`` (16) of them are in the server at once; the rest wait
  in this client, as a historian bridge's spool would. Target: no growing queue,
  i.e. its least-squares trend rises by less than one second's worth of requests
  (200) over the measured span and no request is left unanswered ``--drain``
  seconds after the schedule ends (those still waiting then are never sent);
- the ingest latency (from the scheduled send time to the answer) p50 / p99 / max
  over the requests due in the measured span, unanswered ones counted as
  infinite, and p50 / p99 over those answered; per 10 s window of due times (per
  minute when the span is over 2 min), the lag's own trend;
- the estimate rows the server wrote per accepted reading (its /metrics counters).

The machine (2 cores, shared with other work) runs the server, the client and
whatever else is running: the load average at the start and the end, and the
client's own CPU use, are printed beside the figures. When the server does not
carry the offered rate the summary says so, with what it did carry.
"""

from __future__ import annotations

import argparse
import asyncio
import json
import math
import os
import secrets
import tempfile
import time
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np
from bench_service import (
    API,
    DEMO,
    REPO,
    RateResult,
    Server,
    batch_body,
    constant_rate,
    demo_toml,
    mb,
    ms,
    percentile,
    phase,
    post_many,
    reading_json,
    rows_per_reading,
    run_async,
    server_counts,
    start_service,
    top_refusals,
    verdict,
)

TRAINS = 200  # trains fed
RATE = 5000.0  # readings/s offered, over all trains
MINUTES = 10.0  # soak length [min]
TARGET_FLAT = 0.10  # VmRSS after the warm-up stays within this share of its first sample
WARM_SHARE = 0.2  # warm-up: this share of the run...
WARM_MAX = 120.0  # ...but at most this long [s]

# The plant's sampling, in seconds of reading time (train.toml's tags).
TRANSMITTERS = ("FI-200", "TI-201", "TI-202")  # each once a second
ANALYZERS = (("AI-200G", 120), ("AI-203G", 240))  # (tag, period [s])
LAB_TAG = "LAB-202F"
LAB_EVERY = 7200  # a grab sample every 2 h [s]
LAB_DELAY = 2700  # its result arrives 45 min after the sample [s]
PER_SECOND = (
    len(TRANSMITTERS) + sum(1.0 / period for _, period in ANALYZERS) + 1.0 / LAB_EVERY
)  # readings per second of reading time, one train


@dataclass(frozen=True)
class PlantFeed:
    """Every train's readings, wall second by wall second, as a plant samples them.

    Parameters
    ----------
    trains : int
        Number of trains fed.
    speed : float
        Seconds of reading time each train's clock advances per wall second [s/s].
    t0 : float
        Reading time of every train's first second [s since the epoch].
    """

    trains: int
    speed: float
    t0: float

    def phase(self, train: int) -> int:
        """Offset of a train's analyzer and lab schedule [s of reading time]."""
        return train * LAB_EVERY // self.trains

    def span(self, train: int, first: int, stop: int) -> list[tuple[str, float]]:
        """Return (tag, time [s since the epoch]) of the readings of seconds [first, stop)."""
        shift = self.phase(train)
        out: list[tuple[str, float]] = []
        for s in range(first, stop):
            t = self.t0 + s
            out += [(tag, t) for tag in TRANSMITTERS]
            for tag, period in ANALYZERS:
                if (s + shift) % period == 0:
                    out.append((tag, t))
            if s >= LAB_DELAY and (s - LAB_DELAY + shift) % LAB_EVERY == 0:
                out.append((LAB_TAG, t - LAB_DELAY))  # stamped with its sample time
        return out

    def tick(self, train: int, k: int) -> list[tuple[str, float]]:
        """Return the readings a train sends in wall second ``k`` (from 0)."""
        return self.span(train, math.floor(k * self.speed), math.floor((k + 1) * self.speed))


@dataclass
class Sample:
    """One look at the server during the soak (times on ``time.perf_counter``'s clock)."""

    t: float  # [s]
    rss: int  # [bytes]
    hwm: int  # [bytes]
    server_cpu: float  # CPU time used by the server so far [s]
    client_cpu: float  # CPU time used by this process so far [s]
    answered: int  # requests answered so far
    accepted: int  # readings accepted so far
    lags: list[float] = field(default_factory=list)  # latencies of answers since the last look


class Answers:
    """Every request's due and answer times and accepted count, filled as answers arrive.

    Parameters
    ----------
    n : int
        Requests scheduled.
    rate : float
        Requests per second of the schedule [1/s].
    """

    def __init__(self, n: int, rate: float) -> None:
        self.n = n
        self.rate = rate
        self.due = np.full(n, np.nan)  # [s, perf_counter]
        self.at = np.full(n, np.inf)  # answer time [s, perf_counter]; inf: no answer
        self.accepted = np.zeros(n, dtype=np.int64)
        self.begin: float | None = None  # due time of request 0 [s, perf_counter]
        self.sent = 0  # requests handed to a connection
        self.count = 0  # requests answered
        self.accepted_total = 0
        self.lags: list[float] = []

    def __call__(self, i: int, due: float, answered: float, status: int, body: bytes) -> None:
        """Record one answer (the ``on_answer`` hook of ``constant_rate``)."""
        self.due[i] = due
        self.at[i] = answered
        if self.begin is None:
            self.begin = due - i / self.rate
        if status == 200:
            self.accepted[i] = int(json.loads(body)["accepted"])
            self.accepted_total += int(self.accepted[i])
        self.count += 1
        self.lags.append(answered - due)

    def due_by(self, t: float) -> int:
        """Count the requests due by time ``t`` [s, perf_counter] (0 before the first answer)."""
        if self.begin is None:
            return 0
        return int(min(self.n, max(0, math.floor((t - self.begin) * self.rate) + 1)))


async def watch(
    server: Server, answers: Answers, every: float, stop: asyncio.Event, samples: list[Sample]
) -> None:
    """Sample the server every ``every`` seconds until ``stop``; print a line each time."""
    clock = time.perf_counter
    began = clock()
    m = 0
    while True:
        now = clock()
        rss, hwm = server.memory()
        lags, answers.lags = answers.lags, []
        s = Sample(
            now, rss, hwm, server.cpu_seconds(), time.process_time(), answers.count,
            answers.accepted_total, lags,
        )  # fmt: skip
        samples.append(s)
        if len(samples) == 1:
            print(f"  before the load: VmRSS {mb(rss)}", flush=True)
        else:
            p = samples[-2]
            span = s.t - p.t
            lags.sort()
            lag = (
                f"lag p50 {ms(percentile(lags, 50))}, p99 {ms(percentile(lags, 99))}"
                if lags else "no answers"
            )  # fmt: skip
            since = s.t - (answers.begin if answers.begin is not None else began)
            print(
                f"  t={since:5.0f} s  VmRSS {mb(rss):>7}  server CPU "
                f"{(s.server_cpu - p.server_cpu) / span:4.0%}  client CPU "
                f"{(s.client_cpu - p.client_cpu) / span:4.0%}  accepted "
                f"{(s.accepted - p.accepted) / span:7,.0f} readings/s  queue "
                f"{answers.due_by(now) - answers.count:6,}  {lag}",
                flush=True,
            )
        m += 1
        try:
            await asyncio.wait_for(stop.wait(), timeout=max(0.0, began + m * every - clock()))
            return
        except TimeoutError:
            continue


async def soak(
    server: Server,
    key: str,
    feed: PlantFeed,
    names: list[str],
    seconds: int,
    args: argparse.Namespace,
) -> tuple[RateResult, Answers, list[Sample]]:
    """Feed every train one request per wall second for ``seconds``; watch the server."""
    import random

    rng = random.Random(17)
    trains = len(names)
    paths = [f"{API}/trains/{n}/readings" for n in names]
    answers = Answers(trains * seconds, float(trains))

    def body_for(i: int, _wall: float) -> bytes:
        j, k = i % trains, i // trains
        answers.sent += 1
        return batch_body([reading_json(tag, t, rng) for tag, t in feed.tick(j, k)])

    samples: list[Sample] = []
    stop = asyncio.Event()
    watcher = asyncio.create_task(watch(server, answers, args.sample_every, stop, samples))
    try:
        result = await constant_rate(
            server.port, key, lambda i: paths[i % trains], body_for, float(trains),
            float(seconds), args.connections, args.drain, on_answer=answers,
        )  # fmt: skip
    finally:
        stop.set()
        await watcher
    return result, answers, samples


@dataclass
class Findings:
    """What the soak showed over its measured span (after the warm-up)."""

    span: float  # measured span [s]
    second: int  # requests due in one second of the schedule (one per train)
    offered: float  # readings/s due in the span
    accepted: float  # readings/s accepted by answers arriving in the span
    p50: float  # latency from schedule, every request due in the span (inf: unanswered) [s]
    p99: float
    worst: float
    answered_share: float  # of the requests due in the span, the share answered
    answered_p50: float  # latency of those answered only [s]
    answered_p99: float
    queue_growth: float  # least-squares rise of the queue over the span [requests]
    queue_last: int  # queue at the end of the schedule [requests]
    queue_most: int  # largest queue in the span [requests]
    unanswered: int  # requests never answered within the drain
    rss_first: int  # [bytes]
    rss_low: int
    rss_high: int
    rss_last: int
    rss_trend: float  # [bytes/min]
    rss_samples: int
    lag_windows: list[tuple[float, float, float, float]]  # (start [s], p50, p99, answered)
    server_cpu: float  # share of one core over the span
    client_cpu: float

    @property
    def flat(self) -> bool:
        """Every VmRSS sample after the warm-up within TARGET_FLAT of the first."""
        return (
            self.rss_high <= self.rss_first * (1 + TARGET_FLAT)
            and self.rss_low >= self.rss_first * (1 - TARGET_FLAT)
        )

    @property
    def steady_queue(self) -> bool:
        """No growing queue: a rise under one second of requests, nothing left unanswered."""
        return self.queue_growth < self.second and self.unanswered == 0


def findings(
    answers: Answers, samples: list[Sample], counts: np.ndarray, seconds: int, warm: float
) -> Findings:
    """Reduce the answers and samples of a soak to its figures (see the module notes)."""
    if answers.begin is None:
        raise RuntimeError("the server answered no request")
    begin = answers.begin
    rate = answers.rate
    i = np.arange(answers.n)
    due = begin + i / rate
    lat = answers.at - due  # inf: never answered
    start, end = begin + warm, begin + seconds
    measured = due >= start
    span = end - start
    lat_m = np.sort(lat[measured])
    offered = float(counts[measured].sum()) / span
    in_span = (answers.at >= start) & (answers.at < end)
    accepted = float(answers.accepted[in_span].sum()) / span
    # The queue each second: due by then minus answered by then.
    ts = np.arange(start, end + 1e-9, 1.0)
    done = np.searchsorted(np.sort(answers.at), ts, side="right")
    due_by = np.clip(np.floor((ts - begin) * rate) + 1, 0, answers.n)
    queue = due_by - done
    slope = float(np.polyfit(ts - ts[0], queue, 1)[0]) if len(ts) > 2 else 0.0
    # Lag per window of due times.
    windows = []
    step = 10.0 if span <= 120.0 else 60.0
    w = start
    while w < end - 1e-9:
        sel = np.sort(lat[(due >= w) & (due < min(w + step, end))])
        if sel.size:
            share = float(np.isfinite(sel).mean())
            windows.append(
                (w - begin, percentile(list(sel), 50), percentile(list(sel), 99), share)
            )
        w += step
    done_m = lat_m[np.isfinite(lat_m)]
    after = [s for s in samples if s.t >= start - 0.5]
    if not after:
        after = samples[-1:]
    rss = np.array([s.rss for s in after], dtype=np.float64)
    minutes = np.array([(s.t - after[0].t) / 60.0 for s in after])
    trend = float(np.polyfit(minutes, rss, 1)[0]) if len(after) > 2 else math.nan
    last = next((s for s in reversed(samples) if s.t <= end + 0.5), samples[-1])
    first = after[0] if last.t - after[0].t > 1.0 else samples[0]  # a span under one sample
    cpu_span = max(last.t - first.t, 1e-9)
    return Findings(
        span=span,
        second=round(rate),
        offered=offered,
        accepted=accepted,
        p50=percentile(list(lat_m), 50),
        p99=percentile(list(lat_m), 99),
        worst=float(lat_m[-1]) if lat_m.size else math.nan,
        answered_share=float(done_m.size / max(1, lat_m.size)),
        answered_p50=percentile(list(done_m), 50),
        answered_p99=percentile(list(done_m), 99),
        queue_growth=slope * (ts[-1] - ts[0]) if len(ts) > 1 else 0.0,
        queue_last=int(queue[-1]),
        queue_most=int(queue.max()),
        unanswered=int(np.count_nonzero(np.isinf(answers.at))),
        rss_first=int(rss[0]),
        rss_low=int(rss.min()),
        rss_high=int(rss.max()),
        rss_last=int(rss[-1]),
        rss_trend=trend,
        rss_samples=len(after),
        lag_windows=windows,
        server_cpu=(last.server_cpu - first.server_cpu) / cpu_span,
        client_cpu=(last.client_cpu - first.client_cpu) / cpu_span,
    )


def warm_demo(server: Server, key: str, t0: float) -> tuple[int, float]:
    """Feed the demo train 50 min of plant readings in one request; (body bytes, seconds).

    Brings every kernel into the server before the soak (propagation, the analyzer
    rewind, a lab result read back from the journal), so that none loads or
    compiles during it and the memory baseline holds them.
    """
    import random

    rng = random.Random(3)
    plant = PlantFeed(trains=1, speed=1.0, t0=t0)
    body = batch_body([reading_json(tag, t, rng) for tag, t in plant.span(0, 0, 3000)])
    began = time.perf_counter()
    statuses, _ = run_async(
        post_many(server.port, key, [(f"{API}/trains/{DEMO}/readings", body)], 1, 600.0)
    )
    if statuses[0] != 200:
        raise RuntimeError(f"warming the demo train: status {statuses[0]}")
    return len(body), time.perf_counter() - began


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--minutes", type=float, default=MINUTES, help="soak length [min]")
    parser.add_argument("--trains", type=int, default=TRAINS, help="trains fed")
    parser.add_argument("--rate", type=float, default=RATE, help="readings/s offered in all")
    parser.add_argument(
        "--warm-up", type=float, default=None,
        help=f"warm-up [s]; default {WARM_SHARE:.0%} of the run, at most {WARM_MAX:g} s",
    )  # fmt: skip
    parser.add_argument("--sample-every", type=float, default=10.0, help="VmRSS samples [s]")
    parser.add_argument("--connections", type=int, default=16, help="client connections")
    parser.add_argument("--drain", type=float, default=30.0, help="wait after the schedule [s]")
    args = parser.parse_args()
    seconds = max(1, round(args.minutes * 60.0))
    warm = args.warm_up if args.warm_up is not None else min(WARM_MAX, WARM_SHARE * seconds)
    trains = args.trains
    speed = args.rate / trains / PER_SECOND
    reading_span = math.ceil(speed * (seconds + 1)) + LAB_EVERY
    t0 = float(math.floor(time.time() / LAB_EVERY) * LAB_EVERY - 2 * 86400 - reading_span)
    feed = PlantFeed(trains=trains, speed=speed, t0=t0)
    counts = np.array([len(feed.tick(i % trains, i // trains)) for i in range(trains * seconds)])
    os.environ.setdefault("STAGEWATCH_CACHE_DIR", str(REPO / ".cache"))
    key = "sw_bench_" + secrets.token_hex(16)
    began = time.perf_counter()
    load0 = os.getloadavg()
    print(
        f"soak: {trains:,} trains, {args.rate:,.0f} readings/s offered for {seconds} s "
        f"(warm-up {warm:g} s, then measured), one request per train per wall second "
        f"({counts.mean():.1f} readings on average, {counts.min()} to {counts.max()}); each "
        f"train's reading clock runs {speed:.2f} s per wall second; {args.connections} "
        f"connections; {os.cpu_count()} CPUs, load average {load0[0]:.2f} at the start"
    )
    with tempfile.TemporaryDirectory(prefix="stagewatch-soak-") as tmp:
        folder = Path(tmp) / "service"
        server, took = start_service(folder, key)
        try:
            with phase("set-up: the service, its kernels, the trains"):
                warm_bytes, warm_s = warm_demo(server, key, t0 - 4 * 3600)
                rss_demo, _ = server.memory()
                print(
                    f"service ready in {took:.1f} s (pid {server.pid}); the demo train fed "
                    f"50 min of plant readings ({warm_bytes / 1e3:,.0f} kB) in "
                    f"{warm_s:.1f} s; VmRSS {mb(rss_demo)}"
                )
                names = [f"wrenfield-s{j:04d}" for j in range(trains)]
                requests = [
                    (f"{API}/trains", json.dumps({"toml": demo_toml(n)}).encode()) for n in names
                ]
                statuses, reg_s = run_async(post_many(server.port, key, requests, 4, 600.0))
                refused = [n for n, s in zip(names, statuses, strict=True) if s != 201]
                if refused:
                    raise RuntimeError(f"{len(refused)} trains not registered: {statuses[:5]}")
                server.wait_idle(timeout=30.0)
                rss_reg, _ = server.memory()
                print(
                    f"registered {trains:,} trains in {reg_s:.1f} s; VmRSS {mb(rss_reg)} "
                    f"(+{(rss_reg - rss_demo) / trains / 1e3:,.0f} kB per train)"
                )
            with phase(f"soak: {seconds} s at {args.rate:,.0f} readings/s"):
                metrics0 = server_counts(server, key)
                result, answers, samples = run_async(soak(server, key, feed, names, seconds, args))
                idle_s = server.wait_idle(timeout=60.0)
                rss_end, hwm_end = server.memory()
                amplification = rows_per_reading(metrics0, server_counts(server, key))
                print(
                    f"after the drain and {idle_s:.1f} s until the server was idle: VmRSS "
                    f"{mb(rss_end)}, VmHWM {mb(hwm_end)}; {result.tally.accepted:,} readings "
                    f"accepted of {int(counts.sum()):,} offered, {result.tally.bad} non-200"
                    + (f" (first: {result.tally.first_bad})" if result.tally.first_bad else "")
                )
                print(
                    f"  {answers.sent:,} of {answers.n:,} requests sent, {answers.count:,} "
                    f"answered (the schedule never waits: requests still queued for a "
                    f"connection {args.drain:g} s after the last was due are not sent)"
                )
                print(f"  refused: {top_refusals(result.tally) or 'none'}; {amplification}")
        finally:
            server.stop()

    f = findings(answers, samples, counts, seconds, warm)
    load1 = os.getloadavg()
    print(f"\n== measured span: {f.span:.0f} s after a {warm:g} s warm-up")
    for start, p50, p99, share in f.lag_windows:
        print(
            f"  due from {start:5.0f} s: latency p50 {ms(p50):>13}, p99 {ms(p99):>13}; "
            f"{share:4.0%} answered"
        )

    carried = f.accepted >= 0.98 * f.offered
    print(f"\n== summary (this machine, this run; {time.perf_counter() - began:.0f} s)")
    rows = [
        (f"offered: {trains:,} trains, 1 request/train/s", f"{f.offered:,.0f} readings/s",
         f"asked {args.rate:,.0f}"),
        ("accepted (answers arriving in the measured span)", f"{f.accepted:,.0f} readings/s",
         f"{f.accepted / f.offered:.1%} of offered: "
         + ("carried" if carried else "NOT carried")),
        ("VmRSS after warm-up: first / low / high / last",
         f"{mb(f.rss_first)} / {mb(f.rss_low)} / {mb(f.rss_high)} / {mb(f.rss_last)}",
         f"flat within {TARGET_FLAT:.0%}: {verdict(f.flat)}"),
        ("  trend (least squares)", f"{f.rss_trend / 1e6:+,.2f} MB/min",
         f"{f.rss_samples} samples, {args.sample_every:g} s apart"),
        ("queue (due, unanswered): trend over the span", f"{round(f.queue_growth):+,d} requests",
         f"no growing queue: {verdict(f.steady_queue)}"),
        ("  largest / at the end / never answered",
         f"{f.queue_most:,} / {f.queue_last:,} / {f.unanswered:,}", ""),
        ("ingest latency from schedule: p50 / p99", f"{ms(f.p50)} / {ms(f.p99)}",
         f"slowest {ms(f.worst)}"),
        (f"  of the {f.answered_share:.0%} answered: p50 / p99",
         f"{ms(f.answered_p50)} / {ms(f.answered_p99)}", ""),
        ("CPU, share of one core: server / this client",
         f"{f.server_cpu:.0%} / {f.client_cpu:.0%}",
         f"load average {load0[0]:.2f} -> {load1[0]:.2f}"),
    ]  # fmt: skip
    for name, value, target in rows:
        print(f"  {name:<52} {value:>30}   {target}")
    from service.settings import Settings

    memory = float(Settings.model_fields["event_memory"].default)
    if warm * speed < memory:
        print(
            f"\nNote: the warm-up covers {warm * speed:,.0f} s of each train's reading time at "
            f"most, less than the service's {memory:g} s in-memory event log: the trains' "
            "memory is still filling in the measured span, so the memory verdict says "
            "little; the default 10 minutes (2 min of warm-up) is the run to judge it by."
        )
    if not carried:
        print(
            f"\nThis machine did NOT carry {args.rate:,.0f} readings/s over {trains:,} trains "
            f"in this run: the server accepted {f.accepted:,.0f} readings/s over the measured "
            f"span, using {f.server_cpu:.0%} of a core (one worker), while this client used "
            f"{f.client_cpu:.0%} and the machine's load average went {load0[0]:.2f} -> "
            f"{load1[0]:.2f} on {os.cpu_count()} CPUs."
        )


if __name__ == "__main__":
    main()
