"""The HTTP server of ``rwls serve``: uvicorn with TLS when configured, the connection limits, and the
secure-by-default rule.

Under TLS, a connection that never completes its handshake is closed after ``http.header_timeout`` as well.

Secure by default: tokens that may write (any role but ``viewer``) must not cross a network in clear text.
A service holding such tokens that listens beyond loopback without TLS refuses to start, saying how to fix
it, unless ``http.allow_plain_http`` accepts it; then it warns at every start and in ``/api/v1/ready``.

TLS is uvicorn's (Python's ``ssl``): the certificate chain and key of ``[http]``, TLS 1.2 the oldest
version accepted, and with ``http.tls_client_ca_file`` a client certificate signed by that CA required of
every client during the handshake (mutual TLS).
"""

from __future__ import annotations

import asyncio
import asyncio.constants
import logging
import ssl
from collections.abc import Callable

import uvicorn
from fastapi import FastAPI

from service.api.auth import PERMISSIONS
from service.api.connection_limits import ConnectionLimits, limited_protocol
from service.config.http_settings import is_loopback
from service.config.settings import RwlsConfig

__all__ = ["KEEP_ALIVE_SECONDS", "PlainHttpRefused", "http_server", "plain_http_warnings", "tls_context"]

log = logging.getLogger(__name__)

KEEP_ALIVE_SECONDS = 5          # an idle keep-alive connection is closed after this (uvicorn's default)


class PlainHttpRefused(ValueError):
    """The configuration would send write tokens over plain HTTP beyond loopback; the message says the fixes."""


def _write_tokens(config: RwlsConfig) -> list[str]:
    return [t.name for t in config.auth.tokens if PERMISSIONS[t.role] - {"read"}]


def plain_http_warnings(config: RwlsConfig, host: str) -> list[str]:
    """What ``/ready`` and the start-up log warn of: plain HTTP beyond loopback (accepted by the settings).

    Raises
    ------
    PlainHttpRefused
        Write tokens, beyond loopback, without TLS, and ``http.allow_plain_http`` false.
    """
    http = config.http
    if http.tls or is_loopback(host):
        return []
    writers = _write_tokens(config)
    where = f"http.host {host!r} reaches beyond this machine"
    if writers and not http.allow_plain_http:
        raise PlainHttpRefused(
            f"{where}, and tokens that may write ({', '.join(writers[:5])}{' ...' if len(writers) > 5 else ''}) "
            f"would cross the network in clear text. Serve HTTPS (http.tls_cert_file and http.tls_key_file), "
            f"or listen on loopback (http.host = \"127.0.0.1\") behind a reverse proxy that terminates TLS, or "
            f"accept plain HTTP knowingly (http.allow_plain_http = true; warned at every start and in "
            f"/api/v1/ready)")
    if writers:
        return [f"plain HTTP beyond loopback ({host}) with tokens that may write: tokens and writes cross the "
                f"network in clear text (http.allow_plain_http = true); serve HTTPS (http.tls_cert_file)"]
    if config.auth.tokens:
        return [f"plain HTTP beyond loopback ({host}): read tokens cross the network in clear text; serve HTTPS "
                f"(http.tls_cert_file)"]
    return []


def tls_context(config: uvicorn.Config, default: Callable[[], ssl.SSLContext]) -> ssl.SSLContext:
    """uvicorn's SSL context for the settings, no older than TLS 1.2 (``ssl_context_factory``)."""
    context = default()
    context.minimum_version = ssl.TLSVersion.TLSv1_2
    return context


def http_server(app: FastAPI, config: RwlsConfig, *, log_level: str = "info") -> uvicorn.Server:
    """A uvicorn server of ``app`` for ``config.http``, its TLS context loaded (a bad certificate, key or CA
    file raises here, before anything starts: ``ssl.SSLError`` or ``OSError``)."""
    http = config.http
    limits: ConnectionLimits = app.state.connection_limits
    tls: dict[str, object] = {}
    if http.tls:
        # asyncio completes the TLS handshake before the protocol (and its header timeout and caps) sees the
        # connection; a client that never finishes a handshake is bounded by asyncio's handshake timeout
        # (60 s by default), read when each connection is accepted: it gets the header timeout too. Nothing
        # else in the service makes asyncio TLS connections (MQTT, webhooks and fleet reads use their own).
        asyncio.constants.SSL_HANDSHAKE_TIMEOUT = http.header_timeout
        tls = {"ssl_certfile": http.tls_cert_file, "ssl_keyfile": http.tls_key_file,
               "ssl_context_factory": tls_context}
        if http.tls_client_ca_file:
            tls |= {"ssl_ca_certs": http.tls_client_ca_file, "ssl_cert_reqs": ssl.CERT_REQUIRED}
    # Open event streams never end by themselves: shutdown waits at most 3 s for them.
    server_config = uvicorn.Config(app, log_level=log_level, lifespan="on", timeout_graceful_shutdown=3,
                                   http=limited_protocol(limits), timeout_keep_alive=KEEP_ALIVE_SECONDS,
                                   **tls)  # type: ignore[arg-type]
    server_config.load()
    return uvicorn.Server(server_config)
