"""MQTT brokers for the tests (loopback only, every wait bounded).

- :func:`probe_mqtt`: does ``host:port`` answer an MQTT 3.1.1 CONNECT with "accepted"?
- :class:`PrivateMosquitto`: a Mosquitto process of our own on a free port with a temporary config, started
  and stopped by PID, restartable on the same port and persistence directory;
  :func:`start_private_mosquitto` retries on a new port when another process took the one picked.
- :class:`BrokerInfo`: where the session's broker listens and what it is (``tests/support/fixtures.py``
  chooses it).
"""

from __future__ import annotations

import contextlib
import os
import shutil
import signal
import socket
import struct
import subprocess
import time
from collections.abc import Iterable
from dataclasses import dataclass
from pathlib import Path
from typing import Any

from tests.support.addresses import LOOPBACK, free_port, require_loopback, unique_client_id
from tests.support.child_processes import signal_and_wait

__all__ = ["BrokerInfo", "PrivateMosquitto", "connect_packet", "find_mosquitto", "mosquitto_version", "probe_mqtt",
           "start_private_mosquitto", "wait_for_mqtt", "wait_for_port"]


# ---------------------------------------------------------------------------------------------------------
# a raw MQTT CONNECT probe (no paho thread, no callbacks)


def connect_packet(client_id: str, keepalive: int = 5) -> bytes:
    cid = client_id.encode()
    variable = b"\x00\x04MQTT" + bytes([4, 0x02]) + struct.pack("!H", keepalive)  # 3.1.1, clean session
    payload = struct.pack("!H", len(cid)) + cid
    remaining = len(variable) + len(payload)
    assert remaining < 128  # one length byte is enough for a probe
    return bytes([0x10, remaining]) + variable + payload


def probe_mqtt(host: str = LOOPBACK, port: int = 1883, timeout: float = 2.0) -> bool:
    """True when ``host:port`` accepts an MQTT 3.1.1 CONNECT (CONNACK return code 0) within ``timeout``."""
    require_loopback(host)
    try:
        with socket.create_connection((host, port), timeout=timeout) as sock:
            sock.settimeout(timeout)
            sock.sendall(connect_packet(unique_client_id("probe")))
            reply = b""
            deadline = time.monotonic() + timeout
            while len(reply) < 4 and time.monotonic() < deadline:
                chunk = sock.recv(4 - len(reply))
                if not chunk:
                    break
                reply += chunk
            ok = len(reply) == 4 and reply[0] == 0x20 and reply[1] == 0x02 and reply[3] == 0
            if ok:
                with contextlib.suppress(OSError):
                    sock.sendall(b"\xe0\x00")  # DISCONNECT
            return ok
    except OSError:
        return False


def wait_for_mqtt(host: str, port: int, timeout: float, alive: Any = None) -> bool:
    """Probe until the broker answers or ``timeout`` passes; stop early when ``alive()`` turns False."""
    deadline = time.monotonic() + timeout
    while time.monotonic() < deadline:
        if probe_mqtt(host, port, timeout=min(1.0, max(0.05, deadline - time.monotonic()))):
            return True
        if alive is not None and not alive():
            return False
        time.sleep(0.05)
    return False


def wait_for_port(host: str, port: int, timeout: float, alive: Any = None) -> bool:
    """Until ``host:port`` accepts a TCP connection (a TLS listener, which a plain CONNECT cannot probe)."""
    require_loopback(host)
    deadline = time.monotonic() + timeout
    while time.monotonic() < deadline:
        try:
            with socket.create_connection((host, port), timeout=0.5):
                return True
        except OSError:
            pass
        if alive is not None and not alive():
            return False
        time.sleep(0.05)
    return False


# ---------------------------------------------------------------------------------------------------------
# brokers


@dataclass(frozen=True)
class BrokerInfo:
    """Where the session's broker listens and what it is."""

    host: str
    port: int
    kind: str  # "mosquitto-system", "mosquitto-private" or "embedded"

    @property
    def url(self) -> str:
        return f"mqtt://{self.host}:{self.port}"


def find_mosquitto() -> str | None:
    """The ``mosquitto`` binary: on PATH, or in the sbin folders a non-root PATH may lack."""
    found = shutil.which("mosquitto")
    if found:
        return found
    for folder in ("/usr/sbin", "/usr/local/sbin"):
        candidate = Path(folder) / "mosquitto"
        if candidate.is_file() and os.access(candidate, os.X_OK):
            return str(candidate)
    return None


def mosquitto_version(binary: str) -> str:
    """``"mosquitto version 2.0.11"`` or ``""``."""
    try:
        out = subprocess.run([binary, "-h"], capture_output=True, text=True, timeout=5, check=False)
    except (OSError, subprocess.TimeoutExpired):
        return ""
    return (out.stdout or out.stderr).splitlines()[0].strip() if (out.stdout or out.stderr) else ""


