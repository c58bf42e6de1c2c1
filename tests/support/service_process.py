"""``rwls serve`` as a child process of the test: started, killed (SIGKILL) and stopped (SIGTERM) by its PID.

The configuration is written as TOML into the process's work folder; the API listens on a free loopback
port, read from the line the service prints once it serves. Its log goes to ``service.log`` there.
"""

from __future__ import annotations

import contextlib
import json
import math
import os
import signal
import subprocess
import sys
import threading
import time
import urllib.error
import urllib.request
from collections.abc import Mapping
from pathlib import Path
from typing import Any

from tests.support.addresses import LOOPBACK
from tests.support.child_processes import service_environment, signal_and_wait

__all__ = ["ServiceProcess", "toml_text"]


def _value(value: Any) -> str:
    if isinstance(value, bool):
        return "true" if value else "false"
    if isinstance(value, int):
        return str(value)
    if isinstance(value, float):
        if not math.isfinite(value):
            raise ValueError(f"TOML here takes finite numbers only, got {value}")
        return repr(value)
    if isinstance(value, str):
        return json.dumps(value)                      # a JSON string is a TOML basic string
    if isinstance(value, list | tuple):
        return "[" + ", ".join(_value(v) for v in value) + "]"
    if isinstance(value, Mapping):
        return "{" + ", ".join(f"{json.dumps(str(k))} = {_value(v)}" for k, v in value.items()) + "}"
    raise TypeError(f"no TOML for {type(value).__name__}")


def toml_text(data: Mapping[str, Any], _path: tuple[str, ...] = ()) -> str:
    """TOML for nested dicts (each a table) of scalars and lists (enough for an rwls settings file)."""
    lines = [f"{json.dumps(str(k))} = {_value(v)}" for k, v in data.items() if not isinstance(v, Mapping)]
    out = "\n".join(lines) + ("\n" if lines else "")
    for key, table in data.items():
        if isinstance(table, Mapping):
            path = (*_path, key)
            out += "\n[" + ".".join(json.dumps(str(p)) for p in path) + "]\n" + toml_text(table, path)
    return out


