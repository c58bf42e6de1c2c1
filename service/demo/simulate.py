"""Publish the invented demo plant (Larkspur Valley, substation 7) to an MQTT broker.

Two shapes (``payload``):

``tags`` (the default)
    What a plant's gateways publish: one topic per instrument tag (:mod:`service.demo.instruments`),
    ``<prefix>/sub7/TT-101`` and, for the boiler package's gateway, ``<prefix>/sub7/boiler/AT-401``; each
    message ``{"v": 82.35, "ts": 1780000000000, "q": "good"}`` (value in the tag's unit, epoch milliseconds,
    quality). At every scan each channel's inputs are published before its output; the two by-exception
    tags only when they change. ``examples/larkspur_sub7.toml`` assembles the channels from them.
``samples``
    rwls's own sample payload, one topic per channel, ``<prefix>/sub7/flow``:
    ``{"t": 1780000001.0, "y": 47.2, "u": {"pump_speed": 0.68}, "seq": 0}``, the samples the tags form
    (the same values); ``examples/larkspur_sub7_samples.toml`` takes them.

Plant time runs compressed: every scan advances the plant clock by ten minutes, so at the default rate a
minute of demo shows days of plant. QoS 1, every return code checked, at most ``max_inflight``
unacknowledged messages (paho 2.x refuses quietly past 65,535 in flight), in publication order.
"""

from __future__ import annotations

import json
import logging
import math
import threading
import time
from collections.abc import Iterator, Mapping
from dataclasses import dataclass
from typing import Literal

import numpy as np
import paho.mqtt.client as mqtt
from paho.mqtt.enums import CallbackAPIVersion

from service.demo.instruments import tag_topic
from service.demo.plant import larkspur_substation7, larkspur_tag_updates

__all__ = ["PAYLOADS", "PayloadShape", "PublishStats", "channel_topic", "plant_messages", "simulate"]

log = logging.getLogger(__name__)

PayloadShape = Literal["tags", "samples"]
PAYLOADS: tuple[PayloadShape, ...] = ("tags", "samples")


def channel_topic(prefix: str, channel: str) -> str:
    """``sub7.flow`` under ``larkspur`` -> ``larkspur/sub7/flow``."""
    return f"{prefix}/{channel.replace('.', '/')}"


@dataclass
class PublishStats:
    published: int = 0
    acknowledged: int = 0
    refused: int = 0


def plant_messages(*, prefix: str = "larkspur", payload: PayloadShape = "tags", seed: int = 7,
                   samples: int | None = None,
                   resume_after: Mapping[str, float] | None = None) -> Iterator[tuple[str, bytes]]:
    """``(topic, payload)`` of every message the plant publishes, in order (``samples``: scans; None: endless).

    ``resume_after`` maps a channel to the newest sample time a service already holds: the plant runs through
    those scans again without publishing them (same seed, same random draws, and the by-exception tags
    remember what they published), so it carries on where it left off instead of repeating samples a
    service refuses as already seen.
    """
    if payload not in PAYLOADS:
        raise ValueError(f"payload must be one of {', '.join(PAYLOADS)}, got {payload!r}")
    rng = np.random.default_rng(seed)
    scans = samples if samples is not None else 10**9
    held = resume_after or {}
    if payload == "tags":
        for update in larkspur_tag_updates(rng, samples=scans):
            if update.sample_t <= held.get(update.channel, -math.inf):
                continue
            document = {"v": update.value, "ts": round(update.t * 1000.0), "q": update.quality}
            yield tag_topic(prefix, update.tag), json.dumps(document).encode()
        return
    for sample in larkspur_substation7(rng, samples=scans):
        if sample.t <= held.get(sample.channel, -math.inf):
            continue
        document = {"t": sample.t, "y": sample.y, "u": sample.inputs, "seq": sample.seq}
        yield channel_topic(prefix, sample.channel), json.dumps(document).encode()


def simulate(host: str, port: int, *, prefix: str = "larkspur", payload: PayloadShape = "tags",
             rate: float = 200.0, samples: int | None = None, seed: int = 7, client_id: str = "rwls-simulator",
             max_inflight: int = 1000, stop: threading.Event | None = None, timeout: float = 30.0,
             resume_after: Mapping[str, float] | None = None) -> PublishStats:
    """Publish :func:`plant_messages` (``samples`` scans; None: until ``stop``), ``rate`` messages per second.

    Returns when done and every message is acknowledged (or ``timeout`` passed
    waiting for acknowledgements). Raises ``ConnectionError`` if the broker is
    not reachable.
    """
    if rate <= 0.0:
        raise ValueError(f"rate must be > 0, got {rate}")
    messages = plant_messages(prefix=prefix, payload=payload, seed=seed, samples=samples, resume_after=resume_after)
    stop = stop or threading.Event()
    stats = PublishStats()
    window = threading.Semaphore(max_inflight)

    def on_publish(client: mqtt.Client, userdata: object, mid: int, reason_code: object, properties: object) -> None:
        stats.acknowledged += 1
        window.release()

    client = mqtt.Client(CallbackAPIVersion.VERSION2, client_id=client_id)
    client.on_publish = on_publish
    try:
        client.connect(host, port, keepalive=30)
    except OSError as exc:
        raise ConnectionError(f"broker {host}:{port} not reachable: {exc}") from None
    client.loop_start()
    try:
        interval = 1.0 / rate
        next_at = time.monotonic()
        for topic, body in messages:
            while not stop.is_set() and not window.acquire(timeout=0.5):
                pass                             # the broker holds max_inflight unacknowledged already
            if stop.is_set():
                break
            info = client.publish(topic, body, qos=1)
            if info.rc != mqtt.MQTT_ERR_SUCCESS:
                stats.refused += 1
                window.release()
                log.warning("publish refused: %s", mqtt.error_string(info.rc))
                continue
            stats.published += 1
            next_at += interval
            delay = next_at - time.monotonic()
            if delay > 0:
                stop.wait(delay)
            else:
                next_at = time.monotonic()       # behind: do not burst to catch up
        deadline = time.monotonic() + timeout
        while stats.acknowledged < stats.published and time.monotonic() < deadline:
            time.sleep(0.01)
    finally:
        client.loop_stop()
        client.disconnect()
    return stats
