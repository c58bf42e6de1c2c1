"""A channel's state as the JSON-ready dictionary that `rwls replay --json` and the API share."""

from __future__ import annotations

import math
from typing import Any, NotRequired, TypedDict, TypeVar

import numpy as np

from estimator import ChannelView, Weighting, student_t_quantile

__all__ = ["INTERVAL_LEVEL", "BaselineReport", "ChannelReport", "DetectorReport", "channel_report", "finite_or_null"]

INTERVAL_LEVEL = 0.95

J = TypeVar("J")


class DetectorReport(TypedDict):
    statistic: float
    limit: float
    active: bool


class BaselineReport(TypedDict):
    version: int
    source: str
    parameters: dict[str, float]
    std_errors: dict[str, float]
    noise_sigma: float
    t: float | None
    samples: int
    note: str | None


class ChannelReport(TypedDict):
    """A channel's state as `rwls replay --json`, `rwls fit --json` and ``GET /api/v1/channels/{id}`` give it.

    Numbers may be NaN or infinite here; :func:`finite_or_null` makes them null for JSON.
    """

    terms: list[str]
    parameters: dict[str, float | None]
    std_errors: dict[str, float | None]
    intervals_95: dict[str, list[float] | None]
    covariance: list[list[float]] | None
    residual_sd: float
    residual_sd_scale: str
    noise_sigma: float
    samples: int
    rejected: int
    rejections: dict[str, int]
    warmup: int
    forgetting_factor: float
    weighting: str
    covariance_scale: str
    effective_count: float
    min_information: float
    information_condition: float
    commissioned: int
    baseline: BaselineReport | None
    detectors: dict[str, DetectorReport]
    alarms: NotRequired[list[dict[str, Any]]]     # replay: the transitions its detectors would have made
    error: NotRequired[str]                       # fit: why there is no estimate


def finite_or_null(value: J) -> J:
    """The same structure with every NaN or infinity replaced by None (JSON has neither)."""
    if isinstance(value, float):
        return value if math.isfinite(value) else None  # type: ignore[return-value]
    if isinstance(value, dict):
        return {k: finite_or_null(v) for k, v in value.items()}  # type: ignore[return-value]
    if isinstance(value, list | tuple):
        return [finite_or_null(v) for v in value]  # type: ignore[return-value]
    return value


def channel_report(view: ChannelView) -> ChannelReport:
    """Parameters with standard errors and 95 % intervals (Student t, ``dof`` degrees of freedom),
    covariance, residual and noise levels, counts and settings. Values may be NaN; pass the result
    through :func:`finite_or_null` before serialising."""
    names = list(view.terms)
    t_q = student_t_quantile(0.5 + INTERVAL_LEVEL / 2, view.dof) if view.dof >= 1 else math.nan
    theta, std = view.parameters, view.std_errors
    settings = view.settings
    return {
        "terms": names,
        "parameters": {n: float(v) for n, v in zip(names, theta, strict=True)},
        "std_errors": {n: float(v) for n, v in zip(names, std, strict=True)},
        "intervals_95": {n: [float(v - t_q * s), float(v + t_q * s)]
                         for n, v, s in zip(names, theta, std, strict=True)},
        "covariance": np.asarray(view.covariance, dtype=float).tolist(),
        "residual_sd": float(view.residual_sd),
        # "y": the residuals' own sd in units of y (every weight 1); "weighted": the sd of residual * sqrt(weight),
        # dimensionless, about 1 when the weights are the inverse noise variances.
        "residual_sd_scale": "y" if settings.weighting == Weighting.UNIT and not settings.weight_rules else "weighted",
        "noise_sigma": float(view.noise_sigma),
        "samples": view.applied,
        "rejected": sum(view.refused.values()),
        "rejections": dict(sorted(view.refused.items())),
        "warmup": view.warmup,
        "forgetting_factor": settings.forgetting_factor,
        "weighting": settings.weighting,
        "covariance_scale": settings.covariance_scale,
        "effective_count": float(view.effective_count),
        "min_information": float(view.min_information),
        "information_condition": float(view.information_condition),
        "commissioned": view.commissioned,
        "baseline": _baseline(view),
        "detectors": {kind: DetectorReport(statistic=r.statistic, limit=r.limit, active=r.active)
                      for kind, r in view.detectors.items()},
    }


def _baseline(view: ChannelView) -> BaselineReport | None:
    b = view.baseline
    if b is None:
        return None
    names = list(view.terms)
    return {"version": b.version, "source": b.source,
            "parameters": dict(zip(names, b.parameters.tolist(), strict=True)),
            "std_errors": dict(zip(names, np.sqrt(np.clip(b.covariance.diagonal(), 0.0, None)).tolist(),
                                   strict=True)),
            "noise_sigma": b.noise_sigma, "t": b.t, "samples": b.samples, "note": b.note or None}
