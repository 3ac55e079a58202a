"""Fuzz the REST API from its own OpenAPI document (schemathesis), on SQLite and PostgreSQL.

The service runs in-process (its lifespan included) with the demo train registered
and one stored key per role. The document is fetched from ``GET /openapi.json``;
for every operation in it, schemathesis generates requests that fit the document
(positive) and requests that break it (negative), and hypothesis mixes in:

- the registered train's name in place of a random ``{name}``, and real alert ids
  in place of a random ``{alert_id}``, so the handlers behind the 404 run too
  (not for DELETE, which would retire the train, nor for the endless stream);
- batches of readings of the train's own tags, stamped around now (some too old,
  some too far ahead), plausible or refused values (NaN, infinity, outside the
  tag's range), so ingest reaches the session;
- the key: admin, ingest, read, none or an unknown one.

What must hold for every answer:

- no 5xx (``not_a_server_error``);
- the status is one the document lists, with the documented content type and body
  (schemathesis' conformance checks);
- a request that breaks the document is refused with a 4xx;
- a refusal (4xx) is JSON with a non-empty ``detail``;
- a missing or unknown key gets 401 with ``WWW-Authenticate: Bearer``, a key whose
  role is below the route's gets 403, and a sufficient key never gets either.

The number of examples is bounded (:data:`EXAMPLES` per operation and backend)
and hypothesis' seeds are fixed, so a run is short. Requests go through
Starlette's test client rather than schemathesis' own pytest loader, whose
fixture-based form does not run under pytest 9.
"""

from __future__ import annotations

import json
import math
import time
from collections.abc import Iterator
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import pytest
import schemathesis
from fastapi.routing import APIRoute
from fastapi.testclient import TestClient
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st
from schemathesis import GenerationMode
from schemathesis.checks import (
    content_type_conformance,
    negative_data_rejection,
    not_a_server_error,
    response_headers_conformance,
    response_schema_conformance,
    status_code_conformance,
)

from estimator.alarm_state import AlertState
from service.app import create_app
from service.auth import hash_key
from service.settings import Settings

DEMO = Path("replay_data/wrenfield/train.toml")
NAME = "wrenfield-line2"
EXAMPLES = 20  # per operation and backend
KEYS = {
    "admin": "sw_fuzz_admin_key_0123456789abcdefghij",
    "ingest": "sw_fuzz_ingest_key_0123456789abcdefghi",
    "read": "sw_fuzz_read_key_0123456789abcdefghijk",
    "unknown": "sw_fuzz_unknown_key_0123456789abcdefgh",
}
# Plausible values of the demo train's tags in their units, and values outside
# the ranges its file declares (FI-200 0..40 m^3/h, TI-201 0..95 degC).
PLAUSIBLE = {
    "FI-200": (0.0, 40.0),
    "TI-201": (20.0, 90.0),
    "TI-202": (20.0, 90.0),
    "AI-200G": (0.0, 3000.0),
    "AI-203G": (0.0, 3000.0),
    "LAB-202F": (0.0, 3000.0),
}
OUT_OF_RANGE = {"FI-200": [-1.0, 41.0, 1e9], "TI-201": [-1.0, 96.0, 1e9], "TI-202": [-300.0]}
# Mostly keys that pass, so the handlers behind the checks get most of the examples.
CALLERS = ["admin", "admin", "admin", "ingest", "read", "none", "unknown"]
RANK = {"read": 0, "ingest": 1, "admin": 2}
CHECKS = [
    not_a_server_error,
    status_code_conformance,
    content_type_conformance,
    response_headers_conformance,
    response_schema_conformance,
    negative_data_rejection,
]


@dataclass
class Service:
    """The running service and what the strategies need to know about it."""

    client: TestClient
    schema: Any
    roles: dict[tuple[str, str], str]  # (METHOD, path) -> least role; absent: no key needed
    tags: list[str]
    alert_ids: list[str]


