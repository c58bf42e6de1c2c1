"""Throttled guessing: after a few failed authentications from one client address, that address waits.

An address that presents ``failures`` wrong tokens within ``window`` seconds is blocked: every further
attempt to authenticate from it is answered 429 with ``Retry-After`` until the block ends, without the
token being checked. The first block lasts ``block`` seconds; each further one of the same address twice
the one before, up to ``block_max`` (common practice: exponential back-off). An address forgets its
earlier blocks after ``block_max`` seconds without a failure. Other addresses are not affected.

Tokens are 256 random bits, so throttling is not what keeps them from being guessed; it keeps a guesser
from spending the service's time, and makes one visible in ``/metrics`` and in the log (the address, never
the presented token). Behind a reverse proxy every client has the proxy's address: there the proxy
throttles (see deploy/README.md).

The table of addresses is bounded (``max_addresses``, oldest first out); its methods may be called from
several threads (the API's thread pool) and from the event loop.
"""

from __future__ import annotations

import logging
import math
import threading
import time
from collections import OrderedDict, deque
from collections.abc import Callable
from dataclasses import dataclass, field

__all__ = ["AuthThrottle"]

log = logging.getLogger(__name__)


@dataclass
class _Address:
    failures: deque[float] = field(default_factory=deque)   # times of recent failures, oldest first
    blocks: int = 0                                        # blocks so far, not yet forgiven
    blocked_until: float = 0.0
    last_failure: float = 0.0


class AuthThrottle:
    """Failed authentications per client address, and the blocks they earn.

    Parameters
    ----------
    failures : failed attempts within ``window`` that block an address
    window : seconds
    block : seconds of the first block
    block_max : seconds of the longest block
    clock : seconds, monotonic
    max_addresses : addresses remembered at most
    """

    def __init__(self, failures: int, window: float, block: float, block_max: float, *,
                 clock: Callable[[], float] = time.monotonic, max_addresses: int = 10_000) -> None:
        if failures < 1 or window <= 0.0 or block <= 0.0 or block_max < block:
            raise ValueError(f"need failures >= 1, window > 0, 0 < block <= block_max, got {failures}, {window}, "
                             f"{block}, {block_max}")
        self.failures = failures
        self.window = window
        self.block = block
        self.block_max = block_max
        self._clock = clock
        self._max_addresses = max_addresses
        self._addresses: OrderedDict[str, _Address] = OrderedDict()
        self._lock = threading.Lock()
        self.failed_total = 0          # wrong tokens presented
        self.throttled_total = 0       # attempts answered 429
        self.blocks_total = 0          # blocks begun

    def retry_after(self, address: str) -> float | None:
        """Seconds ``address`` must still wait, or None when it may try; a refusal is counted."""
        now = self._clock()
        with self._lock:
            record = self._addresses.get(address)
            if record is None or record.blocked_until <= now:
                return None
            self.throttled_total += 1
            return record.blocked_until - now

    def failed(self, address: str) -> None:
        """Count a failed authentication from ``address``; block it when it has failed too often."""
        now = self._clock()
        with self._lock:
            record = self._addresses.pop(address, None) or _Address()
            self._addresses[address] = record                       # most recently seen last
            while len(self._addresses) > self._max_addresses:
                self._addresses.popitem(last=False)
            if record.blocks and now - max(record.last_failure, record.blocked_until) > self.block_max:
                record.blocks = 0                                   # quiet long enough: forgiven
            record.last_failure = now
            self.failed_total += 1
            while record.failures and record.failures[0] <= now - self.window:
                record.failures.popleft()
            record.failures.append(now)
            if len(record.failures) < self.failures:
                return
            seconds = min(self.block * 2.0 ** record.blocks, self.block_max)
            record.blocks += 1
            record.blocked_until = now + seconds
            record.failures.clear()
            self.blocks_total += 1
        log.warning("authentication throttled: client %s presented %d invalid tokens within %g s; blocked for "
                    "%g s (block %d)", address, self.failures, self.window, seconds, record.blocks)

    def blocked(self) -> int:
        """Addresses blocked now."""
        now = self._clock()
        with self._lock:
            return sum(1 for record in self._addresses.values() if record.blocked_until > now)

    @staticmethod
    def header(seconds: float) -> str:
        """``Retry-After`` for a wait of ``seconds``: whole seconds, rounded up (RFC 9110 section 10.2.3)."""
        return str(max(1, math.ceil(seconds)))
