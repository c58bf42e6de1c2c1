"""Faults of the service's own host (a full disk, a lost database): held, retried with backoff, healed by themselves.

A fault is not a bad message. When the input log cannot be written or synced, the engine keeps the batch
it was logging, applies nothing and acknowledges nothing (the broker keeps the messages), and tries the
same write again after a growing pause; when the store cannot be reached, checkpoints are retried the
same way while the input log keeps every input. Either way ``/ready`` says not ready and why, the log
says so once when the fault starts and once when it clears, and the metrics count both.
"""

from __future__ import annotations

import enum
import logging
import threading
import time
from collections.abc import Callable, Mapping
from dataclasses import dataclass, replace
from typing import ClassVar

__all__ = ["FaultPart", "HostFault", "HostFaults"]

log = logging.getLogger(__name__)


class FaultPart(enum.StrEnum):
    """What part of the host failed."""

    INPUT_LOG = "input_log"      # the input log's write or sync: ingest holds until it succeeds
    STORE = "store"              # the store (SQLite, PostgreSQL): checkpoints and history wait, the log keeps all


@dataclass(frozen=True)
class HostFault:
    """One fault in force: what failed, why (the last error), since when (epoch s), tries so far."""

    part: FaultPart
    reason: str
    since: float
    attempts: int
    retry_in: float              # seconds from the last failure to the next try

    def to_dict(self) -> dict[str, object]:
        return {"part": str(self.part), "reason": self.reason, "since": self.since, "attempts": self.attempts,
                "retry_in_seconds": self.retry_in}


class HostFaults:
    """The faults in force, their backoff, and counts (written by the engine and checkpoint threads, read by any).

    Parameters
    ----------
    backoff : per part, ``(first, longest)``: seconds before the first retry, doubled by each failure in a
        row up to the longest (defaults: input log 0.05 s to 2 s, a cheap write the samples wait for;
        store 0.5 s to 10 s, a checkpoint that copies the whole state)
    """

    BACKOFF: ClassVar[dict[FaultPart, tuple[float, float]]] = {FaultPart.INPUT_LOG: (0.05, 2.0),
                                                                FaultPart.STORE: (0.5, 10.0)}

    def __init__(self, backoff: Mapping[FaultPart, tuple[float, float]] | None = None,
                 clock: Callable[[], float] = time.monotonic) -> None:
        self.backoff = {**self.BACKOFF, **(backoff or {})}
        for part, (first, longest) in self.backoff.items():
            if not 0 < first <= longest:
                raise ValueError(f"{part}: need 0 < first retry <= longest, got {first}, {longest}")
        self._clock = clock
        self._lock = threading.Lock()
        self._active: dict[FaultPart, HostFault] = {}
        self._due: dict[FaultPart, float] = {}                    # monotonic time of the next try
        self.started = {part: 0 for part in FaultPart}            # faults begun, per part
        self.failures = {part: 0 for part in FaultPart}           # failed tries (first ones included)
        self.seconds = {part: 0.0 for part in FaultPart}          # time spent in faults that cleared

    def failed(self, part: FaultPart, error: BaseException) -> float:
        """A try of ``part`` failed: start or extend its fault; returns seconds until the next try."""
        reason = f"{type(error).__name__}: {error}"[:300]
        with self._lock:
            self.failures[part] += 1
            held = self._active.get(part)
            if held is None:
                self.started[part] += 1
                fault = HostFault(part, reason, time.time(), 1, self.backoff[part][0])
                log.error("%s failed (%s): holding, retrying with backoff until it heals", part, reason)
            else:
                fault = replace(held, reason=reason, attempts=held.attempts + 1,
                                retry_in=min(held.retry_in * 2.0, self.backoff[part][1]))
            self._active[part] = fault
            self._due[part] = self._clock() + fault.retry_in
            return fault.retry_in

    def cleared(self, part: FaultPart) -> None:
        """A try of ``part`` succeeded: its fault (if any) is over."""
        with self._lock:
            fault = self._active.pop(part, None)
            self._due.pop(part, None)
            if fault is None:
                return
            lasted = max(0.0, time.time() - fault.since)
            self.seconds[part] += lasted
        log.warning("%s healed after %.1f s and %d failed tries; resuming", part, lasted, fault.attempts)

    def fault(self, part: FaultPart) -> HostFault | None:
        with self._lock:
            return self._active.get(part)

    def active(self) -> list[HostFault]:
        """The faults in force, input log first."""
        with self._lock:
            return [self._active[part] for part in FaultPart if part in self._active]

    def wait(self, part: FaultPart) -> float:
        """Seconds until ``part`` may be tried again (0 when due, or when it has no fault)."""
        with self._lock:
            due = self._due.get(part)
        return 0.0 if due is None else max(0.0, due - self._clock())
