"""API clients in the test's own process: FastAPI's TestClient, carrying a role's test token when asked."""

from __future__ import annotations

import warnings
from typing import TYPE_CHECKING, Any

from tests.support.auth_tokens import bearer

if TYPE_CHECKING:
    from fastapi import FastAPI
    from fastapi.testclient import TestClient

__all__ = ["api_client"]


def api_client(app: FastAPI, role: str | None = None, **options: Any) -> TestClient:
    """A TestClient of ``app`` (``options`` go to it); with ``role``, every request carries the test token of
    that role (``tests/support/auth_tokens.py``). Enter it (``with``) to run the app's lifespan."""
    # Starlette 1.x warns once, at import, that its TestClient prefers httpx2 over httpx; the test extra pins
    # httpx, so that one deprecation is silenced here and nowhere else.
    with warnings.catch_warnings():
        warnings.filterwarnings("ignore", message=r"Using `httpx` with `starlette\.testclient` is deprecated")
        from fastapi.testclient import TestClient
    if role is not None:
        options = {"headers": bearer(role), **options}
    return TestClient(app, **options)
