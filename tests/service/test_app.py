"""The REST service in-process: trains, ingest refusals, reads, auth on every route."""

from __future__ import annotations

import json
import math
import time
from collections.abc import Iterator
from pathlib import Path

import numpy as np
import pytest
from fastapi.encoders import jsonable_encoder
from fastapi.testclient import TestClient
from pydantic import ValidationError

from estimator.config import load_train_config
from estimator.session import TrainSession
from service.app import create_app
from service.auth import hash_key
from service.schemas import ReadingsIn
from service.settings import Settings
from service.store import Store

DEMO = Path("replay_data/wrenfield/train.toml")
ADMIN = "sw_admin_key_for_tests_0123456789abcdef"
NAME = "wrenfield-line2"
URL = f"/api/v1/trains/{NAME}"
ALERT_ID = f"activity_low:{NAME}"
ALERT = f"{URL}/alerts/{ALERT_ID}"


@pytest.fixture
def client(database_url: str, tmp_path: Path) -> Iterator[TestClient]:
    settings = Settings(data_dir=tmp_path, database_url=database_url, bootstrap_key=ADMIN)
    with TestClient(create_app(settings)) as c:
        c.headers["Authorization"] = f"Bearer {ADMIN}"
        r = c.post("/api/v1/trains", json={"toml": DEMO.read_text()})
        assert r.status_code == 201, r.text
        yield c


def demo_readings(hours: float, end: float) -> list[dict[str, object]]:
    """The first hours of the demo archive, shifted to end just before ``end``."""
    from service.archive import read_archive

    a = read_archive("replay_data/wrenfield/archive.parquet")
    t0 = float(a.times.min())
    keep = np.flatnonzero(a.times < t0 + hours * 3600.0)
    keep = keep[np.argsort(a.times[keep], kind="stable")]
    shift = end - float(a.times[keep].max()) - 1.0
    return [
        {"tag": a.names[a.codes[i]], "time": float(a.times[i]) + shift, "value": float(a.values[i])}
        for i in keep.tolist()
    ]


def post(client: TestClient, readings: list[dict[str, object]], size: int = 200) -> int:
    accepted = 0
    for k in range(0, len(readings), size):
        r = client.post(f"{URL}/readings", json={"readings": readings[k : k + size]})
        assert r.status_code == 200, r.text
        accepted += r.json()["accepted"]
    return accepted


def test_service_estimates_equal_the_session_for_the_same_readings(client: TestClient):
    readings = demo_readings(3.0, time.time())
    assert post(client, readings) == len(readings)
    session = TrainSession(load_train_config(DEMO))
    out = session.ingest(
        [r["tag"] for r in readings],  # type: ignore[misc]
        [r["time"] for r in readings],
        [r["value"] for r in readings],
    )
    latest = client.get(f"{URL}/estimates/latest").json()
    assert latest["time"] == pytest.approx(out.estimates.time[-1], abs=1e-6)
    for i, vessel in enumerate(latest["vessels"]):
        got = vessel["concentration"]["glucose"]["value"]
        assert got == pytest.approx(out.estimates.concentration[-1, i, 0], rel=1e-12)
    assert latest["activity"]["value"] == pytest.approx(out.estimates.activity[-1], rel=1e-12)
    rows = client.get(f"{URL}/estimates", params={"every": 600}).json()
    assert 15 <= rows["count"] <= 20  # 3 h at one row per 10 min
    csv_text = client.get(f"{URL}/estimates", params={"every": 600, "format": "csv"}).text
    assert csv_text.splitlines()[0].startswith("time,R-201.glucose,R-201.glucose.std")


def test_every_refusal_reason_comes_back_and_nothing_refused_is_journaled(client: TestClient):
    now = time.time()
    readings = demo_readings(1.0, now)
    post(client, readings)
    good = readings[-1]
    batch = [
        {"tag": "XX-1", "time": now, "value": 1.0},
        {"tag": "FI-200", "time": now, "value": math.inf},
        {"tag": "FI-200", "time": now, "value": -3.0},  # outside 0..40 m^3/h
        {"tag": "FI-200", "time": now - 7 * 3600.0, "value": 12.0},
        {"tag": "FI-200", "time": now + 3600.0, "value": 12.0},
        dict(good),  # the same reading again: stored once
        {**good, "value": float(good["value"]) + 1.0},  # type: ignore[arg-type]
        {"tag": "FI-200", "time": now - 1.0, "value": 12.0, "quality": 12},  # bad (OPC UA)
        {"tag": "FI-200", "time": now - 2.0, "value": 12.0, "quality": 100},  # uncertain: taken
    ]
    r = client.post(
        f"{URL}/readings",
        content=json.dumps({"readings": batch}),
        headers={"Content-Type": "application/json"},
    )
    assert r.status_code == 200, r.text
    body = r.json()
    assert body["accepted"] == 1 and body["duplicates"] == 1
    reasons = {x["index"]: x["reason"] for x in body["refused"]}
    assert reasons[0] == "unknown tag for this train"
    assert reasons[1] == "not a finite number"
    assert reasons[2].startswith("outside the tag's range")
    assert reasons[3] == "older than the history horizon (6 h)"
    assert reasons[4] == "time in the future beyond the tolerance (300 s)"
    assert reasons[6] == "a different value is already journaled for this tag and time"
    assert reasons[7] == "quality code 12 is bad (below 64): not applied"
    assert 5 not in reasons and 8 not in reasons


