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
from collections.abc import Callable, Sequence
from dataclasses import dataclass, field

from service.alarms.lifecycle import Alarm, JournalEntry

__all__ = ["EventHub", "MqttAlarms", "WebhookSender", "transition_json"]

log = logging.getLogger(__name__)


def transition_json(entry: JournalEntry, alarm: Alarm) -> bytes:
    """One transition with the alarm's state after it, as JSON."""
    return json.dumps({"type": "alarm", "entry": entry.to_dict(), "alarm": alarm.to_dict()}).encode()


class MqttAlarms:
    """Publishes each alarm's state (retained) and every transition through ``publish(topic, payload, retain)``."""

    def __init__(self, root: str, publish: Callable[[str, bytes, bool], None]) -> None:
        self._root = root.rstrip("/")
        self._publish = publish
        self.failures = 0

    def __call__(self, entry: JournalEntry, alarm: Alarm) -> None:
        where = f"{alarm.channel}/{alarm.kind}"
        try:
            self._publish(f"{self._root}/state/{where}", json.dumps(alarm.to_dict()).encode(), True)
            self._publish(f"{self._root}/event/{where}", transition_json(entry, alarm), False)
        except RuntimeError:
            self.failures += 1
            log.exception("alarm not published alarm=%s", alarm.id)

    def publish_all(self, alarms: Sequence[Alarm]) -> None:
        """The retained state of every alarm (at start, so the tree is complete)."""
        for alarm in alarms:
            try:
                self._publish(f"{self._root}/state/{alarm.channel}/{alarm.kind}",
                              json.dumps(alarm.to_dict()).encode(), True)
            except RuntimeError:
                self.failures += 1


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

