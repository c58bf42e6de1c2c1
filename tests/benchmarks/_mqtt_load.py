"""The MQTT load of the service benchmarks: their broker, the load generator in a process of its own, and waiting
(bounded) until the figures the load should move have moved.

Every service benchmark talks to one private Mosquitto for the run (``bench_broker`` in
``tests/benchmarks/conftest.py``), started on a free 127.0.0.1 port with its config in a temporary folder:
listener on 127.0.0.1 only, anonymous, persistence off, ``max_queued_messages 1000000`` and
``max_inflight_messages 0`` set on purpose, so a subscriber that falls behind is queued for rather than
silently dropped at the default limit of 1000 (the config is printed). It is stopped by PID at the end. Load
comes from ``_publisher.py`` in a separate process (paho, at most 1000 QoS 1 messages in flight, every return
code checked; it reports what it published) over ``CHANNELS`` topics ``<prefix>/c<k>``, or in the tag shape
(``tags=True``) two tag messages per sample on ``<prefix>/t/c<k>/u`` and ``<prefix>/t/c<k>/y``, which one
filter (:func:`tag_filter`) subscribes to.
"""

from __future__ import annotations

import contextlib
import json
import subprocess
import sys
import time
from collections.abc import Callable, Iterator
from dataclasses import dataclass
from pathlib import Path
from typing import Any

from tests.support.addresses import unique_client_id

__all__ = ["BROKER_LIMITS", "CHANNELS", "LATENCY_RATE", "MAX_IN_FLIGHT", "POLL", "RUN_TIMEOUT", "TAG_MESSAGES",
           "TAG_RATES", "Broker", "check_publisher", "finish", "nothing_more", "publish_all", "publisher", "reap",
           "running", "tag_filter", "topics", "watch"]

PUBLISHER = Path(__file__).parent / "_publisher.py"

CHANNELS = 1_000                      # topics (and service channels) the load goes round
LATENCY_RATE = 5_000.0                # samples (= messages) per second, paced by the publisher (the latency goal's)
TAG_MESSAGES = 100_000                # tag messages (two per sample) in a live run of the tag shape
TAG_RATES = (5_000.0, 10_000.0)       # tag messages per second, paced (the tag latency goals')
MAX_IN_FLIGHT = 1_000                 # publisher's cap on unacknowledged messages
BROKER_LIMITS = ("max_queued_messages 1000000", "max_inflight_messages 0")
RUN_TIMEOUT = 120.0                   # seconds, any one run
STALL = 20.0                          # seconds without progress once nothing more is coming: stop waiting
POLL = 0.002                          # seconds between counter polls


@dataclass(frozen=True)
class Broker:
    port: int
    pid: int | None
    description: str


def topics(prefix: str) -> list[str]:
    return [f"{prefix}/c{k}" for k in range(CHANNELS)]


def tag_filter(prefix: str) -> str:
    """The one topic filter of every tag the publisher's tag shape sends (``<prefix>/t/c<k>/u`` and ``/y``)."""
    return f"{prefix}/t/+/+"


@contextlib.contextmanager
def publisher(port: int, prefix: str, *, messages: int, batch: int = 1, qos: int = 1, rate: float = 0.0,
              wall: bool = False, tags: bool = False) -> Iterator[subprocess.Popen[str]]:
    """The load generator in its own process (``tags``: the tag shape); killed by PID if still running when the
    block ends."""
    command = [sys.executable, str(PUBLISHER), "--port", str(port), "--prefix", prefix,
               "--shape", "tags" if tags else "samples",
               "--channels", str(CHANNELS), "--messages", str(messages), "--batch", str(batch),
               "--qos", str(qos), "--rate", str(rate), "--time", "wall" if wall else "index",
               "--max-inflight", str(MAX_IN_FLIGHT), "--timeout", str(RUN_TIMEOUT),
               "--client-id", unique_client_id("pub")]
    proc = subprocess.Popen(command, stdin=subprocess.DEVNULL, stdout=subprocess.PIPE,
                            stderr=subprocess.PIPE, text=True)
    try:
        yield proc
    finally:
        reap(proc)


def finish(proc: subprocess.Popen[str], timeout: float = RUN_TIMEOUT) -> dict[str, Any]:
    """Wait (bounded) for a helper process and read the JSON object it printed last."""
    try:
        out, err = proc.communicate(timeout=timeout)
    except subprocess.TimeoutExpired:
        proc.kill()
        out, err = proc.communicate(timeout=10)
    lines = out.strip().splitlines()
    result: dict[str, Any] = json.loads(lines[-1]) if lines else {}
    result["returncode"] = proc.returncode
    result["stderr"] = err.strip()[-2000:]
    return result


def publish_all(port: int, prefix: str, messages: int) -> dict[str, Any]:
    with publisher(port, prefix, messages=messages) as proc:
        return finish(proc)


def check_publisher(result: dict[str, Any], messages: int) -> None:
    assert result.get("published") == messages and result.get("acknowledged") == messages, (
        f"publisher did not publish and get acknowledged all {messages}: {result}")


def watch(progress: Callable[[], int], target: int, more_coming: Callable[[], bool],
          on_poll: Callable[[], None] | None = None, stall: float = STALL) -> float | None:
    """Poll ``progress()`` until it reaches ``target``; the perf_counter time it did, or None.

    Bounded by RUN_TIMEOUT, and by ``stall`` seconds without progress once ``more_coming()`` is False (a
    micro-batch of many batch payloads can take seconds before its first sample counts).
    """
    seen, moved = 0, time.monotonic()
    end = moved + RUN_TIMEOUT
    while time.monotonic() < end:
        value = progress()
        now = time.perf_counter()
        if on_poll is not None:
            on_poll()
        if value >= target:
            return now
        if value > seen:
            seen, moved = value, time.monotonic()
        elif not more_coming() and time.monotonic() - moved > stall:
            return None
        time.sleep(POLL)
    return None


def running(proc: subprocess.Popen[str]) -> Callable[[], bool]:
    return lambda: proc.poll() is None


def nothing_more() -> bool:
    return False


def reap(proc: subprocess.Popen[str]) -> None:
    """Kill a helper process of ours by PID if it still runs, and collect it."""
    if proc.returncode is None:
        proc.kill()
        proc.communicate(timeout=10)
