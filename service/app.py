"""The REST service: FastAPI app factory and routes under /api/v1.

``create_app(settings)`` builds the app; the store and the hub (every train's
session) are made in the lifespan, so importing this module is cheap. Handlers are
plain ``def`` where they touch the database or a session (FastAPI runs them in its
thread pool) and ``async`` only for the live stream.

Roles: read (estimates, trains, gated readings, alerts and their log), ingest (post
readings; acknowledge, shelve and unshelve alerts), admin (create, update and retire
trains; take alerts out of service and return them). /healthz and /readyz answer
without a key. An operator's action is logged under the name of the API key used.
"""

from __future__ import annotations

import asyncio
import csv
import io
import json
import logging
import math
import time
import tomllib
from collections.abc import AsyncIterator, Iterator
from contextlib import asynccontextmanager
from pathlib import Path
from typing import Annotated, Any, Literal

from fastapi import Body, Depends, FastAPI, Header, HTTPException, Query, Request, Response, status
from fastapi.encoders import jsonable_encoder
from fastapi.exceptions import RequestValidationError
from fastapi.openapi.utils import get_openapi
from fastapi.responses import JSONResponse
from fastapi.sse import EventSourceResponse, ServerSentEvent
from fastapi.staticfiles import StaticFiles

from estimator.alerts import Alert, AlertActionError
from estimator.config import TrainConfig, parse_train_config
from estimator.errors import ConfigError
from estimator.model import TrainModel
from estimator.observability import observability_report
from service.auth import AdminAccess, Caller, IngestAccess, ReadAccess
from service.hub import (
    AlertAction,
    Hub,
    Runtime,
    ShelveRefused,
    UnknownAlert,
    UnknownTrain,
    alert_event_public,
    estimate_public,
)
from service.limits import BodySizeLimit, IngestRateLimiter
from service.metrics import configure_logging
from service.schemas import (
    AlertActionIn,
    AlertActionResult,
    AlertEventPublic,
    AlertEventsPublic,
    AlertPublic,
    AlertsPublic,
    AlertStateName,
    EstimatePublic,
    EstimatesPublic,
    GatedListPublic,
    GatedPublic,
    IngestResult,
    ObservabilityPublic,
    PlainText,
    PriorityName,
    Problem,
    ReadingColumns,
    ShelveIn,
    TrainIn,
    TrainPublic,
    TrainsPublic,
    document_text_problems,
)
from service.settings import Settings
from service.store import Store, StoreUnavailable

log = logging.getLogger("stagewatch.app")

API = "/api/v1"
WEB_DIR = Path(__file__).parent / "web"
"""The dashboard's static files, served at ``/``."""
NOT_SAFETY = (
    "stagewatch is a monitoring aid, not a safety system: follow site procedures, "
    "local codes and licensed engineering practice."
)

_REFUSALS: dict[int, str] = {
    400: "The body could not be read as JSON text (not UTF-8, say).",
    401: "No API key, or an unknown or revoked one.",
    403: "The key's role is below the one this route needs.",
    404: "No such train, alert or estimate.",
    409: "Conflicts with the current state (the train exists; the alert action does not apply).",
    413: "Request body over max_body_bytes, or more readings than max_batch.",
    429: "This key's ingest rate limit (ingest_rate_limit) is used up.",
    503: "Storage unavailable: nothing was changed.",
}
_RETRY_AFTER = {"Retry-After": {"description": "Seconds to wait", "schema": {"type": "string"}}}
_KEYED = (401, 403, 503)  # every keyed route: the key look-up itself reads the store


def _refusals(*codes: int) -> dict[int | str, dict[str, Any]]:
    """OpenAPI entries for the refusals a route can give: a Problem body with ``detail``."""
    out: dict[int | str, dict[str, Any]] = {}
    for code in (*_KEYED, *codes):
        entry: dict[str, Any] = {"model": Problem, "description": _REFUSALS[code]}
        if code in (429, 503):
            entry["headers"] = _RETRY_AFTER
        out[code] = entry
    return out


