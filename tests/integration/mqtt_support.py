"""Brokers and MQTT helpers for the integration tests (loopback only, every wait bounded).

- :func:`probe_mqtt`: does ``host:port`` answer an MQTT 3.1.1 CONNECT with "accepted"?
- :class:`PrivateMosquitto`: a Mosquitto process of our own on a free port with a temporary config, started
  and stopped by PID, restartable on the same port and persistence directory.
- :func:`publish_and_wait`: publish with paho-mqtt 2.x and wait for every PUBACK, with a cap on in-flight
  messages and every return code checked.
- :class:`Collector`: a subscriber that records what arrives (its ``on_message`` never raises).
"""

from __future__ import annotations

import contextlib
import os
import shutil
import signal
import socket
import struct
import subprocess
import threading
import time
import uuid
from collections.abc import Iterable, Sequence
from dataclasses import dataclass
from pathlib import Path
from typing import Any, Protocol
from urllib.parse import urlsplit

import paho.mqtt.client as mqtt
from paho.mqtt.packettypes import PacketTypes
from paho.mqtt.properties import Properties

LOOPBACK = "127.0.0.1"
_LOOPBACK_NAMES = {"127.0.0.1", "localhost", "::1"}


class HasHostPort(Protocol):
    @property
    def host(self) -> str: ...

    @property
    def port(self) -> int: ...


Target = str | int | HasHostPort


# ---------------------------------------------------------------------------------------------------------
# addresses and ids


def unique_client_id(name: str) -> str:
    """A client id unique to this call, at most 23 characters (the MQTT 3.1.1 limit a server must accept)."""
    stem = "".join(ch for ch in name if ch.isalnum() or ch in "-_")[:10] or "c"
    return f"{stem}-{uuid.uuid4().hex[:12]}"


def unique_topic_prefix() -> str:
    return f"rwls-test/{uuid.uuid4().hex}"


def host_port(target: Target) -> tuple[str, int]:
    """``1883``, ``"mqtt://127.0.0.1:1883"`` or an object with ``host`` and ``port`` -> ``(host, port)``.

    Only loopback addresses are accepted: the tests talk to nothing else.
    """
    if isinstance(target, int):
        host, port = LOOPBACK, target
    elif isinstance(target, str):
        parts = urlsplit(target if "://" in target else f"mqtt://{target}")
        if parts.scheme not in ("mqtt", "tcp") or parts.port is None:
            raise ValueError(f"expected mqtt://host:port, got {target!r}")
        host, port = parts.hostname or LOOPBACK, parts.port
    else:
        host, port = target.host, int(target.port)
    if host not in _LOOPBACK_NAMES:
        raise ValueError(f"integration tests only talk to loopback, not {host!r}")
    return host, port


def free_port() -> int:
    """A TCP port on 127.0.0.1 that was free a moment ago."""
    with socket.socket(socket.AF_INET, socket.SOCK_STREAM) as sock:
        sock.bind((LOOPBACK, 0))
        return int(sock.getsockname()[1])


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
    if host not in _LOOPBACK_NAMES:
        raise ValueError(f"integration tests only talk to loopback, not {host!r}")
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
    if host not in _LOOPBACK_NAMES:
        raise ValueError(f"integration tests only talk to loopback, not {host!r}")
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
            "# written by tests/integration/mqtt_support.py",
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


# ---------------------------------------------------------------------------------------------------------
# paho helpers


def new_client(client_id: str, *, protocol: int = mqtt.MQTTv311, clean_session: bool = True) -> mqtt.Client:
    """A paho 2.x client (callback API version 2). ``clean_session`` applies to 3.1.1; for v5 pass
    ``clean_start`` and a session expiry interval to :meth:`mqtt.Client.connect` instead."""
    if protocol == mqtt.MQTTv5:
        return mqtt.Client(mqtt.CallbackAPIVersion.VERSION2, client_id=client_id, protocol=protocol)
    return mqtt.Client(mqtt.CallbackAPIVersion.VERSION2, client_id=client_id, protocol=protocol,
                       clean_session=clean_session)


