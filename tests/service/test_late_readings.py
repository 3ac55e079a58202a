"""Late lab results in the service: read back from the journal, same numbers as in memory.

The service keeps a short window of each train's event log in memory
(``Settings.event_memory``) and reads older readings back from its journal when a
late reading needs them. Its stored estimate history must then be what a session
holding the whole history horizon in memory produces from the same batches.
"""

from __future__ import annotations

import time
from pathlib import Path
from typing import Any

import numpy as np
from fastapi.testclient import TestClient

from estimator.config import load_train_config
from estimator.session import TrainSession
from service.app import create_app
from service.settings import Settings
from tests.service.test_app import ADMIN, DEMO, URL, demo_readings

HOUR = 3600.0


def late_lab_batches(end: float) -> list[list[dict[str, object]]]:
    """Nine hours of the demo archive in 5-minute batches; the lab result 3 h late.

    The archive's first lab result is sampled 8 h in: it arrives at 11 h.
    """
    readings = demo_readings(9.0, end - 3 * HOUR)
    lab = [r for r in readings if r["tag"] == "LAB-202F"]
    rest = [r for r in readings if r["tag"] != "LAB-202F"]
    assert len(lab) >= 1
    t0 = float(rest[0]["time"])  # type: ignore[arg-type]
    batches: list[list[dict[str, object]]] = []
    for k in range(int(12 * HOUR / 300)):
        lo, hi = t0 + 300.0 * k, t0 + 300.0 * (k + 1)
        batch = [r for r in rest if lo <= r["time"] < hi]  # type: ignore[operator]
        batch += [r for r in lab if lo <= r["time"] + 3 * HOUR < hi]  # type: ignore[operator]
        if batch:
            batches.append(batch)
    assert sum(b["tag"] == "LAB-202F" for batch in batches for b in batch) == len(lab)
    return batches


def post_and_mirror(
    client: TestClient,
    session: TrainSession,
    batches: list[list[dict[str, object]]],
    vessel: int,
    species: int,
) -> dict[float, float]:
    """Post each batch to the service and to a session; the session's rows by time.

    Returns one concentration [mol/m^3] per estimate time, revisions replacing
    earlier values, as the service's history should end up.
    """
    rows: dict[float, float] = {}
    for batch in batches:
        r = client.post(f"{URL}/readings", json={"readings": batch})
        assert r.status_code == 200 and not r.json()["refused"], r.text
        out = session.ingest(
            [b["tag"] for b in batch],  # type: ignore[misc]
            [b["time"] for b in batch],
            [b["value"] for b in batch],
        )
        column = out.estimates.concentration[:, vessel, species]
        rows.update(zip(out.estimates.time.tolist(), column.tolist(), strict=True))
    return rows


def test_history_after_late_lab_results_equals_a_whole_horizon_session(
    database_url: str, tmp_path: Path
):
    batches = late_lab_batches(time.time())
    settings = Settings(
        data_dir=tmp_path, database_url=database_url, bootstrap_key=ADMIN, event_memory=600.0
    )
    session = TrainSession(load_train_config(DEMO))  # no journal: all 6 h in memory
    with TestClient(create_app(settings)) as client:
        client.headers["Authorization"] = f"Bearer {ADMIN}"
        assert client.post("/api/v1/trains", json={"toml": DEMO.read_text()}).status_code == 201
        expected = post_and_mirror(client, session, batches, 1, 1)  # R-202 fructose
        runtime = client.app.state.hub.get("wrenfield-line2")  # type: ignore[attr-defined]
        held = len(runtime.session.filter.events()["time"])
        rows = client.get(f"{URL}/estimates").json()["data"]
    # The late results did revise hours of history, and memory held minutes of it.
    assert session.filter.events()["time"].size > 10 * held
    got = {r["time"]: r["vessels"][1]["concentration"]["fructose"]["value"] for r in rows}
    assert sorted(got) == sorted(expected)
    np.testing.assert_array_equal([got[t] for t in sorted(got)], [expected[t] for t in sorted(got)])


