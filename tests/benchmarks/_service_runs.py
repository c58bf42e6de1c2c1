"""The service under MQTT load: a ``Runtime`` (MQTT ingest + engine) with ``CHANNELS`` channels ``["1", "u"]`` on
the benchmarks' broker, fed live or from a backlog its persistent session holds, with its counters, thread CPU
and queue watched; and the tables of one ingest scenario.

samples/s = samples / (first message handed over by paho -> last sample applied); its ratio is to the raw
paho rate measured the same way (live beside live, drain beside drain). Counts are asserted (nothing lost at
QoS 1, every sample applied or counted as rejected); times never are.
"""

from __future__ import annotations

import dataclasses
import math
import time
import uuid
from dataclasses import dataclass
from pathlib import Path
from typing import Any

from service.config.settings import RwlsConfig, parse_config
from service.runtime import Runtime
from tests.benchmarks._common import print_table
from tests.benchmarks._environment import MachineUsage, header, process_cpu, thread_cpu
from tests.benchmarks._figures import fmt, ms, per
from tests.benchmarks._mqtt_load import (
    CHANNELS,
    POLL,
    Broker,
    check_publisher,
    finish,
    nothing_more,
    publish_all,
    publisher,
    running,
    watch,
)
from tests.benchmarks._profiles import ThreadProfiles, print_profile
from tests.benchmarks._raw_paho import RawFigures
from tests.support.addresses import unique_client_id
from tests.support.configs import mqtt_settings, offline_config
from tests.support.mqtt_clients import publish_and_wait

__all__ = ["GOAL_RATIO", "SERVICE_MESSAGES", "Counts", "Probe", "await_subscription", "check_service", "counts",
           "engine_line", "profile_one_sample_live", "ratio_goal", "report_ingest", "service_config",
           "service_drain", "service_live"]

SERVICE_MESSAGES = 50_000             # one sample each, in a live run or a drained backlog
GOAL_RATIO = 0.80                     # of the raw paho rate, one sample per message
PROFILE_MESSAGES = 20_000             # single-sample messages in a profiled run


def service_config(store: Path, channels: int, *, port: int | None = None, prefix: str = "") -> RwlsConfig:
    """``channels`` channels ``c<k>`` with terms ``["1", "u"]``; on the broker at ``port`` when given, each on
    topic ``<prefix>/c<k>``."""
    # A baseline in force from the start (the publisher's y = 2 + 0.5 u): the detectors judge every sample.
    baseline = {"parameters": {"1": 2.0, "u": 0.5}, "noise_sigma": 0.06}
    table: dict[str, Any] = {f"c{k}": {"terms": ["1", "u"], "baseline": baseline} for k in range(channels)}
    if port is None:
        return offline_config(table, store)
    return parse_config(mqtt_settings(table, prefix=prefix, port=port, client_id=unique_client_id("rwls"),
                                      store=store, broker={"dead_letter_topic": f"{prefix}/dead-letter"}))


def engine_line(config: RwlsConfig) -> str:
    engine = config.engine
    return (f"   service: engine queue_size {engine.queue_size:,}, max_batch {engine.max_batch:,}, max_wait_ms "
            f"{engine.max_wait_ms}; {len(config.channels):,} channels, terms ['1', 'u'], baselines from the start; "
            f"QoS {config.broker.qos}, "
            f"MQTT protocol {config.broker.protocol} (auto picks 5 on Mosquitto 2)")


@dataclass(frozen=True)
class Counts:
    received: int
    messages: int
    applied: int
    warmup: int
    refused: int
    batches: int
    batch_seconds: float

    @property
    def processed(self) -> int:
        return self.applied + self.warmup + self.refused


def counts(runtime: Runtime) -> Counts:
    stats = runtime.engine.stats
    return Counts(runtime.ingest.received if runtime.ingest is not None else 0, stats.messages,
                  stats.samples_applied, stats.samples_warmup, sum(dict(stats.refused).values()),
                  stats.batches, stats.batch_seconds_total)


def await_subscription(runtime: Runtime, port: int, topic: str, timeout: float = 20.0) -> None:
    """Until the service's subscription is in place: a malformed probe to ``topic`` shows up as rejected."""
    assert runtime.ingest is not None and runtime.ingest.wait_subscribed(timeout), "service did not subscribe"
    deadline = time.monotonic() + timeout
    while time.monotonic() < deadline:
        publish_and_wait(port, [(topic, b"probe")], qos=1, timeout=5.0)
        until = time.monotonic() + 0.5
        while time.monotonic() < until:
            if runtime.engine.stats.refused.get("malformed_json", 0) > 0:
                assert runtime.engine.drain(10.0)
                return
            time.sleep(0.01)
    raise TimeoutError("the service's subscription did not take effect")


