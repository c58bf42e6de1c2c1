"""The alarm book at scale: alarms as rows of columns, readers' frozen copies, bulk design suppression, the journal's
runs; each held to what the book does one alarm at a time."""

from __future__ import annotations

import json

import numpy as np
import pytest

from service.alarms.alarm_table import BLOCK
from service.alarms.lifecycle import AlarmBook, AlarmState, Evidence, JournalEntry, rerun_journal
from service.alarms.notify import state_payloads
from service.config.alarm_settings import ALARM_KINDS, DETECTOR_KINDS

EVERY_KIND = dict.fromkeys(ALARM_KINDS, "low")


def _book(channels: int, journal_limit: int | None = None) -> AlarmBook:
    return AlarmBook({f"c{k}": EVERY_KIND for k in range(channels)}, journal_limit=journal_limit)


def _stir(book: AlarmBook) -> None:
    """Alarms in every state the suppression treats apart: active, shelved, out of service, already held."""
    book.condition("c0", "offset", True, 1.0, Evidence(9.0, 8.0, onset=0.5, baseline=1, t=1.0))
    book.shelve("c1:variance", "ana", 2.0, 50.0)
    book.remove("c2:drift", "ben", 3.0)
    book.suppress("c3", ["noise_level"], True, 4.0, "by hand")
    book.condition("c4", "drift", True, 5.0, Evidence(3.0, 2.0))
    book.acknowledge("c4:drift", "ana", 6.0)


def _entries(book: AlarmBook) -> list[dict[str, object]]:
    return [e.to_dict() for e in book.journal]


def test_bulk_suppression_gives_the_states_and_journal_of_suppressing_channel_by_channel() -> None:
    held = ["c4", "c0", "nobody", "c1", "c2", "c3"]          # not in book order; one unknown channel
    one_by_one, bulk = _book(6), _book(6)
    for book in (one_by_one, bulk):
        _stir(book)
    for channel in held:
        one_by_one.suppress(channel, DETECTOR_KINDS, True, 10.0, "commissioning")
    made = bulk.suppress_many(held, DETECTOR_KINDS, 10.0, "commissioning")
    assert made == len(_entries(one_by_one)) - 6 > 0
    assert _entries(bulk) == _entries(one_by_one)
    expected, got = one_by_one.export(), bulk.export()
    assert got[1] == expected[1]
    for name, array in expected[0].items():
        np.testing.assert_array_equal(got[0][name], array)       # NaN where NaN, every state code
    assert [a.to_dict() for a in bulk.alarms()] == [a.to_dict() for a in one_by_one.alarms()]
    assert bulk.get("c1:variance").state == AlarmState.SUPPRESSED and bulk.get("c1:variance").shelved_until is None
    assert bulk.get("c2:drift").state == AlarmState.OUT_OF_SERVICE and bulk.get("c2:drift").suppressed
    assert rerun_journal({f"c{k}": EVERY_KIND for k in range(6)}, bulk.journal) == \
        {a.id: a.state for a in bulk.alarms()}


def test_listeners_hear_every_bulk_transition_unless_they_want_none() -> None:
    book = _book(3)
    heard: list[tuple[JournalEntry, str]] = []
    skipped: list[JournalEntry] = []
    book.listen(lambda entry, alarm: heard.append((entry, str(alarm.state))))
    book.listen(lambda entry, alarm: skipped.append(entry), wants=lambda: False)
    book.suppress_many(["c0", "c1", "c2"], DETECTOR_KINDS, 1.0, "commissioning")
    assert [e.to_dict() for e, _ in heard] == _entries(book)
    assert {state for _, state in heard} == {"Suppressed by design"} and not skipped


