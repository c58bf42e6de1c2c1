"""MQTT ingest: paho-mqtt 2.x subscriber that hands raw messages to the engine.

* VERSION2 callback API; MQTT v5 with a persistent session (clean start off,
  session expiry), falling back to 3.1.1 (clean session off) when the broker
  refuses v5; QoS 1; fixed client id; reconnect with backoff; resubscribe in
  every ``on_connect``.
* Callbacks do no work: ``on_message`` hands ``(topic, payload)`` to the engine
  queue and returns. Every callback is wrapped so an exception is logged and
  counted instead of killing paho's network thread (in paho 2.x that thread
  would die while ``is_connected()`` still says True).
* We run ``loop_forever`` on a thread of our own, so liveness is that thread's,
  not ``is_connected()``.
* A full engine queue blocks ``on_message``: paho then stops reading, the
  broker holds the unacknowledged QoS 1 messages (back-pressure, not loss).
  If the block outlasts the keepalive the broker drops the connection and
  redelivers after reconnect; the engine's ``t``/``seq`` checks refuse any
  sample it has already applied.
* Dead letters are published from the engine thread, never from a callback.
"""

from __future__ import annotations

import logging
import ssl
import threading
import time
from collections.abc import Callable, Iterable, Mapping
from dataclasses import dataclass
from typing import Any

import paho.mqtt.client as mqtt
from paho.mqtt.enums import CallbackAPIVersion
from paho.mqtt.packettypes import PacketTypes
from paho.mqtt.properties import Properties
from paho.mqtt.subscribeoptions import SubscribeOptions

from service.broker_link.messages import DeadLetter, Message

__all__ = ["BrokerSettings", "MqttIngest", "probe_protocol"]

log = logging.getLogger(__name__)

SESSION_EXPIRY_SECONDS = 7 * 24 * 3600     # keep the session (and its queued QoS 1 messages) a week
MAX_OUTGOING_QUEUE = 10_000                # dead letters waiting for the broker, at most
# While connected, a full outgoing queue is waited out this long (seconds) before a publish fails:
# refusals arriving faster than the broker takes their dead letters slow the engine down (and so,
# through the acknowledgements, the broker), rather than losing dead letters.
PUBLISH_WAIT = 10.0
# Topics per SUBSCRIBE: paho makes several objects per topic of a request and the SUBACK's reason codes; 100,000
# topics in one request peaked at 240 MB, which stayed resident (measured); in requests of this many, a few MB.
SUBSCRIBE_CHUNK = 1000


@dataclass(frozen=True)
class BrokerSettings:
    """Where and how to connect (built from the ``[broker]`` table)."""

    host: str = "127.0.0.1"
    port: int = 1883
    client_id: str = "rwls-1"
    tls: bool = False
    username: str | None = None
    password: str | None = None
    ca_file: str | None = None
    cert_file: str | None = None
    key_file: str | None = None
    qos: int = 1
    keepalive: int = 30
    dead_letter_topic: str = "rwls/dead-letter"
    reconnect_min_delay: float = 0.5
    reconnect_max_delay: float = 30.0
    protocol: str = "auto"            # "auto", "5" or "3.1.1"
    manual_ack: bool = False          # acknowledge QoS 1 messages only when told (once in the input log)


def _client(settings: BrokerSettings, version: mqtt.MQTTProtocolVersion) -> mqtt.Client:
    v5 = version == mqtt.MQTTProtocolVersion.MQTTv5
    client = mqtt.Client(CallbackAPIVersion.VERSION2, client_id=settings.client_id, protocol=version,
                         clean_session=None if v5 else False, manual_ack=settings.manual_ack)
    if settings.username:
        client.username_pw_set(settings.username, settings.password or None)
    if settings.tls:
        client.tls_set(ca_certs=settings.ca_file or None, certfile=settings.cert_file or None,
                       keyfile=settings.key_file or None, tls_version=ssl.PROTOCOL_TLS_CLIENT)
    client.reconnect_delay_set(min_delay=max(1, int(settings.reconnect_min_delay)),
                               max_delay=max(1, int(settings.reconnect_max_delay)))
    client.max_queued_messages_set(MAX_OUTGOING_QUEUE)
    return client


def _connect_properties() -> Properties:
    properties = Properties(PacketTypes.CONNECT)
    properties.SessionExpiryInterval = SESSION_EXPIRY_SECONDS
    return properties


