"""The engine's tag lane: tag messages in, formed samples applied, bad messages dead-lettered, the rest counted."""

from __future__ import annotations

import json
import math
from typing import Any

import numpy as np

from estimator.channels.channel import Sample
from estimator.channels.channel_bank import ChannelBank
from service.broker_link.messages import DeadLetter, EngineRefusal, Message, SampleRefusal
from service.broker_link.tag_refusal import TagRefusal
from service.config.settings import RwlsConfig, parse_config
from service.engine.writer import Engine
from service.tags.assembler import FormingRefusal
from service.tags.tag_path import tag_path_of

EPOCH_MS = 1_767_225_600_000          # 2026-01-01T00:00:00Z in ms


def _config(**flow_tags: Any) -> RwlsConfig:
    return parse_config({
        "tags": {
            "formats": {"gw": {"kind": "json", "value": "/v", "time": "/ts", "time_unit": "ms",
                               "quality": "/q", "good": ["good"]}},
            "tag": [{"id": "{1}.{2}", "topic": "gw/+/+/value", "format": "gw"},
                    {"id": "spare", "topic": "plant/spare"}],
        },
        "channels": {
            "flow": {"terms": ["1", "speed"], "forgetting_factor": 0.995,
                     "tags": {"output": "s7.FT1", "inputs": {"speed": "s7.SC1"}, **flow_tags}},
            # The flow meter's output is this channel's input: a tag may feed several roles.
            "twin": {"terms": ["1", "flow"], "tags": {"output": "s7.FT2", "inputs": {"flow": "s7.FT1"}}},
            "whole": {"terms": ["1", "u"], "topic": "plant/whole"},
        },
    })


def _tag(tag: str, v: object, t_ms: int, q: str = "good") -> Message:
    site, name = tag.split(".")
    body = json.dumps({"v": v, "ts": t_ms, "q": q}).encode()
    return Message(None, body, "mqtt", topic=f"gw/{site}/{name}/value", received=1.0)


def _engine(config: RwlsConfig) -> tuple[Engine, list[DeadLetter]]:
    letters: list[DeadLetter] = []
    return Engine(config.channel_settings(), dead_letter=letters.append, tags=tag_path_of(config)), letters


def _stream(n: int) -> tuple[list[Message], list[tuple[float, float, float]]]:
    """Speed then flow then the twin meter, 1 s apart; returns the messages and (t, speed, flow) per step."""
    messages, truth = [], []
    for k in range(n):
        t_ms = EPOCH_MS + 1000 * k
        speed = 0.5 + 0.4 * math.sin(0.37 * k)
        flow = 2.0 + 50.0 * speed + 0.1 * math.cos(1.3 * k)
        messages += [_tag("s7.SC1", speed, t_ms), _tag("s7.FT1", flow, t_ms),
                     _tag("s7.FT2", 0.98 * flow + 0.05 * math.sin(k), t_ms)]
        truth.append((t_ms / 1000.0, speed, flow))
    return messages, truth


def test_formed_samples_are_those_a_bank_given_the_same_samples_holds_bit_for_bit() -> None:
    config = _config()
    engine, letters = _engine(config)
    messages, truth = _stream(40)
    for start in range(0, len(messages), 7):          # batch cuts fall between a sample's tags too
        engine._process(messages[start:start + 7])
    assert letters == []
    assert engine.stats.samples_applied == 2 * 40
    reference = ChannelBank(config.channel_settings())
    for t, speed, flow in truth:
        reference.apply_one(Sample("flow", flow, {"speed": speed}, t))
    got, expected = engine.bank.view(["flow"])["flow"], reference.view(["flow"])["flow"]
    assert got.parameters.tobytes() == expected.parameters.tobytes()
    assert got.covariance.tobytes() == expected.covariance.tobytes()


