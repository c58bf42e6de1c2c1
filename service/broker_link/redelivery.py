"""Recognising a broker's redelivery of a message already in the input log.

Between the fsync of the input log and the broker receiving our PUBACK there
is a window no protocol closes: a crash (or a dropped connection) there makes
the broker send the message again, with the DUP flag set, to our persistent
session. Its samples would then be refused by the channel's seq/t check, so the
estimates stay right, but the refusal would be counted against the channel and
dead-lettered as if the plant had sent it twice.

So the engine remembers a fingerprint of each MQTT message it logged, the newest
:data:`WINDOW` of them; a message that arrives with DUP set and a fingerprint in
the window is acknowledged and counted as ``redelivered``, not logged or applied
again. A message without DUP is never skipped: a plant may legitimately publish
the same bytes twice.

The fingerprint is Python's own hash of ``(topic, payload)``: 64 bits of SipHash
under a key drawn at process start, computed in C (every logged message pays for
it, so it must be cheap), and unpredictable to a publisher trying to make two
messages collide. The window lives in memory only; recovery rebuilds it from the
input log, in the process that will see the redeliveries. Two different messages
share a fingerprint with a chance of about ``WINDOW / 2**64`` (4e-15) per DUP
message checked. The window is searched only when a message with DUP arrives:
the set it is searched in is built then, not on every add.
"""

from __future__ import annotations

from collections import deque
from collections.abc import Iterable

__all__ = ["WINDOW", "RecentlyLogged"]

# MQTT packet identifiers are 16-bit: a broker cannot hold more unacknowledged messages for one session.
WINDOW = 65_535


class RecentlyLogged:
    """Fingerprints of the newest ``capacity`` logged MQTT messages (about 40 bytes each, 80 while searched)."""

    def __init__(self, capacity: int = WINDOW) -> None:
        if capacity < 1:
            raise ValueError(f"capacity must be >= 1, got {capacity}")
        self.capacity = capacity
        self._recent: deque[int] = deque(maxlen=capacity)
        self._searchable: set[int] | None = None      # built by the first search after an add

    def __len__(self) -> int:
        return len(self._recent)

    def add(self, topic: str, payload: bytes) -> None:
        self._recent.append(hash((topic, payload)))
        self._searchable = None

    def add_all(self, messages: Iterable[tuple[str, bytes]]) -> None:
        """:meth:`add` of each ``(topic, payload)``, in order."""
        self._recent.extend(map(hash, messages))
        self._searchable = None

    def __contains__(self, message: tuple[str, bytes]) -> bool:
        if self._searchable is None:
            self._searchable = set(self._recent)
        return hash(message) in self._searchable
