"""Configuration: one validated model read from a TOML file.

A bad value stops the program with a message naming the key, e.g.
``channels.sub7_flow.forgetting_factor: must be in (0, 1], got 1.2``.
"""

from __future__ import annotations

import math
import re
import tomllib
from pathlib import Path
from typing import Literal

from pydantic import BaseModel, ConfigDict, Field, ValidationError, field_validator, model_validator

from estimator.channel import ChannelSettings, WeightRule
from estimator.regressors import RegressorSpec

__all__ = ["ChannelConfig", "ConfigError", "RwlsConfig", "load_config", "parse_config"]

_CHANNEL_ID = re.compile(r"^[A-Za-z0-9_.-]{1,128}$")


class ConfigError(Exception):
    """The configuration is unusable; ``problems`` lists ``key: message`` lines."""

    def __init__(self, problems: list[str]) -> None:
        super().__init__("\n".join(problems))
        self.problems = problems


class _Strict(BaseModel):
    model_config = ConfigDict(extra="forbid", frozen=True)


class WeightRuleConfig(_Strict):
    """An application weight rule: count samples with ``low <= input <= high`` ``factor`` times."""

    input: str
    low: float
    high: float
    factor: float = Field(gt=0.0)

    @model_validator(mode="after")
    def _band(self) -> WeightRuleConfig:
        if not (math.isfinite(self.low) and math.isfinite(self.high) and self.low <= self.high):
            raise ValueError(f"need finite low <= high, got low={self.low}, high={self.high}")
        return self


class NoiseConfig(_Strict):
    """Noise-variance tracker of a channel."""

    half_life: float = Field(default=200.0, gt=0.0, description="memory in samples")
    half_life_seconds: float | None = Field(default=None, gt=0.0, description="memory in seconds instead")
    robust: bool = False
    warmup: int = Field(default=10, ge=1)
    initial_sigma: float = Field(default=1.0, gt=0.0, description="sigma assumed before warm-up (tracked)")
    model_terms: list[str] = Field(default_factory=list, description="operating-point log-variance terms")
    model_forgetting_factor: float = Field(default=0.999, gt=0.0, le=1.0)

    @field_validator("model_terms")
    @classmethod
    def _terms(cls, value: list[str]) -> list[str]:
        if value:
            RegressorSpec(value)
        return value


class ChannelConfig(_Strict):
    """One channel table, ``[channels.<id>]``."""

    terms: list[str] = Field(min_length=1)
    forgetting_factor: float = 1.0
    weighting: Literal["unit", "sample", "tracked"] = "unit"
    weight_rules: list[WeightRuleConfig] = Field(default_factory=list)
    covariance_limit: float = Field(default=1e6, gt=0.0)
    covariance_scale: Literal["estimated", "known"] = "estimated"
    noise: NoiseConfig = Field(default_factory=NoiseConfig)
    topic: str | None = None

    @field_validator("terms")
    @classmethod
    def _terms(cls, value: list[str]) -> list[str]:
        RegressorSpec(value)
        return value

    @field_validator("forgetting_factor")
    @classmethod
    def _forgetting(cls, value: float) -> float:
        if not (0.0 < value <= 1.0):
            raise ValueError(f"must be in (0, 1], got {value}")
        return value

    def settings(self) -> ChannelSettings:
        """The estimator-side settings of this channel."""
        noise = self.noise
        return ChannelSettings(
            terms=tuple(self.terms),
            forgetting_factor=self.forgetting_factor,
            weighting=self.weighting,
            weight_rules=tuple(WeightRule(r.input, r.low, r.high, r.factor) for r in self.weight_rules),
            covariance_limit=self.covariance_limit,
            covariance_scale=self.covariance_scale,
            noise_half_life=noise.half_life_seconds if noise.half_life_seconds is not None else noise.half_life,
            noise_half_life_in_seconds=noise.half_life_seconds is not None,
            noise_robust=noise.robust,
            noise_warmup=noise.warmup,
            initial_sigma=noise.initial_sigma,
            noise_model_terms=tuple(noise.model_terms),
            noise_model_forgetting_factor=noise.model_forgetting_factor,
        )


class RwlsConfig(_Strict):
    """The whole configuration file."""

    channels: dict[str, ChannelConfig] = Field(min_length=1)

    @field_validator("channels")
    @classmethod
    def _ids(cls, value: dict[str, ChannelConfig]) -> dict[str, ChannelConfig]:
        for key in value:
            if not _CHANNEL_ID.match(key):
                raise ValueError(f"channel id {key!r} must be 1-128 of letters, digits, '_', '.', '-'")
        return value


def _explain(error: ValidationError) -> list[str]:
    problems = []
    for item in error.errors():
        key = ".".join(str(part) for part in item["loc"]) or "(file)"
        message = item["msg"].removeprefix("Value error, ")
        if item["type"] == "extra_forbidden":
            message = "unknown key"
        elif item["type"] == "missing":
            message = "required key missing"
        problems.append(f"{key}: {message}")
    return problems


def parse_config(data: dict[str, object]) -> RwlsConfig:
    """Validate an already-parsed TOML document.

    Raises
    ------
    ConfigError
        One line per problem, each naming its key.
    """
    try:
        return RwlsConfig.model_validate(data)
    except ValidationError as exc:
        raise ConfigError(_explain(exc)) from None


def load_config(path: str | Path) -> RwlsConfig:
    """Read and validate a TOML configuration file.

    Raises
    ------
    ConfigError
        Unreadable file, TOML syntax error, or invalid values (each naming its key).
    """
    try:
        text = Path(path).read_text(encoding="utf-8")
    except (OSError, UnicodeDecodeError) as exc:
        raise ConfigError([f"{path}: cannot read: {exc}"]) from None
    try:
        data = tomllib.loads(text)
    except tomllib.TOMLDecodeError as exc:
        raise ConfigError([f"{path}: TOML syntax error: {exc}"]) from None
    return parse_config(data)
