"""Ending a child process of the test: by its PID only, with a bounded wait."""

from __future__ import annotations

import contextlib
import os
import signal
import subprocess
from typing import Any

__all__ = ["signal_and_wait"]


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