def test_a_readers_copy_keeps_the_states_it_was_taken_with() -> None:
    book = _book(2 * BLOCK // len(ALARM_KINDS) + 3)           # rows in three blocks
    before = book.alarms()
    book.condition("c1", "offset", True, 1.0, Evidence(9.0, 8.0))
    far = f"c{len(before) // len(ALARM_KINDS) - 1}"
    book.suppress(far, ["drift"], True, 2.0, "held")
    after = book.alarms()
    assert before.get("c1:offset").state == AlarmState.NORMAL and not before.get("c1:offset").active
    assert after.get("c1:offset").state == AlarmState.UNACKNOWLEDGED and after.get("c1:offset").active
    assert before.get(f"{far}:drift").state == AlarmState.NORMAL
    assert after.get(f"{far}:drift").state == AlarmState.SUPPRESSED
    assert [a.kind for a in after.of_channel("c1")] == list(ALARM_KINDS) and after.get("c1:colour") is None
    assert len(before) == len(after) == book.layout.size


def test_the_journal_keeps_the_newest_entries_cutting_into_a_run() -> None:
    limit = 100
    book, whole = _book(60, journal_limit=limit), _book(60)
    for b in (book, whole):
        b.suppress_many([f"c{k}" for k in range(40)], DETECTOR_KINDS, 1.0, "commissioning")   # 160 entries
    assert len(book.journal) == limit                   # past limit + a tenth: cut back to the limit
    for b in (book, whole):
        b.condition("c50", "offset", True, 2.0, Evidence(9.0, 8.0))
    kept = _entries(book)
    assert len(book.journal) == len(kept) == limit + 1
    assert kept == _entries(whole)[-limit - 1:]
    assert [e.seq for e in book.journal.since(150)] == list(range(151, 162))
    only = book.entries(after=100, limit=5, channel="c39")
    assert [e.seq for e in only] == [157, 158, 159, 160] and {e.channel for e in only} == {"c39"}


def test_entries_the_store_does_not_have_yet_stay_in_memory_past_the_limit() -> None:
    limit = 100
    book, whole = _book(60, journal_limit=limit), _book(60)
    book.journal.durable_through(0)                    # a store that has none of them yet
    for b in (book, whole):
        b.suppress_many([f"c{k}" for k in range(40)], DETECTOR_KINDS, 1.0, "commissioning")   # 160 entries
        for k in range(30):
            b.condition(f"c{50 + k % 10}", "offset", k % 2 == 0, 2.0 + k, Evidence(9.0, 8.0))
    made = len(_entries(whole))
    assert made > limit + limit // 10                  # past where the journal would cut ...
    assert len(book.journal) == made and _entries(book) == _entries(whole)      # ... but nothing the store lacks
    book.journal.durable_through(150)                  # the store took the first 150, cutting into the run
    book.condition("c51", "offset", True, 40.0, Evidence(9.0, 8.0))
    newest = _entries(whole)[-1]["seq"] + 1
    assert [e.seq for e in book.journal] == list(range(newest - limit + 1, newest + 1))    # cut back to the limit


def test_an_unknown_kind_or_priority_is_refused_naming_it() -> None:
    with pytest.raises(ValueError, match="alarm kind must be one of"):
        AlarmBook({"a": {"colour": "low"}})
    with pytest.raises(ValueError, match="priority must be one of"):
        AlarmBook({"a": {"drift": "whenever"}})


def test_every_alarm_state_as_json_is_what_json_dumps_makes_of_it() -> None:
    book = _book(2 * BLOCK // len(ALARM_KINDS) + 7)
    _stir(book)
    book.suppress_many([f"c{k}" for k in range(5, 900)], DETECTOR_KINDS, 10.0, "commissioning")
    table = book.alarms()
    made = [payload for rows in table.parts() for payload in state_payloads(rows)]
    assert len(made) == len(table)
    assert made == [(a.channel, a.kind, json.dumps(a.to_dict()).encode()) for a in table]   # json as reference


@pytest.mark.parametrize("kinds", [ALARM_KINDS, ("offset", "drift", "variance")], ids=["every kind", "some kinds"])
def test_a_checkpoints_alarms_come_back_by_id_into_a_book_of_other_channels(kinds: tuple[str, ...]) -> None:
    saved = AlarmBook({f"c{k}": dict.fromkeys(kinds, "high") for k in range(6)})
    saved.condition("c0", "offset", True, 1.0, Evidence(9.0, 8.0, onset=0.5, baseline=1, t=1.0))
    saved.shelve("c2:drift", "ana", 2.0, 50.0)
    saved.suppress_many(["c4", "c5"], ["variance", "offset"], 3.0, "held")
    arrays, meta = saved.export()
    assert (meta["ids"] is None) == (kinds == ALARM_KINDS)
    book = AlarmBook({f"c{k}": dict.fromkeys(kinds, "high") for k in (6, 5, 4, 2, 0)})      # c1, c3 gone; c6 new
    book.load(arrays, meta)
    for cid in ("c5", "c4", "c2", "c0"):
        assert [a.to_dict() for a in book.alarms().of_channel(cid)] == \
            [a.to_dict() for a in saved.alarms().of_channel(cid)]
    assert {a.state for a in book.alarms().of_channel("c6")} == {AlarmState.NORMAL}
