"""A channel's settings and the per-sample rules: which samples are refused, what weight the rest get.

The order of work for an accepted sample k is fixed, and is the same offline
(``rwls replay``) and live:

1. ``z_k`` from the term list and the channel's lag buffers;
2. the weight ``w_k`` from the channel's weighting (below) times any matching
   application rule;
3. the recursive WLS update, which yields the innovation and its leverage;
4. the noise tracker (and operating-point model) learn from that innovation;
5. the sample enters the lag buffers.

Weighting:

* ``unit``: ``w = 1`` (ordinary least squares with forgetting);
* ``sample``: ``w = 1 / sigma^2`` from the sample's ``sigma``, else its
  ``weight``; with ``W = R^-1`` weighted least squares is the BLUE (Aitken 1935);
* ``tracked``: ``w = 1 / sigma_hat^2`` with ``sigma_hat^2`` the tracked noise
  variance made before sample k (no look-ahead), or the operating-point model's
  prediction at the sample's operating point; ``1 / initial_sigma^2`` until the
  tracker has warmed up.

Application rules multiply ``w`` when an input lies in a band, e.g. to count
samples near an operating limit k times because that is where the plant needs
accuracy. That is an engineering choice, not the BLUE, and is reported as such.
"""

from __future__ import annotations

import math
from collections.abc import Mapping
from dataclasses import dataclass, field
from enum import StrEnum
from functools import cached_property

from estimator.channels.regressors import RegressorSpec
from estimator.detection.detectors import DetectorSettings
from estimator.recursive.sample_refusal import SampleRefusal
from estimator.recursive.weight_rule import sigma_is_usable, weight_is_usable

__all__ = ["WEIGHTINGS", "ChannelCounters", "ChannelSettings", "PathTuning", "Prepared", "Sample", "SampleOutcome",
           "WeightRule", "Weighting", "check_sample", "sample_weight"]

class Weighting(StrEnum):
    """Where a sample's weight comes from (W = R^-1, one diagonal entry per sample)."""

    UNIT = "unit"          # every sample weight 1: ordinary least squares
    SAMPLE = "sample"      # the sample's own sigma or weight, from its message
    TRACKED = "tracked"    # 1 / the noise-variance tracker's estimate


WEIGHTINGS = tuple(Weighting)


@dataclass(frozen=True)
class WeightRule:
    """Multiply the weight by ``factor`` when ``low <= input <= high``."""

    input: str
    low: float
    high: float
    factor: float

    def __post_init__(self) -> None:
        if not (math.isfinite(self.low) and math.isfinite(self.high) and self.low <= self.high):
            raise ValueError(f"weight rule on {self.input!r}: need finite low <= high, got {self.low}, {self.high}")
        if not (math.isfinite(self.factor) and self.factor > 0.0):
            raise ValueError(f"weight rule on {self.input!r}: factor must be finite and > 0, got {self.factor}")


@dataclass(frozen=True)
class ChannelSettings:
    """Everything that defines one channel's estimator (no I/O names)."""

    terms: tuple[str, ...]
    forgetting_factor: float = 1.0
    weighting: Weighting = Weighting.UNIT
    weight_rules: tuple[WeightRule, ...] = ()
    covariance_limit: float = 1e6
    covariance_scale: str = "estimated"
    noise_half_life: float = 200.0
    noise_half_life_in_seconds: bool = False
    noise_robust: bool = False
    noise_warmup: int = 10
    initial_sigma: float = 1.0
    noise_model_terms: tuple[str, ...] = ()
    noise_model_forgetting_factor: float = 0.999
    detectors: DetectorSettings = field(default_factory=DetectorSettings)

    def __post_init__(self) -> None:
        if self.weighting not in WEIGHTINGS:
            raise ValueError(f"weighting must be one of {', '.join(WEIGHTINGS)}, got {self.weighting!r}")
        if not (0.0 < self.forgetting_factor <= 1.0):
            raise ValueError(f"forgetting_factor must be in (0, 1], got {self.forgetting_factor}")
        if not (math.isfinite(self.initial_sigma) and self.initial_sigma > 0.0):
            raise ValueError(f"initial_sigma must be finite and > 0, got {self.initial_sigma}")

    @cached_property
    def input_names(self) -> tuple[str, ...]:
        """Every input the channel reads: terms, rules and operating-point terms (worked out once)."""
        names = set(RegressorSpec(self.terms).input_names)
        names.update(rule.input for rule in self.weight_rules)
        if self.noise_model_terms:
            names.update(RegressorSpec(self.noise_model_terms).input_names)
        return tuple(sorted(names))


