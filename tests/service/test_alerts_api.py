"""Alerts over the REST service: the log, operator actions, roles, SSE and webhooks.

The readings come from the plant simulator: the demo train loses 25 % of its
catalyst activity at once, 4 h into a 12 h run, which raises shortfall and activity
alerts within a few hours (as in the session's own test).
"""

from __future__ import annotations

import json
import math
import threading
import time
from collections.abc import Iterator
from contextlib import contextmanager
from datetime import UTC, datetime
from http.server import BaseHTTPRequestHandler, ThreadingHTTPServer
from pathlib import Path
from typing import Any

import httpx
import numpy as np
import pytest
from fastapi.testclient import TestClient

from estimator.alerts import DISCLAIMER, AlertEvent
from estimator.config import load_train_config
from estimator.session import TrainSession
from estimator.simulate import Profile, Scenario, simulate
from service.app import create_app
from service.auth import hash_key
from service.settings import Settings
from service.store import Store, StoreUnavailable
from service.webhooks import WebhookSender
from tests.service.test_app import ADMIN, DEMO, NAME, URL
from tests.service.test_live import AUTH, Server, sse_events

HOUR = 3600.0
OPERATOR = "sw_operator_key_for_tests_0123456789abcdef"
READER = "sw_reader_key_for_tests_0123456789abcdef"
WARNING_R201 = "conversion_shortfall_warning:R-201"
ACTIVITY_LOW = f"activity_low:{NAME}"

Batch = list[dict[str, Any]]


def loss_batches(
    end: float,
    hours: float = 12.0,
    after: float = 0.0,
    *,
    loss: float = 0.25,
    loss_at: float = 4 * HOUR,
    seed: int = 2,
) -> list[Batch]:
    """Simulated readings in tag units, hour by hour, the last at ``end - 1 + after``.

    ``after`` [s] extends the run past ``end`` (readings stamped in the future); the
    activity falls by ``loss`` at ``loss_at`` [s from the start].
    """
    session = TrainSession(load_train_config(DEMO))
    duration = hours * HOUR + after
    scenario = Scenario(
        duration=duration,
        activity=Profile(((0.0, 1.0), (loss_at, 1.0), (loss_at, 1.0 - loss))),
        analyzer_period={"AI-203G": 240.0, "AI-200G": 120.0, "LAB-202F": 12 * HOUR},
    )
    tags, times, values = simulate(session.model, scenario, seed=seed).columns()
    units = dict(zip(session.tags, session.units, strict=True))
    native = values.copy()
    for i, tag in enumerate(tags):
        if units[tag] == "m^3/h":
            native[i] = values[i] * 3600.0
        elif units[tag] == "degC":
            native[i] = values[i] - 273.15
    shifted = times + (end + after - 1.0 - float(times.max()))
    order = np.argsort(shifted, kind="stable")
    first = float(shifted[order[0]])
    batches: list[Batch] = []
    for lo in np.arange(first, float(shifted.max()) + 1.0, HOUR):
        sel = [i for i in order.tolist() if lo <= shifted[i] < lo + HOUR]
        batch = [
            {"tag": tags[i], "time": float(shifted[i]), "value": float(native[i])} for i in sel
        ]
        if batch:
            batches.append(batch)
    return batches


def post_batches(client: TestClient | httpx.Client, batches: list[Batch]) -> None:
    for batch in batches:
        r = client.post(f"{URL}/readings", json={"readings": batch})
        assert r.status_code == 200, r.text
        assert r.json()["refused"] == [], r.text


def session_events(batches: list[Batch]) -> list[dict[str, Any]]:
    """What a TrainSession logs for the same readings in the same batches."""
    session = TrainSession(load_train_config(DEMO))
    events = []
    for batch in batches:
        out = session.ingest(
            [r["tag"] for r in batch], [r["time"] for r in batch], [r["value"] for r in batch]
        )
        events += [e.to_dict() for e in out.alerts]
    return events


def served_events(client: TestClient, **params: Any) -> list[dict[str, Any]]:
    r = client.get(f"{URL}/alerts/events", params=params)
    assert r.status_code == 200, r.text
    body = r.json()
    assert body["count"] == len(body["data"])
    return list(body["data"])


