"""Where tests talk: loopback only, free ports, and MQTT names (topic prefixes, client ids) of one test alone."""

from __future__ import annotations

import socket
import uuid
from typing import Protocol
from urllib.parse import urlsplit

__all__ = ["LOOPBACK", "HasHostPort", "Target", "free_port", "host_port", "require_loopback", "unique_client_id",
           "unique_topic_prefix"]

LOOPBACK = "127.0.0.1"
LOOPBACK_NAMES = {"127.0.0.1", "localhost", "::1"}


class HasHostPort(Protocol):
    @property
    def host(self) -> str: ...

    @property
    def port(self) -> int: ...


Target = str | int | HasHostPort


def require_loopback(host: str) -> None:
    """Refuse any host but loopback: the tests talk to nothing else."""
    if host not in LOOPBACK_NAMES:
        raise ValueError(f"integration tests only talk to loopback, not {host!r}")


def unique_client_id(name: str) -> str:
    """A client id unique to this call, at most 23 characters (the MQTT 3.1.1 limit a server must accept)."""
    stem = "".join(ch for ch in name if ch.isalnum() or ch in "-_")[:10] or "c"
    return f"{stem}-{uuid.uuid4().hex[:12]}"


def unique_topic_prefix() -> str:
    return f"rwls-test/{uuid.uuid4().hex}"


def host_port(target: Target) -> tuple[str, int]:
    """``1883``, ``"mqtt://127.0.0.1:1883"`` or an object with ``host`` and ``port`` -> ``(host, port)``.

    Only loopback addresses are accepted: the tests talk to nothing else.
    """
    if isinstance(target, int):
        host, port = LOOPBACK, target
    elif isinstance(target, str):
        parts = urlsplit(target if "://" in target else f"mqtt://{target}")
        if parts.scheme not in ("mqtt", "tcp") or parts.port is None:
            raise ValueError(f"expected mqtt://host:port, got {target!r}")
        host, port = parts.hostname or LOOPBACK, parts.port
    else:
        host, port = target.host, int(target.port)
    require_loopback(host)
    return host, port


def free_port() -> int:
    """A TCP port on 127.0.0.1 that was free a moment ago."""
    with socket.socket(socket.AF_INET, socket.SOCK_STREAM) as sock:
        sock.bind((LOOPBACK, 0))
        return int(sock.getsockname()[1])
