"""MQTT ingest in a child process, so paho's per-message Python work does not share the engine's GIL.

The child runs an ordinary :class:`MqttIngest` whose hand-over collects
``(channel, payload, topic, received, ack, redelivered)`` into lists shipped over a bounded
inter-process queue (blocking when full: the same back-pressure onto the broker
as in-process; one pickle per list keeps the service's share of the work small).
A reader thread in the service process moves those into the engine queue.
Dead letters go the other way, to be published by the child's MQTT client.
Connection state is shared through a few ``multiprocessing.Value``s.

The child is started with the ``spawn`` method (a fork of a process with
running threads is unsafe) and stopped by its PID through a stop event, then
terminated if it does not exit in time.
"""

from __future__ import annotations

import contextlib
import logging
import multiprocessing as mp
import os
import queue
import threading
import time
from collections.abc import Callable, Iterable, Mapping
from typing import Any, Protocol

from service.broker_link.messages import DeadLetter, Message
from service.broker_link.mqtt_client import PUBLISH_WAIT, BrokerSettings, MqttIngest
from service.broker_link.payload import Refusal
from service.broker_link.tag_reading import TagReading

__all__ = ["ProcessIngest"]

log = logging.getLogger(__name__)

HANDOVER_SIZE = 64              # lists of messages in flight between the processes, at most
OUTGOING_QUEUE = 10_000         # messages to publish (dead letters, alarms) waiting for the child
DRAIN_SECONDS = 2.0             # at stop, the child publishes what is still waiting for this long at most


# One message as the child hands it over: (channel, payload, topic, received, ack, redelivered, reading).
_Handed = tuple[str | None, bytes, str | None, float, tuple[int, int] | None, bool, TagReading | Refusal | None]


class TagDecoders(Protocol):
    """Which decoder reads a tag topic's messages (a copy of the service's tag registry, in the child)."""

    def decoder_for(self, topic: str) -> TagDecoder | None: ...


class TagDecoder(Protocol):
    def decode(self, payload: bytes, arrival: float) -> TagReading | Refusal: ...


class _Batcher:
    """Collects hand-overs in the child and ships them as lists (one pickle per list, not per message).

    ``add`` blocks while ``limit`` messages wait (back-pressure onto paho, hence the broker);
    a list leaves at the latest ``interval`` seconds after its first message.
    """

    def __init__(self, out: Any, limit: int = 2000, interval: float = 0.001) -> None:
        self._out = out
        self._limit = limit
        self._interval = interval
        self._items: list[_Handed] = []
        self._cond = threading.Condition()
        self._stop = False
        self._thread = threading.Thread(target=self._ship, name="rwls-ingest-batcher", daemon=True)
        self._thread.start()

    def add(self, item: _Handed) -> None:
        with self._cond:
            while len(self._items) >= self._limit and not self._stop:
                self._cond.wait(0.1)
            self._items.append(item)
            self._cond.notify_all()

    def _ship(self) -> None:
        while True:
            with self._cond:
                while not self._items and not self._stop:
                    self._cond.wait(0.1)
                if not self._items and self._stop:
                    return
            time.sleep(self._interval)          # let a few more arrive: fewer, larger lists
            with self._cond:
                items, self._items = self._items, []
                self._cond.notify_all()
            self._out.put(items)               # blocks while the service is behind

    def close(self) -> None:
        with self._cond:
            self._stop = True
            self._cond.notify_all()
        self._thread.join(5.0)


def _decoded(decoders: TagDecoders | None, message: Message) -> TagReading | Refusal | None:
    """A tag message decoded here, on this process's own interpreter, so the engine need not (None: not a
    tag message, or no decoder names its topic; the engine decides what it is)."""
    if decoders is None or message.channel is not None or message.topic is None:
        return None
    decoder = decoders.decoder_for(message.topic)
    return None if decoder is None else decoder.decode(message.payload, message.received)


