"""The REST API (FastAPI): read-only views of the engine's latest snapshot, plus HTTP ingest.

Everything under ``/api/v1``; ``/metrics`` at the root by Prometheus
convention. Handlers never touch estimator state: they read the immutable
snapshot or hand a payload to the engine queue. Errors are short stable JSON
(``{"detail": "..."}``), never tracebacks; NaN and infinity never reach JSON
(null, with the channel's quality saying why).
"""

from __future__ import annotations

import asyncio
import hashlib
import json
import logging
from collections.abc import AsyncIterator
from contextlib import asynccontextmanager
from typing import Any, Literal

from fastapi import Depends, FastAPI, Query, Request
from fastapi.exceptions import RequestValidationError
from fastapi.responses import JSONResponse, Response
from prometheus_client import CollectorRegistry, generate_latest
from prometheus_client.core import CounterMetricFamily, GaugeMetricFamily
from prometheus_client.registry import Collector
from starlette.exceptions import HTTPException as StarletteHTTPException

from service.advisory import ADVISORY
from service.alarms.lifecycle import PRIORITIES, Alarm
from service.api import models
from service.api.alarm_routes import add_alarm_routes
from service.api.auth import Access, Principal
from service.api.dashboard_routes import add_dashboard
from service.api.docs import add_docs
from service.api.errors import validation_problems
from service.api.guard import add_guards
from service.broker_link.payload import decode_payload
from service.engine.channel_report import channel_report, finite_or_null
from service.engine.quality import Quality, estimates_shown
from service.engine.snapshot import ChannelEntry, Snapshot
from service.engine.writer import EngineStats
from service.runtime import Runtime

__all__ = ["ADVISORY", "create_app"]

log = logging.getLogger(__name__)

PROMETHEUS_TEXT = "text/plain; version=0.0.4; charset=utf-8"


def _alarms_by_channel(snapshot: Snapshot) -> dict[str, list[Alarm]]:
    by_channel: dict[str, list[Alarm]] = {}
    for alarm in snapshot.alarms:
        by_channel.setdefault(alarm.channel, []).append(alarm)
    return by_channel


def _alarm_summary(alarms: list[Alarm]) -> dict[str, object]:
    """The states worth a glance: alarms not Normal, and the highest priority among the active."""
    raised = [a for a in alarms if str(a.state) != "Normal"]
    active = [a for a in alarms if a.active and str(a.state) in ("Unacknowledged", "Acknowledged")]
    order = {p: k for k, p in enumerate(PRIORITIES)}
    return {"raised": [{"kind": a.kind, "state": str(a.state), "priority": a.priority} for a in raised],
            "unacknowledged": sum(str(a.state) in ("Unacknowledged", "Return-to-normal unacknowledged")
                                  for a in alarms),
            "highest_active": max((a.priority for a in active), key=order.__getitem__, default=None)}


def _commissioning(entry: ChannelEntry) -> dict[str, int] | None:
    """While no baseline is in force: samples applied since the start or reset, and the number that ends
    commissioning (0: none does, the baseline is set by hand); None once a baseline is in force."""
    view = entry.view
    if view.baseline is not None:
        return None
    return {"done": int(view.commissioned), "needed": int(view.settings.detectors.commissioning_samples)}


def _summary(cid: str, entry: ChannelEntry, alarms: list[Alarm]) -> dict[str, object]:
    return {"id": cid, "quality": entry.quality, "quality_reason": entry.quality_reason,
            "updated_at": entry.updated_at, "t": entry.view.last_t, "samples": entry.view.applied,
            "rejected": sum(entry.view.rejected.values()), "alarms": _alarm_summary(alarms),
            "commissioning": _commissioning(entry)}


def _detail(entry: ChannelEntry, cid: str, alarms: list[Alarm]) -> dict[str, object]:
    report = channel_report(entry.view)
    if not estimates_shown(entry.quality):
        # Estimates of a Bad channel are not for use: null them rather than show numbers.
        report["parameters"] = dict.fromkeys(report["parameters"])
        report["std_errors"] = dict.fromkeys(report["std_errors"])
        report["intervals_95"] = dict.fromkeys(report["intervals_95"])
        report["covariance"] = None
    detail: dict[str, object] = {**report, "id": cid, "quality": entry.quality,
                                 "quality_reason": entry.quality_reason, "updated_at": entry.updated_at,
                                 "t": entry.view.last_t, "alarms": [a.to_dict() for a in alarms]}
    return finite_or_null(detail)


