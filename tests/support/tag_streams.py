"""A small invented plant of tags, and a tag stream from it: as MQTT messages and as a long CSV.

:func:`tag_plant` writes a tag list (CSV, one wildcard pattern entry and one exact tag) and gives
the ``[tags]`` and ``[channels]`` tables of two channels: ``sub7.flow`` (the flow meter against the
pump speed, which a gateway publishes by exception) and ``sub7.temp`` (a temperature against the
flow meter, matched within a tolerance): one channel's output tag is the other's input.
Payloads are the gateway's JSON, ``{"v": value, "ts": epoch milliseconds, "q": quality}``.

:func:`tag_stream` invents the updates in publication order (every quality good, bad and by number;
inputs before their outputs, a few missing, one late, one of a tag no channel names);
:meth:`TagUpdate.payload` is the message and :func:`write_long_csv` the historian's export of the
same stream, its times alternately ISO 8601 and epoch seconds.
"""

from __future__ import annotations

import csv
import json
from dataclasses import dataclass
from datetime import UTC, datetime, timedelta
from pathlib import Path
from typing import Any

import numpy as np

__all__ = ["EPOCH_MS", "GATEWAY", "STEP_MS", "TagUpdate", "tag_plant", "tag_stream", "write_long_csv"]

GATEWAY: dict[str, Any] = {"kind": "json", "value": "/v", "time": "/ts", "time_unit": "ms", "quality": "/q",
                           "good": ["good", 192]}
EPOCH_MS = 1_767_225_600_000          # 2026-01-01T00:00:00Z
STEP_MS = 5_000


@dataclass(frozen=True)
class TagUpdate:
    """One tag message: the tag's id, the topic it is published on, its stamp (epoch ms), value and quality."""

    tag: str
    topic: str
    ms: int
    value: float
    quality: str | int

    def payload(self) -> bytes:
        """The gateway's JSON (floats as ``repr``, which reads back to the same bits)."""
        return json.dumps({"v": self.value, "ts": self.ms, "q": self.quality}).encode()


def _gateway_topic(prefix: str, area: str, name: str) -> str:
    return f"{prefix}/gw/{area}/{name}/value"


def tag_plant(directory: Path, prefix: str) -> dict[str, Any]:
    """``{"tags": ..., "channels": ...}`` of the plant whose topics start with ``prefix``; writes its tag list.

    The pattern ``<prefix>/gw/+/+/value`` names tag ``<area>.<name>`` (its id template counts the
    prefix's levels); ``sub7.FT-101`` is a tag of its own on ``<prefix>/plant/FT-101`` (max_age 60 s).
    """
    first = len(prefix.split("/")) + 1                   # the level of <area>
    tag_list = directory / "plant_tags.csv"
    with tag_list.open("w", newline="", encoding="utf-8") as handle:
        writer = csv.writer(handle)
        writer.writerow(["id", "topic", "format", "unit", "description", "max_age"])
        writer.writerow([f"{{{first}}}.{{{first + 1}}}", _gateway_topic(prefix, "+", "+"), "gateway", "",
                         "every tag behind the gateways (by exception: no max_age)", ""])
        writer.writerow(["sub7.FT-101", f"{prefix}/plant/FT-101", "gateway", "m3/h", "supply flow", "60"])
    return {
        "tags": {"files": [str(tag_list)], "formats": {"gateway": GATEWAY}},
        "channels": {
            "sub7.flow": {"terms": ["1", "speed"], "forgetting_factor": 0.995,
                          "tags": {"output": "sub7.FT-101", "inputs": {"speed": "sub7.SC-101"}}},
            "sub7.temp": {"terms": ["1", "flow"], "weighting": "tracked", "noise": {"initial_sigma": 0.3},
                          "tags": {"output": "sub7.TT-102", "inputs": {"flow": "sub7.FT-101"},
                                   "mode": "matched", "tolerance": 1.0}},
        },
    }


def tag_stream(prefix: str, seed: int, steps: int) -> list[TagUpdate]:
    """The plant's updates in publication order (invented data), ``steps`` scans of 5 s.

    Per scan: the pump speed when it changed (by exception; none in the first scan, so the first flow
    lacks it; changed in the next three, so the first samples identify the model), the flow 0.2 s
    later (now and then missing, or of bad quality), the temperature 0.4 s later. Once a stale pump
    speed arrives after a newer one (not kept), and now and then a pressure no channel names.
    """
    rng = np.random.default_rng(seed)
    speed_topic = _gateway_topic(prefix, "sub7", "SC-101")
    temp_topic = _gateway_topic(prefix, "sub7", "TT-102")
    flow_topic = f"{prefix}/plant/FT-101"
    updates: list[TagUpdate] = []
    speed = 50.0
    for k in range(steps):
        t = EPOCH_MS + STEP_MS * k
        if k >= 1 and (k in (1, 2, 3, steps // 2) or rng.random() < 0.4):
            speed = round(float(rng.uniform(40.0, 60.0)), 2)
            updates.append(TagUpdate("sub7.SC-101", speed_topic, t, speed, "good"))
        if k == steps // 2:
            # Late: stamped before the update just published, so it is not kept.
            updates.append(TagUpdate("sub7.SC-101", speed_topic, t - 3 * STEP_MS, 1.0, "good"))
        flow = 2.0 + 0.8 * speed + float(rng.normal(0.0, 0.2))
        draw = rng.random()
        if draw >= 0.05:                                # else missing: the temperature finds no match
            quality: str | int = "bad" if draw < 0.1 else 192 if draw < 0.5 else "good"
            updates.append(TagUpdate("sub7.FT-101", flow_topic, t + 200, flow, quality))
        temp = 20.0 + 0.1 * flow + float(rng.normal(0.0, 0.3))
        updates.append(TagUpdate("sub7.TT-102", temp_topic, t + 400, temp, 0 if rng.random() < 0.05 else 192))
        if k % 7 == 3:
            updates.append(TagUpdate("sub7.PT-900", _gateway_topic(prefix, "sub7", "PT-900"), t + 600,
                                     float(rng.normal(4.0, 0.1)), "good"))
    return updates


def _iso(ms: int) -> str:
    return (datetime(1970, 1, 1, tzinfo=UTC) + timedelta(milliseconds=ms)).isoformat()


def _seconds(ms: int) -> str:
    return f"{ms // 1000}.{ms % 1000:03d}"


def write_long_csv(path: Path, updates: list[TagUpdate]) -> None:
    """The historian's export of ``updates`` in their order: ``time,tag,value,quality``.

    Times alternate between ISO 8601 and epoch seconds (each the exact decimal of the milliseconds,
    so both read back as ``ms / 1000`` does), values as ``repr``.
    """
    with path.open("w", newline="", encoding="utf-8") as handle:
        writer = csv.writer(handle)
        writer.writerow(["time", "tag", "value", "quality"])
        for k, u in enumerate(updates):
            writer.writerow([_iso(u.ms) if k % 2 else _seconds(u.ms), u.tag, repr(u.value), u.quality])
