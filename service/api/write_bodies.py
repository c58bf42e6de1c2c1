"""What the write routes share: their request bodies, who the journal says acted, and their refusals."""

from __future__ import annotations

from typing import Literal

from fastapi.responses import JSONResponse
from pydantic import BaseModel, ConfigDict, Field

from service.api import models
from service.api.auth import Principal
from service.engine.writer import EngineBusy

__all__ = ["ACTION_ERRORS", "AckBody", "BaselineBody", "ShelveBody", "actor", "busy"]


class _Body(BaseModel):
    model_config = ConfigDict(extra="forbid")

    user: str | None = Field(default=None, min_length=1, max_length=128,
                             description="who acts, when the token is shared (journal: '<user> via <token name>')")
    comment: str = Field(default="", max_length=2000)


class AckBody(_Body):
    pass


class ShelveBody(_Body):
    minutes: float = Field(gt=0.0, le=7 * 24 * 60, description="shelved for this long (at most a week)")


class BaselineBody(_Body):
    action: Literal["learn", "set"] = "learn"
    parameters: dict[str, float] | None = Field(default=None, description="set: every term's reference value")
    noise_sigma: float | None = Field(default=None, gt=0.0, description="set: noise sigma, engineering units")


def actor(who: Principal, body: _Body) -> str:
    """The journal's ``user``: the token's holder, and the person behind a shared token when given."""
    return who.name if body.user is None or body.user == who.name else f"{body.user} via {who.name}"


def busy(exc: EngineBusy) -> JSONResponse:
    return JSONResponse({"detail": "busy, retry later", "message": str(exc)}, status_code=503,
                        headers={"Retry-After": "1"})


# Errors of a write: an unreadable or too large body, no token or role, no such alarm or channel, a state it
# does not allow, a body that does not validate, busy.
ACTION_ERRORS = models.errors(400, 401, 403, 404, 409, 413, 422, 503)
