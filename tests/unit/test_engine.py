"""The engine: micro-batches of raw messages in, channel state and dead letters out."""

from __future__ import annotations

import json
import time
from typing import Any

import numpy as np

from estimator.channels.channel import ChannelSettings, Sample
from estimator.channels.channel_bank import ChannelBank
from service.broker_link.messages import DeadLetter, Message
from service.engine.writer import Engine

CHANNELS = {"a": ChannelSettings(terms=("1", "u"), forgetting_factor=0.99),
            "b": ChannelSettings(terms=("1", "u"), weighting="tracked", noise_warmup=2)}


def _sample(k: int, **extra: Any) -> dict[str, Any]:
    u = ((k * 37) % 11) / 5.0 - 1.0
    return {"t": 1000.0 + k, "y": 1.0 + 0.5 * u + ((k * 13) % 7 - 3) / 50.0, "u": {"u": u}, "seq": k, **extra}


def _engine() -> tuple[Engine, list[DeadLetter]]:
    letters: list[DeadLetter] = []
    return Engine(CHANNELS, dead_letter=letters.append), letters


def _message(cid: str, body: object, received: float = 0.0) -> Message:
    return Message(cid, json.dumps(body).encode(), "mqtt", topic=f"plant/{cid}", received=received)


def _reference(samples: dict[str, list[dict[str, Any]]]) -> ChannelBank:
    bank = ChannelBank(CHANNELS)
    for cid, items in samples.items():
        for s in items:
            bank.apply_one(Sample(cid, s["y"], s["u"], s["t"], None, None, s["seq"]))
    return bank


def test_a_refused_sample_inside_a_batch_is_dead_lettered_with_its_index() -> None:
    engine, letters = _engine()
    good = [_sample(k) for k in range(1, 30)]
    batch = [*good[:10], _sample(5), *good[10:]]        # position 10 goes back to seq 5
    engine._process([_message("a", {"samples": batch}, received=42.0)])
    assert [(d.reason, d.index, d.channel, d.topic) for d in letters] == [("out_of_order_seq", 10, "a", "plant/a")]
    assert engine.stats.samples_applied == len(good)
    assert engine.updated_at["a"] == 42.0
    expected = _reference({"a": good}).view(["a"])["a"]
    got = engine.bank.view(["a"])["a"]
    assert got.parameters.tobytes() == expected.parameters.tobytes()
    assert got.covariance.tobytes() == expected.covariance.tobytes()


def test_messages_of_one_channel_in_one_micro_batch_keep_their_order_and_origins() -> None:
    engine, letters = _engine()
    first = {"samples": [_sample(k) for k in range(1, 8)]}
    # ISO time: this message takes the exact decoder; its second sample is out of order.
    second = {"samples": [_sample(8, t="1970-01-01T00:16:48Z"), _sample(9, t=900.0), _sample(10)]}
    single = _sample(11)
    engine._process([_message("b", first, 1.0), _message("a", _sample(1), 2.0), _message("b", second, 3.0),
                     _message("b", single, 4.0)])
    assert [(d.reason, d.index, d.channel) for d in letters] == [("out_of_order", 1, "b")]
    assert engine.stats.samples_applied + engine.stats.samples_warmup == 7 + 1 + 2 + 1
    assert engine.updated_at == {"a": 2.0, "b": 4.0}
    kept = [*first["samples"], {**second["samples"][0], "t": 1008.0}, second["samples"][2], single]
    expected = _reference({"b": kept}).view(["b"])["b"]
    got = engine.bank.view(["b"])["b"]
    assert got.parameters.tobytes() == expected.parameters.tobytes()
    assert (got.noise_sigma, got.applied, got.last_t) == (expected.noise_sigma, expected.applied, 1011.0)


def test_decoder_refusals_and_unknown_channels_are_dead_lettered_once_each() -> None:
    engine, letters = _engine()
    engine._process([Message("a", b"{", "mqtt"), Message(None, b"{}", "mqtt", topic="plant/nobody"),
                     _message("a", {"samples": [_sample(1), {"y": "x"}, _sample(2)]})])
    assert [(d.reason, d.index) for d in letters] == [("malformed_json", None), ("unknown_channel", None),
                                                      ("bad_type", 1)]
    assert engine.stats.refused == {"malformed_json": 1, "unknown_channel": 1, "bad_type": 1}
    assert engine.stats.samples_applied == 2
    assert np.isfinite(engine.bank.view(["a"])["a"].parameters).all()


def test_a_channel_whose_every_sample_is_refused_is_not_good_and_says_why() -> None:
    # A restarted publisher repeating sequence numbers the channel already holds: nothing is applied.
    engine, letters = _engine()
    engine._process([_message("a", {"samples": [_sample(k) for k in range(1, 40)]}, received=time.time())])
    engine.flush_now()
    assert (engine.snapshot.channels["a"].quality, engine.snapshot.channels["a"].quality_reason) == ("Good", "")
    for k in range(1, 6):
        engine._process([_message("a", _sample(k), received=time.time())])
    engine.flush_now()
    entry = engine.snapshot.channels["a"]
    assert [d.reason for d in letters] == ["out_of_order_seq"] * 5
    assert (entry.quality, entry.quality_reason) == ("Uncertain", "samples_refused")
    # One applied sample and the channel is itself again.
    engine._process([_message("a", _sample(40), received=time.time())])
    engine.flush_now()
    assert (engine.snapshot.channels["a"].quality, engine.snapshot.channels["a"].quality_reason) == ("Good", "")


def test_a_few_refusals_between_applied_samples_leave_the_channel_good() -> None:
    engine, _ = _engine()
    engine._process([_message("a", {"samples": [_sample(k) for k in range(1, 40)]}, received=time.time())])
    for k in range(40, 60):
        engine._process([_message("a", {"y": "not a number"}), _message("a", _sample(k), time.time())])
    engine.flush_now()
    assert engine.snapshot.channels["a"].quality == "Good"


def test_a_channel_refusing_from_its_first_sample_is_bad_with_the_reason() -> None:
    engine, _ = _engine()
    for _ in range(5):
        engine._process([_message("a", {"y": "not a number"})])
    engine.flush_now()
    entry = engine.snapshot.channels["a"]
    assert (entry.quality, entry.quality_reason) == ("Bad", "samples_refused")


def test_a_channel_goes_stale_by_the_clock_alone_and_is_published_once() -> None:
    now = [5000.0]
    engine = Engine(CHANNELS, stale_after=60.0, clock=lambda: now[0])
    engine._process([_message("a", {"samples": [_sample(k) for k in range(1, 30)]}, received=5000.0)])
    engine.publisher.flush()
    assert engine.snapshot.channels["a"].quality == "Good"
    now[0] = 5059.0
    engine.publisher.refresh_quality()
    assert engine.snapshot.channels["a"].quality == "Good"                 # 59 s: not yet
    now[0] = 5061.0
    engine.publisher.refresh_quality()
    entry = engine.snapshot.channels["a"]
    assert (entry.quality, entry.quality_reason) == ("Uncertain", "stale")
    version = engine.snapshot.version
    now[0] = 5100.0
    engine.publisher.refresh_quality()
    assert engine.snapshot.version == version                              # stale already: nothing to publish
    assert engine.snapshot.channels["b"].quality_reason == "no_data"       # never updated: never stale
