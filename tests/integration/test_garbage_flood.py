"""100,000 garbage messages interleaved with good ones, through a real Mosquitto into ``rwls serve``.

The good samples must leave exactly the state a clean run of them alone leaves (every array bit for bit);
every piece of garbage must be refused with the reason its kind calls for, counted, and dead-lettered; the
service's memory must stop growing once its bounded structures are full.
"""

from __future__ import annotations

import json
import time
from collections import Counter
from collections.abc import Callable
from pathlib import Path
from typing import Any

import numpy as np
import pytest

from tests.integration.final_state import assert_same_checkpoint, final_state, uninterrupted_state
from tests.support.configs import mqtt_settings
from tests.support.mqtt_clients import Collector, publish_and_wait
from tests.support.service_process import ServiceProcess

pytestmark = [pytest.mark.integration, pytest.mark.slow]

GARBAGE = 100_000
GOOD_PER_CHANNEL = 250
CHUNK = 5_000                        # messages per publishing round; memory is read after each
SEED = 20261203
CHANNELS: dict[str, dict[str, Any]] = {
    "flow": {"terms": ["1", "u"], "forgetting_factor": 0.995, "detectors": {"commissioning_samples": 40}},
    "temp": {"terms": ["1", "u"], "weighting": "tracked", "noise": {"model_terms": ["1", "u"]},
             "detectors": {"commissioning_samples": 40}},
    "lab": {"terms": ["1", "u"], "weighting": "sample", "detectors": {"commissioning_samples": 40}},
}
TOO_LARGE = 70_000                   # bytes: past the default broker.max_payload_bytes (65,536)


def _garbage_kinds() -> list[tuple[str, Callable[[int], bytes]]]:
    """(reason the service must give, payload for the i-th of its kind): see service/broker_link/payload.py."""
    def text(s: str) -> bytes:
        return s.encode()
    return [
        ("bad_encoding", lambda i: b'{"y": 1, "note": "\xff\xfe' + str(i).encode() + b'"}'),
        ("malformed_json", lambda i: text(f'{{"y": {i}, ')),
        ("malformed_json", lambda i: text(f'{{"y": NaN, "seq": {i}}}')),
        ("malformed_json", lambda i: text(f'{{"y": 1, "y": {i}}}')),               # duplicate key
        ("bad_structure", lambda i: text(f"[{i}, 2, 3]")),
        ("bad_structure", lambda i: text(f'{{"samples": [], "n": {i}}}')),
        ("too_deep", lambda i: text("[" * (20 + i % 50) + "]" * (20 + i % 50))),
        ("bad_type", lambda i: text(f'{{"y": "{i}", "u": {{"u": 1}}}}')),
        ("bad_type", lambda i: text(f'{{"y": true, "u": {{"u": {i}}}}}')),
        ("unknown_field", lambda i: text(f'{{"y": 1, "u": {{"u": 1}}, "colour": {i}}}')),
        ("missing_field", lambda i: text(f'{{"t": {i}, "u": {{"u": 1}}}}')),
        ("bad_time", lambda i: text(f'{{"y": 1, "u": {{"u": 1}}, "t": "the {i}th of never"}}')),
        ("non_finite", lambda i: text(f'{{"y": 1e400, "u": {{"u": {i}}}}}')),
        ("non_finite", lambda i: text(f'{{"y": {"9" * 400}, "u": {{"u": {i}}}}}')),
        ("bad_sigma", lambda i: text(f'{{"y": 1, "u": {{"u": 1}}, "sigma": -{i + 1}}}')),
        ("bad_weight", lambda i: text(f'{{"y": 1, "u": {{"u": 1}}, "weight": 0, "seq": {i}}}')),
        ("missing_input", lambda i: text(f'{{"y": {i}}}')),
    ]


