"""A bare paho subscriber on the benchmarks' broker: the ceiling the service's ingest is measured against.

paho 2.x with its ``loop_start`` thread, ``on_message`` only counts: messages/s at QoS 1 (MQTT 5 and 3.1.1)
and QoS 0 while the publisher runs, the drain of a backlog the broker queued for its persistent session (the
subscriber's own ceiling, not the publisher's), drops (published - received), and with ``latency`` the time from
publish to ``on_message``. Measured once a run (the ``raw`` fixture) and printed beside every service figure; the
same for the publisher's tag shape (two tag messages per sample, one topic filter, paced at each of
``TAG_RATES``) once a run for the tag benchmarks (the ``raw_tags`` fixture).
"""

from __future__ import annotations

import json
import math
import threading
import time
import uuid
from collections.abc import Callable
from dataclasses import dataclass
from typing import Any

import paho.mqtt.client as mqtt
from paho.mqtt.enums import CallbackAPIVersion
from paho.mqtt.packettypes import PacketTypes
from paho.mqtt.properties import Properties

from tests.benchmarks._common import print_table
from tests.benchmarks._environment import MachineUsage, header, process_cpu, thread_cpu
from tests.benchmarks._figures import fmt, ms, per, percentiles
from tests.benchmarks._mqtt_load import (
    CHANNELS,
    LATENCY_RATE,
    MAX_IN_FLIGHT,
    TAG_MESSAGES,
    TAG_RATES,
    Broker,
    finish,
    nothing_more,
    publish_all,
    publisher,
    running,
    tag_filter,
    topics,
    watch,
)
from tests.support.addresses import LOOPBACK, unique_client_id

__all__ = ["RAW_MESSAGES", "BareSubscriber", "RawFigures", "RawTagFigures", "measure_raw", "measure_raw_tags",
           "sample_stamp", "tag_stamp"]

RAW_MESSAGES = 50_000                 # per raw run
RAW_LATENCY_SECONDS = 5.0
RAW_STALL = 3.0                       # seconds without progress once nothing more is coming (QoS 0 may lose some)
SESSION_EXPIRY = 3600                 # seconds, the bare subscriber's session for the backlog drain


def sample_stamp(payload: bytes | bytearray) -> float:
    """When a message of the sample shape was published (``--time wall``): its ``t``, s since the epoch."""
    return float(json.loads(payload)["t"])


def tag_stamp(payload: bytes | bytearray) -> float:
    """When the sample of a tag message was first published (``--time wall``): its ``ts`` (ms) in s."""
    return float(json.loads(payload)["ts"]) / 1e3


class BareSubscriber:
    """paho 2.x, ``loop_start`` thread; ``on_message`` only counts (MQTT v5 as the service's ingest, or 3.1.1).

    With ``latency`` (``sample_stamp`` or ``tag_stamp``: a payload's publish time) it also keeps
    ``time.time()`` - that time for every message.
    """

    def __init__(self, port: int, topics: list[str], qos: int, *, protocol: int = mqtt.MQTTv5,
                 client_id: str | None = None, latency: Callable[[bytes | bytearray], float] | None = None) -> None:
        self.count = 0
        self.errors = 0
        self.first: float | None = None
        self.last: float | None = None
        self.latency: list[float] = []
        self.client_id = client_id or unique_client_id("raw")
        self._stamp = latency
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
            if self._stamp is not None:
                self.latency.append(time.time() - self._stamp(message.payload))
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


