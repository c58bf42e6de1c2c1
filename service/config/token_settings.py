"""Configuration of API access: ``[auth]`` (tokens and their roles) and who may read.

```toml
[auth]
reads = "open"                 # "token": every read needs a token too (any role)

[[auth.tokens]]
name = "control-room"          # recorded in the alarm journal as the one who acted
role = "operator"              # viewer | source | operator | engineer
sha256 = "9f86d081884c7d65..." # of the token; `rwls token` makes a token and prints this line
expires = 2027-03-05T11:30:00Z # optional (a TOML date-time with its offset); refused from then on
```

``expiry_warning_days`` (default 14) is how long before its end ``/api/v1/ready`` names a token.

Tokens can also come from the environment:
``RWLS_AUTH__TOKENS='[{name="scada", role="viewer", sha256="..."}]'``. Only the
SHA-256 of a token is ever configured or kept: tokens are 256-bit random
strings, so an unsalted fast hash is enough (a password, with little entropy,
would need a slow salted one; these are not passwords).
"""

from __future__ import annotations

import re
from datetime import datetime
from typing import Literal

from pydantic import BaseModel, ConfigDict, Field, field_validator

__all__ = ["ROLES", "AuthConfig", "Role", "TokenConfig"]

Role = Literal["viewer", "source", "operator", "engineer"]
ROLES: tuple[str, ...] = ("viewer", "source", "operator", "engineer")
_SHA256_HEX = re.compile(r"^[0-9a-f]{64}$")
_TOKEN_NAME = re.compile(r"^[A-Za-z0-9_.@-]{1,64}$")


class TokenConfig(BaseModel):
    """One API token: who holds it, what it may do, and the SHA-256 of its text (lowercase hex)."""

    model_config = ConfigDict(extra="forbid", frozen=True, strict=True)

    name: str = Field(description="the holder, as the journal records it")
    role: Role
    sha256: str = Field(description="hex SHA-256 of the token (never the token itself)")
    expires: datetime | None = Field(default=None, description="when the token ends (with its UTC offset)")

    @field_validator("name")
    @classmethod
    def _name(cls, value: str) -> str:
        if not _TOKEN_NAME.match(value):
            raise ValueError("must be 1-64 of A-Z a-z 0-9 _ . @ -")
        return value

    @field_validator("sha256")
    @classmethod
    def _digest(cls, value: str) -> str:
        if not _SHA256_HEX.match(value):
            raise ValueError("must be 64 lowercase hex digits (the SHA-256 of the token; `rwls token` prints it)")
        return value

    @field_validator("expires")
    @classmethod
    def _aware(cls, value: datetime | None) -> datetime | None:
        if value is not None and value.utcoffset() is None:
            raise ValueError("needs its UTC offset, e.g. 2027-03-05T11:30:00Z (a local time is ambiguous)")
        return value


class AuthConfig(BaseModel):
    """``[auth]``: writes always need a token with the right role; reads are open or need a token."""

    model_config = ConfigDict(extra="forbid", frozen=True, strict=True)

    reads: Literal["open", "token"] = Field(default="open", description="token: every read needs a token")
    tokens: tuple[TokenConfig, ...] = ()
    expiry_warning_days: float = Field(default=14.0, ge=0.0, le=3650.0, allow_inf_nan=False,
                                       description="/ready names tokens that end within this many days")

    @field_validator("tokens", mode="before")
    @classmethod
    def _as_tuple(cls, value: object) -> object:
        return tuple(value) if isinstance(value, list) else value

    @field_validator("tokens")
    @classmethod
    def _unique(cls, value: tuple[TokenConfig, ...]) -> tuple[TokenConfig, ...]:
        names = [t.name for t in value]
        if len(set(names)) != len(names):
            raise ValueError("token names must be unique (the journal tells holders apart by name)")
        if len({t.sha256 for t in value}) != len(value):
            raise ValueError("two tokens have the same sha256")
        return value