def create_app(settings: Settings | None = None, *, store: Store | None = None) -> FastAPI:
    """Build the service.

    Parameters
    ----------
    settings : Settings, optional
        Service settings; read from the environment and settings file when omitted.
    store : Store, optional
        An open store to use instead of opening ``settings.database_url``.
    """
    settings = settings or Settings()
    configure_logging(settings.log_json)

    @asynccontextmanager
    async def lifespan(app: FastAPI) -> AsyncIterator[None]:
        own = store is None
        db = store or _open_store(settings)
        hub = Hub(db, settings)
        app.state.settings = settings
        app.state.store = db
        app.state.keys = db
        app.state.hub = hub
        await asyncio.to_thread(hub.start)
        try:
            yield
        finally:
            await asyncio.to_thread(hub.stop)
            if own:
                db.close()

    app = FastAPI(
        title="stagewatch",
        version="0.1.0",
        description=(
            "Soft sensor and state estimator for cascades of stirred-tank reactors. " + NOT_SAFETY
        ),
        lifespan=lifespan,
    )
    app.add_middleware(BodySizeLimit, max_bytes=settings.max_body_bytes)
    limiter = (
        None
        if settings.ingest_rate_limit is None
        else IngestRateLimiter.for_batches(settings.ingest_rate_limit, settings.max_batch)
    )

    @app.exception_handler(UnknownTrain)
    async def unknown_train(_: Request, exc: UnknownTrain) -> JSONResponse:
        return JSONResponse({"detail": f"no train named {exc.args[0]!r}"}, status_code=404)

    @app.exception_handler(UnknownAlert)
    async def unknown_alert(_: Request, exc: UnknownAlert) -> JSONResponse:
        return JSONResponse({"detail": str(exc)}, status_code=404)

    @app.exception_handler(AlertActionError)
    async def alert_action_refused(_: Request, exc: AlertActionError) -> JSONResponse:
        return JSONResponse({"detail": str(exc)}, status_code=409)

    @app.exception_handler(ShelveRefused)
    async def shelve_refused(_: Request, exc: ShelveRefused) -> JSONResponse:
        detail = [{"loc": ["body", "until"], "msg": str(exc), "type": "value_error"}]
        return JSONResponse({"detail": detail}, status_code=422)

    @app.exception_handler(RequestValidationError)
    async def invalid_request(_: Request, exc: RequestValidationError) -> JSONResponse:
        # The framework's own answer repeats each bad input and cannot write NaN,
        # infinity or a lone surrogate: it failed with a 500 instead of this 422.
        detail = _json_safe(jsonable_encoder(exc.errors()))
        return _AsciiJSONResponse({"detail": detail}, status_code=422)

    @app.exception_handler(StoreUnavailable)
    async def store_unavailable(_: Request, exc: StoreUnavailable) -> JSONResponse:
        return JSONResponse(
            {"detail": f"storage unavailable, nothing was accepted: {exc}"},
            status_code=503,
            headers={"Retry-After": "5"},
        )

    @app.get("/metrics", tags=["operations"], response_class=Response, responses=_refusals())
    def get_metrics(request: Request, _: ReadAccess) -> Response:
        """Prometheus text: readings by outcome, estimates, ingest latency, estimate age."""
        from prometheus_client import CONTENT_TYPE_LATEST, generate_latest

        hub = _hub(request)
        return Response(generate_latest(hub.metrics.registry), media_type=CONTENT_TYPE_LATEST)

    @app.get("/healthz", tags=["operations"])
    def get_health() -> dict[str, str]:
        """Answer while the process is up."""
        return {"status": "ok"}

    @app.get("/readyz", tags=["operations"], responses={503: {"description": "Still starting"}})
    def get_ready(request: Request) -> JSONResponse:
        """Answer 200 once every train is loaded."""
        hub: Hub | None = getattr(request.app.state, "hub", None)
        ready = bool(hub and hub.ready)
        return JSONResponse(
            {"status": "ready" if ready else "starting"},
            status_code=200 if ready else 503,
        )

    @app.post(
        f"{API}/trains", status_code=201, tags=["trains"], responses=_refusals(400, 409, 413)
    )
    def create_train(body: TrainIn, request: Request, _: AdminAccess) -> TrainPublic:
        """Register a train from its TOML text or JSON document."""
        config, source = _parse_train(body)
        hub = _hub(request)
        if config.name in hub.trains or hub.store.get_train(config.name) is not None:
            raise HTTPException(409, f"a train named {config.name!r} exists; PUT to change it")
        return _train_public(hub.create(config, source))

    @app.get(f"{API}/trains", tags=["trains"], responses=_refusals())
    def list_trains(request: Request, _: ReadAccess) -> TrainsPublic:
        """List every running train."""
        data = [_train_public(r) for r in _hub(request).trains.values()]
        return TrainsPublic(data=data, count=len(data))

    @app.get(f"{API}/trains/{{name}}", tags=["trains"], responses=_refusals(404))
    def read_train(name: str, request: Request, _: ReadAccess) -> TrainPublic:
        """Return one train's description and state."""
        return _train_public(_hub(request).get(name))

    @app.put(f"{API}/trains/{{name}}", tags=["trains"], responses=_refusals(400, 404, 413))
    def update_train(name: str, body: TrainIn, request: Request, _: AdminAccess) -> TrainPublic:
        """Change a train's description: a new version, history kept."""
        config, source = _parse_train(body)
        if config.name != name:
            msg = f"train.name is {config.name!r}, the path says {name!r}"
            raise HTTPException(422, [{"loc": ["path", "name"], "msg": msg, "type": "value_error"}])
        return _train_public(_hub(request).update(name, config, source))

    @app.delete(
        f"{API}/trains/{{name}}", status_code=204, tags=["trains"], responses=_refusals(404)
    )
    def retire_train(name: str, request: Request, _: AdminAccess) -> Response:
        """Stop estimating a train; its history stays."""
        _hub(request).retire(name)
        return Response(status_code=204)

    @app.post(
        f"{API}/trains/{{name}}/readings",
        tags=["readings"],
        responses=_refusals(400, 404, 413, 429),
    )
    async def post_readings(
        name: str,
        body: Annotated[ReadingColumns, Body()],
        request: Request,
        caller: IngestAccess,
    ) -> IngestResult:
        """Post a batch of readings (any order); each refused one comes back with its reason.

        Runs on the event loop, not in the thread pool: the work is CPU-bound Python
        that holds the GIL either way (a train's lock serialises it), and handing
        each request to a worker thread and back cost more than the work of a
        single reading (thread switches contending for the GIL).
        """
        # The body is a ReadingsIn document (same OpenAPI entry, same 422s),
        # validated straight into columns: no model object per reading.
        if len(body) > settings.max_batch:
            raise HTTPException(413, f"at most {settings.max_batch} readings per request")
        if limiter is not None:
            who = caller.name if caller.key_id is None else caller.key_id
            wait = limiter.take(who, len(body))
            if wait > 0:
                raise HTTPException(
                    429,
                    f"ingest rate limit of {limiter.rate:g} readings/s for key {caller.name!r} "
                    f"used up; retry in {wait:.1f} s",
                    headers={"Retry-After": str(max(1, math.ceil(wait)))},
                )
        hub = _hub(request)
        with hub.metrics.ingest_seconds.time():
            return hub.ingest(
                name, body.tags, body.times, body.values, body.qualities, now=time.time()
            )

    @app.get(
        f"{API}/trains/{{name}}/estimates/latest", tags=["estimates"], responses=_refusals(404)
    )
    def read_latest(name: str, request: Request, _: ReadAccess) -> EstimatePublic:
        """Return the newest estimate."""
        runtime = _hub(request).get(name)
        latest = runtime.latest
        if latest is None:
            raise HTTPException(404, "no estimate yet: the train has not had its inputs")
        return EstimatePublic.model_validate(estimate_public(runtime.config, latest))

    @app.get(
        f"{API}/trains/{{name}}/estimates",
        tags=["estimates"],
        response_model=None,
        responses={
            200: {
                "model": EstimatesPublic,
                "content": {"text/csv": {"schema": {"type": "string"}}},
            },
            **_refusals(404),
        },
    )
    def read_estimates(
        name: str,
        request: Request,
        _: ReadAccess,
        start: Annotated[float | None, Query(description="Epoch seconds [s]")] = None,
        end: Annotated[float | None, Query(description="Epoch seconds [s]")] = None,
        every: Annotated[
            float | None,
            Query(ge=0.001, allow_inf_nan=False, description="Downsample interval [s]"),
        ] = None,
        format: Literal["json", "csv"] = "json",
    ) -> EstimatesPublic | Response:
        """Return estimates over a time range, optionally one per interval, as JSON or CSV."""
        hub = _hub(request)
        runtime = hub.get(name)
        hub.settle(name)
        rows = hub.store.read_estimates(runtime.train_id, start, end, every)
        if format == "csv":
            return Response(_estimates_csv(runtime.config, rows), media_type="text/csv")
        data = [EstimatePublic.model_validate(estimate_public(runtime.config, r)) for r in rows]
        return EstimatesPublic(data=data, count=len(data))

    @app.get(f"{API}/trains/{{name}}/gated", tags=["estimates"], responses=_refusals(404))
    def read_gated(
        name: str,
        request: Request,
        _: ReadAccess,
        start: float | None = None,
        end: float | None = None,
    ) -> GatedListPublic:
        """List readings rejected at the innovation gate, or taken as steps, with reasons."""
        hub = _hub(request)
        rows = hub.store.read_gated(hub.get(name).train_id, start, end)
        data = [GatedPublic.model_validate(r) for r in rows]
        return GatedListPublic(data=data, count=len(data))

    @app.get(f"{API}/trains/{{name}}/observability", tags=["trains"], responses=_refusals(404))
    def read_observability(name: str, request: Request, _: ReadAccess) -> ObservabilityPublic:
        """Report which states the measurements determine, and what to add if not."""
        runtime = _hub(request).get(name)
        report = observability_report(TrainModel.from_config(runtime.config))
        return ObservabilityPublic(
            observable=report.observable,
            rank=report.rank,
            n_states=report.n_states,
            unobservable=list(report.unobservable),
            suggestions=list(report.suggestions),
            message=report.message(),
        )

    @app.get(f"{API}/trains/{{name}}/alerts", tags=["alerts"], responses=_refusals(404))
    def list_alerts(
        name: str,
        request: Request,
        _: ReadAccess,
        state: Annotated[
            list[AlertStateName] | None,
            Query(description="Only these states (repeat for several); default: all but normal"),
        ] = None,
        priority: Annotated[
            list[PriorityName] | None, Query(description="Only these priorities")
        ] = None,
        subject: Annotated[str | None, Query(description="Only this vessel, tag or train")] = None,
    ) -> AlertsPublic:
        """List the train's current alerts (all but normal unless asked), most urgent first."""
        states = set(state) if state else None
        data = [
            _alert_public(a)
            for a in _hub(request).alerts(name)
            if (a.state != "normal" if states is None else a.state in states)
            and (not priority or a.priority in priority)
            and (subject is None or a.subject == subject)
        ]
        return AlertsPublic(data=data, count=len(data))

    @app.get(f"{API}/trains/{{name}}/alerts/events", tags=["alerts"], responses=_refusals(404))
    def read_alert_events(
        name: str,
        request: Request,
        _: ReadAccess,
        start: Annotated[float | None, Query(description="Epoch seconds [s]")] = None,
        end: Annotated[float | None, Query(description="Epoch seconds [s]")] = None,
        alert_id: Annotated[PlainText | None, Query(description="Only this alert's events")] = None,
    ) -> AlertEventsPublic:
        """Return the log of alert transitions with start <= time < end, in log order."""
        hub = _hub(request)
        events = hub.store.read_alert_events(hub.get(name).train_id, start, end, alert_id)
        data = [AlertEventPublic.model_validate(alert_event_public(name, e)) for e in events]
        return AlertEventsPublic(data=data, count=len(data))

    def act(
        request: Request,
        name: str,
        alert_id: str,
        action: AlertAction,
        caller: Caller,
        reason: str,
        until: float | None = None,
    ) -> AlertActionResult:
        event, alert = _hub(request).alert_action(
            name, alert_id, action, who=caller.name, why=reason, now=time.time(), until=until
        )
        return AlertActionResult(
            event=AlertEventPublic.model_validate(alert_event_public(name, event)),
            alert=_alert_public(alert),
        )

    alert_path = f"{API}/trains/{{name}}/alerts/{{alert_id:path}}"
    alert_refusals = _refusals(400, 404, 409, 413)

    @app.post(f"{alert_path}/acknowledge", tags=["alerts"], responses=alert_refusals)
    def acknowledge_alert(
        name: str, alert_id: str, body: AlertActionIn, request: Request, caller: IngestAccess
    ) -> AlertActionResult:
        """Acknowledge an alert (role ingest); 409 when it has nothing to acknowledge."""
        return act(request, name, alert_id, "acknowledge", caller, body.reason)

    @app.post(f"{alert_path}/shelve", tags=["alerts"], responses=alert_refusals)
    def shelve_alert(
        name: str, alert_id: str, body: ShelveIn, request: Request, caller: IngestAccess
    ) -> AlertActionResult:
        """Shelve an alert until a time within alerts.max_shelve (role ingest); 422 beyond."""
        return act(request, name, alert_id, "shelve", caller, body.reason, body.until)

    @app.post(f"{alert_path}/unshelve", tags=["alerts"], responses=alert_refusals)
    def unshelve_alert(
        name: str, alert_id: str, body: AlertActionIn, request: Request, caller: IngestAccess
    ) -> AlertActionResult:
        """End a shelving early (role ingest); the alert takes the state its condition gives."""
        return act(request, name, alert_id, "unshelve", caller, body.reason)

    @app.post(f"{alert_path}/remove-from-service", tags=["alerts"], responses=alert_refusals)
    def remove_alert_from_service(
        name: str, alert_id: str, body: AlertActionIn, request: Request, caller: AdminAccess
    ) -> AlertActionResult:
        """Take an alert out of service until returned (role admin: a change of the system)."""
        return act(request, name, alert_id, "remove_from_service", caller, body.reason)

    @app.post(f"{alert_path}/return-to-service", tags=["alerts"], responses=alert_refusals)
    def return_alert_to_service(
        name: str, alert_id: str, body: AlertActionIn, request: Request, caller: AdminAccess
    ) -> AlertActionResult:
        """Return an out-of-service alert to service (role admin)."""
        return act(request, name, alert_id, "return_to_service", caller, body.reason)

    @app.get(
        f"{API}/trains/{{name}}/stream",
        tags=["estimates"],
        response_class=EventSourceResponse,
        responses=_refusals(404),
    )
    async def stream_estimates(
        name: str,
        request: Request,
        _: ReadAccess,
        resume: Annotated[float | None, Depends(_stream_resume)],
    ) -> AsyncIterator[ServerSentEvent]:
        """Stream live estimates and alert events (SSE); resume estimates with Last-Event-ID."""
        hub = _hub(request)
        runtime = hub.get(name)
        queue = hub.subscribe(name)
        try:
            sent = -float("inf")
            if resume is not None:
                sent = resume
                await asyncio.to_thread(hub.settle, name)
                missed = await asyncio.to_thread(
                    hub.store.read_estimates, runtime.train_id, sent, None, None
                )
                for row in missed:
                    if row["t"] > sent:
                        yield _event(runtime, row)
                        sent = row["t"]
            while True:
                kind, item = await queue.get()
                if kind == "alert":
                    # No id: a client's Last-Event-ID stays the last estimate's time.
                    yield ServerSentEvent(data=item, event="alert")
                elif item["t"] > sent or resume is None:
                    yield _event(runtime, item)
                    sent = max(sent, item["t"])
        finally:
            hub.unsubscribe(name, queue)

    def openapi_31() -> dict[str, Any]:
        """Build the OpenAPI document, valid 3.1.

        FastAPI describes a server-sent-event stream with ``itemSchema`` (from the
        OpenAPI 3.2 drafts), which 3.1 validators refuse; the stream is described
        as text with the event shape in words instead. It also gives the stream's
        refusals the stream's media type; they are JSON like every other refusal.
        """
        if app.openapi_schema is None:
            spec = get_openapi(
                title=app.title,
                version=app.version,
                description=app.description,
                routes=app.routes,
            )
            for path in spec.get("paths", {}).values():
                for operation in path.values():
                    for code, response in operation.get("responses", {}).items():
                        content = response.get("content", {})
                        if code != "200" and "text/event-stream" in content:
                            content["application/json"] = content.pop("text/event-stream")
                            continue
                        media = content.get("text/event-stream")
                        if media is not None and "itemSchema" in media:
                            del media["itemSchema"]
                            media["schema"] = {
                                "type": "string",
                                "description": "Events 'estimate' whose data is an "
                                "EstimatePublic document and whose id is its time, and "
                                "events 'alert' (no id) whose data is an "
                                "AlertEventPublic document",
                            }
            app.openapi_schema = spec
        return app.openapi_schema

    app.openapi = openapi_31  # type: ignore[method-assign]
    # Last, so that every route above is matched before the catch-all mount.
    app.mount("/", StaticFiles(directory=WEB_DIR, html=True), name="dashboard")
    return app


