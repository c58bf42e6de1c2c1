"""Alarm notifications end to end through a real broker on 127.0.0.1: retained state, events, webhooks."""

from __future__ import annotations

import json
import socket
import threading
import time
from collections.abc import Callable, Iterator
from http.server import BaseHTTPRequestHandler, ThreadingHTTPServer
from pathlib import Path
from typing import Any

import numpy as np
import pytest

from service.config.settings import RwlsConfig, parse_config
from tests.support.configs import alarms_table, mqtt_settings
from tests.support.mqtt_clients import Collector, publish_and_wait
from tests.support.runtimes import start_subscribed
from tests.support.waits import eventually

pytestmark = pytest.mark.integration

KINDS = ("noise_level", "variance", "offset", "drift", "stale")


def _config(prefix: str, port: int, client: str, store: Path, webhooks: list[dict[str, Any]]) -> RwlsConfig:
    channel = {"terms": ["1", "u"], "forgetting_factor": 0.99,
               "detectors": {"commissioning_samples": 60, "calibration_samples": 0, "offset": {"h": 5.0}}}
    return parse_config(mqtt_settings({"dp": channel, "quiet": channel}, prefix=prefix, port=port, client_id=client,
                                      store=store, alarms=alarms_table(prefix, webhooks=webhooks)))


def _messages(prefix: str, first: int, count: int, offset: float = 0.0) -> list[tuple[str, bytes]]:
    rng = np.random.default_rng(first)
    out = []
    for k in range(first, first + count):
        u = float(rng.normal())
        body = {"t": 5000.0 + k, "y": 1.0 + 0.5 * u + offset + float(rng.normal(0.0, 0.1)), "u": {"u": u}, "seq": k}
        out.append((f"{prefix}/dp", json.dumps(body).encode()))
    return out


class _Receiver:
    """A webhook receiver on loopback that records every POST (or, ``stall``, never answers)."""

    def __init__(self, stall: bool = False) -> None:
        received: list[dict[str, Any]] = []
        self.received = received
        release = threading.Event()
        self.release = release

        class Handler(BaseHTTPRequestHandler):
            def do_POST(self) -> None:
                if stall:
                    release.wait(30.0)
                body = self.rfile.read(int(self.headers["Content-Length"]))
                received.append(json.loads(body))
                self.send_response(204)
                self.end_headers()

            def log_message(self, *_args: object) -> None:
                pass

        self.server = ThreadingHTTPServer(("127.0.0.1", 0), Handler)
        self.server.daemon_threads = True
        self.url = f"http://127.0.0.1:{self.server.server_address[1]}/rwls"
        self._thread = threading.Thread(target=self.server.serve_forever, kwargs={"poll_interval": 0.05},
                                        daemon=True)
        self._thread.start()

    def close(self) -> None:
        self.release.set()
        self.server.shutdown()
        self.server.server_close()


@pytest.fixture
def receivers() -> Iterator[Callable[..., _Receiver]]:
    made: list[_Receiver] = []

    def make(stall: bool = False) -> _Receiver:
        receiver = _Receiver(stall)
        made.append(receiver)
        return receiver

    yield make
    for receiver in made:
        receiver.close()


