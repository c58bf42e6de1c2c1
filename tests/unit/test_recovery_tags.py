"""Recovery with tags: the input log holds tag messages, a checkpoint the kept updates; a crash anywhere
recovers the state of an uninterrupted run, and the tag counters are in ``/metrics``."""

from __future__ import annotations

import json
import math
import time
from pathlib import Path

import numpy as np
import pytest
from prometheus_client.parser import text_string_to_metric_families

from service.api.metrics import ServiceMetrics
from service.broker_link.messages import Message
from service.engine.operations import Inspect
from service.runtime import Runtime
from tests.support.runtimes import feed, offline_runtime

# Commissioning ends within the stream, so every alarm's times are samples' times, not the wall clock's.
DETECTORS = {"commissioning_samples": 40, "calibration_samples": 0}
CHANNELS = {
    "flow": {"terms": ["1", "speed", "speed^2"], "weighting": "tracked", "detectors": DETECTORS,
             "tags": {"output": "s7.FT1", "inputs": {"speed": "s7.SC1"}}},
    "twin": {"terms": ["1", "flow"], "forgetting_factor": 0.995, "detectors": DETECTORS,
             "tags": {"output": "s7.FT2", "inputs": {"flow": "s7.FT1"}}},
}
TAGS = {"formats": {"gw": {"kind": "json", "value": "/v", "time": "/ts", "time_unit": "ms", "quality": "/q",
                           "good": ["good"]}},
        "tag": [{"id": "{1}.{2}", "topic": "gw/+/+/value", "format": "gw", "max_age": 5.0}]}
EPOCH_MS = 1_767_225_600_000          # 2026-01-01T00:00:00Z in ms
WALL_CLOCK = {"engine.updated_at"}    # arrival times: what the wall clock said, not the inputs


def _runtime(store: Path) -> Runtime:
    return offline_runtime(CHANNELS, store, store_options={"checkpoint_seconds": 3600}, tags=TAGS)


def _tag(tag: str, value: float, t_ms: int, arrival: float, quality: str = "good") -> Message:
    site, name = tag.split(".")
    body = json.dumps({"v": value, "ts": t_ms, "q": quality}).encode()
    return Message(None, body, "mqtt", topic=f"gw/{site}/{name}/value", received=arrival)


def _stream(first: int, count: int, arrival: float) -> list[Message]:
    """The speed reports by exception (only when it moved); every 17th flow reading is of bad quality."""
    rng = np.random.default_rng(first)
    out, held = [], math.nan
    for k in range(first, first + count):
        t_ms = EPOCH_MS + 1000 * k
        speed = round(0.6 + 0.3 * math.sin(0.21 * k), 2)
        flow = 2.0 + 50.0 * speed + 9.0 * speed * speed + float(rng.normal(0.0, 0.2))
        if speed != held:
            out.append(_tag("s7.SC1", speed, t_ms, arrival))
            held = speed
        out.append(_tag("s7.FT1", flow, t_ms, arrival, "bad" if k % 17 == 0 else "good"))
        out.append(_tag("s7.FT2", 0.98 * flow + float(rng.normal(0.0, 0.1)), t_ms + 200, arrival))
    return out


def _state(runtime: Runtime) -> tuple[dict[str, np.ndarray], dict[str, object]]:
    persistence = runtime.persistence
    assert persistence is not None
    return persistence.state(runtime.engine)


def _checkpoint(runtime: Runtime) -> None:
    persistence = runtime.persistence
    assert persistence is not None
    runtime.engine.execute(Inspect(lambda engine: persistence.checkpoint(engine)))


@pytest.mark.parametrize("checkpoint_after", [None, 1])
def test_a_crash_mid_stream_recovers_the_uninterrupted_state_with_tags(tmp_path: Path,
                                                                       checkpoint_after: int | None) -> None:
    arrival = time.time()
    stream = _stream(0, 240, arrival)
    cuts = [stream[i:i + 101] for i in range(0, len(stream), 101)]     # cuts fall inside a step's tags
    whole = _runtime(tmp_path / "whole")
    whole.start()
    for chunk in cuts:
        feed(whole, chunk)

    first = _runtime(tmp_path / "crashed")
    first.start()
    for k, chunk in enumerate(cuts[:-1]):
        feed(first, chunk)
        if k == checkpoint_after:
            _checkpoint(first)
    first.engine.stop()                                   # kill -9: no final checkpoint, no clean close
    first._release_lock()

    second = _runtime(tmp_path / "crashed")
    second.start()
    assert second.recovery is not None and second.recovery["reapplied"] > 0
    feed(second, cuts[-1])
    try:
        arrays_a, meta_a = _state(whole)
        arrays_b, meta_b = _state(second)
        assert arrays_a.keys() == arrays_b.keys()
        assert any(key.startswith("tags.") for key in arrays_a)
        for key in arrays_a.keys() - WALL_CLOCK:
            assert arrays_a[key].tobytes() == arrays_b[key].tobytes(), key
        assert meta_a["bank"] == meta_b["bank"]
        assert meta_a["tags"] == meta_b["tags"]
        assert whole.engine.stats.samples_applied == second.engine.stats.samples_applied > 400
        assert whole.engine.stats.not_formed == second.engine.stats.not_formed
    finally:
        whole.stop()
        second.stop()


def test_tag_counters_are_in_the_metrics(tmp_path: Path) -> None:
    runtime = _runtime(tmp_path / "store")
    runtime.start()
    try:
        arrival = time.time()
        feed(runtime, [
            _tag("s7.FT1", 20.0, EPOCH_MS, arrival),                          # flow: no speed yet
            _tag("s7.SC1", 0.5, EPOCH_MS + 1000, arrival),
            _tag("s7.SC1", 0.4, EPOCH_MS + 500, arrival),                     # older than the held speed
            _tag("s7.FT1", 30.0, EPOCH_MS + 9000, arrival),                   # speed 8 s old: max_age 5 s
            Message(None, b"{", "mqtt", topic="gw/s7/SC1/value", received=arrival),
        ])
        text = ServiceMetrics(runtime).text().decode()
    finally:
        runtime.stop()
    samples = {(s.name, tuple(sorted(s.labels.items()))): s.value
               for family in text_string_to_metric_families(text) for s in family.samples}
    assert samples[("rwls_samples_not_formed_total", (("channel", "flow"), ("reason", "input_missing")))] == 1.0
    assert samples[("rwls_samples_not_formed_total", (("channel", "flow"), ("reason", "input_stale")))] == 1.0
    assert samples[("rwls_tag_updates_not_newer_total", ())] == 1.0
    assert samples[("rwls_tag_updates_unused_total", ())] == 0.0
    assert samples[("rwls_rejections_total", (("reason", "bad_json"),))] == 1.0
