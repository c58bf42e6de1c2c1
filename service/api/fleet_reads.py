"""Reads of a channel another replica of the fleet owns: fetched from it, or a 307 to it."""

from __future__ import annotations

from fastapi import Request
from fastapi.responses import JSONResponse, Response

from service.fleet.peers import Fleet

__all__ = ["elsewhere", "passed_on"]


def passed_on(request: Request) -> dict[str, str]:
    """The headers a read passes to another replica: the caller's token, nothing else."""
    token = request.headers.get("authorization")
    return {"Accept": "application/json", **({"Authorization": token} if token else {})}


def elsewhere(fleet: Fleet | None, request: Request, channel_id: str) -> Response | None:
    """A read of a channel another replica owns: its answer, or a 307 to it; None when the channel is ours."""
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
