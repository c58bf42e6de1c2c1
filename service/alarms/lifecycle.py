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

An alarm is a row of columns (:mod:`service.alarms.alarm_table`) and the journal holds a bulk design
suppression as one run (:mod:`service.alarms.journal`): a plant of 100,000 channels has 500,000 alarms, and a
fresh start suppresses 400,000 of them.
"""

from __future__ import annotations

import math
from collections.abc import Callable, Iterable, Mapping, Sequence

import numpy as np

from service.alarms.alarm_table import (
    ACTIVE,
    BASELINE,
    EVIDENCE,
    LIMIT,
    ONSET,
    SHELVED_UNTIL,
    SINCE,
    STATE,
    STATE_CODE,
    STATES,
    STATISTIC,
    SUPPRESSED,
    AlarmColumns,
    AlarmLayout,
    AlarmTable,
    T,
    evidence_of,
    optional,
)
from service.alarms.alarm_types import PRIORITIES, Alarm, AlarmState, Evidence, JournalAction, JournalEntry
from service.alarms.journal import Journal, SuppressionRun
from service.config.alarm_settings import ALARM_KINDS

__all__ = ["ALARM_KINDS", "PRIORITIES", "Alarm", "AlarmBook", "AlarmRefused", "AlarmState", "AlarmTable",
           "Evidence", "JournalAction", "JournalEntry", "Listener", "rerun_journal"]

# Called after every transition with its entry and the alarm's state after it (on the book's thread).
Listener = Callable[[JournalEntry, Alarm], None]

_IN_SERVICE = frozenset({AlarmState.NORMAL, AlarmState.UNACKNOWLEDGED, AlarmState.ACKNOWLEDGED,
                         AlarmState.RETURNED_UNACKNOWLEDGED})
_SET_ASIDE = frozenset({AlarmState.SHELVED, AlarmState.SUPPRESSED, AlarmState.OUT_OF_SERVICE})
_NO_EVIDENCE = Evidence()
_SUPPRESSIBLE = np.array(sorted(STATE_CODE[s] for s in _IN_SERVICE | {AlarmState.SHELVED}), dtype=np.int8)


class AlarmRefused(Exception):
    """An operator action the alarm's current state does not allow (or an unknown alarm)."""

    def __init__(self, code: str, message: str) -> None:
        super().__init__(message)
        self.code = code