class Probe:
    """Thread CPU (paho, engine), process CPU, broker CPU and engine counters between two points of a run."""

    def __init__(self, runtime: Runtime, broker: Broker) -> None:
        # The ingest thread of this process: paho's own (thread ingest) or the reader of the
        # ingest process's queue (process ingest; paho then runs in another process).
        ingest_thread = getattr(runtime.ingest, "_thread", None) or getattr(runtime.ingest, "_reader", None)
        assert ingest_thread is not None and runtime.engine._thread is not None
        self._runtime, self._broker = runtime, broker
        self._threads = {"paho": ingest_thread.native_id, "engine": runtime.engine._thread.native_id}
        self.start = self._read()
        self.end = self.start

    def _read(self) -> dict[str, Any]:
        cpu = {name: thread_cpu(tid) for name, tid in self._threads.items()}
        return {**cpu, "process": time.process_time(), "broker": process_cpu(self._broker.pid),
                "counts": counts(self._runtime), "wall": time.perf_counter()}

    def stop(self) -> None:
        self.end = self._read()

    def delta(self, key: str) -> float:
        return float(self.end[key] - self.start[key])

    def summary(self, samples: int) -> dict[str, Any]:
        c0, c1 = self.start["counts"], self.end["counts"]
        wall = self.delta("wall")
        batches = c1.batches - c0.batches
        return {"paho_us": per(self.delta("paho"), c1.received - c0.received) * 1e6,
                "engine_us": per(self.delta("engine"), samples) * 1e6,
                "process_share": self.delta("process") / wall if wall > 0 else math.nan,
                "broker_cpu": self.delta("broker"), "batches": batches,
                "per_batch": per(c1.processed - c0.processed, batches),
                "busy": (c1.batch_seconds - c0.batch_seconds) / wall if wall > 0 else math.nan}


def ingest_result(how: str, *, messages: int, batch: int, published: dict[str, Any], base: Counts,
                  final: Counts, first_in: float | None, first_applied: float | None, done: float | None,
                  probe: Probe, max_depth: int, runtime: Runtime) -> dict[str, Any]:
    expected = messages * batch
    window = (done - first_in) if first_in is not None and done is not None else math.nan
    applied_window = (done - first_applied) if first_applied is not None and done is not None else math.nan
    return {"how": how, "batch": batch, "messages": messages, "expected": expected, "published": published,
            "received": final.received - base.received, "applied": final.applied - base.applied,
            "warmup": final.warmup - base.warmup, "rejected": final.refused - base.refused,
            "processed": final.processed - base.processed,
            "rate": expected / window if window > 0 else math.nan, "window": window,
            "applied_rate": expected / applied_window if applied_window > 0 else math.nan,
            "max_depth": max_depth, **probe.summary(expected),
            "rejected_reasons": {k: v for k, v in runtime.engine.stats.refused.items() if k != "malformed_json"}}


class Tracker:
    """Polled by ``watch``: when paho first handed a message over, when the first sample was applied, queue peak."""

    def __init__(self, runtime: Runtime, base: Counts) -> None:
        self._runtime, self._base = runtime, base
        self.first_in: float | None = None
        self.first_applied: float | None = None
        self.max_depth = 0

    def progress(self) -> int:
        now = counts(self._runtime)
        stamp = time.perf_counter()
        if self.first_in is None and now.received > self._base.received:
            self.first_in = stamp
        if self.first_applied is None and now.processed > self._base.processed:
            self.first_applied = stamp
        self.max_depth = max(self.max_depth, self._runtime.engine.queue_depth)
        return now.processed - self._base.processed


def service_live(broker: Broker, store: Path, *, messages: int, batch: int,
                 profile: bool = False) -> dict[str, Any]:
    """Runtime on the private broker, fed ``messages`` payloads of ``batch`` samples while the publisher runs."""
    prefix = f"bench/svc-{uuid.uuid4().hex[:8]}"
    config = service_config(store / prefix.rpartition("/")[2], CHANNELS, port=broker.port, prefix=prefix)
    runtime = Runtime(config)
    profiles = ThreadProfiles(runtime) if profile else None
    runtime.start()
    try:
        await_subscription(runtime, broker.port, f"{prefix}/c{CHANNELS - 1}")
        base = counts(runtime)
        tracker = Tracker(runtime, base)
        probe = Probe(runtime, broker)
        with publisher(broker.port, prefix, messages=messages, batch=batch) as proc:
            done = watch(tracker.progress, messages * batch, running(proc))
            probe.stop()
            published = finish(proc)
        assert runtime.engine.drain(30.0), "engine did not drain"
        final = counts(runtime)
    finally:
        runtime.stop()
    result = ingest_result("live", messages=messages, batch=batch, published=published, base=base, final=final,
                           first_in=tracker.first_in, first_applied=tracker.first_applied, done=done,
                           probe=probe, max_depth=tracker.max_depth, runtime=runtime)
    result["profiles"] = profiles
    return result


