"""API tokens for tests: one fresh token per role each run, and the ``[auth]`` section that admits them."""

from __future__ import annotations

from service.api.auth import new_token, token_digest
from service.config.token_settings import ROLES

__all__ = ["TOKENS", "auth_section", "bearer"]

TOKENS: dict[str, str] = {role: new_token() for role in ROLES}


def auth_section(reads: str = "open") -> dict[str, object]:
    """The ``[auth]`` table: a token named ``test-<role>`` for every role."""
    return {"reads": reads, "tokens": [{"name": f"test-{role}", "role": role, "sha256": token_digest(token)}
                                       for role, token in TOKENS.items()]}


def bearer(role: str) -> dict[str, str]:
    """The Authorization header of the test token with ``role``."""
    return {"Authorization": f"Bearer {TOKENS[role]}"}
