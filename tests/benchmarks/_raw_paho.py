"""A bare paho subscriber on the benchmarks' broker: the ceiling the service's ingest is measured against.

paho 2.x with its ``loop_start`` thread, ``on_message`` only counts: messages/s at QoS 1 (MQTT 5 and 3.1.1)
and QoS 0 while the publisher runs, the drain of a backlog the broker queued for its persistent session (the
subscriber's own ceiling, not the publisher's), drops (published - received), and with ``latency`` the time from
publish to ``on_message``. Measured once a run (the ``raw`` fixture) and printed beside every service figure.
"""

from __future__ import annotations

import json
import math
import threading
import time
import uuid
from dataclasses import dataclass
from typing import Any

import paho.mqtt.client as mqtt
from paho.mqtt.enums import CallbackAPIVersion
from paho.mqtt.packettypes import PacketTypes
from paho.mqtt.properties import Properties

from tests.benchmarks._common import print_table
from tests.benchmarks._environment import MachineUsage, header, process_cpu, thread_cpu
from tests.benchmarks._figures import fmt, per
from tests.benchmarks._mqtt_load import (
    CHANNELS,
    LATENCY_RATE,
    MAX_IN_FLIGHT,
    Broker,
    finish,
    nothing_more,
    publish_all,
    publisher,
    running,
    topics,
    watch,
)
from tests.support.addresses import LOOPBACK, unique_client_id

__all__ = ["RAW_MESSAGES", "BareSubscriber", "RawFigures", "measure_raw"]

RAW_MESSAGES = 50_000                 # per raw run
RAW_LATENCY_SECONDS = 5.0
RAW_STALL = 3.0                       # seconds without progress once nothing more is coming (QoS 0 may lose some)
SESSION_EXPIRY = 3600                 # seconds, the bare subscriber's session for the backlog drain


class BareSubscriber:
    """paho 2.x, ``loop_start`` thread; ``on_message`` only counts (MQTT v5 as the service's ingest, or 3.1.1).

    With ``latency`` it also reads ``t`` from the payload and keeps ``time.time() - t``.
    """

    def __init__(self, port: int, topics: list[str], qos: int, *, protocol: int = mqtt.MQTTv5,
                 client_id: str | None = None, latency: bool = False) -> None:
        self.count = 0
        self.errors = 0
        self.first: float | None = None
        self.last: float | None = None
        self.latency: list[float] = []
        self.client_id = client_id or unique_client_id("raw")
        self._want_latency = latency
        self._persistent = client_id is not None         # a named client keeps its session for a backlog drain
        self._port, self._topics, self._qos, self._protocol = port, topics, qos, protocol
        self._connected = threading.Event()
        self._subscribed = threading.Event()
        self._suback: list[Any] = []
        v5 = protocol == mqtt.MQTTv5
        self.client = mqtt.Client(CallbackAPIVersion.VERSION2, client_id=self.client_id, protocol=protocol,
                                  **({} if v5 else {"clean_session": not self._persistent}))
        self.client.on_connect = lambda _c, _u, _f, reason, _p: self._connected.set()
        self.client.on_subscribe = self._on_subscribe
        self.client.on_message = self._on_message

    def _on_subscribe(self, _c: mqtt.Client, _u: Any, _mid: int, reasons: list[Any], _p: Any) -> None:
        self._suback = list(reasons)
        self._subscribed.set()

    def _on_message(self, _c: mqtt.Client, _u: Any, message: mqtt.MQTTMessage) -> None:
        now = time.perf_counter()
        try:
            if self._want_latency:
                self.latency.append(time.time() - json.loads(message.payload)["t"])
        except (ValueError, KeyError, TypeError):
            self.errors += 1                       # never raise into paho's network thread
        self.count += 1
        if self.first is None:
            self.first = now
        self.last = now

    @property
    def native_id(self) -> int | None:
        thread = getattr(self.client, "_thread", None)       # paho's loop_start thread
        return thread.native_id if thread is not None else None

    @property
    def rate(self) -> float:
        span = (self.last or 0.0) - (self.first or 0.0)
        return self.count / span if span > 0 else math.nan

    def start(self, *, subscribe: bool = True, resume: bool = False, timeout: float = 10.0) -> None:
        """Connect (``resume``: to the session kept by the broker, no new subscription) and subscribe."""
        kwargs: dict[str, Any] = {}
        if self._protocol == mqtt.MQTTv5:
            properties = Properties(PacketTypes.CONNECT)
            properties.SessionExpiryInterval = SESSION_EXPIRY if self._persistent else 0
            kwargs = {"clean_start": not resume, "properties": properties}
        rc = self.client.connect(LOOPBACK, self._port, keepalive=60, **kwargs)
        assert rc == mqtt.MQTT_ERR_SUCCESS, mqtt.error_string(rc)
        assert self.client.loop_start() == mqtt.MQTT_ERR_SUCCESS
        assert self._connected.wait(timeout), "no CONNACK"
        if not subscribe:
            return
        rc, _mid = self.client.subscribe([(t, self._qos) for t in self._topics])
        assert rc == mqtt.MQTT_ERR_SUCCESS, mqtt.error_string(rc)
        assert self._subscribed.wait(timeout), "no SUBACK"
        failed = [r for r in self._suback if r.is_failure]
        assert len(self._suback) == len(self._topics) and not failed, f"subscriptions refused: {failed[:3]}"

    def stop(self) -> None:
        self.client.disconnect()
        self.client.loop_stop()


