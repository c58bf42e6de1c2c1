"""Every alarm's state in columns, and the frozen copies readers get: no Python object per alarm until one is read.

100,000 channels have 500,000 alarms. An object per alarm, and a copy of each for readers, took some 3 KB per
channel (tracemalloc, 20,000 channels). Here an alarm is a row of two small arrays, the very rows a checkpoint
keeps: three int8 flags (state, condition active, suppressed by design) and seven float64 numbers (shelving end,
time of the last transition, and the evidence's statistic, limit, onset, baseline version and sample time; NaN
for None). Rows live in blocks of ``BLOCK``. A reader's copy (:class:`AlarmTable`) holds the blocks as they are;
the book copies a block before its first write after handing out a copy (copy on write), so a copy costs a tuple
of block references and a transition at most one block.
"""

from __future__ import annotations

import math
from collections.abc import Iterator, Mapping, Sequence
from dataclasses import dataclass
from typing import overload

import numpy as np
from numpy.typing import NDArray

from service.alarms.alarm_types import PRIORITIES, Alarm, AlarmState, Evidence
from service.config.alarm_settings import ALARM_KINDS, AlarmKind

__all__ = [
    "ACTIVE",
    "BASELINE",
    "BLOCK",
    "EVIDENCE",
    "LIMIT",
    "NO_ALARMS",
    "ONSET",
    "SHELVED_UNTIL",
    "SINCE",
    "STATE",
    "STATES",
    "STATE_CODE",
    "STATISTIC",
    "SUPPRESSED",
    "AlarmColumns",
    "AlarmLayout",
    "AlarmTable",
    "T",
    "evidence_of",
    "optional",
]

BLOCK = 4096                                                           # rows per block
STATE, ACTIVE, SUPPRESSED = range(3)                                   # the flag columns
SHELVED_UNTIL, SINCE, STATISTIC, LIMIT, ONSET, BASELINE, T = range(7)  # the number columns
EVIDENCE = slice(STATISTIC, T + 1)
STATES: tuple[AlarmState, ...] = tuple(AlarmState)                    # a state's code is its index here
STATE_CODE = {state: code for code, state in enumerate(STATES)}

FlagRows = NDArray[np.int8]
NumberRows = NDArray[np.float64]


def optional(value: float) -> float | None:
    """A stored number as the alarm holds it: NaN is None."""
    return None if math.isnan(value) else value


def evidence_of(numbers: Sequence[float]) -> Evidence:
    """The evidence of a row of numbers (all seven columns, or the five of ``EVIDENCE``)."""
    statistic, limit, onset, baseline, t = numbers[-5:]
    return Evidence(statistic, limit, optional(onset), None if math.isnan(baseline) else int(baseline), optional(t))


class _Kinds:
    """The alarm kinds of a channel and their priorities (channels configured alike share one)."""

    __slots__ = ("kinds", "offset", "priorities")

    def __init__(self, priorities: Mapping[str, str]) -> None:
        for kind, priority in priorities.items():
            if kind not in ALARM_KINDS:
                raise ValueError(f"alarm kind must be one of {', '.join(ALARM_KINDS)}, got {kind!r}")
            if priority not in PRIORITIES:
                raise ValueError(f"priority must be one of {', '.join(PRIORITIES)}, got {priority!r}")
        self.kinds = tuple(AlarmKind(kind) for kind in priorities)
        self.offset: dict[str, int] = {kind: k for k, kind in enumerate(self.kinds)}
        self.priorities = tuple(PRIORITIES.index(p) for p in priorities.values())


