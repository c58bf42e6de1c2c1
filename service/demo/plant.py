"""The invented demo plant: Larkspur Valley district heating, substation 7 (fictional).

Four channels, each but the last with a fault that develops over a month of
compressed time, and two healthy channels whose noise is not Gaussian:

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
  deviation), healthy throughout.
* ``sub7.level``: expansion-vessel level against the vessel pressure,
  published in coarse steps of 5 cm (2.5 times its 2 cm noise), healthy
  throughout.

The two healthy non-Gaussian channels draw from their own generator, spawned
from ``rng`` (which it does not advance), so the first four channels' samples
are those of the four-channel plant.

Every number here is invented for the demo; nothing is measured plant data.
"""

from __future__ import annotations

import csv
import math
from collections.abc import Iterator
from dataclasses import dataclass
from pathlib import Path

import numpy as np

__all__ = ["PlantSample", "larkspur_substation7", "write_csv"]

DAY = 86400.0
START = 1_780_000_000.0   # an arbitrary epoch second (2026-05-28), the demo month's start
LEVEL_STEP = 0.05         # m, the level transmitter's published resolution


@dataclass(frozen=True)
class PlantSample:
    """One published sample of one channel."""

    channel: str
    t: float
    y: float
    inputs: dict[str, float]
    seq: int


def larkspur_substation7(rng: np.random.Generator, *, samples: int = 4320, step: float = 600.0,
                         start: float = START) -> Iterator[PlantSample]:
    """Samples of the six demo channels, interleaved in time order.

    Parameters
    ----------
    rng : the only source of randomness
    samples : samples per channel (4320 at 600 s = 30 days)
    step : seconds between samples of a channel
    """
    o2_previous = 4.0
    (shaped,) = rng.spawn(1)
    for k in range(samples):
        t = start + k * step
        day = (t - start) / DAY
        daily = math.sin(2.0 * math.pi * day)

        ref_temp = 82.0 + 9.0 * daily + rng.normal(0.0, 1.5)
        junction_sigma = 0.12 * (1.0 + max(0.0, day - 8.0) * 0.12)   # grows from day 8
        supply = 0.35 + 1.002 * ref_temp + rng.normal(0.0, junction_sigma)
        yield PlantSample("sub7.supply_temp", t, supply, {"ref_temp": ref_temp}, k)

        speed = float(np.clip(0.7 + 0.2 * daily + rng.normal(0.0, 0.08), 0.3, 1.0))
        gain = 55.0 * (1.0 + 0.002 * max(0.0, day - 10.0))          # creeps from day 10
        flow = 2.0 + gain * speed + 18.0 * speed * speed + rng.normal(0.0, 0.4)
        yield PlantSample("sub7.flow", t + 1.0, flow, {"pump_speed": speed}, k)

        ref_dp = 48.0 + 6.0 * daily + rng.normal(0.0, 2.0)
        offset = 0.9 if day >= 18.0 else 0.0                            # step on day 18
        dp = 0.05 + 0.998 * ref_dp + offset + rng.normal(0.0, 0.15)
        yield PlantSample("sub7.return_dp", t + 2.0, dp, {"ref_dp": ref_dp}, k)

        load = float(np.clip(0.65 + 0.3 * daily + rng.normal(0.0, 0.05), 0.2, 1.0))
        o2_sigma = 0.04 * math.exp(1.6 * load)                          # noisier at high load
        o2 = 1.2 + 0.6 * o2_previous - 1.1 * load + rng.normal(0.0, o2_sigma)
        o2_previous = o2
        yield PlantSample("sub7.stack_o2", t + 3.0, o2, {"load": load}, k)

        ref_return = 55.0 + 6.0 * daily + shaped.normal(0.0, 1.0)
        heavy = 0.1 * shaped.standard_t(3.0) / math.sqrt(3.0)            # variance of t_3 is 3
        yield PlantSample("sub7.return_temp", t + 4.0, 0.2 + 0.998 * ref_return + heavy, {"ref_return": ref_return},
                          k)

        pressure = 1.5 + 0.1 * daily + shaped.normal(0.0, 0.02)
        level = 0.4 + 0.9 * pressure + shaped.normal(0.0, 0.02)
        yield PlantSample("sub7.level", t + 5.0, LEVEL_STEP * round(level / LEVEL_STEP), {"pressure": pressure}, k)


def write_csv(path: str | Path, seed: int = 7, samples: int = 4320) -> int:
    """Write the demo history as one CSV with a ``channel`` column; returns the row count."""
    rng = np.random.default_rng(seed)
    inputs = ["ref_temp", "pump_speed", "ref_dp", "load", "ref_return", "pressure"]
    rows = 0
    with Path(path).open("w", newline="", encoding="utf-8") as handle:
        writer = csv.writer(handle)
        writer.writerow(["t", "channel", "y", *inputs])
        for sample in larkspur_substation7(rng, samples=samples):
            writer.writerow([f"{sample.t:.0f}", sample.channel, repr(float(sample.y)),
                             *(repr(float(sample.inputs[name])) if name in sample.inputs else "" for name in inputs)])
            rows += 1
    return rows
