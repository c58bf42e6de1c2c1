"""Recognising a broker's redelivery of a message already in the input log.

Between the fsync of the input log and the broker receiving our PUBACK there
is a window no protocol closes: a crash (or a dropped connection) there makes
the broker send the message again, with the DUP flag set, to our persistent
session. Its samples would then be refused by the channel's seq/t check, so the
estimates stay right, but the refusal would be counted against the channel and
dead-lettered as if the plant had sent it twice.

So the engine remembers a fingerprint (BLAKE2b-128 of topic and payload) of
each MQTT message it logged, the newest :data:`WINDOW` of them; a message that
arrives with DUP set and a fingerprint in the window is acknowledged and
counted as ``redelivered``, not logged or applied again. A message without DUP
is never skipped: a plant may legitimately publish the same bytes twice.
"""

from __future__ import annotations

import hashlib
from collections import OrderedDict

__all__ = ["WINDOW", "RecentlyLogged"]

# MQTT packet identifiers are 16-bit: a broker cannot hold more unacknowledged messages for one session.
WINDOW = 65_535


def _fingerprint(topic: str, payload: bytes) -> bytes:
    digest = hashlib.blake2b(topic.encode("utf-8", "surrogatepass"), digest_size=16)
    digest.update(b"\0")
    digest.update(payload)
    return digest.digest()


class RecentlyLogged:
    """Fingerprints of the newest ``capacity`` logged MQTT messages (about 100 bytes each)."""

    def __init__(self, capacity: int = WINDOW) -> None:
        if capacity < 1:
            raise ValueError(f"capacity must be >= 1, got {capacity}")
        self.capacity = capacity
        self._seen: OrderedDict[bytes, None] = OrderedDict()

    def __len__(self) -> int:
        return len(self._seen)

    def add(self, topic: str, payload: bytes) -> None:
        key = _fingerprint(topic, payload)
        self._seen[key] = None
        self._seen.move_to_end(key)
        if len(self._seen) > self.capacity:
            self._seen.popitem(last=False)

    def __contains__(self, message: tuple[str, bytes]) -> bool:
        return _fingerprint(*message) in self._seen
