"""Argument checks the noise models share: counts, positive numbers, and the bank's by-products.

:class:`~estimator.noise.variance.NoiseVarianceTracker` and
:class:`~estimator.noise.log_variance.LogVarianceModel` take the same by-products of a
:class:`~estimator.recursive.rwls.RecursiveWLSBank` update (innovation, leverage, the bank's
kappa); both refuse them alike, with a ``ValueError`` naming the argument, before any state changes.
"""

from __future__ import annotations

import math

import numpy as np
from numpy.typing import ArrayLike, NDArray

__all__ = ["batch_vector", "check_int", "check_positive", "check_residual_one", "check_residuals"]

FloatArray = NDArray[np.float64]
IndexArray = NDArray[np.intp]


def check_int(value: object, name: str, minimum: int) -> int:
    """``value`` as an int, or ``ValueError`` unless it is an integer (not a bool) >= ``minimum``."""
    if isinstance(value, bool) or not isinstance(value, int | np.integer) or value < minimum:
        raise ValueError(f"{name} must be an integer >= {minimum}, got {value!r}")
    return int(value)


def check_positive(value: object, name: str) -> float:
    """``value`` as a float, or ``ValueError`` unless it is a finite number > 0."""
    if isinstance(value, bool) or not isinstance(value, int | float | np.integer | np.floating):
        raise ValueError(f"{name} must be a number, got {value!r}")
    x = float(value)
    if not (math.isfinite(x) and x > 0.0):
        raise ValueError(f"{name} must be finite and > 0, got {x}")
    return x


def batch_vector(value: ArrayLike, b: int, name: str) -> FloatArray:
    """A scalar or a shape (B,) argument as a float64 vector of shape (B,)."""
    arr = np.asarray(value, dtype=np.float64)
    if arr.ndim == 0:
        return np.full(b, float(arr))
    if arr.shape != (b,):
        raise ValueError(f"{name} must be a scalar or shape ({b},), got {arr.shape}")
    return arr


def check_residuals(n_channels: int, channels: ArrayLike | None, innovation: ArrayLike,
                     leverage: ArrayLike, kappa: ArrayLike
                     ) -> tuple[IndexArray, FloatArray, FloatArray, FloatArray]:
    """Validate a batch of bank by-products; return (channels, e, h, kappa), each (B,)."""
    e = np.asarray(innovation, dtype=np.float64)
    if e.ndim != 1:
        raise ValueError(f"innovation must have shape (B,), got {e.shape}")
    b = e.shape[0]
    if channels is None:
        if b != n_channels:
            raise ValueError(f"without channels, innovation must have shape ({n_channels},), got {e.shape}")
        idx = np.arange(n_channels)
    else:
        raw = np.asarray(channels)
        if raw.shape != (b,) or (b and raw.dtype.kind not in "iu"):
            raise ValueError(f"channels must be integers of shape ({b},), got {raw.dtype} {raw.shape}")
        idx = raw.astype(np.intp)
        if b and (idx.min() < 0 or idx.max() >= n_channels):
            bad = idx[(idx < 0) | (idx >= n_channels)][0]
            raise ValueError(f"channels must be in 0..{n_channels - 1}, got {bad}")
        if np.unique(idx).shape[0] != b:
            raise ValueError("channels must be distinct in one vectorised update; apply repeats in order")
    h = np.asarray(leverage, dtype=np.float64)
    if h.shape != (b,):
        raise ValueError(f"leverage must have shape ({b},), got {h.shape}")
    if not (h >= 0.0).all():
        raise ValueError(f"leverage must be >= 0 (inf while not identifiable), got {h[~(h >= 0.0)][0]}")
    kap = batch_vector(kappa, b, "kappa")
    good = np.isfinite(kap) & (kap > 0.0)
    if not good.all():
        raise ValueError(f"kappa must be finite and > 0, got {kap[~good][0]}")
    return idx, e, h, kap


def check_residual_one(n_channels: int, channel: int, innovation: float, leverage: float,
                        kappa: float) -> tuple[float, float, float]:
    """Scalar twin of :func:`check_residuals`."""
    if isinstance(channel, bool) or not isinstance(channel, int | np.integer) or not 0 <= channel < n_channels:
        raise ValueError(f"channel must be an integer in 0..{n_channels - 1}, got {channel!r}")
    e, h, kap = float(innovation), float(leverage), float(kappa)
    if not h >= 0.0:
        raise ValueError(f"leverage must be >= 0 (inf while not identifiable), got {h}")
    if not (math.isfinite(kap) and kap > 0.0):
        raise ValueError(f"kappa must be finite and > 0, got {kap}")
    return e, h, kap
