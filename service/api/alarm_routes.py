"""The alarm and channel-command routes of the API, and the live event stream (SSE).

Reads come from the engine's snapshot (``snapshot.alarms``) and the journal;
writes are engine commands, run on the engine thread in order with the
samples (the single writer). Refusals are short stable JSON: 404 for an
unknown alarm or channel, 409 with the reason code when the alarm's state
does not allow the action (``{"detail": "not_acknowledgeable", "message": ...}``).
"""

from __future__ import annotations

import asyncio
import json
import math
import time
from collections.abc import AsyncIterator, Callable
from typing import Literal

from fastapi import Depends, FastAPI, Query, Request
from fastapi.responses import JSONResponse, StreamingResponse
from pydantic import BaseModel, ConfigDict, Field

from estimator import Baseline
from service.alarms.lifecycle import AlarmRefused
from service.api import models
from service.api.auth import Access, Principal
from service.engine.channel_report import finite_or_null
from service.engine.operations import (
    Acknowledge,
    Inspect,
    LearnBaseline,
    Remove,
    Reset,
    Restore,
    SetBaseline,
    Shelve,
    Unshelve,
)
from service.engine.writer import EngineBusy
from service.runtime import Runtime

__all__ = ["add_alarm_routes", "baseline_json"]


class _Body(BaseModel):
    model_config = ConfigDict(extra="forbid")

    user: str | None = Field(default=None, min_length=1, max_length=128,
                             description="who acts, when the token is shared (journal: '<user> via <token name>')")
    comment: str = Field(default="", max_length=2000)


class AckBody(_Body):
    pass


class ShelveBody(_Body):
    minutes: float = Field(gt=0.0, le=7 * 24 * 60, description="shelved for this long (at most a week)")


class BaselineBody(_Body):
    action: Literal["learn", "set"] = "learn"
    parameters: dict[str, float] | None = Field(default=None, description="set: every term's reference value")
    noise_sigma: float | None = Field(default=None, gt=0.0, description="set: noise sigma, engineering units")


def baseline_json(baseline: Baseline | None, terms: tuple[str, ...]) -> dict[str, object] | None:
    if baseline is None:
        return None
    return finite_or_null({
        "version": baseline.version, "source": baseline.source,
        "parameters": dict(zip(terms, baseline.parameters.tolist(), strict=True)),
        "std_errors": dict(zip(terms, [math.sqrt(max(v, 0.0)) for v in baseline.covariance.diagonal().tolist()],
                               strict=True)),
        "noise_sigma": baseline.noise_sigma, "t": baseline.t, "samples": baseline.samples,
        "note": baseline.note or None})  # type: ignore[return-value]


def _refused(exc: AlarmRefused) -> JSONResponse:
    status = 404 if exc.code == "unknown_alarm" else 409
    return JSONResponse({"detail": exc.code, "message": str(exc)}, status_code=status)


def _busy(exc: EngineBusy) -> JSONResponse:
    return JSONResponse({"detail": "busy, retry later", "message": str(exc)}, status_code=503,
                        headers={"Retry-After": "1"})


def _actor(who: Principal, body: _Body) -> str:
    """The journal's ``user``: the token's holder, and the person behind a shared token when given."""
    return who.name if body.user is None or body.user == who.name else f"{body.user} via {who.name}"


# Errors of a write: an unreadable or too large body, no token or role, no such alarm or channel, a state it
# does not allow, a body that does not validate, busy.
ACTION_ERRORS = models.errors(400, 401, 403, 404, 409, 413, 422, 503)


