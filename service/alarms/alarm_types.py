"""What an alarm is and what the journal records: states, actions, evidence, journal entries, an alarm's state.

Plain values, shared by the alarm book (:mod:`service.alarms.lifecycle`), its columns
(:mod:`service.alarms.alarm_table`) and its journal (:mod:`service.alarms.journal`).
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field
from enum import StrEnum

from service.config.alarm_settings import AlarmKind

__all__ = ["PRIORITIES", "Alarm", "AlarmState", "Evidence", "JournalAction", "JournalEntry", "evidence_dict"]

PRIORITIES = ("low", "medium", "high", "urgent")


class AlarmState(StrEnum):
    NORMAL = "Normal"
    UNACKNOWLEDGED = "Unacknowledged"
    ACKNOWLEDGED = "Acknowledged"
    RETURNED_UNACKNOWLEDGED = "Return-to-normal unacknowledged"
    SHELVED = "Shelved"
    SUPPRESSED = "Suppressed by design"
    OUT_OF_SERVICE = "Out of service"


class JournalAction(StrEnum):
    """What a journal entry records: the condition, design suppression, or an operator's action."""

    CONDITION_ON = "condition_on"
    CONDITION_OFF = "condition_off"
    SUPPRESS = "suppress"
    RELEASE = "release"
    ACKNOWLEDGE = "acknowledge"
    SHELVE = "shelve"
    UNSHELVE = "unshelve"
    SHELVE_EXPIRED = "shelve_expired"
    REMOVE = "remove"
    RESTORE = "restore"

    @property
    def words(self) -> str:
        """The action as a person reads it (reports)."""
        return _ACTION_WORDS[self]


_ACTION_WORDS = {
    JournalAction.CONDITION_ON: "condition raised", JournalAction.CONDITION_OFF: "condition cleared",
    JournalAction.SUPPRESS: "suppressed by design", JournalAction.RELEASE: "released from suppression",
    JournalAction.ACKNOWLEDGE: "acknowledged", JournalAction.SHELVE: "shelved", JournalAction.UNSHELVE: "unshelved",
    JournalAction.SHELVE_EXPIRED: "shelving expired", JournalAction.REMOVE: "removed from service",
    JournalAction.RESTORE: "returned to service"}


@dataclass(frozen=True)
class Evidence:
    """Why a condition is what it is: the statistic, its limit, the baseline and the estimated onset."""

    statistic: float = math.nan
    limit: float = math.nan
    onset: float | None = None
    baseline: int | None = None        # baseline version in force
    t: float | None = None             # sample time of the judgement


@dataclass(frozen=True)
class JournalEntry:
    """One transition of one alarm (the journal only ever grows)."""

    seq: int
    time: float                        # wall-clock (or, offline, sample) time it was made
    alarm: str
    channel: str
    kind: AlarmKind
    action: JournalAction
    before: str
    after: str
    evidence: Evidence = Evidence()
    user: str | None = None
    comment: str | None = None
    shelved_until: float | None = None

    def to_dict(self) -> dict[str, object]:
        """JSON-ready (non-finite numbers as None)."""
        return {"seq": self.seq, "time": self.time, "alarm": self.alarm, "channel": self.channel, "kind": self.kind,
                "action": self.action, "before": self.before, "after": self.after,
                "evidence": evidence_dict(self.evidence), "user": self.user, "comment": self.comment,
                "shelved_until": self.shelved_until}


@dataclass
class Alarm:
    """The state of one alarm."""

    channel: str
    kind: AlarmKind
    priority: str
    state: AlarmState = AlarmState.NORMAL
    active: bool = False               # the condition, followed also while set aside
    suppressed: bool = False           # held back by design
    shelved_until: float | None = None
    evidence: Evidence = field(default_factory=Evidence)
    since: float | None = None         # time of the last transition

    @property
    def id(self) -> str:
        return f"{self.channel}:{self.kind}"

    def to_dict(self) -> dict[str, object]:
        """JSON-ready (non-finite numbers as None)."""
        return {"id": self.id, "channel": self.channel, "kind": self.kind, "priority": self.priority,
                "state": str(self.state), "active": self.active, "suppressed": self.suppressed,
                "shelved_until": self.shelved_until, "since": self.since, "evidence": evidence_dict(self.evidence)}


def _finite(value: float | None) -> float | None:
    return value if value is not None and math.isfinite(value) else None


def evidence_dict(evidence: Evidence) -> dict[str, object]:
    """The evidence as JSON-ready numbers (non-finite ones as None)."""
    return {"statistic": _finite(evidence.statistic), "limit": _finite(evidence.limit),
            "onset": _finite(evidence.onset), "baseline": evidence.baseline, "t": _finite(evidence.t)}
