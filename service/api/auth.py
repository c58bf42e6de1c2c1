"""Who may do what through the API: bearer tokens, roles, and the FastAPI dependencies that check them.

Permissions by role (a role is a set of permissions, not a rank):

============  =====  ======  =======  =========
role          read   ingest  operate  configure
============  =====  ======  =======  =========
viewer        yes
source        yes    yes
operator      yes            yes
engineer      yes    yes     yes      yes
============  =====  ======  =======  =========

*ingest* posts samples, *operate* acknowledges, shelves, removes and restores
alarms, *configure* learns or sets baselines and resets channels. Without a
token a request is 401 (``WWW-Authenticate: Bearer``); with a token that lacks
the permission, 403. A presented token is hashed and compared with every
configured hash in constant time; the token itself is never logged or kept.

Each route's dependency (``Access.needs``) decides 401 or 403. FastAPI decodes
a JSON body before it runs dependencies, so :class:`WriteGate` sits in front:
a write without a valid token is answered 401 before a byte of its body is
read, whatever the body holds.
"""

from __future__ import annotations

import hashlib
import hmac
import secrets
from collections.abc import Callable
from dataclasses import dataclass
from typing import Literal

from fastapi import Depends, HTTPException, Request
from fastapi.security import HTTPAuthorizationCredentials, HTTPBearer
from starlette.responses import JSONResponse
from starlette.types import ASGIApp, Receive, Scope, Send

from service.config.token_settings import AuthConfig

__all__ = ["PERMISSIONS", "Access", "Permission", "Principal", "WriteGate", "new_token", "requires", "token_digest"]

Permission = Literal["read", "ingest", "operate", "configure"]
PERMISSIONS: dict[str, frozenset[str]] = {
    "viewer": frozenset({"read"}),
    "source": frozenset({"read", "ingest"}),
    "operator": frozenset({"read", "operate"}),
    "engineer": frozenset({"read", "ingest", "operate", "configure"}),
}
_TOKEN_PREFIX = "rwls_"
_MAX_TOKEN_CHARS = 256          # anything longer is no token of ours; not worth hashing


def token_digest(token: str) -> str:
    """The hex SHA-256 kept in the configuration for ``token``."""
    return hashlib.sha256(token.encode("utf-8", "surrogatepass")).hexdigest()


def new_token() -> str:
    """A fresh token: 256 random bits, URL-safe, with a prefix that secret scanners can match."""
    return _TOKEN_PREFIX + secrets.token_urlsafe(32)


@dataclass(frozen=True)
class Principal:
    """The holder of a verified token (or the anonymous reader when reads are open)."""

    name: str
    role: str
    permissions: frozenset[str]


ANONYMOUS = Principal("anonymous", "none", frozenset({"read"}))
_BEARER = Depends(HTTPBearer(auto_error=False, description="an rwls API token (`rwls token` makes one)"))


def _unauthorized(error: str | None, detail: str) -> HTTPException:
    # RFC 6750 section 3: the challenge names the scheme, and the error when a token was presented.
    challenge = "Bearer" if error is None else f'Bearer error="{error}"'
    return HTTPException(status_code=401, detail=detail, headers={"WWW-Authenticate": challenge})


class Access:
    """Token verification for one configuration: who holds a token, and what they may do."""

    def __init__(self, config: AuthConfig) -> None:
        self.reads_open = config.reads == "open"
        self._tokens = [(bytes.fromhex(t.sha256), Principal(t.name, t.role, PERMISSIONS[t.role]))
                        for t in config.tokens]

    def verify(self, token: str) -> Principal | None:
        """The holder of ``token``, or None. Every configured hash is compared, in constant time each."""
        if len(token) > _MAX_TOKEN_CHARS:
            return None
        presented = hashlib.sha256(token.encode("utf-8", "surrogatepass")).digest()
        found = None
        for digest, principal in self._tokens:
            if hmac.compare_digest(presented, digest):
                found = principal            # no early exit: the time does not tell which one matched
        return found

    def identify(self, credentials: HTTPAuthorizationCredentials | None) -> Principal | None:
        """The principal behind an Authorization header; None when none was sent; 401 for a bad token."""
        if credentials is None:
            return None
        principal = self.verify(credentials.credentials)
        if principal is None:
            raise _unauthorized("invalid_token", "invalid token")
        return principal

    def authorize(self, permission: Permission, credentials: HTTPAuthorizationCredentials | None) -> Principal:
        """The principal allowed ``permission``; 401 without a (valid) token, 403 for a role without it."""
        principal = self.identify(credentials)
        if principal is None:
            if permission == "read" and self.reads_open:
                return ANONYMOUS
            raise _unauthorized(None, "token required")
        if permission not in principal.permissions:
            allowed = " or ".join(role for role, granted in PERMISSIONS.items() if permission in granted)
            raise HTTPException(status_code=403, detail=f"forbidden: {permission} needs the role {allowed}")
        return principal


def requires(permission: Permission) -> Callable[..., Principal]:
    """A FastAPI dependency: the caller, allowed ``permission`` by the app's :class:`Access` (``app.state.access``)."""

    def check(request: Request, credentials: HTTPAuthorizationCredentials | None = _BEARER) -> Principal:
        access: Access = request.app.state.access
        return access.authorize(permission, credentials)

    return check


_READ_METHODS = frozenset({"GET", "HEAD", "OPTIONS"})


def _bearer_token(scope: Scope) -> str | None:
    for name, value in scope.get("headers", ()):
        if name == b"authorization":
            scheme, _, token = value.decode("latin-1").partition(" ")
            return token.strip() if scheme.lower() == "bearer" and token.strip() else None
    return None


class WriteGate:
    """ASGI middleware: any request but GET, HEAD and OPTIONS needs a valid bearer token, checked first."""

    def __init__(self, app: ASGIApp, access: Access) -> None:
        self.app = app
        self.access = access

    async def __call__(self, scope: Scope, receive: Receive, send: Send) -> None:
        if scope["type"] == "http" and scope["method"] not in _READ_METHODS:
            token = _bearer_token(scope)
            refusal = (_unauthorized(None, "token required") if token is None
                       else _unauthorized("invalid_token", "invalid token") if self.access.verify(token) is None
                       else None)
            if refusal is not None:
                response = JSONResponse({"detail": refusal.detail}, status_code=401, headers=refusal.headers)
                await response(scope, receive, send)
                return
        await self.app(scope, receive, send)
