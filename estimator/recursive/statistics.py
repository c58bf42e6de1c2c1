"""Parameter uncertainty of a bank: estimates, covariance, standard errors, excitation.

Everything here is computed on demand from the bank's factor ``[[R, q], [0, rho]]``;
nothing of it is needed by the update itself.

* ``theta = R^-1 q`` (back-substitution).
* Unscaled covariance ``P = (R^T R)^-1 = R^-1 R^-T``: the parameter covariance
  when the weights are exact inverse variances (``scale="known"``).
* With ``scale="estimated"`` (default) P is multiplied by the residual variance
  ``s^2 = rho^2 / (N_eff - n)``. With lambda = 1 and unit weights these are the
  classical OLS standard errors; with relative weights, those of weighted least
  squares as R's ``lm`` and statsmodels report them.
* Excitation: the singular values of R give the eigenvalues of the information
  matrix ``H = R^T R``: ``lambda_min(H) = sigma_min(R)^2`` and
  ``cond(H) = (sigma_max / sigma_min)^2``.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from numpy.typing import ArrayLike, NDArray

__all__ = ["CONDITION_LIMIT", "ChannelStatistics", "bank_statistics"]

FloatArray = NDArray[np.float64]

CONDITION_LIMIT = 1e12
"""Information condition above which the estimates are too poorly excited to judge (quality Uncertain)."""


@dataclass(frozen=True)
class ChannelStatistics:
    """Statistics of K channels (arrays, leading axis K); NaN where not identifiable.

    Attributes
    ----------
    parameters : (K, n)
    covariance : (K, n, n), scaled as requested
    unscaled_covariance : (K, n, n), ``(R^T R)^-1``
    std_errors : (K, n)
    residual_ss : (K,), weighted, forgetting included
    residual_sd : (K,), ``sqrt(residual_ss / dof)``
    dof : (K,), ``N_eff - n``
    effective_count : (K,), ``sum lambda^(k-i)``
    min_information : (K,), smallest eigenvalue of ``H = R^T R``
    information_condition : (K,), ``cond(H)``
    identifiable : (K,) bool, every diagonal entry of R non-zero
    """

    parameters: FloatArray
    covariance: FloatArray
    unscaled_covariance: FloatArray
    std_errors: FloatArray
    residual_ss: FloatArray
    residual_sd: FloatArray
    dof: FloatArray
    effective_count: FloatArray
    min_information: FloatArray
    information_condition: FloatArray
    identifiable: NDArray[np.bool_]


def bank_statistics(factor: ArrayLike, effective_count: ArrayLike,
                    scale: str = "estimated") -> ChannelStatistics:
    """Statistics from augmented factors.

    Parameters
    ----------
    factor : array_like, shape (K, n+1, n+1)
        ``[[R, q], [0, rho]]`` per channel, as :meth:`RecursiveWLSBank.factor` returns.
    effective_count : array_like, shape (K,)
    scale : {"estimated", "known"}
        Multiply P by the residual variance, or take the weights as exact.

    Returns
    -------
    ChannelStatistics
    """
    if scale not in ("estimated", "known"):
        raise ValueError(f"scale must be 'estimated' or 'known', got {scale!r}")
    F = np.asarray(factor, dtype=np.float64)
    if F.ndim != 3 or F.shape[1] != F.shape[2] or F.shape[1] < 2:
        raise ValueError(f"factor must have shape (K, n+1, n+1), got {F.shape}")
    n_eff = np.asarray(effective_count, dtype=np.float64)
    k, m, _ = F.shape
    n = m - 1
    R = F[:, :n, :n]
    q = F[:, :n, n]
    rho = F[:, n, n]
    identifiable = np.all(np.diagonal(R, axis1=1, axis2=2) != 0.0, axis=1)
    safe_R = np.where(identifiable[:, None, None], R, np.eye(n))
    # Triangular solves through LU: no pivoting happens on a triangular matrix.
    theta: FloatArray = np.asarray(np.linalg.solve(safe_R, q[:, :, None])[:, :, 0], dtype=np.float64)
    R_inv = np.linalg.solve(safe_R, np.broadcast_to(np.eye(n), (k, n, n)))
    P = R_inv @ np.swapaxes(R_inv, 1, 2)
    P = 0.5 * (P + np.swapaxes(P, 1, 2))
    residual_ss = rho * rho
    dof = n_eff - n
    with np.errstate(divide="ignore", invalid="ignore"):
        residual_var = np.where(dof > 0.0, residual_ss / np.where(dof > 0.0, dof, 1.0), np.nan)
    cov = P * residual_var[:, None, None] if scale == "estimated" else P.copy()
    singular = np.linalg.svd(safe_R, compute_uv=False)
    s_max, s_min = singular[:, 0], singular[:, -1]
    with np.errstate(divide="ignore", over="ignore"):       # inf: no usable excitation
        condition = np.where(s_min > 0.0, (s_max / np.where(s_min > 0.0, s_min, 1.0)) ** 2, np.inf)
    bad = ~identifiable
    theta[bad] = np.nan
    P[bad] = np.nan
    cov[bad] = np.nan
    condition[bad] = np.inf
    min_info = np.where(identifiable, s_min * s_min, 0.0)
    std_errors = np.sqrt(np.clip(np.diagonal(cov, axis1=1, axis2=2), 0.0, None))
    return ChannelStatistics(
        parameters=theta,
        covariance=cov,
        unscaled_covariance=P,
        std_errors=std_errors,
        residual_ss=residual_ss,
        residual_sd=np.sqrt(residual_var),
        dof=dof,
        effective_count=n_eff.copy(),
        min_information=min_info,
        information_condition=condition,
        identifiable=identifiable,
    )
