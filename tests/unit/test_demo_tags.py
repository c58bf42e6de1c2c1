"""The demo plant speaks tags: what ``rwls simulate`` publishes resolves and decodes through the demo
configuration's tag path, forms the plant's own samples, and the bundled files agree with the plant.

Two independent derivations meet here: :func:`service.demo.plant.formed_samples` (the plant's plain rule: the
newest published value of each input, good and young enough) and the service's
:class:`~service.tags.tag_path.TagPath` (registry, JSON decoder, sample assembler) over the very messages the
simulator publishes.
"""

from __future__ import annotations

import json
import math
import tomllib
from collections import Counter
from collections.abc import Callable
from dataclasses import dataclass
from pathlib import Path
from typing import TYPE_CHECKING

import numpy as np
import pytest
from prometheus_client.parser import text_string_to_metric_families

from service.broker_link.messages import Message
from service.broker_link.payload import decode_payload
from service.config.settings import load_config
from service.demo.instruments import CHANNELS, INSTRUMENTS, by_tag, tag_list_csv
from service.demo.plant import GOOD, PlantSample, larkspur_substation7, larkspur_tag_updates, write_csv
from service.demo.run import DEMO_CONFIG, demo_config
from service.demo.simulate import channel_topic, plant_messages
from service.runtime import Runtime
from service.tags.assembler import FormingRefusal
from service.tags.registry import TagMatch
from service.tags.tag_path import TagPath
from service.tags.tag_payload import TagReading
from tests.support.runtimes import feed

if TYPE_CHECKING:
    from fastapi.testclient import TestClient

ROOT = Path(__file__).resolve().parents[2]
EXAMPLES = ROOT / "examples"
SCANS = 600            # a little over four days of plant: takes in the return probe's first weekly check (day 3)
CHECK_SCANS = 6        # that check: an hour at ten minutes a scan


@dataclass(frozen=True)
class _Received:
    topic: str
    payload: bytes
    received: float
    reading: None = None          # not decoded by an ingest process: the tag path decodes it


def _published(scans: int = SCANS) -> list[_Received]:
    """What ``rwls simulate`` publishes by default, as messages that arrived in that order."""
    return [_Received(topic, body, 1.0e9 + i) for i, (topic, body) in enumerate(plant_messages(samples=scans))]


def _expected(scans: int = SCANS) -> dict[str, list[PlantSample]]:
    by_channel: dict[str, list[PlantSample]] = {}
    for sample in larkspur_substation7(np.random.default_rng(7), samples=scans):
        by_channel.setdefault(sample.channel, []).append(sample)
    return by_channel


@pytest.mark.parametrize("config", ["example", "demo"])
def test_every_published_tag_resolves_decodes_and_forms_the_plant_samples_bit_for_bit(config: str,
                                                                                        tmp_path: Path) -> None:
    settings = (load_config(EXAMPLES / "larkspur_sub7.toml") if config == "example"
                else demo_config("mqtt://127.0.0.1:1883", str(tmp_path)))
    path = TagPath.from_config(settings)
    assert path is not None
    messages = _published()
    for message in messages:
        match = path.registry.resolve(message.topic)
        assert isinstance(match, TagMatch), message.topic
        assert match.tag_id == message.topic.removeprefix("larkspur/").replace("boiler/", "").replace("/", ".")
        reading = match.decoder.decode(message.payload, message.received)
        assert isinstance(reading, TagReading), (message.topic, reading)
        document = json.loads(message.payload)
        assert (reading.value, reading.t, reading.good) == (document["v"], document["ts"] / 1000.0,
                                                            document["q"] == GOOD)
    taken = path.take(messages)
    assert (taken.refused, taken.unknown, taken.unused) == ([], [], 0)
    assert taken.assembled.not_newer == {}
    # The only samples not formed: the return line's reference probe in its weekly check.
    assert taken.assembled.refusals == {"sub7.return_temp": {FormingRefusal.INPUT_BAD_QUALITY: CHECK_SCANS}}
    expected = _expected()
    assert set(taken.assembled.samples) == set(expected) == {channel.channel for channel in CHANNELS}
    for cid, formed in taken.assembled.samples.items():
        want = expected[cid]
        assert np.array_equal(formed.t, [s.t for s in want]), cid
        assert np.array_equal(formed.y, [s.y for s in want]), cid
        for j, name in enumerate(formed.input_names):
            assert np.array_equal(formed.inputs[:, j], [s.inputs[name] for s in want]), (cid, name)


