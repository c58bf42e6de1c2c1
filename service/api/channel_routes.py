"""The channel reads: the channel list, one channel's full state, its history, and the flat snapshot (ETag).

Every read comes from the engine's latest immutable snapshot (or the store, for history); a channel another
replica owns is read from it (:mod:`service.api.fleet_reads`).
"""

from __future__ import annotations

import hashlib
import json
from typing import Any, Literal

from fastapi import APIRouter, Query, Request
from fastapi.responses import Response

from service.alarms.lifecycle import PRIORITIES, Alarm
from service.api import models
from service.api.dependencies import READ, ServiceRuntime
from service.api.errors import not_found
from service.api.fleet_reads import elsewhere, passed_on
from service.engine.channel_report import channel_report, finite_or_null
from service.engine.quality import estimates_shown
from service.engine.snapshot import ChannelEntry, Snapshot

__all__ = ["FlatSnapshot", "router"]

router = APIRouter(prefix="/api/v1", dependencies=[READ])


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
            "updated_at": entry.updated_at, "t": entry.last_t, "samples": entry.applied,
            "rejected": entry.rejected, "alarms": _alarm_summary(alarms),
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


class FlatSnapshot:
    """The ``/snapshot`` body of the latest snapshot version: a join of the channels' ready-made fragments,
    made once per version however often it is polled (and parsed once per version for the fleet's)."""

    def __init__(self) -> None:
        # Each replaced whole (one reference, atomic), since handlers run on several threads at once.
        self._body: tuple[int, bytes] = (-1, b"")
        self._document: tuple[int, dict[str, Any]] = (-1, {})
        # Per chunk of channels: the chunk the joined fragments were made of, and them. A chunk no publish
        # touched since is the same object, so only the touched chunks are joined again.
        self._joined: tuple[tuple[object, bytes], ...] = ()

    def body(self, snap: Snapshot) -> bytes:
        version, body = self._body
        if version != snap.version:
            before = self._joined
            joined = tuple(before[i] if i < len(before) and before[i][0] is chunk
                           else (chunk, b",".join(entry.fragment for entry in chunk.values()))
                           for i, chunk in enumerate(snap.channels.chunks))
            self._joined = joined
            head = json.dumps({"version": snap.version, "created_at": snap.created_at})[:-1].encode()
            body = head + b', "channels": {' + b",".join(part for _, part in joined if part) + b"}}"
            self._body = (snap.version, body)
        return body

    def document(self, snap: Snapshot) -> dict[str, Any]:
        version, document = self._document
        if version != snap.version:
            document = json.loads(self.body(snap))
            self._document = (snap.version, document)
        return document


@router.get("/channels", summary="Every channel with its quality and last update",
            response_model=list[models.ChannelListEntry], responses=models.errors(401, 403, 422))
def channels(request: Request, runtime: ServiceRuntime,
             scope: Literal["fleet", "local"] = "fleet") -> list[dict[str, object]]:
    snap = runtime.engine.snapshot
    local = [_summary(cid, entry, snap.alarms.of_channel(cid)) for cid, entry in snap.channels.items()]
    if runtime.fleet is None or scope == "local":
        return local
    return runtime.fleet.channel_list(local, passed_on(request))


@router.get("/channels/{channel_id}", summary="One channel's full state",
            response_model=models.ChannelDetail, responses=models.errors(401, 403, 404, 422, 503))
def channel(channel_id: str, request: Request, runtime: ServiceRuntime) -> dict[str, object] | Response:
    remote = elsewhere(runtime.fleet, request, channel_id)
    if remote is not None:
        return remote
    snap = runtime.engine.snapshot
    entry = snap.channels.get(channel_id)
    if entry is None:
        return not_found("unknown channel")
    return _detail(entry, channel_id, snap.alarms.of_channel(channel_id))


@router.get("/channels/{channel_id}/history", response_model=models.History,
            responses=models.errors(401, 403, 404, 422, 503),
            summary="A channel's parameters, sigma and detector statistics over time (downsampled)")
def history(channel_id: str, request: Request, runtime: ServiceRuntime,
            since: float | None = Query(default=None, allow_inf_nan=False),
            until: float | None = Query(default=None, allow_inf_nan=False),
            limit: int = Query(default=1000, ge=1, le=100_000)) -> dict[str, object] | Response:
    remote = elsewhere(runtime.fleet, request, channel_id)
    if remote is not None:
        return remote
    entry = runtime.engine.snapshot.channels.get(channel_id)
    if entry is None:
        return not_found("unknown channel")
    rows = runtime.history(channel_id, since, until, limit)
    return {"channel": channel_id, "terms": list(entry.view.terms), "step": runtime.config.store.history_step,
            "rows": rows}


@router.get("/snapshot",
            responses={200: {"model": models.SnapshotDocument, "description": "every channel, flat"},
                       304: {"description": "unchanged since the ETag given in If-None-Match"},
                       **models.errors(401, 403, 422)},
            summary="All channels, flat, in one call (for SCADA polling; ETag)",
            response_class=Response)
def snapshot(request: Request, runtime: ServiceRuntime, scope: Literal["fleet", "local"] = "fleet") -> Response:
    snap = runtime.engine.snapshot
    flat: FlatSnapshot = request.app.state.flat_snapshot
    fleet = runtime.fleet
    etag = f'W/"{runtime.started_at!r}-{snap.version}"'   # versions restart with the process
    if (fleet is None or scope == "local") and request.headers.get("if-none-match") == etag:
        return Response(status_code=304, headers={"ETag": etag})       # before any work: SCADA polls
    if fleet is not None and scope == "fleet":
        whole = json.dumps(fleet.snapshot(flat.document(snap), passed_on(request)), allow_nan=False).encode()
        etag = f'W/"fleet-{hashlib.blake2b(whole, digest_size=12).hexdigest()}"'
        if request.headers.get("if-none-match") == etag:
            return Response(status_code=304, headers={"ETag": etag})
        return Response(whole, media_type="application/json", headers={"ETag": etag, "Cache-Control": "no-cache"})
    return Response(flat.body(snap), media_type="application/json", headers={"ETag": etag, "Cache-Control": "no-cache"})
