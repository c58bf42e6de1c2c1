"""The invented demo plant: Larkspur Valley district heating, substation 7 (fictional).

Six channels, the first four with a fault that develops over a month of compressed time, the last two
healthy with noise that is not Gaussian:

* ``sub7.supply_temp``: supply thermocouple against a reference probe,
  ``y = a + b * ref_temp``; its noise grows slowly (a degrading junction).
* ``sub7.flow``: flowmeter against pump speed, ``y = c0 + c1 n + c2 n^2``;
  its gain creeps upwards.
* ``sub7.return_dp``: differential-pressure transmitter against a redundant
  reference transmitter; it picks up an offset step part-way.
* ``sub7.stack_o2``: flue-gas O2 against boiler load, ARX with one lag; its
  noise depends on the load (operating point).
* ``sub7.return_temp``: return thermocouple against a reference probe; its
  noise is heavy-tailed (Student t with 3 degrees of freedom, 0.1 K standard
  deviation), healthy throughout. The reference probe publishes by exception
  (when it moves by more than 0.02 K), and is checked in a 60 °C bath for an hour
  every week (quality ``maintenance``): no sample of the channel forms then.
* ``sub7.level``: expansion-vessel level against the vessel pressure; the level
  transmitter resolves 5 cm (2.5 times its 2 cm noise) and publishes by
  exception, so the channel has a sample only when the level moved a step.

The plant publishes TAGS, one instrument signal per topic (:mod:`service.demo.instruments`): at every scan
(ten minutes of plant time) each channel's inputs, stamped 250 ms before its output, then its output; the
by-exception tags only when they change. :func:`larkspur_tag_updates` gives the published updates;
:func:`larkspur_substation7` the channel samples they form (a sample forms when a channel's output tag is
published, from the newest published value of each input, when every one is of good quality and young
enough), which is what the service assembles from the same messages.

The two healthy non-Gaussian channels draw from their own generator, spawned from ``rng`` (which it does
not advance), so the first four channels' samples are those of the four-channel plant.

Every number here is invented for the demo; nothing is measured plant data.
"""

from __future__ import annotations

import csv
import math
from collections.abc import Iterable, Iterator
from dataclasses import dataclass
from pathlib import Path

import numpy as np

from service.demo.instruments import CHANNELS, ChannelTags, by_tag

__all__ = ["DAY", "GOOD", "LEVEL_STEP", "START", "PlantSample", "TagUpdate", "formed_samples",
           "larkspur_substation7", "larkspur_tag_updates", "write_csv"]

DAY = 86400.0
START = 1_780_000_000.0   # an arbitrary epoch second (2026-05-28), the demo month's start
LEVEL_STEP = 0.05         # m, the level transmitter's resolution
INPUT_LEAD = 0.25         # s, inputs are read (and stamped) this long before their channel's output
GOOD = "good"
MAINTENANCE = "maintenance"
_BATH = 60.0              # degC, what the return reference probe reads in its calibration bath
_CHECK_DAY, _CHECK_SECONDS = 3.0, 3600.0    # the probe's weekly check: day 3 of each week, for an hour


@dataclass(frozen=True)
class PlantSample:
    """One sample of one channel, as the service forms it from the tags (``seq``: the scan's number)."""

    channel: str
    t: float
    y: float
    inputs: dict[str, float]
    seq: int


@dataclass(frozen=True)
class TagUpdate:
    """One published tag message: ``value`` in the tag's unit at ``t`` (epoch seconds, whole milliseconds).

    ``channel`` is the channel whose scan published it and ``sample_t`` that scan's output stamp (the time
    the channel's sample of the scan has, formed or not), so that a publisher can resume after a sample.
    """

    tag: str
    t: float
    value: float
    quality: str
    channel: str
    sample_t: float
    scan: int


@dataclass(frozen=True)
class _Scan:
    channel: ChannelTags
    k: int
    t: float                                   # the output's stamp
    readings: dict[str, tuple[float, str]]     # tag -> (value, quality): inputs first, then the output


def _in_check(t: float, start: float) -> bool:
    """Whether the return reference probe is in its weekly check at plant time ``t``."""
    return 0.0 <= (t - start) % (7.0 * DAY) - _CHECK_DAY * DAY < _CHECK_SECONDS


