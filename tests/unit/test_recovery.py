"""Recovery in-process: a crash after any checkpoint, the input log reapplied, the state of an uninterrupted run."""

from __future__ import annotations

import json
import time
from pathlib import Path
from typing import Any

import numpy as np
import pytest
from sqlalchemy import update

from service.broker_link.messages import Message
from service.engine.operations import Acknowledge, Inspect
from service.runtime import Runtime
from service.storage.persistence import Persistence
from service.storage.store import checkpoints
from tests.support.runtimes import feed, offline_runtime

CHANNELS = {f"c{k}": {"terms": ["1", "u"], "forgetting_factor": 0.99,
                      "detectors": {"commissioning_samples": 40, "calibration_samples": 0,   # Gaussian: no table
                                    "offset": {"h": 5.0}}} for k in range(4)}
CHANNELS["arx"] = {"terms": ["1", "y[-1]", "u"], "weighting": "tracked", "noise": {"model_terms": ["1", "u"]},
                   "detectors": {"commissioning_samples": 40}}
WALL_CLOCK = {"engine.updated_at"}        # arrival times: what the wall clock said, not the inputs


@pytest.fixture
def arrival() -> float:
    """The messages' arrival stamps start now, when the test runs: recent, so nothing is stale."""
    return time.time()


def _runtime(store: Path) -> Runtime:
    return offline_runtime(CHANNELS, store, store_options={"checkpoint_seconds": 3600})


def _messages(first: int, count: int, arrival: float) -> list[Message]:
    rng = np.random.default_rng(first)
    out = []
    for k in range(first, first + count):
        for cid in CHANNELS:
            u = float(rng.normal())
            offset = 1.5 if k >= 150 and cid == "c1" else 0.0          # an offset step: an alarm to journal
            body = {"t": 1000.0 + k, "y": 1.0 + 0.5 * u + offset + float(rng.normal(0.0, 0.1)), "u": {"u": u},
                    "seq": k}
            out.append(Message(cid, json.dumps(body).encode(), "http", received=arrival + k / 100.0))
    return out


def _checkpoint(runtime: Runtime) -> None:
    persistence = runtime.persistence
    assert persistence is not None
    runtime.engine.execute(Inspect(lambda engine: persistence.checkpoint(engine)))


def _crash(runtime: Runtime) -> None:
    """What kill -9 leaves: no final checkpoint, no clean close (the lock goes with the process)."""
    runtime.engine.stop()
    runtime._release_lock()


def _state(runtime: Runtime) -> tuple[dict[str, np.ndarray], dict[str, Any], list[dict[str, Any]]]:
    persistence = runtime.persistence
    assert persistence is not None
    arrays, meta = persistence.state(runtime.engine)
    journal = runtime.journal(0, 10_000, None)
    return arrays, meta, journal


def _same(a: Runtime, b: Runtime) -> None:
    arrays_a, meta_a, journal_a = _state(a)
    arrays_b, meta_b, journal_b = _state(b)
    assert arrays_a.keys() == arrays_b.keys()
    for key in arrays_a.keys() - WALL_CLOCK:
        assert arrays_a[key].tobytes() == arrays_b[key].tobytes(), key
    assert meta_a["bank"] == meta_b["bank"]
    assert meta_a["position"] == meta_b["position"]
    # The journal, entry for entry (start-up suppression is stamped with the wall clock; the rest, samples' times).
    strip = [{k: v for k, v in e.items() if k != "time"} for e in journal_a]
    assert strip == [{k: v for k, v in e.items() if k != "time"} for e in journal_b]
    assert [e["time"] for e in journal_a if e["action"] != "suppress" or e["seq"] > 25] == \
           [e["time"] for e in journal_b if e["action"] != "suppress" or e["seq"] > 25]
    assert any(e["action"] == "condition_on" for e in journal_a)


