"""What a replay went through, channel by channel, for the commissioning report's plots and comparisons.

Two records per channel:

* a **trajectory** of the estimates after applied samples (parameters, standard errors, noise sigma,
  detector statistics and limits, the innovation and its predicted spread). It is bounded: once it
  holds ``max_points`` points, every other point is dropped and only every second sample from then on
  is kept, so a year of data costs no more memory than a week, and the points stay evenly spread;
* the applied **rows** (regressor, output, weight), for the batch OLS and WLS fits side by side.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field
from typing import Any

import numpy as np

from estimator import DETECTOR_KINDS, ChannelBank

__all__ = ["ChannelTrace", "ReplayTrace"]


@dataclass
class ChannelTrace:
    """One channel's trajectory (lists of equal length) and applied rows."""

    t: list[float] = field(default_factory=list)                  # sample time, or the sample's number
    parameters: list[list[float]] = field(default_factory=list)   # (points, n)
    std_errors: list[list[float]] = field(default_factory=list)   # (points, n)
    noise_sigma: list[float] = field(default_factory=list)
    innovation: list[float] = field(default_factory=list)
    spread: list[float] = field(default_factory=list)
    statistics: dict[str, list[float]] = field(default_factory=lambda: {k: [] for k in DETECTOR_KINDS})
    limits: dict[str, list[float]] = field(default_factory=lambda: {k: [] for k in DETECTOR_KINDS})
    stride: int = 1                      # samples per kept point
    seen: int = 0                        # applied samples so far
    Z: list[list[float]] = field(default_factory=list)
    y: list[float] = field(default_factory=list)
    weight: list[float] = field(default_factory=list)

    def _thin(self) -> None:
        series: list[list[Any]] = [self.t, self.parameters, self.std_errors, self.noise_sigma, self.innovation,
                                   self.spread, *self.statistics.values(), *self.limits.values()]
        for values in series:
            del values[1::2]
        self.stride *= 2


class ReplayTrace:
    """Collects :class:`ChannelTrace` records during :func:`service.offline.replay.replay_file`."""

    def __init__(self, max_points: int = 600) -> None:
        if max_points < 2:
            raise ValueError(f"max_points must be at least 2, got {max_points}")
        self.max_points = max_points
        self.channels: dict[str, ChannelTrace] = {}

    def row(self, channel: str, z: list[float], y: float, weight: float) -> None:
        """An applied sample's regressor, output and weight."""
        trace = self.channels.setdefault(channel, ChannelTrace())
        trace.Z.append(list(z))
        trace.y.append(y)
        trace.weight.append(weight)

    def observe(self, bank: ChannelBank, channel: str, t: float | None) -> None:
        """After an applied sample of ``channel``: keep the estimates now, if this sample's point is due."""
        trace = self.channels.setdefault(channel, ChannelTrace())
        trace.seen += 1
        if (trace.seen - 1) % trace.stride:
            return
        view = bank.view([channel])[channel]
        trace.t.append(float(t) if t is not None else float(trace.seen))
        trace.parameters.append(np.asarray(view.parameters, dtype=float).tolist())
        trace.std_errors.append(np.asarray(view.std_errors, dtype=float).tolist())
        trace.noise_sigma.append(float(view.noise_sigma))
        trace.innovation.append(float(view.last_innovation))
        trace.spread.append(float(view.last_spread))
        for kind in DETECTOR_KINDS:
            reading = view.detectors.get(kind)
            trace.statistics[kind].append(reading.statistic if reading is not None else math.nan)
            trace.limits[kind].append(reading.limit if reading is not None else math.nan)
        if len(trace.t) >= self.max_points:
            trace._thin()
