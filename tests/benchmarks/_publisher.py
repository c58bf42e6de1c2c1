"""Load generator for the service benchmarks, run as a separate process (paho-mqtt 2.x, 127.0.0.1 only).

Publishes ``--messages`` messages round-robin over ``--channels`` channels, in one of two shapes:

* ``--shape samples``: topics ``<prefix>/c<k>``, each message one sample, or with ``--batch B`` a
  ``{"samples": [...]}`` payload of B samples, for the channel's input ``u``: ``y = 2 + 0.5 u + noise``,
  with ``seq`` increasing per channel. ``t`` is either an increasing synthetic time (``--time index``) or
  this process's ``time.time()`` taken just before ``publish`` (``--time wall``, for latency).
* ``--shape tags``: plant tags, one value per message, two messages per sample: channel ``k``'s input on
  ``<prefix>/t/c<k>/u``, then its output on ``<prefix>/t/c<k>/y``, both ``{"v": value, "ts": ms, "q": 0}``
  with the same time stamp in integer milliseconds (the same values as the sample shape). ``ts`` is the
  synthetic time, or (``--time wall``) this process's ``time.time()`` taken just before the input's
  ``publish``, rounded down to the millisecond (so a latency measured from it is never short).

At most ``--max-inflight`` messages are unacknowledged (QoS 1: PUBACK; QoS 0:
written to the socket), because paho 2.x refuses quietly past 65,535 in
flight. Every ``publish`` return code and every PUBACK reason code is checked;
a refusal is counted, never retried silently. ``--rate`` paces messages per
second (0: as fast as possible). Every wait is bounded by ``--timeout``.

Prints one JSON object on stdout: published, acknowledged, refused, failures,
disconnects, first/last publish times, and the publishing rate. Exit code 0
only when every message was published and acknowledged.
"""

from __future__ import annotations

import argparse
import functools
import json
import math
import sys
import threading
import time
from collections.abc import Callable
from typing import Any

import paho.mqtt.client as mqtt
from paho.mqtt.enums import CallbackAPIVersion

LOOPBACK = "127.0.0.1"
T0 = 1_767_225_600.0            # 2026-01-01T00:00:00Z, start of the synthetic time axis
T0_MS = 1_767_225_600_000       # the same in milliseconds (tag time stamps)


def _sample(k: int, j: int, t: float) -> dict[str, Any]:
    """Sample j of channel k: a deterministic input sweep and a small deterministic 'noise'."""
    u = ((j * 7919 + k * 104_729) % 2000) / 200.0 - 5.0
    noise = (((j * 31 + k * 17) % 101) - 50) / 500.0
    return {"t": t, "y": 2.0 + 0.5 * u + noise, "u": {"u": u}, "seq": j}


def _sample_message(prefix: str, i: int, channels: int, batch: int, wall: bool) -> tuple[str, bytes]:
    """Message i of the sample shape: round i // channels of channel i % channels, one sample or ``batch``."""
    k, round_ = i % channels, i // channels
    if batch == 1:
        t = time.time() if wall else T0 + round_
        return f"{prefix}/c{k}", json.dumps(_sample(k, round_, t)).encode()
    first = round_ * batch
    samples = [_sample(k, j, time.time() if wall else T0 + j) for j in range(first, first + batch)]
    return f"{prefix}/c{k}", json.dumps({"samples": samples}).encode()


class _TagMessages:
    """Message i of the tag shape: sample s = i // 2 (channel s % channels, its round s // channels); even i is
    its input ``u``, odd i its output ``y``, stamped alike. Called in order of i (the stamp is the input's)."""

    def __init__(self, prefix: str, channels: int, wall: bool) -> None:
        self._prefix, self._channels, self._wall = prefix, channels, wall
        self._stamp_ms = 0

    def __call__(self, i: int) -> tuple[str, bytes]:
        s, output = divmod(i, 2)
        k, j = s % self._channels, s // self._channels
        if not output:
            self._stamp_ms = math.floor(time.time() * 1000.0) if self._wall else T0_MS + 1000 * j
        sample = _sample(k, j, 0.0)
        name, value = ("y", sample["y"]) if output else ("u", sample["u"]["u"])
        return (f"{self._prefix}/t/c{k}/{name}",
                json.dumps({"v": value, "ts": self._stamp_ms, "q": 0}).encode())