class _EngineCollector(Collector):
    """Reads the engine's and ingest's counters at scrape time."""

    def __init__(self, runtime: Runtime) -> None:
        self._runtime = runtime

    def collect(self) -> Any:
        runtime, ingest = self._runtime, self._runtime.ingest
        engine = runtime.engine if runtime.started else None          # None while the service starts
        stats = engine.stats if engine is not None else EngineStats()
        yield CounterMetricFamily("rwls_messages", "Messages taken from the ingest queue", value=stats.messages)
        yield CounterMetricFamily("rwls_samples_applied", "Samples applied to an estimator",
                                  value=stats.samples_applied)
        yield CounterMetricFamily("rwls_samples_warmup", "Samples that only filled lag buffers",
                                  value=stats.samples_warmup)
        yield CounterMetricFamily("rwls_redelivered", "Broker redeliveries of messages already logged (not applied)",
                                  value=stats.redelivered)
        rejections = CounterMetricFamily("rwls_rejections", "Refused messages or samples", labels=["reason"])
        for reason, count in sorted(self._runtime.rejections().items()):
            rejections.add_metric([reason], count)
        yield rejections
        yield CounterMetricFamily("rwls_dead_letter_failures", "Dead letters the broker did not take",
                                  value=stats.dead_letter_failures)
        yield GaugeMetricFamily("rwls_queue_depth", "Messages waiting for the engine", value=runtime.intake.qsize())
        yield CounterMetricFamily("rwls_batches", "Micro-batches applied", value=stats.batches)
        yield CounterMetricFamily("rwls_batch_seconds", "Time spent applying micro-batches",
                                  value=stats.batch_seconds_total)
        yield GaugeMetricFamily("rwls_last_batch_seconds", "Duration of the latest micro-batch",
                                value=stats.last_batch_seconds)
        quality = GaugeMetricFamily("rwls_channels", "Channels by quality", labels=["quality"])
        counts = dict.fromkeys(Quality, 0)
        for entry in engine.snapshot.channels.values() if engine is not None else ():
            counts[entry.quality] += 1
        for name, count in counts.items():
            quality.add_metric([name], count)
        yield quality
        if ingest is not None:
            yield GaugeMetricFamily("rwls_broker_connected", "1 while connected to the broker",
                                    value=1 if ingest.connected else 0)
            yield CounterMetricFamily("rwls_broker_reconnects", "Reconnections to the broker",
                                      value=ingest.reconnects)
            yield CounterMetricFamily("rwls_mqtt_callback_errors", "Exceptions caught in MQTT callbacks",
                                      value=ingest.callback_errors)
            yield CounterMetricFamily("rwls_publish_failures", "Publishes (dead letters, alarms) the MQTT client "
                                      "refused after waiting out a full queue", value=ingest.publish_failures)


