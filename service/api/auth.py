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
A token past its ``expires`` is refused (401, saying it expired). A client
address that presents too many wrong tokens is answered 429 for a while
(:mod:`service.api.throttle`).

Each route's dependency (``Access.needs``) decides 401 or 403. FastAPI decodes
a JSON body before it runs dependencies, so :class:`WriteGate` sits in front:
a write without a valid token is answered 401 before a byte of its body is
read, whatever the body holds.
"""

from __future__ import annotations

import hashlib
import hmac
import secrets
import time
from collections.abc import Callable
from dataclasses import dataclass
from datetime import UTC, datetime
from typing import Literal

from fastapi import Depends, HTTPException, Request
from fastapi.security import HTTPAuthorizationCredentials, HTTPBearer
from starlette.responses import JSONResponse
from starlette.types import ASGIApp, Receive, Scope, Send

from service.api.throttle import AuthThrottle
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


def _throttled(seconds: float) -> HTTPException:
    return HTTPException(status_code=429, detail="too many invalid tokens from this address: retry later",
                         headers={"Retry-After": AuthThrottle.header(seconds)})


def _iso(epoch: float) -> str:
    return datetime.fromtimestamp(epoch, UTC).isoformat().replace("+00:00", "Z")


class Access:
    """Token verification for one configuration: who holds a token, until when, and what they may do.

    Parameters
    ----------
    config : the ``[auth]`` table
    throttle : failed authentications per client address (None: never throttled)
    clock : seconds since the epoch (a token's end is compared with it)
    """

    def __init__(self, config: AuthConfig, throttle: AuthThrottle | None = None, *,
                 clock: Callable[[], float] = time.time) -> None:
        self.reads_open = config.reads == "open"
        self.throttle = throttle
        self.expiry_warning_seconds = config.expiry_warning_days * 86400.0
        self._clock = clock
        self._tokens = [(bytes.fromhex(t.sha256), Principal(t.name, t.role, PERMISSIONS[t.role]),
                         None if t.expires is None else t.expires.timestamp()) for t in config.tokens]
        self.expired_total = 0               # expired tokens presented

    def _match(self, token: str) -> tuple[Principal, float | None] | None:
        """The holder of ``token`` and its end (epoch seconds), expired or not. Every configured hash is
        compared, in constant time each."""
        if len(token) > _MAX_TOKEN_CHARS:
            return None
        presented = hashlib.sha256(token.encode("utf-8", "surrogatepass")).digest()
        found = None
        for digest, principal, expires in self._tokens:
            if hmac.compare_digest(presented, digest):
                found = principal, expires   # no early exit: the time does not tell which one matched
        return found

    def verify(self, token: str) -> Principal | None:
        """The holder of ``token`` while it has not expired, or None."""
        found = self._match(token)
        if found is None or (found[1] is not None and found[1] <= self._clock()):
            return None
        return found[0]

    def authenticate(self, token: str, address: str | None) -> Principal:
        """The holder of ``token`` presented from client ``address``.

        Raises
        ------
        HTTPException
            429 with ``Retry-After`` while ``address`` is throttled (the token is not checked); 401 for a
            token that is not one of ours (counted against ``address``) or one that has expired.
        """
        where = address or "unknown"
        if self.throttle is not None:
            wait = self.throttle.retry_after(where)
            if wait is not None:
                raise _throttled(wait)
        found = self._match(token)
        if found is None:
            if self.throttle is not None:
                self.throttle.failed(where)
            raise _unauthorized("invalid_token", "invalid token")
        principal, expires = found
        if expires is not None and expires <= self._clock():
            self.expired_total += 1
            raise _unauthorized("invalid_token", f"token expired at {_iso(expires)}: ask for a new one "
                                                 f"(`rwls token`)")
        return principal

    def expiring(self) -> list[dict[str, object]]:
        """Tokens that end within the warning period (or have ended), soonest first: name, end, expired."""
        now = self._clock()
        soon = sorted((expires, principal.name) for _, principal, expires in self._tokens
                      if expires is not None and expires - now <= self.expiry_warning_seconds)
        return [{"name": name, "expires": _iso(expires), "expired": expires <= now} for expires, name in soon]

    def identify(self, credentials: HTTPAuthorizationCredentials | None, address: str | None = None
                 ) -> Principal | None:
        """The principal behind an Authorization header; None when none was sent; 401 for a bad token, 429
        while ``address`` is throttled."""
        if credentials is None:
            return None
        return self.authenticate(credentials.credentials, address)

    def authorize(self, permission: Permission, credentials: HTTPAuthorizationCredentials | None,
                  address: str | None = None) -> Principal:
        """The principal allowed ``permission``; 401 without a (valid) token, 403 for a role without it, 429
        while ``address`` is throttled."""
        principal = self.identify(credentials, address)
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
        return access.authorize(permission, credentials, None if request.client is None else request.client.host)

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
            refusal = _unauthorized(None, "token required") if token is None else None
            if token is not None:
                client = scope.get("client")
                try:
                    self.access.authenticate(token, None if client is None else client[0])
                except HTTPException as exc:
                    refusal = exc
            if refusal is not None:
                response = JSONResponse({"detail": refusal.detail}, status_code=refusal.status_code,
                                        headers=refusal.headers)
                await response(scope, receive, send)
                return
        await self.app(scope, receive, send)
