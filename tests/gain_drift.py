"""A slow gain drift on channels ``y = 1 + b u + noise`` through the whole ChannelBank (our own Monte Carlo).

Each channel commissions (its baseline), calibrates its noise shape, runs
in control for a while, then its gain ``b`` creeps upward by a fixed amount per
sample; :func:`first_alarms` gives the samples from the drift's start to the
first raise of each detector.
"""

from __future__ import annotations

import math

import numpy as np
from numpy.typing import NDArray

from estimator.channels.channel import ChannelSettings
from estimator.channels.channel_bank import ChannelBank
from estimator.channels.sample_columns import SampleColumns
from estimator.detection.detectors import DetectorSettings
from tests.noise_shapes import PERIOD, QUANTUM, noise

__all__ = ["first_alarms", "raises"]

FloatArray = NDArray[np.float64]
SIGMA = 0.2                 # noise standard deviation, engineering units


def first_alarms(shape: str, channels: int, seed: int, *, rate: float, before: int, after: int,
                 detectors: DetectorSettings | None = None) -> dict[str, FloatArray]:
    """Samples (channels,) from the drift's start to each kind's first raise (NaN: never; negative: before it).

    ``rate``: gain change per sample (the gain starts at 0.5); ``before``: samples before the drift starts,
    commissioning and calibration included; ``after``: samples of drift.
    """
    first: dict[str, FloatArray] = {}
    for channel, kind, active, sample in raises(shape, channels, seed, rate=rate, before=before, after=after,
                                                detectors=detectors):
        row = first.setdefault(kind, np.full(channels, np.nan))
        if active and math.isnan(row[channel]):
            row[channel] = sample - before
    return first


def raises(shape: str, channels: int, seed: int, *, rate: float, before: int, after: int,
           detectors: DetectorSettings | None = None) -> list[tuple[int, str, bool, float]]:
    """Every condition change of the run of :func:`first_alarms`: (channel, kind, active, sample), in order."""
    settings = ChannelSettings(terms=("1", "u"), forgetting_factor=0.995,
                               detectors=detectors if detectors is not None else DetectorSettings())
    ids = [f"c{k}" for k in range(channels)]
    bank = ChannelBank(dict.fromkeys(ids, settings))
    rng = np.random.default_rng(seed)
    phase = rng.uniform(0.0, QUANTUM, channels)
    total = before + after
    out: list[tuple[int, str, bool, float]] = []
    block = 500
    for start in range(0, total, block):
        stop = min(start + block, total)
        n = np.arange(start, stop)
        u = rng.standard_normal((stop - start, channels))
        gain = 0.5 + rate * np.maximum(0, n - before)[:, None]
        y = 1.0 + gain * u + SIGMA * noise(shape, rng, (stop - start, channels), phase)
        times = (n * PERIOD).tolist()
        none = [None] * (stop - start)
        bank.apply_columns({cid: SampleColumns(y=y[:, k].tolist(), inputs={"u": u[:, k].tolist()}, t=times,
                                               sigma=none, weight=none, seq=none) for k, cid in enumerate(ids)})
        for event in bank.take_events():
            c = event.condition
            if c is not None:
                out.append((ids.index(event.channel), c.kind, c.active, c.t / PERIOD))
    return out
