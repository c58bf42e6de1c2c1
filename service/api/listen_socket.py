"""The HTTP listening socket, bound before anything else starts, with a one-line answer when the port is taken."""

from __future__ import annotations

import errno
import socket

__all__ = ["PortUnavailable", "bind_listener"]


class PortUnavailable(OSError):
    """The HTTP port cannot be bound; the message says which and what to do."""


def bind_listener(host: str, port: int, *, setting: str = "http.port") -> socket.socket:
    """A TCP socket bound to ``host:port`` (``port`` 0: any free port), not yet listening.

    Raises
    ------
    PortUnavailable
        The address is in use or cannot be bound here, with a message naming the port and the fixes
        (``--port 0`` picks any free port; ``setting`` is the configuration key).
    """
    family = socket.AF_INET6 if ":" in host else socket.AF_INET
    sock = socket.socket(family, socket.SOCK_STREAM)
    sock.setsockopt(socket.SOL_SOCKET, socket.SO_REUSEADDR, 1)
    try:
        sock.bind((host, port))
    except OSError as exc:
        sock.close()
        if exc.errno == errno.EADDRINUSE:
            raise PortUnavailable(f"port {port} on {host} is already in use: stop what holds it, or choose "
                                  f"another with --port N (--port 0 picks any free port) or the key "
                                  f"{setting}") from None
        raise PortUnavailable(f"cannot listen on {host}:{port}: {exc.strerror or exc} (choose another address "
                              f"with --host/--port, or the keys http.host and {setting})") from None
    return sock
