"""What each route answers, as pydantic models: the OpenAPI document's response schemas.

A SCADA integrator generates a client from ``/openapi.json``; these models give it a schema for every 2xx
and every error. The handlers build the same shapes (several as ready-made JSON bytes, for speed), and the
schema fuzz test (``tests/unit/test_api_schema.py``) checks every response body against these schemas, so a
field added to a handler and not here, or the other way round, fails it. Every number that may be unknown
is ``null`` (never NaN).
"""

from __future__ import annotations

from typing import Any, Literal

from pydantic import BaseModel, ConfigDict, Field

from service.engine.quality import Quality, QualityReason

__all__ = ["RESPONSES_BAD_REQUEST", "RESPONSES_BUSY", "RESPONSES_CONFLICT", "RESPONSES_NOT_FOUND", "AlarmAction",
           "AlarmList", "AlarmState", "BaselineMade", "BaselineState", "Baselines", "ChannelDetail",
           "ChannelListEntry", "ErrorBody", "Health", "History", "Journal", "JournalEntryState", "Queued",
           "Readiness", "ResetDone", "SnapshotDocument", "errors"]



class _Model(BaseModel):
    model_config = ConfigDict(extra="forbid")


# ------------------------------------------------------------------ errors
class FieldProblem(_Model):
    field: str
    problem: str


class ErrorBody(_Model):
    """Every error: a short stable ``detail``; a 422 lists each field's problem; some add a ``message``."""

    detail: str
    message: str | None = None
    errors: list[FieldProblem] | None = None
    replica: int | None = None


def errors(*codes: int) -> dict[int | str, dict[str, Any]]:
    """The ``responses=`` entry documenting error statuses with :class:`ErrorBody` (422 included: this
    replaces FastAPI's default validation-error schema, which is not the shape this service answers with).
    Where a token is checked (401), 429 too: a client address that presented too many wrong tokens waits."""
    documented: dict[int | str, dict[str, Any]] = {code: {"model": ErrorBody} for code in codes}
    if 401 in codes:
        documented[429] = {"model": ErrorBody, "description": "too many invalid tokens from this address: wait "
                                                              "the seconds the Retry-After header says"}
    return documented


RESPONSES_NOT_FOUND = errors(404)
RESPONSES_BAD_REQUEST = errors(400, 413)
RESPONSES_BUSY = errors(503)
RESPONSES_CONFLICT = errors(409)


# ------------------------------------------------------------------ alarms
class Evidence(_Model):
    statistic: float | None
    limit: float | None
    onset: float | None
    baseline: int | None
    t: float | None


class AlarmState(_Model):
    """One alarm as it now stands (ISA-18.2 state, priority, evidence)."""

    id: str
    channel: str
    kind: str
    priority: str
    state: str
    active: bool
    suppressed: bool
    shelved_until: float | None
    since: float | None
    evidence: Evidence


class JournalEntryState(_Model):
    """One transition of the append-only alarm journal."""

    seq: int
    time: float
    alarm: str
    channel: str
    kind: str
    action: str
    before: str
    after: str
    evidence: Evidence
    user: str | None
    comment: str | None
    shelved_until: float | None


class AlarmList(_Model):
    total: int
    offset: int
    alarms: list[AlarmState]


class Journal(_Model):
    entries: list[JournalEntryState]
    next: int


class AlarmAction(_Model):
    """An operator action's outcome: its journal entry and the alarm after it."""

    entry: JournalEntryState
    alarm: AlarmState


# ------------------------------------------------------------------ channels
class RaisedAlarm(_Model):
    kind: str
    state: str
    priority: str


class AlarmSummary(_Model):
    raised: list[RaisedAlarm]
    unacknowledged: int
    highest_active: str | None


class Commissioning(_Model):
    done: int
    needed: int


class _ChannelAtAGlance(_Model):
    """What every view of a channel starts with: its quality, when it last moved, its counts."""

    quality: Quality
    quality_reason: QualityReason
    updated_at: float | None       # wall clock of the last applied sample
    t: float | None                # that sample's own time
    samples: int
    rejected: int