def _streams(prefix: str) -> tuple[list[tuple[str, str, bytes]], list[tuple[str, bytes]], Counter[str]]:
    """The good samples (in order), everything as published (garbage with the good spread through it),
    and the refusals the garbage must earn, by reason."""
    rng = np.random.default_rng(SEED)
    good: list[tuple[str, str, bytes]] = []
    for k in range(GOOD_PER_CHANNEL):
        for cid in CHANNELS:
            u = float(rng.normal())
            body: dict[str, Any] = {"t": 1_767_225_600.0 + 10.0 * k, "y": 0.5 + 2.0 * u + float(rng.normal(0, 0.1)),
                                    "u": {"u": u}, "seq": k}
            if cid == "lab":
                body["sigma"] = 0.1
            good.append((cid, f"{prefix}/{cid}", json.dumps(body).encode()))
    kinds = _garbage_kinds()
    topics = [f"{prefix}/{cid}" for cid in CHANNELS]
    expected: Counter[str] = Counter()
    garbage: list[tuple[str, bytes]] = []
    for i in range(GARBAGE):
        if i % 2_000 == 0:                                  # 50 oversized payloads
            reason, payload = "too_large", b'{"y": 1, "pad": "' + b"x" * TOO_LARGE + b'"}'
        else:
            reason, make = kinds[int(rng.integers(len(kinds)))]
            payload = make(i)
        expected[reason] += 1
        garbage.append((topics[int(rng.integers(len(topics)))], payload))
    # The good samples keep their order; each lands at a random place among the garbage.
    slots = np.sort(rng.choice(GARBAGE + len(good), size=len(good), replace=False))
    published: list[tuple[str, bytes]] = []
    g = iter(garbage)
    s = iter(good)
    slot_set = set(slots.tolist())
    for position in range(GARBAGE + len(good)):
        if position in slot_set:
            _, topic, payload = next(s)
            published.append((topic, payload))
        else:
            published.append(next(g))
    return good, published, expected


def _applied(service: ServiceProcess) -> int:
    return sum(d["samples"] + d["warmup"] for d in (service.get(f"/api/v1/channels/{c}") for c in CHANNELS))


def test_garbage_flood_leaves_the_clean_state_counts_every_refusal_and_stays_bounded(
        private_mosquitto: Callable[..., Any], unique_prefix: str, client_id: Callable[[str], str],
        tmp_path: Path) -> None:
    broker = private_mosquitto(persistence=False, max_queued_messages=200_000)
    good, published, expected = _streams(unique_prefix)
    assert sum(expected.values()) == GARBAGE
    settings = mqtt_settings(CHANNELS, prefix=unique_prefix, port=broker.port, client_id=client_id("rwls"),
                             store=tmp_path / "data", store_options={"checkpoint_seconds": 2.0})
    dead = Collector(broker.url, client_id("dead"))
    dead.connect([f"{unique_prefix}/dead"], qos=1)
    service = ServiceProcess(settings, tmp_path / "service").start()
    rss: list[int] = []
    started = time.monotonic()
    try:
        service.wait_subscribed()
        for start in range(0, len(published), CHUNK):
            publish_and_wait(broker, published[start:start + CHUNK], qos=1, timeout=120.0)
            rss.append(service.rss_bytes())
        letters = dead.wait_for(GARBAGE, timeout=120.0)
        deadline = time.monotonic() + 60.0
        while _applied(service) < len(good) and time.monotonic() < deadline:
            time.sleep(0.1)
        elapsed = time.monotonic() - started
        dead_letter_failures = (service.metric("rwls_dead_letter_failures_total")
                                + service.metric("rwls_publish_failures_total"))
        log_lines = len(service.log_path.read_text(errors="replace").splitlines())
        assert service.stop() == 143, service.log_tail()
    finally:
        service.kill()
        dead.disconnect()
    flooded = final_state(tmp_path / "data", "")
    stats = flooded[1]["engine"]["stats"]
    half = len(rss) // 2
    growth = max(rss[half:]) - rss[half]
    print(f"\n{len(published)} messages ({GARBAGE} garbage) in {elapsed:.1f} s "
          f"({len(published) / elapsed:,.0f}/s end to end); refused {sum(stats['rejected'].values())}, "
          f"dead letters {len(letters)} (failed {dead_letter_failures:.0f}); service RSS MiB at each {CHUNK}: "
          f"{[round(r / 2**20) for r in rss]}; growth over the second half {growth / 2**20:.1f} MiB; "
          f"{log_lines} log lines")
    assert stats["rejected"] == dict(expected)              # each kind refused for its reason, each counted
    assert stats["samples_applied"] + stats["samples_warmup"] == len(good)
    assert dead_letter_failures == 0
    assert log_lines < 1_000                                # refusals are counted, not logged one by one
    assert len(letters) == GARBAGE                          # every refusal dead-lettered once ...
    reasons = Counter(json.loads(m.payload)["reason"] for m in letters)
    assert reasons == expected                              # ... with its reason
    # Bounded: past the half-way point only the redelivery window (65,535 fingerprints, ~8 MB) may still fill.
    assert growth < 24 * 2**20, [round(r / 2**20) for r in rss]
    assert_same_checkpoint(flooded, uninterrupted_state(settings, tmp_path / "clean", good))