def main(argv: list[str] | None = None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--port", type=int, required=True)
    parser.add_argument("--prefix", required=True)
    parser.add_argument("--channels", type=int, required=True)
    parser.add_argument("--messages", type=int, required=True)
    parser.add_argument("--shape", choices=("samples", "tags"), default="samples")
    parser.add_argument("--batch", type=int, default=1, help="samples per message (shape samples)")
    parser.add_argument("--qos", type=int, choices=(0, 1), default=1)
    parser.add_argument("--rate", type=float, default=0.0, help="messages per second, 0: unpaced")
    parser.add_argument("--time", choices=("index", "wall"), default="index")
    parser.add_argument("--max-inflight", type=int, default=1000)
    parser.add_argument("--timeout", type=float, default=120.0)
    parser.add_argument("--client-id", required=True)
    args = parser.parse_args(argv)
    if not 1 <= args.max_inflight <= 65_000:
        parser.error("--max-inflight must be in 1..65000")
    if args.shape == "tags" and args.batch != 1:
        parser.error("--batch applies to --shape samples only")
    wall = args.time == "wall"
    message: Callable[[int], tuple[str, bytes]] = (
        _TagMessages(args.prefix, args.channels, wall) if args.shape == "tags"
        else functools.partial(_sample_message, args.prefix, channels=args.channels, batch=args.batch, wall=wall))
    # Unpaced synthetic payloads are built before connecting, so JSON encoding is not part of the rate.
    prebuilt = None if wall else [message(i) for i in range(args.messages)]

    window = threading.Semaphore(args.max_inflight)
    lock = threading.Lock()
    state: dict[str, Any] = {"acknowledged": 0, "failures": [], "disconnects": 0}
    connected = threading.Event()
    connect_reason: list[Any] = []

    def on_connect(_c: mqtt.Client, _u: Any, _f: Any, reason: Any, _p: Any) -> None:
        connect_reason.append(reason)
        connected.set()

    def on_disconnect(_c: mqtt.Client, _u: Any, _f: Any, reason: Any, _p: Any) -> None:
        with lock:
            state["disconnects"] += 1

    def on_publish(_c: mqtt.Client, _u: Any, mid: int, reason: Any, _p: Any) -> None:
        with lock:
            state["acknowledged"] += 1
            if getattr(reason, "is_failure", False) and len(state["failures"]) < 10:
                state["failures"].append(f"mid {mid}: {reason}")
        window.release()

    client = mqtt.Client(CallbackAPIVersion.VERSION2, client_id=args.client_id, protocol=mqtt.MQTTv5)
    client.max_inflight_messages_set(args.max_inflight)      # paho's own window (default 20) matches ours
    client.on_connect = on_connect
    client.on_disconnect = on_disconnect
    client.on_publish = on_publish
    deadline = time.monotonic() + args.timeout
    per_message = args.batch if args.shape == "samples" else 0.5
    result: dict[str, Any] = {"published": 0, "refused": 0, "shape": args.shape, "samples_per_message": per_message,
                              "qos": args.qos, "max_inflight": args.max_inflight}
    rc = client.connect(LOOPBACK, args.port, keepalive=60, clean_start=True)
    if rc != mqtt.MQTT_ERR_SUCCESS:
        print(json.dumps({**result, "error": f"connect returned {mqtt.error_string(rc)}"}))
        return 1
    client.loop_start()
    try:
        if not connected.wait(min(10.0, args.timeout)) or connect_reason[0].is_failure:
            print(json.dumps({**result, "error": f"no accepted CONNACK: {connect_reason[:1]}"}))
            return 1
        first = last = 0.0
        started = time.monotonic()
        for i in range(args.messages):
            if args.rate > 0.0:
                delay = started + i / args.rate - time.monotonic()
                if delay > 0.0:
                    time.sleep(delay)
            while not window.acquire(timeout=0.5):
                if time.monotonic() > deadline or state["disconnects"]:
                    break
            else:
                topic, payload = prebuilt[i] if prebuilt is not None else message(i)
                stamp = time.time()
                info = client.publish(topic, payload, qos=args.qos)
                if info.rc != mqtt.MQTT_ERR_SUCCESS:
                    result["refused"] += 1
                    window.release()
                    if result["refused"] <= 3:
                        print(f"publish #{i} refused: {mqtt.error_string(info.rc)}", file=sys.stderr)
                    continue
                result["published"] += 1
                first = first or stamp
                last = stamp
                continue
            break                                    # deadline or disconnect while waiting for the window
        while time.monotonic() < deadline:
            with lock:
                if state["acknowledged"] >= result["published"] or state["disconnects"]:
                    break
            time.sleep(0.005)
        span = last - first
        with lock:
            result.update(acknowledged=state["acknowledged"], failures=state["failures"],
                          disconnects=state["disconnects"])
        result.update(first_publish=first, last_publish=last,
                      publish_rate=(result["published"] - 1) / span if span > 0 else None)
    finally:
        client.disconnect()
        client.loop_stop()
    result["cpu_seconds"] = time.process_time()
    print(json.dumps(result))
    complete = (result["published"] == args.messages and result["acknowledged"] == args.messages
                and not result["failures"] and not result["refused"])
    return 0 if complete else 1


if __name__ == "__main__":
    sys.exit(main())