def _connect_and_wait(client: mqtt.Client, host: str, port: int, timeout: float,
                      on_connected: Any = None, **connect_kwargs: Any) -> Any:
    """connect() + loop_start(), then wait for a successful CONNACK; return its connect flags.

    ``on_connected(client)`` runs inside ``on_connect`` after every successful (re)connect: the place to
    (re)subscribe. It must not publish or wait on anything (that can deadlock paho's network thread).
    """
    done = threading.Event()
    result: dict[str, Any] = {}

    def on_connect(c: mqtt.Client, _u: Any, flags: Any, reason: Any, _p: Any) -> None:
        if not done.is_set():
            result["flags"], result["reason"] = flags, reason
        if on_connected is not None and not reason.is_failure:
            try:
                on_connected(c)
            except Exception as exc:  # an exception here would kill paho's network thread
                result["error"] = exc
        done.set()

    def on_connect_fail(_c: mqtt.Client, _u: Any) -> None:
        result.setdefault("reason", "connect failed")
        done.set()

    client.on_connect = on_connect
    client.on_connect_fail = on_connect_fail
    client.connect(host, port, keepalive=30, **connect_kwargs)
    client.loop_start()
    try:
        if not done.wait(timeout):
            raise TimeoutError(f"no CONNACK from {host}:{port} within {timeout} s")
        reason = result["reason"]
        if isinstance(reason, str) or reason.is_failure:
            raise ConnectionError(f"connect to {host}:{port} refused: {reason}")
        if "error" in result:
            raise RuntimeError(f"on_connected failed: {result['error']!r}") from result["error"]
    except BaseException:
        _stop_client(client)
        raise
    return result["flags"]


def _stop_client(client: mqtt.Client) -> None:
    with contextlib.suppress(Exception):
        client.disconnect()
    client.loop_stop()


def publish_and_wait(
    url_or_port: Target,
    messages: Sequence[tuple[str, bytes]],
    qos: int = 1,
    timeout: float = 10.0,
    *,
    retain: bool = False,
    max_in_flight: int = 1_000,
    client_id: str | None = None,
    protocol: int = mqtt.MQTTv311,
    in_flight: list[int] | None = None,
) -> int:
    """Publish ``messages`` (``(topic, payload)``) in order and wait until the broker acknowledged all of them.

    At most ``max_in_flight`` messages are unacknowledged at once (paho 2.x fails with ``MQTT_ERR_QUEUE_SIZE``
    past 65,535); every ``publish()`` return code must be ``MQTT_ERR_SUCCESS``; a lost connection or any
    failure reason code raises. All of it within ``timeout`` seconds. Returns the number acknowledged.

    ``in_flight``, when given, receives for every message the number handed to paho and not yet
    acknowledged, counted the moment it is handed over (so never less than the truth): counters of
    their own, apart from the ones the cap works with, so that the test of the cap measures it.
    """
    if not 1 <= max_in_flight <= 65_000:
        raise ValueError("max_in_flight must be between 1 and 65000")
    host, port = host_port(url_or_port)
    client = new_client(client_id or unique_client_id("pub"), protocol=protocol)
    client.max_inflight_messages_set(min(max_in_flight, 65_000))
    state = threading.Condition()
    acked = 0
    handed_over = 0         # for ``in_flight`` only
    pubacks = 0             # for ``in_flight`` only
    failures: list[str] = []
    disconnected: list[Any] = []

    def on_publish(_c: mqtt.Client, _u: Any, mid: int, reason: Any, _p: Any) -> None:
        nonlocal acked, pubacks
        with state:
            pubacks += 1
            if reason is not None and getattr(reason, "is_failure", False):
                failures.append(f"mid {mid}: {reason}")
            acked += 1
            state.notify_all()

    def on_disconnect(_c: mqtt.Client, _u: Any, _f: Any, reason: Any, _p: Any) -> None:
        with state:
            disconnected.append(reason)
            state.notify_all()

    client.on_publish = on_publish
    client.on_disconnect = on_disconnect
    deadline = time.monotonic() + timeout
    _connect_and_wait(client, host, port, timeout)
    try:
        for sent, (topic, payload) in enumerate(messages):
            with state:
                while sent - acked >= max_in_flight and not disconnected and not failures:
                    left = deadline - time.monotonic()
                    if left <= 0:
                        raise TimeoutError(f"only {acked}/{len(messages)} acknowledged within {timeout} s")
                    state.wait(left)
                if disconnected:
                    raise ConnectionError(f"publisher disconnected after {acked} PUBACKs: {disconnected[0]}")
                if failures:
                    raise RuntimeError(f"publish failed: {failures[:3]}")
            if in_flight is not None:
                with state:
                    handed_over += 1
                    in_flight.append(handed_over - pubacks)
            info = client.publish(topic, payload, qos=qos, retain=retain)
            if info.rc != mqtt.MQTT_ERR_SUCCESS:
                raise RuntimeError(f"publish #{sent} to {topic!r} returned {mqtt.error_string(info.rc)}")
        with state:
            while acked < len(messages) and not disconnected and not failures:
                left = deadline - time.monotonic()
                if left <= 0:
                    break
                state.wait(left)
            if failures:
                raise RuntimeError(f"publish failed: {failures[:3]}")
            if acked < len(messages):
                why = f"disconnected: {disconnected[0]}" if disconnected else f"timeout {timeout} s"
                raise TimeoutError(f"only {acked}/{len(messages)} acknowledged ({why})")
        return acked
    finally:
        _stop_client(client)