def raw_live(broker: Broker, qos: int, protocol: int = mqtt.MQTTv5) -> dict[str, Any]:
    """Bare subscriber receiving while the publisher runs."""
    prefix = f"bench/raw-{uuid.uuid4().hex[:8]}"
    subscriber = BareSubscriber(broker.port, topics(prefix), qos, protocol=protocol)
    subscriber.start()
    try:
        cpu0, broker0 = thread_cpu(subscriber.native_id), process_cpu(broker.pid)
        with publisher(broker.port, prefix, messages=RAW_MESSAGES, qos=qos) as proc:
            watch(lambda: subscriber.count, RAW_MESSAGES, running(proc), stall=RAW_STALL)
            published = finish(proc)
        if subscriber.count < published.get("published", 0):     # QoS 0 may lose: wait (bounded), then count
            watch(lambda: subscriber.count, published["published"], nothing_more, stall=RAW_STALL)
        cpu1, broker1 = thread_cpu(subscriber.native_id), process_cpu(broker.pid)
    finally:
        subscriber.stop()
    return {"how": f"live, MQTT {'5' if protocol == mqtt.MQTTv5 else '3.1.1'}", "qos": qos,
            "published": published.get("published", 0), "received": subscriber.count, "rate": subscriber.rate,
            "publish_rate": published.get("publish_rate") or math.nan,
            "paho_us": per(cpu1 - cpu0, subscriber.count) * 1e6, "broker_cpu": broker1 - broker0,
            "publisher_cpu": published.get("cpu_seconds", math.nan), "publisher": published}