@pytest.fixture
def service(database_url: str, tmp_path: Path) -> Iterator[Service]:
    settings_ = Settings(
        data_dir=tmp_path, database_url=database_url, bootstrap_key=KEYS["admin"], log_json=True
    )
    app = create_app(settings_)
    with TestClient(app, raise_server_exceptions=False) as client:
        for role in ("ingest", "read"):
            app.state.keys.add_api_key(f"fuzz-{role}", role, hash_key(KEYS[role]))
        admin = {"Authorization": f"Bearer {KEYS['admin']}"}
        created = client.post("/api/v1/trains", json={"toml": DEMO.read_text()}, headers=admin)
        assert created.status_code == 201, created.text
        states = [state.value for state in AlertState]
        alerts = client.get(
            f"/api/v1/trains/{NAME}/alerts", params={"state": states}, headers=admin
        )
        assert alerts.status_code == 200, alerts.text
        alert_ids = [a["alert_id"] for a in alerts.json()["data"]]
        assert alert_ids, "the demo train should have alert rules"
        assert set(created.json()["tags"]) == set(PLAUSIBLE)
        document = client.get("/openapi.json")
        assert document.status_code == 200
        yield Service(
            client=client,
            schema=schemathesis.openapi.from_dict(document.json()),
            roles=_route_roles(app.routes),
            tags=list(created.json()["tags"]),
            alert_ids=alert_ids,
        )


def _route_roles(routes: list[Any]) -> dict[tuple[str, str], str]:
    """Find each route's least role from its access dependency (``require_<role>``)."""
    roles: dict[tuple[str, str], str] = {}
    for route in routes:
        if not isinstance(route, APIRoute):
            continue
        found: list[str] = []
        stack = list(route.dependant.dependencies)
        while stack:
            dependency = stack.pop()
            label = getattr(dependency.call, "__name__", "")
            if label.startswith("require_"):
                found.append(label.removeprefix("require_"))
            stack.extend(dependency.dependencies)
        assert len(found) <= 1, f"{route.path} has several access dependencies: {found}"
        for method in route.methods:
            if found:
                roles[(method, route.path_format)] = found[0]
    return roles


def _reading(tag: str) -> st.SearchStrategy[dict[str, Any]]:
    """One reading of a tag of the demo train; ``time`` is relative to now [s].

    It runs from 8 h back (beyond the 6 h horizon) to 10 min ahead (beyond the
    5 min future tolerance).

    The value is plausible for the tag, or one the service must refuse: NaN or
    infinity (sent as the bare words a JSON library writes), or outside the tag's
    declared range. Negative and huge values on tags without a range are left
    out while the filter cannot take them (see test_properties_session.py).
    """
    lo, hi = PLAUSIBLE[tag]
    refused = [math.nan, math.inf, -math.inf, *OUT_OF_RANGE.get(tag, [])]
    value = st.one_of(st.floats(lo, hi).map(lambda v: round(v, 6)), st.sampled_from(refused))
    return st.fixed_dictionaries(
        {"tag": st.just(tag), "time": st.floats(-8 * 3600.0, 600.0), "value": value}
    )


def _readings(tags: list[str]) -> st.SearchStrategy[list[dict[str, Any]]]:
    """Batches of readings of the train's own tags, times relative to now [s]."""
    reading = st.sampled_from(tags).flatmap(_reading)
    return st.lists(reading, min_size=1, max_size=30)


def _send(service: Service, case: Any, caller: str) -> Any:
    """Send a generated case through the test client with the chosen caller's key."""
    headers = {} if caller == "none" else {"Authorization": f"Bearer {KEYS[caller]}"}
    kwargs = case.as_transport_kwargs(base_url="http://testserver", headers=headers)
    cookies = kwargs.pop("cookies", None)
    assert not cookies, f"the document declares no cookies, got {cookies}"
    unexpected = set(kwargs) - {"method", "url", "headers", "params", "json", "data"}
    assert not unexpected, f"transport arguments this test does not forward: {unexpected}"
    if isinstance(kwargs.get("data"), bytes | str):
        kwargs["content"] = kwargs.pop("data")
    if "json" in kwargs:
        # As a client's JSON library writes it: NaN and Infinity as bare words,
        # which the test client's own encoder refuses to write.
        kwargs["content"] = json.dumps(kwargs.pop("json"))
    return service.client.request(**kwargs)


def _check_refusal(service: Service, case: Any, caller: str, response: Any) -> None:
    """A 4xx names its reason; auth refusals match the caller's key and the route's role."""
    status = response.status_code
    label = f"{case.method} {case.formatted_path} as {caller}"
    if 400 <= status < 500:
        body = response.json()
        assert isinstance(body, dict) and body.get("detail"), f"{label}: {status} {response.text}"
    needed = service.roles.get((case.method.upper(), case.path))
    if status == 404 and response.json() == {"detail": "Not Found"}:
        # No route takes this URL at all (an alert id with a line break, say):
        # the router answers before any key is looked at.
        return
    if needed is None:
        assert status not in (401, 403), f"{label}: open route answered {status}"
    elif caller in ("none", "unknown"):
        # A body that is not even JSON is refused before the key is looked at.
        assert status == 401 or _undecodable(response), f"{label}: {status} {response.text}"
        if status == 401:
            assert response.headers.get("www-authenticate") == "Bearer"
    elif RANK[caller] < RANK[needed]:
        assert status == 403 or _undecodable(response), f"{label}: {status} {response.text}"
    else:
        assert status not in (401, 403), f"{label}: {status} {response.text}"


