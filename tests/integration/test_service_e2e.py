"""The live service end to end through a real broker on 127.0.0.1: MQTT in, estimates out.

Same samples over MQTT and in a CSV give the same bits; every kind of bad
input is counted, dead-lettered and leaves the state as a clean run leaves it;
a broker restart loses no sample.
"""

from __future__ import annotations

import csv
import json
import time
from collections import Counter
from collections.abc import Callable
from pathlib import Path
from typing import Any

import numpy as np
import pytest

from service.broker_link.mqtt_client import MqttIngest
from service.config.settings import RwlsConfig, parse_config
from service.offline.replay import replay_file
from service.runtime import Runtime
from tests.support.configs import QUICK_RECONNECT, mqtt_settings
from tests.support.mqtt_clients import Collector, publish_and_wait

pytestmark = pytest.mark.integration

CHANNELS: dict[str, dict[str, Any]] = {
    "temp": {"terms": ["1", "u"], "forgetting_factor": 0.999, "weighting": "tracked",
             "noise": {"initial_sigma": 0.5}},
    "flow": {"terms": ["1", "u", "u^2"], "forgetting_factor": 0.99},
    "o2": {"terms": ["1", "y[-1]", "u"], "weighting": "sample"},
}


def _config(prefix: str, port: int, client: str, store: Path, **broker_overrides: Any) -> RwlsConfig:
    return parse_config(mqtt_settings(CHANNELS, prefix=prefix, port=port, client_id=client, store=store,
                                      broker={"max_payload_bytes": 4096, **broker_overrides}))


def _samples(seed: int, count: int) -> list[tuple[str, dict[str, Any]]]:
    """(channel, sample) pairs, interleaved, with increasing t and seq per channel (invented data)."""
    rng = np.random.default_rng(seed)
    out = []
    for k in range(count):
        for cid in CHANNELS:
            u = float(rng.uniform(-2.0, 2.0))
            sample: dict[str, Any] = {"t": 1_700_000_000.0 + 10.0 * k, "y": 1.0 + 0.5 * u + float(rng.normal(0, 0.1)),
                                      "u": {"u": u}, "seq": k}
            if cid == "o2":
                sample["sigma"] = 0.1
            out.append((cid, sample))
    return out


def _write_csv(path: Path, samples: list[tuple[str, dict[str, Any]]]) -> None:
    with path.open("w", newline="") as handle:
        writer = csv.writer(handle)
        writer.writerow(["channel", "t", "y", "u", "sigma"])
        for cid, s in samples:
            writer.writerow([cid, repr(s["t"]), repr(s["y"]), repr(s["u"]["u"]), repr(s.get("sigma", "")) if
                             "sigma" in s else ""])


def _wait_applied(runtime: Runtime, count: int, timeout: float = 30.0) -> None:
    deadline = time.monotonic() + timeout
    while time.monotonic() < deadline:
        stats = runtime.engine.stats
        if stats.samples_applied + stats.samples_warmup + sum(stats.refused.values()) >= count:
            runtime.engine.drain(5.0)
            return
        time.sleep(0.02)
    stats = runtime.engine.stats
    raise AssertionError(f"timed out: {stats.samples_applied} applied, {stats.samples_warmup} warm-up, "
                         f"{stats.refused} refused of {count}")


def _views(runtime: Runtime) -> dict[str, Any]:
    return runtime.engine.bank.view()


def _replay(tmp_path: Path, config: RwlsConfig, samples: list[tuple[str, dict[str, Any]]]) -> dict[str, Any]:
    data = tmp_path / "same.csv"
    _write_csv(data, samples)
    return replay_file(data, config, show_progress=False).channels