def test_each_scan_publishes_inputs_before_their_output_stamped_at_or_before_it() -> None:
    outputs = {channel.output: channel for channel in CHANNELS}
    seen: dict[str, float] = {}
    for update in larkspur_tag_updates(np.random.default_rng(3), samples=300):
        channel = outputs.get(update.tag)
        if channel is None:
            assert update.t < update.sample_t           # an input, read before its channel's output
            assert update.t * 1000.0 == round(update.t * 1000.0)   # whole milliseconds
        else:
            assert update.t == update.sample_t
            for tag in channel.inputs.values():          # every input of this scan is already out, or by exception
                assert seen[tag] == update.t - 0.25 or by_tag(tag).by_exception
        seen[update.tag] = update.t


def test_by_exception_tags_publish_fewer_messages_than_there_are_scans() -> None:
    published = Counter(topic.removeprefix("larkspur/") for topic, _ in plant_messages(samples=SCANS))
    for instrument in INSTRUMENTS:
        count = published[instrument.topic]
        if instrument.by_exception:
            assert 0 < count < SCANS, instrument.tag
        else:
            assert count == SCANS, instrument.tag
    # The level channel has a sample only when its transmitter published: fewer samples than scans, a
    # visible share of them (a 5 cm step against 2 cm noise moves at about half the scans).
    level = len(_expected()["sub7.level"])
    assert level == published["sub7/LT-501"]
    assert 0.3 * SCANS < level < 0.8 * SCANS


def test_the_return_probe_check_forms_no_sample_for_its_hour_and_none_is_lost_otherwise() -> None:
    expected = _expected()
    assert len(expected["sub7.return_temp"]) == SCANS - CHECK_SCANS
    assert all(len(expected[c.channel]) == SCANS for c in CHANNELS if c.channel not in ("sub7.return_temp",
                                                                                          "sub7.level"))
    qualities = Counter(json.loads(body)["q"] for topic, body in plant_messages(samples=SCANS)
                        if topic.endswith("/TT-202"))
    assert qualities["maintenance"] == 1      # published once, on the change of quality (its value stays put)


def test_sample_payloads_carry_the_same_samples_on_channel_topics() -> None:
    config = load_config(EXAMPLES / "larkspur_sub7_samples.toml")
    topics = config.require_topics()
    expected = _expected(200)
    got: dict[str, list[PlantSample]] = {}
    for topic, body in plant_messages(payload="samples", samples=200):
        cid = topics[topic]
        (sample,), refusals = decode_payload(body)
        assert refusals == []
        got.setdefault(cid, []).append(PlantSample(cid, sample.t or math.nan, sample.y, sample.inputs,
                                                   sample.seq or 0))
    assert got == expected


def test_resuming_skips_exactly_the_scans_a_service_holds() -> None:
    full = list(plant_messages(samples=200))
    held = {"sub7.flow": 1_780_000_000.0 + 99 * 600.0 + 1.0, "sub7.level": 1_780_000_000.0 + 150 * 600.0 + 5.0}
    resumed = list(plant_messages(samples=200, resume_after=held))
    flow = [m for m in full if m[0].endswith(("/FT-101", "/SC-101"))]
    assert [m for m in resumed if m[0].endswith(("/FT-101", "/SC-101"))] == flow[200:]   # two tags a scan
    level = [m for m in full if m[0].endswith(("/LT-501", "/PT-501"))]
    kept = [m for m in level if json.loads(m[1])["ts"] > held["sub7.level"] * 1000.0]
    assert [m for m in resumed if m[0].endswith(("/LT-501", "/PT-501"))] == kept
    others = [m for m in full if not m[0].endswith(("/FT-101", "/SC-101", "/LT-501", "/PT-501"))]
    assert [m for m in resumed if not m[0].endswith(("/FT-101", "/SC-101", "/LT-501", "/PT-501"))] == others


