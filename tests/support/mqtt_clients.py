"""MQTT clients of the tests (paho-mqtt 2.x, loopback only, every wait bounded).

- :func:`publish_and_wait`: publish and wait for every PUBACK, with a cap on in-flight messages and every
  return code checked.
- :class:`Collector`: a subscriber that records what arrives (its ``on_message`` never raises).
- :func:`new_client`: a paho client with callback API version 2.
"""

from __future__ import annotations

import contextlib
import threading
import time
from collections.abc import Sequence
from dataclasses import dataclass
from typing import Any

import paho.mqtt.client as mqtt
from paho.mqtt.packettypes import PacketTypes
from paho.mqtt.properties import Properties

from tests.support.addresses import Target, host_port, unique_client_id

__all__ = ["Collector", "Received", "new_client", "publish_and_wait"]


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
