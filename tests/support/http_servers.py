"""The service's HTTP server (``service.api.server.http_server``, as ``rwls serve`` runs it) in a thread of the
test's own process, on a free loopback port, around a runtime without MQTT; stopped when the test ends."""

from __future__ import annotations

import threading
import time
from collections.abc import Iterator, Mapping
from contextlib import contextmanager
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import uvicorn
from fastapi import FastAPI

from service.api.app import create_app
from service.api.listen_socket import bind_listener
from service.api.server import http_server
from service.runtime import Runtime
from tests.support.addresses import LOOPBACK
from tests.support.runtimes import offline_runtime

__all__ = ["RunningServer", "running_server"]


@dataclass
class RunningServer:
    runtime: Runtime
    app: FastAPI
    server: uvicorn.Server
    host: str
    port: int

    @property
    def url(self) -> str:
        scheme = "https" if self.runtime.config.http.tls else "http"
        return f"{scheme}://{self.host}:{self.port}"


@contextmanager
def running_server(channels: Mapping[str, Mapping[str, Any]], store: Path, *, http: Mapping[str, Any],
                   auth: Mapping[str, Any] | None = None, start_timeout: float = 20.0) -> Iterator[RunningServer]:
    """Serve ``channels`` with the ``[http]`` table ``http`` on 127.0.0.1 (a free port) until the block ends."""
    sections: dict[str, Any] = {"http": dict(http)}
    if auth is not None:
        sections["auth"] = dict(auth)
    runtime = offline_runtime(channels, store, **sections)
    app = create_app(runtime)                           # its lifespan starts and stops the runtime
    server = http_server(app, runtime.config, log_level="warning")
    sock = bind_listener(LOOPBACK, 0)
    thread = threading.Thread(target=server.run, kwargs={"sockets": [sock]}, name="http-server", daemon=True)
    thread.start()
    deadline = time.monotonic() + start_timeout
    while not server.started and thread.is_alive() and time.monotonic() < deadline:
        time.sleep(0.01)
    if not server.started:
        server.should_exit = True
        thread.join(10.0)
        raise RuntimeError(f"the HTTP server did not start within {start_timeout} s")
    try:
        yield RunningServer(runtime, app, server, LOOPBACK, sock.getsockname()[1])
    finally:
        server.should_exit = True
        thread.join(15.0)
        sock.close()
