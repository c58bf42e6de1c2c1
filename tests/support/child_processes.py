"""Child processes of the tests: the environment a service child gets, and ending one by its PID only, with a
bounded wait."""

from __future__ import annotations

import contextlib
import os
import signal
import subprocess
from typing import Any

__all__ = ["service_environment", "signal_and_wait"]

TEST_SETTINGS = "RWLS_TEST_"        # the tests' own variables (which broker, which PostgreSQL)


def service_environment() -> dict[str, str]:
    """This process's environment for an ``rwls`` child, without the tests' own ``RWLS_TEST_*`` variables: the
    service reads every ``RWLS_*`` variable as a configuration key and would refuse ``test_broker``."""
    env = {name: value for name, value in os.environ.items() if not name.startswith(TEST_SETTINGS)}
    env["PYTHONUNBUFFERED"] = "1"
    return env


def signal_and_wait(proc: subprocess.Popen[Any], sig: signal.Signals, timeout: float) -> None:
    """Send ``sig`` to a child of ours by PID and wait ``timeout`` s for it, then SIGKILL and wait again."""
    if proc.poll() is not None:
        return
    with contextlib.suppress(ProcessLookupError):
        os.kill(proc.pid, sig)
    try:
        proc.wait(timeout=timeout)
    except subprocess.TimeoutExpired:
        with contextlib.suppress(ProcessLookupError):
            os.kill(proc.pid, signal.SIGKILL)
        proc.wait(timeout=max(timeout, 10.0))
