"""What a checkpoint costs: time and bytes for 1,000 and 10,000 channels, SQLite and PostgreSQL.

A checkpoint has three parts, timed apart: the **copy** of the state on the engine thread (the only
part ingest waits for), the **encoding** into one .npz blob and the store's **transaction** (both
on the writer thread). The peer, in the same run, is the same bytes written to a plain file and
fsync'd: the least any durable checkpoint of that size can cost on this disk.
"""

from __future__ import annotations

import json
import os
import statistics
import time
from pathlib import Path
from typing import Any

import numpy as np
import pytest

from service.broker_link.messages import Message
from service.engine.operations import Inspect
from service.runtime import Runtime
from service.storage.persistence import encode_checkpoint
from service.storage.store import Store, store_url
from tests.benchmarks._common import environment_line
from tests.support.runtimes import offline_runtime

pytestmark = pytest.mark.benchmark

SIZES = (1_000, 10_000)
SAMPLES_PER_CHANNEL = 60        # past a lag buffer's warm-up, a history row each, detectors commissioning
REPEATS = 5
TERMS = ["1", "u", "v", "u*v"]  # n = 4


def _runtime(k: int, data: Path) -> Runtime:
    channels = {f"ch{i:05d}": {"terms": TERMS, "topic": f"bench/ch{i:05d}",
                               "detectors": {"commissioning_samples": 40}} for i in range(k)}
    runtime = offline_runtime(channels, data, store_options={"checkpoint_seconds": 86400.0})
    runtime.start()
    rng = np.random.default_rng(7)
    for i in range(k):
        u, v = rng.normal(size=(2, SAMPLES_PER_CHANNEL))
        y = 1.0 + 2.0 * u - v + 0.5 * u * v + rng.normal(0.0, 0.1, SAMPLES_PER_CHANNEL)
        body = {"samples": [{"t": 1_767_225_600.0 + 10.0 * j, "y": float(y[j]),
                             "u": {"u": float(u[j]), "v": float(v[j])}, "seq": j}
                            for j in range(SAMPLES_PER_CHANNEL)]}
        cid = f"ch{i:05d}"
        assert runtime.engine.submit(Message(cid, json.dumps(body).encode(), "http"), timeout=30.0)
    assert runtime.engine.drain(300.0)
    return runtime


def _fsync_write(path: Path, body: bytes) -> float:
    started = time.perf_counter()
    fd = os.open(path, os.O_WRONLY | os.O_CREAT | os.O_TRUNC, 0o600)
    try:
        os.write(fd, body)
        os.fsync(fd)
    finally:
        os.close(fd)
    return time.perf_counter() - started


def _measure(runtime: Runtime, store: Store, scratch: Path) -> dict[str, Any]:
    persistence = runtime.persistence
    assert persistence is not None
    copies, encodes, saves, raw = [], [], [], []
    body = b""
    for _ in range(REPEATS):
        def copy(engine: Any) -> tuple[float, Any]:
            started = time.perf_counter()
            state = persistence.state(engine)
            return time.perf_counter() - started, state
        seconds, (arrays, meta) = runtime.engine.execute(Inspect(copy), timeout=60.0)
        copies.append(seconds)
        started = time.perf_counter()
        body = encode_checkpoint(arrays, meta)
        encodes.append(time.perf_counter() - started)
        started = time.perf_counter()
        store.save(body, int(meta["position"]))
        saves.append(time.perf_counter() - started)
        raw.append(_fsync_write(scratch, body))
    return {"copy": statistics.median(copies), "encode": statistics.median(encodes),
            "save": statistics.median(saves), "raw": statistics.median(raw), "bytes": len(body)}


@pytest.mark.parametrize("backend", ["sqlite", "postgresql"])
def test_checkpoint_cost(backend: str, tmp_path: Path, request: pytest.FixtureRequest) -> None:
    url = ""
    if backend == "postgresql":
        url = request.getfixturevalue("postgres_url")
    print(f"\n{environment_line()}")
    print(f"checkpoint cost, {backend}, n = {len(TERMS)}, medians of {REPEATS}")
    print(f"{'channels':>9} {'copy ms':>8} {'encode ms':>10} {'store ms':>9} {'total ms':>9} "
          f"{'fsync peer ms':>14} {'store/peer':>11} {'bytes':>11} {'B/channel':>10}")
    for k in SIZES:
        data = tmp_path / f"data-{k}"
        runtime = _runtime(k, data)
        store = Store(store_url(url or str(data / "bench.sqlite3")))
        try:
            m = _measure(runtime, store, tmp_path / f"peer-{k}.npz")
        finally:
            store.close()
            runtime.stop()
        total = m["copy"] + m["encode"] + m["save"]
        print(f"{k:>9,} {m['copy'] * 1e3:>8.1f} {m['encode'] * 1e3:>10.1f} {m['save'] * 1e3:>9.1f} "
              f"{total * 1e3:>9.1f} {m['raw'] * 1e3:>14.1f} {m['save'] / m['raw']:>11.2f} "
              f"{m['bytes']:>11,} {m['bytes'] / k:>10.0f}")
        assert m["bytes"] > 0
