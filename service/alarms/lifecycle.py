"""Alarm lifecycle after ANSI/ISA-18.2 (IEC 62682), with an append-only journal.

One alarm per channel and kind (``<channel>:<kind>``, kinds: the detectors'
``noise_level``, ``variance``, ``offset``, ``drift``, and ``stale``). The
detectors (``estimator.detection.detectors``) decide when the *condition* is active,
with deadband and on/off delays applied; this module carries the alarm's
state as the standard describes it:

=============================  ===============================================
state                          meaning
=============================  ===============================================
Normal                         condition clear, nothing to acknowledge
Unacknowledged                 condition active, not yet acknowledged
Acknowledged                   condition active, acknowledged
Return-to-normal unack.        condition cleared before anyone acknowledged
Shelved                        an operator set it aside until an expiry
Suppressed by design           the design holds it back (the channel is still
                               commissioning, or too poorly excited to judge)
Out of service                 taken out by an engineer (maintenance)
=============================  ===============================================

Transitions: Normal -> Unacknowledged when the condition turns active;
Unacknowledged -> Acknowledged by acknowledgement, -> Return-to-normal
unacknowledged when it clears; Acknowledged -> Normal when it clears;
Return-to-normal unacknowledged -> Normal by acknowledgement, ->
Unacknowledged when it returns. Shelving is allowed from any of those four
and ends by unshelving or at its expiry; suppression by design and removal
from service are allowed from any state in service; leaving any of the three
re-evaluates: Unacknowledged if the condition is active, else Normal.
Anything else is refused with :class:`AlarmRefused` naming the state. While
shelved, suppressed or out of service the condition is still followed, so
the alarm comes back in the right state.

Every transition is one :class:`JournalEntry` (time, channel, kind, action,
statistic, limit, baseline version, onset, state before and after, user,
comment); :func:`rerun_journal` runs a journal through the state machine again and
gives back the states it ends in.
"""

from __future__ import annotations

import math
from collections.abc import Callable, Iterable, Mapping
from dataclasses import dataclass, field, replace
from enum import StrEnum

import numpy as np

from service.config.alarm_settings import ALARM_KINDS, AlarmKind

__all__ = ["ALARM_KINDS", "PRIORITIES", "Alarm", "AlarmBook", "AlarmRefused", "AlarmState", "Evidence",
           "JournalAction", "JournalEntry", "rerun_journal"]

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


_IN_SERVICE = frozenset({AlarmState.NORMAL, AlarmState.UNACKNOWLEDGED, AlarmState.ACKNOWLEDGED,
                         AlarmState.RETURNED_UNACKNOWLEDGED})
_SET_ASIDE = frozenset({AlarmState.SHELVED, AlarmState.SUPPRESSED, AlarmState.OUT_OF_SERVICE})
_STATE_INDEX = {state: k for k, state in enumerate(AlarmState)}      # a checkpoint's code for each state


class AlarmRefused(Exception):
    """An operator action the alarm's current state does not allow (or an unknown alarm)."""

    def __init__(self, code: str, message: str) -> None:
        super().__init__(message)
        self.code = code


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
                "evidence": _evidence_dict(self.evidence), "user": self.user, "comment": self.comment,
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
                "shelved_until": self.shelved_until, "since": self.since, "evidence": _evidence_dict(self.evidence)}


def _finite(value: float | None) -> float | None:
    return value if value is not None and math.isfinite(value) else None


def _evidence_dict(evidence: Evidence) -> dict[str, object]:
    return {"statistic": _finite(evidence.statistic), "limit": _finite(evidence.limit),
            "onset": _finite(evidence.onset), "baseline": evidence.baseline, "t": _finite(evidence.t)}


def _none(value: float) -> float | None:
    return None if math.isnan(value) else value


def _returning(alarm: Alarm) -> AlarmState:
    """Where an alarm goes when it leaves shelving, suppression or out-of-service."""
    if alarm.suppressed:
        return AlarmState.SUPPRESSED
    return AlarmState.UNACKNOWLEDGED if alarm.active else AlarmState.NORMAL


