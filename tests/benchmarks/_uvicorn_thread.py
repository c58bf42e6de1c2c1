"""The service's FastAPI app behind real HTTP: uvicorn on a free 127.0.0.1 port, in a thread of this process."""

from __future__ import annotations

import threading
import time

import fastapi
import uvicorn

from tests.support.addresses import LOOPBACK, free_port

__all__ = ["UvicornThread"]


class UvicornThread:
    """The FastAPI app served by uvicorn on a free 127.0.0.1 port, in a thread of this process."""

    def __init__(self, app: fastapi.FastAPI) -> None:
        self.port = free_port()
        config = uvicorn.Config(app, host=LOOPBACK, port=self.port, log_level="warning", access_log=False,
                                lifespan="off", ws="none", http="h11", loop="asyncio")
        self.server = uvicorn.Server(config)
        self.thread = threading.Thread(target=self.server.run, name="bench-uvicorn", daemon=True)

    @property
    def url(self) -> str:
        return f"http://{LOOPBACK}:{self.port}"

    def __enter__(self) -> UvicornThread:
        self.thread.start()
        deadline = time.monotonic() + 10.0
        while not self.server.started and time.monotonic() < deadline and self.thread.is_alive():
            time.sleep(0.01)
        if not self.server.started:
            self.__exit__()
            raise RuntimeError("uvicorn did not start")
        return self

    def __exit__(self, *_exc: object) -> None:
        self.server.should_exit = True
        self.thread.join(10.0)
