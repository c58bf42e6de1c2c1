"""The demo plant's instruments: one tag each, on a topic of its own, and the channels assembled from them.

Larkspur Valley district heating, substation 7, is invented (``service/demo/plant.py``); so are these tag
ids. They follow the loop numbering of an instrument list: 1xx the supply line, 2xx the return line, 3xx
the differential pressure across the return, 4xx the boiler package, 5xx the expansion vessel; the letters
after ISA-5.1 (TT temperature, FT flow, SC speed control, PDT differential pressure, AT analyser, JT power,
LT level, PT pressure).

Every tag message is one JSON document, ``{"v": 82.3, "ts": 1780000000000, "q": "good"}``: the value in
the tag's unit, the time stamp in epoch milliseconds, the quality (``good``, or why not). Most tags are
published at every scan of the plant (every ten minutes of plant time). Two are published by exception:
the reference probe of the return line only when it moves by more than its deadband, the vessel's level
transmitter only when its reading changes (it resolves 5 cm); a change of quality is always published.

The tags on the substation's own gateway are listed one by one (the tag list CSV, :func:`tag_list_csv`);
the boiler package publishes through a gateway of its own, under ``sub7/boiler/``, and one pattern entry
of the configuration names every tag there.
"""

from __future__ import annotations

import csv
import io
import math
from collections.abc import Mapping
from dataclasses import dataclass

__all__ = ["BOILER_PATTERN", "CHANNELS", "INSTRUMENTS", "MAX_AGE", "ChannelTags", "Instrument", "by_tag",
           "tag_list_csv", "tag_topic"]

MAX_AGE = 300.0
"""Seconds a value of a tag published at every scan stays valid: half a scan, so a sample never takes an
input from an earlier scan (a missed input is refused as stale instead). By-exception tags: unbounded."""

BOILER_PATTERN = "sub7/boiler/+"
"""Below the publisher's prefix: the boiler gateway's topics; the configuration's pattern entry names them."""


@dataclass(frozen=True)
class Instrument:
    """One instrument and its tag.

    ``topic`` is below the publisher's prefix (``sub7/TT-101`` is published on ``larkspur/sub7/TT-101``).
    ``deadband``: None for a tag published at every scan; else the tag is published by exception, when its
    value moves by more than ``deadband`` (in its unit; 0: any change) from the value last published, or
    its quality changes.
    """

    tag: str
    topic: str
    unit: str
    description: str
    deadband: float | None = None

    @property
    def by_exception(self) -> bool:
        return self.deadband is not None

    @property
    def max_age(self) -> float:
        """Seconds a value stays valid (``inf``: until the next update, for tags published by exception)."""
        return math.inf if self.by_exception else MAX_AGE

    @property
    def listed(self) -> bool:
        """In the substation's tag list (else named by the boiler gateway's pattern)."""
        return not self.topic.startswith(BOILER_PATTERN.removesuffix("+"))


@dataclass(frozen=True)
class ChannelTags:
    """A demo channel: its output tag ``y`` and the tag behind each input (input name -> tag id)."""

    channel: str
    output: str
    inputs: Mapping[str, str]


INSTRUMENTS: tuple[Instrument, ...] = (
    Instrument("sub7.TT-101", "sub7/TT-101", "°C", "supply temperature, thermocouple"),
    Instrument("sub7.TT-102", "sub7/TT-102", "°C", "supply temperature, reference probe"),
    Instrument("sub7.FT-101", "sub7/FT-101", "m³/h", "supply flow"),
    Instrument("sub7.SC-101", "sub7/SC-101", "p.u.", "circulation pump speed, per unit of rated"),
    Instrument("sub7.PDT-301", "sub7/PDT-301", "kPa", "return differential pressure"),
    Instrument("sub7.PDT-302", "sub7/PDT-302", "kPa", "return differential pressure, redundant reference"),
    Instrument("sub7.AT-401", "sub7/boiler/AT-401", "% vol", "flue-gas O2"),
    Instrument("sub7.JT-401", "sub7/boiler/JT-401", "p.u.", "boiler load, per unit of rated"),
    Instrument("sub7.TT-201", "sub7/TT-201", "°C", "return temperature, thermocouple"),
    Instrument("sub7.TT-202", "sub7/TT-202", "°C", "return temperature, reference probe; by exception (0.02 K)",
               deadband=0.02),
    Instrument("sub7.LT-501", "sub7/LT-501", "m", "expansion vessel level; by exception (5 cm steps)",
               deadband=0.0),
    Instrument("sub7.PT-501", "sub7/PT-501", "bar", "expansion vessel pressure"),
)

CHANNELS: tuple[ChannelTags, ...] = (
    ChannelTags("sub7.supply_temp", "sub7.TT-101", {"ref_temp": "sub7.TT-102"}),
    ChannelTags("sub7.flow", "sub7.FT-101", {"pump_speed": "sub7.SC-101"}),
    ChannelTags("sub7.return_dp", "sub7.PDT-301", {"ref_dp": "sub7.PDT-302"}),
    ChannelTags("sub7.stack_o2", "sub7.AT-401", {"load": "sub7.JT-401"}),
    ChannelTags("sub7.return_temp", "sub7.TT-201", {"ref_return": "sub7.TT-202"}),
    ChannelTags("sub7.level", "sub7.LT-501", {"pressure": "sub7.PT-501"}),
)
"""In the plant's scan order; within a scan each channel's inputs are published before its output."""

_BY_TAG = {instrument.tag: instrument for instrument in INSTRUMENTS}


def by_tag(tag: str) -> Instrument:
    """The instrument of a tag id (``KeyError`` for a tag the demo plant does not have)."""
    return _BY_TAG[tag]


def tag_topic(prefix: str, tag: str) -> str:
    """``sub7.TT-101`` under ``larkspur`` -> ``larkspur/sub7/TT-101``."""
    return f"{prefix}/{by_tag(tag).topic}"


def tag_list_csv(prefix: str = "larkspur", fmt: str = "larkspur") -> str:
    """The substation's tag list (the listed tags, not the boiler's) as CSV text, in :data:`INSTRUMENTS` order.

    Columns as :mod:`service.tags.tag_list` reads them; ``max_age`` empty for tags published by exception.
    """
    out = io.StringIO()
    writer = csv.writer(out, lineterminator="\n")
    writer.writerow(["id", "topic", "format", "unit", "description", "max_age"])
    for instrument in INSTRUMENTS:
        if instrument.listed:
            max_age = "" if instrument.by_exception else f"{instrument.max_age:g}"
            writer.writerow([instrument.tag, f"{prefix}/{instrument.topic}", fmt, instrument.unit,
                             instrument.description, max_age])
    return out.getvalue()
