"""Liveness, readiness and the Prometheus scrape."""

from __future__ import annotations

from fastapi import APIRouter, Request
from fastapi.responses import JSONResponse, Response

from service.api import models
from service.api.auth import Access
from service.api.dependencies import READ, ServiceRuntime
from service.api.metrics import PROMETHEUS_TEXT, ServiceMetrics
from service.engine.channel_report import finite_or_null

__all__ = ["router"]

router = APIRouter()


@router.get("/api/v1/health", summary="Liveness: the engine thread runs", response_model=models.Health,
            responses=models.errors(503))
def health(runtime: ServiceRuntime) -> dict[str, object] | JSONResponse:
    ok = runtime.engine_alive() and (runtime.ingest is None or runtime.ingest.alive())
    return {"status": "ok"} if ok else JSONResponse({"detail": "engine or ingest thread down"}, 503)


@router.get("/api/v1/ready", summary="Readiness: broker connected, engine alive, queue not full",
            description="Also names the tokens that end soon (or have ended) and settings that leave the service "
                        "exposed (plain HTTP beyond loopback); neither makes it not ready.",
            response_model=models.Readiness,
            responses={503: {"model": models.Readiness, "description": "not ready: the same document says why"}})
def ready(request: Request, runtime: ServiceRuntime) -> dict[str, object] | JSONResponse:
    access: Access = request.app.state.access
    state = {**runtime.readiness(), "tokens_expiring": access.expiring(),
             "warnings": list(request.app.state.http_warnings)}
    return finite_or_null(state) if state["ready"] else JSONResponse(finite_or_null(state), 503)


@router.get("/metrics", dependencies=[READ], include_in_schema=False)
def metrics(request: Request) -> Response:
    service_metrics: ServiceMetrics = request.app.state.metrics
    return Response(service_metrics.text(), media_type=PROMETHEUS_TEXT)
