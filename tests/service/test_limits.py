"""Request limits: body size, batch size, the per-key ingest rate; inputs JSON cannot echo.

These limits do not depend on the database, so the service runs on SQLite only.
"""

from __future__ import annotations

import json
import time
from collections.abc import Iterator
from pathlib import Path

import pytest
from fastapi.testclient import TestClient

from service.app import create_app
from service.auth import hash_key
from service.limits import BURST_SECONDS, IngestRateLimiter
from service.settings import Settings, SettingsError, load_settings

DEMO = Path("replay_data/wrenfield/train.toml")
NAME = "wrenfield-line2"
READINGS = f"/api/v1/trains/{NAME}/readings"
ADMIN = "sw_limits_admin_key_0123456789abcdefghi"
BRIDGE = "sw_limits_bridge_key_0123456789abcdefgh"
OTHER = "sw_limits_other_key_0123456789abcdefghi"


def start(tmp_path: Path, **overrides: object) -> TestClient:
    settings = Settings(
        data_dir=tmp_path,
        database_url=f"sqlite:///{tmp_path / 'limits.db'}",
        bootstrap_key=ADMIN,
        **overrides,  # type: ignore[arg-type]
    )
    return TestClient(create_app(settings))


@pytest.fixture
def client(tmp_path: Path) -> Iterator[TestClient]:
    with start(tmp_path, max_body_bytes=20_000, max_batch=50, ingest_rate_limit=10.0) as c:
        keys = c.app.state.keys  # type: ignore[attr-defined]
        keys.add_api_key("bridge", "ingest", hash_key(BRIDGE))
        keys.add_api_key("other", "ingest", hash_key(OTHER))
        r = c.post("/api/v1/trains", json={"toml": DEMO.read_text()}, headers=auth(ADMIN))
        assert r.status_code == 201, r.text
        yield c


def auth(key: str) -> dict[str, str]:
    return {"Authorization": f"Bearer {key}"}


def batch(count: int, start_at: float | None = None) -> dict[str, object]:
    t0 = (time.time() - 3600.0) if start_at is None else start_at
    return {"readings": [{"tag": "FI-200", "time": t0 + k, "value": 12.0} for k in range(count)]}


def test_a_body_over_max_body_bytes_is_413_naming_the_setting(client: TestClient):
    body = json.dumps({"readings": [], "pad": "x" * 30_000}).encode()
    headers = {**auth(BRIDGE), "Content-Type": "application/json"}
    r = client.post(READINGS, content=body, headers=headers)
    assert r.status_code == 413
    assert r.json()["detail"] == "request body larger than max_body_bytes (20000 bytes)"

    # Sent in chunks, without a Content-Length: counted as it arrives.
    def chunks() -> Iterator[bytes]:
        for _ in range(30):
            yield b" " * 1000

    r = client.post(READINGS, content=chunks(), headers=headers)
    assert r.status_code == 413
    assert "max_body_bytes" in r.json()["detail"]


def test_a_batch_over_max_batch_is_413_and_nothing_is_taken(client: TestClient):
    r = client.post(READINGS, json=batch(51), headers=auth(ADMIN))
    assert r.status_code == 413 and r.json()["detail"] == "at most 50 readings per request"
    r = client.post(READINGS, json=batch(50), headers=auth(ADMIN))
    assert r.status_code == 200 and r.json()["accepted"] == 50


def test_ingest_over_the_key_rate_is_429_with_retry_after(client: TestClient):
    # 10 readings/s with a bucket of 10 s worth (100 readings, above max_batch 50).
    t0 = time.time() - 3600.0
    for k in range(2):
        r = client.post(READINGS, json=batch(50, t0 + 50 * k), headers=auth(BRIDGE))
        assert r.status_code == 200 and r.json()["accepted"] == 50, r.text
    r = client.post(READINGS, json=batch(50, t0 + 100), headers=auth(BRIDGE))
    assert r.status_code == 429
    detail = r.json()["detail"]
    assert "10 readings/s" in detail and "'bridge'" in detail
    wait = int(r.headers["Retry-After"])
    assert 1 <= wait <= 6  # 50 readings at 10/s, less what refilled meanwhile
    # The refused batch was not taken: posting it later stores all 50.
    # Another key has its own bucket.
    r = client.post(READINGS, json=batch(50, t0 + 100), headers=auth(OTHER))
    assert r.status_code == 200 and r.json()["accepted"] == 50