def _stream_resume(
    name: str,
    request: Request,
    last_event_id: Annotated[str | None, Header()] = None,
) -> float | None:
    """Check the train and Last-Event-ID before a stream starts; its time [s] or None.

    A generator's own code runs only once the 200 has gone out, too late to
    answer 404 or 422.
    """
    _hub(request).get(name)
    if last_event_id is None:
        return None
    try:
        resume = float(last_event_id)
    except ValueError:
        resume = math.nan
    if not math.isfinite(resume):
        msg = f"must be the time of an estimate (epoch seconds), got {last_event_id!r}"
        loc = ["header", "last-event-id"]
        raise HTTPException(422, [{"loc": loc, "msg": msg, "type": "value_error"}])
    return resume


class _AsciiJSONResponse(JSONResponse):
    """JSON with every non-ASCII character escaped, so any string can be written."""

    def render(self, content: Any) -> bytes:
        """Write ``content`` as ASCII JSON, escaping every other character (lone surrogates too)."""
        text = json.dumps(content, ensure_ascii=True, allow_nan=False, separators=(",", ":"))
        return text.encode("ascii")


def _json_safe(value: Any) -> Any:
    """Replace non-finite numbers (which JSON cannot hold) by their names, at any depth."""
    if isinstance(value, float) and not math.isfinite(value):
        return repr(value)
    if isinstance(value, dict):
        return {k: _json_safe(v) for k, v in value.items()}
    if isinstance(value, list | tuple):
        return [_json_safe(v) for v in value]
    return value