def test_the_demo_engine_assembles_the_tags_and_counts_samples_not_formed(
        tmp_path: Path, serve: Callable[..., TestClient]) -> None:
    runtime = Runtime(demo_config("mqtt://127.0.0.1:1883", str(tmp_path / "store")), mqtt=False)
    client = serve(runtime)
    feed(runtime, [Message(None, m.payload, "mqtt", topic=m.topic, received=m.received) for m in _published()])
    expected = _expected()
    for cid, samples in expected.items():
        view = runtime.engine.snapshot.channels[cid].view
        assert (view.applied + view.warmup, view.last_t) == (len(samples), samples[-1].t), cid
    metrics = {(s.name, tuple(sorted(s.labels.items()))): s.value
               for family in text_string_to_metric_families(client.get("/metrics").text) for s in family.samples}
    not_formed = {key: value for key, value in metrics.items() if key[0] == "rwls_samples_not_formed_total"}
    assert not_formed == {("rwls_samples_not_formed_total",
                           (("channel", "sub7.return_temp"), ("reason", "input_bad_quality"))): CHECK_SCANS}
    assert metrics[("rwls_tag_updates_unused_total", ())] == 0.0
    assert metrics[("rwls_tag_updates_not_newer_total", ())] == 0.0
    assert metrics[("rwls_messages_total", ())] == len(_published())


def test_bundled_files_are_the_plants() -> None:
    assert (EXAMPLES / "larkspur_sub7_tags.csv").read_text(encoding="utf-8") == tag_list_csv()
    # `rwls demo` reads its own copies (package data); they must be the examples'.
    assert DEMO_CONFIG.read_bytes() == (EXAMPLES / "larkspur_sub7.toml").read_bytes()
    assert (DEMO_CONFIG.with_name("larkspur_sub7_tags.csv").read_bytes()
            == (EXAMPLES / "larkspur_sub7_tags.csv").read_bytes())


def test_bundled_history_is_the_samples_the_tags_form(tmp_path: Path) -> None:
    rows = write_csv(tmp_path / "history.csv")
    assert (tmp_path / "history.csv").read_bytes() == (EXAMPLES / "larkspur_sub7.csv").read_bytes()
    assert rows == sum(len(samples) for samples in _expected(4320).values())


def test_the_sample_payload_configuration_has_the_same_channels_on_channel_topics() -> None:
    tags = load_config(EXAMPLES / "larkspur_sub7.toml")
    samples = load_config(EXAMPLES / "larkspur_sub7_samples.toml")
    assert samples.channel_settings() == tags.channel_settings()
    assert {cid: ch.topic for cid, ch in samples.channels.items()} == {
        c.channel: channel_topic("larkspur", c.channel) for c in CHANNELS}
    assert {cid: (t.output, dict(t.inputs)) for cid, t in tags.channel_tags().items()} == {
        c.channel: (c.output, dict(c.inputs)) for c in CHANNELS}


def test_the_readme_lists_every_demo_tag_with_its_topic_unit_and_how_it_publishes() -> None:
    readme = (ROOT / "README.md").read_text(encoding="utf-8")
    rows = [line for line in readme.splitlines() if line.startswith("| `sub7.")]
    for instrument in INSTRUMENTS:
        (row,) = [line for line in rows if line.startswith(f"| `{instrument.tag}` |")]
        cells = [cell.strip() for cell in row.strip("|").split("|")]
        assert cells[1] == f"`larkspur/{instrument.topic}`", instrument.tag
        assert cells[2] == instrument.unit, instrument.tag
        assert ("by exception" in cells[4]) == instrument.by_exception, instrument.tag
    config = tomllib.loads((EXAMPLES / "larkspur_sub7.toml").read_text(encoding="utf-8"))
    for cid, table in config["channels"].items():
        assert f"| `{cid}` | `{table['tags']['output']}` |" in readme, cid