@pytest.mark.parametrize("crash_after", [0, 1, 2])
def test_a_crash_after_any_checkpoint_recovers_the_uninterrupted_state(tmp_path: Path, crash_after: int,
                                                                       arrival: float) -> None:
    chunks = [_messages(60 * k, 60, arrival) for k in range(4)]
    whole = _runtime(tmp_path / "whole")
    whole.start()
    for chunk in chunks:
        feed(whole, chunk)
    ack = whole.engine.execute(Acknowledge(alarm="c1:offset", user="ana", comment="seen", time=9.0))
    assert ack.entry.after == "Acknowledged"

    first = _runtime(tmp_path / "crashed")
    first.start()
    for k, chunk in enumerate(chunks[:3]):
        feed(first, chunk)
        if k < crash_after:
            _checkpoint(first)
    _crash(first)                                        # chunk 3 never checkpointed: only in the input log

    second = _runtime(tmp_path / "crashed")
    second.start()
    assert second.recovery is not None and second.recovery["reapplied"] > 0
    feed(second, chunks[3])
    second.engine.execute(Acknowledge(alarm="c1:offset", user="ana", comment="seen", time=9.0))
    try:
        _same(whole, second)
    finally:
        whole.stop()
        second.stop()


def test_a_torn_newest_checkpoint_falls_back_to_the_one_before(tmp_path: Path, arrival: float) -> None:
    whole = _runtime(tmp_path / "whole")
    whole.start()
    crashed = _runtime(tmp_path / "torn")
    crashed.start()
    for k in range(3):
        chunk = _messages(60 * k, 60, arrival)
        feed(whole, chunk)
        feed(crashed, chunk)
        _checkpoint(crashed)
    persistence = crashed.persistence
    assert persistence is not None
    store = persistence.store
    _crash(crashed)
    with store.engine.begin() as conn:                  # the newest loses its tail
        newest = max(c.id for c in store.checkpoints())
        conn.execute(update(checkpoints).where(checkpoints.c.id == newest).values(body=b"torn"))
    store.close()
    again = _runtime(tmp_path / "torn")
    again.start()
    assert again.recovery is not None and again.recovery["checkpoint"] != newest
    assert again.recovery["reapplied"] > 0            # the input log from the older checkpoint on
    try:
        _same(whole, again)
    finally:
        whole.stop()
        again.stop()


def test_a_clean_stop_checkpoints_and_restarts_without_replay(tmp_path: Path, arrival: float) -> None:
    runtime = _runtime(tmp_path / "store")
    runtime.start()
    feed(runtime, _messages(0, 80, arrival))
    before = _state(runtime)[0]["g0.bank.A"].copy()
    stopped = runtime.persistence                          # the runtime lets go of it at stop
    assert isinstance(stopped, Persistence)
    runtime.stop()
    again = _runtime(tmp_path / "store")
    again.start()
    try:
        assert again.recovery is not None and again.recovery["reapplied"] == 0
        assert _state(again)[0]["g0.bank.A"].tobytes() == before.tobytes()
        persistence = again.persistence
        assert isinstance(persistence, Persistence)
        # The stop's checkpoint is the newest stored, and its size is the one the stopped runtime reported.
        stored = persistence.store.checkpoints()
        assert stopped.checkpoints >= 1 and stopped.last_checkpoint_bytes == len(stored[0].body) > 0
        # The restarted runtime has written none yet; its first reports the size of what it stored.
        assert persistence.last_checkpoint_bytes == 0
        _checkpoint(again)
        assert persistence.last_checkpoint_bytes == len(persistence.store.checkpoints()[0].body) > 0
        ready = again.readiness()
        assert ready["checkpoint_age_seconds"] is not None and ready["input_log_position"] > 0
    finally:
        again.stop()


def test_readers_see_the_recovered_alarm_states_not_those_of_the_fresh_start(tmp_path: Path,
                                                                             arrival: float) -> None:
    runtime = _runtime(tmp_path / "store")
    runtime.start()
    feed(runtime, _messages(0, 200, arrival))           # c1's offset step raises its alarm
    raised = {a.id: str(a.state) for a in runtime.engine.snapshot.alarms}
    assert raised["c1:offset"] == "Unacknowledged"
    runtime.engine.execute(Acknowledge(alarm="c1:offset", user="ana", comment="", time=5.0))
    runtime.stop()
    again = _runtime(tmp_path / "store")
    again.start()
    try:
        # Before any new sample: the snapshot the API reads carries the checkpoint's alarm book.
        states = {a.id: str(a.state) for a in again.engine.snapshot.alarms}
        assert states["c1:offset"] == "Acknowledged"
        assert states["c0:offset"] == "Normal"         # commissioned: not held back as at a fresh start
    finally:
        again.stop()