def raw_live(broker: Broker, qos: int, protocol: int = mqtt.MQTTv5, *, tags: bool = False,
             messages: int = RAW_MESSAGES) -> dict[str, Any]:
    """Bare subscriber receiving while the publisher runs (``tags``: its tag shape, on one topic filter)."""
    prefix = f"bench/raw-{uuid.uuid4().hex[:8]}"
    subscriber = BareSubscriber(broker.port, [tag_filter(prefix)] if tags else topics(prefix), qos,
                                protocol=protocol)
    subscriber.start()
    try:
        cpu0, broker0 = thread_cpu(subscriber.native_id), process_cpu(broker.pid)
        with publisher(broker.port, prefix, messages=messages, qos=qos, tags=tags) as proc:
            watch(lambda: subscriber.count, messages, running(proc), stall=RAW_STALL)
            published = finish(proc)
        if subscriber.count < published.get("published", 0):     # QoS 0 may lose: wait (bounded), then count
            watch(lambda: subscriber.count, published["published"], nothing_more, stall=RAW_STALL)
        cpu1, broker1 = thread_cpu(subscriber.native_id), process_cpu(broker.pid)
    finally:
        subscriber.stop()
    shape = ", tag messages" if tags else ""
    return {"how": f"live, MQTT {'5' if protocol == mqtt.MQTTv5 else '3.1.1'}{shape}", "qos": qos,
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


def raw_latency(broker: Broker, rate: float = LATENCY_RATE, seconds: float = RAW_LATENCY_SECONDS, *,
                tags: bool = False) -> dict[str, Any]:
    """Publish -> ``on_message`` of the bare subscriber, paced at ``rate`` messages/s for ``seconds``."""
    prefix = f"bench/rawlat-{uuid.uuid4().hex[:8]}"
    messages = int(rate * seconds)
    subscriber = BareSubscriber(broker.port, [tag_filter(prefix)] if tags else topics(prefix), 1,
                                latency=tag_stamp if tags else sample_stamp)
    subscriber.start()
    try:
        with publisher(broker.port, prefix, messages=messages, rate=rate, wall=True, tags=tags) as proc:
            watch(lambda: subscriber.count, messages, running(proc), stall=RAW_STALL)
            published = finish(proc)
    finally:
        subscriber.stop()
    return {"rate": rate, "messages": messages, "published": published.get("published", 0),
            "received": subscriber.count, "latency": list(subscriber.latency), "errors": subscriber.errors,
            "publish_rate": published.get("publish_rate") or math.nan, "publisher": published}


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
    _print_receive_rates([figures.live, figures.live_qos0, figures.live_v311, figures.drain])
    return figures


def _print_receive_rates(runs: list[dict[str, Any]]) -> None:
    rows = [[fig["how"], fig["qos"], f"{fig['published']:,}", f"{fig['received']:,}",
             f"{fig['published'] - fig['received']:,}", fmt(fig["rate"]), fmt(fig["publish_rate"]),
             fmt(fig["paho_us"], 1), fmt(fig["broker_cpu"], 2), fmt(fig["publisher_cpu"], 2)] for fig in runs]
    print_table(["run", "QoS", "published", "received", "drops", "received msg/s", "publisher msg/s",
                 "paho thread CPU us/msg", "broker CPU s", "publisher CPU s"], rows)


@dataclass(frozen=True)
class RawTagFigures:
    live: dict[str, Any]                  # QoS 1, MQTT 5, tag shape, publisher running
    latency: dict[float, dict[str, Any]]  # paced rate (tag messages/s) -> publish -> on_message

    def falls_behind(self, rate: float, p99_goal: float) -> str | None:
        """Why the bare subscriber did not keep up at ``rate`` (or the publisher did not hold that pace), None
        when it did: every message received, p99 under ``p99_goal`` (s), the pace held within 5 %."""
        run = self.latency[rate]
        p99 = percentiles(run["latency"])[1]
        if not run["received"] >= run["messages"] == run["published"]:
            return f"the bare subscriber received {run['received']:,} of {run['messages']:,}"
        if not p99 < p99_goal:
            return f"the bare subscriber's p99 was {ms(p99)} ms"
        if not run["publish_rate"] >= 0.95 * rate:
            return f"the publisher held {fmt(run['publish_rate'])} msg/s"
        return None


def measure_raw_tags(broker: Broker) -> RawTagFigures:
    """The bare paho subscriber on the publisher's tag shape (one filter ``<prefix>/t/+/+``), printed as tables."""
    usage = MachineUsage(broker.pid)
    live = raw_live(broker, 1, tags=True, messages=TAG_MESSAGES)
    figures = RawTagFigures(live, {rate: raw_latency(broker, rate, tags=True) for rate in TAG_RATES})
    header(f"raw paho receive, tag messages: {TAG_MESSAGES:,} messages (two per sample: input tag, then output tag "
           f"of the same instant) of {CHANNELS:,} channels, one value each as JSON {{v, ts (ms), q}}, one topic "
           "filter", broker.description, usage)
    print("   bare paho 2.x subscriber on the filter <prefix>/t/+/+ (as the service's one pattern tag entry), "
          "on_message only counts; rate = received / (last - first arrival) while the publisher runs. latency: "
          f"paced for {RAW_LATENCY_SECONDS:.0f} s, time.time() at on_message - ts, ts being the publisher's "
          "time.time() (rounded down to the ms) just before it published the instant's input tag.")
    _print_receive_rates([figures.live])
    rows = []
    for rate, run in figures.latency.items():
        p50, p99, worst = percentiles(run["latency"])
        rows.append([fmt(rate), f"{run['published']:,}", f"{run['received']:,}", fmt(run["publish_rate"]),
                     ms(p50), ms(p99), ms(worst)])
    print_table(["paced tag msg/s", "published", "received", "publisher msg/s", "p50 ms", "p99 ms", "max ms"], rows)
    return figures
