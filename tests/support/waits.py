"""Waiting on conditions, never on time: poll with a deadline, and say what was awaited when it runs out."""

from __future__ import annotations

import time
from collections.abc import Callable
from typing import TypeVar

__all__ = ["eventually", "wait_until"]

T = TypeVar("T")


def wait_until(condition: Callable[[], T], timeout: float, what: str, *, every: float = 0.1) -> T:
    """Poll ``condition()`` until it returns something truthy and return that; ``OSError`` counts as not yet
    (a service that does not listen yet). Fails with ``what`` after ``timeout`` seconds."""
    deadline = time.monotonic() + timeout
    while True:
        try:
            value = condition()
        except OSError:
            value = None
        if value:
            return value  # type: ignore[return-value]
        if time.monotonic() >= deadline:
            raise AssertionError(f"timed out after {timeout} s waiting for {what}")
        time.sleep(every)


def eventually(condition: Callable[[], bool], timeout: float, *, every: float = 0.05) -> bool:
    """Whether ``condition()`` holds within ``timeout`` seconds (polled; for callers that assert themselves)."""
    deadline = time.monotonic() + timeout
    while time.monotonic() < deadline:
        if condition():
            return True
        time.sleep(every)
    return condition()
