"""What readers see of channels: one :class:`ChannelView` each, or many at once as a :class:`ViewBlock`.

A view block is taken in whole-array steps across the channels of one group (one numpy call per
statistic, one list per counter); a channel's :class:`ChannelView` is built from it only when asked
for. Readers that need a few numbers of many channels (a snapshot's quality, its history rows) read
them from the block and never pay for thousands of view objects nobody looks at.
"""

from __future__ import annotations

import math
from collections.abc import Mapping
from dataclasses import dataclass, field
from typing import NamedTuple

import numpy as np
from numpy.typing import NDArray

from estimator.channels.channel import ChannelSettings
from estimator.detection.baseline import Baseline
from estimator.detection.detectors import KINDS

__all__ = ["ChannelView", "DetectorReading", "ViewBlock"]

FloatArray = NDArray[np.float64]


class DetectorReading(NamedTuple):
    """One detector of one channel: latest statistic, its limit, and whether its alarm condition is active."""

    statistic: float
    limit: float
    active: bool


@dataclass(frozen=True)
class ChannelView:
    """One channel's state for readers (its arrays are fresh, never views of live state; NaN where unknown).

    Attributes
    ----------
    parameters, std_errors : shape (n,)
    covariance : shape (n, n), scaled as the channel's ``covariance_scale`` says
    """

    channel: str
    terms: tuple[str, ...]
    parameters: FloatArray
    std_errors: FloatArray
    covariance: FloatArray
    residual_sd: float
    dof: float
    noise_sigma: float
    effective_count: float
    min_information: float
    information_condition: float
    identifiable: bool
    applied: int
    warmup: int
    refused: dict[str, int]
    last_t: float | None
    settings: ChannelSettings
    baseline: Baseline | None = None
    detectors: Mapping[str, DetectorReading] = field(default_factory=dict)
    commissioned: int = 0                 # samples applied since the start or the last reset
    last_innovation: float = math.nan     # the newest applied sample's innovation (prediction error)
    last_spread: float = math.nan         # its predicted standard deviation, sqrt(sigma^2 (1 + kappa z^T P z))


@dataclass(frozen=True, eq=False)
class ViewBlock:
    """The state of ``m`` channels of one group (``n`` parameters each), taken at one moment.

    Arrays have the channels on their first axis: ``parameters`` and ``std_errors`` ``(m, n)``,
    ``covariance`` ``(m, n, n)``; ``statistics``, ``limits`` and ``active`` ``(m, 4)``, each row a
    channel's detector readings in :data:`~estimator.detection.detectors.KINDS` order; the other
    numbers are ``(m,)`` arrays (float64, bool for ``identifiable`` and ``estimable``, int for
    ``commissioned``). Counters, times and objects are lists of length ``m``. Nothing here refers to
    live state: the arrays are fresh and the dicts copies. :meth:`view` gives one channel in Python
    numbers.
    """

    channels: list[str]
    terms: list[tuple[str, ...]]
    settings: list[ChannelSettings]
    parameters: FloatArray
    std_errors: FloatArray
    covariance: FloatArray
    residual_sd: FloatArray
    dof: FloatArray
    noise_sigma: FloatArray
    effective_count: FloatArray
    min_information: FloatArray
    information_condition: FloatArray
    identifiable: NDArray[np.bool_]
    estimable: NDArray[np.bool_]          # identifiable, with every parameter finite
    applied: list[int]
    warmup: list[int]
    refused: list[dict[str, int]]
    last_t: list[float | None]
    baseline: list[Baseline | None]
    commissioned: NDArray[np.int64]
    statistics: FloatArray
    limits: FloatArray
    active: NDArray[np.bool_]
    last_innovation: FloatArray
    last_spread: FloatArray

    def __len__(self) -> int:
        return len(self.channels)

    def view(self, k: int) -> ChannelView:
        """The :class:`ChannelView` of the block's ``k``-th channel."""
        readings = map(DetectorReading, self.statistics[k].tolist(), self.limits[k].tolist(), self.active[k].tolist())
        return ChannelView(
            channel=self.channels[k], terms=self.terms[k], parameters=self.parameters[k],
            std_errors=self.std_errors[k], covariance=self.covariance[k], residual_sd=float(self.residual_sd[k]),
            dof=float(self.dof[k]), noise_sigma=float(self.noise_sigma[k]),
            effective_count=float(self.effective_count[k]), min_information=float(self.min_information[k]),
            information_condition=float(self.information_condition[k]), identifiable=bool(self.identifiable[k]),
            applied=self.applied[k], warmup=self.warmup[k], refused=self.refused[k], last_t=self.last_t[k],
            settings=self.settings[k], baseline=self.baseline[k], commissioned=int(self.commissioned[k]),
            detectors=dict(zip(KINDS, readings, strict=True)),
            last_innovation=float(self.last_innovation[k]), last_spread=float(self.last_spread[k]))
