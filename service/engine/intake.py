"""The engine's intake: the one bounded queue through which messages and operations reach the single writer.

It exists before the engine does, so producers (MQTT, HTTP) may queue work while the service is still
starting; the engine takes it from there in order once its thread runs.
"""

from __future__ import annotations

import concurrent.futures
import queue
from dataclasses import dataclass

from service.broker_link.messages import Message
from service.engine.operations import Operation

__all__ = ["Command", "Intake"]


@dataclass(frozen=True)
class Command:
    """An operation queued for the engine thread (the single writer), with a future for its result."""

    operation: Operation[object]
    future: concurrent.futures.Future[object]


class Intake(queue.Queue["Message | Command | None"]):
    """A bounded FIFO of messages, operations (``Command``) and the engine's wake-up (``None``)."""

    def offer(self, message: Message, timeout: float | None = None) -> bool:
        """Queue a message; blocks up to ``timeout`` (None: until there is room). False if still full."""
        try:
            self.put(message, timeout=timeout)
        except queue.Full:
            return False
        return True
