"""A channel's state as the JSON-ready dictionary that `rwls replay --json` and the API share."""

from __future__ import annotations

import math

import numpy as np

from estimator.channel_bank import ChannelView
from estimator.quantiles import student_t_quantile

__all__ = ["INTERVAL_LEVEL", "channel_report", "finite_or_null"]

INTERVAL_LEVEL = 0.95


def finite_or_null(value: object) -> object:
    """The same structure with every NaN or infinity replaced by None (JSON has neither)."""
    if isinstance(value, float):
        return value if math.isfinite(value) else None
    if isinstance(value, dict):
        return {k: finite_or_null(v) for k, v in value.items()}
    if isinstance(value, list | tuple):
        return [finite_or_null(v) for v in value]
    return value


def channel_report(view: ChannelView) -> dict[str, object]:
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
        "residual_sd_scale": "y" if settings.weighting == "unit" and not settings.weight_rules else "weighted",
        "noise_sigma": float(view.noise_sigma),
        "samples": view.applied,
        "rejected": sum(view.rejected.values()),
        "rejections": dict(sorted(view.rejected.items())),
        "warmup": view.warmup,
        "forgetting_factor": settings.forgetting_factor,
        "weighting": settings.weighting,
        "covariance_scale": settings.covariance_scale,
        "effective_count": float(view.effective_count),
        "min_information": float(view.min_information),
        "information_condition": float(view.information_condition),
        "commissioned": view.commissioned,
        "baseline": _baseline(view),
        "detectors": {kind: {"statistic": r.statistic, "limit": r.limit, "active": r.active}
                      for kind, r in view.detectors.items()},
    }


def _baseline(view: ChannelView) -> dict[str, object] | None:
    b = view.baseline
    if b is None:
        return None
    names = list(view.terms)
    return {"version": b.version, "source": b.source,
            "parameters": dict(zip(names, b.parameters.tolist(), strict=True)),
            "std_errors": dict(zip(names, np.sqrt(np.clip(b.covariance.diagonal(), 0.0, None)).tolist(),
                                   strict=True)),
            "noise_sigma": b.noise_sigma, "t": b.t, "samples": b.samples, "note": b.note or None}
