"""What the broker link hands the engine (a raw message) and what it hands back (a refusal to dead-letter)."""

from __future__ import annotations

import json
import threading
import time
from dataclasses import dataclass, field
from enum import StrEnum

from estimator import SampleRefusal
from service.broker_link.payload import DecodedSample, PayloadRefusal, Refusal
from service.broker_link.tag_reading import TagReading
from service.broker_link.tag_refusal import TagRefusal

__all__ = ["DeadLetter", "EngineRefusal", "Message", "RefusalReason"]


class EngineRefusal(StrEnum):
    """Why the engine itself refuses a message (beside the payload's and the estimator's reasons)."""

    INTERNAL_ERROR = "internal_error"      # the engine failed on the message's batch (a bug; logged)
    FED_BY_TAGS = "fed_by_tags"            # a whole sample for a channel assembled from tags (send the tags)


# Every reason a message or sample is refused for: counted in /metrics and carried by its dead letter.
RefusalReason = PayloadRefusal | TagRefusal | SampleRefusal | EngineRefusal


@dataclass(frozen=True)
class Message:
    """One raw message: for one channel, or (``channel`` None) a tag message or one whose topic matched nothing.

    ``decoded`` carries the result of :func:`decode_payload` when the producer already
    decoded the payload (HTTP does, to answer the client), so it is not done twice.
    """

    channel: str | None
    payload: bytes
    source: str                  # "mqtt" or "http"
    topic: str | None = None
    received: float = field(default_factory=time.time)
    decoded: tuple[list[DecodedSample], list[Refusal]] | None = None
    ack: tuple[int, int] | None = None        # (connection, message id): acknowledge once in the synced log
    durable: threading.Event | None = None    # set once the message is in the synced log (HTTP waits on it)
    redelivered: bool = False                 # the broker's DUP flag: it may have sent this one before
    reading: TagReading | Refusal | None = None   # a tag message decoded by the ingest process already


@dataclass(frozen=True)
class DeadLetter:
    """A refused message or sample, with its reason, for the dead-letter topic."""

    reason: RefusalReason
    detail: str
    channel: str | None
    topic: str | None
    source: str
    index: int | None
    payload: bytes

    def to_json(self, excerpt: int = 2048) -> bytes:
        """Reason and context, with at most ``excerpt`` bytes of the payload (as text, replaced if not UTF-8)."""
        body = {"reason": self.reason, "detail": self.detail, "channel": self.channel, "topic": self.topic,
                "source": self.source, "index": self.index,
                "payload": self.payload[:excerpt].decode("utf-8", errors="replace"),
                "truncated": len(self.payload) > excerpt}
        return json.dumps(body).encode()
