"""History retention counts in sample time: old-dated data (a replay, a plant clock in the past) keeps its rows."""

from __future__ import annotations

import json
from pathlib import Path

from service.broker_link.messages import Message
from service.engine.operations import Inspect
from service.runtime import Runtime
from tests.support.runtimes import offline_runtime

T0 = 1_704_067_200.0          # 2024-01-01: long before the wall clock of any test run
DAY = 86400.0


def _runtime(data: Path) -> Runtime:
    return offline_runtime({"a": {"topic": "t/a", "terms": ["1", "u"]}}, data,
                           store_options={"history_step": 3600.0, "history_retention_days": 2.0})


def _feed(runtime: Runtime, start: int, days: float) -> int:
    k = start
    for hour in range(int(days * 24)):
        body = {"t": T0 + hour * 3600.0 + start * 3600.0, "y": 1.0 + 0.5 * (k % 5) + 0.01 * (k % 3), "u": {"u": k % 5},
                "seq": k}
        assert runtime.engine.submit(Message("a", json.dumps(body).encode(), "mqtt", "t/a"), timeout=5.0)
        assert runtime.engine.drain(5.0)           # one batch per sample: one history row per hour
        k += 1
    return k


def test_rows_dated_long_before_the_wall_clock_are_kept_and_only_those_past_retention_go(tmp_path: Path) -> None:
    runtime = _runtime(tmp_path)
    runtime.start()
    try:
        persistence = runtime.persistence
        assert persistence is not None
        k = _feed(runtime, 0, 1.0)                                      # one day of hourly rows
        runtime.engine.execute(Inspect(lambda engine: persistence.periodic(engine)))
        runtime.engine.execute(Inspect(lambda engine: persistence.checkpoint(engine)))
        first_day = runtime.history("a", None, None, 10_000)
        assert len(first_day) == 24                                     # nothing pruned: within 2 days of the newest
        persistence._last_prune = 0.0                                   # the next periodic job prunes again
        _feed(runtime, k, 3.0)                                          # three more days
        runtime.engine.execute(Inspect(lambda engine: persistence.checkpoint(engine)))
        runtime.engine.execute(Inspect(lambda engine: persistence.periodic(engine)))
        rows = runtime.history("a", None, None, 10_000)
    finally:
        runtime.stop()
    newest = max(r["t"] for r in rows)
    assert min(r["t"] for r in rows) >= newest - 2.0 * DAY             # older than retention: gone
    assert len(rows) >= 2 * 24                                          # the last two days: kept


def test_rows_stay_visible_while_a_checkpoint_writes_them(tmp_path: Path) -> None:
    import threading

    runtime = _runtime(tmp_path)
    runtime.start()
    try:
        persistence = runtime.persistence
        assert persistence is not None
        _feed(runtime, 0, 0.5)                                           # 12 hourly rows, pending
        before = runtime.history("a", None, None, 100)
        assert len(before) == 12
        gate, inside = threading.Event(), threading.Event()
        save = persistence.store.save

        def slow_save(*args: object, **kwargs: object) -> int:
            inside.set()
            assert gate.wait(10.0)
            return save(*args, **kwargs)                                 # type: ignore[arg-type]

        persistence.store.save = slow_save                               # type: ignore[method-assign]
        runtime.engine.execute(Inspect(lambda engine: persistence.checkpoint(engine, wait=False)))
        assert inside.wait(10.0)
        during = runtime.history("a", None, None, 100)                   # handed to the writer, not stored yet
        gate.set()
        runtime.engine.execute(Inspect(lambda engine: persistence.checkpoint(engine)))  # waits for the writer first
        after = runtime.history("a", None, None, 100)
    finally:
        runtime.stop()
    assert during == before
    assert [r["t"] for r in after] == [r["t"] for r in before]           # stored now, and listed once
