"""The engine's intake: the one bounded queue through which messages and operations reach the single writer.

It exists before the engine does, so producers (MQTT, HTTP) may queue work while the service is still
starting; the engine takes it from there in order once its thread runs.

Messages come and go in lists: the MQTT reader hands over everything one list from the ingest process
held, and the engine takes every message waiting, each under one acquisition of the lock, rather than
one lock round per message on both sides (at plant rates that was half the reader's time).
"""

from __future__ import annotations

import concurrent.futures
import queue
import threading
import time
from collections import deque
from collections.abc import Sequence
from dataclasses import dataclass

from service.broker_link.messages import Message
from service.engine.operations import Operation

__all__ = ["Command", "Intake"]


@dataclass(frozen=True)
class Command:
    """An operation queued for the engine thread (the single writer), with a future for its result."""

    operation: Operation[object]
    future: concurrent.futures.Future[object]


Item = Message | Command | None          # None: a wake-up for the engine thread


class Intake:
    """A bounded FIFO of messages, operations (``Command``) and the engine's wake-up (``None``).

    ``maxsize`` bounds the items waiting (each message, command or wake-up is one). Every item taken
    is one task until :meth:`task_done` says it is finished; :attr:`unfinished_tasks` counts those
    not yet finished, so that waiting for it to reach zero waits until all work queued so far is done.
    """

    def __init__(self, maxsize: int) -> None:
        if maxsize < 1:
            raise ValueError(f"maxsize must be >= 1, got {maxsize}")
        self.maxsize = maxsize
        self._items: deque[Item] = deque()
        self._lock = threading.Lock()
        self._not_empty = threading.Condition(self._lock)
        self._not_full = threading.Condition(self._lock)
        self._unfinished = 0

    # ------------------------------------------------------------- producers
    def offer(self, message: Message, timeout: float | None = None) -> bool:
        """Queue a message; blocks up to ``timeout`` (None: until there is room). False if still full."""
        return self.offer_all((message,), timeout) == 1

    def offer_all(self, messages: Sequence[Message], timeout: float | None = None) -> int:
        """Queue messages in order, as many as there is room for, waiting up to ``timeout`` (None: as long
        as it takes) for room for the rest; returns how many were queued (the first ones)."""
        deadline = None if timeout is None else time.monotonic() + timeout
        done = 0
        with self._not_full:
            while done < len(messages):
                room = self.maxsize - len(self._items)
                if room <= 0:
                    remaining = None if deadline is None else deadline - time.monotonic()
                    if remaining is not None and remaining <= 0:
                        break
                    self._not_full.wait(remaining)
                    continue
                part = messages[done:done + room]
                self._items.extend(part)
                self._unfinished += len(part)
                done += len(part)
                self._not_empty.notify()
        return done

    def put(self, item: Command | None, timeout: float | None = None) -> None:
        """Queue a command or a wake-up; ``queue.Full`` if there is still no room after ``timeout`` seconds."""
        deadline = None if timeout is None else time.monotonic() + timeout
        with self._not_full:
            while len(self._items) >= self.maxsize:
                remaining = None if deadline is None else deadline - time.monotonic()
                if remaining is not None and remaining <= 0:
                    raise queue.Full
                self._not_full.wait(remaining)
            self._items.append(item)
            self._unfinished += 1
            self._not_empty.notify()

    # -------------------------------------------------------------- consumer
    def get(self, timeout: float | None = None) -> Item:
        """The oldest item; waits up to ``timeout`` for one (``queue.Empty`` if none came)."""
        with self._not_empty:
            if not self._items and not self._not_empty.wait_for(lambda: self._items, timeout):
                raise queue.Empty
            item = self._items.popleft()
            self._not_full.notify()
            return item

    def take_messages(self, limit: int, timeout: float = 0.0) -> tuple[list[Message], Command | None]:
        """Up to ``limit`` messages in order, waiting up to ``timeout`` when none is queued.

        Stops at the first command, which it also takes and returns second (else None). Wake-ups met
        on the way are taken and finished. Returns at once with what is there, never waiting for more.
        """
        taken: list[Message] = []
        stop: Command | None = None
        with self._not_empty:
            if not self._items and timeout > 0.0:
                self._not_empty.wait_for(lambda: self._items, timeout)
            items = self._items
            while items and len(taken) < limit:
                item = items.popleft()
                if isinstance(item, Message):
                    taken.append(item)
                elif item is None:
                    self._unfinished -= 1
                else:
                    stop = item
                    break
            self._not_full.notify_all()
        return taken, stop

    def task_done(self, count: int = 1) -> None:
        """``count`` items taken are finished."""
        with self._lock:
            if count > self._unfinished:
                raise ValueError("task_done() called more times than items were taken")
            self._unfinished -= count

    # ----------------------------------------------------------------- state
    @property
    def unfinished_tasks(self) -> int:
        """Items queued or taken and not yet finished."""
        return self._unfinished

    def qsize(self) -> int:
        """Items waiting."""
        return len(self._items)

    def empty(self) -> bool:
        return not self._items
