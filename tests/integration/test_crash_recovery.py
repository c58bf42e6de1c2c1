"""``kill -9`` of ``rwls serve`` at random moments while a real Mosquitto streams to it, then restarts.

The final state (the last checkpoint's arrays, the bank's counters, the alarm journal) must equal, bit for bit
and entry for entry, that of an uninterrupted run on the same stream. The service acknowledges a message to
the broker only once it is in the synced input log; what a kill loses the broker redelivers to the persistent
session; what was logged but not yet acknowledged comes back with DUP set and is recognised. Against SQLite in
the data directory and against PostgreSQL (a database of the test's own).
"""

from __future__ import annotations

import json
import threading
import time
from collections.abc import Callable
from pathlib import Path
from typing import Any

import numpy as np
import pytest

from tests.integration.final_state import assert_same_checkpoint, final_state, uninterrupted_state
from tests.support.configs import QUICK_RECONNECT, alarms_table, mqtt_settings
from tests.support.mqtt_clients import publish_and_wait
from tests.support.service_process import ServiceProcess

pytestmark = pytest.mark.integration

STEPS = 400                  # samples per channel
KILLS = 3
SEED = 20261202
CHANNELS: dict[str, dict[str, Any]] = {
    **{f"c{k}": {"terms": ["1", "u"], "forgetting_factor": 0.99,
                 "detectors": {"commissioning_samples": 40, "calibration_samples": 0,   # Gaussian: no table
                               "offset": {"h": 5.0}}} for k in range(3)},
    "arx": {"terms": ["1", "y[-1]", "u"], "weighting": "tracked", "noise": {"model_terms": ["1", "u"]},
            "detectors": {"commissioning_samples": 40}},
    "lab": {"terms": ["1", "u"], "weighting": "sample", "detectors": {"commissioning_samples": 40}},
    # Assembled from two tags on their own topics (below): recovery must form the same samples.
    "meter": {"terms": ["1", "speed"], "weighting": "tracked", "detectors": {"commissioning_samples": 40}},
}
TAG_FORMAT = {"kind": "json", "value": "/v", "time": "/ts", "time_unit": "ms", "quality": "/q", "good": [0]}


def _tags_table(prefix: str) -> dict[str, Any]:
    """Every tag below ``<prefix>/tags/`` (one pattern entry), each a JSON value with ms time and quality."""
    level = prefix.count("/") + 2                 # the '+' level (counted from 0) names the tag
    return {"formats": {"gw": TAG_FORMAT},
            "tag": [{"id": f"{{{level}}}", "topic": f"{prefix}/tags/+", "format": "gw"}]}


def _tag_message(prefix: str, tag: str, value: float, t: float, quality: int = 0) -> tuple[None, str, bytes]:
    body = {"v": value, "ts": round(t * 1000.0), "q": quality}
    return None, f"{prefix}/tags/{tag}", json.dumps(body).encode()


def _stream(prefix: str) -> list[tuple[str | None, str, bytes]]:
    """(channel or None for a tag message, topic, payload) in publishing order: every channel's k-th sample,
    then the (k+1)-th. The meter's speed reports by exception (only when it moved), before the flow it
    explains; every 23rd flow value is of bad quality (no sample)."""
    rng = np.random.default_rng(SEED)
    out: list[tuple[str | None, str, bytes]] = []
    y_arx = 2.0
    speed_held = None
    for k in range(STEPS):
        t = 1_767_225_600.0 + 10.0 * k
        speed = round(0.6 + 0.3 * np.sin(0.13 * k), 2)
        if speed != speed_held:
            out.append(_tag_message(prefix, "SC", speed, t))
            speed_held = speed
        flow = 2.0 + 40.0 * speed + float(rng.normal(0.0, 0.2))
        out.append(_tag_message(prefix, "FT", flow, t, quality=192 if k % 23 == 0 else 0))
        for cid in CHANNELS:
            if cid == "meter":
                continue
            u = float(rng.normal())
            if cid == "arx":
                y = 1.0 + 0.6 * y_arx + 0.8 * u + float(rng.normal(0.0, 0.05))
                y_arx = y
            else:
                offset = 1.5 if cid == "c1" and k >= 150 else 0.0      # an offset step: alarms to journal
                y = 1.0 + 0.5 * u + offset + float(rng.normal(0.0, 0.1))
            body: dict[str, Any] = {"t": t, "y": y, "u": {"u": u}, "seq": k}
            if cid == "lab":
                body["sigma"] = 0.1
            out.append((cid, f"{prefix}/{cid}", json.dumps(body).encode()))
    return out


def _settings(prefix: str, broker_port: int, client: str, data: Path, url: str) -> dict[str, Any]:
    settings = mqtt_settings(CHANNELS, prefix=prefix, port=broker_port, client_id=client, broker=QUICK_RECONNECT,
                             store=data, store_options={"url": url, "checkpoint_seconds": 1.0},
                             alarms=alarms_table(prefix), tags=_tags_table(prefix))
    meter = settings["channels"]["meter"]
    del meter["topic"]
    meter["tags"] = {"output": "FT", "inputs": {"speed": "SC"}}
    return settings


def _samples(stream: list[tuple[str | None, str, bytes]]) -> int:
    """Samples the stream holds: its whole-sample messages and the meter's good flow updates."""
    flows = [json.loads(payload) for cid, topic, payload in stream if cid is None and topic.endswith("/FT")]
    return sum(1 for cid, _, _ in stream if cid is not None) + sum(1 for flow in flows if flow["q"] == 0)


