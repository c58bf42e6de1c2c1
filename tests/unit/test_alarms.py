"""Alarm lifecycle (ANSI/ISA-18.2 states) as a hypothesis state machine, the journal, and its rerun."""

from __future__ import annotations

import math

import pytest
from hypothesis import settings
from hypothesis import strategies as st
from hypothesis.stateful import RuleBasedStateMachine, invariant, rule

from service.alarms.lifecycle import AlarmBook, AlarmRefused, AlarmState, Evidence, rerun_journal

N, U, A, R = (AlarmState.NORMAL, AlarmState.UNACKNOWLEDGED, AlarmState.ACKNOWLEDGED,
              AlarmState.RETURNED_UNACKNOWLEDGED)
SH, SU, OOS = AlarmState.SHELVED, AlarmState.SUPPRESSED, AlarmState.OUT_OF_SERVICE
PRIORITIES = {"flow": {"drift": "high", "offset": "medium"}}

# The transitions the alarm state transition diagram of ANSI/ISA-18.2-2016 allows (from memory: the figure
# and clause numbers are not checked here): (state, event) -> state. "back" is where a set-aside alarm
# returns, in our reading of that diagram: Suppressed when design suppression holds, else Unacknowledged
# while the condition is active, else Normal.
ALLOWED = {
    (N, "on"): U, (R, "on"): U, (U, "off"): R, (A, "off"): N,
    (U, "ack"): A, (R, "ack"): N,
    **{(s, "shelve"): SH for s in (N, U, A, R)},
    (SH, "unshelve"): "back", (SH, "expire"): "back",
    **{(s, "suppress"): SU for s in (N, U, A, R, SH)}, (SU, "release"): "back",
    **{(s, "remove"): OOS for s in (N, U, A, R, SH, SU)}, (OOS, "restore"): "back",
}


class Lifecycle(RuleBasedStateMachine):
    def __init__(self) -> None:
        super().__init__()
        self.book = AlarmBook(PRIORITIES)
        self.now = 0.0
        self.state, self.active, self.held = N, False, False

    def _tick(self) -> float:
        self.now += 1.0
        return self.now

    def _expect(self, event: str) -> AlarmState | None:
        target = ALLOWED.get((self.state, event))
        if target == "back":
            return SU if self.held and event != "release" else (U if self.active else N)
        return target

    @rule(active=st.booleans())
    def condition(self, active: bool) -> None:
        changed = active != self.active
        self.active = active
        self.book.condition("flow", "drift", active, self._tick(), Evidence(3.0 if active else 0.5, 1.0))
        if changed:
            expected = self._expect("on" if active else "off")
            if expected is not None:
                self.state = expected

    @rule(event=st.sampled_from(["ack", "shelve", "unshelve", "remove", "restore"]))
    def operator(self, event: str) -> None:
        expected = self._expect(event)
        now = self._tick()
        act = {"ack": lambda: self.book.acknowledge("flow:drift", "ana", now, "seen"),
               "shelve": lambda: self.book.shelve("flow:drift", "ana", now, now + 5.0, "calibrating"),
               "unshelve": lambda: self.book.unshelve("flow:drift", "ana", now),
               "remove": lambda: self.book.remove("flow:drift", "ben", now, "sensor swap"),
               "restore": lambda: self.book.restore("flow:drift", "ben", now)}[event]
        if expected is None:
            before = len(self.book.journal)
            with pytest.raises(AlarmRefused):
                act()
            assert len(self.book.journal) == before             # a refusal changes nothing
        else:
            entry = act()
            assert (entry.user, entry.after) == ("ana" if event in ("ack", "shelve", "unshelve") else "ben",
                                                 str(expected))
            self.state = expected

    @rule(held=st.booleans())
    def design(self, held: bool) -> None:
        if held != self.held:
            expected = self._expect("suppress" if held else "release")
            self.held = held
            self.book.suppress("flow", ["drift"], held, self._tick(), "commissioning")
            if expected is not None:
                self.state = expected

    @rule()
    def wait_for_expiry(self) -> None:
        self.now += 10.0
        expected = self._expect("expire")
        self.book.expire(self.now)
        if expected is not None:
            self.state = expected

    @invariant()
    def book_agrees_and_journal_replays(self) -> None:
        assert self.book.get("flow:drift").state == self.state
        assert self.book.get("flow:offset").state == N           # untouched alarms stay put
        assert rerun_journal(PRIORITIES, self.book.journal) == {a.id: a.state for a in self.book.alarms()}
        seqs = [e.seq for e in self.book.journal]
        assert seqs == list(range(1, len(seqs) + 1))


TestLifecycle = Lifecycle.TestCase
TestLifecycle.settings = settings(max_examples=300, stateful_step_count=40, deadline=None, derandomize=True,
                                  database=None)


def test_a_journal_entry_carries_its_evidence_user_and_comment() -> None:
    book = AlarmBook(PRIORITIES)
    on = book.condition("flow", "drift", True, 10.0, Evidence(42.0, 27.6, onset=7.0, baseline=2, t=9.5))
    assert on is not None and (on.before, on.after, on.action) == ("Normal", "Unacknowledged", "condition_on")
    assert (on.evidence.statistic, on.evidence.limit, on.evidence.onset, on.evidence.baseline) == (42.0, 27.6, 7.0, 2)
    ack = book.acknowledge("flow:drift", "ana", 11.0, "maintenance called")
    assert (ack.user, ack.comment, ack.after) == ("ana", "maintenance called", "Acknowledged")
    off = book.condition("flow", "drift", False, 20.0, Evidence(3.0, 27.6, t=19.0))
    assert off is not None and off.after == "Normal" and off.evidence.onset == 7.0    # the episode's onset stays
    assert [e.seq for e in book.journal] == [1, 2, 3]


def test_refusals_name_the_state_and_unknown_alarms_are_refused() -> None:
    book = AlarmBook(PRIORITIES)
    with pytest.raises(AlarmRefused, match="Normal: nothing to acknowledge"):
        book.acknowledge("flow:drift", "ana", 1.0)
    with pytest.raises(AlarmRefused, match="no alarm"):
        book.acknowledge("flow:colour", "ana", 1.0)
    with pytest.raises(AlarmRefused, match="end after now"):
        book.shelve("flow:drift", "ana", 5.0, 4.0)
    with pytest.raises(AlarmRefused, match="end after now"):
        book.shelve("flow:drift", "ana", 5.0, math.inf)


def test_listeners_hear_every_transition_in_order() -> None:
    book = AlarmBook(PRIORITIES)
    heard: list[str] = []
    book.listen(lambda entry, alarm: heard.append(f"{alarm.id} {entry.after}"))
    book.condition("flow", "offset", True, 1.0)
    book.shelve("flow:offset", "ana", 2.0, 10.0)
    book.expire(11.0)
    assert heard == ["flow:offset Unacknowledged", "flow:offset Shelved", "flow:offset Unacknowledged"]