def without_api_fields(event: dict[str, Any]) -> dict[str, Any]:
    return {k: v for k, v in event.items() if k not in ("train", "time_utc")}


def add_keys(database_url: str) -> None:
    with Store(database_url) as store:
        store.add_api_key("operator-ann", "ingest", hash_key(OPERATOR))
        store.add_api_key("dashboard", "read", hash_key(READER))


def app_client(database_url: str, tmp_path: Path, **settings: Any) -> TestClient:
    config = Settings(data_dir=tmp_path, database_url=database_url, bootstrap_key=ADMIN, **settings)
    client = TestClient(create_app(config))
    client.headers["Authorization"] = f"Bearer {ADMIN}"
    return client


@contextmanager
def demo_service(database_url: str, tmp_path: Path, **settings: Any) -> Iterator[TestClient]:
    """The service with the demo train registered and an operator's and a reader's key."""
    with app_client(database_url, tmp_path, **settings) as c:
        r = c.post("/api/v1/trains", json={"toml": DEMO.read_text()})
        assert r.status_code == 201, r.text
        add_keys(database_url)
        yield c


@pytest.fixture
def client(database_url: str, tmp_path: Path) -> Iterator[TestClient]:
    with demo_service(database_url, tmp_path) as c:
        yield c


def checkpointed_state(database_url: str, alert_id: str) -> str:
    """The alert's state in the train's latest checkpoint (what a restart resumes)."""
    with Store(database_url) as store:
        record = store.get_train(NAME)
        assert record is not None
        saved = store.latest_checkpoint(record.id)
    assert saved is not None
    session = TrainSession.restore(record.train_config(), saved.data)
    assert session.alert_engine is not None
    return session.alert_engine.alert(alert_id).state


def as_operator(key: str = OPERATOR) -> dict[str, str]:
    return {"Authorization": f"Bearer {key}"}


def test_store_keeps_each_alert_event_once(database_url: str):
    def event(seq: int, alert_id: str, t: float, figure: float) -> AlertEvent:
        rule, subject = alert_id.split(":")
        return AlertEvent(
            seq, alert_id, rule, subject, "warning", t, "normal", "active_unacknowledged",
            "stagewatch", "limit exceeded", figure, 0.01, "", f"words {seq}. {DISCLAIMER}",
        )  # fmt: skip

    events = [
        event(1, WARNING_R201, 100.0, 0.02),
        event(2, ACTIVITY_LOW, 160.0, math.nan),
        event(3, WARNING_R201, 220.0, 0.03),
    ]
    with Store(database_url) as store:
        store.create_all()
        train = store.create_train(NAME, "demo", "{}", "")
        assert store.last_alert_sequence(train.id) == 0
        assert store.append_alert_events(train.id, events[:2]) == 2
        # A journal replay logs the first events again: only the new one is stored.
        assert store.append_alert_events(train.id, events) == 1
        stored = store.read_alert_events(train.id)
        assert [e.sequence for e in stored] == [1, 2, 3]
        assert stored[0] == events[0] and stored[1].figure is None  # no NaN stored
        assert store.read_alert_events(train.id, start=160.0, end=220.0) == [stored[1]]
        assert store.read_alert_events(train.id, alert_id=WARNING_R201) == [events[0], events[2]]
        assert store.last_alert_sequence(train.id) == 3