class AlarmLayout:
    """Which row is which alarm: channels in configuration order, one row per kind each (immutable).

    Parameters
    ----------
    priorities : mapping channel -> mapping kind -> priority; a channel with no kind has no alarm
    """

    def __init__(self, priorities: Mapping[str, Mapping[str, str]]) -> None:
        made: dict[int, _Kinds] = {}            # by mapping object: channels configured alike share one
        channels: list[str] = []
        kinds_of: list[_Kinds] = []
        for channel, mapping in priorities.items():
            kinds = made.get(id(mapping))
            if kinds is None:
                kinds = made[id(mapping)] = _Kinds(mapping)
            if kinds.kinds:
                channels.append(channel)
                kinds_of.append(kinds)
        self.channels: tuple[str, ...] = tuple(channels)
        self._position = {channel: k for k, channel in enumerate(channels)}
        self._kinds = kinds_of
        counts = np.array([len(k.kinds) for k in kinds_of], dtype=np.int64)
        self._first = np.concatenate([[0], np.cumsum(counts)[:-1]]).astype(np.int64) if channels else counts
        self.size = int(counts.sum())
        self.row_channel = np.repeat(np.arange(len(channels), dtype=np.int32), counts)
        self.row_kind = np.array([ALARM_KINDS.index(kind) for k in kinds_of for kind in k.kinds] if len(made) > 1
                                 else np.tile([ALARM_KINDS.index(kind) for kind in kinds_of[0].kinds], len(channels))
                                 if channels else [], dtype=np.int8)
        self.row_priority = np.array([p for k in kinds_of for p in k.priorities] if len(made) > 1
                                     else np.tile(kinds_of[0].priorities, len(channels)) if channels else [],
                                     dtype=np.int8)
        # Every channel with every kind, in order (the usual book): a checkpoint's channel list says it all.
        self.is_grid = all(k.kinds == ALARM_KINDS for k in made.values() if k.kinds)

    def position(self, channel: str) -> int | None:
        """The channel's place in :attr:`channels` (None: it has no alarm)."""
        return self._position.get(channel)

    def row(self, channel: str, kind: str) -> int | None:
        """The row of ``<channel>:<kind>`` (None: no such alarm)."""
        k = self._position.get(channel)
        if k is None:
            return None
        offset = self._kinds[k].offset.get(kind)
        return None if offset is None else int(self._first[k]) + offset

    def row_of(self, alarm_id: str) -> int | None:
        """The row of an alarm id ``<channel>:<kind>`` (None: no such alarm)."""
        channel, colon, kind = alarm_id.rpartition(":")
        return self.row(channel, kind) if colon else None

    def rows(self, channel: str) -> range:
        """The rows of a channel's alarms (empty for none)."""
        k = self._position.get(channel)
        if k is None:
            return range(0)
        first = int(self._first[k])
        return range(first, first + len(self._kinds[k].kinds))

    def rows_of(self, channels: Sequence[str], kinds: Sequence[str]) -> NDArray[np.int64]:
        """The rows of ``kinds`` of each of ``channels``, channel by channel in the order given, kinds in the order
        given; alarms that do not exist are left out."""
        rows = [row for channel in channels for kind in kinds
                if (row := self.row(channel, kind)) is not None] if len(set(map(id, self._kinds))) > 1 else None
        if rows is not None:
            return np.array(rows, dtype=np.int64)
        # One set of kinds for every channel (the usual book): the rows are a grid.
        known = [k for c in channels if (k := self._position.get(c)) is not None]
        if not known:
            return np.zeros(0, dtype=np.int64)
        offsets = [o for kind in kinds if (o := self._kinds[0].offset.get(kind)) is not None]
        grid = self._first[np.array(known, dtype=np.int64)][:, None] + np.array(offsets, dtype=np.int64)[None, :]
        return grid.reshape(-1)

    def names(self, row: int) -> tuple[str, AlarmKind, str]:
        """Channel, kind and priority of a row."""
        return (self.channels[int(self.row_channel[row])], ALARM_KINDS[int(self.row_kind[row])],
                PRIORITIES[int(self.row_priority[row])])

    def alarm_id(self, row: int) -> str:
        channel, kind, _ = self.names(row)
        return f"{channel}:{kind}"


def _alarm(layout: AlarmLayout, row: int, flags: FlagRows, numbers: NumberRows) -> Alarm:
    """The alarm of ``row``, from its flags (3,) and numbers (7,)."""
    return alarm_of(*layout.names(row), flags, numbers)


def alarm_of(channel: str, kind: AlarmKind, priority: str, flags: FlagRows, numbers: NumberRows) -> Alarm:
    """An alarm from its names, flags (3,) and numbers (7,)."""
    state, active, suppressed = flags.tolist()
    shelved_until, since, *_ = values = numbers.tolist()
    return Alarm(channel, kind, priority, STATES[state], bool(active), bool(suppressed), optional(shelved_until),
                 evidence_of(values), optional(since))


