"""Ordinary versus weighted least squares on the same samples: what the weighting bought.

Both are batch fits over every applied sample of a replay (no forgetting: the comparison is about
the weights, not the memory). For OLS two standard errors are given: the textbook one, which assumes
one noise variance for all samples, and the heteroscedasticity-consistent one (HC0, White 1980),
which stays valid when the noise changes from sample to sample. The WLS errors are likewise given
twice: those of ``(Z^T W Z)^-1`` scaled by the weighted residual variance (valid when the weights are
the inverse noise variances up to one factor), and the HC0 sandwich of the weighted fit. The efficiency
gain of a parameter compares like with like, ``(SE_OLS,HC0 / SE_WLS,HC0)^2``: how many times more samples
OLS would need for the same precision, whatever the weights were. With every weight equal the two fits
are one and the gain is exactly 1.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from numpy.typing import NDArray

from estimator import NotIdentifiable, fit_wls

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
    wls_se_robust: FloatArray      # HC0 of the weighted fit: (Z^T W Z)^-1 Z^T W diag(e^2) W Z (Z^T W Z)^-1
    gain: FloatArray               # (ols_se_robust / wls_se_robust)^2; exactly 1 where every weight is equal
    samples: int
    weights_vary: bool             # False: every weight equal, WLS is OLS


def compare(Z: FloatArray, y: FloatArray, weight: FloatArray) -> Comparison | None:
    """Fit both on ``Z`` (N, n), ``y`` (N,), ``weight`` (N,); None when either is not identifiable.

    Raises
    ------
    ValueError
        Shapes disagree or values are not finite (as :func:`estimator.recursive.batch.fit_wls`).
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
    weights_vary = not bool(np.all(weight == weight[0]))
    if weights_vary:
        weighted_residual = weight * (y - Z @ wls.parameters)
        wls_meat = (Z * (weighted_residual * weighted_residual)[:, None]).T @ Z
        wls_robust = wls.unscaled_covariance @ wls_meat @ wls.unscaled_covariance
        wls_se_robust = np.sqrt(np.clip(np.diagonal(wls_robust), 0.0, None))
        with np.errstate(divide="ignore", invalid="ignore"):
            gain = (ols_se_robust / wls_se_robust) ** 2
    else:
        # One weight for all: WLS is OLS, the same estimator, and gains nothing (not 0.99 of rounding).
        wls_se_robust = ols_se_robust.copy()
        gain = np.ones(n)
    return Comparison(ols=ols.parameters, ols_se=ols_se, ols_se_robust=ols_se_robust, wls=wls.parameters,
                      wls_se=wls_se, wls_se_robust=wls_se_robust, gain=gain, samples=n_samples,
                      weights_vary=weights_vary)
