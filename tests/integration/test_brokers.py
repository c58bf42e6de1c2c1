"""The broker fixtures themselves: QoS 1 round trips, the embedded broker, and a persistent session that
keeps its queued QoS 1 messages across a restart of a private Mosquitto."""

from __future__ import annotations

import socket
import struct
import threading
import time
from collections.abc import Callable

import paho.mqtt.client as mqtt
import pytest

from service.demo.embedded_broker import EmbeddedBroker, EmbeddedBrokerError
from tests.support.mqtt_brokers import BrokerInfo, PrivateMosquitto, connect_packet, probe_mqtt
from tests.support.mqtt_clients import Collector, new_client, publish_and_wait

pytestmark = pytest.mark.integration


def _payloads(n: int, tag: str) -> list[bytes]:
    return [f"{tag}-{i:06d}".encode() for i in range(n)]


def _round_trip(target: BrokerInfo | EmbeddedBroker, prefix: str, cid: Callable[[str], str], n: int = 200) -> None:
    topic = f"{prefix}/roundtrip"
    sent = _payloads(n, "rt")
    with Collector(target, cid("sub")) as sub:
        sub.connect([f"{prefix}/#"], qos=1)
        assert publish_and_wait(target, [(topic, p) for p in sent], qos=1, timeout=20, max_in_flight=50) == n
        got = sub.wait_for(n, timeout=10)
        extra = sub.settle(quiet=0.2)
    assert [m.payload for m in got] == sent  # one publisher, one topic: order kept
    assert len(extra) == n, "a QoS 1 message came twice"
    assert {m.topic for m in got} == {topic}
    assert {m.qos for m in got} == {1}


def test_mqtt_broker_qos1_round_trip(mqtt_broker: BrokerInfo, unique_prefix: str,
                                     client_id: Callable[[str], str]) -> None:
    assert mqtt_broker.kind in ("mosquitto-system", "mosquitto-private", "embedded")
    assert mqtt_broker.host == "127.0.0.1"
    assert mqtt_broker.url == f"mqtt://127.0.0.1:{mqtt_broker.port}"
    _round_trip(mqtt_broker, unique_prefix, client_id)


def test_mqtt_broker_keeps_retained_message(mqtt_broker: BrokerInfo, unique_prefix: str,
                                            client_id: Callable[[str], str]) -> None:
    topic = f"{unique_prefix}/state"
    publish_and_wait(mqtt_broker, [(topic, b"first"), (topic, b"current")], qos=1, retain=True)
    try:
        with Collector(mqtt_broker, client_id("late")) as late:
            late.connect([topic], qos=1)
            got = late.wait_for(1, timeout=5)
            assert [(m.payload, m.retain) for m in late.settle(quiet=0.2)] == [(b"current", True)]
        assert got
    finally:
        publish_and_wait(mqtt_broker, [(topic, b"")], qos=1, retain=True)  # an empty retained payload clears it


def test_publish_and_wait_caps_in_flight(mqtt_broker: BrokerInfo, unique_prefix: str) -> None:
    n = 3_000
    messages = [(f"{unique_prefix}/burst", p) for p in _payloads(n, "b")]
    in_flight: list[int] = []
    t0 = time.monotonic()
    assert publish_and_wait(mqtt_broker.url, messages, qos=1, timeout=60, max_in_flight=100,
                            in_flight=in_flight) == n
    assert time.monotonic() - t0 < 60
    assert len(in_flight) == n
    # Never more than the cap unacknowledged, and the cap was reached: 3,000 QoS 1 messages outrun the PUBACKs.
    assert max(in_flight) == 100, max(in_flight)


def test_publish_and_wait_rejects_non_loopback() -> None:
    with pytest.raises(ValueError, match="loopback"):
        publish_and_wait("mqtt://192.0.2.1:1883", [("t", b"x")], timeout=1)


# -- the embedded broker ------------------------------------------------------------------------------


def test_embedded_broker_qos1_round_trip(unique_prefix: str, client_id: Callable[[str], str]) -> None:
    t0 = time.monotonic()
    with EmbeddedBroker() as broker:
        assert broker.running
        assert broker.url == f"mqtt://127.0.0.1:{broker.port}"
        assert probe_mqtt(broker.host, broker.port)
        _round_trip(broker, unique_prefix, client_id)
        port = broker.port
    assert not broker.running
    assert not probe_mqtt("127.0.0.1", port, timeout=0.5), "the listener is still open after stop()"
    assert time.monotonic() - t0 < 30


def test_embedded_broker_persistent_session_and_retained(unique_prefix: str,
                                                         client_id: Callable[[str], str]) -> None:
    n = 50
    topic = f"{unique_prefix}/queued"
    kept = f"{unique_prefix}-kept/state"  # outside the persistent subscription
    sub_id = client_id("persist")
    with EmbeddedBroker() as broker:
        sub = Collector(broker, sub_id, clean_session=False)
        flags = sub.connect([f"{unique_prefix}/#"], qos=1)
        assert not flags.session_present
        sub.disconnect()

        sent = _payloads(n, "q")
        publish_and_wait(broker, [(topic, p) for p in sent], qos=1)
        publish_and_wait(broker, [(kept, b"retained")], qos=1, retain=True)

        back = Collector(broker, sub_id, clean_session=False)
        try:
            flags = back.connect(qos=1)  # no new SUBSCRIBE: the session still holds it
            assert flags.session_present
            back.wait_for(n, timeout=10)
            got = back.settle(quiet=0.3)
        finally:
            back.disconnect()
        assert [m.payload for m in got] == sent
        assert not any(m.retain for m in got), "queued messages must arrive as ordinary messages"

        with Collector(broker, client_id("late")) as late:
            late.connect([kept], qos=1)
            late.wait_for(1, timeout=5)
            assert [(m.payload, m.retain) for m in late.settle(quiet=0.3)] == [(b"retained", True)]
            # While `late` holds a subscription matching the retained topic, a client subscribed to something
            # else must not be sent that retained message (amqtt 0.12.1 would; EmbeddedBroker fixes it).
            with Collector(broker, client_id("other")) as other:
                other.connect([f"{unique_prefix}/unrelated"], qos=1)
                assert other.settle(quiet=0.3) == []


