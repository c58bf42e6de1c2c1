"""Faults of the host (a full disk, a store that went away): nothing valid refused, held, healed by itself.

The faults are injected where the operating system reports them (``os.fdatasync`` failing with ENOSPC, the
store's transaction raising); tests/integration/test_host_faults.py fills a real file system and stops a real
PostgreSQL.
"""

from __future__ import annotations

import errno
import json
import os
import threading
import time
from collections.abc import Callable, Iterator
from pathlib import Path
from typing import Any

import numpy as np
import pytest

from service.broker_link.messages import Message
from service.engine.host_faults import FaultPart, HostFaults
from service.engine.operations import Acknowledge, Inspect
from service.engine.writer import EngineBusy
from service.runtime import Runtime
from service.storage.input_log import InputLog
from tests.support.runtimes import assert_same_arrays, feed, offline_runtime, state_arrays

CHANNELS = {f"c{k}": {"terms": ["1", "u"], "forgetting_factor": 0.99, "weighting": "tracked",
                      "detectors": {"commissioning_samples": 30, "calibration_samples": 0}} for k in range(3)}


class DiskFull:
    """``os.fdatasync`` failing with ENOSPC while ``on`` is set (where a full disk shows on a sync)."""

    def __init__(self) -> None:
        self.on = threading.Event()
        self.refused = 0
        self._real = os.fdatasync

    def __call__(self, fd: int) -> None:
        if self.on.is_set():
            self.refused += 1
            raise OSError(errno.ENOSPC, "No space left on device")
        self._real(fd)


@pytest.fixture
def disk_full(monkeypatch: pytest.MonkeyPatch) -> Iterator[DiskFull]:
    fault = DiskFull()
    monkeypatch.setattr(os, "fdatasync", fault)
    yield fault


def _messages(first: int, count: int) -> list[Message]:
    rng = np.random.default_rng(first)
    arrival = time.time()
    out = []
    for k in range(first, first + count):
        for cid in CHANNELS:
            u = float(rng.normal())
            body = {"t": 1000.0 + k, "y": 2.0 - 0.5 * u + float(rng.normal(0.0, 0.1)), "u": {"u": u}, "seq": k}
            out.append(Message(cid, json.dumps(body).encode(), "http", received=arrival))
    return out


def _assert_same_state(a: Runtime | dict[str, np.ndarray], b: Runtime) -> None:
    assert_same_arrays(a if isinstance(a, dict) else state_arrays(a), b)


def _wait_for(condition: Callable[[], bool], timeout: float = 10.0) -> None:
    deadline = time.monotonic() + timeout
    while not condition():
        assert time.monotonic() < deadline, "condition not met in time"
        time.sleep(0.01)


# ------------------------------------------------------------------------------------------ the input log
def test_a_failed_sync_gives_back_its_records_and_the_same_records_go_in_once(tmp_path: Path,
                                                                            disk_full: DiskFull) -> None:
    wal = InputLog(tmp_path / "inputs")
    wal.append([("m", ("c0", b"0", "mqtt", "t", 1.0))])
    wal.sync()
    size = sum(p.stat().st_size for p in (tmp_path / "inputs").iterdir())
    disk_full.on.set()
    batch = [("m", ("c0", str(k).encode(), "mqtt", "t", 1.0 + k)) for k in range(1, 4)]
    assert wal.append(batch) == 4
    with pytest.raises(OSError, match="No space left"):
        wal.sync()
    assert (wal.last_seq, wal.synced_seq) == (1, 1)                    # the seqs are given back
    assert sum(p.stat().st_size for p in (tmp_path / "inputs").iterdir()) == size   # and the bytes
    disk_full.on.clear()
    assert wal.append(batch) == 4
    wal.sync()
    wal.close()
    again = InputLog(tmp_path / "inputs")
    assert [(seq, fields[1]) for seq, _, fields in again.read_after(0)] == [(1, b"0"), (2, b"1"), (3, b"2"),
                                                                            (4, b"3")]


# -------------------------------------------------------------------------------------------- the engine
def test_a_full_disk_holds_ingest_without_refusing_and_resumes_by_itself(tmp_path: Path,
                                                                         disk_full: DiskFull) -> None:
    messages = _messages(0, 120)
    whole = offline_runtime(CHANNELS, tmp_path / "whole", store_options={"checkpoint_seconds": 3600})
    whole.start()
    held = offline_runtime(CHANNELS, tmp_path / "held", store_options={"checkpoint_seconds": 3600})
    held.start()
    try:
        feed(whole, messages)
        feed(held, messages[:90])
        before = (held.engine.stats.messages, held.engine.stats.samples_applied, held.engine.position)
        disk_full.on.set()
        feeder = threading.Thread(target=feed, args=(held, messages[90:]), kwargs={"drain_timeout": 30.0})
        feeder.start()
        _wait_for(lambda: disk_full.refused >= 3)                     # tried, and tried again with backoff
        state = held.readiness()
        assert state["ready"] is False
        assert [f["part"] for f in state["faults"]] == ["input_log"]          # type: ignore[index]
        assert "No space left" in str(state["faults"][0]["reason"])            # type: ignore[index]
        assert held.ingest_held() is not None                          # HTTP ingest answers 503 meanwhile
        with pytest.raises(EngineBusy, match="input log"):             # a logged operation is refused at once
            held.engine.execute(Acknowledge(alarm="c0:offset", user="ana", comment=None, time=1.0))
        # Nothing taken, logged or applied meanwhile.
        assert (held.engine.stats.messages, held.engine.stats.samples_applied, held.engine.position) == before
        disk_full.on.clear()
        feeder.join(30.0)
        assert not feeder.is_alive()
        assert held.readiness()["ready"] is True
        assert held.refusals() == {}                                   # nothing valid refused or dead-lettered
        assert held.faults.started[FaultPart.INPUT_LOG] == 1 and held.faults.active() == []
        _assert_same_state(whole, held)
        expected = state_arrays(whole)
    finally:
        whole.stop()
        held.engine.stop()                  # what kill -9 leaves: no final checkpoint, recovery from the log
        held._release_lock()
    again = offline_runtime(CHANNELS, tmp_path / "held", store_options={"checkpoint_seconds": 3600})
    again.start()                                                  # every record in the log once
    try:
        assert again.recovery is not None and again.recovery["reapplied"] > 0
        _assert_same_state(expected, again)
    finally:
        again.stop()