def test_bad_requests_are_422_naming_the_field(client: TestClient):
    r = client.post(
        f"{URL}/readings", json={"readings": [{"tag": "FI-200", "time": 1.0, "value": "12"}]}
    )
    assert r.status_code == 422
    assert r.json()["detail"][0]["loc"][-1] == "value"
    r = client.post(
        f"{URL}/readings", json={"readings": [{"tag": "FI-200", "time": "yesterday", "value": 1.0}]}
    )
    assert r.status_code == 422
    bad = DEMO.read_text().replace('volume = "9 m^3"', 'volume = "-9 m^3"')
    r = client.put(URL, json={"toml": bad})
    assert r.status_code == 422
    assert any(d["loc"][-1] == "volume" for d in r.json()["detail"])
    assert client.get("/api/v1/trains/nope").status_code == 404


@pytest.mark.parametrize(
    "body",
    [
        {"readings": [{"tag": "FI-200", "time": 1.7e9, "value": True}]},
        {"readings": [{"tag": "", "time": -1, "value": 1.0, "quality": 300}]},
        {"readings": [{"tag": "FI-200", "time": "2026-01-01T00:00:00", "value": 1.0}]},
        {"readings": [{"tag": "FI-200\u0000", "time": 1.7e9, "value": 1.0}]},
        {"readings": [{"tag": "FI-200", "time": 1.7e9}], "train": "x"},
        {"readings": []},
        [],
    ],
)
def test_a_bad_batch_gets_the_models_own_422(client: TestClient, body: object):
    # The route validates straight into columns; its refusals are still ReadingsIn's,
    # as the framework reports a model's errors (located under "body").
    r = client.post(f"{URL}/readings", json=body)
    assert r.status_code == 422
    with pytest.raises(ValidationError) as caught:
        ReadingsIn.model_validate(body, from_attributes=True)
    want = [{**e, "loc": ["body", *e["loc"]]} for e in caught.value.errors(include_url=False)]
    assert r.json()["detail"] == jsonable_encoder(want)


def test_train_versions_and_retirement(client: TestClient, database_url: str):
    changed = DEMO.read_text().replace("step_persistence = 3", "step_persistence = 4")
    r = client.put(URL, json={"toml": changed})
    assert r.status_code == 200 and r.json()["version"] == 2
    assert client.get("/api/v1/trains").json()["count"] == 1
    assert client.delete(URL).status_code == 204
    assert client.get("/api/v1/trains").json()["count"] == 0
    store = Store(database_url)
    try:
        assert [v.version for v in store.train_versions(NAME)] == [1, 2]
    finally:
        store.close()


def test_observability_and_gated_routes(client: TestClient):
    obs = client.get(f"{URL}/observability").json()
    assert obs["observable"] is True and obs["n_states"] == 8
    assert client.get(f"{URL}/gated").json()["count"] == 0


@pytest.mark.parametrize("role", ["read", "ingest"])
def test_auth_on_every_route(client: TestClient, database_url: str, role: str):
    store = Store(database_url)
    key = f"sw_{role}_key_for_tests_0123456789abcdef"
    try:
        store.add_api_key(f"test-{role}", role, hash_key(key))
    finally:
        store.close()
    needs = {
        ("POST", "/api/v1/trains"): "admin",
        ("GET", "/api/v1/trains"): "read",
        ("GET", URL): "read",
        ("PUT", URL): "admin",
        ("DELETE", URL): "admin",
        ("POST", f"{URL}/readings"): "ingest",
        ("GET", f"{URL}/estimates/latest"): "read",
        ("GET", f"{URL}/estimates"): "read",
        ("GET", f"{URL}/gated"): "read",
        ("GET", f"{URL}/observability"): "read",
        ("GET", f"{URL}/stream"): "read",
        ("GET", f"{URL}/alerts"): "read",
        ("GET", f"{URL}/alerts/events"): "read",
        ("POST", f"{ALERT}/acknowledge"): "ingest",
        ("POST", f"{ALERT}/shelve"): "ingest",
        ("POST", f"{ALERT}/unshelve"): "ingest",
        ("POST", f"{ALERT}/remove-from-service"): "admin",
        ("POST", f"{ALERT}/return-to-service"): "admin",
    }
    documented = {
        (method, route.path.replace("{name}", NAME).replace("{alert_id:path}", ALERT_ID))
        for route in client.app.routes  # type: ignore[attr-defined]
        if getattr(route, "path", "").startswith("/api/")
        for method in route.methods  # type: ignore[attr-defined]
    }
    assert documented == set(needs)
    order = ["read", "ingest", "admin"]
    for (method, path), needed in needs.items():
        anonymous = client.request(method, path, headers={"Authorization": ""})
        assert anonymous.status_code == 401, (method, path)
        assert anonymous.headers["www-authenticate"].startswith("Bearer")
        wrong = client.request(method, path, headers={"Authorization": "Bearer sw_not_a_key"})
        assert wrong.status_code == 401
        if order.index(role) < order.index(needed):
            denied = client.request(method, path, headers={"Authorization": f"Bearer {key}"})
            assert denied.status_code == 403, (method, path, role)