def _scans(rng: np.random.Generator, samples: int, step: float, start: float) -> Iterator[_Scan]:
    """Every instrument's reading at every scan, channel by channel in scan order."""
    supply_temp, flow, return_dp, stack_o2, return_temp, level_channel = CHANNELS
    o2_previous = 4.0
    (shaped,) = rng.spawn(1)
    for k in range(samples):
        t = start + k * step
        day = (t - start) / DAY
        daily = math.sin(2.0 * math.pi * day)

        ref_temp = 82.0 + 9.0 * daily + rng.normal(0.0, 1.5)
        junction_sigma = 0.12 * (1.0 + max(0.0, day - 8.0) * 0.12)   # grows from day 8
        supply = 0.35 + 1.002 * ref_temp + rng.normal(0.0, junction_sigma)
        yield _Scan(supply_temp, k, t, {"sub7.TT-102": (ref_temp, GOOD), "sub7.TT-101": (supply, GOOD)})

        speed = float(np.clip(0.7 + 0.2 * daily + rng.normal(0.0, 0.08), 0.3, 1.0))
        gain = 55.0 * (1.0 + 0.002 * max(0.0, day - 10.0))          # creeps from day 10
        flow_rate = 2.0 + gain * speed + 18.0 * speed * speed + rng.normal(0.0, 0.4)
        yield _Scan(flow, k, t + 1.0, {"sub7.SC-101": (speed, GOOD), "sub7.FT-101": (flow_rate, GOOD)})

        ref_dp = 48.0 + 6.0 * daily + rng.normal(0.0, 2.0)
        offset = 0.9 if day >= 18.0 else 0.0                            # step on day 18
        dp = 0.05 + 0.998 * ref_dp + offset + rng.normal(0.0, 0.15)
        yield _Scan(return_dp, k, t + 2.0, {"sub7.PDT-302": (ref_dp, GOOD), "sub7.PDT-301": (dp, GOOD)})

        load = float(np.clip(0.65 + 0.3 * daily + rng.normal(0.0, 0.05), 0.2, 1.0))
        o2_sigma = 0.04 * math.exp(1.6 * load)                          # noisier at high load
        o2 = 1.2 + 0.6 * o2_previous - 1.1 * load + rng.normal(0.0, o2_sigma)
        o2_previous = o2
        yield _Scan(stack_o2, k, t + 3.0, {"sub7.JT-401": (load, GOOD), "sub7.AT-401": (o2, GOOD)})

        ref_return = 55.0 + 6.0 * daily + shaped.normal(0.0, 1.0)
        heavy = 0.1 * shaped.standard_t(3.0) / math.sqrt(3.0)            # variance of t_3 is 3
        returned = 0.2 + 0.998 * ref_return + heavy
        probe = (_BATH, MAINTENANCE) if _in_check(t + 4.0, start) else (ref_return, GOOD)
        yield _Scan(return_temp, k, t + 4.0, {"sub7.TT-202": probe, "sub7.TT-201": (returned, GOOD)})

        pressure = 1.5 + 0.1 * daily + shaped.normal(0.0, 0.02)
        level = 0.4 + 0.9 * pressure + shaped.normal(0.0, 0.02)
        yield _Scan(level_channel, k, t + 5.0, {"sub7.PT-501": (pressure, GOOD),
                                                   "sub7.LT-501": (LEVEL_STEP * round(level / LEVEL_STEP), GOOD)})


def larkspur_tag_updates(rng: np.random.Generator, *, samples: int = 4320, step: float = 600.0,
                         start: float = START) -> Iterator[TagUpdate]:
    """The tag messages the plant publishes, in publication order.

    Parameters
    ----------
    rng : the only source of randomness
    samples : scans of the plant (4320 at 600 s = 30 days)
    step : seconds between scans
    """
    last: dict[str, tuple[float, str]] = {}
    for scan in _scans(rng, samples, step, start):
        output = scan.channel.output
        for tag, (value, quality) in scan.readings.items():
            deadband = by_tag(tag).deadband
            held = last.get(tag)
            if deadband is not None and held is not None and held[1] == quality and abs(value - held[0]) <= deadband:
                continue                                              # by exception: nothing new to say
            last[tag] = (value, quality)
            t = scan.t if tag == output else scan.t - INPUT_LEAD
            yield TagUpdate(tag, round(t * 1000.0) / 1000.0, value, quality, scan.channel.channel, scan.t, scan.k)


def formed_samples(updates: Iterable[TagUpdate]) -> Iterator[PlantSample]:
    """The channel samples published tag updates form, in order: one per good output update whose every input
    has a good published value stamped at or before it and no older than the input tag's ``max_age``."""
    outputs = {channel.output: channel for channel in CHANNELS}
    newest: dict[str, TagUpdate] = {}
    for update in updates:
        newest[update.tag] = update
        channel = outputs.get(update.tag)
        if channel is None or update.quality != GOOD:
            continue
        inputs: dict[str, float] = {}
        for name, tag in channel.inputs.items():
            held = newest.get(tag)
            if (held is None or held.quality != GOOD or held.t > update.t
                    or update.t - held.t > by_tag(tag).max_age):
                break
            inputs[name] = held.value
        else:
            yield PlantSample(channel.channel, update.t, update.value, inputs, update.scan)


def larkspur_substation7(rng: np.random.Generator, *, samples: int = 4320, step: float = 600.0,
                         start: float = START) -> Iterator[PlantSample]:
    """The samples the six demo channels form from the published tags, in time order (``samples``: scans)."""
    return formed_samples(larkspur_tag_updates(rng, samples=samples, step=step, start=start))


def write_csv(path: str | Path, seed: int = 7, samples: int = 4320) -> int:
    """Write the demo history (the formed samples) as one CSV with a ``channel`` column; returns the row count."""
    rng = np.random.default_rng(seed)
    inputs = [name for channel in CHANNELS for name in channel.inputs]
    rows = 0
    with Path(path).open("w", newline="", encoding="utf-8") as handle:
        writer = csv.writer(handle)
        writer.writerow(["t", "channel", "y", *inputs])
        for sample in larkspur_substation7(rng, samples=samples):
            writer.writerow([f"{sample.t:.0f}", sample.channel, repr(float(sample.y)),
                             *(repr(float(sample.inputs[name])) if name in sample.inputs else "" for name in inputs)])
            rows += 1
    return rows