def create_app(runtime: Runtime, *, manage_runtime: bool = True) -> FastAPI:
    """The FastAPI application for a runtime; with ``manage_runtime`` its lifespan starts and stops it."""

    @asynccontextmanager
    async def lifespan(app: FastAPI) -> AsyncIterator[None]:
        runtime.events.bind(asyncio.get_running_loop())
        if manage_runtime:
            runtime.start()
        try:
            yield
        finally:
            runtime.events.close()               # open event streams end; shutdown does not wait on them
            if manage_runtime:
                runtime.stop()

    app = FastAPI(title="rwls", version="1", lifespan=lifespan, docs_url=None, redoc_url=None,
                  description="Recursive weighted least squares for sensor monitoring. " + ADVISORY)
    add_docs(app, "rwls", ADVISORY)          # /docs with Swagger UI served from here, not from a CDN
    registry = CollectorRegistry()
    registry.register(_EngineCollector(runtime))
    snapshot_cache: dict[str, object] = {"version": -1, "body": b""}
    max_payload = runtime.config.broker.max_payload_bytes
    access = Access(runtime.config.auth)
    read = [Depends(access.needs("read"))]
    source = Depends(access.needs("ingest"))
    add_guards(app, runtime.config.http, access, exempt=lambda path: path.endswith("/samples"))

    @app.exception_handler(StarletteHTTPException)
    async def http_error(request: Request, exc: StarletteHTTPException) -> JSONResponse:
        return JSONResponse({"detail": str(exc.detail)}, status_code=exc.status_code, headers=exc.headers)

    @app.exception_handler(RequestValidationError)
    async def validation_error(request: Request, exc: RequestValidationError) -> JSONResponse:
        return JSONResponse(validation_problems(exc.errors()), status_code=422)

    @app.exception_handler(Exception)
    async def internal_error(request: Request, exc: Exception) -> JSONResponse:
        log.exception("request failed path=%s", request.url.path)
        return JSONResponse({"detail": "internal error"}, status_code=500)

    def not_found(what: str) -> JSONResponse:
        return JSONResponse({"detail": what}, status_code=404)

    add_dashboard(app, ADVISORY)

    fleet = runtime.fleet

    def passed_on(request: Request) -> dict[str, str]:
        """The headers a read passes to another replica: the caller's token, nothing else."""
        token = request.headers.get("authorization")
        return {"Accept": "application/json", **({"Authorization": token} if token else {})}

    def elsewhere(request: Request, channel_id: str) -> Response | None:
        """A read of a channel another replica owns: fetched from it, or a 307 to it (None: ours)."""
        if fleet is None or not fleet.is_remote(channel_id):
            return None
        index = fleet.owner(channel_id)
        target = request.url.path + (f"?{request.url.query}" if request.url.query else "")
        if fleet.reads == "redirect":
            return Response(status_code=307, headers={"Location": fleet.url(index, target)})
        answer = fleet.fetch(index, target, passed_on(request))
        if answer is None:
            return JSONResponse({"detail": "replica_unreachable", "replica": index}, status_code=503,
                                headers={"Retry-After": "5"})
        return Response(answer.body, status_code=answer.status, media_type=answer.content_type or None)

    @app.get("/api/v1/channels", dependencies=read, summary="Every channel with its quality and last update",
             response_model=list[models.ChannelListEntry], responses=models.errors(401, 403, 422))
    def channels(request: Request, scope: Literal["fleet", "local"] = "fleet") -> list[dict[str, object]]:
        snap = runtime.engine.snapshot
        alarms = _alarms_by_channel(snap)
        local = [_summary(cid, entry, alarms.get(cid, [])) for cid, entry in snap.channels.items()]
        if fleet is None or scope == "local":
            return local
        return fleet.channel_list(local, passed_on(request))

    @app.get("/api/v1/channels/{channel_id}", dependencies=read, summary="One channel's full state",
             response_model=models.ChannelDetail, responses=models.errors(401, 403, 404, 422, 503))
    def channel(channel_id: str, request: Request) -> dict[str, object] | Response:
        remote = elsewhere(request, channel_id)
        if remote is not None:
            return remote
        snap = runtime.engine.snapshot
        entry = snap.channels.get(channel_id)
        if entry is None:
            return not_found("unknown channel")
        return _detail(entry, channel_id, _alarms_by_channel(snap).get(channel_id, []))

    @app.get("/api/v1/channels/{channel_id}/history", response_model=models.History, dependencies=read,
             responses=models.errors(401, 403, 404, 422, 503),
             summary="A channel's parameters, sigma and detector statistics over time (downsampled)")
    def history(channel_id: str, request: Request, since: float | None = Query(default=None, allow_inf_nan=False),
                until: float | None = Query(default=None, allow_inf_nan=False),
                limit: int = Query(default=1000, ge=1, le=100_000)) -> dict[str, object] | Response:
        remote = elsewhere(request, channel_id)
        if remote is not None:
            return remote
        entry = runtime.engine.snapshot.channels.get(channel_id)
        if entry is None:
            return not_found("unknown channel")
        rows = runtime.history(channel_id, since, until, limit)
        return {"channel": channel_id, "terms": list(entry.view.terms), "step": runtime.config.store.history_step,
                "rows": rows}

    @app.get("/api/v1/snapshot", dependencies=read,
             responses={200: {"model": models.SnapshotDocument, "description": "every channel, flat"},
                        304: {"description": "unchanged since the ETag given in If-None-Match"},
                        **models.errors(401, 403, 422)},
             summary="All channels, flat, in one call (for SCADA polling; ETag)",
             response_class=Response)
    def snapshot(request: Request, scope: Literal["fleet", "local"] = "fleet") -> Response:
        snap = runtime.engine.snapshot
        whole_fleet = fleet is not None and scope == "fleet"
        etag = f'W/"{runtime.started_at!r}-{snap.version}"'   # versions restart with the process
        if not whole_fleet and request.headers.get("if-none-match") == etag:
            return Response(status_code=304, headers={"ETag": etag})       # before any work: SCADA polls
        if snapshot_cache["version"] != snap.version:
            fragments = b",".join(entry.fragment for entry in snap.channels.values())
            head = json.dumps({"version": snap.version, "created_at": snap.created_at})[:-1].encode()
            snapshot_cache["body"] = head + b', "channels": {' + fragments + b"}}"
            snapshot_cache["version"] = snap.version
            snapshot_cache["doc"] = None
        if whole_fleet and fleet is not None:
            if snapshot_cache.get("doc") is None:          # parsed once per version, not once per fleet poll
                snapshot_cache["doc"] = json.loads(snapshot_cache["body"])  # type: ignore[arg-type]
            whole = json.dumps(fleet.snapshot(snapshot_cache["doc"], passed_on(request)),  # type: ignore[arg-type]
                               allow_nan=False).encode()
            etag = f'W/"fleet-{hashlib.blake2b(whole, digest_size=12).hexdigest()}"'
            if request.headers.get("if-none-match") == etag:
                return Response(status_code=304, headers={"ETag": etag})
            return Response(whole, media_type="application/json", headers={"ETag": etag, "Cache-Control": "no-cache"})
        return Response(snapshot_cache["body"], media_type="application/json",
                        headers={"ETag": etag, "Cache-Control": "no-cache"})

    @app.post("/api/v1/channels/{channel_id}/samples", status_code=202, response_model=models.Queued,
              responses=models.errors(400, 401, 403, 404, 413, 422, 503),
              summary="Ingest samples over HTTP (the MQTT payload contract, same validation)")
    async def post_samples(channel_id: str, request: Request,
                           _who: Principal = source) -> dict[str, object] | JSONResponse:
        settings = runtime.channels.get(channel_id)
        if settings is None:
            runtime.refuse_http("unknown_channel")
            return not_found("unknown channel")
        declared = request.headers.get("content-length")
        # ASCII digits only ("²" passes isdigit); 12 leading digits bound int() and are already > 16 MiB.
        if declared is not None and declared.isascii() and declared.isdigit() and int(declared[:12]) > max_payload:
            runtime.refuse_http("too_large")
            return JSONResponse({"detail": "payload too large"}, status_code=413)
        body = b""
        async for chunk in request.stream():
            body += chunk
            if len(body) > max_payload:
                runtime.refuse_http("too_large")
                return JSONResponse({"detail": "payload too large"}, status_code=413)
        inputs = settings.input_names
        decoded, rejections = decode_payload(body, max_bytes=max_payload, input_names=inputs)
        if not decoded and rejections and rejections[0].index is None:
            # Refused as a whole: the client hears why; nothing for the engine to do.
            runtime.refuse_http(rejections[0].reason)
            return JSONResponse({"detail": rejections[0].reason}, status_code=400)
        if not runtime.submit_http(channel_id, body, (decoded, rejections)):
            return JSONResponse({"detail": "busy, retry later"}, status_code=503, headers={"Retry-After": "1"})
        return {"queued": len(decoded),
                "rejected": [{"index": r.index, "reason": r.reason} for r in rejections]}

    @app.get("/api/v1/health", summary="Liveness: the engine thread runs", response_model=models.Health,
             responses=models.errors(503))
    def health() -> dict[str, object] | JSONResponse:
        ok = runtime.engine_alive() and (runtime.ingest is None or runtime.ingest.alive())
        return {"status": "ok"} if ok else JSONResponse({"detail": "engine or ingest thread down"}, 503)

    @app.get("/api/v1/ready", summary="Readiness: broker connected, engine alive, queue not full",
             response_model=models.Readiness,
             responses={503: {"model": models.Readiness, "description": "not ready: the same document says why"}})
    def ready() -> dict[str, object] | JSONResponse:
        state = runtime.readiness()
        return finite_or_null(state) if state["ready"] else JSONResponse(finite_or_null(state), 503)

    add_alarm_routes(app, runtime, access)

    @app.get("/metrics", dependencies=read, include_in_schema=False)
    def metrics() -> Response:
        return Response(generate_latest(registry), media_type=PROMETHEUS_TEXT)

    return app