class AlarmBook:
    """Every alarm of the plant, the journal, and listeners for each transition.

    Parameters
    ----------
    priorities : mapping channel -> mapping kind -> priority
        One alarm is made per channel and kind listed.
    """

    def __init__(self, priorities: Mapping[str, Mapping[str, str]], journal_limit: int | None = None) -> None:
        self._alarms: dict[str, Alarm] = {}
        self._journal_limit = journal_limit
        self._seq = 0
        for channel, kinds in priorities.items():
            for kind, priority in kinds.items():
                if kind not in ALARM_KINDS:
                    raise ValueError(f"alarm kind must be one of {', '.join(ALARM_KINDS)}, got {kind!r}")
                if priority not in PRIORITIES:
                    raise ValueError(f"priority must be one of {', '.join(PRIORITIES)}, got {priority!r}")
                alarm = Alarm(channel, AlarmKind(kind), priority)
                self._alarms[alarm.id] = alarm
        # A copy of each alarm as of its last transition: readers get these, never the live objects.
        self._views: dict[str, Alarm] = {key: replace(a) for key, a in self._alarms.items()}
        self.journal: list[JournalEntry] = []
        self._listeners: list[Callable[[JournalEntry, Alarm], None]] = []

    # ------------------------------------------------------------------ reads
    def __contains__(self, alarm_id: object) -> bool:
        return alarm_id in self._alarms

    def get(self, alarm_id: str) -> Alarm:
        try:
            return self._alarms[alarm_id]
        except KeyError:
            raise AlarmRefused("unknown_alarm", f"no alarm {alarm_id!r}") from None

    def alarms(self) -> list[Alarm]:
        """Every alarm as of its last transition, in configuration order (copies: do not modify)."""
        return list(self._views.values())

    def entries(self, after: int = 0, limit: int = 100, channel: str | None = None) -> list[JournalEntry]:
        """Journal entries with ``seq > after``, oldest first, at most ``limit`` (a copy)."""
        found = []
        for entry in list(self.journal):
            if entry.seq > after and (channel is None or entry.channel == channel):
                found.append(entry)
                if len(found) >= limit:
                    break
        return found

    def listen(self, listener: Callable[[JournalEntry, Alarm], None]) -> None:
        """Call ``listener(entry, alarm)`` after every transition (on the caller's thread)."""
        self._listeners.append(listener)

    # ------------------------------------------------------------ checkpoints
    def export(self) -> tuple[dict[str, np.ndarray], dict[str, object]]:
        """Every alarm's state as arrays (in book order) and the ids and sequence counter as JSON-able data.

        The journal itself goes to the store.
        """
        alarms = list(self._alarms.values())
        state_index = _STATE_INDEX
        flags = np.array([(state_index[a.state], a.active, a.suppressed) for a in alarms],
                         dtype=np.int8).reshape(len(alarms), 3)
        # Inline None -> NaN: this runs on the engine thread for every alarm at each checkpoint.
        nan = math.nan
        numbers = np.array([(nan if a.shelved_until is None else a.shelved_until, nan if a.since is None else a.since,
                             e.statistic, e.limit, nan if e.onset is None else e.onset,
                             nan if e.baseline is None else e.baseline, nan if e.t is None else e.t)
                            for a in alarms for e in (a.evidence,)], dtype=np.float64).reshape(len(alarms), 7)
        channels = list(dict.fromkeys(a.channel for a in alarms))
        grid = [f"{c}:{k}" for c in channels for k in ALARM_KINDS]
        ids = [a.id for a in alarms]
        # Every channel with every kind, in order (the usual book): the channel list says it all.
        return ({"alarms.flags": flags, "alarms.numbers": numbers},
                {"seq": self._seq, "channels": channels, "ids": None if ids == grid else ids})

    def load(self, arrays: Mapping[str, np.ndarray], meta: Mapping[str, object]) -> None:
        """Take back what :meth:`export` gave (alarms no longer configured are left out)."""
        self._seq = int(meta["seq"])  # type: ignore[call-overload]
        channels: list[str] = list(meta["channels"])  # type: ignore[call-overload]
        explicit = meta.get("ids")
        ids = [f"{c}:{k}" for c in channels for k in ALARM_KINDS] if explicit is None else list(explicit)  # type: ignore
        states = list(AlarmState)
        flags, numbers = arrays["alarms.flags"], arrays["alarms.numbers"]
        for row, alarm_id in enumerate(ids):
            alarm = self._alarms.get(alarm_id)
            if alarm is None:
                continue
            state, active, suppressed = (int(v) for v in flags[row])
            shelved, since, statistic, limit, onset, baseline, t = (float(v) for v in numbers[row])
            alarm.state = states[state]
            alarm.active, alarm.suppressed = bool(active), bool(suppressed)
            alarm.shelved_until, alarm.since = _none(shelved), _none(since)
            alarm.evidence = Evidence(statistic, limit, _none(onset), None if baseline != baseline else int(baseline),
                                      _none(t))
            self._views[alarm.id] = replace(alarm)
        self.journal.clear()

    # -------------------------------------------------------------- conditions
    def condition(self, channel: str, kind: str, active: bool, now: float,
                  evidence: Evidence = Evidence()) -> JournalEntry | None:
        """The detectors say the condition turned active or cleared (journaled also while set aside)."""
        alarm = self._alarms.get(f"{channel}:{kind}")
        if alarm is None or alarm.active == active:
            return None
        alarm.active = active
        # On a clear the onset and baseline of the episode stay; statistic, limit and time are the clear's.
        alarm.evidence = evidence if active else replace(alarm.evidence, statistic=evidence.statistic,
                                                          limit=evidence.limit, t=evidence.t)
        state = alarm.state
        if state in _SET_ASIDE:
            after = state                    # followed, not shown: the state comes back on return
        elif active:
            after = AlarmState.UNACKNOWLEDGED if state != AlarmState.ACKNOWLEDGED else state
        elif state == AlarmState.UNACKNOWLEDGED:
            after = AlarmState.RETURNED_UNACKNOWLEDGED
        elif state == AlarmState.ACKNOWLEDGED:
            after = AlarmState.NORMAL
        else:
            after = state
        return self._move(alarm, after, now, JournalAction.CONDITION_ON if active else JournalAction.CONDITION_OFF)

    def suppress(self, channel: str, kinds: Iterable[str], held: bool, now: float, reason: str) -> list[JournalEntry]:
        """Hold alarms back by design (``held``) or release them; ``reason`` goes to the journal."""
        entries = []
        for kind in kinds:
            alarm = self._alarms.get(f"{channel}:{kind}")
            if alarm is None or alarm.suppressed == held:
                continue
            alarm.suppressed = held
            if held and alarm.state in _IN_SERVICE | {AlarmState.SHELVED}:
                alarm.shelved_until = None
                after = AlarmState.SUPPRESSED
            elif not held and alarm.state == AlarmState.SUPPRESSED:
                after = _returning(alarm)
            else:
                after = alarm.state              # out of service: journaled, it decides the return
            action = JournalAction.SUPPRESS if held else JournalAction.RELEASE
            entries.append(self._move(alarm, after, now, action, comment=reason))
        return entries

    # -------------------------------------------------------- operator actions
    def acknowledge(self, alarm_id: str, user: str, now: float, comment: str = "") -> JournalEntry:
        alarm = self.get(alarm_id)
        if alarm.state == AlarmState.UNACKNOWLEDGED:
            after = AlarmState.ACKNOWLEDGED
        elif alarm.state == AlarmState.RETURNED_UNACKNOWLEDGED:
            after = AlarmState.NORMAL
        else:
            raise AlarmRefused("not_acknowledgeable", f"{alarm_id} is {alarm.state}: nothing to acknowledge")
        return self._move(alarm, after, now, JournalAction.ACKNOWLEDGE, user=user, comment=comment)

    def shelve(self, alarm_id: str, user: str, now: float, until: float, comment: str = "") -> JournalEntry:
        alarm = self.get(alarm_id)
        if alarm.state not in _IN_SERVICE:
            raise AlarmRefused("not_shelvable", f"{alarm_id} is {alarm.state}: only an alarm in service is shelved")
        if not (math.isfinite(until) and until > now):
            raise AlarmRefused("bad_expiry", f"shelving must end after now, got {until}")
        alarm.shelved_until = until
        return self._move(alarm, AlarmState.SHELVED, now, JournalAction.SHELVE, user=user, comment=comment)

    def unshelve(self, alarm_id: str, user: str, now: float, comment: str = "") -> JournalEntry:
        alarm = self.get(alarm_id)
        if alarm.state != AlarmState.SHELVED:
            raise AlarmRefused("not_shelved", f"{alarm_id} is {alarm.state}, not shelved")
        alarm.shelved_until = None
        return self._move(alarm, _returning(alarm), now, JournalAction.UNSHELVE, user=user, comment=comment)

    def expire(self, now: float) -> list[JournalEntry]:
        """End every shelving whose expiry has passed."""
        entries = []
        for alarm in self._alarms.values():
            if alarm.state == AlarmState.SHELVED and alarm.shelved_until is not None and now >= alarm.shelved_until:
                alarm.shelved_until = None
                entries.append(self._move(alarm, _returning(alarm), now, JournalAction.SHELVE_EXPIRED))
        return entries

    def remove(self, alarm_id: str, user: str, now: float, comment: str = "") -> JournalEntry:
        """Take an alarm out of service (maintenance)."""
        alarm = self.get(alarm_id)
        if alarm.state == AlarmState.OUT_OF_SERVICE:
            raise AlarmRefused("already_out_of_service", f"{alarm_id} is already out of service")
        alarm.shelved_until = None
        return self._move(alarm, AlarmState.OUT_OF_SERVICE, now, JournalAction.REMOVE, user=user, comment=comment)

    def restore(self, alarm_id: str, user: str, now: float, comment: str = "") -> JournalEntry:
        """Return an alarm to service."""
        alarm = self.get(alarm_id)
        if alarm.state != AlarmState.OUT_OF_SERVICE:
            raise AlarmRefused("not_out_of_service", f"{alarm_id} is {alarm.state}, not out of service")
        return self._move(alarm, _returning(alarm), now, JournalAction.RESTORE, user=user, comment=comment)

    # ---------------------------------------------------------------- journal
    def _move(self, alarm: Alarm, after: AlarmState, now: float, action: JournalAction, *, user: str | None = None,
              comment: str | None = None, evidence: Evidence | None = None) -> JournalEntry:
        self._seq += 1
        entry = JournalEntry(self._seq, now, alarm.id, alarm.channel, alarm.kind, action,
                             str(alarm.state), str(after), alarm.evidence if evidence is None else evidence,
                             user, comment or None, alarm.shelved_until if after == AlarmState.SHELVED else None)
        alarm.state = after
        alarm.since = now
        self._views[alarm.id] = replace(alarm)
        self.journal.append(entry)
        if self._journal_limit is not None and len(self.journal) > self._journal_limit + self._journal_limit // 10:
            # Memory holds the newest entries; the durable store keeps them all.
            del self.journal[: len(self.journal) - self._journal_limit]
        for listener in self._listeners:
            listener(entry, alarm)
        return entry


