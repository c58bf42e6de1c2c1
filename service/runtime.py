"""One running rwls process: the engine, MQTT ingest and the lock that makes it the only ingest owner.

Several API worker processes would each subscribe and apply every sample, so
the process takes an exclusive lock on ``<store.path>/ingest.lock``: a second
process on the same data directory stops with a clear message instead.
"""

from __future__ import annotations

import fcntl
import gc
import logging
import os
import signal
import sys
import threading
import time
from collections import Counter
from collections.abc import Callable, Iterable, Sequence
from pathlib import Path
from typing import IO, Any

import numpy as np
from paho.mqtt.client import topic_matches_sub

from service.alarms.lifecycle import AlarmBook
from service.alarms.notify import EventHub, MqttAlarms, WebhookSender
from service.broker_link.child_process import ProcessIngest
from service.broker_link.messages import DeadLetter, Message, RefusalReason
from service.broker_link.mqtt_client import BrokerSettings, MqttIngest
from service.broker_link.payload import DecodedSample, Refusal
from service.config.settings import ConfigError, RwlsConfig
from service.engine.host_faults import FaultPart, HostFaults
from service.engine.intake import Intake
from service.engine.log_throttle import LogThrottle
from service.engine.operations import Inspect
from service.engine.publisher import PublishHook
from service.engine.writer import Engine
from service.fleet.peers import Fleet, own_share
from service.storage.input_log import InputLog
from service.storage.persistence import Persistence
from service.storage.store import Store, store_url
from service.tags.tag_path import TagPath, tag_path_of

__all__ = ["AlreadyRunning", "Runtime", "broker_settings", "exit_on_signal"]

log = logging.getLogger(__name__)

SERVING_SWITCH_INTERVAL = 0.0005      # seconds; the interpreter's default is 0.005


def tune_for_serving() -> None:
    """The interpreter as ``rwls serve`` runs it (the benchmarks too, so that they measure the same thing).

    The engine, the ingest reader and the HTTP handlers share one interpreter: a shorter switch interval
    hands the GIL on sooner, so a thread that has work waits less behind one that is busy (the engine
    behind a snapshot being serialised, the reader behind a micro-batch)."""
    sys.setswitchinterval(SERVING_SWITCH_INTERVAL)



def exit_on_signal() -> None:
    """Make SIGTERM raise SystemExit in the main thread.

    uvicorn shuts down gracefully on SIGTERM and then re-raises the signal with
    the handler it found; with the default handler the process would die there,
    before ``Runtime.stop`` (and with it the ingest child process) could run.
    """
    def handler(signum: int, frame: object) -> None:
        raise SystemExit(128 + signum)

    signal.signal(signal.SIGTERM, handler)


class AlreadyRunning(RuntimeError):
    """Another process owns ingest for this data directory."""


def _subscriptions(config: RwlsConfig, tags: TagPath | None) -> dict[str, str | None]:
    """Topic filter -> channel id of whole samples, or None for the tags' topics and patterns.

    A topic both a channel's and a tag's would reach the service twice (once per matching
    subscription): refused, as is the dead-letter topic as a tag's.
    """
    topics: dict[str, str | None] = dict(config.require_topics())
    if tags is None:
        return topics
    problems = []
    for subscription in tags.subscriptions():
        for topic in (*topics, config.broker.dead_letter_topic):
            if topic_matches_sub(subscription, topic):
                owner = topics.get(topic)
                what = f"channel {owner}'s topic" if owner else "broker.dead_letter_topic"
                problems.append(f"tags: topic {subscription!r} takes {what} {topic!r} as a tag")
    if problems:
        raise ConfigError(problems)
    topics.update(dict.fromkeys(tags.subscriptions()))
    return topics


def broker_settings(config: RwlsConfig, *, manual_ack: bool = False) -> BrokerSettings:
    """The ``[broker]`` table as connection settings."""
    broker = config.broker
    return BrokerSettings(
        host=broker.host, port=broker.port, client_id=broker.client_id, tls=broker.tls,
        username=broker.username or None, password=broker.password.get_secret_value() or None,
        ca_file=broker.ca_file or None, cert_file=broker.cert_file or None, key_file=broker.key_file or None,
        qos=broker.qos, keepalive=broker.keepalive, dead_letter_topic=broker.dead_letter_topic,
        reconnect_min_delay=broker.reconnect_min_delay, reconnect_max_delay=broker.reconnect_max_delay,
        protocol=broker.protocol, manual_ack=manual_ack)