def test_history_keeps_the_last_row_of_each_interval(database_url: str, tmp_path: Path):
    # Transmitters every 2 s (rows every 2 s of plant time), stored one per 10 s.
    end = time.time()
    readings = [r for r in demo_readings(1.0, end) if r["tag"] != "LAB-202F"]
    dense: list[dict[str, object]] = []
    for r in readings:
        dense.append(r)
        if r["tag"] == "FI-200":  # the flow again 2, 4, ... 58 s later (archive: every 60 s)
            dense += [{**r, "time": r["time"] + k} for k in range(2, 60, 2)]  # type: ignore[operator]
    dense.sort(key=lambda r: r["time"])  # type: ignore[arg-type, return-value]
    settings = Settings(data_dir=tmp_path, database_url=database_url, bootstrap_key=ADMIN)
    assert settings.estimate_every == 10.0
    session = TrainSession(load_train_config(DEMO))
    with TestClient(create_app(settings)) as client:
        client.headers["Authorization"] = f"Bearer {ADMIN}"
        assert client.post("/api/v1/trains", json={"toml": DEMO.read_text()}).status_code == 201
        batches = [dense[k : k + 150] for k in range(0, len(dense), 150)]
        final = post_and_mirror(client, session, batches, 2, 0)  # R-203 glucose
        rows = client.get(f"{URL}/estimates").json()["data"]
        latest = client.get(f"{URL}/estimates/latest").json()
    times = np.array(sorted(final))
    buckets = np.floor(times / 10.0)
    last_of_bucket = times[np.append(buckets[1:] != buckets[:-1], True)]
    got = {r["time"]: r["vessels"][2]["concentration"]["glucose"]["value"] for r in rows}
    # Every interval's last row, once the interval is over. (A checkpoint or a read
    # stores the newest row of the interval under way; the last one replaces it.)
    assert sorted(got) == last_of_bucket.tolist()
    assert len(got) < len(final) / 4  # rows every 2 s, stored every 10 s
    assert all(got[t] == final[t] for t in got)  # the revised values, dead time included
    assert latest["time"] == times[-1]  # the latest estimate is every row's


def test_a_back_fill_is_checkpointed_at_most_once_per_min_wall_interval(
    database_url: str, tmp_path: Path
):
    # Six hours of readings posted in seconds, 100 a request (each request spans
    # more than 300 s of plant time): plant time alone (checkpoint_every 300 s)
    # saves the session after every request; checkpoint_min_wall bounds it.
    readings = [r for r in demo_readings(6.0, time.time()) if r["tag"] != "LAB-202F"]
    batches = [readings[k : k + 100] for k in range(0, len(readings), 100)]
    counts = {}
    for n, min_wall in enumerate((0.0, 3600.0)):
        name = f"backfill-{n}"  # one database for both runs: a train each
        toml = DEMO.read_text().replace('name = "wrenfield-line2"', f'name = "{name}"')
        settings = Settings(
            data_dir=tmp_path / str(min_wall),
            database_url=database_url,
            bootstrap_key=ADMIN,
            checkpoint_min_wall=min_wall,
        )
        with TestClient(create_app(settings)) as client:
            client.headers["Authorization"] = f"Bearer {ADMIN}"
            r = client.post("/api/v1/trains", json={"toml": toml})
            assert r.status_code == 201, r.text
            store = client.app.state.store  # type: ignore[attr-defined]
            saved: list[float] = []

            def counted(*args: Any, real: Any = store.save_checkpoint, into: Any = saved) -> Any:
                into.append(time.time())
                return real(*args)

            store.save_checkpoint = counted
            for batch in batches:
                r = client.post(f"/api/v1/trains/{name}/readings", json={"readings": batch})
                assert r.status_code == 200
            counts[min_wall] = len(saved)
    assert len(batches) >= 10 and counts[0.0] >= len(batches) - 1
    assert counts[3600.0] == 1  # the first, then none within the hour of wall time