def rerun_journal(priorities: Mapping[str, Mapping[str, str]],
                  journal: Iterable[JournalEntry]) -> dict[str, AlarmState]:
    """Run a journal through a fresh book: every entry must give its recorded state; returns the states.

    Raises
    ------
    ValueError
        An entry the state machine does not reproduce (the journal and the rules disagree).
    """
    book = AlarmBook(priorities)
    for entry in journal:
        alarm = book.get(entry.alarm)
        if str(alarm.state) != entry.before:
            raise ValueError(f"journal entry {entry.seq}: {entry.alarm} was {alarm.state}, journal says {entry.before}")
        action = JournalAction(entry.action)
        if action in (JournalAction.CONDITION_ON, JournalAction.CONDITION_OFF):
            made = book.condition(entry.channel, entry.kind, action == JournalAction.CONDITION_ON, entry.time,
                                  entry.evidence)
        elif action in (JournalAction.SUPPRESS, JournalAction.RELEASE):
            made = next(iter(book.suppress(entry.channel, [entry.kind], action == JournalAction.SUPPRESS, entry.time,
                                           entry.comment or "")), None)
        elif action == JournalAction.ACKNOWLEDGE:
            made = book.acknowledge(entry.alarm, entry.user or "", entry.time, entry.comment or "")
        elif action == JournalAction.SHELVE:
            made = book.shelve(entry.alarm, entry.user or "", entry.time, entry.shelved_until or math.inf,
                               entry.comment or "")
        elif action == JournalAction.UNSHELVE:
            made = book.unshelve(entry.alarm, entry.user or "", entry.time, entry.comment or "")
        elif action == JournalAction.SHELVE_EXPIRED:
            made = next((e for e in book.expire(entry.time) if e.alarm == entry.alarm), None)
        elif action == JournalAction.REMOVE:
            made = book.remove(entry.alarm, entry.user or "", entry.time, entry.comment or "")
        elif action == JournalAction.RESTORE:
            made = book.restore(entry.alarm, entry.user or "", entry.time, entry.comment or "")
        else:
            raise ValueError(f"journal entry {entry.seq}: unknown action {action!r}")
        if made is None or made.after != entry.after:
            raise ValueError(f"journal entry {entry.seq}: a rerun gives {made and made.after}, "
                             f"journal says {entry.after}")
    return {a.id: a.state for a in book.alarms()}
