"""How often the hub writes: settled estimate rows now and then, checkpoints out of step.

Writing a train's settled estimate rows after every request cost a transaction per
request; the hub writes them at most once per ``SETTLE_EVERY_WALL`` (or once
``SETTLE_MAX_HELD`` rows are held), and the stored history must not depend on it.
Trains fed the same plant times must not all checkpoint in the same request cycle.
"""

from __future__ import annotations

import time
from pathlib import Path
from typing import Any

import pytest
from fastapi.testclient import TestClient

import service.hub as hub_module
from service.app import create_app
from service.settings import Settings
from tests.service.test_app import ADMIN, DEMO, demo_readings


def demo_train(name: str) -> str:
    return DEMO.read_text().replace('name = "wrenfield-line2"', f'name = "{name}"')


def test_the_stored_history_does_not_depend_on_when_rows_are_written(
    database_url: str, tmp_path: Path, monkeypatch: pytest.MonkeyPatch
):
    readings = demo_readings(3.0, time.time())
    batches = [readings[k : k + 40] for k in range(0, len(readings), 40)]
    # One checkpoint (it writes every held row) at the start, none after.
    settings = Settings(
        data_dir=tmp_path, database_url=database_url, bootstrap_key=ADMIN, checkpoint_min_wall=1e6
    )
    cadences = {  # name: (SETTLE_EVERY_WALL [s], SETTLE_MAX_HELD)
        "every-request": (0.0, hub_module.SETTLE_MAX_HELD),
        "once-an-hour": (3600.0, hub_module.SETTLE_MAX_HELD),
        "forty-rows": (3600.0, 40),
    }
    writes: dict[str, int] = {}
    histories: dict[str, list[dict[str, Any]]] = {}
    with TestClient(create_app(settings)) as client:
        client.headers["Authorization"] = f"Bearer {ADMIN}"
        store = client.app.state.store  # type: ignore[attr-defined]
        count = [0]

        def counted(train_id: int, rows: Any, **kw: Any) -> int:
            count[0] += 1
            written: int = type(store).write_estimates(store, train_id, rows, **kw)
            return written

        monkeypatch.setattr(store, "write_estimates", counted)
        for name, (every, most) in cadences.items():
            monkeypatch.setattr(hub_module, "SETTLE_EVERY_WALL", every)
            monkeypatch.setattr(hub_module, "SETTLE_MAX_HELD", most)
            r = client.post("/api/v1/trains", json={"toml": demo_train(name)})
            assert r.status_code == 201, r.text
            count[0] = 0
            for batch in batches:
                r = client.post(f"/api/v1/trains/{name}/readings", json={"readings": batch})
                assert r.status_code == 200 and not r.json()["refused"], r.text
            writes[name] = count[0]
            histories[name] = client.get(f"/api/v1/trains/{name}/estimates").json()["data"]
    assert writes["every-request"] > len(batches) / 2  # rows settle as plant time passes
    assert writes["once-an-hour"] <= 2  # the first settle and checkpoint; the read wrote the rest
    assert writes["forty-rows"] > 3  # past the cap, held rows are written whatever the clock
    assert len(histories["every-request"]) > 150  # 3 h, a row a minute
    assert histories["once-an-hour"] == histories["every-request"]
    assert histories["forty-rows"] == histories["every-request"]


def test_trains_fed_the_same_plant_times_checkpoint_in_different_requests(
    database_url: str, tmp_path: Path, monkeypatch: pytest.MonkeyPatch
):
    # Two trains whose phases lie far apart, fed the same readings in 60 s batches.
    names = [f"phase-{k}" for k in range(40)]
    first = names[0]

    def apart(name: str) -> float:  # distance of the phases on the circle
        d = abs(hub_module._phase(name) - hub_module._phase(first))
        return min(d, 1.0 - d)

    second = max(names, key=apart)
    assert apart(second) > 0.3
    readings = [r for r in demo_readings(2.0, time.time()) if r["tag"] != "LAB-202F"]
    t0 = float(readings[0]["time"])  # type: ignore[arg-type]
    batches: dict[int, list[dict[str, object]]] = {}
    for r in readings:
        batches.setdefault(int((float(r["time"]) - t0) // 60), []).append(r)  # type: ignore[arg-type]
    settings = Settings(
        data_dir=tmp_path,
        database_url=database_url,
        bootstrap_key=ADMIN,
        checkpoint_every=600.0,
        checkpoint_min_wall=0.0,
    )
    with TestClient(create_app(settings)) as client:
        client.headers["Authorization"] = f"Bearer {ADMIN}"
        ids = {}
        for name in (first, second):
            r = client.post("/api/v1/trains", json={"toml": demo_train(name)})
            assert r.status_code == 201, r.text
            ids[client.app.state.hub.get(name).train_id] = name  # type: ignore[attr-defined]
        store = client.app.state.store  # type: ignore[attr-defined]
        saved: dict[str, list[int]] = {first: [], second: []}
        request = [0]

        def counted(train_id: int, *args: Any, **kw: Any) -> None:
            saved[ids[train_id]].append(request[0])
            type(store).save_checkpoint(store, train_id, *args, **kw)

        monkeypatch.setattr(store, "save_checkpoint", counted)
        for k in sorted(batches):
            request[0] = k
            for name in (first, second):
                r = client.post(f"/api/v1/trains/{name}/readings", json={"readings": batches[k]})
                assert r.status_code == 200, r.text
        posting = {name: list(when) for name, when in saved.items()}  # not the shutdown's
    # Every 10 min of plant time each (the first as soon as the filter starts), but
    # not in the same requests: the second train's intervals are shifted.
    for name in (first, second):
        gaps = [b - a for a, b in zip(posting[name][1:], posting[name][2:], strict=False)]
        assert len(posting[name]) >= 10 and all(9 <= g <= 11 for g in gaps), repr((posting, gaps))
    assert set(posting[first][1:]).isdisjoint(posting[second][1:])