def probe_protocol(settings: BrokerSettings, timeout: float = 5.0) -> mqtt.MQTTProtocolVersion:
    """MQTT v5 if the broker accepts a v5 CONNECT within ``timeout``, else 3.1.1.

    Uses a throw-away client id so the real session is not disturbed.
    """
    if settings.protocol == "5":
        return mqtt.MQTTProtocolVersion.MQTTv5
    if settings.protocol == "3.1.1":
        return mqtt.MQTTProtocolVersion.MQTTv311
    accepted = threading.Event()
    probe = _client(BrokerSettings(**{**settings.__dict__, "client_id": settings.client_id + "-probe"}),
                    mqtt.MQTTProtocolVersion.MQTTv5)

    def on_connect(client: mqtt.Client, userdata: Any, flags: Any, reason_code: Any, properties: Any) -> None:
        if not reason_code.is_failure:
            accepted.set()

    probe.on_connect = on_connect
    try:
        probe.connect(settings.host, settings.port, keepalive=settings.keepalive, clean_start=True)
        deadline = time.monotonic() + timeout
        while not accepted.is_set() and time.monotonic() < deadline:
            if probe.loop(timeout=0.1) != mqtt.MQTT_ERR_SUCCESS:
                break
        probe.disconnect()
    except (OSError, ValueError):
        return mqtt.MQTTProtocolVersion.MQTTv5        # broker not reachable now: v5, retry later
    return mqtt.MQTTProtocolVersion.MQTTv5 if accepted.is_set() else mqtt.MQTTProtocolVersion.MQTTv311


