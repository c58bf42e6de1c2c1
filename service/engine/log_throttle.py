"""A log line per kind of event, at most a few a minute: a flood of bad input must not become a flood of log.

Every event is still counted where it matters (``/metrics``, the dead-letter topic); the log only has to
say that it is happening. The first ``burst`` events of a key in each ``period`` are logged, then one
line when the period ends says how many were left out.
"""

from __future__ import annotations

import logging
import time
from collections.abc import Callable

__all__ = ["LogThrottle"]


class LogThrottle:
    """``log(key, message, *args)`` logs at most ``burst`` lines per ``key`` per ``period`` seconds."""

    def __init__(self, logger: logging.Logger, *, level: int = logging.INFO, burst: int = 10,
                 period: float = 60.0, clock: Callable[[], float] = time.monotonic) -> None:
        self._logger = logger
        self._level = level
        self._burst = burst
        self._period = period
        self._clock = clock
        self._window: dict[str, tuple[float, int]] = {}     # key -> (window start, events in it)

    def log(self, key: str, message: str, *args: object) -> None:
        now = self._clock()
        start, count = self._window.get(key, (now, 0))
        if now - start >= self._period:
            if count > self._burst:
                self._logger.log(self._level, "%d more %s in %.0f s, not logged one by one",
                                 count - self._burst, key, now - start)
            start, count = now, 0
        count += 1
        self._window[key] = (start, count)
        if count <= self._burst:
            self._logger.log(self._level, message, *args)
