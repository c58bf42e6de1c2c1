"""A one-line progress bar on stderr for long runs; silent when stderr is not a terminal."""

from __future__ import annotations

import sys
import time
from typing import TextIO

__all__ = ["Progress"]


class Progress:
    """Throttled progress line: percentage, rows, rows per second and the time left.

    The time left is the part of the file still to read at the pace so far (characters per second).

    Parameters
    ----------
    total : amount of work (e.g. characters of a file)
    label : word shown in front
    stream : defaults to stderr
    enabled : defaults to ``stream.isatty()``
    """

    def __init__(self, total: int, label: str, stream: TextIO | None = None,
                 enabled: bool | None = None, interval: float = 0.2) -> None:
        self._stream = stream if stream is not None else sys.stderr
        self._enabled = self._stream.isatty() if enabled is None else enabled
        self._total = max(total, 1)
        self._label = label
        self._interval = interval
        self._start = time.monotonic()
        self._next = self._start
        self._shown = False

    def update(self, done: int, rows: int) -> None:
        """Report progress; redraws at most every ``interval`` seconds."""
        if not self._enabled:
            return
        now = time.monotonic()
        if now < self._next:
            return
        self._next = now + self._interval
        fraction = min(done / self._total, 1.0)
        width = 30
        filled = round(fraction * width)
        elapsed = max(now - self._start, 1e-9)
        rate = rows / elapsed
        left = f"{_clock(elapsed * (1.0 - fraction) / fraction)} left" if fraction > 0.0 else "time left unknown"
        self._stream.write(f"\r{self._label} [{'#' * filled}{'.' * (width - filled)}] "
                           f"{fraction * 100:5.1f}% {rows:,} rows {rate:,.0f} rows/s {left}  ")
        self._stream.flush()
        self._shown = True

    def close(self) -> None:
        """Clear the line."""
        if self._enabled and self._shown:
            self._stream.write("\r" + " " * 100 + "\r")
            self._stream.flush()


def _clock(seconds: float) -> str:
    """``m:ss``, or ``h:mm:ss`` from an hour on."""
    whole = round(seconds)
    hours, rest = divmod(whole, 3600)
    minutes, secs = divmod(rest, 60)
    return f"{hours}:{minutes:02d}:{secs:02d}" if hours else f"{minutes}:{secs:02d}"