class ChannelListEntry(_ChannelAtAGlance):
    id: str
    alarms: AlarmSummary
    commissioning: Commissioning | None


class DetectorState(_Model):
    statistic: float | None
    limit: float | None
    active: bool


class BaselineState(_Model):
    version: int
    source: str
    parameters: dict[str, float | None]
    std_errors: dict[str, float | None]
    noise_sigma: float | None
    t: float | None
    samples: int
    note: str | None


class ChannelDetail(_ChannelAtAGlance):
    """One channel's full state (the fields of ``rwls replay --json`` plus identity, quality and alarms)."""

    id: str
    terms: list[str]
    parameters: dict[str, float | None]
    std_errors: dict[str, float | None]
    intervals_95: dict[str, list[float | None] | None]
    covariance: list[list[float | None]] | None
    residual_sd: float | None
    residual_sd_scale: Literal["y", "weighted"]
    noise_sigma: float | None
    rejections: dict[str, int]
    warmup: int
    forgetting_factor: float
    weighting: str
    covariance_scale: str
    effective_count: float | None
    min_information: float | None
    information_condition: float | None
    commissioned: int
    baseline: BaselineState | None
    detectors: dict[str, DetectorState]
    alarms: list[AlarmState]


class HistoryRow(_Model):
    t: float
    parameters: list[float | None]
    std_errors: list[float | None]
    noise_sigma: float | None
    residual_sd: float | None
    quality: Quality
    samples: int
    detectors: dict[str, float | None]
    limits: dict[str, float | None]
    residual: float | None = None
    residual_spread: float | None = None


class History(_Model):
    channel: str
    terms: list[str]
    step: float
    rows: list[HistoryRow]


class SnapshotChannel(_ChannelAtAGlance):
    parameters: dict[str, float | None]
    std_errors: dict[str, float | None]
    noise_sigma: float | None
    residual_sd: float | None


class UnreachableChannel(_Model):
    """A channel of a fleet replica that did not answer: Bad, ``replica_unreachable``, and which replica."""

    quality: Quality
    quality_reason: QualityReason
    replica: int


class ReplicaState(_Model):
    index: int
    reachable: bool
    version: int | None


class SnapshotDocument(_Model):
    """Every channel, flat, for SCADA polling (a fleet's adds its replicas and has no version of its own)."""

    version: int | None = None
    created_at: float | None
    channels: dict[str, SnapshotChannel | UnreachableChannel]
    replicas: list[ReplicaState] | None = None


class Baselines(_Model):
    baselines: list[BaselineState]
    in_force: int | None


class BaselineMade(_Model):
    baseline: BaselineState


class ResetDone(_Model):
    reset: str
    by: str


# ------------------------------------------------------------------ ingest and health
class RefusedSample(_Model):
    index: int | None
    reason: str


class Queued(_Model):
    queued: int
    rejected: list[RefusedSample]


class Health(_Model):
    status: Literal["ok"]


class BrokerState(_Model):
    connected: bool
    subscribed: bool
    thread_alive: bool
    protocol: str
    reconnects: int


class TokenExpiry(_Model):
    name: str
    expires: str = Field(description="ISO 8601, UTC")
    expired: bool


class HostFaultState(_Model):
    part: str = Field(description="input_log (ingest held: MQTT not acknowledged, HTTP ingest answers 503) or "
                      "store (checkpoints and history wait; the input log keeps every input)")
    reason: str = Field(description="the last error")
    since: float = Field(description="when the fault began, epoch seconds")
    attempts: int = Field(description="failed tries so far")
    retry_in_seconds: float = Field(description="pause before the next try (doubles per failure, capped)")


class Readiness(_Model):
    ready: bool
    faults: list[HostFaultState] = Field(description="faults of the host in force: not ready while any is")
    engine_alive: bool
    queue_depth: int
    queue_capacity: int
    broker: BrokerState | None
    snapshot_age_seconds: float | None
    checkpoint_age_seconds: float | None
    input_log_position: int
    tokens_expiring: list[TokenExpiry] = Field(
        default_factory=list, description="tokens that end within auth.expiry_warning_days, or have ended")
    warnings: list[str] = Field(default_factory=list, description="settings that leave the service exposed")
