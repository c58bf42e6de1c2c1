"""The API's outer guards: CORS only for the origins configured, the write gate, a request body limit.

The body limit is a plain ASGI middleware, so it holds for every route and
every way a body arrives: a declared ``Content-Length`` above the limit is
answered 413 before a byte is read, and a body streamed without one is cut off
at the limit. The samples route keeps its own, usually smaller, limit
(``broker.max_payload_bytes``, the MQTT payload contract) and counts its
refusals, so it is left to that route.
"""

from __future__ import annotations

from collections import Counter
from collections.abc import Callable

from fastapi import FastAPI
from starlette.exceptions import HTTPException
from starlette.middleware.cors import CORSMiddleware
from starlette.responses import JSONResponse
from starlette.types import ASGIApp, Message, Receive, Scope, Send

from service.api.auth import Access, WriteGate
from service.config.settings import HttpConfig

__all__ = ["BodyLimit", "add_guards"]

_TOO_LARGE = {"detail": "payload too large"}


def _declared_length(scope: Scope) -> int | None:
    for name, value in scope.get("headers", ()):
        if name == b"content-length":
            # ASCII digits only; 12 digits already exceed any limit we allow, and bound int().
            return int(value[:12]) if value.isdigit() else None
    return None


class BodyLimit:
    """Refuse request bodies longer than ``max_bytes`` with 413 (``exempt(path)``: routes with a limit of their own)."""

    def __init__(self, app: ASGIApp, max_bytes: int, exempt: Callable[[str], bool],
                 refused: Counter[str] | None = None) -> None:
        self.app = app
        self.max_bytes = max_bytes
        self.exempt = exempt
        self.refused = Counter[str]() if refused is None else refused     # "body_too_large" (on the event loop)

    async def __call__(self, scope: Scope, receive: Receive, send: Send) -> None:
        if scope["type"] != "http" or self.exempt(scope["path"]):
            await self.app(scope, receive, send)
            return
        declared = _declared_length(scope)
        if declared is not None and declared > self.max_bytes:
            self.refused["body_too_large"] += 1
            await JSONResponse(_TOO_LARGE, status_code=413)(scope, receive, send)
            return
        seen = 0

        async def counted() -> Message:
            nonlocal seen
            message = await receive()
            if message["type"] == "http.request":
                seen += len(message.get("body", b""))
                if seen > self.max_bytes:
                    self.refused["body_too_large"] += 1
                    # Raised inside the route's body read: FastAPI passes HTTPException through to the
                    # app's handler, which answers with the usual short JSON.
                    raise HTTPException(status_code=413, detail=_TOO_LARGE["detail"])
            return message

        await self.app(scope, counted, send)


def add_guards(app: FastAPI, http: HttpConfig, access: Access, exempt: Callable[[str], bool],
               refused: Counter[str] | None = None) -> None:
    """Install the guards; outermost first: CORS (when ``http.cors_origins`` names any origin; off by default),
    so refusals carry its headers, then the write gate, then the body limit (``exempt``: routes with their own;
    its refusals counted in ``refused``)."""
    app.add_middleware(BodyLimit, max_bytes=http.max_body_bytes, exempt=exempt, refused=refused)
    app.add_middleware(WriteGate, access=access)       # added later runs earlier
    if http.cors_origins:
        app.add_middleware(CORSMiddleware, allow_origins=list(http.cors_origins), allow_methods=["GET", "POST"],
                           allow_headers=["Authorization", "Content-Type"], allow_credentials=False, max_age=600)