def service_drain(broker: Broker, store: Path, *, messages: int) -> dict[str, Any]:
    """The service's persistent session holds a backlog of ``messages``; a new Runtime with its client id drains it."""
    prefix = f"bench/svcq-{uuid.uuid4().hex[:8]}"
    config = service_config(store / prefix.rpartition("/")[2], CHANNELS, port=broker.port, prefix=prefix)
    first = Runtime(config)
    first.start()
    try:
        await_subscription(first, broker.port, f"{prefix}/c{CHANNELS - 1}")    # session + subscriptions
    finally:
        first.stop()
    # The engine's counters come back from the checkpoint (the probe's refusal among them); ingest's do not.
    base = dataclasses.replace(counts(first), received=0)
    published = publish_all(broker.port, prefix, messages)
    runtime = Runtime(config)                     # same client id: resumes the session, gets the backlog
    runtime.start()
    try:
        tracker = Tracker(runtime, base)
        probe = Probe(runtime, broker)
        done = watch(tracker.progress, messages, nothing_more)
        probe.stop()
        assert runtime.engine.drain(30.0), "engine did not drain"
        final = counts(runtime)
    finally:
        runtime.stop()
    return ingest_result("backlog drain", messages=messages, batch=1, published=published, base=base, final=final,
                         first_in=tracker.first_in, first_applied=tracker.first_applied, done=done,
                         probe=probe, max_depth=tracker.max_depth, runtime=runtime)


def check_service(result: dict[str, Any]) -> None:
    """Nothing lost: every published message reached ingest, every sample applied or counted as refused."""
    check_publisher(result["published"], result["messages"])
    assert result["received"] >= result["messages"], f"ingest received {result['received']} of {result['messages']}"
    assert result["processed"] == result["received"] * result["batch"], result
    assert result["applied"] + result["warmup"] == result["expected"], (
        f"{result['expected'] - result['applied'] - result['warmup']} samples not applied: "
        f"{result['rejected_reasons']}")


def ratio_goal(result: dict[str, Any], raw_rate: float) -> tuple[str, bool]:
    """The goal of one sample per message, and whether ``result`` met it: ``GOAL_RATIO`` of the raw rate."""
    return f">= {GOAL_RATIO:.0%} of raw", result["rate"] / raw_rate >= GOAL_RATIO


def report_ingest(result: dict[str, Any], raw_figures: dict[str, Any], raw: RawFigures, *, goal: str, met: bool,
                  broker: Broker, usage: MachineUsage, store: Path) -> None:
    """The tables of one ingest scenario: its rate beside the raw paho rate (``raw_figures``, measured the same
    way) and the goal, then where the time goes."""
    header(f"service ingest (Runtime: MQTT ingest + engine), {result['batch']} per message, {result['how']}, "
           f"{CHANNELS:,} channels, QoS 1", broker.description, usage)
    print(engine_line(service_config(store / "shown", CHANNELS, port=broker.port, prefix="shown")))
    print("   samples/s = samples / (first message handed over by paho -> last sample applied), engine counters polled "
          f"every {POLL * 1e3:.0f} ms; ratio = that over the raw paho QoS 1 msg/s measured the same way (live beside "
          "live, drain beside drain)")
    print(raw.line())
    ratio = result["rate"] / raw_figures["rate"]
    print_table(["samples", "expected", "msgs received", "applied", "rejected", "samples/s", "raw paho msg/s",
                 "ratio", "goal", ""],
                [[f"{result['batch']} per msg, {result['how']}", f"{result['expected']:,}",
                  f"{result['received']:,}", f"{result['applied']:,}", f"{result['rejected']:,}",
                  fmt(result["rate"]), fmt(raw_figures["rate"]), f"{ratio:.2f}", goal, "met" if met else "MISSED"]])
    print("   where the time goes: thread CPU from /proc schedstat over the run; engine busy = wall time inside "
          "Engine._process / window (includes waiting for the GIL); service CPU = all threads of this process / wall")
    print_table(["samples", "window ms", "first->last applied /s", "max queue", "batches", "samples/batch",
                 "engine busy", "paho us/msg", "raw paho us/msg", "engine us/sample", "service CPU", "broker CPU s"],
                [[f"{result['batch']} per msg, {result['how']}", ms(result["window"]),
                  fmt(result["applied_rate"]), f"{result['max_depth']:,}", f"{result['batches']:,}",
                  fmt(result["per_batch"], 1), f"{result['busy']:.0%}", fmt(result["paho_us"], 1),
                  fmt(raw_figures["paho_us"], 1), fmt(result["engine_us"], 1),
                  f"{result['process_share']:.0%}", fmt(result["broker_cpu"], 2)]])


def profile_one_sample_live(broker: Broker, store: Path, unprofiled: dict[str, Any]) -> None:
    """A goal of one sample per message missed: a shorter live run under cProfile, what took the time printed."""
    profiled = service_live(broker, store, messages=PROFILE_MESSAGES, batch=1, profile=True)
    header(f"profile (goal missed: one sample per message): {PROFILE_MESSAGES:,} messages live, cProfile on the "
           "engine and paho threads", broker.description)
    print(f"   under cProfile: {fmt(profiled['rate'])} samples/s (unprofiled above, {unprofiled['how']}: "
          f"{fmt(unprofiled['rate'])})")
    print_profile("engine thread (Engine._run)", profiled["profiles"].engine, profiled["expected"])
    print_profile("paho thread (MqttIngest._loop)", profiled["profiles"].ingest, profiled["expected"])
    check_service(profiled)
