"""The live demo: the service on loopback, fed the demo month in accelerated time.

What ``make run`` shows a new user: the real service (uvicorn, SQLite in
``var/demo``) with the invented Wrenfield line-2 train registered through the API,
and a feeder posting the demo archive as a historian bridge would, many times
faster than real time, so the estimates move while you watch. The archive's times
are shifted so that the month ends now: nothing is refused as too far in the
future, and the estimates carry recent timestamps.
"""

from __future__ import annotations

import shutil
import threading
import time
from pathlib import Path

import httpx
import numpy as np
import uvicorn
from pydantic import SecretStr

from service.app import create_app
from service.archive import read_archive
from service.auth import new_key
from service.settings import Settings

DEMO_DIR = Path(__file__).resolve().parent.parent / "replay_data" / "wrenfield"


def run_live_demo(
    *,
    port: int = 8470,
    speed: float = 1800.0,
    data_dir: Path = Path("var/demo"),
    stop_after: float | None = None,
    echo: bool = True,
) -> dict[str, object]:
    """Run the service and feed it the demo archive until interrupted.

    Parameters
    ----------
    port : int
        Loopback TCP port.
    speed : float
        Archive seconds fed per wall-clock second (1800: the month in 24 minutes).
    data_dir : Path
        Folder for the demo database; emptied at start.
    stop_after : float, optional
        Stop after this many wall-clock seconds (tests); run until Ctrl-C otherwise.
    echo : bool
        Print the URL, the key and progress.

    Returns
    -------
    dict
        ``url``, ``key`` and ``posted`` (readings accepted) when it stops.
    """
    shutil.rmtree(data_dir, ignore_errors=True)
    data_dir.mkdir(parents=True)
    if echo:
        print("stagewatch: loading the filter core (compiled on the first run only) ...")
    _warm_up()
    key = new_key()
    settings = Settings(
        data_dir=data_dir, port=port, bootstrap_key=SecretStr(key), log_json=False
    )
    server = uvicorn.Server(
        uvicorn.Config(create_app(settings), host="127.0.0.1", port=port, log_level="warning")
    )
    thread = threading.Thread(target=server.run, daemon=True)
    thread.start()
    base = f"http://127.0.0.1:{port}"
    headers = {"Authorization": f"Bearer {key}"}
    posted = 0
    try:
        _wait_ready(base)
        with httpx.Client(base_url=base, headers=headers, timeout=120.0) as client:
            toml = (DEMO_DIR / "train.toml").read_text()
            r = client.post("/api/v1/trains", json={"toml": toml})
            r.raise_for_status()
            name = r.json()["name"]
            if echo:
                print(f"stagewatch live demo: train {name} fed the demo month at {speed:g}x")
                print(f"  dashboard: {base}/   (asks for the key below)")
                print(f"  API docs:  {base}/docs")
                print(f"  key:       {key}   (admin; send as 'Authorization: Bearer <key>')")
                print(f"  latest:    curl -H 'Authorization: Bearer {key}' "
                      f"{base}/api/v1/trains/{name}/estimates/latest")  # fmt: skip
                print("  stop with Ctrl-C. A monitoring aid, not a safety system.")
            posted = _feed(client, name, speed, stop_after, echo)
    except KeyboardInterrupt:
        pass
    finally:
        server.should_exit = True
        thread.join(timeout=30)
    return {"url": base, "key": key, "posted": posted}


def _warm_up() -> None:
    """Compile (or load from numba's cache) the kernels before the server starts.

    Otherwise the first posted batch would wait for the compiler inside a request.
    """
    from estimator.config import load_train_config
    from estimator.session import TrainSession

    session = TrainSession(load_train_config(DEMO_DIR / "train.toml"))
    config = session.config
    tags = [config.feed.flow.tag, "AI-203G", "AI-200G"]
    temps = [v.temperature.tag for v in config.vessels if not isinstance(v.temperature, float)]
    session.ingest(tags + temps, [0.0, 600.0, 600.0] + [0.0] * len(temps),
                   [12.0, 1300.0, 2400.0] + [58.0] * len(temps))  # fmt: skip
    session.ingest(tags, [900.0, 900.0, 900.0], [12.0, 1300.0, 2400.0])


def _wait_ready(base: str, timeout: float = 120.0) -> None:
    deadline = time.monotonic() + timeout
    while time.monotonic() < deadline:
        try:
            if httpx.get(f"{base}/readyz", timeout=1.0).status_code == 200:
                return
        except httpx.HTTPError:
            pass
        time.sleep(0.1)
    raise RuntimeError(f"the service at {base} did not become ready")


def _feed(
    client: httpx.Client, name: str, speed: float, stop_after: float | None, echo: bool
) -> int:
    """Post the archive in order of arrival, as fast as ``speed`` allows."""
    archive = read_archive(DEMO_DIR / "archive.parquet")
    arrival = archive.times if archive.received is None else np.where(
        np.isnan(archive.received), archive.times, archive.received
    )  # fmt: skip
    order = np.argsort(arrival, kind="stable")
    shift = time.time() - float(arrival.max()) - 60.0
    start_archive = float(arrival[order[0]])
    start_wall = time.monotonic()
    k = 0
    posted = 0
    last_echo = start_wall
    while k < len(order):
        now = time.monotonic()
        if stop_after is not None and now - start_wall > stop_after:
            break
        horizon = start_archive + (now - start_wall) * speed
        j = int(np.searchsorted(arrival[order], horizon, side="right"))
        batch = order[k : max(j, k + 1)][:2000]
        readings = [
            {
                "tag": archive.names[archive.codes[i]],
                "time": float(archive.times[i]) + shift,
                "value": float(archive.values[i]),
            }
            for i in batch.tolist()
        ]
        r = client.post(f"/api/v1/trains/{name}/readings", json={"readings": readings})
        r.raise_for_status()
        posted += int(r.json()["accepted"])
        k += len(batch)
        if echo and now - last_echo > 10.0:
            latest = client.get(f"/api/v1/trains/{name}/estimates/latest")
            if latest.status_code == 200:
                e = latest.json()
                glucose = ", ".join(
                    f"{v['name']} {v['concentration']['glucose']['value']:.0f}"
                    for v in e["vessels"]
                )
                day = (float(archive.times[batch[-1]]) - start_archive) / 86400.0
                print(f"  day {day:5.2f}: glucose {glucose} mol/m3, "
                      f"activity {e['activity']['value']:.3f}")  # fmt: skip
            last_echo = now
        time.sleep(0.25)
    return posted