def add_alarm_routes(app: FastAPI, runtime: Runtime, access: Access) -> None:
    """Register the alarm, baseline, reset and event-stream routes (reads, operate and configure checks)."""
    known_alarms = frozenset(alarm.id for alarm in runtime.alarms.alarms())    # fixed by the configuration
    read = [Depends(access.needs("read"))]
    operator = Depends(access.needs("operate"))
    engineer = Depends(access.needs("configure"))

    def alarm_action(action: type[Acknowledge | Shelve | Unshelve | Remove | Restore], alarm_id: str, body: _Body,
                     who: Principal, **more: float) -> dict[str, object] | JSONResponse:
        if alarm_id not in known_alarms:
            return JSONResponse({"detail": "unknown_alarm", "message": f"no alarm {alarm_id!r}"}, status_code=404)
        operation = action(alarm=alarm_id, user=_actor(who, body), comment=body.comment or "", time=time.time(),
                           **more)
        try:
            changed = runtime.engine.execute(operation)
        except AlarmRefused as exc:
            return _refused(exc)
        except EngineBusy as exc:
            return _busy(exc)
        return {"entry": changed.entry.to_dict(), "alarm": changed.alarm.to_dict()}

    @app.get("/api/v1/alarms", dependencies=read, summary="Alarms (by default those not Normal), filtered and paged",
             response_model=models.AlarmList, responses=models.errors(401, 403, 422))
    def alarms(channel: str | None = None, kind: str | None = None, state: str | None = None,
               priority: str | None = None, include_normal: bool = False,
               limit: int = Query(default=100, ge=1, le=10_000),
               offset: int = Query(default=0, ge=0)) -> dict[str, object]:
        chosen = [a for a in runtime.engine.snapshot.alarms
                  if (include_normal or str(a.state) != "Normal")
                  and (channel is None or a.channel == channel) and (kind is None or a.kind == kind)
                  and (state is None or str(a.state) == state) and (priority is None or a.priority == priority)]
        return {"total": len(chosen), "offset": offset, "alarms": [a.to_dict() for a in chosen[offset:offset + limit]]}

    @app.get("/api/v1/alarms/journal", dependencies=read, summary="Alarm transitions with seq > after, oldest first",
             response_model=models.Journal, responses=models.errors(401, 403, 422))
    def journal(after: int = Query(default=0, ge=0), limit: int = Query(default=100, ge=1, le=10_000),
                channel: str | None = None) -> dict[str, object]:
        entries = runtime.journal(after, limit, channel)
        return {"entries": entries, "next": entries[-1]["seq"] if entries else after}

    def plain_action(action: type[Acknowledge | Unshelve | Remove | Restore]) \
            -> Callable[[str, AckBody, Principal], dict[str, object] | JSONResponse]:
        def route(alarm_id: str, body: AckBody, who: Principal = operator) -> dict[str, object] | JSONResponse:
            return alarm_action(action, alarm_id, body, who)
        route.__name__ = action.name
        return route

    # The actions that take only a user and a comment: one route each, the same handler.
    for path, action, summary in (("ack", Acknowledge, "Acknowledge an alarm"),
                                  ("unshelve", Unshelve, "End an alarm's shelving"),
                                  ("remove", Remove, "Take an alarm out of service"),
                                  ("restore", Restore, "Return an alarm to service")):
        app.add_api_route(f"/api/v1/alarms/{{alarm_id}}/{path}", plain_action(action), methods=["POST"],
                          summary=summary, response_model=models.AlarmAction, responses=ACTION_ERRORS)

    @app.post("/api/v1/alarms/{alarm_id}/shelve", summary="Shelve an alarm for some minutes",
              response_model=models.AlarmAction, responses=ACTION_ERRORS)
    def shelve(alarm_id: str, body: ShelveBody, who: Principal = operator) -> dict[str, object] | JSONResponse:
        return alarm_action(Shelve, alarm_id, body, who, until=time.time() + 60.0 * body.minutes)

    @app.get("/api/v1/channels/{channel_id}/baselines", dependencies=read,
             summary="Every baseline of a channel, oldest first",
             response_model=models.Baselines, responses=models.errors(401, 403, 404, 422, 503))
    def baselines(channel_id: str) -> dict[str, object] | JSONResponse:
        entry = runtime.engine.snapshot.channels.get(channel_id)
        if entry is None:
            return JSONResponse({"detail": "unknown channel"}, status_code=404)
        try:
            history = runtime.engine.execute(Inspect(lambda engine: engine.bank.baselines(channel_id)))
        except EngineBusy as exc:
            return _busy(exc)
        return {"baselines": [baseline_json(b, entry.view.terms) for b in history],
                "in_force": None if entry.view.baseline is None else entry.view.baseline.version}

    @app.post("/api/v1/channels/{channel_id}/baseline", response_model=models.BaselineMade,
              responses=ACTION_ERRORS,
              summary="Learn a new baseline now from the estimates, or set one (a calibration)")
    def set_baseline(channel_id: str, body: BaselineBody,
                     who: Principal = engineer) -> dict[str, object] | JSONResponse:
        entry = runtime.engine.snapshot.channels.get(channel_id)
        if entry is None:
            return JSONResponse({"detail": "unknown channel"}, status_code=404)
        terms = entry.view.terms
        actor = _actor(who, body)
        note = f"{actor}: {body.comment}" if body.comment else actor
        operation: SetBaseline | LearnBaseline
        if body.action == "set":
            if body.parameters is None or body.noise_sigma is None or set(body.parameters) != set(terms):
                return JSONResponse({"detail": "bad_baseline", "message": f"set needs noise_sigma and a value for "
                                     f"each term: {', '.join(terms)}"}, status_code=422)
            values = tuple(body.parameters[name] for name in terms)
            if not all(math.isfinite(v) for v in values):
                return JSONResponse({"detail": "bad_baseline", "message": "values must be finite"}, 422)
            operation = SetBaseline(channel=channel_id, parameters=values, noise_sigma=body.noise_sigma, note=note)
        else:
            operation = LearnBaseline(channel=channel_id, note=note)
        try:
            made = runtime.engine.execute(operation)
        except EngineBusy as exc:
            return _busy(exc)
        if made is None:
            return JSONResponse({"detail": "not_identifiable", "message": "the estimates cannot be judged yet"},
                                status_code=409)
        return {"baseline": baseline_json(made, terms)}

    @app.post("/api/v1/channels/{channel_id}/reset", response_model=models.ResetDone,
              responses=ACTION_ERRORS,
              summary="Start the channel's estimator afresh (commissioning again; history kept)")
    def reset(channel_id: str, body: AckBody, who: Principal = engineer) -> dict[str, object] | JSONResponse:
        if channel_id not in runtime.channels:
            return JSONResponse({"detail": "unknown channel"}, status_code=404)

        try:
            runtime.engine.execute(Reset(channel=channel_id, user=_actor(who, body), comment=body.comment or ""))
        except EngineBusy as exc:
            return _busy(exc)
        return {"reset": channel_id, "by": _actor(who, body)}

    @app.get("/api/v1/events", dependencies=read, summary="Live alarm transitions (Server-Sent Events)",
             response_class=StreamingResponse,
             responses={200: {"content": {"text/event-stream": {"schema": {
                 "type": "object", "properties": {"data": {"type": "string", "description": "JSON text"}}}}},
                              "description": "one `data:` line of JSON per alarm state, then per transition"},
                        **models.errors(401, 403)})
    async def events(request: Request) -> StreamingResponse:
        hub = runtime.events
        hub.bind(asyncio.get_running_loop())
        q = hub.subscribe()

        async def stream() -> AsyncIterator[bytes]:
            try:
                alarms = [a.to_dict() for a in runtime.engine.snapshot.alarms]
                yield b"retry: 2000\n\ndata: " + json.dumps({"type": "alarms", "alarms": alarms}).encode() + b"\n\n"
                while not hub.closed:
                    if await request.is_disconnected():
                        return
                    try:
                        body = await asyncio.wait_for(q.get(), timeout=1.0)
                    except TimeoutError:
                        yield b": keep-alive\n\n"
                        continue
                    if not body:
                        return                                  # the service is stopping
                    yield b"data: " + body + b"\n\n"
            finally:
                hub.unsubscribe(q)

        return StreamingResponse(stream(), media_type="text/event-stream",
                                 headers={"Cache-Control": "no-cache", "X-Accel-Buffering": "no"})