class AlarmBook:
    """Every alarm of the plant, the journal, and listeners for each transition.

    Parameters
    ----------
    priorities : mapping channel -> mapping kind -> priority
        One alarm is made per channel and kind listed (channels alike may share one mapping object).
    journal_limit : entries the journal keeps in memory (None: all)
    """

    def __init__(self, priorities: Mapping[str, Mapping[str, str]], journal_limit: int | None = None) -> None:
        self.layout = AlarmLayout(priorities)
        self._columns = AlarmColumns(self.layout.size)
        self._seq = 0
        self.journal = Journal(journal_limit)
        self._listeners: list[tuple[Listener, Callable[[], bool] | None]] = []

    # ------------------------------------------------------------------ reads
    def __contains__(self, alarm_id: object) -> bool:
        return isinstance(alarm_id, str) and self.layout.row_of(alarm_id) is not None

    def _row(self, alarm_id: str) -> int:
        row = self.layout.row_of(alarm_id)
        if row is None:
            raise AlarmRefused("unknown_alarm", f"no alarm {alarm_id!r}")
        return row

    def get(self, alarm_id: str) -> Alarm:
        """One alarm's state now (a copy)."""
        return self._columns.alarm(self.layout, self._row(alarm_id))

    def alarms(self) -> AlarmTable:
        """Every alarm as of now, in configuration order: a frozen copy, each alarm made as it is read."""
        return self._columns.freeze(self.layout)

    def entries(self, after: int = 0, limit: int = 100, channel: str | None = None) -> list[JournalEntry]:
        """Journal entries with ``seq > after``, oldest first, at most ``limit`` (a copy)."""
        return self.journal.entries(after, limit, channel)

    def listen(self, listener: Listener, *, wants: Callable[[], bool] | None = None) -> None:
        """Call ``listener(entry, alarm)`` after every transition (on the caller's thread); with ``wants``, only
        while it says True (a listener with nobody to tell is skipped before anything is made for it)."""
        self._listeners.append((listener, wants))

    # ------------------------------------------------------------ checkpoints
    def export(self) -> tuple[dict[str, np.ndarray], dict[str, object]]:
        """Every alarm's state as arrays (in book order) and the ids and sequence counter as JSON-able data.

        ``alarms.flags`` (alarms, 3) int8: state code, active, suppressed; ``alarms.numbers`` (alarms, 7):
        shelving end, time of the last transition, statistic, limit, onset, baseline, t (NaN for None).
        The journal itself goes to the store.
        """
        flags, numbers = self._columns.stacked()
        layout = self.layout
        ids = None if layout.is_grid else [layout.alarm_id(row) for row in range(layout.size)]
        return ({"alarms.flags": flags, "alarms.numbers": numbers},
                {"seq": self._seq, "channels": list(layout.channels), "ids": ids})

    def load(self, arrays: Mapping[str, np.ndarray], meta: Mapping[str, object]) -> None:
        """Take back what :meth:`export` gave (alarms no longer configured are left out)."""
        self._seq = int(meta["seq"])  # type: ignore[call-overload]
        channels: list[str] = list(meta["channels"])  # type: ignore[call-overload]
        flags = np.asarray(arrays["alarms.flags"], dtype=np.int8)
        numbers = np.asarray(arrays["alarms.numbers"], dtype=np.float64)
        self.journal.clear()
        explicit = meta.get("ids")
        if explicit is None and self.layout.is_grid:
            # Every channel with every kind, here and there: rows found a channel at a time, not an id at a time.
            width = len(ALARM_KINDS)
            positions = [(saved, self.layout.position(channel)) for saved, channel in enumerate(channels)]
            pairs = np.array([(saved, at) for saved, at in positions if at is not None], dtype=np.int64).reshape(-1, 2)
            kinds = np.arange(width, dtype=np.int64)
            saved_rows = (pairs[:, :1] * width + kinds).reshape(-1)
            rows = (pairs[:, 1:] * width + kinds).reshape(-1)
            if rows.shape[0]:
                self._columns.scatter(rows, flags[saved_rows], numbers[saved_rows])
            return
        ids = [f"{c}:{k}" for c in channels for k in ALARM_KINDS] if explicit is None else list(explicit)  # type: ignore
        found = [(saved, row) for saved, alarm_id in enumerate(ids)
                 if (row := self.layout.row_of(alarm_id)) is not None]
        if found:
            saved, rows = (np.array(side, dtype=np.int64) for side in zip(*found, strict=True))
            self._columns.scatter(rows, flags[saved], numbers[saved])

    # -------------------------------------------------------------- conditions
    def condition(self, channel: str, kind: str, active: bool, now: float,
                  evidence: Evidence = _NO_EVIDENCE) -> JournalEntry | None:
        """The detectors say the condition turned active or cleared (journaled also while set aside)."""
        row = self.layout.row(channel, kind)
        if row is None:
            return None
        code, was_active, _ = self._columns.flags(row)
        if bool(was_active) == active:
            return None
        self._columns.set_flag(row, ACTIVE, int(active))
        # On a clear the onset and baseline of the episode stay; statistic, limit and time are the clear's.
        changed: dict[int, float | None] = {STATISTIC: evidence.statistic, LIMIT: evidence.limit, T: evidence.t}
        if active:
            changed.update({ONSET: evidence.onset, BASELINE: evidence.baseline})
        self._columns.set_numbers(row, changed)
        state = STATES[code]
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
        return self._move(row, after, now, JournalAction.CONDITION_ON if active else JournalAction.CONDITION_OFF)

    def suppress(self, channel: str, kinds: Iterable[str], held: bool, now: float, reason: str) -> list[JournalEntry]:
        """Hold alarms back by design (``held``) or release them; ``reason`` goes to the journal."""
        entries = []
        for kind in kinds:
            row = self.layout.row(channel, kind)
            if row is None:
                continue
            code, active, suppressed = self._columns.flags(row)
            if bool(suppressed) == held:
                continue
            self._columns.set_flag(row, SUPPRESSED, int(held))
            state = STATES[code]
            if held and state in _IN_SERVICE | {AlarmState.SHELVED}:
                self._columns.set_numbers(row, {SHELVED_UNTIL: None})
                after = AlarmState.SUPPRESSED
            elif not held and state == AlarmState.SUPPRESSED:
                after = _returning(False, bool(active))
            else:
                after = state                # out of service: journaled, it decides the return
            action = JournalAction.SUPPRESS if held else JournalAction.RELEASE
            entries.append(self._move(row, after, now, action, comment=reason))
        return entries

    def suppress_many(self, channels: Sequence[str], kinds: Sequence[str], now: float, reason: str) -> int:
        """:meth:`suppress` (held) of ``kinds`` of every channel in turn, in bulk: the same states, and the same
        journal entries in the same order, kept as one run. Returns the number of transitions."""
        rows = self.layout.rows_of(channels, kinds)
        flags, numbers = self._columns.gather(rows)
        chosen = flags[:, SUPPRESSED] == 0
        rows, flags, numbers = rows[chosen], flags[chosen], numbers[chosen]
        if not rows.shape[0]:
            return 0
        before = flags[:, STATE].copy()
        suppressible = np.isin(before, _SUPPRESSIBLE)
        after = np.where(suppressible, STATE_CODE[AlarmState.SUPPRESSED], before).astype(np.int8)
        evidence = numbers[:, EVIDENCE].copy()
        flags[:, STATE] = after
        flags[:, SUPPRESSED] = 1
        numbers[suppressible, SHELVED_UNTIL] = np.nan
        numbers[:, SINCE] = now
        self._columns.scatter(rows, flags, numbers)
        run = SuppressionRun(self.layout, self._seq + 1, now, reason or None, rows, before, after,
                             None if np.isnan(evidence).all() else evidence)
        self._seq = run.last_seq
        self.journal.add_run(run)
        listening = [listener for listener, wants in self._listeners if wants is None or wants()]
        for i in range(len(run)) if listening else ():
            entry, alarm = run.entry(i), self._columns.alarm(self.layout, int(rows[i]))
            for listener in listening:
                listener(entry, alarm)
        return len(run)

    # -------------------------------------------------------- operator actions
    def acknowledge(self, alarm_id: str, user: str, now: float, comment: str = "") -> JournalEntry:
        row = self._row(alarm_id)
        state = STATES[self._columns.flags(row)[STATE]]
        if state == AlarmState.UNACKNOWLEDGED:
            after = AlarmState.ACKNOWLEDGED
        elif state == AlarmState.RETURNED_UNACKNOWLEDGED:
            after = AlarmState.NORMAL
        else:
            raise AlarmRefused("not_acknowledgeable", f"{alarm_id} is {state}: nothing to acknowledge")
        return self._move(row, after, now, JournalAction.ACKNOWLEDGE, user=user, comment=comment)

    def shelve(self, alarm_id: str, user: str, now: float, until: float, comment: str = "") -> JournalEntry:
        row = self._row(alarm_id)
        state = STATES[self._columns.flags(row)[STATE]]
        if state not in _IN_SERVICE:
            raise AlarmRefused("not_shelvable", f"{alarm_id} is {state}: only an alarm in service is shelved")
        if not (math.isfinite(until) and until > now):
            raise AlarmRefused("bad_expiry", f"shelving must end after now, got {until}")
        self._columns.set_numbers(row, {SHELVED_UNTIL: until})
        return self._move(row, AlarmState.SHELVED, now, JournalAction.SHELVE, user=user, comment=comment)

    def unshelve(self, alarm_id: str, user: str, now: float, comment: str = "") -> JournalEntry:
        row = self._row(alarm_id)
        code, active, suppressed = self._columns.flags(row)
        if STATES[code] != AlarmState.SHELVED:
            raise AlarmRefused("not_shelved", f"{alarm_id} is {STATES[code]}, not shelved")
        self._columns.set_numbers(row, {SHELVED_UNTIL: None})
        return self._move(row, _returning(bool(suppressed), bool(active)), now, JournalAction.UNSHELVE, user=user,
                          comment=comment)

    def expire(self, now: float) -> list[JournalEntry]:
        """End every shelving whose expiry has passed."""
        entries = []
        for row in self._columns.shelved_until(now).tolist():
            _, active, suppressed = self._columns.flags(row)
            self._columns.set_numbers(row, {SHELVED_UNTIL: None})
            entries.append(self._move(row, _returning(bool(suppressed), bool(active)), now,
                                      JournalAction.SHELVE_EXPIRED))
        return entries

    def remove(self, alarm_id: str, user: str, now: float, comment: str = "") -> JournalEntry:
        """Take an alarm out of service (maintenance)."""
        row = self._row(alarm_id)
        if STATES[self._columns.flags(row)[STATE]] == AlarmState.OUT_OF_SERVICE:
            raise AlarmRefused("already_out_of_service", f"{alarm_id} is already out of service")
        self._columns.set_numbers(row, {SHELVED_UNTIL: None})
        return self._move(row, AlarmState.OUT_OF_SERVICE, now, JournalAction.REMOVE, user=user, comment=comment)

    def restore(self, alarm_id: str, user: str, now: float, comment: str = "") -> JournalEntry:
        """Return an alarm to service."""
        row = self._row(alarm_id)
        code, active, suppressed = self._columns.flags(row)
        if STATES[code] != AlarmState.OUT_OF_SERVICE:
            raise AlarmRefused("not_out_of_service", f"{alarm_id} is {STATES[code]}, not out of service")
        return self._move(row, _returning(bool(suppressed), bool(active)), now, JournalAction.RESTORE, user=user,
                          comment=comment)

    # ---------------------------------------------------------------- journal
    def _move(self, row: int, after: AlarmState, now: float, action: JournalAction, *, user: str | None = None,
              comment: str | None = None) -> JournalEntry:
        self._seq += 1
        channel, kind, _ = self.layout.names(row)
        numbers = self._columns.numbers(row)
        before = STATES[self._columns.flags(row)[STATE]]
        entry = JournalEntry(self._seq, now, f"{channel}:{kind}", channel, kind, action, str(before), str(after),
                             evidence_of(numbers), user, comment or None,
                             optional(numbers[SHELVED_UNTIL]) if after == AlarmState.SHELVED else None)
        self._columns.set_flag(row, STATE, STATE_CODE[after])
        self._columns.set_numbers(row, {SINCE: now})
        self.journal.append(entry)
        listening = [listener for listener, wants in self._listeners if wants is None or wants()]
        if listening:
            alarm = self._columns.alarm(self.layout, row)
            for listener in listening:
                listener(entry, alarm)
        return entry


def _returning(suppressed: bool, active: bool) -> AlarmState:
    """Where an alarm goes when it leaves shelving, suppression or out-of-service."""
    if suppressed:
        return AlarmState.SUPPRESSED
    return AlarmState.UNACKNOWLEDGED if active else AlarmState.NORMAL


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