class Runtime:
    """Engine plus (optionally) MQTT ingest for a validated configuration.

    Parameters
    ----------
    config : the whole configuration
    mqtt : subscribe to the channel topics and tag topics (needs every channel to have a topic or tags)

    Raises
    ------
    ConfigError
        The configuration cannot serve: a channel without topic or tags, unusable tags (their problems).
    """

    def __init__(self, config: RwlsConfig, *, mqtt: bool = True) -> None:
        # A replica of a fleet runs the channels it owns (service/fleet/peers.py); the others it only knows of.
        every_channel = list(config.channels)
        config, self.shard = own_share(config)
        self.fleet = (Fleet(self.shard, config.fleet.replicas, every_channel, reads=config.fleet.reads,
                            timeout=config.fleet.peer_timeout, ca_file=config.fleet.ca_file,
                            cert_file=config.fleet.cert_file, key_file=config.fleet.key_file)
                      if self.shard is not None and config.fleet.replicas else None)
        self.config = config
        self.tag_path = tag_path_of(config)
        self.topics = _subscriptions(config, self.tag_path) if mqtt else {}   # topic filter -> channel (None: tags)
        self.ingest: MqttIngest | ProcessIngest | None = None
        self.alarms = AlarmBook(config.alarm_priorities(), journal_limit=config.alarms.journal_limit)
        # Where alarm transitions go (each listener runs on the engine thread and never blocks). Webhooks and
        # the event stream listen before the engine exists, so its very first transitions (design suppression)
        # go out too; MQTT from when the engine is built (see _build_engine).
        self.events = EventHub()
        self.webhooks = WebhookSender([(h.url, h.timeout, h.retries) for h in config.alarms.webhooks])
        self.alarm_topics = MqttAlarms(config.alarms.topic, self._publish, self._publish_from) if mqtt else None
        if config.alarms.webhooks:
            self.alarms.listen(self.webhooks)
        self.alarms.listen(self.events, wants=self.events.listening)
        # Producers may queue work before start(); the engine, built complete in start() (under the lock,
        # once the store is open), takes it from there.
        self.intake = Intake(maxsize=config.engine.queue_size)
        self.faults = HostFaults()      # a full disk, a lost store: held, retried, in /ready and /metrics
        self.channels = config.channel_settings()            # the channels this replica runs: id -> settings
        self._engine: Engine | None = None
        settings = broker_settings(config, manual_ack=config.store.durable)
        if not mqtt:
            self.ingest = None
        elif config.broker.ingest == "process":
            self.ingest = ProcessIngest(settings, self.topics, self._from_mqtt, submit_all=self._all_from_mqtt,
                                        tag_decoders=None if self.tag_path is None else self.tag_path.registry)
        else:
            self.ingest = MqttIngest(settings, self.topics, self._from_mqtt)
        self.persistence: Persistence | None = None       # opened in start(), under the lock
        self.recovery: dict[str, object] | None = None
        self.started_at = time.time()
        self._lock: IO[str] | None = None
        # HTTP requests refused before they reach the queue (404, 413): counted here,
        # under a lock, since handlers run on several threads.
        self._http_refusals: Counter[str] = Counter()
        self._http_refusals_lock = threading.Lock()
        self._refusal_log = LogThrottle(log)            # a flood of bad input is counted, not logged line by line

    @property
    def engine(self) -> Engine:
        """The single writer; it exists once :meth:`start` has run."""
        if self._engine is None:
            raise RuntimeError("the service has not started: Runtime.start() builds the engine")
        return self._engine

    @property
    def started(self) -> bool:
        """:meth:`start` has built the engine."""
        return self._engine is not None

    def engine_alive(self) -> bool:
        """The engine exists and its thread runs."""
        return self._engine is not None and self._engine.alive()

    # ------------------------------------------------------------- lifecycle
    def start(self) -> None:
        """Lock the data directory, open the store, build the engine and recover its state, then ingest."""
        self._take_lock()
        if self.config.store.durable:
            self._open_persistence()
        else:
            self._engine = self._build_engine()
        # Everything built so far (modules, configuration, the bank) lives as long as the process:
        # out of the collector's way, a full collection no longer walks it and stalls the engine
        # (measured: 150 ms pauses at 5,000 samples/s, the whole latency tail).
        # numpy imports parts of itself on first use (40 ms in the first vectorised update, measured):
        # pay that now, not in the first micro-batch.
        np.unique(np.arange(2))
        gc.freeze()
        self.webhooks.start()
        self.engine.start()
        if self.ingest is not None:
            self.ingest.start()
            if self.alarm_topics is not None:
                alarm_topics = self.alarm_topics
                # Every alarm's retained state, so the tree is complete from the start (engine thread).
                self.engine.execute(Inspect(lambda engine: alarm_topics.publish_all(self.alarms.alarms())))

    def _open_persistence(self) -> None:
        store_config = self.config.store
        store = Store(store_url(store_config.url or store_config.path), schema=store_config.schema_name)
        input_log = InputLog(Path(store_config.path) / "inputs")
        persistence = Persistence(store, input_log, checkpoint_seconds=store_config.checkpoint_seconds,
                                  history_step=store_config.history_step,
                                  history_retention=store_config.history_retention_days * 86400.0,
                                  faults=self.faults)
        if self.alarms is not None:
            persistence.hold_journal(self.alarms.journal)
        self._engine = self._build_engine(input_log, periodic=[persistence.periodic],
                                          publish_hooks=[persistence.note], publish_when=persistence.row_due)
        self.recovery = persistence.recover(self._engine)
        log.info("recovered: checkpoint %s at input %s, %s inputs reapplied, channels afresh: %s",
                 self.recovery["checkpoint"], self.recovery["position"], self.recovery["reapplied"],
                 self.recovery["fresh_channels"] or "none")
        self.persistence = persistence

    def _build_engine(self, input_log: InputLog | None = None, *,
                      periodic: Sequence[Callable[[Engine], None]] = (),
                      publish_hooks: Sequence[PublishHook] = (),
                      publish_when: Callable[[str, float], bool] | None = None) -> Engine:
        config = self.config
        engine = Engine(
            self.channels,
            queue_size=config.engine.queue_size, max_batch=config.engine.max_batch,
            max_wait=config.engine.max_wait_ms / 1000.0, max_payload_bytes=config.broker.max_payload_bytes,
            snapshot_interval=config.engine.snapshot_interval_ms / 1000.0, dead_letter=self._dead_letter,
            stale_after=config.alarms.stale_after, alarms=self.alarms, prepare=config.apply_baselines,
            input_log=input_log, acknowledge=self._acknowledge, intake=self.intake, periodic=periodic,
            publish_hooks=publish_hooks, publish_when=publish_when, tags=self.tag_path, faults=self.faults)
        if self.alarm_topics is not None:
            # The design suppression of a fresh start (4 alarms of each channel without a baseline: 400,000
            # at 100,000 channels) reaches the broker as the retained states start() publishes, not as an
            # event each; every transition from here on is an event too.
            self.alarms.listen(self.alarm_topics)
        return engine

    def stop(self) -> None:
        """Stop ingest first (nothing new arrives), let the engine apply what is queued, checkpoint."""
        self.events.close()
        if self.ingest is not None:
            self.ingest.stop()
        if self._engine is not None:
            self._engine.stop()
        self.webhooks.stop()
        if self.fleet is not None:
            self.fleet.close()
        if self.persistence is not None:
            try:
                self.persistence.checkpoint(self.engine)        # a quick restart
            except Exception:
                log.exception("final checkpoint failed; the input log still holds everything")
            self.persistence.log.close()
            self.persistence.store.close()
            self.persistence = None
        self._release_lock()

    def _acknowledge(self, acks: list[tuple[int, int]]) -> None:
        if self.ingest is not None:
            self.ingest.ack(acks)

    def journal(self, after: int, limit: int, channel: str | None) -> list[dict[str, object]]:
        """Alarm journal entries with seq > after (the store's and those since the last checkpoint)."""
        if self.persistence is not None:
            return self.persistence.journal(self.engine, after, limit, channel)
        return [e.to_dict() for e in self.alarms.entries(after, limit, channel)]

    def history(self, channel: str, since: float | None, until: float | None, limit: int) -> list[dict[str, object]]:
        """A channel's downsampled history (``store.history_step``); empty when the service keeps no store."""
        if self.persistence is None:
            return []
        return self.persistence.history(channel, since, until, limit)

    def _take_lock(self) -> None:
        directory = Path(self.config.store.path)
        directory.mkdir(parents=True, exist_ok=True)
        handle = (directory / "ingest.lock").open("a+")
        try:
            fcntl.flock(handle, fcntl.LOCK_EX | fcntl.LOCK_NB)
        except BlockingIOError:
            handle.close()
            raise AlreadyRunning(
                f"another rwls process owns ingest for {directory}: run the API as one process "
                f"(one uvicorn worker); several would each apply every sample") from None
        handle.seek(0)
        handle.truncate()
        handle.write(f"{os.getpid()}\n")
        handle.flush()
        self._lock = handle

    def _release_lock(self) -> None:
        if self._lock is not None:
            fcntl.flock(self._lock, fcntl.LOCK_UN)
            self._lock.close()
            self._lock = None

    # ------------------------------------------------------------- handovers
    def _from_mqtt(self, message: Message) -> bool:
        # Blocks while the engine queue is full: back-pressure onto the broker.
        return self.intake.offer(message, timeout=None)

    def _all_from_mqtt(self, messages: list[Message]) -> int:
        # One hand-over of a whole list from the ingest process; blocks while the engine queue is full.
        return self.intake.offer_all(messages, timeout=None)

    def submit_http(self, channel: str | None, payload: bytes,
                    decoded: tuple[list[DecodedSample], list[Refusal]] | None = None) -> bool:
        """Queue an HTTP-posted payload (and its decoding, if done) without waiting; False when full."""
        return self.intake.offer(Message(channel, payload, "http", decoded=decoded), timeout=0.0)

    def ingest_held(self) -> str | None:
        """Why ingest is held (the input log cannot be written), or None: HTTP ingest answers 503 meanwhile."""
        fault = self.faults.fault(FaultPart.INPUT_LOG)
        return None if fault is None else f"the input log cannot be written ({fault.reason})"

    def refuse_http(self, reason: RefusalReason) -> None:
        """Count an HTTP request refused before the engine saw it."""
        with self._http_refusals_lock:
            self._http_refusals[reason] += 1

    def refusals(self) -> dict[str, int]:
        """Refusals by reason: the engine's and the HTTP handlers' together."""
        with self._http_refusals_lock:
            total = Counter(self._http_refusals)
        if self._engine is not None:
            total.update(self._engine.stats.refused)
        return dict(total)

    def _publish(self, topic: str, payload: bytes, retain: bool) -> None:
        # Before the ingest exists (the engine's first snapshot) nothing goes out: start() publishes
        # every alarm's retained state once the client runs.
        if self.ingest is not None:
            self.ingest.publish(topic, payload, retain=retain)

    def _publish_from(self, producer: Callable[..., Iterable[tuple[str, bytes, bool]]], args: tuple[Any, ...]) -> None:
        if self.ingest is not None:
            self.ingest.publish_from(producer, args)

    def _dead_letter(self, letter: DeadLetter) -> None:
        self._refusal_log.log(f"refusals ({letter.reason})", "sample refused reason=%s channel=%s source=%s",
                              letter.reason, letter.channel, letter.source)
        if self.ingest is not None:
            self.ingest.publish_dead_letter(letter)

    # ----------------------------------------------------------------- status
    def readiness(self) -> dict[str, object]:
        """What ``/ready`` reports; ``ready`` is True when every part is up."""
        engine = self._engine
        engine_alive = self.engine_alive()
        depth = self.intake.qsize()
        broker = None if self.ingest is None else {
            "connected": self.ingest.connected, "subscribed": self.ingest.subscribed,
            "thread_alive": self.ingest.alive(), "protocol": self.ingest.protocol,
            "reconnects": self.ingest.reconnects}
        broker_ok = self.ingest is None or (self.ingest.subscribed and self.ingest.alive())
        persistence = self.persistence
        checkpoint_age = (None if persistence is None or persistence.last_checkpoint_at is None
                          else max(0.0, time.time() - persistence.last_checkpoint_at))
        faults = self.faults.active()
        return {"ready": bool(engine_alive and broker_ok and depth < self.config.engine.queue_size and not faults),
                "faults": [fault.to_dict() for fault in faults],
                "engine_alive": engine_alive, "queue_depth": depth,
                "queue_capacity": self.config.engine.queue_size, "broker": broker,
                "snapshot_age_seconds": (None if engine is None
                                         else max(0.0, time.time() - engine.snapshot.created_at)),
                "checkpoint_age_seconds": checkpoint_age,
                "input_log_position": 0 if engine is None else engine.position}
