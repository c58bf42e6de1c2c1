"""Publish -> visible under a paced load: one run of the service with the real HTTP API, and its table rows.

The publisher stamps each sample with its ``time.time()`` just before publishing (the sample shape's ``t``; the
tag shape's ``ts`` in whole milliseconds, rounded down, taken before the instant's input tag, so the output's
sample carries it); a separate process (``_snapshot_poller.py``) polls the real ``/api/v1/snapshot`` (uvicorn on
a loopback port, in a thread of the service's process) and takes response time - ``t`` for every channel whose
``t`` changed; the benchmark's own thread reads the engine's snapshot in process (``SnapshotWatcher``).
"""

from __future__ import annotations

import contextlib
import select
import subprocess
import sys
import time
from pathlib import Path
from typing import Any

from service.api.app import create_app
from service.runtime import Runtime
from tests.benchmarks._figures import fmt, ms, percentiles
from tests.benchmarks._mqtt_load import POLL, Broker, finish, publisher, reap, running, watch
from tests.benchmarks._profiles import ThreadProfiles
from tests.benchmarks._service_runs import Probe, await_subscription, bench_service, counts
from tests.benchmarks._uvicorn_thread import UvicornThread

__all__ = ["METHOD", "SnapshotWatcher", "cost_row", "latency_rows", "latency_run"]

POLLER = Path(__file__).parent / "_snapshot_poller.py"

METHOD = ("   HTTP: a separate process polls GET /api/v1/snapshot (uvicorn on 127.0.0.1 in a thread of the service "
          "process, If-None-Match) with 10 ms pauses and counts each channel whose t changed, so its figure includes "
          "up to one poll period of waiting. in-process: the benchmark's own thread reads runtime.engine.snapshot "
          f"every {POLL * 1e3:.0f} ms. hand-over: updated_at - t from the HTTP bodies (publish -> paho on_message "
          "of the service). A channel updated twice between two looks shows only its later sample ('measured').")


class SnapshotWatcher:
    """In-process view: reads ``runtime.engine.snapshot`` (as the HTTP handler does) on every poll of ``watch``."""

    def __init__(self, runtime: Runtime) -> None:
        self._runtime = runtime
        self._version = -1
        self._last_t: dict[str, float] = {}
        self.latency: list[float] = []

    def __call__(self) -> None:
        snap = self._runtime.engine.snapshot
        if snap.version == self._version:
            return
        observed = time.time()
        self._version = snap.version
        for cid, entry in snap.channels.items():
            t = entry.view.last_t
            if t is not None and self._last_t.get(cid) != t:
                self._last_t[cid] = t
                self.latency.append(observed - t)


def latency_run(broker: Broker, store: Path, rate: float, seconds: float, *, tags: bool = False,
                http: bool = True, profile: bool = False) -> dict[str, Any]:
    """The service paced at ``rate`` messages/s (``tags``: tag messages, two per sample) for ``seconds``; its
    publish -> visible latencies (HTTP and in-process), counts, thread CPU and, with ``profile``, profiles."""
    prefix, config = bench_service(broker, store, "lattag" if tags else "lat", tags=tags)
    runtime = Runtime(config)
    profiles = ThreadProfiles(runtime) if profile else None
    app = create_app(runtime, manage_runtime=False)
    messages = int(rate * seconds)
    samples = messages // 2 if tags else messages
    watcher = SnapshotWatcher(runtime)
    polled: dict[str, Any] = {}
    runtime.start()
    try:
        with UvicornThread(app) as server, contextlib.ExitStack() as stack:
            await_subscription(runtime, broker.port, prefix, tags=tags)
            base = counts(runtime)
            poller = None
            if http:
                poller = subprocess.Popen(
                    [sys.executable, str(POLLER), "--url", f"{server.url}/api/v1/snapshot",
                     "--max-seconds", str(seconds + 30.0), "--quiet", "2.0", "--interval", "0.01"],
                    stdin=subprocess.DEVNULL, stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True)
                stack.callback(reap, poller)
                ready, _, _ = select.select([poller.stdout], [], [], 15.0)
                assert ready and poller.stdout is not None and poller.stdout.readline().strip() == "ready", (
                    "snapshot poller did not start")
            probe = Probe(runtime, broker)
            with publisher(broker.port, prefix, messages=messages, rate=rate, wall=True, tags=tags) as proc:
                watch(lambda: counts(runtime).processed - base.processed, samples, running(proc), watcher)
                probe.stop()
                published = finish(proc)
            watcher()
            if poller is not None:
                polled = finish(poller, timeout=seconds + 40.0)
            final = counts(runtime)
    finally:
        runtime.stop()
    return {"rate": rate, "messages": messages, "samples": samples, "published": published,
            "applied": final.applied - base.applied, "in_process": watcher.latency, "polled": polled,
            "probe": probe.summary(samples, messages), "profiles": profiles, "config": config}


def latency_rows(run: dict[str, Any]) -> list[list[str]]:
    """Rows (what, paced rate, measured, published, p50 / p99 / max ms) of one run's three latencies."""
    polled = run["polled"]
    rows = []
    for name, values in (("service: hand-over to the engine queue", polled.get("handover", [])),
                         ("service: engine snapshot (in-process)", run["in_process"]),
                         ("service: GET /api/v1/snapshot (HTTP)", polled.get("latency", []))):
        p50, p99, worst = percentiles(values)
        rows.append([name, fmt(run["rate"]), f"{len(values):,}", f"{run['messages']:,}", ms(p50), ms(p99),
                     ms(worst)])
    return rows


def cost_row(run: dict[str, Any], raw_paho_us: float, *, per_message: bool = False) -> list[str]:
    """Where one run's time went: service CPU, paho (or reader) and engine thread CPU per message (or per
    sample), batches, engine busy, the HTTP polls."""
    probe, polled = run["probe"], run["polled"]
    poll_p50, poll_p99, _ = percentiles(polled.get("poll_seconds", []))
    return [fmt(run["rate"]), f"{probe['process_share']:.0%}", fmt(probe["paho_us"], 1), fmt(raw_paho_us, 1),
            fmt(probe["engine_us_message" if per_message else "engine_us"], 1), f"{probe['batches']:,}",
            fmt(probe["per_batch"], 1), f"{probe['busy']:.0%}",
            f"{polled.get('polls', 0):,} ({polled.get('not_modified', 0):,} x 304)",
            f"{ms(poll_p50)} / {ms(poll_p99)}"]
