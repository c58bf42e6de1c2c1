"""``GET /api/v1/snapshot`` with 10,000 channels, cold (first call after a new snapshot version) and warm (cached
body), through real HTTP and TestClient, beside the same stack serving a ready body of the same size. Times
are printed, never asserted; the body must hold every channel."""

from __future__ import annotations

import json
import sys
import time
from collections.abc import Callable
from pathlib import Path
from typing import Any

import httpx
import pytest
from fastapi.responses import Response

from service.api.app import create_app
from service.broker_link.messages import Message
from service.runtime import Runtime
from tests.benchmarks._common import print_table
from tests.benchmarks._environment import MachineUsage, header
from tests.benchmarks._figures import ms, percentiles
from tests.benchmarks._service_runs import service_config
from tests.benchmarks._uvicorn_thread import UvicornThread
from tests.support.clients import api_client

pytestmark = pytest.mark.benchmark

SNAPSHOT_CHANNELS = 10_000
SNAPSHOT_CALLS = 50
GOAL_SNAPSHOT = 0.050                 # seconds, p99 through real HTTP


def _sample_payload(samples: list[tuple[float, float]]) -> bytes:
    """A batch payload of (t, u) pairs, y = 2 + 0.5 u + a little deterministic noise."""
    body = [{"t": t, "y": 2.0 + 0.5 * u + 0.01 * ((int(t) * 7) % 5 - 2), "u": {"u": u}} for t, u in samples]
    return json.dumps({"samples": body}).encode()


def _cold_warm(runtime: Runtime, get: Callable[[], Any], calls: int, first_t: float
               ) -> tuple[list[float], list[float], int]:
    """Per call: one new sample (so a new snapshot version), then a timed cold GET and a timed warm GET."""
    cold, warm, size = [], [], 0
    for i in range(calls):
        version = runtime.engine.snapshot.version
        assert runtime.engine.submit(Message(f"c{i}", _sample_payload([(first_t + i, 1.0 + i % 7)]), "http"), 5.0)
        deadline = time.monotonic() + 10.0
        while runtime.engine.snapshot.version == version and time.monotonic() < deadline:
            time.sleep(0.001)
        assert runtime.engine.snapshot.version > version, "no new snapshot version"
        for bucket in (cold, warm):
            started = time.perf_counter()
            response = get()
            bucket.append(time.perf_counter() - started)
            assert response.status_code == 200
            size = len(response.content)
    return cold, warm, size


def test_snapshot_get_10000_channels(tmp_path: Path) -> None:
    usage = MachineUsage()
    built = time.perf_counter()
    config = service_config(tmp_path / "snapshot", SNAPSHOT_CHANNELS)
    runtime = Runtime(config, mqtt=False)
    build_seconds = time.perf_counter() - built
    app = create_app(runtime, manage_runtime=False)
    results: dict[str, tuple[list[float], list[float], int]] = {}
    real = "real HTTP (uvicorn h11 + httpx): /api/v1/snapshot"
    runtime.start()
    try:
        fed = time.perf_counter()
        for k in range(SNAPSHOT_CHANNELS):
            payload = _sample_payload([(1000.0 + j, float((k + 3 * j) % 11) - 5.0) for j in range(5)])
            assert runtime.engine.submit(Message(f"c{k}", payload, "http"), 5.0)
        assert runtime.engine.drain(120.0), "engine did not apply the initial data"
        feed_seconds = time.perf_counter() - fed
        snap = runtime.engine.snapshot
        assert len(snap.channels) == SNAPSHOT_CHANNELS
        assert all(entry.view.applied == 5 for entry in snap.channels.values()), "a channel lacks data"
        qualities = sorted({entry.quality for entry in snap.channels.values()})
        joined = time.perf_counter()
        fragments = b",".join(entry.fragment for entry in snap.channels.values())
        join_seconds = time.perf_counter() - joined
        constant = b'{"version": 0, "created_at": 0.0, "channels": {' + fragments + b"}}"

        @app.get("/bench/constant", include_in_schema=False)
        def bench_constant() -> Response:          # the same stack returning a ready body of the same size
            return Response(constant, media_type="application/json")

        with UvicornThread(app) as server, httpx.Client(base_url=server.url, timeout=10.0) as client:
            results[real] = _cold_warm(runtime, lambda: client.get("/api/v1/snapshot"), SNAPSHOT_CALLS, 2000.0)
            results["real HTTP: ready body of the same size"] = _cold_warm(
                runtime, lambda: client.get("/bench/constant"), SNAPSHOT_CALLS, 3000.0)
            body = client.get("/api/v1/snapshot").json()
            assert len(body["channels"]) == SNAPSHOT_CHANNELS
        with api_client(app) as test_client:
            results["TestClient (in-process ASGI): /api/v1/snapshot"] = _cold_warm(
                runtime, lambda: test_client.get("/api/v1/snapshot"), SNAPSHOT_CALLS, 4000.0)
            results["TestClient: ready body of the same size"] = _cold_warm(
                runtime, lambda: test_client.get("/bench/constant"), SNAPSHOT_CALLS, 5000.0)
    finally:
        runtime.stop()

    header(f"GET /api/v1/snapshot with {SNAPSHOT_CHANNELS:,} channels, {SNAPSHOT_CALLS} calls each", "not used", usage)
    print(f"   setup: config + engine for {SNAPSHOT_CHANNELS:,} channels {build_seconds:.2f} s; 5 samples per channel "
          f"applied in {feed_seconds:.2f} s; qualities {qualities}; joining the {SNAPSHOT_CHANNELS:,} cached "
          f"fragments in-process {join_seconds * 1e3:.1f} ms")
    print("   cold = first GET after a new snapshot version (the handler rebuilds the body); warm = the next GET "
          "(cached body, same version); timed until the whole body is read, no client-side JSON parsing; the 'ready "
          "body' rows are the same stack returning prepared bytes (the floor, the raw figure here)")
    rows = []
    for name, (cold, warm, size) in results.items():
        c50, c99, cmax = percentiles(cold)
        w50, w99, wmax = percentiles(warm)
        rows.append([name, f"{size / 1e6:.2f}", ms(c50), ms(c99), ms(cmax), ms(w50), ms(w99), ms(wmax)])
    print_table(["transport: path", "body MB", "cold p50 ms", "cold p99", "cold max", "warm p50 ms", "warm p99",
                 "warm max"], rows)
    cold99, warm99 = percentiles(results[real][0])[1], percentiles(results[real][1])[1]
    print(f"   goal < {GOAL_SNAPSHOT * 1e3:.0f} ms (real HTTP, p99): "
          f"cold {'met' if cold99 < GOAL_SNAPSHOT else 'MISSED'} ({ms(cold99)} ms), "
          f"warm {'met' if warm99 < GOAL_SNAPSHOT else 'MISSED'} ({ms(warm99)} ms)")
    sys.stdout.flush()
