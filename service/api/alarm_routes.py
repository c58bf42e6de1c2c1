"""The alarm routes of the API: alarms and their journal, the operator's actions, the live event stream (SSE).

Reads come from the engine's snapshot (``snapshot.alarms``) and the journal;
writes are engine operations, run on the engine thread in order with the
samples (the single writer), each returning what changed. Refusals are short
stable JSON: 404 for an unknown alarm, 409 with the reason code when the
alarm's state does not allow the action (``{"detail": "not_acknowledgeable", "message": ...}``).
"""

from __future__ import annotations

import asyncio
import json
import time
from collections.abc import AsyncIterator, Callable

from fastapi import APIRouter, Query, Request
from fastapi.responses import JSONResponse, Response, StreamingResponse
from starlette.background import BackgroundTask

from service.alarms.lifecycle import AlarmRefused
from service.api import models
from service.api.connection_limits import RETRY_AFTER_SECONDS, Slots
from service.api.dependencies import READ, Operator, ServiceRuntime
from service.api.write_bodies import ACTION_ERRORS, AckBody, ShelveBody, actor, busy
from service.engine.operations import Acknowledge, Remove, Restore, Shelve, Unshelve
from service.engine.writer import EngineBusy
from service.runtime import Runtime

__all__ = ["router"]

router = APIRouter(prefix="/api/v1")


def _refused(exc: AlarmRefused) -> JSONResponse:
    status = 404 if exc.code == "unknown_alarm" else 409
    return JSONResponse({"detail": exc.code, "message": str(exc)}, status_code=status)


def _act(runtime: Runtime, action: type[Acknowledge | Shelve | Unshelve | Remove | Restore], alarm_id: str,
         body: AckBody | ShelveBody, who: Operator, **more: float) -> dict[str, object] | JSONResponse:
    if alarm_id not in runtime.alarms:                  # the book's alarms are fixed by the configuration
        return JSONResponse({"detail": "unknown_alarm", "message": f"no alarm {alarm_id!r}"}, status_code=404)
    operation = action(alarm=alarm_id, user=actor(who, body), comment=body.comment or "", time=time.time(), **more)
    try:
        changed = runtime.engine.execute(operation)
    except AlarmRefused as exc:
        return _refused(exc)
    except EngineBusy as exc:
        return busy(exc)
    return {"entry": changed.entry.to_dict(), "alarm": changed.alarm.to_dict()}


@router.get("/alarms", dependencies=[READ], summary="Alarms (by default those not Normal), filtered and paged",
            response_model=models.AlarmList, responses=models.errors(401, 403, 422))
def alarms(runtime: ServiceRuntime, channel: str | None = None, kind: str | None = None, state: str | None = None,
           priority: str | None = None, include_normal: bool = False,
           limit: int = Query(default=100, ge=1, le=10_000),
           offset: int = Query(default=0, ge=0)) -> dict[str, object]:
    table = runtime.engine.snapshot.alarms
    rows = table.rows_where(channel=channel, kind=kind, state=state, priority=priority, include_normal=include_normal)
    return {"total": len(rows), "offset": offset,
            "alarms": [table.at(row).to_dict() for row in rows[offset:offset + limit].tolist()]}


@router.get("/alarms/journal", dependencies=[READ], summary="Alarm transitions with seq > after, oldest first",
            response_model=models.Journal, responses=models.errors(401, 403, 422, 503))
def journal(runtime: ServiceRuntime, after: int = Query(default=0, ge=0),
            limit: int = Query(default=100, ge=1, le=10_000), channel: str | None = None) -> dict[str, object]:
    entries = runtime.journal(after, limit, channel)
    return {"entries": entries, "next": entries[-1]["seq"] if entries else after}


def _plain_action(action: type[Acknowledge | Unshelve | Remove | Restore]) \
        -> Callable[[str, AckBody, Operator, ServiceRuntime], dict[str, object] | JSONResponse]:
    def route(alarm_id: str, body: AckBody, who: Operator, runtime: ServiceRuntime) -> dict[str, object] | JSONResponse:
        return _act(runtime, action, alarm_id, body, who)
    route.__name__ = action.name
    return route


# The actions that take only a user and a comment: one route each, the same handler.
for _path, _action, _summary in (("ack", Acknowledge, "Acknowledge an alarm"),
                                 ("unshelve", Unshelve, "End an alarm's shelving"),
                                 ("remove", Remove, "Take an alarm out of service"),
                                 ("restore", Restore, "Return an alarm to service")):
    router.add_api_route(f"/alarms/{{alarm_id}}/{_path}", _plain_action(_action), methods=["POST"],
                         summary=_summary, response_model=models.AlarmAction, responses=ACTION_ERRORS)


@router.post("/alarms/{alarm_id}/shelve", summary="Shelve an alarm for some minutes",
             response_model=models.AlarmAction, responses=ACTION_ERRORS)
def shelve(alarm_id: str, body: ShelveBody, who: Operator, runtime: ServiceRuntime) -> dict[str, object] | JSONResponse:
    return _act(runtime, Shelve, alarm_id, body, who, until=time.time() + 60.0 * body.minutes)


@router.get("/events", dependencies=[READ], summary="Live alarm transitions (Server-Sent Events)",
            response_class=StreamingResponse,
            responses={200: {"content": {"text/event-stream": {"schema": {
                "type": "object", "properties": {"data": {"type": "string", "description": "JSON text"}}}}},
                             "description": "one `data:` line of JSON per alarm state, then per transition"},
                       **models.errors(401, 403),
                       503: {"model": models.ErrorBody, "description": "too many event streams open (all clients, "
                             "or from this address: http.max_event_streams[_per_address]); see Retry-After"}})
async def events(request: Request, runtime: ServiceRuntime) -> Response:
    slots: Slots = request.app.state.event_streams
    address = request.client.host if request.client is not None else "unknown"
    refused = slots.take(address)
    if refused is not None:
        return JSONResponse({"detail": f"too many event streams open ({refused.replace('_', ' ')}): retry later"},
                            status_code=503, headers={"Retry-After": str(RETRY_AFTER_SECONDS)})
    held = [True]

    def give_back() -> None:             # once, whichever of the stream's end and the background task is first
        if held.pop() if held else False:
            slots.give_back(address)

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
            give_back()

    # The background task gives the slot back should the stream never start (the client gone at once).
    return StreamingResponse(stream(), media_type="text/event-stream", background=BackgroundTask(give_back),
                             headers={"Cache-Control": "no-cache", "X-Accel-Buffering": "no"})

