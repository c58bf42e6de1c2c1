"""The service under MQTT load: a ``Runtime`` (MQTT ingest + engine) with ``CHANNELS`` channels ``["1", "u"]`` on
the benchmarks' broker, fed live or from a backlog its persistent session holds, with its counters, thread CPU
and queue watched; and the tables of one ingest scenario.

Each channel takes whole samples on a topic of its own, or (``tags=True``) is assembled from plant tags: its
output ``c<k>.y`` and its input ``u`` = ``c<k>.u``, named by ONE pattern tag entry on ``<prefix>/t/+/+``
(JSON ``{"v", "ts" (ms), "q"}``, quality 0 good), two tag messages per sample.

samples/s = samples / (first message handed over by paho -> last sample applied), tag messages/s the same with
tag messages; its ratio is to the raw paho rate measured the same way (live beside live, drain beside drain,
tag shape beside tag shape). Counts are asserted (nothing lost at QoS 1, every sample applied or counted as
rejected); times never are.
"""

from __future__ import annotations

import dataclasses
import math
import time
import uuid
from dataclasses import dataclass
from pathlib import Path
from typing import Any

from service.broker_link.payload import PayloadRefusal
from service.broker_link.tag_refusal import TagRefusal
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
    tag_filter,
    watch,
)
from tests.benchmarks._profiles import ThreadProfiles, print_thread_profiles
from tests.benchmarks._raw_paho import RawFigures
from tests.support.addresses import unique_client_id
from tests.support.configs import mqtt_settings, offline_config
from tests.support.mqtt_clients import publish_and_wait

__all__ = ["GOAL_RATIO", "SERVICE_MESSAGES", "TAG_PROFILE_ROWS", "Counts", "Probe", "await_subscription",
           "bench_service", "check_service", "counts", "engine_line", "profile_live", "ratio_goal", "report_ingest",
           "service_config", "service_drain", "service_live"]

SERVICE_MESSAGES = 50_000             # one sample each, in a live run or a drained backlog
GOAL_RATIO = 0.80                     # of the raw paho rate, one sample per message
PROFILE_MESSAGES = 20_000             # single-sample messages (or tag messages) in a profiled run
TAG_PROFILE_ROWS = 28                 # functions listed per profile of a tag run (where the time per message goes)
# The tag messages' payload, as a plant gateway's: value, time stamp in ms, quality (0 is good).
TAG_FORMAT = {"kind": "json", "value": "/v", "time": "/ts", "time_unit": "ms", "quality": "/q", "good": [0]}


def bench_service(broker: Broker, store: Path, kind: str, *, tags: bool = False) -> tuple[str, RwlsConfig]:
    """A topic prefix of one run (``bench/<kind>-<uuid>``) and the service's configuration on it (store in a
    folder of its own below ``store``)."""
    prefix = f"bench/{kind}-{uuid.uuid4().hex[:8]}"
    return prefix, service_config(store / prefix.rpartition("/")[2], CHANNELS, port=broker.port, prefix=prefix,
                                  tags=tags)


def service_config(store: Path, channels: int, *, port: int | None = None, prefix: str = "",
                   tags: bool = False) -> RwlsConfig:
    """``channels`` channels ``c<k>`` with terms ``["1", "u"]``; on the broker at ``port`` when given, each on
    topic ``<prefix>/c<k>``, or with ``tags`` assembled from the tags ``c<k>.y`` (output) and ``c<k>.u``."""
    # A baseline in force from the start (the publisher's y = 2 + 0.5 u): the detectors judge every sample.
    baseline = {"parameters": {"1": 2.0, "u": 0.5}, "noise_sigma": 0.06}
    table: dict[str, Any] = {f"c{k}": {"terms": ["1", "u"], "baseline": baseline} for k in range(channels)}
    if port is None:
        return offline_config(table, store)
    settings = mqtt_settings({} if tags else table, prefix=prefix, port=port, client_id=unique_client_id("rwls"),
                             store=store, broker={"dead_letter_topic": f"{prefix}/dead-letter"})
    if tags:
        level = prefix.count("/") + 2          # <prefix>/t/c<k>/u: levels `level` and `level + 1` name the tag
        settings["tags"] = {"formats": {"gateway": TAG_FORMAT},
                            "tag": [{"topic": tag_filter(prefix), "id": f"{{{level}}}.{{{level + 1}}}",
                                     "format": "gateway"}]}
        settings["channels"] = {cid: {**channel, "tags": {"output": f"{cid}.y", "inputs": {"u": f"{cid}.u"}}}
                                for cid, channel in table.items()}
    return parse_config(settings)