class MqttIngest:
    """Subscriber for every channel topic and tag topic, feeding the engine.

    Parameters
    ----------
    settings : broker connection
    topics : topic filter -> channel id (None: a tag topic or pattern; the engine's tag path names its tag)
    submit : hands a :class:`Message` to the engine; may block (back-pressure)
    """

    def __init__(self, settings: BrokerSettings, topics: Mapping[str, str | None],
                 submit: Callable[[Message], bool]) -> None:
        self.settings = settings
        self._topics = dict(topics)
        self._submit = submit
        self._connected = threading.Event()
        self._subscribed = threading.Event()      # the broker's SUBACK granted every topic of this connection
        self._subscribe_pending: set[int | None] = set()     # SUBSCRIBE ids whose SUBACK has not come yet
        self._stopping = threading.Event()
        self._thread: threading.Thread | None = None
        self._client: mqtt.Client | None = None
        self.protocol = ""
        self.connects = 0
        self.reconnects = 0
        self.callback_errors = 0
        self.received = 0
        self.acknowledged = 0
        self.publish_failures = 0               # publishes paho refused (after waiting out a full queue)

    # ---------------------------------------------------------------- status
    @property
    def connected(self) -> bool:
        return self._connected.is_set()

    def alive(self) -> bool:
        """Our network thread runs (paho's own ``is_connected`` can lie after a callback crash)."""
        return self._thread is not None and self._thread.is_alive()

    @property
    def subscribed(self) -> bool:
        """Connected, and the broker acknowledged (SUBACK) every subscription of this connection."""
        return self._connected.is_set() and self._subscribed.is_set()

    def wait_connected(self, timeout: float) -> bool:
        return self._connected.wait(timeout)

    def wait_subscribed(self, timeout: float) -> bool:
        """Wait until :attr:`subscribed` (messages published from now on reach us); False on timeout."""
        return self._subscribed.wait(timeout) and self._connected.is_set()

    # ------------------------------------------------------------- lifecycle
    def start(self) -> None:
        """Pick the protocol, then run paho's loop on our own thread (it reconnects by itself)."""
        version = probe_protocol(self.settings)
        self.protocol = "5" if version == mqtt.MQTTProtocolVersion.MQTTv5 else "3.1.1"
        client = _client(self.settings, version)
        client.on_connect = self._guard(self._on_connect)
        client.on_disconnect = self._guard(self._on_disconnect)
        client.on_message = self._guard(self._on_message)
        client.on_subscribe = self._guard(self._on_subscribe)
        self._client = client
        self._thread = threading.Thread(target=self._loop, name="rwls-mqtt", daemon=True)
        self._thread.start()

    def _loop(self) -> None:
        client = self._client
        if client is None:
            return
        v5 = self.protocol == "5"
        # connect_async never raises for an unreachable broker; loop_forever then
        # connects and reconnects with the configured backoff until stop().
        client.connect_async(self.settings.host, self.settings.port, keepalive=self.settings.keepalive,
                             clean_start=False if v5 else mqtt.MQTT_CLEAN_START_FIRST_ONLY,
                             properties=_connect_properties() if v5 else None)
        client.loop_forever(retry_first_connection=True)

    def stop(self, timeout: float = 5.0) -> None:
        """Disconnect and join the network thread (bounded)."""
        self._stopping.set()
        if self._client is not None:
            self._client.disconnect()
        if self._thread is not None:
            self._thread.join(timeout)

    # -------------------------------------------------------------- callbacks
    def _guard(self, callback: Callable[..., None]) -> Callable[..., None]:
        def guarded(*args: Any) -> None:
            try:
                callback(*args)
            except Exception:
                self.callback_errors += 1
                log.exception("MQTT callback %s failed", callback.__name__)
        guarded.__name__ = callback.__name__
        return guarded

    def _on_connect(self, client: mqtt.Client, userdata: Any, flags: Any, reason_code: Any,
                    properties: Any) -> None:
        if reason_code.is_failure:
            log.warning("broker refused connection: %s", reason_code)
            return
        self.connects += 1
        if self.connects > 1:
            self.reconnects += 1
        log.info("connected to %s:%s (MQTT %s, session present %s)", self.settings.host, self.settings.port,
                 self.protocol, getattr(flags, "session_present", None))
        self._subscribed.clear()
        if self._topics:
            qos = self.settings.qos
            topics = list(self._topics)
            pending: set[int | None] = set()
            for start in range(0, len(topics), SUBSCRIBE_CHUNK):
                chunk = topics[start:start + SUBSCRIBE_CHUNK]
                _, mid = client.subscribe([(topic, SubscribeOptions(qos=qos)) for topic in chunk]
                                          if self.protocol == "5" else [(topic, qos) for topic in chunk])
                pending.add(mid)
            self._subscribe_pending = pending     # SUBACKs come on this (the network) thread, after this callback
        else:
            self._subscribed.set()                # nothing to subscribe to: nothing to wait for
        self._connected.set()

    def _on_subscribe(self, client: mqtt.Client, userdata: Any, mid: int, reason_codes: Any,
                      properties: Any) -> None:
        failed = [code for code in reason_codes if getattr(code, "is_failure", False)]
        if failed:
            log.error("broker refused %d of %d subscriptions: %s", len(failed), len(reason_codes), failed[0])
        elif mid in self._subscribe_pending:
            self._subscribe_pending.discard(mid)
            if not self._subscribe_pending:
                self._subscribed.set()

    def _on_disconnect(self, client: mqtt.Client, userdata: Any, flags: Any, reason_code: Any,
                       properties: Any) -> None:
        if self._connected.is_set():
            if self._stopping.is_set():
                log.info("disconnected from broker (stopping): %s", reason_code)
            else:
                log.warning("disconnected from broker: %s", reason_code)
        self._connected.clear()
        self._subscribed.clear()

    def _on_message(self, client: mqtt.Client, userdata: Any, message: mqtt.MQTTMessage) -> None:
        self.received += 1
        # Under manual acknowledgement a QoS 1 message carries (connection, mid) until the engine has it
        # in its synced input log; a message of an older connection is not acknowledged (it is redelivered).
        ack = (self.connects, message.mid) if self.settings.manual_ack and message.qos > 0 else None
        self._submit(Message(self._topics.get(message.topic), bytes(message.payload), "mqtt", message.topic,
                             ack=ack, redelivered=bool(message.dup)))

    def ack(self, acks: list[tuple[int, int]]) -> None:
        """Acknowledge QoS 1 messages of the current connection (those of an older one are redelivered)."""
        client = self._client
        if client is None:
            return
        current = self.connects
        for connection, mid in acks:
            if connection == current and self._connected.is_set():
                client.ack(mid, 1)
                self.acknowledged += 1

    # ------------------------------------------------------------ publishing
    def publish(self, topic: str, payload: bytes, *, retain: bool = False, wait: float = PUBLISH_WAIT) -> None:
        """Publish at QoS 1 (call from the engine thread, never a callback); paho queues it while offline.

        A full outgoing queue while connected is waited out for up to ``wait`` seconds (see
        ``PUBLISH_WAIT``); offline, a full queue fails at once (the outage could last hours).

        Raises
        ------
        RuntimeError
            paho refused the publish; the caller counts it.
        """
        client = self._client
        if client is None:
            raise RuntimeError("ingest not started")
        deadline = time.monotonic() + wait
        while True:
            info = client.publish(topic, payload, qos=1, retain=retain)
            if info.rc in (mqtt.MQTT_ERR_SUCCESS, mqtt.MQTT_ERR_NO_CONN):
                return
            if (info.rc != mqtt.MQTT_ERR_QUEUE_SIZE or not self._connected.is_set()
                    or time.monotonic() >= deadline):
                self.publish_failures += 1
                raise RuntimeError(f"publish to {topic} refused: {mqtt.error_string(info.rc)}")
            time.sleep(0.002)                  # paho's network thread frees room as PUBACKs arrive

    def publish_many(self, messages: Iterable[tuple[str, bytes, bool]], *, wait: float = PUBLISH_WAIT) -> None:
        """:meth:`publish` of each ``(topic, payload, retain)``; RuntimeError after trying them all, if any failed."""
        refused = tried = 0
        for topic, payload, retain in messages:
            tried += 1
            try:
                self.publish(topic, payload, retain=retain, wait=wait)
            except RuntimeError:
                refused += 1
        if refused:
            raise RuntimeError(f"{refused} of {tried} publishes refused")

    def publish_from(self, producer: Callable[..., Iterable[tuple[str, bytes, bool]]], args: tuple[Any, ...]) -> None:
        """:meth:`publish` of each message ``producer(*args)`` yields (see :meth:`ProcessIngest.publish_from`)."""
        self.publish_many(producer(*args))

    def publish_dead_letter(self, letter: DeadLetter) -> None:
        """Publish a refusal to the dead-letter topic (see :meth:`publish`)."""
        self.publish(self.settings.dead_letter_topic, letter.to_json())