def _carry_out(ingest: MqttIngest, item: tuple[Any, ...], wait: float = PUBLISH_WAIT) -> None:
    """One request from the service: ``("publish", topic, payload, retain)``, ``("publish_from", producer,
    args)`` or ``("ack", acks)``."""
    try:
        if item[0] == "ack":
            ingest.ack(item[1])
        elif item[0] == "publish_from":
            _, producer, args = item
            ingest.publish_many(producer(*args), wait=wait)
        else:
            _, topic, payload, retain = item
            ingest.publish(topic, payload, retain=retain, wait=wait)
    except RuntimeError as exc:                  # counted in ingest.publish_failures
        log.error("request %s not carried out: %s", item[0], exc)


def _child(settings: BrokerSettings, topics: dict[str, str | None], out: Any, outgoing: Any, stop: Any,
           connected: Any, subscribed: Any, reconnects: Any, errors: Any, protocol: Any, failures: Any,
           parent: int, decoders: TagDecoders | None) -> None:
    logging.basicConfig(level=logging.INFO, format="%(asctime)s %(levelname)s %(name)s[ingest]: %(message)s")
    batcher = _Batcher(out)

    def hand_over(message: Message) -> bool:
        batcher.add((message.channel, message.payload, message.topic, message.received, message.ack,
                     message.redelivered, _decoded(decoders, message)))
        return True

    ingest = MqttIngest(settings, topics, hand_over)
    ingest.start()
    protocol.value = 5 if ingest.protocol == "5" else 4
    # Also stop when the service process is gone (killed before it could stop us).
    while not stop.is_set() and os.getppid() == parent:
        connected.value = 1 if ingest.connected and ingest.alive() else 0
        subscribed.value = 1 if ingest.subscribed and ingest.alive() else 0
        reconnects.value = ingest.reconnects
        errors.value = ingest.callback_errors
        failures.value = ingest.publish_failures
        try:
            item = outgoing.get(timeout=0.1)
        except queue.Empty:
            continue
        _carry_out(ingest, item)
    # What the service handed over before it stopped us still goes out (bounded: a full pipe cannot hold us).
    deadline = time.monotonic() + DRAIN_SECONDS
    while time.monotonic() < deadline:
        try:
            item = outgoing.get(timeout=0.05)
        except queue.Empty:
            break
        _carry_out(ingest, item, wait=max(0.0, deadline - time.monotonic()))
    ingest.stop()
    batcher.close()
    out.cancel_join_thread()      # the service may have stopped reading: never hang at exit on the pipe


