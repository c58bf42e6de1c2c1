"""Configuration of detectors and alarms: per channel ``detectors`` and ``alarms`` tables, plant-wide ``[alarms]``.

```toml
[channels."sub7.flow".detectors]
commissioning_samples = 1000            # learn the baseline after this many samples; 0: wait for one
calibration_samples = 1000              # then learn the noise's shape from this many; 0: take it as Gaussian
noise = { ratio = 2.0, high = 1.5, half_life = 200 }
variance = { ratio = 2.0, h = 60, clip = 3.0 }
offset = { k = 1.0, h = 8, clip = 4.0, scale_half_life = 100 }
drift = { alpha = 1e-6, every = 25 }

[channels."sub7.flow".alarms]
drift = { priority = "high", deadband = 0.5, on_delay = 0, off_delay = 3600 }   # defaults: DEFAULT_TIMING

[alarms]
topic = "rwls/alarms"                   # retained <topic>/state/<channel>/<kind>, events <topic>/event/...
stale_after = 1800                      # seconds without data: the stale alarm
budget = { false_alarms = 1, per_seconds = 600, sample_period = 10 }   # optional: config/false_alarm_budget.py
webhooks = [{ url = "http://127.0.0.1:9000/rwls", timeout = 5, retries = 5 }]
```
"""

from __future__ import annotations

import math
from enum import StrEnum
from typing import Literal

from pydantic import BaseModel, ConfigDict, Field, field_validator

from estimator import DEFAULT_TIMING, DETECTOR_KINDS, ConditionTiming, DetectorKind, DetectorSettings

__all__ = ["ALARM_KINDS", "AlarmKind", "AlarmKindConfig", "AlarmsConfig", "BaselineConfig", "BudgetConfig",
           "DetectorConfig", "WebhookConfig", "default_priority"]


class AlarmKind(StrEnum):
    """Every kind of alarm a channel has: one per detector, named as the detector (its values come from the
    estimator's :class:`DetectorKind`; a test holds the two together), and staleness."""

    NOISE_LEVEL = DetectorKind.NOISE_LEVEL.value
    VARIANCE = DetectorKind.VARIANCE.value
    OFFSET = DetectorKind.OFFSET.value
    DRIFT = DetectorKind.DRIFT.value
    STALE = "stale"            # no data for alarms.stale_after seconds (wall clock)


ALARM_KINDS: tuple[AlarmKind, ...] = tuple(AlarmKind)

_DEFAULT_PRIORITY = {AlarmKind.NOISE_LEVEL: "medium", AlarmKind.VARIANCE: "low", AlarmKind.OFFSET: "high",
                     AlarmKind.DRIFT: "medium", AlarmKind.STALE: "low"}

Priority = Literal["low", "medium", "high", "urgent"]


def default_priority(kind: str) -> str:
    return _DEFAULT_PRIORITY[AlarmKind(kind)]


class _Strict(BaseModel):
    model_config = ConfigDict(extra="forbid", frozen=True)


class NoiseDetectorConfig(_Strict):
    ratio: float = Field(default=2.0, gt=0.0, description="alarm when sigma exceeds ratio x baseline sigma")
    high: float = Field(default=math.inf, gt=0.0, description="or exceeds this, in engineering units")
    half_life: float = Field(default=200.0, gt=0.0, description="samples")


class VarianceDetectorConfig(_Strict):
    ratio: float = Field(default=2.0, gt=1.0, le=1e6, description="variance ratio the CUSUM is tuned to")
    h: float | None = Field(default=None, gt=0.0, description="decision interval; default 60, or the budget's")
    clip: float = Field(default=3.0, gt=0.0)


class OffsetDetectorConfig(_Strict):
    k: float = Field(default=1.0, ge=0.0, le=100.0, description="reference value, sigma units")
    h: float | None = Field(default=None, gt=0.0, description="decision interval; default 8, or the budget's")
    clip: float = Field(default=4.0, gt=0.0)
    scale_half_life: float = Field(default=100.0, gt=0.0, description="samples")


class DriftDetectorConfig(_Strict):
    alpha: float | None = Field(default=None, gt=0.0, lt=1.0, description="level per check; default 1e-6")
    every: int = Field(default=25, ge=1, description="samples between checks")


class DetectorConfig(_Strict):
    """``[channels.<id>.detectors]``."""

    commissioning_samples: int = Field(default=1000, ge=0)
    calibration_samples: int = Field(default=1000, ge=0, description="samples after the baseline that teach the "
                                     "offset and variance detectors the noise's shape; 0: assume Gaussian noise")
    noise: NoiseDetectorConfig = Field(default_factory=NoiseDetectorConfig)
    variance: VarianceDetectorConfig = Field(default_factory=VarianceDetectorConfig)
    offset: OffsetDetectorConfig = Field(default_factory=OffsetDetectorConfig)
    drift: DriftDetectorConfig = Field(default_factory=DriftDetectorConfig)

    def settings(self, alarms: dict[str, AlarmKindConfig], budget: dict[str, float] | None = None
                 ) -> DetectorSettings:
        """The estimator's settings; a value given here wins over the fleet budget's, which wins over defaults."""
        budget = budget or {}
        defaults = DetectorSettings()
        timing = tuple((kind, a.timing(kind)) for kind, a in alarms.items() if kind in DETECTOR_KINDS)
        return DetectorSettings(
            commissioning_samples=self.commissioning_samples, calibration_samples=self.calibration_samples,
            noise_ratio=self.noise.ratio, noise_high=self.noise.high, noise_half_life=self.noise.half_life,
            variance_ratio=self.variance.ratio,
            variance_h=self.variance.h if self.variance.h is not None else budget.get("variance_h",
                                                                                     defaults.variance_h),
            variance_clip=self.variance.clip, offset_k=self.offset.k,
            offset_h=self.offset.h if self.offset.h is not None else budget.get("offset_h", defaults.offset_h),
            offset_clip=self.offset.clip, offset_scale_half_life=self.offset.scale_half_life,
            drift_alpha=self.drift.alpha if self.drift.alpha is not None else budget.get("drift_alpha",
                                                                                       defaults.drift_alpha),
            drift_every=self.drift.every, timing=timing)