class PrivateMosquitto:
    """A Mosquitto of our own on 127.0.0.1:``port`` with its config, log and persistence under ``workdir``.

    Started and stopped by PID only. :meth:`stop` sends SIGTERM (Mosquitto then writes its persistence file)
    and waits; :meth:`kill` sends SIGKILL (nothing is saved since the last autosave); :meth:`start` after
    either restarts it on the same port with the same persistence directory.
    """

    kind = "mosquitto-private"
    host = LOOPBACK

    def __init__(
        self,
        binary: str,
        workdir: Path,
        *,
        port: int | None = None,
        persistence: bool = True,
        max_queued_messages: int | None = 100_000,
        extra_config: Iterable[str] = (),
        allow_anonymous: bool = True,
        tls: bool = False,
        start_timeout: float = 10.0,
        stop_timeout: float = 10.0,
    ) -> None:
        self.binary = binary
        self.workdir = Path(workdir)
        self.workdir.mkdir(parents=True, exist_ok=True)
        self.port = port if port is not None else free_port()
        self.persistence = persistence
        self.max_queued_messages = max_queued_messages
        self.extra_config = list(extra_config)
        self.allow_anonymous = allow_anonymous
        self.tls = tls              # the listener speaks TLS: readiness is a TCP accept, not a plain CONNECT
        self.start_timeout = start_timeout
        self.stop_timeout = stop_timeout
        self.config_path = self.workdir / "mosquitto.conf"
        self.log_path = self.workdir / "mosquitto.log"
        self.persistence_dir = self.workdir / "data"
        self._proc: subprocess.Popen[bytes] | None = None
        self._write_config()

    @property
    def url(self) -> str:
        return f"{'mqtts' if self.tls else 'mqtt'}://{self.host}:{self.port}"

    @property
    def pid(self) -> int | None:
        return self._proc.pid if self._proc is not None else None

    @property
    def running(self) -> bool:
        return self._proc is not None and self._proc.poll() is None

    def _write_config(self) -> None:
        lines = [
            "# written by tests/support/mqtt_brokers.py",
            f"listener {self.port} {LOOPBACK}",
            f"allow_anonymous {'true' if self.allow_anonymous else 'false'}",
            "log_dest stderr",
            "log_type error",
            "log_type warning",
            "log_type notice",
            "log_type information",
            "log_timestamp true",
        ]
        if os.geteuid() == 0:
            # As root Mosquitto would switch to the "mosquitto" user, which cannot write under a root-only
            # temporary folder; "root" tells it to keep the current user.
            lines.append("user root")
        if self.persistence:
            self.persistence_dir.mkdir(parents=True, exist_ok=True)
            lines += ["persistence true", f"persistence_location {self.persistence_dir}/",
                      "persistence_file mosquitto.db"]
        else:
            lines.append("persistence false")
        if self.max_queued_messages is not None:
            lines.append(f"max_queued_messages {self.max_queued_messages}")
        lines += self.extra_config
        self.config_path.write_text("\n".join(lines) + "\n")

    def log_tail(self, n: int = 30) -> str:
        try:
            return "\n".join(self.log_path.read_text(errors="replace").splitlines()[-n:])
        except OSError:
            return "(no log)"

    def start(self) -> PrivateMosquitto:
        """Start (or restart) the process and wait until it answers an MQTT CONNECT; raise if it does not."""
        if self.running:
            raise RuntimeError(f"private mosquitto already running (pid {self.pid})")
        with self.log_path.open("ab") as log:
            self._proc = subprocess.Popen(  # a fixed binary and a config file we wrote
                [self.binary, "-c", str(self.config_path)],
                stdin=subprocess.DEVNULL, stdout=log, stderr=subprocess.STDOUT,
            )
        wait = wait_for_port if self.tls else wait_for_mqtt
        if not wait(self.host, self.port, self.start_timeout, alive=lambda: self.running):
            rc = self._proc.poll()
            self._terminate(signal.SIGKILL)
            raise RuntimeError(
                f"private mosquitto on port {self.port} did not come up within {self.start_timeout} s "
                f"(exit code {rc}); log:\n{self.log_tail()}")
        return self

    def stop(self) -> None:
        """SIGTERM by PID, wait at most ``stop_timeout`` s, then SIGKILL. Safe to call when stopped."""
        self._terminate(signal.SIGTERM)

    def kill(self) -> None:
        """SIGKILL by PID (no persistence save), then wait."""
        self._terminate(signal.SIGKILL)

    def _terminate(self, sig: signal.Signals) -> None:
        if self._proc is not None:
            signal_and_wait(self._proc, sig, self.stop_timeout)
        self._proc = None


def start_private_mosquitto(binary: str, workdir: Path, attempts: int = 3, **kwargs: Any) -> PrivateMosquitto:
    """Start a private Mosquitto; retry on a new free port if another process took the one we picked."""
    error: Exception | None = None
    for attempt in range(attempts):
        broker = PrivateMosquitto(binary, workdir / f"try{attempt}", **kwargs)
        try:
            return broker.start()
        except RuntimeError as exc:
            error = exc
    raise RuntimeError(f"could not start a private mosquitto in {attempts} attempts") from error