def test_a_lost_store_keeps_ingest_going_and_checkpoints_when_it_is_back(tmp_path: Path,
                                                                         monkeypatch: pytest.MonkeyPatch) -> None:
    messages = _messages(0, 100)
    whole = offline_runtime(CHANNELS, tmp_path / "whole", store_options={"checkpoint_seconds": 3600})
    whole.start()
    lost = offline_runtime(CHANNELS, tmp_path / "lost", store_options={"checkpoint_seconds": 3600})
    lost.start()
    persistence = lost.persistence
    assert persistence is not None
    store_away = threading.Event()
    save = persistence.store.save

    def flaky_save(*args: Any, **kwargs: Any) -> Any:
        if store_away.is_set():
            raise ConnectionError("connection to server at 127.0.0.1, port 5432 failed: Connection refused")
        return save(*args, **kwargs)

    monkeypatch.setattr(persistence.store, "save", flaky_save)
    try:
        feed(whole, messages)
        feed(lost, messages[:50])
        store_away.set()
        lost.engine.execute(Inspect(lambda engine: persistence.checkpoint(engine)))
        assert [f.part for f in lost.faults.active()] == [FaultPart.STORE]
        assert lost.readiness()["ready"] is False
        feed(lost, messages[50:])                                      # samples go on: the input log holds them
        assert lost.ingest_held() is None
        assert lost.refusals() == {}
        checkpoints = persistence.checkpoints
        store_away.clear()
        _wait_for(lambda: lost.faults.active() == [], timeout=15.0)    # the engine's periodic retry, backed off
        assert persistence.checkpoints == checkpoints + 1
        assert lost.readiness()["ready"] is True
        _assert_same_state(whole, lost)
    finally:
        whole.stop()
        lost.stop()


def test_backoff_doubles_per_failure_up_to_its_cap_and_clears() -> None:
    now = [0.0]
    faults = HostFaults({FaultPart.STORE: (0.5, 2.0)}, clock=lambda: now[0])
    pauses = [faults.failed(FaultPart.STORE, OSError("down")) for _ in range(4)]
    assert pauses == [0.5, 1.0, 2.0, 2.0]
    assert faults.wait(FaultPart.STORE) == 2.0
    now[0] = 1.5
    assert faults.wait(FaultPart.STORE) == 0.5
    faults.cleared(FaultPart.STORE)
    assert faults.active() == [] and faults.wait(FaultPart.STORE) == 0.0
    assert (faults.started[FaultPart.STORE], faults.failures[FaultPart.STORE]) == (1, 4)
    with pytest.raises(ValueError, match="first retry"):
        HostFaults({FaultPart.INPUT_LOG: (3.0, 1.0)})


def test_reads_of_a_store_that_went_away_answer_503_and_say_so(tmp_path: Path,
                                                               monkeypatch: pytest.MonkeyPatch) -> None:
    from sqlalchemy.exc import OperationalError

    from service.api.app import create_app
    from tests.support.clients import api_client

    runtime = offline_runtime(CHANNELS, tmp_path / "store", store_options={"checkpoint_seconds": 3600})
    runtime.start()
    try:
        feed(runtime, _messages(0, 5))
        persistence = runtime.persistence
        assert persistence is not None

        def refused(*args: Any, **kwargs: Any) -> Any:
            raise OperationalError("SELECT", {}, ConnectionRefusedError("connection refused"))

        monkeypatch.setattr(persistence.store, "history", refused)
        monkeypatch.setattr(persistence.store, "journal", refused)
        persistence.persisted_seq = max(persistence.persisted_seq, 1)     # the journal's start is in the store
        with api_client(create_app(runtime, manage_runtime=False)) as client:
            for path in ("/api/v1/channels/c0/history?limit=5000", "/api/v1/alarms/journal?after=0"):
                response = client.get(path)
                assert response.status_code == 503, path
                assert "store cannot be reached" in response.json()["detail"]
                assert int(response.headers["Retry-After"]) > 0
            assert [f["part"] for f in client.get("/api/v1/ready").json()["faults"]] == ["store"]
    finally:
        runtime.stop()
