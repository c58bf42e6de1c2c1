"""Figures as the service benchmarks print them: numbers with separators, milliseconds, percentiles."""

from __future__ import annotations

import math

import numpy as np

__all__ = ["fmt", "ms", "per", "percentiles"]


def fmt(value: float | None, digits: int = 0) -> str:
    return "n/a" if value is None or not math.isfinite(value) else f"{value:,.{digits}f}"


def ms(seconds: float) -> str:
    return fmt(seconds * 1e3, 1)


def percentiles(values: list[float]) -> tuple[float, float, float]:
    """p50, p99 and max; NaN for no values."""
    if not values:
        return math.nan, math.nan, math.nan
    array = np.asarray(values)
    return float(np.percentile(array, 50)), float(np.percentile(array, 99)), float(array.max())


def per(total: float, count: int) -> float:
    return total / count if count > 0 else math.nan