@pytest.mark.parametrize("ingest", ["process", "thread"])
def test_parameters_over_mqtt_equal_replay_bit_for_bit(mqtt_broker: Any, unique_prefix: str,
                                                        client_id: Callable[[str], str], tmp_path: Path,
                                                        start_runtime: Callable[[RwlsConfig], Runtime],
                                                        ingest: str) -> None:
    config = _config(unique_prefix, mqtt_broker.port, client_id("rwls"), tmp_path / "store", ingest=ingest)
    runtime = start_runtime(config)
    samples = _samples(seed=11, count=150)
    messages = []
    for k in range(0, len(samples), 9):     # single payloads and batches of 3 consecutive samples per channel
        chunk = samples[k:k + 9]
        if (k // 9) % 2:
            for cid, s in chunk:
                messages.append((f"{unique_prefix}/{cid}", json.dumps(s).encode()))
        else:
            for cid in CHANNELS:
                batch = [s for c, s in chunk if c == cid]
                if batch:
                    messages.append((f"{unique_prefix}/{cid}", json.dumps({"samples": batch}).encode()))
    publish_and_wait(mqtt_broker, messages, qos=1, timeout=30.0)
    _wait_applied(runtime, len(samples))
    replayed = _replay(tmp_path, config, samples)
    for cid, view in _views(runtime).items():
        report = replayed[cid]
        # Bit for bit: the engine and replay run the same arithmetic (vectorised rounds and
        # scalar twins are identical), whatever the batching of messages.
        assert [float(v) for v in view.parameters] == [report["parameters"][t] for t in view.terms], cid
        assert float(view.residual_sd) == report["residual_sd"]
        assert view.applied == report["samples"] and view.warmup == report["warmup"]
    assert runtime.engine.stats.refused == {}


BAD_MESSAGES: list[tuple[str, bytes, str]] = [
    ("temp", b"{not json", "malformed_json"),
    ("temp", b'{"y": NaN, "u": {"u": 1}}', "malformed_json"),
    ("temp", b"x" * 5000, "too_large"),
    ("temp", b"[" * 50 + b"]" * 50, "too_deep"),
    ("temp", b'{"samples": []}', "bad_structure"),
    ("temp", b'{"y": "1.5", "u": {"u": 1}}', "bad_type"),
    ("flow", b'{"y": 1e400, "u": {"u": 1}}', "non_finite"),
    ("flow", b'{"u": {"u": 1}}', "missing_field"),
    ("flow", b'{"y": 1, "u": {}}', "missing_input"),
    ("flow", b'{"y": 1, "u": {"u": 1}, "colour": "red"}', "unknown_field"),
    ("o2", b'{"y": 1, "u": {"u": 1}, "sigma": -1}', "bad_sigma"),
    ("o2", b'{"y": 1, "u": {"u": 1}, "weight": 0}', "bad_weight"),
    ("o2", b'{"y": 1, "u": {"u": 1}, "t": "yesterday"}', "bad_time"),
    ("o2", b"\xff\xfe", "bad_encoding"),
]


def test_every_bad_input_is_counted_dead_lettered_and_leaves_state_untouched(
        mqtt_broker: Any, unique_prefix: str, client_id: Callable[[str], str], tmp_path: Path,
        start_runtime: Callable[[RwlsConfig], Runtime]) -> None:
    config = _config(unique_prefix, mqtt_broker.port, client_id("rwls"), tmp_path / "store")
    dead = Collector(mqtt_broker, client_id("dead"))
    dead.connect([f"{unique_prefix}/dead"])
    runtime = start_runtime(config)
    good = _samples(seed=12, count=60)
    messages: list[tuple[str, bytes]] = []
    expected: Counter[str] = Counter()
    for k, (cid, sample) in enumerate(good):
        messages.append((f"{unique_prefix}/{cid}", json.dumps(sample).encode()))
        if k % 10 == 5 and k // 10 < len(BAD_MESSAGES):
            bad_cid, payload, reason = BAD_MESSAGES[k // 10]
            messages.append((f"{unique_prefix}/{bad_cid}", payload))
            expected[reason] += 1
        if k == 40:
            # Replays of applied samples: same seq, and an older time with a newer seq.
            messages.append((f"{unique_prefix}/{cid}", json.dumps(sample).encode()))
            expected["duplicate_seq"] += 1
            stale = {**sample, "seq": 10_000, "t": sample["t"] - 100.0}
            messages.append((f"{unique_prefix}/{cid}", json.dumps(stale).encode()))
            expected["out_of_order"] += 1
    publish_and_wait(mqtt_broker, messages, qos=1, timeout=30.0)
    _wait_applied(runtime, len(good) + sum(expected.values()))
    assert runtime.engine.stats.refused == dict(expected)
    dead.wait_for(sum(expected.values()), timeout=10.0)
    letters = [json.loads(m.payload) for m in dead.messages]
    assert Counter(letter["reason"] for letter in letters) == expected
    assert all(letter["topic"].startswith(unique_prefix) for letter in letters)
    dead.disconnect()

    # The state equals a run that never saw the bad messages, array for array.
    clean = _replay(tmp_path, config, good)
    for cid, view in _views(runtime).items():
        assert [float(v) for v in view.parameters] == [clean[cid]["parameters"][t] for t in view.terms], cid
        assert float(view.residual_sd) == clean[cid]["residual_sd"]


def test_broker_restart_mid_stream_loses_no_sample(private_mosquitto: Callable[..., Any], unique_prefix: str,
                                                   client_id: Callable[[str], str], tmp_path: Path,
                                                   start_runtime: Callable[[RwlsConfig], Runtime]) -> None:
    broker = private_mosquitto(persistence=True)
    config = _config(unique_prefix, broker.port, client_id("rwls"), tmp_path / "store", **QUICK_RECONNECT)
    runtime = start_runtime(config)
    assert runtime.ingest is not None
    samples = _samples(seed=13, count=120)
    messages = [(f"{unique_prefix}/{cid}", json.dumps(s).encode()) for cid, s in samples]
    third = len(messages) // 3

    publish_and_wait(broker, messages[:third], qos=1, timeout=20.0)
    _wait_applied(runtime, third)

    # rwls goes away while the plant keeps publishing: the broker queues for its persistent session...
    runtime.ingest.stop()
    publish_and_wait(broker, messages[third:2 * third], qos=1, timeout=20.0)
    # ...and the broker itself restarts (SIGTERM by PID writes its persistence file).
    broker.stop()
    broker.start()
    publish_and_wait(broker, messages[2 * third:], qos=1, timeout=20.0)
    # A new subscriber with the same client id picks the session up.
    ingest = MqttIngest(runtime.ingest.settings, runtime.topics, runtime._from_mqtt)
    runtime.ingest = ingest                     # acknowledgements (once in the input log) go to it
    ingest.start()
    try:
        assert ingest.wait_subscribed(15.0)
        _wait_applied(runtime, len(messages), timeout=30.0)
    finally:
        ingest.stop()
    assert runtime.engine.stats.samples_applied + runtime.engine.stats.samples_warmup == len(samples)
    assert runtime.engine.stats.refused == {}
    replayed = _replay(tmp_path, config, samples)
    for cid, view in _views(runtime).items():
        assert [float(v) for v in view.parameters] == [replayed[cid]["parameters"][t] for t in view.terms]