def test_bad_tag_messages_are_dead_lettered_with_their_tag_reason_and_good_ones_still_apply() -> None:
    engine, letters = _engine(_config())
    good, _ = _stream(3)
    bad = [
        Message(None, b"{not json", "mqtt", topic="gw/s7/SC1/value", received=1.0),
        Message(None, json.dumps({"v": "NaN", "ts": EPOCH_MS, "q": "good"}).encode(), "mqtt",
                topic="gw/s7/SC1/value", received=1.0),
        Message(None, json.dumps({"v": "open", "ts": EPOCH_MS, "q": "good"}).encode(), "mqtt",
                topic="gw/s7/SC1/value", received=1.0),
        Message(None, json.dumps({"ts": EPOCH_MS, "q": "good"}).encode(), "mqtt", topic="gw/s7/SC1/value",
                received=1.0),
        Message(None, json.dumps({"v": 1.0, "q": "good"}).encode(), "mqtt", topic="gw/s7/SC1/value",
                received=1.0),
        Message(None, json.dumps({"v": 1.0, "ts": EPOCH_MS}).encode(), "mqtt", topic="gw/s7/SC1/value",
                received=1.0),
        Message(None, b"1.0", "mqtt", topic="gw/nothing/here", received=1.0),
    ]
    engine._process([*good[:3], *bad, *good[3:]])
    assert [d.reason for d in letters] == [TagRefusal.BAD_JSON, TagRefusal.NON_FINITE, TagRefusal.NOT_A_NUMBER,
                                          TagRefusal.MISSING_VALUE,
                                          TagRefusal.MISSING_TIME, TagRefusal.MISSING_QUALITY,
                                          SampleRefusal.UNKNOWN_CHANNEL]
    assert all(d.channel is None and d.index is None for d in letters)
    assert [d.topic for d in letters[:6]] == ["gw/s7/SC1/value"] * 6
    assert engine.stats.refused[TagRefusal.BAD_JSON] == 1
    assert engine.stats.samples_applied == 2 * 3


def test_a_whole_sample_for_a_tag_fed_channel_is_refused_and_the_topic_channel_still_takes_them() -> None:
    engine, letters = _engine(_config())
    sample = json.dumps({"t": 10.0, "y": 1.0, "u": {"u": 0.5, "speed": 0.5}}).encode()
    engine._process([Message("flow", sample, "mqtt", topic="plant/flow"),
                     Message("whole", sample, "mqtt", topic="plant/whole")])
    assert [(d.reason, d.channel) for d in letters] == [(EngineRefusal.FED_BY_TAGS, "flow")]
    assert engine.stats.samples_applied == 1


def test_samples_that_cannot_form_are_counted_per_channel_and_reason_not_dead_lettered() -> None:
    engine, letters = _engine(_config())
    t = EPOCH_MS
    engine._process([
        _tag("s7.FT1", 20.0, t),                         # flow: speed never seen; twin's input FT1 is fine
        _tag("s7.SC1", 0.4, t + 1000, q="uncertain"),
        _tag("s7.FT1", 21.0, t + 1000),                  # flow: speed of bad quality
        _tag("s7.SC1", 0.5, t + 3000),
        _tag("s7.FT1", 22.0, t + 2000, q="bad"),         # flow: output of bad quality (and not newer? no: newer)
        _tag("s7.FT2", 19.0, t + 2500),                  # twin: FT1's newest at/before is the bad one
    ])
    assert letters == []
    assert engine.stats.not_formed["flow"] == {FormingRefusal.INPUT_MISSING: 1,
                                               FormingRefusal.INPUT_BAD_QUALITY: 1,
                                               FormingRefusal.OUTPUT_BAD_QUALITY: 1}
    assert engine.stats.not_formed["twin"] == {FormingRefusal.INPUT_BAD_QUALITY: 1}
    assert engine.stats.samples_applied == 0


