"""HTTP ingest: the MQTT payload contract over POST, validated the same way, queued to the engine."""

from __future__ import annotations

from fastapi import APIRouter, Request
from fastapi.responses import JSONResponse

from estimator import SampleRefusal
from service.api import models
from service.api.dependencies import INGEST, ServiceRuntime
from service.api.errors import not_found
from service.broker_link.payload import PayloadRefusal, decode_payload

__all__ = ["router"]

router = APIRouter(prefix="/api/v1")


def _too_large() -> JSONResponse:
    return JSONResponse({"detail": "payload too large"}, status_code=413)


@router.post("/channels/{channel_id}/samples", status_code=202, response_model=models.Queued, dependencies=[INGEST],
             responses=models.errors(400, 401, 403, 404, 413, 422, 503),
             summary="Ingest samples over HTTP (the MQTT payload contract, same validation)")
async def post_samples(channel_id: str, request: Request, runtime: ServiceRuntime) -> dict[str, object] | JSONResponse:
    held = runtime.ingest_held()
    if held is not None:
        # Nothing taken that could not be made durable; the fault heals by itself (see /api/v1/ready).
        return JSONResponse({"detail": f"{held}; retry later"}, status_code=503, headers={"Retry-After": "5"})
    settings = runtime.channels.get(channel_id)
    if settings is None:
        runtime.refuse_http(SampleRefusal.UNKNOWN_CHANNEL)
        return not_found("unknown channel")
    max_payload = runtime.config.broker.max_payload_bytes
    declared = request.headers.get("content-length")
    # ASCII digits only ("²" passes isdigit); 12 leading digits bound int() and are already > 16 MiB.
    if declared is not None and declared.isascii() and declared.isdigit() and int(declared[:12]) > max_payload:
        runtime.refuse_http(PayloadRefusal.TOO_LARGE)
        return _too_large()
    body = b""
    async for chunk in request.stream():
        body += chunk
        if len(body) > max_payload:
            runtime.refuse_http(PayloadRefusal.TOO_LARGE)
            return _too_large()
    decoded, refusals = decode_payload(body, max_bytes=max_payload, input_names=settings.input_names)
    if not decoded and refusals and refusals[0].index is None:
        # Refused as a whole: the client hears why; nothing for the engine to do.
        runtime.refuse_http(PayloadRefusal(refusals[0].reason))
        return JSONResponse({"detail": refusals[0].reason}, status_code=400)
    if not runtime.submit_http(channel_id, body, (decoded, refusals)):
        return JSONResponse({"detail": "busy, retry later"}, status_code=503, headers={"Retry-After": "1"})
    return {"queued": len(decoded), "rejected": [{"index": r.index, "reason": r.reason} for r in refusals]}
