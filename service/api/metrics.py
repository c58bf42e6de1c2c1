"""``/metrics``: the engine's and the MQTT client's counters in the Prometheus text format, read at scrape time."""

from __future__ import annotations

from collections import Counter
from typing import Any

from prometheus_client import CollectorRegistry, generate_latest
from prometheus_client.core import CounterMetricFamily, GaugeMetricFamily
from prometheus_client.registry import Collector

from service.api.auth import Access
from service.api.connection_limits import ConnectionLimits, Slots
from service.engine.host_faults import FaultPart
from service.engine.quality import Quality
from service.engine.writer import EngineStats
from service.runtime import Runtime

__all__ = ["PROMETHEUS_TEXT", "ServiceMetrics"]

PROMETHEUS_TEXT = "text/plain; version=0.0.4; charset=utf-8"


class _EngineCollector(Collector):
    """Reads the engine's and ingest's counters at scrape time."""

    def __init__(self, runtime: Runtime) -> None:
        self._runtime = runtime

    def collect(self) -> Any:
        runtime, ingest = self._runtime, self._runtime.ingest
        engine = runtime.engine if runtime.started else None          # None while the service starts
        stats = engine.stats if engine is not None else EngineStats()
        yield CounterMetricFamily("rwls_messages", "Messages taken from the ingest queue", value=stats.messages)
        yield CounterMetricFamily("rwls_samples_applied", "Samples applied to an estimator",
                                  value=stats.samples_applied)
        yield CounterMetricFamily("rwls_samples_warmup", "Samples that only filled lag buffers",
                                  value=stats.samples_warmup)
        yield CounterMetricFamily("rwls_redelivered", "Broker redeliveries of messages already logged (not applied)",
                                  value=stats.redelivered)
        # Copies first: the engine thread adds channels and reasons while a scrape reads them.
        not_formed = CounterMetricFamily("rwls_samples_not_formed", "Output tag updates that formed no sample "
                                         "(the tag messages were fine)", labels=["channel", "reason"])
        for cid, counts in sorted(dict(stats.not_formed).items()):
            for reason, count in sorted(dict(counts).items()):
                not_formed.add_metric([cid, str(reason)], count)
        yield not_formed
        yield CounterMetricFamily("rwls_tag_updates_not_newer", "Tag updates stamped no later than the tag's "
                                  "newest kept one (not kept)", value=stats.tag_updates_not_newer)
        yield CounterMetricFamily("rwls_tag_updates_unused", "Good updates of tags no channel names",
                                  value=stats.tag_updates_unused)
        refusals = CounterMetricFamily("rwls_rejections", "Refused messages or samples", labels=["reason"])
        for reason, count in sorted(self._runtime.refusals().items()):
            refusals.add_metric([reason], count)
        yield refusals
        yield CounterMetricFamily("rwls_dead_letter_failures", "Dead letters the broker did not take",
                                  value=stats.dead_letter_failures)
        yield GaugeMetricFamily("rwls_queue_depth", "Messages waiting for the engine", value=runtime.intake.qsize())
        faults = runtime.faults
        active = {fault.part for fault in faults.active()}
        in_force = GaugeMetricFamily("rwls_host_fault", "1 while a part of the host fails (input_log: ingest held; "
                                     "store: checkpoints wait)", labels=["part"])
        begun = CounterMetricFamily("rwls_host_faults", "Host faults begun", labels=["part"])
        failures = CounterMetricFamily("rwls_host_fault_tries_failed", "Failed tries of a failing part (first "
                                       "included)", labels=["part"])
        for part in FaultPart:
            in_force.add_metric([str(part)], 1.0 if part in active else 0.0)
            begun.add_metric([str(part)], faults.started[part])
            failures.add_metric([str(part)], faults.failures[part])
        yield in_force
        yield begun
        yield failures
        yield CounterMetricFamily("rwls_batches", "Micro-batches applied", value=stats.batches)
        yield CounterMetricFamily("rwls_batch_seconds", "Time spent applying micro-batches",
                                  value=stats.batch_seconds_total)
        yield GaugeMetricFamily("rwls_last_batch_seconds", "Duration of the latest micro-batch",
                                value=stats.last_batch_seconds)
        quality = GaugeMetricFamily("rwls_channels", "Channels by quality", labels=["quality"])
        counts = dict.fromkeys(Quality, 0)
        for chunk in engine.snapshot.channels.chunks if engine is not None else ():
            for entry in chunk.values():
                counts[entry.quality] += 1
        for name, count in counts.items():
            quality.add_metric([name], count)
        yield quality
        if ingest is not None:
            yield GaugeMetricFamily("rwls_broker_connected", "1 while connected to the broker",
                                    value=1 if ingest.connected else 0)
            yield CounterMetricFamily("rwls_broker_reconnects", "Reconnections to the broker",
                                      value=ingest.reconnects)
            yield CounterMetricFamily("rwls_mqtt_callback_errors", "Exceptions caught in MQTT callbacks",
                                      value=ingest.callback_errors)
            yield CounterMetricFamily("rwls_publish_failures", "Publishes (dead letters, alarms) the MQTT client "
                                      "refused after waiting out a full queue", value=ingest.publish_failures)