def _applied(service: ServiceProcess) -> int:
    """Samples applied or taken as warm-up (a lag buffer's first), over every channel."""
    try:
        details = [service.get(f"/api/v1/channels/{cid}") for cid in CHANNELS]
    except OSError:
        return -1
    return sum(d["samples"] + d["warmup"] for d in details)


def _wait_all_applied(service: ServiceProcess, expected: int, timeout: float) -> None:
    deadline = time.monotonic() + timeout
    while time.monotonic() < deadline:
        if _applied(service) >= expected:
            return
        time.sleep(0.1)
    try:
        metrics = "\n".join(line for line in service.metrics_text().splitlines() if line.startswith("rwls_"))
    except OSError as exc:
        metrics = f"(no metrics: {exc})"
    raise AssertionError(f"{_applied(service)} of {expected} applied after {timeout} s; metrics:\n{metrics}\n"
                         f"log:\n{service.log_tail(200)}")


def _wait_progress(service: ServiceProcess, step: int, timeout: float = 60.0) -> int:
    """Wait until ``step`` more samples are applied than now: the service is up and consuming."""
    deadline = time.monotonic() + timeout
    since = _applied(service)
    while since < 0 and time.monotonic() < deadline:      # the API may take a moment to answer
        time.sleep(0.05)
        since = _applied(service)
    while time.monotonic() < deadline:
        applied = _applied(service)
        if applied >= since + step:
            return applied
        time.sleep(0.05)
    raise AssertionError(f"no progress past {since} in {timeout} s; log:\n{service.log_tail()}")


@pytest.mark.parametrize("backend", ["sqlite", "postgresql"])
def test_kill_9_at_random_moments_then_restart_reaches_the_uninterrupted_state(
        backend: str, private_mosquitto: Callable[..., Any], unique_prefix: str, client_id: Callable[[str], str],
        tmp_path: Path, request: pytest.FixtureRequest) -> None:
    url = request.getfixturevalue("postgres_url") if backend == "postgresql" else ""
    broker = private_mosquitto(persistence=True, max_queued_messages=100_000)
    stream = _stream(unique_prefix)
    settings = _settings(unique_prefix, broker.port, client_id("rwls"), tmp_path / "data", url)
    service = ServiceProcess(settings, tmp_path / "service").start()

    published = threading.Event()
    burst = threading.Event()
    failure: list[BaseException] = []

    def publish() -> None:                 # paced, so the kills land while messages are being applied
        try:
            messages = [(topic, payload) for _, topic, payload in stream]
            for start in range(0, len(messages), 50):
                publish_and_wait(broker, messages[start:start + 50], qos=1, timeout=30.0)
                burst.set()                # the broker has the burst and is delivering it
                time.sleep(0.15)           # slow enough that all three kills land before the last sample
        except BaseException as exc:
            failure.append(exc)
        finally:
            published.set()

    rng = np.random.default_rng(SEED)
    publisher = threading.Thread(target=publish, name="plant", daemon=True)
    before_kill: list[int] = []
    try:
        service.wait_subscribed()          # subscribed: the broker holds what comes while we are down
        publisher.start()
        for k, pause in enumerate(rng.uniform(0.0, 0.6, size=KILLS)):
            before_kill.append(_wait_progress(service, step=150))
            if k == 0:
                burst.clear()
                assert burst.wait(30.0)
                service.kill_with_acks_pending()   # mid-burst: logged, not yet acknowledged, redelivered
            else:
                time.sleep(float(pause))
                service.kill()                     # by PID, mid-stream
            service.start()                # recovery: checkpoint, input log, then the broker's redeliveries
        assert published.wait(120.0), "the plant did not finish publishing"
        assert not failure, failure
        _wait_all_applied(service, _samples(stream), timeout=60.0)
        assert service.stop() == 143, service.log_tail()     # 128 + SIGTERM, after a clean shutdown
    finally:
        service.kill()
    assert service.starts == KILLS + 1
    assert all(0 < n < _samples(stream) for n in before_kill), before_kill     # every kill landed mid-stream
    reapplied = [int(line.split(" inputs reapplied")[0].rsplit(" ", 1)[1])
                 for line in service.log_path.read_text().splitlines() if " inputs reapplied" in line]
    assert len(reapplied) == KILLS + 1
    crashed = final_state(tmp_path / "data", url)
    stats = crashed[1]["engine"]["stats"]
    # How much each start took from the input log and how many DUP redeliveries it recognised depend on
    # where the kill fell relative to a checkpoint and an acknowledgement: printed, not asserted.
    print(f"\n{backend}: {len(stream)} messages, kills after {before_kill} applied; inputs reapplied from the "
          f"log at each start {reapplied}; broker redeliveries recognised {stats['redelivered']}")
    assert stats["rejected"] == {}, stats                    # no redelivery taken for a plant's repeat
    assert stats["not_formed"] == {"meter": {"output_bad_quality": -(-STEPS // 23)}}, stats
    assert "tags" in crashed[1]                              # the assembler's kept updates were checkpointed
    assert_same_checkpoint(crashed, uninterrupted_state(settings, tmp_path / "whole", stream))
    assert any(e["action"] == "condition_on" for e in crashed[2])      # the offset step was journaled
