"""Benchmark: replay speed and memory, one month against one year of 10 s data.

Generates, into a temporary folder (nothing is kept), two wide-form Parquet
archives of the demo train under its invented scenario (replay_data/wrenfield):
one row every 10 s with the flow and both temperature transmitters read at every
step and the analyzers at their own periods (empty cells between their readings),
lab results at their sample time. One archive covers 30 days, the other 365 (the
scenario's events happen in the first month; the rest is steady running with the
enzyme's slow decline).

Each archive is then replayed end to end, file in to files out (estimates in
Parquet and CSV, gated and refused readings, summary, report with its plots), in
a fresh Python process, after one small warm-up replay that loads the compiled
kernels from numba's cache. Printed per archive: estimate time steps, replay wall
time (and how much of it the report took: a fixed cost of a second or two),
time steps per second end to end and without the report, and the child's peak
resident memory (``resource.getrusage(RUSAGE_SELF).ru_maxrss``); then the
year/month ratio of the peaks. Targets beside them: at least 100,000 time
steps/s, a peak below 1 GB, and the year's peak within 1.5 times the month's
(memory must not grow with the archive's length).

Run ``python bench/bench_replay.py`` (or ``make bench``); ``--days`` changes the
two lengths.
"""

from __future__ import annotations

import argparse
import dataclasses
import json
import os
import subprocess
import sys
import tempfile
import time
from pathlib import Path

REPO = Path(__file__).resolve().parent.parent
sys.path.insert(0, str(REPO))

TRAIN = REPO / "replay_data" / "wrenfield" / "train.toml"
SCENARIO = REPO / "replay_data" / "wrenfield" / "scenario.toml"
STEP = 10.0
TARGET_RATE = 100_000.0
TARGET_PEAK = 1e9
TARGET_RATIO = 1.5

# The child: replay one archive and report what it took, as one JSON line. Linux
# keeps the larger of the parent's and the child's high-water marks in ru_maxrss
# across fork and exec, so the parent stays small (it generates the archives in
# children too); VmHWM, which exec resets, is printed beside it as a check.
CHILD = """
import json, resource, sys, time
from pathlib import Path
from service.replay import replay
began = time.perf_counter()
s = replay(Path(sys.argv[1]), Path(sys.argv[2]), Path(sys.argv[3]), progress=False)
elapsed = time.perf_counter() - began
peak = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss * 1024
hwm = 0
with open("/proc/self/status") as f:
    for line in f:
        if line.startswith("VmHWM:"):
            hwm = int(line.split()[1]) * 1024
print(json.dumps({"steps": s.time_steps, "readings": s.readings, "seconds": elapsed,
                  "report": s.report_seconds, "peak": peak, "hwm": hwm}))
"""


def make_archive(path: Path, days: float) -> int:
    """Simulate ``days`` of the demo scenario at 10 s; write a wide Parquet archive."""
    from estimator.config import TemperatureTag, load_train_config
    from estimator.model import TrainModel
    from estimator.scenario import load_scenario
    from estimator.simulate import simulate
    from service.archive import simulation_columns, write_archive

    config = load_train_config(TRAIN)
    scenario = load_scenario(SCENARIO, config)
    transmitters = {config.feed.flow.tag} | {
        v.temperature.tag for v in config.vessels if isinstance(v.temperature, TemperatureTag)
    }
    periods = {t: p for t, p in scenario.analyzer_period.items() if t not in transmitters}
    scenario = dataclasses.replace(
        scenario, duration=days * 86400.0, step=STEP, analyzer_period=periods
    )
    run = simulate(TrainModel.from_config(config), scenario)
    readings = dataclasses.replace(simulation_columns(run, config), received=None)
    del run
    write_archive(path, readings, form="wide")
    return len(readings)


def _child(args: list[str]) -> str:
    env = dict(os.environ)
    env.setdefault("STAGEWATCH_CACHE_DIR", str(REPO / ".cache"))
    env["PYTHONPATH"] = str(REPO) + os.pathsep + env.get("PYTHONPATH", "")
    done = subprocess.run(
        [sys.executable, *args], check=True, capture_output=True, text=True, env=env, cwd=REPO
    )
    return done.stdout.strip().splitlines()[-1]


def run_child(archive: Path, out: Path) -> dict[str, float]:
    began = time.perf_counter()
    result: dict[str, float] = json.loads(_child(["-c", CHILD, str(archive), str(TRAIN), str(out)]))
    result["process"] = time.perf_counter() - began
    return result


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument(
        "--days", type=float, nargs=2, default=(30.0, 365.0), metavar=("SHORT", "LONG")
    )
    parser.add_argument("--generate", nargs=2, metavar=("PATH", "DAYS"), help=argparse.SUPPRESS)
    args = parser.parse_args()
    if args.generate:
        print(make_archive(Path(args.generate[0]), float(args.generate[1])))
        return
    short, long = args.days
    os.environ.setdefault("STAGEWATCH_CACHE_DIR", str(REPO / ".cache"))
    with tempfile.TemporaryDirectory(prefix="stagewatch-bench-") as tmp:
        folder = Path(tmp)
        archives = {}
        for label, days in (("warm-up", 1.0), ("short", short), ("long", long)):
            path = folder / f"{label}.parquet"
            began = time.perf_counter()
            count = int(_child([str(Path(__file__).resolve()), "--generate", str(path), str(days)]))
            archives[label] = path
            print(
                f"generated {days:g} d: {count:,} readings, "
                f"{path.stat().st_size / 1e6:.1f} MB, in {time.perf_counter() - began:.1f} s",
                flush=True,
            )
        run_child(archives["warm-up"], folder / "out-warm-up")
        results = {}
        for label, days in (("short", short), ("long", long)):
            r = run_child(archives[label], folder / f"out-{label}")
            results[label] = r
            rate = r["steps"] / r["seconds"]
            bare = r["steps"] / (r["seconds"] - r["report"])
            print(
                f"{days:g} d: {int(r['steps']):,} time steps ({int(r['readings']):,} readings) "
                f"replayed in {r['seconds']:.1f} s ({r['process']:.1f} s with interpreter start, "
                f"{r['report']:.1f} s of it the report): {rate:,.0f} steps/s end to end, "
                f"{bare:,.0f} without the report (target >= {TARGET_RATE:,.0f}: "
                f"{'met' if rate >= TARGET_RATE else 'NOT met'}); "
                f"peak RSS {r['peak'] / 1e6:.0f} MB (VmHWM {r['hwm'] / 1e6:.0f} MB; target < "
                f"{TARGET_PEAK / 1e6:.0f} MB: {'met' if r['peak'] < TARGET_PEAK else 'NOT met'})",
                flush=True,
            )
        ratio = results["long"]["peak"] / results["short"]["peak"]
        print(
            f"peak memory {long:g} d / {short:g} d: {ratio:.2f} (target <= {TARGET_RATIO}: "
            f"{'met' if ratio <= TARGET_RATIO else 'NOT met'})"
        )


if __name__ == "__main__":
    main()