def _event(runtime: Runtime, row: dict[str, Any]) -> ServerSentEvent:
    return ServerSentEvent(
        data=estimate_public(runtime.config, row), event="estimate", id=repr(row["t"])
    )


def _alert_public(alert: Alert) -> AlertPublic:
    return AlertPublic.model_validate(alert, from_attributes=True)


def _hub(request: Request) -> Hub:
    hub: Hub = request.app.state.hub
    return hub


def _open_store(settings: Settings) -> Store:
    url = settings.database_url
    if url.startswith("sqlite:///"):
        Path(url.removeprefix("sqlite:///")).parent.mkdir(parents=True, exist_ok=True)
    db = Store(url, timeout=settings.database_timeout)
    from service.migrations import prepare_schema  # Alembic, only when a store opens

    try:
        prepare_schema(db)
    except BaseException:
        db.close()
        raise
    return db


def _parse_train(body: TrainIn) -> tuple[TrainConfig, str]:
    """Validate a posted TOML text or JSON document (422 with every problem)."""
    if (body.toml is None) == (body.config is None):
        msg = "give the train as either 'toml' text or a 'config' document"
        raise HTTPException(422, [{"loc": ["body"], "msg": msg, "type": "value_error"}])
    if body.toml is not None:
        try:
            data: dict[str, Any] = tomllib.loads(body.toml)
        except tomllib.TOMLDecodeError as exc:
            problem = {"loc": ["body", "toml"], "msg": str(exc), "type": "value_error"}
            raise HTTPException(422, [problem]) from None
        where, source, text = "toml", "posted TOML", body.toml
    else:
        assert body.config is not None
        data, where, source, text = body.config, "config", "posted config", json.dumps(body.config)
    # TOML escapes and JSON documents can carry text no database stores (NUL).
    unstorable = document_text_problems(data, ("body", where))
    if unstorable:
        detail = [{"loc": list(loc), "msg": msg, "type": "value_error"} for loc, msg in unstorable]
        raise HTTPException(422, detail)
    try:
        return parse_train_config(data, source=source), text
    except ConfigError as exc:
        detail = [
            {"loc": ["body", *p.key.split(".")], "msg": p.reason, "type": "value_error"}
            for p in exc.problems
        ]
        raise HTTPException(status.HTTP_422_UNPROCESSABLE_CONTENT, detail) from None