def test_service_alert_events_equal_the_session_for_the_same_readings(client: TestClient):
    # One pipeline, two drivers: the service's alert log is the session's, event for
    # event (ids, states, times, figures and words), for the same batches.
    batches = loss_batches(time.time())
    post_batches(client, batches)
    expected = session_events(batches)
    served = served_events(client)
    assert [without_api_fields(e) for e in served] == expected
    raised = {e["alert_id"] for e in expected if e["to_state"] == "active_unacknowledged"}
    assert {WARNING_R201, ACTIVITY_LOW} <= raised
    assert all(e["train"] == NAME and e["message"].endswith(DISCLAIMER) for e in served)
    assert served[0]["time_utc"] == datetime.fromtimestamp(served[0]["time"], UTC).isoformat()

    # The current alerts are those that are not normal, most urgent first.
    body = client.get(f"{URL}/alerts").json()
    current = {a["alert_id"]: a["state"] for a in body["data"]}
    assert body["count"] == len(current) and WARNING_R201 in current
    latest = {e["alert_id"]: e["to_state"] for e in expected}
    assert current == {k: v for k, v in latest.items() if v != "normal"}
    assert body["data"][0]["priority"] == "high"
    assert all(a["message"].endswith(DISCLAIMER) for a in body["data"])

    # Filters and time ranges.
    warnings = client.get(f"{URL}/alerts", params={"priority": "warning"}).json()["data"]
    assert warnings and all(a["priority"] == "warning" for a in warnings)
    r201 = client.get(f"{URL}/alerts", params={"subject": "R-201"}).json()["data"]
    assert {a["alert_id"] for a in r201} <= {WARNING_R201, "conversion_shortfall_high:R-201"}
    assert WARNING_R201 in {a["alert_id"] for a in r201}
    normal = client.get(f"{URL}/alerts", params={"state": "normal"}).json()["data"]
    assert normal and all(a["state"] == "normal" for a in normal)
    assert client.get(f"{URL}/alerts", params={"state": "asleep"}).status_code == 422
    middle = served[len(served) // 2]["time"]
    later = served_events(client, start=middle)
    assert later == [e for e in served if e["time"] >= middle]
    assert served_events(client, alert_id=WARNING_R201) == [
        e for e in served if e["alert_id"] == WARNING_R201
    ]


def test_operator_actions_change_states_and_are_logged_with_who_and_why(
    database_url: str, tmp_path: Path
):
    with demo_service(database_url, tmp_path) as client:
        post_batches(client, loss_batches(time.time()))
        ack = f"{URL}/alerts/{WARNING_R201}/acknowledge"
        reason = {"reason": "lab sample ordered for R-201"}

        # A read key sees alerts but cannot act on them.
        assert client.get(f"{URL}/alerts", headers=as_operator(READER)).status_code == 200
        assert client.post(ack, json=reason, headers=as_operator(READER)).status_code == 403

        r = client.post(ack, json=reason, headers=as_operator())
        assert r.status_code == 200, r.text
        event, alert = r.json()["event"], r.json()["alert"]
        assert (event["from_state"], event["to_state"]) == (
            "active_unacknowledged",
            "active_acknowledged",
        )
        assert event["who"] == "operator-ann" and event["why"] == reason["reason"]
        assert event["message"].endswith(DISCLAIMER)
        assert alert["state"] == "active_acknowledged" and alert["note"] == reason["reason"]
        assert served_events(client, alert_id=WARNING_R201)[-1] == event
        # The action is in the train's latest checkpoint, not only in memory.
        assert checkpointed_state(database_url, WARNING_R201) == "active_acknowledged"
        acknowledged = client.get(f"{URL}/alerts", params={"state": "active_acknowledged"}).json()
        assert [a["alert_id"] for a in acknowledged["data"]] == [WARNING_R201]

        # Nothing left to acknowledge: 409 with the engine's words; unknown ids: 404.
        again = client.post(ack, json=reason, headers=as_operator())
        assert again.status_code == 409
        assert "nothing to acknowledge" in again.json()["detail"]
        missing = client.post(f"{URL}/alerts/no_rule:R-201/acknowledge", json=reason)
        assert missing.status_code == 404 and "no_rule:R-201" in missing.json()["detail"]
        nowhere = client.post(f"/api/v1/trains/nope/alerts/{WARNING_R201}/acknowledge", json=reason)
        assert nowhere.status_code == 404
        assert client.post(ack, json={}, headers=as_operator()).status_code == 422

        # Shelving: within alerts.max_shelve (24 h on the demo train), then unshelved.
        shelve = f"{URL}/alerts/{ACTIVITY_LOW}/shelve"
        too_long = {"until": time.time() + 30 * HOUR, "reason": "catalyst change next week"}
        r = client.post(shelve, json=too_long, headers=as_operator())
        assert r.status_code == 422
        assert "limited to 24 h" in r.json()["detail"][0]["msg"]
        past = {"until": time.time() - 60.0, "reason": "too late"}
        assert client.post(shelve, json=past, headers=as_operator()).status_code == 422
        until = datetime.fromtimestamp(time.time() + HOUR, UTC).replace(microsecond=0)
        r = client.post(
            shelve,
            json={"until": until.isoformat(), "reason": "known: catalyst batch 7 is weak"},
            headers=as_operator(),
        )
        assert r.status_code == 200, r.text
        assert r.json()["alert"]["state"] == "shelved"
        assert r.json()["alert"]["shelved_until"] == until.timestamp()
        shelved = client.get(f"{URL}/alerts", params={"state": "shelved"}).json()["data"]
        assert [a["alert_id"] for a in shelved] == [ACTIVITY_LOW]
        again = client.post(shelve, json={"until": until.timestamp(), "reason": "x"})
        assert again.status_code == 409
        r = client.post(
            f"{URL}/alerts/{ACTIVITY_LOW}/unshelve",
            json={"reason": "shift change"},
            headers=as_operator(),
        )
        assert r.status_code == 200, r.text
        # The condition is still active: back to unacknowledged.
        assert r.json()["event"]["to_state"] == "active_unacknowledged"

        # Out of service and back: an administrator's action.
        remove = f"{URL}/alerts/{ACTIVITY_LOW}/remove-from-service"
        why = {"reason": "activity estimate under review, MOC-1142"}
        assert client.post(remove, json=why, headers=as_operator()).status_code == 403
        r = client.post(remove, json=why)
        assert r.status_code == 200 and r.json()["alert"]["state"] == "out_of_service"
        assert r.json()["event"]["who"] == "bootstrap"
        back = f"{URL}/alerts/{ACTIVITY_LOW}/return-to-service"
        r = client.post(back, json={"reason": "review closed"})
        assert r.status_code == 200 and r.json()["alert"]["state"] == "active_unacknowledged"
        assert client.post(back, json={"reason": "twice"}).status_code == 409

        log = served_events(client, alert_id=ACTIVITY_LOW)
        assert [(e["to_state"], e["who"]) for e in log[-4:]] == [
            ("shelved", "operator-ann"),
            ("active_unacknowledged", "operator-ann"),
            ("out_of_service", "bootstrap"),
            ("active_unacknowledged", "bootstrap"),
        ]
        sequences = [e["sequence"] for e in served_events(client)]
        assert sequences == list(range(1, len(sequences) + 1))

        before = client.get(f"{URL}/alerts").json()
        events_before = served_events(client)
    # A restart keeps the operators' work: each action was checkpointed.
    with app_client(database_url, tmp_path) as restarted:
        assert restarted.get(f"{URL}/alerts").json() == before
        assert served_events(restarted) == events_before
        r = restarted.post(ack, json=reason)
        assert r.status_code == 409  # still acknowledged
        r = restarted.post(f"{URL}/alerts/{ACTIVITY_LOW}/acknowledge", json={"reason": "seen"})
        assert r.status_code == 200
        assert r.json()["event"]["sequence"] == events_before[-1]["sequence"] + 1


def test_a_shelving_expires_when_later_estimates_pass_its_end(database_url: str, tmp_path: Path):
    # Readings may be stamped up to 3 h ahead here, so that plant time can pass the
    # end of a shelving that started at the wall-clock time of the request.
    now = time.time()
    batches = loss_batches(now, after=2 * HOUR)
    past = [b for b in batches if b[-1]["time"] < now]
    future = [b for b in batches if b[-1]["time"] >= now]
    with app_client(database_url, tmp_path, future_tolerance=3 * HOUR) as client:
        assert client.post("/api/v1/trains", json={"toml": DEMO.read_text()}).status_code == 201
        post_batches(client, past)
        until = time.time() + 0.5 * HOUR
        r = client.post(
            f"{URL}/alerts/{ACTIVITY_LOW}/shelve", json={"until": until, "reason": "known"}
        )
        assert r.status_code == 200, r.text
        post_batches(client, future)
        alert = next(
            a for a in client.get(f"{URL}/alerts").json()["data"] if a["alert_id"] == ACTIVITY_LOW
        )
        assert alert["state"] == "active_unacknowledged"  # the activity is still low
        expiry = served_events(client, alert_id=ACTIVITY_LOW)[-1]
        assert (expiry["from_state"], expiry["to_state"]) == ("shelved", "active_unacknowledged")
        assert expiry["who"] == "stagewatch" and expiry["time"] == until
        assert expiry["why"].startswith("shelving expired")


def test_alert_states_and_numbering_carry_over_a_config_change(database_url: str, tmp_path: Path):
    changed = DEMO.read_text().replace("step_persistence = 3", "step_persistence = 4")
    assert changed != DEMO.read_text()
    with demo_service(database_url, tmp_path) as client:
        post_batches(client, loss_batches(time.time()))
        r = client.post(f"{URL}/alerts/{WARNING_R201}/acknowledge", json={"reason": "seen"})
        assert r.status_code == 200
        last = r.json()["event"]["sequence"]
        before = client.get(f"{URL}/alerts").json()
        r = client.put(URL, json={"toml": changed})
        assert r.status_code == 200 and r.json()["version"] == 2
        assert client.get(f"{URL}/alerts").json() == before
    # The new version's session was checkpointed at once: a restart resumes it.
    with app_client(database_url, tmp_path) as restarted:
        assert restarted.get(f"{URL}/alerts").json() == before
        r = restarted.post(f"{URL}/alerts/{ACTIVITY_LOW}/acknowledge", json={"reason": "seen"})
        assert r.status_code == 200 and r.json()["event"]["sequence"] == last + 1


class FailingStore(Store):
    """A store whose checkpoints fail while ``failing`` is set (a database gone away)."""

    failing = False

    def save_checkpoint(self, *args: Any, **kwargs: Any) -> None:
        if self.failing:
            raise StoreUnavailable("the database cannot be reached (test)")
        super().save_checkpoint(*args, **kwargs)


def test_an_action_that_cannot_be_stored_leaves_the_alert_as_it_was(
    database_url: str, tmp_path: Path
):
    store = FailingStore(database_url)
    store.create_all()
    settings = Settings(data_dir=tmp_path, database_url=database_url, bootstrap_key=ADMIN)
    try:
        with TestClient(create_app(settings, store=store)) as client:
            client.headers["Authorization"] = f"Bearer {ADMIN}"
            assert client.post("/api/v1/trains", json={"toml": DEMO.read_text()}).status_code == 201
            post_batches(client, loss_batches(time.time()))
            alerts = client.get(f"{URL}/alerts").json()
            events = served_events(client)
            store.failing = True
            ack = f"{URL}/alerts/{WARNING_R201}/acknowledge"
            r = client.post(ack, json={"reason": "seen"})
            assert r.status_code == 503 and "nothing was accepted" in r.json()["detail"]
            assert client.get(f"{URL}/alerts").json() == alerts
            assert served_events(client) == events
            store.failing = False
            r = client.post(ack, json={"reason": "seen"})
            assert r.status_code == 200
            assert r.json()["event"]["sequence"] == events[-1]["sequence"] + 1
    finally:
        store.close()


# ---------------------------------------------------------------------------- webhooks


class Receiver:
    """A webhook receiver on 127.0.0.1 that answers 503 to its first ``failures`` posts."""

    def __init__(self, failures: int = 2, status: int = 503) -> None:
        self.posts = 0
        self.accepted: list[dict[str, Any]] = []
        self.content_types: set[str] = set()
        self.arrived = threading.Condition()
        receiver = self

        class Handler(BaseHTTPRequestHandler):
            def do_POST(self) -> None:  # noqa: N802  # the name http.server calls
                body = self.rfile.read(int(self.headers["Content-Length"]))
                with receiver.arrived:
                    receiver.posts += 1
                    receiver.content_types.add(self.headers["Content-Type"])
                    code = status if receiver.posts <= failures else 200
                    if code == 200:
                        receiver.accepted.append(json.loads(body))
                    receiver.arrived.notify_all()
                self.send_response(code)
                self.send_header("Content-Length", "0")
                self.end_headers()

            def log_message(self, *args: object) -> None:
                pass

        self.server = ThreadingHTTPServer(("127.0.0.1", 0), Handler)
        self.url = f"http://127.0.0.1:{self.server.server_address[1]}/hook?token=secret"
        self.thread = threading.Thread(target=self.server.serve_forever, daemon=True)

    def __enter__(self) -> Receiver:
        self.thread.start()
        return self

    def __exit__(self, *exc: object) -> None:
        self.server.shutdown()
        self.server.server_close()

    def wait_for(self, count: int, timeout: float = 60.0) -> list[dict[str, Any]]:
        """Wait until ``count`` events were accepted (the timeout only guards a hang)."""
        with self.arrived:
            self.arrived.wait_for(lambda: len(self.accepted) >= count, timeout)
            return list(self.accepted)


def test_webhook_is_retried_with_backoff_until_accepted():
    event = {"train": NAME, "sequence": 1, "alert_id": ACTIVITY_LOW, "message": "x"}
    with Receiver(failures=2) as receiver:
        sender = WebhookSender([receiver.url], first_delay=0.01, max_delay=0.05)
        sender.start()
        try:
            assert sender.offer(event)
            assert receiver.wait_for(1) == [event]
        finally:
            sender.stop()
    assert receiver.posts == 3  # two 503s, then taken once
    assert receiver.content_types == {"application/json"}
    assert (sender.delivered, sender.failed, sender.dropped) == (1, 0, 0)


def test_webhook_gives_up_on_a_refusal_and_drops_when_its_queue_is_full():
    with Receiver(failures=1, status=400) as receiver:
        sender = WebhookSender([receiver.url], first_delay=0.01, max_delay=0.05)
        sender.start()
        try:
            sender.offer({"sequence": 1})
            sender.offer({"sequence": 2})
            assert receiver.wait_for(1) == [{"sequence": 2}]
        finally:
            sender.stop()
    assert receiver.posts == 2 and (sender.delivered, sender.failed) == (1, 1)
    idle = WebhookSender(["http://127.0.0.1:9/never"], queue_size=1)  # not started
    assert idle.offer({"sequence": 1}) is True
    assert idle.offer({"sequence": 2}) is False
    assert idle.dropped == 1
    delays = [idle.delay(n) for n in range(1, 12)]
    assert 0.25 <= delays[0] <= 0.5 and all(30.0 <= d <= 60.0 for d in delays[8:])


def test_service_posts_every_alert_event_to_its_webhook(database_url: str, tmp_path: Path):
    with Receiver(failures=2) as receiver:
        with app_client(database_url, tmp_path, webhooks=[receiver.url]) as client:
            assert client.post("/api/v1/trains", json={"toml": DEMO.read_text()}).status_code == 201
            post_batches(client, loss_batches(time.time()))
            r = client.post(f"{URL}/alerts/{WARNING_R201}/acknowledge", json={"reason": "seen"})
            assert r.status_code == 200
            stored = served_events(client)
            assert receiver.wait_for(len(stored)) == stored  # in order, each once
            metrics = client.get("/metrics").text
            assert (
                f'stagewatch_webhook_events_total{{outcome="delivered"}} {len(stored)}.0' in metrics
            )
    assert receiver.posts == len(stored) + 2


# ---------------------------------------------------------------------------- live


@pytest.fixture
def server(database_url: str, tmp_path: Path) -> Iterator[Server]:
    srv = Server(database_url, tmp_path)
    srv.start()
    try:
        yield srv
    finally:
        srv.stop()


def test_live_stream_sends_alert_events(server: Server):
    batches = loss_batches(time.time())
    alerts: list[dict[str, str]] = []
    kinds: set[str] = set()
    done = threading.Event()

    def listen() -> None:
        with httpx.stream("GET", f"{server.base}{URL}/stream", headers=AUTH, timeout=60.0) as r:
            for event in sse_events(r):
                kinds.add(event.get("event", ""))
                if event.get("event") == "alert":
                    alerts.append(event)
                    done.set()
                    return

    listener = threading.Thread(target=listen, daemon=True)
    listener.start()
    time.sleep(1.0)
    with httpx.Client(base_url=server.base, headers=AUTH, timeout=60.0) as client:
        post_batches(client, batches)
        assert done.wait(60.0)
        stored = client.get(f"{URL}/alerts/events").json()["data"]
    first = alerts[0]
    assert "id" not in first  # Last-Event-ID stays an estimate time
    assert json.loads(first["data"]) == stored[0]
    assert kinds == {"estimate", "alert"}