@dataclass(frozen=True)
class Received:
    topic: str
    payload: bytes
    qos: int
    retain: bool


class Collector:
    """A subscriber that records every message; ``on_message`` only appends (it must never raise).

    ``connect()`` waits for CONNACK and (re)subscribes inside ``on_connect`` so reconnects resubscribe; it
    returns the CONNACK flags (``session_present``). ``wait_for(n)`` waits, bounded, for ``n`` messages.
    """

    def __init__(self, target: Target, client_id: str, *, protocol: int = mqtt.MQTTv311,
                 clean_session: bool = True) -> None:
        self.host, self.port = host_port(target)
        self.client_id = client_id
        self.protocol = protocol
        self.clean_session = clean_session
        self.messages: list[Received] = []
        self._cond = threading.Condition()
        self._subscribed = threading.Event()
        self._client: mqtt.Client | None = None

    def connect(self, topics: Sequence[str] = (), qos: int = 1, timeout: float = 10.0,
                session_expiry: int | None = None) -> Any:
        client = new_client(self.client_id, protocol=self.protocol, clean_session=self.clean_session)
        self._client = client
        self._subscribed.clear()
        expected = len(topics)

        def on_message(_c: mqtt.Client, _u: Any, msg: mqtt.MQTTMessage) -> None:
            with self._cond:
                self.messages.append(Received(msg.topic, bytes(msg.payload), msg.qos, bool(msg.retain)))
                self._cond.notify_all()

        def on_subscribe(_c: mqtt.Client, _u: Any, _mid: int, reasons: list[Any], _p: Any) -> None:
            if all(not r.is_failure for r in reasons) and len(reasons) == expected:
                self._subscribed.set()

        def subscribe(c: mqtt.Client) -> None:  # in on_connect: every reconnect resubscribes
            if topics:
                rc, _mid = c.subscribe([(t, qos) for t in topics])
                if rc != mqtt.MQTT_ERR_SUCCESS:
                    raise RuntimeError(f"subscribe returned {mqtt.error_string(rc)}")

        client.on_message = on_message
        client.on_subscribe = on_subscribe
        kwargs: dict[str, Any] = {}
        if self.protocol == mqtt.MQTTv5:
            props = Properties(PacketTypes.CONNECT)
            props.SessionExpiryInterval = session_expiry if session_expiry is not None else 0
            kwargs = {"clean_start": self.clean_session, "properties": props}
        flags = _connect_and_wait(client, self.host, self.port, timeout, on_connected=subscribe, **kwargs)
        if topics and not self._subscribed.wait(timeout):
            self.disconnect()
            raise TimeoutError(f"subscription to {list(topics)} not acknowledged within {timeout} s")
        return flags

    def disconnect(self) -> None:
        if self._client is not None:
            _stop_client(self._client)
            self._client = None

    def wait_for(self, n: int, timeout: float = 10.0) -> list[Received]:
        deadline = time.monotonic() + timeout
        with self._cond:
            while len(self.messages) < n:
                left = deadline - time.monotonic()
                if left <= 0:
                    break
                self._cond.wait(left)
            return list(self.messages)

    def settle(self, quiet: float = 0.3, timeout: float = 5.0) -> list[Received]:
        """Wait until no message arrived for ``quiet`` seconds (bounded by ``timeout``); catches extras."""
        deadline = time.monotonic() + timeout
        with self._cond:
            seen = len(self.messages)
            while time.monotonic() < deadline:
                self._cond.wait(min(quiet, max(0.0, deadline - time.monotonic())))
                if len(self.messages) == seen:
                    break
                seen = len(self.messages)
            return list(self.messages)

    def __enter__(self) -> Collector:
        return self

    def __exit__(self, *_exc: object) -> None:
        self.disconnect()
