"""The host's own faults, for real: the store's file system fills up under a live MQTT stream; the store's
PostgreSQL is stopped and started by PID mid-stream. No valid sample is refused, the service says not ready
while it lasts, and afterwards every sample is applied once: the state of an uninterrupted run."""

from __future__ import annotations

import json
import time
from collections.abc import Callable, Iterator
from pathlib import Path
from typing import Any

import numpy as np
import pytest

from service.broker_link.messages import Message
from service.config.settings import parse_config
from service.engine.host_faults import FaultPart
from service.engine.operations import Inspect
from service.runtime import Runtime
from tests.support.configs import mqtt_settings
from tests.support.host_faults import OwnPostgres, fill, small_filesystem
from tests.support.mqtt_clients import publish_and_wait
from tests.support.runtimes import assert_same_arrays, feed, offline_runtime, state_arrays
from tests.support.waits import wait_until

pytestmark = pytest.mark.integration

CHANNELS: dict[str, dict[str, Any]] = {
    f"s{k}": {"terms": ["1", "u"], "forgetting_factor": 0.995, "weighting": "tracked",
              "detectors": {"commissioning_samples": 40, "calibration_samples": 0}} for k in range(4)}


def _samples(first: int, count: int) -> list[tuple[str, dict[str, Any]]]:
    rng = np.random.default_rng(first)
    out = []
    for k in range(first, first + count):
        for cid in CHANNELS:
            u = float(rng.uniform(-2.0, 2.0))
            out.append((cid, {"t": 1_700_000_000.0 + k, "y": 0.5 + 1.5 * u + float(rng.normal(0.0, 0.2)),
                              "u": {"u": u}, "seq": k}))
    return out


def _uninterrupted(tmp: Path, samples: list[tuple[str, dict[str, Any]]]) -> dict[str, np.ndarray]:
    whole = offline_runtime(CHANNELS, tmp, store_options={"checkpoint_seconds": 3600})
    whole.start()
    try:
        feed(whole, [Message(cid, json.dumps(s).encode(), "http", received=time.time()) for cid, s in samples])
        return state_arrays(whole)
    finally:
        whole.stop()


def _applied(runtime: Runtime) -> int:
    stats = runtime.engine.stats
    return stats.samples_applied + stats.samples_warmup


@pytest.fixture
def own_postgres() -> Iterator[OwnPostgres]:
    server = OwnPostgres()
    try:
        server.start()
        yield server
    finally:
        server.close()


def test_a_full_disk_under_a_live_stream_costs_no_sample(mqtt_broker: Any, unique_prefix: str,
                                                         client_id: Callable[[str], str], tmp_path: Path,
                                                         start_runtime: Callable[..., Runtime]) -> None:
    samples = _samples(0, 300)
    expected = _uninterrupted(tmp_path / "whole", samples)
    messages = [(f"{unique_prefix}/{cid}", json.dumps(s).encode()) for cid, s in samples]
    with small_filesystem(tmp_path / "small", megabytes=6) as small:
        config = parse_config(mqtt_settings(CHANNELS, prefix=unique_prefix, port=mqtt_broker.port,
                                            client_id=client_id("rwls"), store=small / "store",
                                            store_options={"checkpoint_seconds": 3600}))
        runtime = start_runtime(config)
        publish_and_wait(mqtt_broker, messages[:600], qos=1, timeout=30.0)
        wait_until(lambda: _applied(runtime) >= 600, 30.0, "the first 600 samples applied")
        filler = fill(small)                                       # the disk is full from here on
        publish_and_wait(mqtt_broker, messages[600:], qos=1, timeout=30.0)
        fault = wait_until(lambda: runtime.faults.fault(FaultPart.INPUT_LOG), 15.0, "the input log's fault")
        assert "No space left" in fault.reason
        state = runtime.readiness()
        assert state["ready"] is False and state["faults"]
        time.sleep(1.0)                                            # a while of it: retries, nothing refused
        assert _applied(runtime) < len(samples)
        assert runtime.refusals() == {}
        assert runtime.engine.stats.dead_letter_failures == 0
        filler.unlink()                                            # the space comes back
        wait_until(lambda: _applied(runtime) >= len(samples), 30.0, "every sample applied after the disk healed")
        runtime.engine.drain(10.0)
        wait_until(lambda: runtime.readiness()["ready"], 15.0, "ready again")
        assert runtime.refusals() == {}
        assert _applied(runtime) == len(samples)                   # once each
        assert_same_arrays(expected, runtime)
        runtime.stop()


def test_a_stopped_postgresql_costs_no_sample_and_heals_by_itself(own_postgres: OwnPostgres, tmp_path: Path) -> None:
    samples = _samples(0, 240)
    expected = _uninterrupted(tmp_path / "whole", samples)
    messages = [Message(cid, json.dumps(s).encode(), "http", received=time.time()) for cid, s in samples]
    options = {"url": own_postgres.url, "checkpoint_seconds": 1}
    runtime = offline_runtime(CHANNELS, tmp_path / "store", store_options=options)
    runtime.start()
    persistence = runtime.persistence
    assert persistence is not None
    try:
        feed(runtime, messages[:320])
        runtime.engine.execute(Inspect(lambda engine: persistence.checkpoint(engine)))
        good = persistence.checkpoints
        own_postgres.stop()                                        # by its PID, mid-stream
        feed(runtime, messages[320:640])
        wait_until(lambda: runtime.faults.fault(FaultPart.STORE), 15.0, "the store's fault")
        assert runtime.readiness()["ready"] is False
        feed(runtime, messages[640:])                              # the input log holds them meanwhile
        assert runtime.refusals() == {}
        assert persistence.checkpoints == good
        own_postgres.start()
        wait_until(lambda: not runtime.faults.active(), 30.0, "the store healed (a checkpoint went through)")
        assert persistence.checkpoints > good
        assert runtime.readiness()["ready"] is True
        assert _applied(runtime) == len(messages)
        assert_same_arrays(expected, runtime)
    finally:
        runtime.engine.stop()                # what kill -9 leaves: recovery from the store's checkpoint and the log
        runtime._release_lock()
    again = offline_runtime(CHANNELS, tmp_path / "store", store_options=options)
    again.start()
    try:
        assert_same_arrays(expected, again)
    finally:
        again.stop()
