"""Noise of one variance in several shapes, and a DetectorBank run over many channels at once (our own Monte Carlo).

Shapes, each scaled to unit variance: ``gaussian``; ``t3`` and ``t5`` (Student t with
3 and 5 degrees of freedom, variance nu / (nu - 2)); ``laplace`` (scale 1 / sqrt 2);
``quantised`` (N(0, 1) published in steps of 1.5 sigma, each channel with its own
grid phase, the step's variance Delta^2 / 12 included before rescaling); ``spiky``
(N(0, 1) with 0.2 % of samples moved by 6 to 15 sigma of either sign, rescaled).

:func:`simulate` feeds innovations straight to a :class:`DetectorBank` (no
leverage, unit kappa): the channel's baseline sigma is the root mean square of
its own commissioning block, as :mod:`estimator.channels.group_watch` learns it, then the
noise-shape calibration, then the run proper, during which a change may start.
"""

from __future__ import annotations

import math
from collections.abc import Callable
from dataclasses import dataclass

import numpy as np
from numpy.typing import NDArray

from estimator.detection.baseline import Baseline
from estimator.detection.detectors import ConditionEvent, DetectorBank, DetectorSettings

__all__ = ["SHAPES", "Run", "noise", "simulate"]

FloatArray = NDArray[np.float64]
SHAPES = ("gaussian", "t3", "t5", "laplace", "quantised", "spiky")
QUANTUM = 1.5               # the quantised shape's step, sigma of the Gaussian before it is published
PERIOD = 10.0               # seconds between a channel's samples


def _spikes(rng: np.random.Generator, size: tuple[int, int]) -> FloatArray:
    hit = rng.random(size) < 0.002
    return np.where(hit, rng.choice([-1.0, 1.0], size) * rng.uniform(6.0, 15.0, size), 0.0)


SPIKE_VARIANCE = 1.0 + 0.002 * (15.0 ** 3 - 6.0 ** 3) / (3.0 * 9.0)     # E[U^2] for U ~ uniform(6, 15)


def noise(shape: str, rng: np.random.Generator, size: tuple[int, int], phase: FloatArray | None = None) -> FloatArray:
    """Unit-variance noise of ``shape``, ``size`` = (samples, channels); ``phase`` (channels,) for ``quantised``."""
    if shape == "gaussian":
        return rng.standard_normal(size)
    if shape in ("t3", "t5"):
        nu = float(shape[1])
        return rng.standard_t(nu, size) / math.sqrt(nu / (nu - 2.0))
    if shape == "laplace":
        return rng.laplace(0.0, 1.0 / math.sqrt(2.0), size)
    if shape == "quantised":
        offset = np.zeros(size[1]) if phase is None else phase
        x = rng.standard_normal(size) + offset
        return (QUANTUM * np.round(x / QUANTUM) - offset) / math.sqrt(1.0 + QUANTUM ** 2 / 12.0)
    if shape == "spiky":
        return (rng.standard_normal(size) + _spikes(rng, size)) / math.sqrt(SPIKE_VARIANCE)
    raise ValueError(f"shape must be one of {', '.join(SHAPES)}, got {shape!r}")


@dataclass
class Run:
    """Condition events of a run, per channel, with times in samples since the run proper began."""

    channels: int
    samples: int
    events: list[ConditionEvent]

    def first_raise(self, kind: str) -> FloatArray:
        """Samples (channels,) to each channel's first raise of ``kind``; NaN where it never rose."""
        first = np.full(self.channels, np.nan)
        for e in self.events:
            if e.kind == kind and e.active and math.isnan(first[e.index]):
                first[e.index] = e.t / PERIOD
        return first

    def raises(self, kind: str) -> int:
        return sum(1 for e in self.events if e.kind == kind and e.active)

    def quickest_repeat(self, kind: str) -> float:
        """Shortest time (s) between two raises of ``kind`` on one channel (inf: none raised twice)."""
        last_raise: dict[int, float] = {}
        best = math.inf
        for e in self.events:
            if e.kind == kind and e.active:
                if e.index in last_raise:
                    best = min(best, e.t - last_raise[e.index])
                last_raise[e.index] = e.t
        return best

    def quickest_return(self, kind: str) -> float:
        """Shortest time (s) from a clear of ``kind`` to its next raise on the same channel (inf: none)."""
        last_clear: dict[int, float] = {}
        best = math.inf
        for e in self.events:
            if e.kind != kind:
                continue
            if not e.active:
                last_clear[e.index] = e.t
            elif e.index in last_clear:
                best = min(best, e.t - last_clear[e.index])
        return best


def simulate(shape: str, settings: DetectorSettings, channels: int, samples: int, seed: int,
             change: Callable[[FloatArray, int], FloatArray] | None = None, commissioning: int = 1000) -> Run:
    """Run ``channels`` channels of ``shape`` noise through one DetectorBank.

    ``change(eps, n)`` turns the innovations (channels,) of sample ``n`` of the run proper
    into those of the changed channels (None: in control throughout). ``commissioning`` 0: the
    baseline sigma is the true one, 1, rather than learned.
    """
    rng = np.random.default_rng(seed)
    phase = rng.uniform(0.0, QUANTUM, channels)
    bank = DetectorBank([settings] * channels, 2)
    sigma = (np.sqrt(np.mean(noise(shape, rng, (commissioning, channels), phase) ** 2, axis=0)) if commissioning
             else np.ones(channels))
    for i in range(channels):
        bank.set_baseline(i, Baseline(1, "learned", np.zeros(2), np.zeros((2, 2)), float(sigma[i]),
                                      t=-1e12, samples=commissioning))
    idx = np.arange(channels, dtype=np.intp)
    zeros, ones = np.zeros(channels), np.ones(channels)
    v_ref = sigma ** 2
    calibration = settings.calibration_samples
    block = 1000
    starts = [*range(-calibration, 0, block), *range(0, samples, block)]
    for start in starts:
        stop = min(start + block, 0 if start < 0 else samples)
        eps = noise(shape, rng, (stop - start, channels), phase)
        for j, n in enumerate(range(start, stop)):
            e = eps[j] if change is None or n < 0 else change(eps[j], n)
            bank.step(idx, np.full(channels, n * PERIOD), e, zeros, ones, v_ref)
        if stop == 0:
            bank.take_events()                      # calibration: nothing judged, nothing counted
    return Run(channels, samples, bank.take_events())
