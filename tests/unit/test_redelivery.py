"""Redeliveries of logged messages: acknowledged once more, never applied or counted against the channel twice."""

from __future__ import annotations

import json
from pathlib import Path

import pytest

from service.broker_link.messages import Message
from service.broker_link.redelivery import RecentlyLogged
from service.runtime import Runtime
from tests.support.runtimes import offline_runtime


def test_window_keeps_the_newest_fingerprints_only() -> None:
    window = RecentlyLogged(capacity=3)
    for k in range(5):
        window.add("a", str(k).encode())
    assert len(window) == 3
    assert ("a", b"1") not in window and ("a", b"2") in window and ("a", b"4") in window
    assert ("b", b"4") not in window                   # the topic is part of the fingerprint
    window.add("a", b"2")                              # seen again: newest once more
    window.add("a", b"5")
    assert ("a", b"2") in window and ("a", b"3") not in window
    with pytest.raises(ValueError, match="capacity"):
        RecentlyLogged(capacity=0)


def _message(k: int, *, redelivered: bool, ack: int | None = None) -> Message:
    body = json.dumps({"t": 100.0 + k, "y": 1.0 + 0.1 * k, "u": {"u": float(k % 5)}, "seq": k}).encode()
    return Message("dp", body, "mqtt", "plant/dp", ack=None if ack is None else (1, ack), redelivered=redelivered)


class _AckRecorder:
    """Stands in for the MQTT ingest: keeps the acknowledgements the engine sends."""

    def __init__(self, acks: list[tuple[int, int]]) -> None:
        self.ack = acks.extend

    def start(self) -> None:
        pass

    def stop(self) -> None:
        pass


def _runtime(store: Path, acks: list[tuple[int, int]]) -> Runtime:
    runtime = offline_runtime({"dp": {"terms": ["1", "u"]}}, store)
    runtime.ingest = _AckRecorder(acks)  # type: ignore[assignment]
    return runtime


def test_a_redelivered_logged_message_is_acknowledged_and_not_applied_again(tmp_path: Path) -> None:
    acks: list[tuple[int, int]] = []
    runtime = _runtime(tmp_path / "store", acks)
    runtime.start()
    try:
        for k in range(10):
            assert runtime.engine.submit(_message(k, redelivered=False, ack=k))
        assert runtime.engine.drain(5.0)
        position = runtime.engine.position
        for k in range(7, 10):                          # the broker sends three again, DUP set
            assert runtime.engine.submit(_message(k, redelivered=True, ack=100 + k))
        assert runtime.engine.submit(_message(3, redelivered=False, ack=200))   # a true repeat from the plant
        assert runtime.engine.submit(_message(10, redelivered=True, ack=300))   # DUP, but never logged
        assert runtime.engine.drain(5.0)
        stats = runtime.engine.stats
        assert stats.redelivered == 3
        assert stats.samples_applied + stats.samples_warmup == 11
        assert stats.refused == {"out_of_order_seq": 1}             # the plant's repeat, refused as ever
        assert sorted(mid for _, mid in acks) == [*range(10), 107, 108, 109, 200, 300]
        assert runtime.engine.position == position + 2              # only the two not recognised were logged
    finally:
        runtime.stop()


def test_after_a_restart_redeliveries_of_messages_before_the_checkpoint_are_still_recognised(
        tmp_path: Path) -> None:
    acks: list[tuple[int, int]] = []
    runtime = _runtime(tmp_path / "store", acks)
    runtime.start()
    for k in range(10):
        assert runtime.engine.submit(_message(k, redelivered=False, ack=k))
    assert runtime.engine.drain(5.0)
    runtime.stop()                                       # a final checkpoint after all ten

    again = _runtime(tmp_path / "store", acks)
    again.start()
    try:
        assert again.recovery is not None and again.recovery["reapplied"] == 0
        for k in range(5, 10):
            assert again.engine.submit(_message(k, redelivered=True, ack=50 + k))
        assert again.engine.drain(5.0)
        assert again.engine.stats.redelivered == 5 and again.engine.stats.refused == {}
    finally:
        again.stop()
