"""Ordinary versus weighted least squares on the same samples: what the weighting bought.

Both are batch fits over every applied sample of a replay (no forgetting: the comparison is about
the weights, not the memory). For OLS two standard errors are given: the textbook one, which assumes
one noise variance for all samples, and the heteroscedasticity-consistent one (HC0, White 1980),
which stays valid when the noise changes from sample to sample. The WLS errors are those of
``(Z^T W Z)^-1`` scaled by the weighted residual variance. The efficiency gain of a parameter is
``(SE_OLS,HC0 / SE_WLS)^2``: how many times more samples OLS would need for the same precision.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np
from numpy.typing import NDArray

from estimator.batch import NotIdentifiable, fit_wls

__all__ = ["Comparison", "compare"]

FloatArray = NDArray[np.float64]


@dataclass(frozen=True)
class Comparison:
    """Per parameter, shape (n,): estimates and standard errors of both fits, and the gain."""

    ols: FloatArray
    ols_se: FloatArray             # textbook: s^2 (Z^T Z)^-1
    ols_se_robust: FloatArray      # HC0 sandwich (Z^T Z)^-1 Z^T diag(e^2) Z (Z^T Z)^-1
    wls: FloatArray
    wls_se: FloatArray             # s_w^2 (Z^T W Z)^-1
    gain: FloatArray               # (ols_se_robust / wls_se)^2
    samples: int
    weights_vary: bool             # False: every weight equal, WLS is OLS


def compare(Z: FloatArray, y: FloatArray, weight: FloatArray) -> Comparison | None:
    """Fit both on ``Z`` (N, n), ``y`` (N,), ``weight`` (N,); None when either is not identifiable.

    Raises
    ------
    ValueError
        Shapes disagree or values are not finite (as :func:`estimator.batch.fit_wls`).
    """
    Z = np.asarray(Z, dtype=np.float64)
    y = np.asarray(y, dtype=np.float64)
    weight = np.asarray(weight, dtype=np.float64)
    n_samples, n = Z.shape
    if n_samples <= n:
        return None
    try:
        ols = fit_wls(Z, y)
        wls = fit_wls(Z, y, weight)
    except NotIdentifiable:
        return None
    dof = n_samples - n
    residual = y - Z @ ols.parameters
    ols_var = float(residual @ residual) / dof
    ols_se = np.sqrt(np.clip(np.diagonal(ols.unscaled_covariance) * ols_var, 0.0, None))
    bread = ols.unscaled_covariance
    meat = (Z * (residual * residual)[:, None]).T @ Z
    robust = bread @ meat @ bread
    ols_se_robust = np.sqrt(np.clip(np.diagonal(robust), 0.0, None))
    wls_var = wls.residual_ss / dof
    wls_se = np.sqrt(np.clip(np.diagonal(wls.unscaled_covariance) * wls_var, 0.0, None))
    with np.errstate(divide="ignore", invalid="ignore"):
        gain = (ols_se_robust / wls_se) ** 2
    spread = float(np.max(weight) / np.min(weight)) if n_samples else 1.0
    return Comparison(ols=ols.parameters, ols_se=ols_se, ols_se_robust=ols_se_robust, wls=wls.parameters,
                      wls_se=wls_se, gain=gain, samples=n_samples,
                      weights_vary=not math.isclose(spread, 1.0, rel_tol=1e-12))