@dataclass(frozen=True)
class AlarmRows:
    """Consecutive rows of a table with their names: a part that travels on its own (pickled, to the MQTT client's
    process).

    ``channels`` the channels of these rows, once each; per row (len,): ``channel`` an index into ``channels``,
    ``kind`` into ``ALARM_KINDS``, ``priority`` into ``PRIORITIES``; ``flags`` (len, 3), ``numbers`` (len, 7).
    """

    channels: tuple[str, ...]
    channel: NDArray[np.int32]
    kind: NDArray[np.int8]
    priority: NDArray[np.int8]
    flags: FlagRows
    numbers: NumberRows

    def __len__(self) -> int:
        return int(self.flags.shape[0])

    def alarm(self, i: int) -> Alarm:
        return alarm_of(self.channels[int(self.channel[i])], ALARM_KINDS[int(self.kind[i])],
                        PRIORITIES[int(self.priority[i])], self.flags[i], self.numbers[i])


class AlarmTable(Sequence[Alarm]):
    """A frozen copy of every alarm, in configuration order; each :class:`Alarm` is made as it is read."""

    def __init__(self, layout: AlarmLayout, flags: tuple[FlagRows, ...], numbers: tuple[NumberRows, ...]) -> None:
        self.layout = layout
        self._flags = flags
        self._numbers = numbers

    def __len__(self) -> int:
        return self.layout.size

    @overload
    def __getitem__(self, index: int) -> Alarm: ...

    @overload
    def __getitem__(self, index: slice) -> list[Alarm]: ...

    def __getitem__(self, index: int | slice) -> Alarm | list[Alarm]:
        if isinstance(index, slice):
            return [self.at(row) for row in range(*index.indices(len(self)))]
        row = index + len(self) if index < 0 else index
        if not 0 <= row < len(self):
            raise IndexError(index)
        return self.at(row)

    def __iter__(self) -> Iterator[Alarm]:
        for row in range(len(self)):
            yield self.at(row)

    def at(self, row: int) -> Alarm:
        block, i = divmod(row, BLOCK)
        return _alarm(self.layout, row, self._flags[block][i], self._numbers[block][i])

    def get(self, alarm_id: str) -> Alarm | None:
        row = self.layout.row_of(alarm_id)
        return None if row is None else self.at(row)

    def of_channel(self, channel: str) -> list[Alarm]:
        """A channel's alarms, in kind order."""
        return [self.at(row) for row in self.layout.rows(channel)]

    def rows_where(self, *, channel: str | None = None, kind: str | None = None, state: str | None = None,
                   priority: str | None = None, include_normal: bool = False) -> NDArray[np.int64]:
        """Rows of the alarms that match every filter given (a value no alarm has matches none), in order;
        Normal ones only with ``include_normal``."""
        layout = self.layout
        if channel is not None:
            rows = layout.rows(channel)
            rows_array = np.arange(rows.start, rows.stop, dtype=np.int64)
        else:
            rows_array = np.arange(len(self), dtype=np.int64)
        keep = np.ones(rows_array.shape[0], dtype=bool)
        codes = self.column(STATE)[rows_array]
        if not include_normal:
            keep &= codes != STATE_CODE[AlarmState.NORMAL]
        for wanted, names, column in ((kind, ALARM_KINDS, layout.row_kind), (priority, PRIORITIES,
                                                                             layout.row_priority)):
            if wanted is not None:
                code = names.index(wanted) if wanted in names else -1
                keep &= column[rows_array] == code
        if state is not None:
            keep &= codes == next((code for code, s in enumerate(STATES) if s.value == state), -1)
        return rows_array[keep]

    def parts(self) -> Iterator[AlarmRows]:
        """The table in parts of up to ``BLOCK`` rows, in order, each with the names of its rows."""
        layout = self.layout
        for block, (flags, numbers) in enumerate(zip(self._flags, self._numbers, strict=True)):
            first = block * BLOCK
            end = min(first + BLOCK, len(self))
            positions = layout.row_channel[first:end]
            low = int(positions[0])
            yield AlarmRows(layout.channels[low:int(positions[-1]) + 1], positions - low, layout.row_kind[first:end],
                            layout.row_priority[first:end], flags[:end - first], numbers[:end - first])

    def column(self, flag: int) -> NDArray[np.int8]:
        """One flag column (``STATE``, ``ACTIVE``, ``SUPPRESSED``) of every row, shape (rows,)."""
        if not self._flags:
            return np.zeros(0, dtype=np.int8)
        return np.concatenate([block[:, flag] for block in self._flags])[: len(self)]


