"""Where alarm transitions go: MQTT (retained state and events), webhooks, the live event stream.

Each is an :class:`~service.alarms.lifecycle.AlarmBook` listener and runs on the engine
thread, so none may block: MQTT hands the message to the ingest's publisher,
webhooks put it on a bounded queue that their own thread drains (a full
queue drops and counts, a dead receiver costs retries on that thread only),
and the event stream hands it to the asyncio loop of the API.

MQTT topics, under ``alarms.topic`` (default ``rwls/alarms``):
``<topic>/state/<channel>/<kind>`` holds the alarm's current state, retained,
so a subscriber that connects later sees every alarm at once;
``<topic>/event/<channel>/<kind>`` carries each transition (not retained).
"""

from __future__ import annotations

import asyncio
import contextlib
import json
import logging
import queue
import threading
import urllib.error
import urllib.request
from collections.abc import Callable, Iterable, Iterator, Sequence
from dataclasses import dataclass, field
from typing import Any

import numpy as np

from service.alarms.alarm_table import AlarmRows, AlarmTable
from service.alarms.alarm_types import PRIORITIES, Alarm, JournalEntry
from service.config.alarm_settings import ALARM_KINDS

__all__ = ["EventHub", "MqttAlarms", "PublishFrom", "WebhookSender", "retained_states", "state_payloads",
           "transition_json"]

log = logging.getLogger(__name__)


def transition_json(entry: JournalEntry, alarm: Alarm) -> bytes:
    """One transition with the alarm's state after it, as JSON."""
    return json.dumps({"type": "alarm", "entry": entry.to_dict(), "alarm": alarm.to_dict()}).encode()


def state_payloads(rows: AlarmRows) -> Iterator[tuple[str, str, bytes]]:
    """``(channel, kind, JSON)`` of each alarm's state, the JSON as ``json.dumps(alarm.to_dict())`` makes it.

    Alarms whose rows hold the same flags and numbers differ only in their names, so the JSON after the names is
    made once per distinct row: 500,000 alarms of 100,000 channels at a start have a handful of them.
    """
    keys = np.concatenate([rows.flags, rows.numbers.view(np.int8)], axis=1)       # a row's bytes, as one key
    _, firsts, which = np.unique(keys, axis=0, return_index=True, return_inverse=True)
    tails = []
    for i in firsts.tolist():
        alarm = rows.alarm(i)
        tails.append(json.dumps(alarm.to_dict())[len(_head(alarm.channel, alarm.kind, alarm.priority)):])
    quoted, last = "", -1
    for c, kind, priority, tail in zip(rows.channel.tolist(), rows.kind.tolist(), rows.priority.tolist(),
                                       which.reshape(-1).tolist(), strict=True):
        if c != last:
            last, quoted = c, json.dumps(rows.channels[c])
        kind_name = ALARM_KINDS[kind]
        # JSON escapes character by character: the id "<channel>:<kind>" is the quoted channel, then the kind.
        head = (f'{{"id": {quoted[:-1]}:{kind_name}", "channel": {quoted}, "kind": "{kind_name}", '
                f'"priority": "{PRIORITIES[priority]}"')
        yield rows.channels[c], kind_name, (head + tails[tail]).encode()


def _head(channel: str, kind: str, priority: str) -> str:
    """The JSON of an alarm's state up to its priority (its names), as ``json.dumps`` writes it."""
    return json.dumps({"id": f"{channel}:{kind}", "channel": channel, "kind": kind, "priority": priority})[:-1]


def retained_states(root: str, rows: AlarmRows) -> Iterator[tuple[str, bytes, bool]]:
    """``(topic, JSON, retain)`` of each alarm's retained state under ``root``, in order."""
    for channel, kind, payload in state_payloads(rows):
        yield f"{root}/state/{channel}/{kind}", payload, True


# ``publish_from(producer, args)``: the messages ``producer(*args)`` yields are made, and published, where the MQTT
# client runs (``producer`` a module-level function: it travels by name).
PublishFrom = Callable[[Callable[..., Iterable[tuple[str, bytes, bool]]], tuple[Any, ...]], None]


class MqttAlarms:
    """Publishes each alarm's state (retained) and every transition through ``publish(topic, payload, retain)``.

    ``publish_from`` hands over every alarm's state at once as the alarms' compact table, the messages made
    (:func:`retained_states`) where the MQTT client runs: 500,000 states of 100,000 channels at a start are
    some 30 MB of table, not 250 MB of messages, and their JSON is not made on the engine thread. A part of the
    table (``BLOCK`` alarms) at a time, so the client's other work (acknowledgements) goes on between them.
    """

    def __init__(self, root: str, publish: Callable[[str, bytes, bool], None],
                 publish_from: PublishFrom | None = None) -> None:
        self._root = root.rstrip("/")
        self._publish = publish
        self._publish_from = publish_from
        self.failures = 0

    def __call__(self, entry: JournalEntry, alarm: Alarm) -> None:
        where = f"{alarm.channel}/{alarm.kind}"
        try:
            self._publish(f"{self._root}/state/{where}", json.dumps(alarm.to_dict()).encode(), True)
            self._publish(f"{self._root}/event/{where}", transition_json(entry, alarm), False)
        except RuntimeError:
            self.failures += 1
            log.exception("alarm not published alarm=%s", alarm.id)

    def publish_all(self, alarms: AlarmTable) -> None:
        """The retained state of every alarm (at start, so the tree is complete)."""
        for rows in alarms.parts():              # a part at a time: the client goes on with other work between
            try:
                if self._publish_from is not None:
                    self._publish_from(retained_states, (self._root, rows))
                    continue
                for topic, payload, retain in retained_states(self._root, rows):
                    self._publish(topic, payload, retain)
            except RuntimeError:
                self.failures += 1
                log.exception("alarm states not published (%d)", len(rows))