def _train_public(runtime: Runtime) -> TrainPublic:
    cfg = runtime.config
    return TrainPublic(
        name=cfg.name,
        title=cfg.title,
        version=runtime.version,
        retired=False,
        vessels=[v.name for v in cfg.vessels],
        species=list(cfg.species),
        tags=list(runtime.session.tags),
        last_estimate_time=runtime.latest_time,
    )


def _estimates_csv(config: TrainConfig, rows: list[dict[str, Any]]) -> str:
    out = io.StringIO()
    writer = csv.writer(out)
    header = ["time"]
    for vessel in config.vessels:
        for s in config.species:
            header += [f"{vessel.name}.{s}", f"{vessel.name}.{s}.std"]
        header += [
            f"{vessel.name}.conversion",
            f"{vessel.name}.conversion_std",
            f"{vessel.name}.design_conversion",
        ]
    header += ["activity", "activity.std", "flow"]
    writer.writerow(header)
    for row in _csv_rows(config, rows):
        writer.writerow(row)
    return out.getvalue()


def _csv_rows(config: TrainConfig, rows: list[dict[str, Any]]) -> Iterator[list[float]]:
    for r in rows:
        line = [r["t"]]
        for i in range(len(config.vessels)):
            for j in range(len(config.species)):
                line += [r["c"][i][j], r["cs"][i][j]]
            line += [r["x"][i], r["xs"][i], r["xd"][i]]
        line += [r["a"], r["as"], r["q"]]
        yield line