def test_openapi_document_is_valid(client: TestClient):
    from openapi_spec_validator import validate

    spec = client.get("/openapi.json").json()
    validate(spec)
    assert "monitoring aid, not a safety system" in spec["info"]["description"]


def test_metrics_count_readings_by_outcome(client: TestClient):
    readings = demo_readings(0.5, time.time())
    post(client, readings)
    client.post(f"{URL}/readings", json={"readings": [{"tag": "XX-1", "time": 1.0, "value": 1}]})
    assert client.get("/metrics", headers={"Authorization": ""}).status_code == 401
    text = client.get("/metrics").text
    assert f"stagewatch_readings_accepted_total {float(len(readings))}" in text
    assert 'stagewatch_readings_refused_total{reason="unknown_tag"} 1.0' in text
    assert 'stagewatch_estimate_age_seconds{train="wrenfield-line2"}' in text
    assert "stagewatch_ingest_seconds_bucket" in text


def test_service_estimates_equal_the_replay_of_the_same_readings(
    client: TestClient, tmp_path: Path
):
    # One pipeline, two drivers (DESIGN.md, "Data flow"): the readings posted to the
    # service, written as an archive and replayed, give the same estimates.
    import pyarrow.parquet as pq

    from service.archive import ArchiveColumns, write_archive
    from service.replay import replay

    readings = demo_readings(4.0, time.time())
    post(client, readings)
    archive = tmp_path / "posted.csv"
    write_archive(
        archive,
        ArchiveColumns.from_readings(
            [str(r["tag"]) for r in readings],
            np.array([r["time"] for r in readings], dtype=float),
            np.array([r["value"] for r in readings], dtype=float),
        ),
    )
    replay(archive, DEMO, tmp_path / "out", progress=False, report=False)
    replayed = pq.read_table(tmp_path / "out" / "estimates.parquet").to_pandas()
    served = client.get(f"{URL}/estimates").json()["data"]
    assert len(served) == len(replayed)
    for column, vessel in (("R-201.glucose", 0), ("R-202.glucose", 1), ("R-203.glucose", 2)):
        got = [row["vessels"][vessel]["concentration"]["glucose"]["value"] for row in served]
        np.testing.assert_allclose(got, replayed[column].to_numpy(), rtol=1e-9)
    np.testing.assert_allclose(
        [row["activity"]["value"] for row in served], replayed["activity"].to_numpy(), rtol=1e-9
    )


def test_refused_readings_are_echoed_in_the_posted_unit(client: TestClient):
    r = client.post(
        f"{URL}/readings",
        json={"readings": [{"tag": "FI-200", "time": time.time(), "value": -3.5}]},
    )
    refused = r.json()["refused"]
    assert refused[0]["value"] == -3.5  # m^3/h as posted, not m^3/s


def test_non_finite_estimates_are_kept_out_of_the_store(client: TestClient):
    # The filter bounds its state, so this should never happen; if it did, the rows
    # are left out (the store holds JSON numbers) and the request still succeeds.
    from estimator.session import EstimateBatch

    hub = client.app.state.hub  # type: ignore[attr-defined]
    session = hub.get(NAME).session
    real = session.ingest_codes

    def poisoned(*args: object, **kwargs: object):
        out = real(*args, **kwargs)  # type: ignore[arg-type]
        if len(out.estimates):
            bad = {n: getattr(out.estimates, n).copy() for n in EstimateBatch.__dataclass_fields__}
            bad["activity_std"][0] = math.nan
            out.estimates = EstimateBatch(**bad)
        return out

    session.ingest_codes = poisoned
    readings = demo_readings(1.0, time.time())
    assert post(client, readings) == len(readings)
    rows = client.get(f"{URL}/estimates").json()["data"]
    assert rows and all(math.isfinite(r["activity"]["std"]) for r in rows)


def test_a_reading_that_yields_no_estimate_yet_is_accepted(client: TestClient):
    # One flow reading: the filter waits for every input's first reading, so the
    # session returns no estimate rows; the reading is still journaled.
    reading = {"tag": "FI-200", "time": time.time(), "value": 12.0}
    r = client.post(f"{URL}/readings", json={"readings": [reading]})
    assert r.status_code == 200, r.text
    assert r.json()["accepted"] == 1
    assert client.get(f"{URL}/estimates/latest").status_code == 404
