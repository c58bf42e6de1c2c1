"""The state a service left in its store, and the same stream run in-process without interruption, compared.

Shared by the tests that put a real ``rwls serve`` through kills and floods: what counts is what its last
checkpoint holds (every array, bit for bit; the bank's and the alarm book's metadata) and its journal.
"""

from __future__ import annotations

from collections.abc import Iterable
from pathlib import Path
from typing import Any

import numpy as np

from service.broker_link.messages import Message
from service.config.settings import parse_config
from service.runtime import Runtime
from service.storage.persistence import decode_checkpoint
from service.storage.store import Store, store_url
from tests.support.runtimes import feed

WALL_CLOCK = {"engine.updated_at"}        # when messages arrived: the wall clock, not the inputs

FinalState = tuple[dict[str, np.ndarray], dict[str, Any], list[dict[str, Any]]]


def final_state(data: Path, url: str) -> FinalState:
    """The newest checkpoint's arrays and meta, and the whole journal, read from the store."""
    store = Store(store_url(url or str(data)))
    try:
        newest = store.checkpoints()[0]
        arrays, meta = decode_checkpoint(newest.body)
        return arrays, meta, store.journal(0, 100_000)
    finally:
        store.close()


def uninterrupted_state(settings: dict[str, Any], data: Path,
                        stream: Iterable[tuple[str | None, str, bytes]]) -> FinalState:
    """``(channel or None for a tag message, topic, payload)`` into a service that never stops (in-process, same
    arithmetic)."""
    config = parse_config({**settings, "store": {"path": str(data)}})
    runtime = Runtime(config, mqtt=False)
    runtime.start()
    try:
        feed(runtime, (Message(cid, payload, "mqtt", topic) for cid, topic, payload in stream), submit_timeout=10.0,
             drain_timeout=60.0)
    finally:
        runtime.stop()
    return final_state(data, "")


def assert_same_checkpoint(got: FinalState, want: FinalState) -> None:
    """Every array equal bit for bit (but arrival times), the same metadata, the same journal entries."""
    arrays_a, meta_a, journal_a = got
    arrays_b, meta_b, journal_b = want
    assert arrays_a.keys() == arrays_b.keys()
    for key in sorted(arrays_a.keys() - WALL_CLOCK):
        assert arrays_a[key].dtype == arrays_b[key].dtype, key
        assert arrays_a[key].tobytes() == arrays_b[key].tobytes(), key
    assert meta_a["bank"] == meta_b["bank"]            # lane counters, lag buffers, baselines
    assert meta_a["alarms"] == meta_b["alarms"]
    # Entry for entry and once each; start-up suppression is stamped with the wall clock.
    def strip(entries: list[dict[str, Any]]) -> list[dict[str, Any]]:
        return [{k: v for k, v in e.items() if not (k == "time" and e["action"] == "suppress")} for e in entries]
    assert strip(journal_a) == strip(journal_b)
