"""The alarm book's journal: every transition in order, the newest ``limit`` of them in memory.

Entries come one by one (:class:`JournalEntry`), or as a run of design suppressions made at once
(:class:`SuppressionRun`: 400,000 of them when 100,000 channels start uncommissioned), held as arrays and
made into entries only when read, each exactly as the book makes one on its own. Readers on other threads take
a copy of the list of parts (one step under the GIL) and read that.
"""

from __future__ import annotations

from collections.abc import Iterator
from dataclasses import dataclass

import numpy as np
from numpy.typing import NDArray

from service.alarms.alarm_table import STATES, AlarmLayout, evidence_of
from service.alarms.alarm_types import Evidence, JournalAction, JournalEntry

__all__ = ["Journal", "SuppressionRun"]


@dataclass(frozen=True)
class SuppressionRun:
    """Consecutive entries of one design suppression of many alarms at one time: entry i has seq ``first_seq + i``.

    ``rows`` (len,) the alarms' rows in ``layout``, in journal order; ``before`` and ``after`` (len,) int8 state
    codes; ``evidence`` (len, 5): statistic, limit, onset, baseline, t as stored (None: every entry's is empty).
    """

    layout: AlarmLayout
    first_seq: int
    time: float
    comment: str | None
    rows: NDArray[np.int64]
    before: NDArray[np.int8]
    after: NDArray[np.int8]
    evidence: NDArray[np.float64] | None

    def __len__(self) -> int:
        return int(self.rows.shape[0])

    @property
    def last_seq(self) -> int:
        return self.first_seq + len(self) - 1

    def entry(self, i: int) -> JournalEntry:
        row = int(self.rows[i])
        channel, kind, _ = self.layout.names(row)
        evidence = Evidence() if self.evidence is None else evidence_of(self.evidence[i].tolist())
        return JournalEntry(self.first_seq + i, self.time, f"{channel}:{kind}", channel, kind, JournalAction.SUPPRESS,
                            str(STATES[int(self.before[i])]), str(STATES[int(self.after[i])]), evidence, None,
                            self.comment)

    def tail(self, start: int) -> SuppressionRun:
        """The entries from the ``start``-th on."""
        evidence = None if self.evidence is None else self.evidence[start:]
        return SuppressionRun(self.layout, self.first_seq + start, self.time, self.comment, self.rows[start:],
                              self.before[start:], self.after[start:], evidence)

    def positions(self, channel: str | None) -> range | list[int]:
        """Which of its entries are of ``channel`` (None: all)."""
        if channel is None:
            return range(len(self))
        position = self.layout.position(channel)
        if position is None:
            return []
        return np.flatnonzero(self.layout.row_channel[self.rows] == position).tolist()


_Part = JournalEntry | SuppressionRun


def _last_seq(part: _Part) -> int:
    return part.seq if isinstance(part, JournalEntry) else part.last_seq


class Journal:
    """The transitions of an alarm book, oldest first; at most about ``limit`` kept (None: all)."""

    def __init__(self, limit: int | None = None) -> None:
        self._limit = limit
        self._parts: list[_Part] = []
        self._length = 0
        self._durable_through: int | None = None     # None: no store waits for entries, trim freely
        self._trim_at = 0 if limit is None else limit + limit // 10

    def __len__(self) -> int:
        return self._length

    def __iter__(self) -> Iterator[JournalEntry]:
        for part in list(self._parts):
            if isinstance(part, JournalEntry):
                yield part
            else:
                yield from (part.entry(i) for i in range(len(part)))

    def append(self, entry: JournalEntry) -> None:
        self._parts.append(entry)
        self._length += 1
        self._trim()

    def add_run(self, run: SuppressionRun) -> None:
        if len(run):
            self._parts.append(run)
            self._length += len(run)
            self._trim()

    def clear(self) -> None:
        self._parts = []
        self._length = 0

    def durable_through(self, seq: int) -> None:
        """Entries up to ``seq`` are in the store: only those may leave memory (any thread; one assignment).

        Until the first call every entry may; after it, an entry the store does not have yet stays
        however long the journal grows (a store that cannot be reached loses no entry)."""
        self._durable_through = seq
        if self._limit is not None:
            self._trim_at = self._limit + self._limit // 10         # try again at the next entry

    def _trim(self) -> None:
        # Memory holds the newest entries; the durable store keeps them all. Trimmed by a tenth at a time.
        limit = self._limit
        if limit is None or self._length <= self._trim_at:
            return
        parts = list(self._parts)
        excess = min(self._length - limit, self._removable(parts))
        # Entries waiting for the store: look again once another tenth came (or the store took some).
        self._trim_at = max(limit + limit // 10, self._length - excess + limit // 10)
        if excess <= 0:
            return
        removed = excess
        whole = 0
        while excess and whole < len(parts) and (size := _size(parts[whole])) <= excess:
            excess -= size
            whole += 1
        run = parts[whole] if excess else None
        if isinstance(run, SuppressionRun):           # the oldest part kept is a run, partly gone
            parts[whole] = run.tail(excess)
        self._parts = parts[whole:]                   # replaced whole: readers hold the old list
        self._length -= removed

    def _removable(self, parts: list[_Part]) -> int:
        """How many of the oldest entries the store has already (all, when no store waits)."""
        floor = self._durable_through
        if floor is None:
            return self._length
        count = 0
        for part in parts:
            if _last_seq(part) <= floor:
                count += _size(part)
                continue
            if isinstance(part, SuppressionRun) and part.first_seq <= floor:
                count += floor - part.first_seq + 1
            break
        return count

    def since(self, seq: int) -> list[JournalEntry]:
        """Every entry with a sequence number above ``seq``, oldest first."""
        return self.entries(seq, None, None)

    def entries(self, after: int = 0, limit: int | None = 100, channel: str | None = None) -> list[JournalEntry]:
        """Entries with ``seq > after`` (of ``channel``, when given), oldest first, at most ``limit`` (None: all)."""
        parts = list(self._parts)
        start = len(parts)
        while start > 0 and _last_seq(parts[start - 1]) > after:      # newest first: a checkpoint's few
            start -= 1
        found: list[JournalEntry] = []
        for part in parts[start:]:
            if limit is not None and len(found) >= limit:
                break
            if isinstance(part, JournalEntry):
                if part.seq > after and (channel is None or part.channel == channel):
                    found.append(part)
                continue
            skip = max(0, after - part.first_seq + 1)
            for i in part.positions(channel):
                if i >= skip:
                    found.append(part.entry(i))
                    if limit is not None and len(found) >= limit:
                        break
        return found


def _size(part: _Part) -> int:
    return 1 if isinstance(part, JournalEntry) else len(part)