def _undecodable(response: Any) -> bool:
    """Whether the answer refuses a body that is not JSON text (400) or not JSON (422).

    The framework reads the body before any dependency runs, the key check
    included; such a refusal tells nothing about the API beyond its document.
    """
    if response.status_code == 400:
        return True
    if response.status_code != 422:
        return False
    detail = response.json().get("detail")
    return isinstance(detail, list) and any(d.get("type") == "json_invalid" for d in detail)


def _strategy(service: Service, operation: Any) -> st.SearchStrategy[Any]:
    """Positive and negative cases, half of them aimed at the registered train."""
    modes = [GenerationMode.POSITIVE, GenerationMode.NEGATIVE]
    options = [operation.as_strategy(mode) for mode in modes]
    path = operation.path
    # Retiring the train would leave nothing for the rest; a real stream never ends.
    aimed = "{name}" in path and operation.method.upper() != "DELETE"
    if aimed and not path.endswith("/stream"):
        fixed: dict[str, Any] = {"name": NAME}
        if "{alert_id}" in path:
            for mode in modes:
                options.append(
                    st.sampled_from(service.alert_ids).flatmap(
                        lambda a, m=mode: operation.as_strategy(
                            m, path_parameters={**fixed, "alert_id": a}
                        )
                    )
                )
        else:
            options += [operation.as_strategy(m, path_parameters=fixed) for m in modes]
    return st.one_of(options)


def _fuzz(service: Service, operation: Any, sent: dict[str, int]) -> Any:
    """The hypothesis test of one operation, counting what it sent in ``sent``."""

    @settings(
        max_examples=EXAMPLES,
        deadline=None,
        derandomize=True,
        database=None,
        suppress_health_check=[HealthCheck.too_slow, HealthCheck.filter_too_much],
    )
    @given(case=_strategy(service, operation), data=st.data())
    def run(case: Any, data: st.DataObject) -> None:
        caller = data.draw(st.sampled_from(CALLERS), label="caller")
        aimed = case.path_parameters.get("name") == NAME if case.path_parameters else False
        positive = case.meta is not None and case.meta.generation.mode.is_positive
        checks = CHECKS
        if operation.path.endswith("/readings") and aimed and positive:
            if data.draw(st.booleans(), label="real tags"):
                batch = data.draw(_readings(service.tags), label="readings")
                now = time.time()
                case.body = {"readings": [{**r, "time": now + r["time"]} for r in batch]}
                # That check re-encodes the body with a JSON encoder that refuses NaN;
                # it has nothing to judge in a positive case anyway.
                checks = [c for c in CHECKS if c is not negative_data_rejection]
        response = _send(service, case, caller)
        sent[operation.label] = sent.get(operation.label, 0) + 1
        case.validate_response(response, checks=checks)
        _check_refusal(service, case, caller, response)

    return run


def test_fuzz_every_operation_of_the_openapi_document(
    service: Service, subtests: pytest.Subtests
) -> None:
    operations = [result.ok() for result in service.schema.get_all_operations()]
    labels = {op.label for op in operations}
    # The document covers the whole API, so nothing escapes the fuzzing.
    assert "POST /api/v1/trains/{name}/readings" in labels
    assert "GET /api/v1/trains/{name}/stream" in labels
    assert len(labels) == len(operations) >= 20
    sent: dict[str, int] = {}

    for operation in operations:
        with subtests.test(operation=operation.label):
            _fuzz(service, operation, sent)()

    assert set(sent) == labels  # every operation got requests,
    # all their examples but for the few without parameters.
    assert sum(sent.values()) >= EXAMPLES * (len(labels) - 3)


def test_the_readings_strategy_reaches_the_session(service: Service) -> None:
    # The fuzzing above only proves something about ingest if its batches can be
    # accepted: one batch of the kind it draws, with sane values, is.
    now = time.time()
    batch = [
        {"tag": "FI-200", "time": now - 60.0, "value": 12.0},
        {"tag": "TI-201", "time": now - 60.0, "value": 58.0},
        {"tag": "AI-200G", "time": now - 60.0, "value": math.nan},
    ]
    r = service.client.post(
        f"/api/v1/trains/{NAME}/readings",
        content=json.dumps({"readings": batch}),
        headers={"Authorization": f"Bearer {KEYS['ingest']}", "Content-Type": "application/json"},
    )
    assert r.status_code == 200, r.text
    body = r.json()
    assert body["accepted"] == 2
    assert [x["reason"] for x in body["refused"]] == ["not a finite number"]