def engine_line(config: RwlsConfig) -> str:
    engine = config.engine
    fed = (f"assembled from tags (output c<k>.y, input u = c<k>.u, mode latest; one pattern entry "
           f"{config.tags.tag[0].topic} -> id {config.tags.tag[0].id}, JSON v / ts ms / q)"
           if config.channel_tags() else "each on a topic of its own")
    return (f"   service: engine queue_size {engine.queue_size:,}, max_batch {engine.max_batch:,}, max_wait_ms "
            f"{engine.max_wait_ms}; {len(config.channels):,} channels, terms ['1', 'u'], baselines from the start, "
            f"{fed}; QoS {config.broker.qos}, "
            f"MQTT protocol {config.broker.protocol} (auto picks 5 on Mosquitto 2)")


@dataclass(frozen=True)
class Counts:
    received: int
    messages: int
    applied: int
    warmup: int
    refused: int
    not_formed: int               # samples tag assembly could not form (tag shape)
    batches: int
    batch_seconds: float

    @property
    def processed(self) -> int:
        """Samples (or messages refused) the engine is done with."""
        return self.applied + self.warmup + self.refused + self.not_formed


def counts(runtime: Runtime) -> Counts:
    stats = runtime.engine.stats
    not_formed = sum(n for reasons in list(stats.not_formed.values()) for n in list(reasons.values()))
    return Counts(runtime.ingest.received if runtime.ingest is not None else 0, stats.messages,
                  stats.samples_applied, stats.samples_warmup, sum(dict(stats.refused).values()), not_formed,
                  stats.batches, stats.batch_seconds_total)


def _probe(prefix: str, tags: bool) -> tuple[str, str]:
    """A topic the service takes, and the reason it refuses the payload ``probe`` there with."""
    if tags:
        return f"{prefix}/t/c{CHANNELS - 1}/y", TagRefusal.BAD_JSON
    return f"{prefix}/c{CHANNELS - 1}", PayloadRefusal.MALFORMED_JSON


def await_subscription(runtime: Runtime, port: int, prefix: str, *, tags: bool = False,
                       timeout: float = 20.0) -> None:
    """Until the service's subscription is in place: a malformed probe to one of its topics under ``prefix``
    shows up as refused."""
    assert runtime.ingest is not None and runtime.ingest.wait_subscribed(timeout), "service did not subscribe"
    topic, reason = _probe(prefix, tags)
    deadline = time.monotonic() + timeout
    while time.monotonic() < deadline:
        publish_and_wait(port, [(topic, b"probe")], qos=1, timeout=5.0)
        until = time.monotonic() + 0.5
        while time.monotonic() < until:
            if runtime.engine.stats.refused.get(reason, 0) > 0:
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

    def summary(self, samples: int, messages: int) -> dict[str, Any]:
        """Thread CPU per message (paho / reader), engine CPU per sample and per message, batches, shares."""
        c0, c1 = self.start["counts"], self.end["counts"]
        wall = self.delta("wall")
        batches = c1.batches - c0.batches
        return {"paho_us": per(self.delta("paho"), c1.received - c0.received) * 1e6,
                "engine_us": per(self.delta("engine"), samples) * 1e6,
                "engine_us_message": per(self.delta("engine"), messages) * 1e6,
                "process_share": self.delta("process") / wall if wall > 0 else math.nan,
                "broker_cpu": self.delta("broker"), "batches": batches,
                "per_batch": per(c1.processed - c0.processed, batches),
                "busy": (c1.batch_seconds - c0.batch_seconds) / wall if wall > 0 else math.nan}


def ingest_result(how: str, *, messages: int, batch: int, tags: bool, published: dict[str, Any], base: Counts,
                  final: Counts, first_in: float | None, first_applied: float | None, done: float | None,
                  probe: Probe, max_depth: int, runtime: Runtime) -> dict[str, Any]:
    expected = messages // 2 if tags else messages * batch
    window = (done - first_in) if first_in is not None and done is not None else math.nan
    applied_window = (done - first_applied) if first_applied is not None and done is not None else math.nan
    stats = runtime.engine.stats
    probe_reason = _probe("", tags)[1]
    return {"how": how, "batch": batch, "tags": tags, "messages": messages, "expected": expected,
            "published": published, "received": final.received - base.received,
            "applied": final.applied - base.applied, "warmup": final.warmup - base.warmup,
            "rejected": final.refused - base.refused, "not_formed": final.not_formed - base.not_formed,
            "processed": final.processed - base.processed,
            "rate": expected / window if window > 0 else math.nan, "window": window,
            "message_rate": messages / window if window > 0 else math.nan,
            "applied_rate": expected / applied_window if applied_window > 0 else math.nan,
            "max_depth": max_depth, **probe.summary(expected, messages),
            "rejected_reasons": {k: v for k, v in stats.refused.items() if k != probe_reason},
            "not_formed_reasons": {cid: dict(reasons) for cid, reasons in list(stats.not_formed.items())[:5]}}


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


