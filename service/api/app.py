"""The REST API (FastAPI): read-only views of the engine's latest snapshot, plus HTTP ingest.

Everything under ``/api/v1``; ``/metrics`` at the root by Prometheus
convention. This module builds the app: the runtime and the token check on
``app.state`` (:mod:`service.api.dependencies` hands them to handlers), the
error shapes, the guards, ``/docs``, the dashboard and one router per concern
(``*_routes.py``). Handlers never touch estimator state: they read the immutable
snapshot, hand a payload to the engine queue, or run an engine operation. Errors are short stable JSON
(``{"detail": "..."}``), never tracebacks; NaN and infinity never reach JSON
(null, with the channel's quality saying why).
"""

from __future__ import annotations

import asyncio
import logging
from collections import Counter
from collections.abc import AsyncIterator
from contextlib import asynccontextmanager

from fastapi import APIRouter, FastAPI, Request
from fastapi.exceptions import RequestValidationError
from fastapi.responses import JSONResponse
from starlette.exceptions import HTTPException as StarletteHTTPException
from starlette.types import ASGIApp

from service.advisory import ADVISORY
from service.api import alarm_routes, baseline_routes, channel_routes, ingest_routes, status_routes
from service.api.auth import Access
from service.api.channel_routes import FlatSnapshot
from service.api.connection_limits import ConnectionLimits, Slots
from service.api.dashboard_routes import add_dashboard
from service.api.docs import add_docs
from service.api.errors import validation_problems
from service.api.guard import add_guards
from service.api.metrics import ServiceMetrics
from service.api.security_headers import SecurityHeaders
from service.api.throttle import AuthThrottle
from service.runtime import Runtime
from service.storage.persistence import StoreUnavailable

__all__ = ["ADVISORY", "create_app"]

log = logging.getLogger(__name__)

# One router per concern, in the order the OpenAPI document lists them.
ROUTERS: tuple[APIRouter, ...] = (channel_routes.router, ingest_routes.router, status_routes.router,
                                  alarm_routes.router, baseline_routes.router)


class _App(FastAPI):
    """FastAPI with :class:`SecurityHeaders` outside everything, so even a 500 carries the headers."""

    def build_middleware_stack(self) -> ASGIApp:
        hsts_seconds = self.state.runtime.config.http.hsts_seconds
        return SecurityHeaders(super().build_middleware_stack(), hsts_seconds=hsts_seconds)


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

    app = _App(title="rwls", version="1", lifespan=lifespan, docs_url=None, redoc_url=None,
                  description="Recursive weighted least squares for sensor monitoring. " + ADVISORY)
    app.state.runtime = runtime
    http = runtime.config.http
    throttle = AuthThrottle(http.auth_failures, http.auth_window, http.auth_block_seconds,
                            http.auth_block_max_seconds)
    app.state.access = Access(runtime.config.auth, throttle)
    app.state.event_streams = Slots(http.max_event_streams, http.max_event_streams_per_address, "event_streams")
    # Counted by the server's protocol (service/api/server.py); here so that /metrics can read them.
    app.state.connection_limits = ConnectionLimits(http.max_connections, http.max_connections_per_address,
                                                   http.header_timeout)
    app.state.body_refusals = Counter[str]()      # request bodies over http.max_body_bytes (413)
    app.state.metrics = ServiceMetrics(runtime, app.state.access, app.state.connection_limits,
                                       app.state.event_streams, app.state.body_refusals)
    app.state.http_warnings = []             # set by the server that listens (service/api/server.py)
    app.state.flat_snapshot = FlatSnapshot()
    add_docs(app, "rwls", ADVISORY)          # /docs with Swagger UI served from here, not from a CDN
    add_guards(app, runtime.config.http, app.state.access, exempt=lambda path: path.endswith("/samples"),
               refused=app.state.body_refusals)

    @app.exception_handler(StarletteHTTPException)
    async def http_error(request: Request, exc: StarletteHTTPException) -> JSONResponse:
        return JSONResponse({"detail": str(exc.detail)}, status_code=exc.status_code, headers=exc.headers)

    @app.exception_handler(RequestValidationError)
    async def validation_error(request: Request, exc: RequestValidationError) -> JSONResponse:
        return JSONResponse(validation_problems(exc.errors()), status_code=422)

    @app.exception_handler(StoreUnavailable)
    async def store_unavailable(request: Request, exc: StoreUnavailable) -> JSONResponse:
        return JSONResponse({"detail": str(exc)}, status_code=503, headers={"Retry-After": "5"})

    @app.exception_handler(Exception)
    async def internal_error(request: Request, exc: Exception) -> JSONResponse:
        log.exception("request failed path=%s", request.url.path)
        return JSONResponse({"detail": "internal error"}, status_code=500)

    add_dashboard(app, ADVISORY)
    for router in ROUTERS:
        app.include_router(router)
    return app