class AlarmColumns:
    """The book's live rows, in blocks copied on their first write after :meth:`freeze` (engine thread only).

    A new row is Normal, inactive, not suppressed, with no shelving, transition or evidence.
    """

    def __init__(self, size: int) -> None:
        blocks = -(-size // BLOCK)
        self.size = size
        self._flags = [np.zeros((BLOCK, 3), dtype=np.int8) for _ in range(blocks)]   # code 0 is Normal
        self._numbers = [np.full((BLOCK, 7), np.nan) for _ in range(blocks)]
        self._shared = [False] * blocks

    def freeze(self, layout: AlarmLayout) -> AlarmTable:
        """A copy for readers, as of now (later writes go to fresh blocks)."""
        self._shared = [True] * len(self._shared)
        return AlarmTable(layout, tuple(self._flags), tuple(self._numbers))

    def _writable(self, block: int) -> None:
        if self._shared[block]:
            self._flags[block] = self._flags[block].copy()
            self._numbers[block] = self._numbers[block].copy()
            self._shared[block] = False

    def flags(self, row: int) -> list[int]:
        """``[state code, active, suppressed]`` of a row."""
        block, i = divmod(row, BLOCK)
        return self._flags[block][i].tolist()

    def numbers(self, row: int) -> list[float]:
        """The seven numbers of a row."""
        block, i = divmod(row, BLOCK)
        return self._numbers[block][i].tolist()

    def alarm(self, layout: AlarmLayout, row: int) -> Alarm:
        block, i = divmod(row, BLOCK)
        return _alarm(layout, row, self._flags[block][i], self._numbers[block][i])

    def set_flag(self, row: int, column: int, value: int) -> None:
        block, i = divmod(row, BLOCK)
        self._writable(block)
        self._flags[block][i, column] = value

    def set_numbers(self, row: int, values: Mapping[int, float | None]) -> None:
        """Write number columns (None stored as NaN)."""
        block, i = divmod(row, BLOCK)
        self._writable(block)
        target = self._numbers[block]
        for column, value in values.items():
            target[i, column] = math.nan if value is None else value

    def gather(self, rows: NDArray[np.int64]) -> tuple[FlagRows, NumberRows]:
        """Flags (len, 3) and numbers (len, 7) of ``rows`` (copies)."""
        flags, numbers = self.stacked()
        return flags[rows], numbers[rows]

    def scatter(self, rows: NDArray[np.int64], flags: FlagRows, numbers: NumberRows) -> None:
        """Write whole rows: ``flags`` (len, 3) and ``numbers`` (len, 7)."""
        blocks, within = np.divmod(rows, BLOCK)
        for block in np.unique(blocks).tolist():
            self._writable(block)
            here = blocks == block
            self._flags[block][within[here]] = flags[here]
            self._numbers[block][within[here]] = numbers[here]

    def stacked(self) -> tuple[FlagRows, NumberRows]:
        """Every row's flags (rows, 3) and numbers (rows, 7), copies."""
        if not self._flags:
            return np.zeros((0, 3), dtype=np.int8), np.zeros((0, 7))
        return np.concatenate(self._flags)[: self.size], np.concatenate(self._numbers)[: self.size]

    def shelved_until(self, now: float) -> NDArray[np.int64]:
        """Rows shelved with an expiry at or before ``now``, in row order."""
        code = STATE_CODE[AlarmState.SHELVED]
        found = [block * BLOCK + np.flatnonzero((flags[:, STATE] == code) & (numbers[:, SHELVED_UNTIL] <= now))
                 for block, (flags, numbers) in enumerate(zip(self._flags, self._numbers, strict=True))
                 if (flags[:, STATE] == code).any()]
        return np.concatenate(found).astype(np.int64) if found else np.zeros(0, dtype=np.int64)


NO_ALARMS = AlarmTable(AlarmLayout({}), (), ())
