"""Synthetic weighted regression data with known parameters: ``y = Z theta + e / sqrt(w)``."""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from numpy.typing import NDArray

__all__ = ["RegressionData", "make_regression"]

FloatArray = NDArray[np.float64]


@dataclass(frozen=True)
class RegressionData:
    """``y = Z theta + e / sqrt(w)``: heteroscedastic noise with known inverse-variance weights."""

    Z: FloatArray          # (N, n), first column 1 when with_constant
    y: FloatArray          # (N,)
    weight: FloatArray     # (N,), 1 / noise variance
    theta: FloatArray      # (n,), the true parameters


def make_regression(seed: int, n_samples: int, n_params: int, *, noise: float = 0.1,
                    with_constant: bool = True, unit_weights: bool = False) -> RegressionData:
    """``n_samples`` draws of ``n_params`` regressors (normal; the first 1 when ``with_constant``), parameters
    uniform on [-2, 2], weights uniform on [0.2, 5] (or 1) and noise of sd ``noise / sqrt(weight)``."""
    rng = np.random.default_rng(seed)
    Z = rng.normal(size=(n_samples, n_params))
    if with_constant:
        Z[:, 0] = 1.0
    theta = rng.uniform(-2.0, 2.0, size=n_params)
    weight = np.ones(n_samples) if unit_weights else rng.uniform(0.2, 5.0, size=n_samples)
    y = Z @ theta + noise * rng.normal(size=n_samples) / np.sqrt(weight)
    return RegressionData(Z=Z, y=y, weight=weight, theta=theta)