class ServiceProcess:
    """One ``rwls serve`` at a time under ``workdir``; :meth:`start` again after :meth:`kill` or :meth:`stop`."""

    def __init__(self, config: Mapping[str, Any], workdir: Path, *, start_timeout: float = 30.0,
                 port: int = 0) -> None:
        self.workdir = Path(workdir)
        self.port = port                              # 0: a free one at each start
        self.workdir.mkdir(parents=True, exist_ok=True)
        self.config_path = self.workdir / "rwls.toml"
        self.config_path.write_text(toml_text(config))
        self.log_path = self.workdir / "service.log"
        self.start_timeout = start_timeout
        self.url = ""
        self.starts = 0
        self._proc: subprocess.Popen[str] | None = None

    @property
    def pid(self) -> int | None:
        return None if self._proc is None else self._proc.pid

    def start(self) -> ServiceProcess:
        if self._proc is not None and self._proc.poll() is None:
            raise RuntimeError(f"service already running (pid {self._proc.pid})")
        env = service_environment()
        with self.log_path.open("a") as log:
            self._proc = subprocess.Popen(  # our own interpreter and module, our own config file
                [sys.executable, "-m", "service.cli", "serve", "-c", str(self.config_path),
                 "--host", LOOPBACK, "--port", str(self.port)],
                stdin=subprocess.DEVNULL, stdout=subprocess.PIPE, stderr=log, text=True, env=env)
        found: list[str] = []
        proc = self._proc

        def read() -> None:                           # the first line names the URL; the rest is drained
            assert proc.stdout is not None
            with proc.stdout:                          # closed at EOF: the service and its child are gone
                for line in proc.stdout:
                    if not found and "serving http" in line:
                        found.append(line.split("serving ", 1)[1].split(" ", 1)[0].rstrip("/"))

        threading.Thread(target=read, name="service-stdout", daemon=True).start()
        deadline = time.monotonic() + self.start_timeout
        while not found and time.monotonic() < deadline and proc.poll() is None:
            time.sleep(0.02)
        if not found:
            self.kill()
            raise RuntimeError(f"rwls serve did not start within {self.start_timeout} s; log:\n{self.log_tail()}")
        self.url = found[0]
        self.starts += 1
        return self

    def kill(self) -> None:
        """SIGKILL by PID: no final checkpoint, no goodbye to the broker."""
        self._signal(signal.SIGKILL, 10.0)

    def kill_with_acks_pending(self, settle: float = 0.5) -> None:
        """Freeze the ingest child (SIGSTOP), let the service log what it was handed, then SIGKILL both.

        The child is the one that sends acknowledgements to the broker: what the service logged meanwhile
        is in its input log but never acknowledged, so the broker redelivers it, DUP set, after the restart.
        """
        pid = self.pid
        if pid is None:
            return
        children = _children(pid)
        for child in children:
            with contextlib.suppress(ProcessLookupError):
                os.kill(child, signal.SIGSTOP)
        time.sleep(settle)
        self.kill()
        for child in children:
            with contextlib.suppress(ProcessLookupError):
                os.kill(child, signal.SIGKILL)

    def stop(self, timeout: float = 30.0) -> int | None:
        """SIGTERM by PID (the service takes its final checkpoint), SIGKILL after ``timeout``; the exit code."""
        proc = self._proc
        self._signal(signal.SIGTERM, timeout)
        return None if proc is None else proc.returncode

    def _signal(self, sig: signal.Signals, timeout: float) -> None:
        if self._proc is not None:
            signal_and_wait(self._proc, sig, timeout)
        self._proc = None

    def get(self, path: str, timeout: float = 5.0) -> Any:
        """GET ``path`` from the service's API and parse the JSON (any status)."""
        try:
            with urllib.request.urlopen(self.url + path, timeout=timeout) as response:
                return json.loads(response.read())
        except urllib.error.HTTPError as exc:
            return json.loads(exc.read())

    def wait_subscribed(self, timeout: float = 30.0) -> None:
        """Wait until ``/ready`` says the broker acknowledged the service's subscriptions (SUBACK): what is
        published after this reaches it."""
        deadline = time.monotonic() + timeout
        while time.monotonic() < deadline:
            with contextlib.suppress(OSError, KeyError, TypeError, ValueError):
                if self.get("/api/v1/ready")["broker"]["subscribed"]:
                    return
            time.sleep(0.05)
        raise TimeoutError(f"the service did not connect to its broker in {timeout} s:\n{self.log_tail()}")

    def metrics_text(self, timeout: float = 5.0) -> str:
        """``/metrics`` as the service serves it (Prometheus text format)."""
        with urllib.request.urlopen(self.url + "/metrics", timeout=timeout) as response:
            return str(response.read().decode())

    def metric(self, name: str, timeout: float = 5.0) -> float:
        """One unlabelled sample of ``/metrics``; KeyError when it is not there."""
        for line in self.metrics_text(timeout).splitlines():
            if line.startswith(name + " "):
                return float(line.split()[1])
        raise KeyError(name)

    def rss_bytes(self) -> int:
        """Resident memory of the service and its ingest child (from /proc)."""
        pid = self.pid
        if pid is None:
            return 0
        total = 0
        for p in [pid, *_children(pid)]:
            with contextlib.suppress(OSError):
                for line in Path(f"/proc/{p}/status").read_text().splitlines():
                    if line.startswith("VmRSS:"):
                        total += int(line.split()[1]) * 1024
        return total

    def log_tail(self, n: int = 40) -> str:
        try:
            return "\n".join(self.log_path.read_text(errors="replace").splitlines()[-n:])
        except OSError:
            return "(no log)"


def _children(pid: int) -> list[int]:
    found: list[int] = []
    for task in Path(f"/proc/{pid}/task").glob("*"):
        with contextlib.suppress(OSError):
            found += [int(c) for c in (task / "children").read_text().split()]
    return found
