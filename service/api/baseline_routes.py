"""A channel's baselines (read, learn, set) and its reset: the commands of an engineer.

Writes are engine operations, run on the engine thread in order with the samples (the single writer); each
returns what it made, so no handler reads live state.
"""

from __future__ import annotations

import math

from fastapi import APIRouter
from fastapi.responses import JSONResponse

from estimator import Baseline
from service.api import models
from service.api.dependencies import READ, Engineer, ServiceRuntime
from service.api.errors import not_found
from service.api.write_bodies import ACTION_ERRORS, AckBody, BaselineBody, actor, busy
from service.engine.channel_report import finite_or_null
from service.engine.operations import Inspect, LearnBaseline, Reset, SetBaseline
from service.engine.writer import EngineBusy

__all__ = ["baseline_json", "router"]

router = APIRouter(prefix="/api/v1/channels")


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


@router.get("/{channel_id}/baselines", dependencies=[READ], summary="Every baseline of a channel, oldest first",
            response_model=models.Baselines, responses=models.errors(401, 403, 404, 422, 503))
def baselines(channel_id: str, runtime: ServiceRuntime) -> dict[str, object] | JSONResponse:
    entry = runtime.engine.snapshot.channels.get(channel_id)
    if entry is None:
        return not_found("unknown channel")
    try:
        history = runtime.engine.execute(Inspect(lambda engine: engine.bank.baselines(channel_id)))
    except EngineBusy as exc:
        return busy(exc)
    return {"baselines": [baseline_json(b, entry.view.terms) for b in history],
            "in_force": None if entry.view.baseline is None else entry.view.baseline.version}


@router.post("/{channel_id}/baseline", response_model=models.BaselineMade, responses=ACTION_ERRORS,
             summary="Learn a new baseline now from the estimates, or set one (a calibration)")
def set_baseline(channel_id: str, body: BaselineBody, who: Engineer,
                 runtime: ServiceRuntime) -> dict[str, object] | JSONResponse:
    entry = runtime.engine.snapshot.channels.get(channel_id)
    if entry is None:
        return not_found("unknown channel")
    terms = entry.view.terms
    by = actor(who, body)
    note = f"{by}: {body.comment}" if body.comment else by
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
        return busy(exc)
    if made is None:
        return JSONResponse({"detail": "not_identifiable", "message": "the estimates cannot be judged yet"},
                            status_code=409)
    return {"baseline": baseline_json(made, terms)}


@router.post("/{channel_id}/reset", response_model=models.ResetDone, responses=ACTION_ERRORS,
             summary="Start the channel's estimator afresh (commissioning again; history kept)")
def reset(channel_id: str, body: AckBody, who: Engineer, runtime: ServiceRuntime) -> dict[str, object] | JSONResponse:
    if channel_id not in runtime.channels:
        return not_found("unknown channel")
    try:
        runtime.engine.execute(Reset(channel=channel_id, user=actor(who, body), comment=body.comment or ""))
    except EngineBusy as exc:
        return busy(exc)
    return {"reset": channel_id, "by": actor(who, body)}