def test_without_the_setting_there_is_no_ingest_rate_limit(tmp_path: Path):
    with start(tmp_path, max_batch=100) as c:
        r = c.post("/api/v1/trains", json={"toml": DEMO.read_text()}, headers=auth(ADMIN))
        assert r.status_code == 201
        t0 = time.time() - 3600.0
        for k in range(15):  # 1,500 readings at once: far above any bucket of 10/s
            r = c.post(READINGS, json=batch(100, t0 + 100 * k), headers=auth(ADMIN))
            assert r.status_code == 200, r.text


def test_the_bucket_refills_at_the_rate_and_holds_at_most_its_capacity():
    now = [0.0]
    limiter = IngestRateLimiter(rate=5.0, capacity=20.0, clock=lambda: now[0])
    assert limiter.take("k", 20) == 0.0  # starts full
    assert limiter.take("k", 1) == pytest.approx(0.2)  # empty: one reading is 0.2 s away
    now[0] = 2.0  # 10 tokens back
    assert limiter.take("k", 15) == pytest.approx(1.0)  # 5 short, refused whole
    assert limiter.take("k", 10) == 0.0
    now[0] = 100.0  # a long pause refills to the capacity, no further
    assert limiter.take("k", 20) == 0.0
    assert limiter.take("k", 1) > 0.0
    assert limiter.take("other", 20) == 0.0  # one bucket per key


def test_the_bucket_always_holds_a_full_batch():
    assert IngestRateLimiter.for_batches(10.0, 50).capacity == 10.0 * BURST_SECONDS
    assert IngestRateLimiter.for_batches(1.0, 10_000).capacity == 10_000
    with pytest.raises(ValueError, match="exceeds the bucket"):
        IngestRateLimiter(rate=1.0, capacity=5.0).take("k", 6)
    for bad in (0.0, -1.0, float("nan"), float("inf")):
        with pytest.raises(ValueError, match="rate must be a positive"):
            IngestRateLimiter(rate=bad, capacity=5.0)


@pytest.mark.parametrize("value", ["0", "-5", "nan", "inf", "fast"])
def test_an_invalid_ingest_rate_limit_names_the_setting(
    monkeypatch: pytest.MonkeyPatch, value: str
):
    monkeypatch.setenv("STAGEWATCH_INGEST_RATE_LIMIT", value)
    with pytest.raises(SettingsError, match="ingest_rate_limit"):
        load_settings()


def test_the_openapi_document_lists_the_limits(client: TestClient):
    responses = client.get("/openapi.json").json()["paths"][
        "/api/v1/trains/{name}/readings"
    ]["post"]["responses"]
    assert {"400", "401", "403", "404", "413", "422", "429", "503"} <= set(responses)
    assert "Retry-After" in responses["429"]["headers"]


@pytest.mark.parametrize(
    ("body", "where", "message"),
    [
        ('{"readings":[{"tag":"FI-200","time":NaN,"value":1}]}', "time", "finite"),
        ('{"readings":[{"tag":"FI-200","time":1e400,"value":1}]}', "time", "finite"),
        ('{"readings":[{"tag":"FI-200","time":-1,"value":1}]}', "time", "greater than"),
        ('{"readings":[{"tag":"FI-200","time":3e11,"value":1}]}', "time", "less than"),
        ('{"readings":[{"tag":"FI-200","time":1,"value":1,"quality":NaN}]}', "quality", "integer"),
    ],
)
def test_inputs_json_cannot_echo_are_422_naming_the_field(
    client: TestClient, body: str, where: str, message: str
):
    # The refusal repeats the bad input; NaN and infinity used to break it (500).
    r = client.post(
        READINGS, content=body, headers={**auth(BRIDGE), "Content-Type": "application/json"}
    )
    assert r.status_code == 422, r.text
    error = r.json()["detail"][0]
    assert error["loc"] == ["body", "readings", 0, where]
    assert message in error["msg"]
