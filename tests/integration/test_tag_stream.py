"""A plant's tag stream through a real Mosquitto on 127.0.0.1, against ``rwls replay`` of the same stream as a long CSV.

The configuration's tags come from a tag list (a wildcard pattern with an id template, and an exact
tag); payloads are JSON with millisecond time stamps and a quality; one channel's output tag is the
other's input. The service's channel state must equal the replay's bit for bit, and every bad tag
message must be counted and dead-lettered with its reason, leaving the state as the clean stream left it.
"""

from __future__ import annotations

import json
import time
from collections import Counter
from collections.abc import Callable
from pathlib import Path
from typing import Any

import pytest

from service.config.settings import RwlsConfig, parse_config
from service.engine.operations import Inspect
from service.offline.replay import apply_history
from service.runtime import Runtime
from tests.support.configs import broker_table
from tests.support.mqtt_clients import Collector, publish_and_wait
from tests.support.state_equality import assert_same_state
from tests.support.tag_streams import EPOCH_MS, TagUpdate, tag_plant, tag_stream, write_long_csv

pytestmark = pytest.mark.integration


def _config(tmp_path: Path, prefix: str, port: int, client: str, **broker: Any) -> RwlsConfig:
    plant = tag_plant(tmp_path, prefix)
    # Beside the tag list: '<prefix>/lab/#' names a tag per topic below it. MQTT delivers the parent topic
    # '<prefix>/lab' to that subscription too, but it names no tag (the template needs a level).
    plant["tags"]["tag"] = [{"id": "lab.{#}", "topic": f"{prefix}/lab/#"}]
    return parse_config({**plant, "broker": broker_table(port, client, prefix, **broker),
                         "store": {"path": str(tmp_path / "store")}})


def _wait_messages(runtime: Runtime, count: int, timeout: float = 60.0) -> None:
    """Until the engine has taken ``count`` messages (applied, refused or not formed) and is idle."""
    deadline = time.monotonic() + timeout
    while time.monotonic() < deadline:
        if runtime.engine.stats.messages >= count:
            assert runtime.engine.drain(10.0)
            return
        time.sleep(0.02)
    raise AssertionError(f"timed out: the engine took {runtime.engine.stats.messages} of {count} messages")


def _live_state(runtime: Runtime) -> Any:
    """The bank's state, exported on the engine thread (in order with the messages before it)."""
    return runtime.engine.execute(Inspect(lambda engine: engine.bank.state()))


def _compare_with_replay(runtime: Runtime, config: RwlsConfig, updates: list[TagUpdate], data: Path) -> None:
    write_long_csv(data, updates)
    bank, result = apply_history(data, config)
    assert result.layout == "long" and result.bad_rows == 0
    assert_same_state(_live_state(runtime), bank.state())
    stats = runtime.engine.stats
    assert stats.not_formed == result.samples_not_formed
    assert stats.tag_updates_unused == result.tag_updates_unused > 0
    assert stats.tag_updates_not_newer == result.tag_updates_not_newer == 1
    views = bank.view()
    assert views["sub7.flow"].applied > 300 and views["sub7.temp"].applied > 300


@pytest.mark.parametrize("ingest", ["process", "thread"])
def test_a_tag_stream_over_mosquitto_leaves_the_state_replay_of_its_long_csv_gives(
        mqtt_broker: Any, unique_prefix: str, client_id: Callable[[str], str], tmp_path: Path,
        start_runtime: Callable[[RwlsConfig], Runtime], ingest: str) -> None:
    config = _config(tmp_path, unique_prefix, mqtt_broker.port, client_id("rwls"), ingest=ingest)
    runtime = start_runtime(config)
    updates = tag_stream(unique_prefix, seed=31, steps=400)
    publish_and_wait(mqtt_broker, [(u.topic, u.payload()) for u in updates], qos=1, timeout=60.0,
                     client_id=client_id("plant"))
    _wait_messages(runtime, len(updates))
    assert runtime.engine.stats.refused == {}
    _compare_with_replay(runtime, config, updates, tmp_path / "history.csv")


def _bad_messages(prefix: str) -> list[tuple[str, bytes, str | None]]:
    """``(topic, payload, reason)``: reason None for a topic the service does not subscribe to."""
    speed = f"{prefix}/gw/sub7/SC-101/value"
    flow = f"{prefix}/plant/FT-101"
    ms = EPOCH_MS + 1234
    return [
        (speed, b"{not json", "bad_json"),
        (flow, b'{"v": 1e400, "ts": %d, "q": "good"}' % ms, "non_finite"),
        (speed, b'{"v": "nan", "ts": %d, "q": "good"}' % ms, "non_finite"),
        (flow, b'{"v": 1.5, "q": "good"}', "missing_time"),
        (speed, b'{"v": 1.5, "ts": %d, "q": {"code": 192}}' % ms, "bad_quality"),
        (f"{prefix}/gw/ sub7/SC-101/value", b'{"v": 1.5, "ts": %d, "q": "good"}' % ms, "bad_tag_id"),
        (f"{prefix}/lab", b"1.5", "unknown_channel"),          # delivered, but it names no tag
        (f"{prefix}/gw/sub7/SC-101/raw", b"1.5", None),        # no subscription matches: never arrives
    ]


def test_every_bad_tag_message_is_counted_dead_lettered_and_leaves_the_state_alone(
        mqtt_broker: Any, unique_prefix: str, client_id: Callable[[str], str], tmp_path: Path,
        start_runtime: Callable[[RwlsConfig], Runtime]) -> None:
    config = _config(tmp_path, unique_prefix, mqtt_broker.port, client_id("rwls"))
    dead = Collector(mqtt_broker, client_id("dead"))
    dead.connect([f"{unique_prefix}/dead"])
    runtime = start_runtime(config)
    updates = tag_stream(unique_prefix, seed=32, steps=400)
    bad = _bad_messages(unique_prefix)
    messages = [(u.topic, u.payload()) for u in updates]
    for k, (topic, payload, _) in enumerate(bad):         # spread through the stream
        messages.insert((k + 1) * len(messages) // (len(bad) + 1), (topic, payload))
    publish_and_wait(mqtt_broker, messages, qos=1, timeout=60.0, client_id=client_id("plant"))
    expected = Counter(reason for _, _, reason in bad if reason is not None)
    arriving = len(updates) + sum(expected.values())
    _wait_messages(runtime, arriving)
    try:
        assert runtime.engine.stats.refused == dict(expected)
        assert runtime.engine.stats.messages == arriving          # the unsubscribed topic never came
        dead.wait_for(sum(expected.values()), timeout=10.0)
        letters = [json.loads(m.payload) for m in dead.messages]
        assert Counter(letter["reason"] for letter in letters) == expected
        assert {letter["topic"] for letter in letters} == {topic for topic, _, reason in bad if reason is not None}
    finally:
        dead.disconnect()
    _compare_with_replay(runtime, config, updates, tmp_path / "clean.csv")
