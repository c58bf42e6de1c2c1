"""Security headers on every response, whatever route or refusal produced it.

``X-Content-Type-Options: nosniff`` (a browser never guesses a script out of a JSON body),
frame protection twice (``X-Frame-Options: DENY`` for older browsers and the CSP directive
``frame-ancestors 'none'``: no page of another site can frame the dashboard to click through it),
``Referrer-Policy: no-referrer`` (a URL of the service never leaks to another site), and under TLS
``Strict-Transport-Security`` (a browser that saw HTTPS once never falls back to plain HTTP).

A response that sets a header itself keeps its own value: the dashboard and ``/docs`` carry their own,
stricter Content-Security-Policy; everything else gets ``default-src 'none'; frame-ancestors 'none'``
(a JSON or text body needs to load nothing).
"""

from __future__ import annotations

from starlette.datastructures import MutableHeaders
from starlette.types import ASGIApp, Message, Receive, Scope, Send

__all__ = ["BASELINE_HEADERS", "SecurityHeaders"]

BASELINE_HEADERS: dict[str, str] = {
    "X-Content-Type-Options": "nosniff",
    "X-Frame-Options": "DENY",
    "Referrer-Policy": "no-referrer",
    "Content-Security-Policy": "default-src 'none'; frame-ancestors 'none'",
}


class SecurityHeaders:
    """ASGI middleware adding :data:`BASELINE_HEADERS` (those a response lacks), and HSTS over HTTPS."""

    def __init__(self, app: ASGIApp, hsts_seconds: int = 0) -> None:
        self.app = app
        self.hsts = f"max-age={hsts_seconds}" if hsts_seconds > 0 else None

    async def __call__(self, scope: Scope, receive: Receive, send: Send) -> None:
        if scope["type"] != "http":
            await self.app(scope, receive, send)
            return
        # uvicorn sets the scheme from the transport: "https" only when this connection is TLS.
        hsts = self.hsts if scope.get("scheme") == "https" else None

        async def with_headers(message: Message) -> None:
            if message["type"] == "http.response.start":
                message.setdefault("headers", [])          # optional in ASGI
                headers = MutableHeaders(scope=message)
                for name, value in BASELINE_HEADERS.items():
                    if name not in headers:
                        headers[name] = value
                if hsts is not None:
                    headers["Strict-Transport-Security"] = hsts
            await send(message)

        await self.app(scope, receive, with_headers)