class BaselineConfig(_Strict):
    """``[channels.<id>.baseline]``: a baseline in force from the start (``rwls fit`` output, a calibration)."""

    parameters: dict[str, float]
    noise_sigma: float = Field(gt=0.0, allow_inf_nan=False, description="engineering units")
    std_errors: dict[str, float] | None = Field(default=None, description="of the parameters; none: exact")
    source: Literal["fit", "engineer"] = "fit"

    @field_validator("parameters", "std_errors")
    @classmethod
    def _finite(cls, value: dict[str, float] | None) -> dict[str, float] | None:
        if value is not None and not all(math.isfinite(v) for v in value.values()):
            raise ValueError("values must be finite")
        return value

    def values(self, terms: list[str]) -> tuple[list[float], list[list[float]]]:
        """Parameters and a diagonal covariance in term order; ValueError when a term is missing or extra."""
        names = set(terms)
        for given in (self.parameters, self.std_errors or {}):
            if given and set(given) != names:
                raise ValueError(f"needs exactly the terms {', '.join(terms)}, got {', '.join(given)}")
        errors = self.std_errors or dict.fromkeys(terms, 0.0)
        if any(v < 0.0 for v in errors.values()):
            raise ValueError("std_errors must be >= 0")
        n = len(terms)
        covariance = [[errors[terms[i]] ** 2 if i == j else 0.0 for j in range(n)] for i in range(n)]
        return [self.parameters[t] for t in terms], covariance


class AlarmKindConfig(_Strict):
    """``[channels.<id>.alarms.<kind>]``: the alarm's attributes (ISA-18.2)."""

    priority: Priority | None = None
    deadband: float | None = Field(default=None, ge=0.0, lt=1.0,
                                   description="fraction of the limit; default per detector (0.5 for the CUSUMs "
                                               "and drift, 0.1 for the noise level)")
    on_delay: float | None = Field(default=None, ge=0.0, le=1e9, allow_inf_nan=False,
                                   description="seconds; default 0")
    off_delay: float | None = Field(default=None, ge=0.0, le=1e9, allow_inf_nan=False,
                                    description="seconds; default 1800")

    def timing(self, kind: str) -> ConditionTiming:
        """The detector's hysteresis and delays: what is given here, the detector's defaults for the rest."""
        default = DEFAULT_TIMING[kind]
        return ConditionTiming(default.deadband if self.deadband is None else self.deadband,
                               default.on_delay if self.on_delay is None else self.on_delay,
                               default.off_delay if self.off_delay is None else self.off_delay)


class WebhookConfig(_Strict):
    """One receiver of alarm transitions (JSON POST)."""

    url: str
    timeout: float = Field(default=5.0, gt=0.0, le=300.0, description="seconds per attempt")
    retries: int = Field(default=5, ge=0, le=100)

    @field_validator("url")
    @classmethod
    def _url(cls, value: str) -> str:
        if not value.startswith(("http://", "https://")):
            raise ValueError(f"must start with http:// or https://, got {value[:40]!r}")
        return value


class BudgetConfig(_Strict):
    """A plant-wide false-alarm budget (see ``service/config/false_alarm_budget.py``)."""

    false_alarms: float = Field(gt=0.0, description="at most this many false alarms ...")
    per_seconds: float = Field(gt=0.0, description="... per this many seconds, over all channels")
    sample_period: float = Field(gt=0.0, description="seconds between a channel's samples")


class AlarmsConfig(_Strict):
    """``[alarms]``: where alarms go and the plant-wide rules."""

    topic: str = Field(default="rwls/alarms", min_length=1)
    stale_after: float = Field(default=1800.0, gt=0.0, allow_inf_nan=False, description="seconds without data")
    budget: BudgetConfig | None = None
    webhooks: list[WebhookConfig] = Field(default_factory=list)
    journal_limit: int = Field(default=100_000, ge=100, description="journal entries kept in memory")

    @field_validator("topic")
    @classmethod
    def _topic(cls, value: str) -> str:
        if "+" in value or "#" in value or "\x00" in value:
            raise ValueError("must be a plain topic (no wildcards)")
        return value.rstrip("/")


def check_alarm_kinds(alarms: dict[str, AlarmKindConfig]) -> dict[str, AlarmKindConfig]:
    unknown = [kind for kind in alarms if kind not in ALARM_KINDS]
    if unknown:
        raise ValueError(f"unknown alarm kind(s) {unknown}; known: {', '.join(ALARM_KINDS)}")
    return alarms