class _GuardCollector(Collector):
    """The HTTP face's guards: failed and throttled authentications, expired tokens, connections and event
    streams held and refused, request heads too slow, and the limits in force."""

    def __init__(self, access: Access, limits: ConnectionLimits | None, streams: Slots | None,
                 bodies: Counter[str] | None, max_body_bytes: int) -> None:
        self._max_body_bytes = max_body_bytes
        self._access = access
        self._limits = limits
        self._streams = streams
        self._bodies = bodies

    def collect(self) -> Any:
        yield from self._slots()
        access, throttle = self._access, self._access.throttle
        yield CounterMetricFamily("rwls_auth_expired_tokens", "Requests with a token past its end (401)",
                                  value=access.expired_total)
        yield GaugeMetricFamily("rwls_auth_tokens_expiring", "Tokens that end within auth.expiry_warning_days "
                                "or have ended", value=len(access.expiring()))
        if throttle is not None:
            yield CounterMetricFamily("rwls_auth_failures", "Requests with a token that is not one of ours (401)",
                                      value=throttle.failed_total)
            yield CounterMetricFamily("rwls_auth_throttled", "Authentications refused with 429 from a blocked "
                                      "client address", value=throttle.throttled_total)
            yield CounterMetricFamily("rwls_auth_blocks", "Client addresses blocked after too many failures "
                                      "(each block counted)", value=throttle.blocks_total)
            yield GaugeMetricFamily("rwls_auth_blocked_addresses", "Client addresses blocked now",
                                    value=throttle.blocked())

    def _slots(self) -> Any:
        limit = GaugeMetricFamily("rwls_http_limit", "The limits in force ([http] settings of the same name)",
                                  labels=["name"])
        refused = CounterMetricFamily("rwls_http_refused", "Connections and event streams refused with 503 over "
                                      "a cap", labels=["reason"])
        if self._limits is not None:
            connections = self._limits.connections
            yield GaugeMetricFamily("rwls_http_connections", "Open HTTP connections", value=connections.held)
            yield CounterMetricFamily("rwls_http_connections_accepted", "HTTP connections accepted within the caps",
                                      value=connections.admitted_total)
            yield CounterMetricFamily("rwls_http_header_timeouts", "Connections closed for not sending a request "
                                      "head within http.header_timeout", value=self._limits.header_timeouts)
            limit.add_metric(["max_connections"], connections.limit)
            limit.add_metric(["max_connections_per_address"], connections.per_address)
            limit.add_metric(["header_timeout"], self._limits.header_timeout)
            for reason in ("connections", "connections_per_address"):
                refused.add_metric([reason], connections.refusals().get(reason, 0))
        if self._streams is not None:
            yield GaugeMetricFamily("rwls_event_streams", "Open /api/v1/events streams", value=self._streams.held)
            limit.add_metric(["max_event_streams"], self._streams.limit)
            limit.add_metric(["max_event_streams_per_address"], self._streams.per_address)
            for reason in ("event_streams", "event_streams_per_address"):
                refused.add_metric([reason], self._streams.refusals().get(reason, 0))
        if self._bodies is not None:
            refused.add_metric(["body_too_large"], self._bodies["body_too_large"])
        limit.add_metric(["max_body_bytes"], self._max_body_bytes)
        throttle = self._access.throttle
        if throttle is not None:
            limit.add_metric(["auth_failures"], throttle.failures)
            limit.add_metric(["auth_window"], throttle.window)
            limit.add_metric(["auth_block_seconds"], throttle.block)
            limit.add_metric(["auth_block_max_seconds"], throttle.block_max)
        yield limit
        yield refused


class ServiceMetrics:
    """A registry of one runtime's counters (and its HTTP guards'); :meth:`text` is the scrape body."""

    def __init__(self, runtime: Runtime, access: Access | None = None, limits: ConnectionLimits | None = None,
                 streams: Slots | None = None, bodies: Counter[str] | None = None) -> None:
        self._registry = CollectorRegistry()
        self._registry.register(_EngineCollector(runtime))
        if access is not None:
            self._registry.register(_GuardCollector(access, limits, streams, bodies,
                                                    runtime.config.http.max_body_bytes))

    def text(self) -> bytes:
        return generate_latest(self._registry)
