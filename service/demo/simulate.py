"""Publish the invented demo plant (Larkspur Valley, substation 7) to an MQTT broker.

Plant time runs compressed: every published sample advances the plant clock by
ten minutes, so at the default rate a minute of demo shows days of plant. QoS 1,
every return code checked, at most ``max_inflight`` unacknowledged messages
(paho 2.x refuses quietly past 65,535 in flight).
"""

from __future__ import annotations

import json
import logging
import math
import threading
import time
from collections.abc import Mapping
from dataclasses import dataclass

import numpy as np
import paho.mqtt.client as mqtt
from paho.mqtt.enums import CallbackAPIVersion

from service.demo.plant import larkspur_substation7

__all__ = ["PublishStats", "channel_topic", "simulate"]

log = logging.getLogger(__name__)


def channel_topic(prefix: str, channel: str) -> str:
    """``sub7.flow`` under ``larkspur`` -> ``larkspur/sub7/flow``."""
    return f"{prefix}/{channel.replace('.', '/')}"


@dataclass
class PublishStats:
    published: int = 0
    acknowledged: int = 0
    refused: int = 0


def simulate(host: str, port: int, *, prefix: str = "larkspur", rate: float = 200.0, samples: int | None = None,
             seed: int = 7, client_id: str = "rwls-simulator", max_inflight: int = 1000,
             stop: threading.Event | None = None, timeout: float = 30.0,
             resume_after: Mapping[str, float] | None = None) -> PublishStats:
    """Publish ``samples`` per channel (None: until ``stop``), ``rate`` messages per second in all.

    ``resume_after`` maps a channel to the newest sample time a service already holds: the plant runs
    through those samples again without publishing them (same seed, same random draws), so it carries on
    where it left off instead of repeating samples a service refuses as already seen.

    Returns when done and every message is acknowledged (or ``timeout`` passed
    waiting for acknowledgements). Raises ``ConnectionError`` if the broker is
    not reachable.
    """
    if rate <= 0.0:
        raise ValueError(f"rate must be > 0, got {rate}")
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
        rng = np.random.default_rng(seed)
        plant = larkspur_substation7(rng, samples=samples if samples is not None else 10**9)
        interval = 1.0 / rate
        next_at = time.monotonic()
        held = resume_after or {}
        for sample in plant:
            if stop.is_set():
                break
            if sample.t <= held.get(sample.channel, -math.inf):
                continue
            payload = json.dumps({"t": sample.t, "y": sample.y, "u": sample.inputs, "seq": sample.seq})
            while not window.acquire(timeout=0.5):
                if stop.is_set():
                    break
            info = client.publish(channel_topic(prefix, sample.channel), payload, qos=1)
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