NUL = "nul \x00 here"
SURROGATE = "lone \ud800 surrogate"  # what the JSON escape \ud800 alone decodes to


@pytest.mark.parametrize("text", [NUL, SURROGATE], ids=["nul", "surrogate"])
def test_text_no_database_can_hold_is_refused_naming_the_field(service: Service, text: str) -> None:
    # Generated strings never hold NUL or lone surrogates. Before these were
    # refused, an operator's reason, a tag or a train's title holding one made a
    # 500 (PostgreSQL refuses NUL in text; neither backend encodes a surrogate).
    admin = {"Authorization": f"Bearer {KEYS['admin']}", "Content-Type": "application/json"}
    alert = f"/api/v1/trains/{NAME}/alerts/{service.alert_ids[0]}"
    title = 'title = "Wrenfield Sweeteners, line 2 isomerisation cascade"'
    toml = DEMO.read_text().replace(title, f"title = {json.dumps(text)}")
    reading = {"tag": text, "time": time.time(), "value": 1.0}
    until = time.time() + 60.0
    # A TOML escape of NUL parses, and the title it gives is named exactly; the
    # TOML parser refuses a surrogate escape itself.
    title_at = ["body", "toml", "train", "title"] if text == NUL else ["body", "toml"]
    cases = [
        ("POST", f"{alert}/remove-from-service", {"reason": text}, ["body", "reason"]),
        ("POST", f"{alert}/shelve", {"reason": text, "until": until}, ["body", "reason"]),
        ("PUT", f"/api/v1/trains/{NAME}", {"toml": toml}, title_at),
        ("POST", "/api/v1/trains", {"toml": toml.replace(NAME, "second")}, title_at),
        ("POST", "/api/v1/trains", {"config": {"train": {"title": text}}}, ["body", "config"]),
        ("POST", f"/api/v1/trains/{NAME}/readings", {"readings": [reading]}, ["body", "readings"]),
    ]
    for method, url, body, where in cases:
        r = service.client.request(method, url, content=json.dumps(body), headers=admin)
        assert r.status_code == 422, f"{method} {url}: {r.status_code} {r.text}"
        detail = r.json()["detail"]
        assert detail[0]["loc"][: len(where)] == where, detail
        assert any(w in detail[0]["msg"] for w in ("NUL", "surrogate", "Unicode")), detail
    r = service.client.get(
        f"/api/v1/trains/{NAME}/alerts/events", params={"alert_id": "a\x00b"}, headers=admin
    )
    assert r.status_code == 422 and r.json()["detail"][0]["loc"] == ["query", "alert_id"]
    # Nothing was stored: the train is as registered.
    train = service.client.get(f"/api/v1/trains/{NAME}", headers=admin).json()
    assert train["version"] == 1 and "\x00" not in train["title"]


def test_the_stream_refuses_before_it_starts(service: Service) -> None:
    # These used to answer 200 with an empty body: the checks ran inside the
    # stream, after its first bytes had gone out.
    read = {"Authorization": f"Bearer {KEYS['read']}"}
    r = service.client.get("/api/v1/trains/no-such-train/stream", headers=read)
    assert r.status_code == 404 and r.json() == {"detail": "no train named 'no-such-train'"}
    for bad in ("yesterday", "nan", "inf"):
        r = service.client.get(
            f"/api/v1/trains/{NAME}/stream", headers={**read, "Last-Event-ID": bad}
        )
        assert r.status_code == 422, r.text
        error = r.json()["detail"][0]
        assert error["loc"] == ["header", "last-event-id"] and bad in error["msg"]


def test_a_downsampling_interval_too_small_or_not_finite_is_422(service: Service) -> None:
    # every=5e-324 made PostgreSQL overflow dividing times by it (500); inf made
    # the store raise (500).
    read = {"Authorization": f"Bearer {KEYS['read']}"}
    for every in ("5e-324", "0.0001", "inf", "nan", "0"):
        r = service.client.get(
            f"/api/v1/trains/{NAME}/estimates", params={"every": every}, headers=read
        )
        assert r.status_code == 422, (every, r.text)
        assert r.json()["detail"][0]["loc"] == ["query", "every"]
    url = f"/api/v1/trains/{NAME}/estimates"
    assert service.client.get(url, params={"every": "0.001"}, headers=read).status_code == 200
