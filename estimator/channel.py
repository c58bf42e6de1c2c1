"""One channel's sample pipeline: regressor, weight, recursive update, noise tracking.

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

from estimator.log_variance import LogVarianceModel
from estimator.regressors import NotUsable, RegressorBuilder, RegressorSpec
from estimator.rwls import RejectedSample
from estimator.rwls_scalar import ScalarRecursiveWLS
from estimator.variance import NoiseVarianceTracker

__all__ = ["ChannelPipeline", "ChannelSettings", "SampleOutcome", "WeightRule"]

WEIGHTINGS = ("unit", "sample", "tracked")


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
    weighting: str = "unit"
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

    def __post_init__(self) -> None:
        if self.weighting not in WEIGHTINGS:
            raise ValueError(f"weighting must be one of {', '.join(WEIGHTINGS)}, got {self.weighting!r}")
        if not (0.0 < self.forgetting_factor <= 1.0):
            raise ValueError(f"forgetting_factor must be in (0, 1], got {self.forgetting_factor}")
        if not (math.isfinite(self.initial_sigma) and self.initial_sigma > 0.0):
            raise ValueError(f"initial_sigma must be finite and > 0, got {self.initial_sigma}")

    @property
    def input_names(self) -> tuple[str, ...]:
        """Every input the channel reads: terms, rules and operating-point terms."""
        names = set(RegressorSpec(self.terms).input_names)
        names.update(rule.input for rule in self.weight_rules)
        if self.noise_model_terms:
            names.update(RegressorSpec(self.noise_model_terms).input_names)
        return tuple(sorted(names))


@dataclass
class SampleOutcome:
    """What happened to one sample: ``applied``, ``warmup`` or ``rejected`` (with a reason)."""

    status: str
    reason: str = ""
    innovation: float = math.nan
    leverage: float = math.inf
    weight: float = math.nan
    regressor: list[float] | None = None


@dataclass
class _Counters:
    applied: int = 0
    warmup: int = 0
    rejected: dict[str, int] = field(default_factory=dict)


class ChannelPipeline:
    """The pipeline of one channel, on the scalar (one-sample) paths."""

    def __init__(self, settings: ChannelSettings) -> None:
        self.settings = settings
        self.spec = RegressorSpec(settings.terms)
        self.builder = RegressorBuilder(self.spec)
        self.estimator = ScalarRecursiveWLS(self.spec.n_params, settings.forgetting_factor,
                                            settings.covariance_limit)
        self.tracker = NoiseVarianceTracker(
            1, settings.noise_half_life, time_based=settings.noise_half_life_in_seconds,
            robust=settings.noise_robust, warmup=settings.noise_warmup)
        self.noise_spec = RegressorSpec(settings.noise_model_terms) if settings.noise_model_terms else None
        self.noise_model = (LogVarianceModel(1, self.noise_spec.n_params,
                                             settings.noise_model_forgetting_factor)
                            if self.noise_spec is not None else None)
        self._noise_builder = RegressorBuilder(self.noise_spec) if self.noise_spec is not None else None
        self.counters = _Counters()
        self.last_t: float | None = None
        self._last_tracked_t: float | None = None

    def _reject(self, reason: str) -> SampleOutcome:
        self.counters.rejected[reason] = self.counters.rejected.get(reason, 0) + 1
        return SampleOutcome("rejected", reason)

    def weight_for(self, inputs: Mapping[str, float], sigma: float | None, weight: float | None,
                   z_noise: list[float] | None) -> float:
        """The weight of a sample (see the module docstring); raises ValueError ``missing_weight``."""
        s = self.settings
        if s.weighting == "unit":
            w = 1.0
        elif s.weighting == "sample":
            if sigma is not None:
                w = 1.0 / (sigma * sigma)
            elif weight is not None:
                w = weight
            else:
                raise ValueError("missing_weight")
        else:
            variance = math.nan
            if self.noise_model is not None and z_noise is not None:
                variance = self.noise_model.variance_one(0, z_noise)
            if not math.isfinite(variance):
                variance = self.tracker.variance_one(0)
            if not (math.isfinite(variance) and variance > 0.0):
                variance = s.initial_sigma * s.initial_sigma
            w = 1.0 / variance
        for rule in s.weight_rules:
            if rule.low <= inputs[rule.input] <= rule.high:
                w = w * rule.factor
        return w

    def apply(self, inputs: Mapping[str, float], y: float, *, t: float | None = None,
              sigma: float | None = None, weight: float | None = None) -> SampleOutcome:
        """Apply one sample; never raises on bad data, returns the outcome instead.

        Parameters
        ----------
        inputs : mapping of input name to float
        y : float
        t : float, optional
            Epoch seconds; must increase strictly from sample to sample when given.
        sigma, weight : float, optional
            Per-sample noise standard deviation or weight (``sample`` weighting).
        """
        values = [y, *inputs.values()]
        if sigma is not None:
            values.append(sigma)
        if weight is not None:
            values.append(weight)
        if not all(math.isfinite(v) for v in values):
            return self._reject("non_finite")
        if sigma is not None and sigma <= 0.0:
            return self._reject("bad_sigma")
        if weight is not None and weight <= 0.0:
            return self._reject("bad_weight")
        if t is not None and self.last_t is not None and t <= self.last_t:
            return self._reject("duplicate_time" if t == self.last_t else "out_of_order")
        if t is None and self.settings.noise_half_life_in_seconds:
            return self._reject("missing_time")     # a half-life in seconds needs the sample's time
        for name in self.settings.input_names:
            if name not in inputs:
                return self._reject("missing_input")
        try:
            z = self.builder.row(inputs)
            z_noise = self._noise_builder.row(inputs) if self._noise_builder is not None else None
        except NotUsable as exc:
            if exc.reason != "lags_not_filled":
                return self._reject(exc.reason)
            self._accept_without_update(inputs, y, t)
            self.counters.warmup += 1
            return SampleOutcome("warmup")
        try:
            w = self.weight_for(inputs, sigma, weight, z_noise)
        except ValueError:
            return self._reject("missing_weight")
        if not (math.isfinite(w) and w > 0.0):
            return self._reject("bad_weight")
        kappa = self.estimator.kappa()
        try:
            innovation, leverage = self.estimator.update(z, y, w)
        except RejectedSample as exc:
            return self._reject(exc.reason)
        elapsed = None
        if self.settings.noise_half_life_in_seconds and self._last_tracked_t is not None:
            elapsed = t - self._last_tracked_t     # > 0: t is present and strictly increasing here
        if self.tracker.update_one(0, innovation, leverage, kappa, elapsed) and t is not None:
            self._last_tracked_t = t
        if self.noise_model is not None and z_noise is not None:
            self.noise_model.update_one(0, z_noise, innovation, leverage, kappa)
        self._accept_without_update(inputs, y, t)
        self.counters.applied += 1
        return SampleOutcome("applied", innovation=innovation, leverage=leverage, weight=w, regressor=z)

    def _accept_without_update(self, inputs: Mapping[str, float], y: float, t: float | None) -> None:
        self.builder.push(inputs, y)
        if self._noise_builder is not None:
            self._noise_builder.push(inputs, y)
        if t is not None:
            self.last_t = t

    @property
    def noise_sigma(self) -> float:
        """Tracked noise standard deviation, NaN until warmed up."""
        variance = self.tracker.variance_one(0)
        return math.sqrt(variance) if math.isfinite(variance) and variance >= 0.0 else math.nan
