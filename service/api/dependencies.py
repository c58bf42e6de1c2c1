"""What route handlers depend on, as FastAPI dependencies: the running service and the caller's permission.

``create_app`` keeps the runtime (and the token check) on ``app.state``; each router module declares what
its handlers need with these, so a route is a plain function of its inputs, not a closure over a factory.
"""

from __future__ import annotations

from typing import Annotated

from fastapi import Depends, Request

from service.api.auth import Principal, requires
from service.runtime import Runtime

__all__ = ["CONFIGURE", "INGEST", "OPERATE", "READ", "Caller", "Engineer", "Operator", "ServiceRuntime", "Source"]


def _runtime(request: Request) -> Runtime:
    runtime: Runtime = request.app.state.runtime
    return runtime


ServiceRuntime = Annotated[Runtime, Depends(_runtime)]

# Route-level checks (``dependencies=[READ]``) where the handler does not need to know who called.
READ = Depends(requires("read"))
INGEST = Depends(requires("ingest"))
OPERATE = Depends(requires("operate"))
CONFIGURE = Depends(requires("configure"))

# The caller, for handlers that journal who acted.
Caller = Annotated[Principal, READ]
Source = Annotated[Principal, INGEST]
Operator = Annotated[Principal, OPERATE]
Engineer = Annotated[Principal, CONFIGURE]