def service_live(broker: Broker, store: Path, *, messages: int, batch: int = 1, tags: bool = False,
                 profile: bool = False) -> dict[str, Any]:
    """Runtime on the private broker, fed ``messages`` payloads of ``batch`` samples (``tags``: tag messages, two
    per sample) while the publisher runs."""
    prefix, config = bench_service(broker, store, "svctag" if tags else "svc", tags=tags)
    runtime = Runtime(config)
    profiles = ThreadProfiles(runtime) if profile else None
    runtime.start()
    try:
        await_subscription(runtime, broker.port, prefix, tags=tags)
        base = counts(runtime)
        tracker = Tracker(runtime, base)
        probe = Probe(runtime, broker)
        with publisher(broker.port, prefix, messages=messages, batch=batch, tags=tags) as proc:
            done = watch(tracker.progress, messages // 2 if tags else messages * batch, running(proc))
            probe.stop()
            published = finish(proc)
        assert runtime.engine.drain(30.0), "engine did not drain"
        final = counts(runtime)
    finally:
        runtime.stop()
    result = ingest_result("live", messages=messages, batch=batch, tags=tags, published=published, base=base,
                           final=final, first_in=tracker.first_in, first_applied=tracker.first_applied, done=done,
                           probe=probe, max_depth=tracker.max_depth, runtime=runtime)
    result["profiles"], result["config"] = profiles, config
    return result


def service_drain(broker: Broker, store: Path, *, messages: int) -> dict[str, Any]:
    """The service's persistent session holds a backlog of ``messages``; a new Runtime with its client id drains it."""
    prefix, config = bench_service(broker, store, "svcq")
    first = Runtime(config)
    first.start()
    try:
        await_subscription(first, broker.port, prefix)    # session + subscriptions
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
    return ingest_result("backlog drain", messages=messages, batch=1, tags=False, published=published, base=base,
                         final=final, first_in=tracker.first_in, first_applied=tracker.first_applied, done=done,
                         probe=probe, max_depth=tracker.max_depth, runtime=runtime)


def check_service(result: dict[str, Any]) -> None:
    """Nothing lost: every published message reached ingest, every sample applied or counted as refused (tag
    shape: every second message, the output's, formed a sample)."""
    check_publisher(result["published"], result["messages"])
    assert result["received"] >= result["messages"], f"ingest received {result['received']} of {result['messages']}"
    # samples per message (batch, or 1/2 for tags) times the messages received: integers on both sides
    assert result["processed"] * result["messages"] == result["received"] * result["expected"], result
    assert result["applied"] + result["warmup"] == result["expected"], (
        f"{result['expected'] - result['applied'] - result['warmup']} samples not applied: refused "
        f"{result['rejected_reasons']}, not formed {result['not_formed_reasons']}")


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


def profile_live(broker: Broker, store: Path, unprofiled: dict[str, Any], *, tags: bool = False) -> None:
    """A goal of one sample (or tag value) per message missed: a shorter live run under cProfile, what took the
    time printed per sample (per tag message)."""
    profiled = service_live(broker, store, messages=PROFILE_MESSAGES, tags=tags, profile=True)
    shape = "one tag value per message, two per sample" if tags else "one sample per message"
    header(f"profile (goal missed: {shape}): {PROFILE_MESSAGES:,} messages live, cProfile on the engine and ingest "
           "threads", broker.description)
    key, unit = ("message_rate", "tag message") if tags else ("rate", "sample")
    print(f"   under cProfile: {fmt(profiled[key])} {unit}s/s (unprofiled above, {unprofiled['how']}: "
          f"{fmt(unprofiled[key])})")
    print_thread_profiles(profiled["profiles"], PROFILE_MESSAGES, unit, top=TAG_PROFILE_ROWS if tags else 16)
    check_service(profiled)