def test_embedded_broker_refuses_mqtt5(client_id: Callable[[str], str]) -> None:
    with EmbeddedBroker() as broker:
        client = new_client(client_id("v5"), protocol=mqtt.MQTTv5)
        answered = threading.Event()
        reasons: list[object] = []

        def on_connect(_c: mqtt.Client, _u: object, _f: object, reason: object, _p: object) -> None:
            reasons.append(reason)
            answered.set()

        client.on_connect = on_connect
        client.connect(broker.host, broker.port, keepalive=10)
        client.loop_start()
        try:
            assert answered.wait(5)
        finally:
            client.disconnect()
            client.loop_stop()
        assert str(reasons[0]) == "Unsupported protocol version"


def test_embedded_broker_lifecycle_errors() -> None:
    broker = EmbeddedBroker()
    with pytest.raises(EmbeddedBrokerError):
        _ = broker.port
    broker.stop()  # not started: nothing to do
    port = broker.start()
    try:
        with pytest.raises(EmbeddedBrokerError):
            broker.start()
        with pytest.raises(EmbeddedBrokerError, match="failed to start"):
            EmbeddedBroker(port=port).start()  # the port is taken
    finally:
        broker.stop()
    broker.stop()  # twice is fine


def test_embedded_broker_stops_in_bounded_time_with_a_stuck_subscriber(client_id: Callable[[str], str]) -> None:
    broker = EmbeddedBroker(stop_timeout=10)
    broker.start()
    try:
        with socket.create_connection((broker.host, broker.port), timeout=5) as stuck:
            stuck.sendall(connect_packet(client_id("stuck")))
            assert stuck.recv(4) == b"\x20\x02\x00\x00"
            topic = b"stuck/#"
            body = struct.pack("!H", 1) + struct.pack("!H", len(topic)) + topic + b"\x01"
            stuck.sendall(bytes([0x82, len(body)]) + body)  # SUBSCRIBE at QoS 1, then never read again
            assert stuck.recv(5) == b"\x90\x03\x00\x01\x01"
            publish_and_wait(broker, [("stuck/x", b"x" * 10_000)] * 300, qos=1, timeout=30)
            t0 = time.monotonic()
            broker.stop()
            assert time.monotonic() - t0 < 10
    finally:
        broker.stop()
    assert not broker.running


# -- a private Mosquitto across a restart ----------------------------------------------------------------


@pytest.mark.parametrize("protocol", [mqtt.MQTTv311, mqtt.MQTTv5], ids=["mqtt311", "mqtt5"])
def test_private_mosquitto_restart_keeps_queued_qos1(
    private_mosquitto: Callable[..., PrivateMosquitto], unique_prefix: str,
    client_id: Callable[[str], str], protocol: int,
) -> None:
    # 1500 > Mosquitto's default max_queued_messages (1000): all arrive only because the fixture raises it.
    n = 1_500
    broker = private_mosquitto()
    port, pid_before = broker.port, broker.pid
    topic = f"{unique_prefix}/sample"
    sub_id = client_id("restart")

    sub = Collector(broker, sub_id, protocol=protocol, clean_session=False)
    flags = sub.connect([f"{unique_prefix}/#"], qos=1, session_expiry=3600)
    assert not flags.session_present
    sub.disconnect()

    sent = _payloads(n, "r")
    assert publish_and_wait(broker, [(topic, p) for p in sent], qos=1, timeout=30, max_in_flight=200) == n

    t0 = time.monotonic()
    broker.stop()
    assert not broker.running
    assert not probe_mqtt("127.0.0.1", port, timeout=0.5)
    broker.start()
    restart_s = time.monotonic() - t0
    assert broker.port == port and broker.pid != pid_before
    assert (broker.persistence_dir / "mosquitto.db").is_file()

    back = Collector(broker, sub_id, protocol=protocol, clean_session=False)
    try:
        flags = back.connect(qos=1, session_expiry=3600)
        assert flags.session_present, "the persistent session did not survive the restart"
        back.wait_for(n, timeout=20)
        got = back.settle(quiet=0.3)
    finally:
        back.disconnect()
    assert [m.payload for m in got] == sent, (
        f"{len(got)}/{n} after a {restart_s:.2f} s restart; log:\n{broker.log_tail()}")


def test_private_mosquitto_stop_is_idempotent(private_mosquitto: Callable[..., PrivateMosquitto]) -> None:
    broker = private_mosquitto(persistence=False)
    assert "persistence false" in broker.config_path.read_text()
    assert "max_queued_messages 100000" in broker.config_path.read_text()
    assert probe_mqtt(broker.host, broker.port)
    broker.stop()
    broker.stop()
    assert broker.pid is None
