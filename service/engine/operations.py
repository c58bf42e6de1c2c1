"""The engine's operations: everything an operator or engineer changes, as typed frozen data.

An operation is a frozen dataclass with a ``name`` and JSON-able fields (who, when, what). The engine
writes a changing operation to the input log, by name and fields, in order with the samples before it,
and only then applies it, so recovery reapplies it exactly: the same transition, with the same user,
comment and time, lands in the journal once. Each operation applies itself against
:class:`OperationTarget`, the little it may touch (the bank, the alarm book, the mark for the next
snapshot), and returns what changed, so a caller never reads live state to learn the outcome.

:class:`Inspect` is the one exception: a read (or a test's probe) run on the engine thread in order with
the samples before it, never logged.
"""

from __future__ import annotations

import dataclasses
from collections.abc import Callable, Mapping
from dataclasses import dataclass
from typing import Any, ClassVar, Generic, Protocol, TypeVar

from estimator import Baseline, ChannelBank
from service.alarms.lifecycle import Alarm, AlarmBook, JournalEntry

__all__ = ["OPERATIONS", "Acknowledge", "AlarmChanged", "Inspect", "LearnBaseline", "Operation", "OperationTarget",
           "Remove", "Reset", "Restore", "SetBaseline", "Shelve", "Unshelve", "operation_from_record",
           "operation_record"]

T = TypeVar("T")
T_co = TypeVar("T_co", covariant=True)


class OperationTarget(Protocol):
    """What an operation may touch (the engine is one)."""

    @property
    def bank(self) -> ChannelBank: ...

    @property
    def alarms(self) -> AlarmBook | None: ...

    def touch(self, channel: str) -> None:
        """Mark a channel for the next snapshot."""


class Operation(Protocol[T_co]):
    """A unit of work for the engine thread: logged first when ``logged``, then applied."""

    name: ClassVar[str]
    logged: ClassVar[bool]

    def apply(self, target: Any) -> T_co: ...


@dataclass(frozen=True)
class AlarmChanged:
    """An operator action's outcome: its journal entry and the alarm as it now stands (copies)."""

    entry: JournalEntry
    alarm: Alarm


def _book(target: OperationTarget) -> AlarmBook:
    if target.alarms is None:
        raise RuntimeError("this engine keeps no alarms")
    return target.alarms


@dataclass(frozen=True, kw_only=True)
class _AlarmAction:
    alarm: str
    user: str
    time: float
    comment: str = ""

    logged: ClassVar[bool] = True

    def _change(self, book: AlarmBook) -> JournalEntry:
        raise NotImplementedError

    def apply(self, target: OperationTarget) -> AlarmChanged:
        book = _book(target)
        entry = self._change(book)
        return AlarmChanged(entry, dataclasses.replace(book.get(self.alarm)))


@dataclass(frozen=True, kw_only=True)
class Acknowledge(_AlarmAction):
    name: ClassVar[str] = "acknowledge"

    def _change(self, book: AlarmBook) -> JournalEntry:
        return book.acknowledge(self.alarm, self.user, self.time, self.comment)


@dataclass(frozen=True, kw_only=True)
class Shelve(_AlarmAction):
    until: float
    name: ClassVar[str] = "shelve"

    def _change(self, book: AlarmBook) -> JournalEntry:
        return book.shelve(self.alarm, self.user, self.time, self.until, self.comment)


@dataclass(frozen=True, kw_only=True)
class Unshelve(_AlarmAction):
    name: ClassVar[str] = "unshelve"

    def _change(self, book: AlarmBook) -> JournalEntry:
        return book.unshelve(self.alarm, self.user, self.time, self.comment)


@dataclass(frozen=True, kw_only=True)
class Remove(_AlarmAction):
    name: ClassVar[str] = "remove"

    def _change(self, book: AlarmBook) -> JournalEntry:
        return book.remove(self.alarm, self.user, self.time, self.comment)


@dataclass(frozen=True, kw_only=True)
class Restore(_AlarmAction):
    name: ClassVar[str] = "restore"

    def _change(self, book: AlarmBook) -> JournalEntry:
        return book.restore(self.alarm, self.user, self.time, self.comment)


def _last_t(target: OperationTarget, channel: str) -> float | None:
    return target.bank.view([channel])[channel].last_t


@dataclass(frozen=True, kw_only=True)
class LearnBaseline:
    """A new baseline from the channel's estimates now; returns it, or None when they cannot be judged."""

    channel: str
    note: str = ""
    name: ClassVar[str] = "learn_baseline"
    logged: ClassVar[bool] = True

    def apply(self, target: OperationTarget) -> Baseline | None:
        made = target.bank.learn_baseline(self.channel, _last_t(target, self.channel), note=self.note)
        target.touch(self.channel)
        return made


@dataclass(frozen=True, kw_only=True)
class SetBaseline:
    """A baseline set from a calibration: ``parameters`` in the channel's term order; returns it."""

    channel: str
    parameters: tuple[float, ...]
    noise_sigma: float
    note: str = ""
    name: ClassVar[str] = "set_baseline"
    logged: ClassVar[bool] = True

    def apply(self, target: OperationTarget) -> Baseline:
        made = target.bank.set_baseline(self.channel, list(self.parameters), noise_sigma=self.noise_sigma,
                                        t=_last_t(target, self.channel), note=self.note)
        target.touch(self.channel)
        return made


@dataclass(frozen=True, kw_only=True)
class Reset:
    """The channel's estimator starts afresh (commissioning again); returns the channel."""

    channel: str
    user: str = ""
    comment: str = ""
    name: ClassVar[str] = "reset"
    logged: ClassVar[bool] = True

    def apply(self, target: OperationTarget) -> str:
        target.bank.reset(self.channel, _last_t(target, self.channel))
        target.touch(self.channel)
        return self.channel


@dataclass(frozen=True)
class Inspect(Generic[T]):
    """Run ``action(engine)`` on the engine thread, in order with the samples before it; not logged.

    For reads that need the live bank (every baseline version) and for the engine's owner (checkpoints,
    tests). It must not change estimator or alarm state: that is what the logged operations are for.
    """

    action: Callable[[Any], T]
    name: ClassVar[str] = "inspect"
    logged: ClassVar[bool] = False

    def apply(self, target: Any) -> T:
        return self.action(target)


# Logged operations by the name the input log records them under (recovery reads them back by it).
OPERATIONS: dict[str, type[Any]] = {cls.name: cls for cls in (
    Acknowledge, Shelve, Unshelve, Remove, Restore, LearnBaseline, SetBaseline, Reset)}


def operation_record(operation: Operation[object]) -> tuple[str, dict[str, object]]:
    """``(name, fields)`` for the input log."""
    return operation.name, dataclasses.asdict(operation)  # type: ignore[call-overload]


def operation_from_record(name: str, fields: Mapping[str, Any]) -> Operation[object]:
    """The operation an input-log record holds.

    Raises
    ------
    ValueError
        An unknown name, or fields that do not fit it.
    """
    kind = OPERATIONS.get(name)
    if kind is None:
        raise ValueError(f"unknown operation {name!r}")
    values = dict(fields)
    if kind is SetBaseline:
        values["parameters"] = tuple(float(v) for v in values["parameters"])
    try:
        operation: Operation[object] = kind(**values)
        return operation
    except TypeError as exc:
        raise ValueError(f"operation {name!r}: {exc}") from None