@dataclass
class SampleOutcome:
    """What happened to one sample: ``applied``, ``warmup`` or ``refused`` (with a reason)."""

    status: str
    reason: str = ""
    innovation: float = math.nan
    leverage: float = math.inf
    weight: float = math.nan
    regressor: list[float] | None = None


@dataclass(frozen=True)
class Sample:
    """One measurement for one channel, as ingest or a CSV row delivers it."""

    channel: str
    y: float
    inputs: Mapping[str, float]
    t: float | None = None
    sigma: float | None = None
    weight: float | None = None
    seq: int | None = None


@dataclass(slots=True)      # slots: one per channel
class ChannelCounters:
    """Samples applied, held for lag warm-up, and refused by reason."""

    applied: int = 0
    warmup: int = 0
    refused: dict[str, int] = field(default_factory=dict)


@dataclass
class Prepared:
    """A sample that passed the channel's checks, ready for the recursive update."""

    sample: Sample
    z: list[float]
    z_noise: list[float] | None
    weight: float


def check_sample(settings: ChannelSettings, sample: Sample, last_t: float | None,
                 last_seq: int | None = None) -> SampleRefusal | None:
    """The reason a sample is refused before any regressor is built, or None.

    Order: sequence number (a redelivered or replayed message), non-finite
    values, sigma and weight signs, time ordering, time required by a half-life
    in seconds, inputs present. ``last_t`` and ``last_seq`` belong to the last
    accepted sample, so a refused sample never blocks the ones after it.
    """
    if sample.seq is not None and last_seq is not None and sample.seq <= last_seq:
        return SampleRefusal.DUPLICATE_SEQ if sample.seq == last_seq else SampleRefusal.OUT_OF_ORDER_SEQ
    values = [sample.y, *sample.inputs.values()]
    if sample.sigma is not None:
        values.append(sample.sigma)
    if sample.weight is not None:
        values.append(sample.weight)
    if not all(math.isfinite(v) for v in values):
        return SampleRefusal.NON_FINITE
    if sample.sigma is not None and not sigma_is_usable(sample.sigma):
        return SampleRefusal.BAD_SIGMA         # sigma <= 0, or so small or large that 1 / sigma^2 is no weight
    if sample.weight is not None and not weight_is_usable(sample.weight):
        return SampleRefusal.BAD_WEIGHT
    t = sample.t
    if t is not None and not math.isfinite(t):
        return SampleRefusal.BAD_TIME
    if t is not None and last_t is not None and t <= last_t:
        return SampleRefusal.DUPLICATE_TIME if t == last_t else SampleRefusal.OUT_OF_ORDER
    if t is None and settings.noise_half_life_in_seconds:
        return SampleRefusal.MISSING_TIME          # a half-life in seconds needs the sample's time
    for name in settings.input_names:
        if name not in sample.inputs:
            return SampleRefusal.MISSING_INPUT
    return None


def sample_weight(settings: ChannelSettings, sample: Sample, tracked_variance: float) -> float | None:
    """The weight of a sample (see the module docstring); None when ``sample`` weighting has nothing.

    ``tracked_variance`` is the noise variance known before this sample (NaN
    when there is none yet), used by ``tracked`` weighting.
    """
    if settings.weighting == Weighting.UNIT:
        w = 1.0
    elif settings.weighting == Weighting.SAMPLE:
        if sample.sigma is not None:
            w = 1.0 / (sample.sigma * sample.sigma)
        elif sample.weight is not None:
            w = sample.weight
        else:
            return None
    else:
        variance = tracked_variance
        if not (math.isfinite(variance) and variance > 0.0):
            variance = settings.initial_sigma * settings.initial_sigma
        w = 1.0 / variance
    for rule in settings.weight_rules:
        if rule.low <= sample.inputs[rule.input] <= rule.high:
            w = w * rule.factor
    return w


@dataclass(frozen=True)
class PathTuning:
    """Where the vectorised paths start to pay (speed only: every choice gives the same bits).

    ``vector_min``: fewest channels in a round worth one vectorised step; a step
    costs some 80 us whatever its width (n = 2, measured), a scalar update some
    10 us. ``column_min_samples``: fewest samples in a group's micro-batch worth
    the column path's fixed cost, some 200 us of whole-array preparation.
    """

    vector_min: int = 8
    column_min_samples: int = 256

    def __post_init__(self) -> None:
        if self.vector_min < 1 or self.column_min_samples < 1:
            raise ValueError(f"vector_min and column_min_samples must be >= 1, got {self}")