def raw_drain(broker: Broker) -> dict[str, Any]:
    """Bare subscriber (MQTT v5, QoS 1) draining a backlog the broker queued for its persistent session."""
    prefix = f"bench/rawq-{uuid.uuid4().hex[:8]}"
    client_id = unique_client_id("rawq")
    first = BareSubscriber(broker.port, topics(prefix), 1, client_id=client_id)
    first.start()                                 # the session and its subscriptions
    first.stop()
    published = publish_all(broker.port, prefix, RAW_MESSAGES)
    subscriber = BareSubscriber(broker.port, topics(prefix), 1, client_id=client_id)
    broker0 = process_cpu(broker.pid)
    subscriber.start(subscribe=False, resume=True)
    try:
        cpu0 = thread_cpu(subscriber.native_id)
        watch(lambda: subscriber.count, published.get("published", 0), nothing_more, stall=RAW_STALL)
        cpu1, broker1 = thread_cpu(subscriber.native_id), process_cpu(broker.pid)
    finally:
        subscriber.stop()
    return {"how": "backlog drain, MQTT 5", "qos": 1, "published": published.get("published", 0),
            "received": subscriber.count, "rate": subscriber.rate,
            "publish_rate": published.get("publish_rate") or math.nan,
            "paho_us": per(cpu1 - cpu0, subscriber.count) * 1e6, "broker_cpu": broker1 - broker0,
            "publisher_cpu": math.nan, "publisher": published}


def raw_latency(broker: Broker) -> dict[str, Any]:
    prefix = f"bench/rawlat-{uuid.uuid4().hex[:8]}"
    messages = int(LATENCY_RATE * RAW_LATENCY_SECONDS)
    subscriber = BareSubscriber(broker.port, topics(prefix), 1, latency=True)
    subscriber.start()
    try:
        with publisher(broker.port, prefix, messages=messages, rate=LATENCY_RATE, wall=True) as proc:
            watch(lambda: subscriber.count, messages, running(proc), stall=RAW_STALL)
            published = finish(proc)
    finally:
        subscriber.stop()
    return {"published": published.get("published", 0), "received": subscriber.count,
            "latency": list(subscriber.latency), "errors": subscriber.errors, "publisher": published}


@dataclass(frozen=True)
class RawFigures:
    live: dict[str, Any]          # QoS 1, MQTT 5, publisher running
    live_qos0: dict[str, Any]
    live_v311: dict[str, Any]
    drain: dict[str, Any]         # QoS 1, MQTT 5, backlog
    latency: dict[str, Any]

    def line(self) -> str:
        return (f"   raw paho this run (bare subscriber, same broker, same publisher, MQTT 5): QoS 1 live "
                f"{fmt(self.live['rate'])} msg/s, QoS 1 backlog drain {fmt(self.drain['rate'])} msg/s, QoS 0 live "
                f"{fmt(self.live_qos0['rate'])} msg/s")


def measure_raw(broker: Broker) -> RawFigures:
    """The bare paho subscriber's figures on ``broker``, printed as a table."""
    usage = MachineUsage(broker.pid)
    figures = RawFigures(raw_live(broker, 1), raw_live(broker, 0), raw_live(broker, 1, mqtt.MQTTv311),
                         raw_drain(broker), raw_latency(broker))
    header(f"raw paho receive rate: {RAW_MESSAGES:,} one-sample messages over {CHANNELS:,} topics", broker.description,
           usage)
    print("   bare paho 2.x subscriber (loop_start thread, on_message only counts); publisher in a separate process, "
          f"at most {MAX_IN_FLIGHT} in flight. rate = received / (last - first arrival). live: received while the "
          "publisher runs (bounded by the publisher too); backlog drain: all messages published while the subscriber "
          "was away, queued by the broker for its persistent session, then received in one go (the subscriber's own "
          "ceiling). paho CPU from /proc schedstat of its thread.")
    rows = []
    for fig in (figures.live, figures.live_qos0, figures.live_v311, figures.drain):
        rows.append([fig["how"], fig["qos"], f"{fig['published']:,}", f"{fig['received']:,}",
                     f"{fig['published'] - fig['received']:,}", fmt(fig["rate"]), fmt(fig["publish_rate"]),
                     fmt(fig["paho_us"], 1), fmt(fig["broker_cpu"], 2), fmt(fig["publisher_cpu"], 2)])
    print_table(["run", "QoS", "published", "received", "drops", "received msg/s", "publisher msg/s",
                 "paho thread CPU us/msg", "broker CPU s", "publisher CPU s"], rows)
    return figures