class ProcessIngest:
    """Same face as :class:`MqttIngest`, with the MQTT client in a child process."""

    def __init__(self, settings: BrokerSettings, topics: Mapping[str, str | None],
                 submit: Callable[[Message], bool], *,
                 submit_all: Callable[[list[Message]], int] | None = None,
                 tag_decoders: TagDecoders | None = None) -> None:
        self.settings = settings
        self._topics = dict(topics)
        # Hands one list from the child over whole (blocking while full); else message by message.
        self._submit_all = submit_all or (lambda messages: sum(map(submit, messages)))
        context = mp.get_context("spawn")
        self._out = context.Queue(HANDOVER_SIZE)
        # Room for every alarm's retained state at start (five per channel) and then some.
        self._outgoing = context.Queue(max(OUTGOING_QUEUE, 8 * len(self._topics)))
        self._stop = context.Event()
        self._connected = context.Value("b", 0)
        self._subscribed = context.Value("b", 0)
        self._reconnects = context.Value("q", 0)
        self._errors = context.Value("q", 0)
        self._protocol = context.Value("b", 0)
        self._failures = context.Value("q", 0)
        self._process = context.Process(
            target=_child, name="rwls-ingest", daemon=True,
            args=(settings, self._topics, self._out, self._outgoing, self._stop, self._connected, self._subscribed,
                  self._reconnects, self._errors, self._protocol, self._failures, os.getpid(), tag_decoders))
        self._reader: threading.Thread | None = None
        self._stopping = threading.Event()
        self.received = 0

    # ---------------------------------------------------------------- status
    @property
    def connected(self) -> bool:
        return bool(self._connected.value)

    @property
    def subscribed(self) -> bool:
        """Connected, and the broker acknowledged (SUBACK) every subscription (as the child last saw it)."""
        return bool(self._connected.value and self._subscribed.value)

    @property
    def protocol(self) -> str:
        return {5: "5", 4: "3.1.1"}.get(self._protocol.value, "")

    @property
    def reconnects(self) -> int:
        return int(self._reconnects.value)

    @property
    def callback_errors(self) -> int:
        return int(self._errors.value)

    @property
    def publish_failures(self) -> int:
        """Publishes the child's paho refused, after waiting out a full queue (those lost in the child)."""
        return int(self._failures.value)

    def alive(self) -> bool:
        return self._process.is_alive() and self._reader is not None and self._reader.is_alive()

    def wait_connected(self, timeout: float) -> bool:
        return self._wait(lambda: self.connected, timeout)

    def wait_subscribed(self, timeout: float) -> bool:
        """Wait until :attr:`subscribed` (messages published from now on reach us); False on timeout."""
        return self._wait(lambda: self.subscribed, timeout)

    @staticmethod
    def _wait(condition: Callable[[], bool], timeout: float) -> bool:
        # Shared values between processes have no event to wait on: poll them (bounded).
        deadline = time.monotonic() + timeout
        while time.monotonic() < deadline:
            if condition():
                return True
            time.sleep(0.01)
        return condition()

    # ------------------------------------------------------------- lifecycle
    def start(self) -> None:
        self._process.start()
        self._reader = threading.Thread(target=self._read, name="rwls-ingest-reader", daemon=True)
        self._reader.start()

    def _read(self) -> None:
        while not self._stopping.is_set() or not self._out.empty():
            try:
                items = self._out.get(timeout=0.1)
            except queue.Empty:
                if not self._process.is_alive() and self._out.empty():
                    return
                continue
            except (EOFError, OSError):
                return
            self.received += len(items)
            self._submit_all([Message(channel, payload, "mqtt", topic, received, ack=ack, redelivered=redelivered,
                                      reading=reading)
                              for channel, payload, topic, received, ack, redelivered, reading in items])

    def stop(self, timeout: float = 5.0) -> None:
        """Stop the child (its client disconnects), then let the reader hand over what is left."""
        self._stop.set()
        self._process.join(timeout)
        if self._process.is_alive():
            self._process.terminate()          # our own child, by PID
            self._process.join(timeout)
        self._stopping.set()
        if self._reader is not None:
            self._reader.join(timeout)
        # The child is gone: whatever it did not take must not hold this process at exit.
        self._outgoing.cancel_join_thread()
        for handle in (self._out, self._outgoing):
            with contextlib.suppress(Exception):
                handle.close()

    # ------------------------------------------------------------ publishing
    def publish(self, topic: str, payload: bytes, *, retain: bool = False) -> None:
        """Hand a message to the child for publishing at QoS 1.

        A full queue to the child is waited out for up to ``PUBLISH_WAIT`` seconds (back-pressure, as
        in :meth:`MqttIngest.publish`); RuntimeError after that, or when the child is gone.
        """
        self._put(("publish", topic, payload, retain))

    def publish_from(self, producer: Callable[..., Iterable[tuple[str, bytes, bool]]], args: tuple[Any, ...]) -> None:
        """:meth:`publish` of each ``(topic, payload, retain)`` that ``producer(*args)`` yields, made in the child:
        many messages from compact data (every alarm's retained state at start), handed over as that data.
        ``producer`` is a module-level function (pickled by name)."""
        self._put(("publish_from", producer, args))

    def ack(self, acks: list[tuple[int, int]]) -> None:
        """Have the child acknowledge these messages (waits like :meth:`publish`; RuntimeError after)."""
        self._put(("ack", acks))

    def _put(self, item: tuple[Any, ...]) -> None:
        # Before the child starts (recovery publishes alarm states) the queue holds what it is given.
        if self._process.pid is not None and not self._process.is_alive():
            raise RuntimeError("ingest process stopped")
        try:
            self._outgoing.put(item, timeout=PUBLISH_WAIT)
        except queue.Full:
            raise RuntimeError("publish queue to the ingest process is full") from None
        except ValueError:
            raise RuntimeError("ingest process stopped") from None

    def publish_dead_letter(self, letter: DeadLetter) -> None:
        """Publish a refusal to the dead-letter topic (see :meth:`publish`)."""
        self.publish(self.settings.dead_letter_topic, letter.to_json())