def test_retained_states_reach_a_late_subscriber_and_events_and_webhooks_get_every_transition(
        mqtt_broker: Any, unique_prefix: str, client_id: Callable[[str], str], tmp_path: Path,
        receivers: Callable[..., _Receiver]) -> None:
    hook = receivers()
    config = _config(unique_prefix, mqtt_broker.port, client_id("rwls"), tmp_path / "store",
                     [{"url": hook.url, "timeout": 2.0, "retries": 2}])
    runtime = start_subscribed(config)
    try:
        with Collector(mqtt_broker, client_id("events")) as events:
            events.connect([f"{unique_prefix}/alarms/event/#"])
            already = len(runtime.alarms.journal)          # commissioning suppressions, made at start
            publish_and_wait(mqtt_broker, _messages(unique_prefix, 0, 100), qos=1, timeout=30.0)
            publish_and_wait(mqtt_broker, _messages(unique_prefix, 100, 15, offset=1.0), qos=1, timeout=30.0)
            assert eventually(lambda: runtime.alarms.get("dp:offset").state == "Unacknowledged", 15.0)
            journal = list(runtime.alarms.journal)
            got = events.wait_for(len(journal) - already, timeout=15.0)
            assert eventually(lambda: len(hook.received) >= len(journal), 15.0)
        # Every transition, in order, as an MQTT event (since subscribing) and as a webhook POST (all).
        assert [json.loads(m.payload)["entry"]["seq"] for m in got] == [e.seq for e in journal[already:]]
        assert [r["entry"]["seq"] for r in hook.received] == [e.seq for e in journal]
        assert len(journal) > already
        assert not any(m.retain for m in got)

        # A subscriber that connects now gets every alarm's state from the broker's retained messages.
        with Collector(mqtt_broker, client_id("late")) as late:
            late.connect([f"{unique_prefix}/alarms/state/#"])
            states = late.settle(quiet=0.5, timeout=10.0)
        by_topic = {m.topic: json.loads(m.payload) for m in states}
        assert all(m.retain for m in states)
        assert set(by_topic) == {f"{unique_prefix}/alarms/state/{c}/{k}" for c in ("dp", "quiet") for k in KINDS}
        offset = by_topic[f"{unique_prefix}/alarms/state/dp/offset"]
        assert offset["state"] == "Unacknowledged" and offset["evidence"]["statistic"] > 5.0
        assert by_topic[f"{unique_prefix}/alarms/state/quiet/offset"]["state"] == "Suppressed by design"
    finally:
        runtime.stop()
        _clear_retained(mqtt_broker, unique_prefix, client_id("cleaner"))


def test_a_stalled_webhook_receiver_does_not_hold_up_ingest(
        mqtt_broker: Any, unique_prefix: str, client_id: Callable[[str], str], tmp_path: Path,
        receivers: Callable[..., _Receiver]) -> None:
    hook = receivers(stall=True)
    dead_port = socket.socket()
    dead_port.bind(("127.0.0.1", 0))             # bound, never listening: connections are refused
    config = _config(unique_prefix, mqtt_broker.port, client_id("rwls"), tmp_path / "store",
                     [{"url": hook.url, "timeout": 20.0, "retries": 0},
                      {"url": f"http://127.0.0.1:{dead_port.getsockname()[1]}/", "timeout": 1.0, "retries": 50}])
    runtime = start_subscribed(config)
    try:
        publish_and_wait(mqtt_broker, _messages(unique_prefix, 0, 100), qos=1, timeout=30.0)
        publish_and_wait(mqtt_broker, _messages(unique_prefix, 100, 300, offset=1.0), qos=1, timeout=30.0)
        # Every sample is applied and the alarm raised while the receivers still hold everything back.
        assert eventually(lambda: runtime.engine.stats.samples_applied >= 400, 15.0)
        assert runtime.alarms.get("dp:offset").state == "Unacknowledged"
        stats = runtime.webhooks.stats
        assert stats[hook.url].delivered == 0 and hook.received == []
        assert sum(s.delivered for s in stats.values()) == 0
    finally:
        hook.release.set()
        dead_port.close()
        started = time.monotonic()
        runtime.stop()
        assert time.monotonic() - started < 15.0           # stopping does not wait out the retries
        _clear_retained(mqtt_broker, unique_prefix, client_id("cleaner"))


def _clear_retained(broker: Any, prefix: str, cid: str) -> None:
    """Empty retained payloads remove the test's retained messages from the shared broker."""
    topics = [f"{prefix}/alarms/state/{c}/{k}" for c in ("dp", "quiet") for k in KINDS]
    publish_and_wait(broker, [(t, b"") for t in topics], qos=1, timeout=10.0, retain=True, client_id=cid)
