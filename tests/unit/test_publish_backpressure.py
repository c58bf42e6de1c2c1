"""Publishing when the MQTT client's outgoing queue is full: waited out while connected, never dropped silently.

A stand-in for paho's client answers ``MQTT_ERR_QUEUE_SIZE`` a few times (as paho does while its queue of
unacknowledged QoS 1 messages is at ``max_queued_messages``), then takes the message.
"""

from __future__ import annotations

import logging
from types import SimpleNamespace
from typing import Any

import paho.mqtt.client as mqtt
import pytest

from service.broker_link.mqtt_client import BrokerSettings, MqttIngest
from service.engine.log_throttle import LogThrottle


class _FullThenFree:
    def __init__(self, full_for: int) -> None:
        self.full_for = full_for
        self.calls = 0
        self.taken: list[tuple[str, bytes]] = []

    def publish(self, topic: str, payload: bytes, qos: int, retain: bool) -> Any:
        self.calls += 1
        if self.calls <= self.full_for:
            return SimpleNamespace(rc=mqtt.MQTT_ERR_QUEUE_SIZE)
        self.taken.append((topic, payload))
        return SimpleNamespace(rc=mqtt.MQTT_ERR_SUCCESS)


def _ingest(client: _FullThenFree, connected: bool) -> MqttIngest:
    ingest = MqttIngest(BrokerSettings(), {}, lambda _m: True)
    ingest._client = client  # type: ignore[assignment]
    if connected:
        ingest._connected.set()
    return ingest


def test_a_full_queue_while_connected_is_waited_out() -> None:
    client = _FullThenFree(full_for=5)
    ingest = _ingest(client, connected=True)
    ingest.publish("dead", b"letter", wait=5.0)
    assert client.taken == [("dead", b"letter")]
    assert client.calls == 6 and ingest.publish_failures == 0


def test_a_queue_that_stays_full_fails_after_the_wait_and_is_counted() -> None:
    ingest = _ingest(_FullThenFree(full_for=10**9), connected=True)
    with pytest.raises(RuntimeError, match="queue"):
        ingest.publish("dead", b"letter", wait=0.05)
    assert ingest.publish_failures == 1


def test_offline_a_full_queue_fails_at_once() -> None:
    client = _FullThenFree(full_for=10**9)
    ingest = _ingest(client, connected=False)
    with pytest.raises(RuntimeError):
        ingest.publish("dead", b"letter", wait=60.0)        # would take a minute if it waited
    assert client.calls == 1 and ingest.publish_failures == 1


def test_log_throttle_logs_a_burst_then_says_how_many_it_left_out(caplog: pytest.LogCaptureFixture) -> None:
    now = [0.0]
    throttle = LogThrottle(logging.getLogger("rwls.test"), burst=3, period=60.0, clock=lambda: now[0])
    with caplog.at_level(logging.INFO, logger="rwls.test"):
        for i in range(100):
            throttle.log("refusals (bad_type)", "refused %d", i)
        throttle.log("refusals (too_large)", "other key %d", 0)
        now[0] = 61.0
        throttle.log("refusals (bad_type)", "refused %d", 100)
    lines = [r.getMessage() for r in caplog.records]
    assert lines == ["refused 0", "refused 1", "refused 2", "other key 0",
                     "97 more refusals (bad_type) in 61 s, not logged one by one", "refused 100"]
