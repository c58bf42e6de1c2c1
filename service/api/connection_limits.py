"""Limits that hold under abuse: open connections (all clients, and per client address), the time a
connection may take to send a request's headers, and open event streams (all, and per address).

Connections are counted at the socket, before a byte of HTTP is read: :func:`limited_protocol` makes
uvicorn's h11 protocol class count them. A connection beyond a cap is answered at once
``503 Service Unavailable`` with ``Retry-After`` and closed (a client that sends its request first reads
the answer); it holds no slot. A connection that has not sent a whole request head within
``header_timeout`` seconds, on opening or after its first byte of a later keep-alive request, is closed:
a client that opens connections and never finishes a request cannot hold descriptors for long. Idle
keep-alive connections between requests are closed by uvicorn's own keep-alive timeout.

Event streams (``GET /api/v1/events``) hold a connection for as long as the client listens, so they have
caps of their own (:class:`Slots`), answered 503 with ``Retry-After`` by the route.

Every cap is a setting of ``[http]`` and every refusal is counted (``/metrics``).
"""

from __future__ import annotations

import asyncio
import logging
import threading
from collections import Counter

import h11
from uvicorn.protocols.http.h11_impl import H11Protocol

__all__ = ["RETRY_AFTER_SECONDS", "ConnectionLimits", "Slots", "limited_protocol"]

log = logging.getLogger(__name__)

RETRY_AFTER_SECONDS = 5        # what a refused client is told to wait; connections turn over in seconds
_REFUSED_LINGER = 1.0          # seconds a refused connection waits for its request before it is closed


class Slots:
    """A count of things held, capped overall and per client address; ``refused`` counts refusals by reason.

    Parameters
    ----------
    limit : held at most, all addresses together
    per_address : held at most by one address
    what : the name a refusal's reason starts with (``connections``: ``connections`` and
        ``connections_per_address``)
    """

    def __init__(self, limit: int, per_address: int, what: str) -> None:
        self.limit = limit
        self.per_address = per_address
        self.what = what
        self._held: Counter[str] = Counter()
        self._total = 0
        self._lock = threading.Lock()
        self.refused: Counter[str] = Counter()
        self.admitted_total = 0

    def take(self, address: str) -> str | None:
        """Hold one slot for ``address``; None when held, else the reason it is refused."""
        with self._lock:
            reason = (self.what if self._total >= self.limit
                      else f"{self.what}_per_address" if self._held[address] >= self.per_address else None)
            if reason is not None:
                self.refused[reason] += 1
                return reason
            self._held[address] += 1
            self._total += 1
            self.admitted_total += 1
            return None

    def give_back(self, address: str) -> None:
        """Release a slot :meth:`take` gave ``address``."""
        with self._lock:
            self._held[address] -= 1
            if self._held[address] <= 0:
                del self._held[address]
            self._total -= 1

    @property
    def held(self) -> int:
        return self._total

    def refusals(self) -> dict[str, int]:
        with self._lock:
            return dict(self.refused)


class ConnectionLimits:
    """The connection caps and the header timeout of one server, and what they did."""

    def __init__(self, max_connections: int, max_per_address: int, header_timeout: float) -> None:
        self.connections = Slots(max_connections, max_per_address, "connections")
        self.header_timeout = header_timeout
        self.header_timeouts = 0       # connections closed for not sending a request head in time


def _refusal(reason: str) -> bytes:
    body = b'{"detail":"too many connections: retry later"}'
    return (b"HTTP/1.1 503 Service Unavailable\r\ncontent-type: application/json\r\n"
            b"retry-after: " + str(RETRY_AFTER_SECONDS).encode() + b"\r\nconnection: close\r\n"
            b"x-content-type-options: nosniff\r\nx-frame-options: DENY\r\nreferrer-policy: no-referrer\r\n"
            b"content-security-policy: default-src 'none'; frame-ancestors 'none'\r\n"
            b"x-rwls-limit: " + reason.encode() + b"\r\ncontent-length: " + str(len(body)).encode() +
            b"\r\n\r\n" + body)


def limited_protocol(limits: ConnectionLimits) -> type[H11Protocol]:
    """uvicorn's h11 protocol class, counting its connections against ``limits`` and timing request heads."""

    class LimitedH11Protocol(H11Protocol):
        _address = ""
        _admitted = False
        _refused = False
        _head_timer: asyncio.TimerHandle | None = None

        def connection_made(self, transport: asyncio.Transport) -> None:  # type: ignore[override]
            super().connection_made(transport)
            self._address = self.client[0] if self.client else "unknown"
            reason = limits.connections.take(self._address)
            if reason is not None:
                self._refused = True
                transport.write(_refusal(reason))
                # Closed once the request arrives (read, so the close sends no reset over the answer) or soon.
                self._head_timer = self.loop.call_later(_REFUSED_LINGER, transport.close)
                return
            self._admitted = True
            self._arm()

        def _arm(self) -> None:
            if self._head_timer is None:
                self._head_timer = self.loop.call_later(limits.header_timeout, self._too_slow)

        def _disarm(self) -> None:
            if self._head_timer is not None:
                self._head_timer.cancel()
                self._head_timer = None

        def _too_slow(self) -> None:
            self._head_timer = None
            limits.header_timeouts += 1
            self.transport.close()

        def data_received(self, data: bytes) -> None:
            if self._refused:
                self._disarm()
                self.transport.close()
                return
            super().data_received(data)
            # h11 stays IDLE on the client's side until a whole request head has arrived.
            if self.conn.their_state is h11.IDLE and not self.transport.is_closing():
                self._arm()
            else:
                self._disarm()

        def connection_lost(self, exc: Exception | None) -> None:
            self._disarm()
            if self._admitted:
                self._admitted = False
                limits.connections.give_back(self._address)
            super().connection_lost(exc)

    return LimitedH11Protocol

