"""Which replica owns which channel: a stable hash of the channel id, modulo the number of replicas.

The hash is BLAKE2b of the id's UTF-8 bytes (the first 8 bytes, big-endian), never Python's ``hash``,
which is salted per process: every replica, on every start, on every machine, computes the same owner.
Adding a replica moves channels (modulo, not a consistent-hash ring): change the count deliberately,
with every replica stopped and its channels' state moved (see deploy/README.md).
"""

from __future__ import annotations

import hashlib
import re
from collections.abc import Iterable
from dataclasses import dataclass

__all__ = ["Shard", "channel_hash", "owner", "parse_shard"]

_SPEC = re.compile(r"^(\d+|auto)/(\d+)$")
_ORDINAL = re.compile(r"-(\d+)$")


def channel_hash(channel: str) -> int:
    """A 64-bit hash of ``channel`` that is the same in every process."""
    return int.from_bytes(hashlib.blake2b(channel.encode("utf-8"), digest_size=8).digest(), "big")


def owner(channel: str, count: int) -> int:
    """The index (0 .. count-1) of the replica that owns ``channel``."""
    if count < 1:
        raise ValueError(f"count must be at least 1, got {count}")
    return channel_hash(channel) % count


@dataclass(frozen=True)
class Shard:
    """This replica: ``index`` of ``count``."""

    index: int
    count: int

    def owns(self, channel: str) -> bool:
        return owner(channel, self.count) == self.index

    def owned(self, channels: Iterable[str]) -> list[str]:
        return [c for c in channels if self.owns(c)]

    def __str__(self) -> str:
        return f"{self.index}/{self.count}"


def parse_shard(spec: str, hostname: str = "") -> Shard:
    """``"K/N"``, or ``"auto/N"`` with K the ordinal a StatefulSet puts at the end of the host name
    (``rwls-2`` is replica 2).

    Raises
    ------
    ValueError
        The text is neither form, K is not below N, or the host name has no ordinal.
    """
    match = _SPEC.match(spec.strip())
    if match is None:
        raise ValueError(f"shard must be K/N or auto/N, got {spec!r}")
    count = int(match.group(2))
    if count < 1:
        raise ValueError(f"shard count must be at least 1, got {count}")
    if match.group(1) == "auto":
        ordinal = _ORDINAL.search(hostname)
        if ordinal is None:
            raise ValueError(f"shard auto/{count}: host name {hostname!r} ends in no -<ordinal>")
        index = int(ordinal.group(1))
    else:
        index = int(match.group(1))
    if index >= count:
        raise ValueError(f"shard index {index} is not below the count {count}")
    return Shard(index, count)