def test_stale_input_and_unused_and_not_newer_updates_are_counted() -> None:
    config = _config(mode="matched", tolerance=0.5)
    engine, letters = _engine(config)
    t = EPOCH_MS
    engine._process([
        _tag("s7.SC1", 0.5, t),
        _tag("s7.FT1", 30.0, t + 2000),                  # speed 2 s before: outside the 0.5 s tolerance
        _tag("s7.SC1", 0.6, t - 5000),                   # older than the held speed: kept out
        Message(None, b"3.5", "mqtt", topic="plant/spare", received=1.0),   # a tag no channel names
    ])
    assert letters == []
    assert engine.stats.not_formed["flow"] == {FormingRefusal.INPUT_UNMATCHED: 1}
    assert engine.stats.tag_updates_not_newer == 1
    assert engine.stats.tag_updates_unused == 1


def test_a_formed_sample_the_channel_refuses_is_dead_lettered_as_its_output_tag_message() -> None:
    # The bank holds 20 s of samples but the assembler starts empty (state carried over without it), so
    # the samples formed from the first steps again are older than the channel's newest: out of order.
    config = _config()
    messages, _ = _stream(20)
    before, _ = _engine(config)
    before._process(messages)
    engine, letters = _engine(config)
    engine.bank.restore(before.bank.state())
    engine._process(messages[:3])
    assert [(d.reason, d.channel, d.topic) for d in letters] == [
        (SampleRefusal.OUT_OF_ORDER, "flow", "gw/s7/FT1/value"),
        (SampleRefusal.OUT_OF_ORDER, "twin", "gw/s7/FT2/value")]
    assert letters[0].payload == messages[1].payload


def test_tag_state_in_a_checkpoint_forms_the_same_samples_after_a_restart() -> None:
    config = _config()
    messages, _ = _stream(30)
    whole, _ = _engine(config)
    whole._process(messages)
    first, _ = _engine(config)
    first._process(messages[:44])                        # cut inside a step: speed and flow held, twin not yet
    assert first.tags is not None
    arrays, meta = first.tags.export_state()
    second, _ = _engine(config)
    assert second.tags is not None
    dropped = second.tags.import_state(arrays, json.loads(json.dumps(meta)))
    assert dropped == {"unknown_tags": [], "dropped_topics": []}
    second.bank.restore(first.bank.state())
    second._process(messages[44:])
    for cid in ("flow", "twin"):
        a, b = whole.bank.view([cid])[cid], second.bank.view([cid])[cid]
        assert a.parameters.tobytes() == b.parameters.tobytes()
        assert a.covariance.tobytes() == b.covariance.tobytes()
    assert np.isfinite(whole.bank.view(["twin"])["twin"].parameters).all()


def test_the_ingest_process_decodes_with_the_decoder_the_engine_would_use_and_the_engine_trusts_it() -> None:
    from service.broker_link.child_process import _decoded
    from service.broker_link.tag_reading import TagReading
    from service.tags.registry import TagMatch

    config = _config()
    path = tag_path_of(config)
    assert path is not None
    registry = path.registry
    for topic in ("gw/s7/FT1/value", "plant/spare", "gw/nothing/here", "gw/s7/FT1/value/more"):
        match = registry.resolve(topic)
        expected = match.decoder if isinstance(match, TagMatch) else None
        assert registry.decoder_for(topic) is expected, topic
    good, _ = _stream(1)
    assert _decoded(registry, good[0]) == TagReading(json.loads(good[0].payload)["v"], EPOCH_MS / 1000.0, True)
    assert _decoded(registry, Message("flow", b"{}", "mqtt", topic="plant/flow")) is None   # a whole sample
    # The engine does not decode a message the ingest process decoded: a reading given wins over the bytes.
    engine, letters = _engine(config)
    engine._process([Message(m.channel, b"not json", m.source, topic=m.topic, received=m.received,
                             reading=_decoded(registry, m)) for m in good])
    assert letters == [] and engine.stats.samples_applied == 2