@dataclass
class _HookStats:
    delivered: int = 0
    failed: int = 0                    # gave up after every retry
    dropped: int = 0                   # queue full: the receiver is far behind
    attempts: int = 0


@dataclass
class WebhookSender:
    """JSON POST of every transition to each URL, retried with exponential backoff, on its own thread.

    ``backoff`` seconds double per retry up to ``max_backoff``; a stop ends waiting at once.
    """

    hooks: Sequence[tuple[str, float, int]]          # url, timeout seconds, retries
    queue_size: int = 10_000
    backoff: float = 0.5
    max_backoff: float = 30.0
    stats: dict[str, _HookStats] = field(default_factory=dict)

    def __post_init__(self) -> None:
        self._queues = {url: queue.Queue[bytes](self.queue_size) for url, _, _ in self.hooks}
        self.stats = {url: _HookStats() for url, _, _ in self.hooks}
        self._stop = threading.Event()
        self._threads = [threading.Thread(target=self._run, args=hook, name="rwls-webhook", daemon=True)
                         for hook in self.hooks]

    def start(self) -> None:
        for thread in self._threads:
            thread.start()

    def stop(self, timeout: float = 5.0) -> None:
        self._stop.set()
        for thread in self._threads:
            if thread.is_alive():
                thread.join(timeout)

    def __call__(self, entry: JournalEntry, alarm: Alarm) -> None:
        body = transition_json(entry, alarm)
        for url, q in self._queues.items():
            try:
                q.put_nowait(body)
            except queue.Full:
                self.stats[url].dropped += 1

    def _run(self, url: str, timeout: float, retries: int) -> None:
        q = self._queues[url]
        stats = self.stats[url]
        while not self._stop.is_set():
            try:
                body = q.get(timeout=0.2)
            except queue.Empty:
                continue
            delay = self.backoff
            for attempt in range(retries + 1):
                stats.attempts += 1
                if self._post(url, body, timeout):
                    stats.delivered += 1
                    break
                if attempt == retries or self._stop.wait(delay):
                    stats.failed += 1
                    log.warning("webhook gave up url=%s after %d attempts", url, attempt + 1)
                    break
                delay = min(self.max_backoff, delay * 2.0)

    @staticmethod
    def _post(url: str, body: bytes, timeout: float) -> bool:
        request = urllib.request.Request(url, data=body, method="POST",
                                         headers={"Content-Type": "application/json", "User-Agent": "rwls"})
        try:
            with urllib.request.urlopen(request, timeout=timeout) as response:
                return 200 <= response.status < 300
        except (urllib.error.URLError, OSError, ValueError):
            return False


class EventHub:
    """Fan-out of transitions to the live event streams (SSE) of the API, one bounded queue per client.

    A client that falls behind by ``per_client`` events loses the oldest and is told so
    (an event of type ``overflow``); a stream never makes the engine wait.
    """

    def __init__(self, per_client: int = 1000) -> None:
        self._per_client = per_client
        self._loop: asyncio.AbstractEventLoop | None = None
        self._clients: set[asyncio.Queue[bytes]] = set()
        self.closed = False

    def bind(self, loop: asyncio.AbstractEventLoop) -> None:
        self._loop = loop

    def subscribe(self) -> asyncio.Queue[bytes]:
        q: asyncio.Queue[bytes] = asyncio.Queue(self._per_client)
        self._clients.add(q)
        return q

    def unsubscribe(self, q: asyncio.Queue[bytes]) -> None:
        self._clients.discard(q)

    @property
    def clients(self) -> int:
        return len(self._clients)

    def listening(self) -> bool:
        """Whether a stream would hear a transition now (else the alarm book skips this listener)."""
        loop = self._loop
        return bool(self._clients) and loop is not None and not loop.is_closed()

    def __call__(self, entry: JournalEntry, alarm: Alarm) -> None:
        self.send(transition_json(entry, alarm))

    def send(self, body: bytes) -> None:
        loop = self._loop
        if loop is None or loop.is_closed() or not self._clients:
            return
        with contextlib.suppress(RuntimeError):             # the loop is shutting down
            loop.call_soon_threadsafe(self._deliver, body)

    def _deliver(self, body: bytes) -> None:
        for q in list(self._clients):
            if q.full():
                with contextlib.suppress(asyncio.QueueEmpty):
                    q.get_nowait()
                q.put_nowait(b'{"type": "overflow"}')
                continue
            q.put_nowait(body)

    def close(self) -> None:
        """Tell every stream to end (shutdown)."""
        self.closed = True
        self.send(b"")

