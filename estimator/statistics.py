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

import math
from dataclasses import dataclass
from statistics import NormalDist

import numpy as np
from numpy.typing import ArrayLike, NDArray

__all__ = ["CONDITION_LIMIT", "ChannelStatistics", "bank_statistics", "student_t_quantile"]

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
    theta = np.linalg.solve(safe_R, q[:, :, None])[:, :, 0]
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


def _incomplete_beta_fraction(a: float, b: float, x: float) -> float:
    """Continued fraction of the regularised incomplete beta (DLMF 8.17.22), modified Lentz."""
    tiny = 1e-300
    c, d = 1.0, 1.0 - (a + b) * x / (a + 1.0)
    d = 1.0 / (d if abs(d) > tiny else tiny)
    result = d
    for m in range(1, 400):
        for numerator in (m * (b - m) * x / ((a + 2 * m - 1) * (a + 2 * m)),
                          -(a + m) * (a + b + m) * x / ((a + 2 * m) * (a + 2 * m + 1))):
            d = 1.0 + numerator * d
            d = 1.0 / (d if abs(d) > tiny else tiny)
            c = 1.0 + numerator / c
            c = c if abs(c) > tiny else tiny
            result *= c * d
        if abs(c * d - 1.0) < 1e-16:
            break
    return result


def _regularised_incomplete_beta(a: float, b: float, x: float, y: float) -> float:
    """I_x(a, b) with ``y = 1 - x`` passed separately so neither loses digits (DLMF 8.17.2);
    the fraction is evaluated on the side where it converges fast."""
    if x <= 0.0:
        return 0.0
    if y <= 0.0:
        return 1.0
    log_front = math.lgamma(a + b) - math.lgamma(a) - math.lgamma(b) + a * math.log(x) + b * math.log(y)
    if x < (a + 1.0) / (a + b + 2.0):
        return math.exp(log_front) * _incomplete_beta_fraction(a, b, x) / a
    return 1.0 - math.exp(log_front) * _incomplete_beta_fraction(b, a, y) / b


def _t_upper_tail(t: float, dof: float) -> float:
    """P(T > t) for t >= 0: I_x(dof/2, 1/2) / 2 with x = dof / (dof + t^2) (DLMF 8.17.ii)."""
    denominator = dof + t * t
    return 0.5 * _regularised_incomplete_beta(0.5 * dof, 0.5, dof / denominator, t * t / denominator)


def student_t_quantile(probability: float, dof: float) -> float:
    """Quantile of Student's t distribution with ``dof`` (real, >= 1) degrees of freedom.

    Solves ``P(T <= t) = probability`` with the distribution function written
    through the regularised incomplete beta function (DLMF 8.17.ii), evaluated
    by its continued fraction (DLMF 8.17.22), by Newton steps safeguarded with
    bisection from the Cornish-Fisher start (Abramowitz & Stegun 1964, 26.7.5).
    Relative accuracy about 1e-12 (absolute near the median). For dof < 1 it
    returns NaN.
    """
    if not 0.0 < probability < 1.0:
        raise ValueError(f"probability must be in (0, 1), got {probability}")
    if not dof >= 1.0:
        return math.nan
    if probability < 0.5:
        return -student_t_quantile(1.0 - probability, dof)
    tail = 1.0 - probability
    if tail >= 0.5:
        return 0.0
    z = NormalDist().inv_cdf(probability)
    v = dof
    z3, z5, z7 = z**3, z**5, z**7
    guess = z + (z3 + z) / (4 * v) + (5 * z5 + 16 * z3 + 3 * z) / (96 * v**2) \
        + (3 * z7 + 19 * z5 + 17 * z3 - 15 * z) / (384 * v**3)
    low, high = 0.0, max(guess, 1.0)
    while _t_upper_tail(high, dof) > tail:          # widen until the root is bracketed
        high *= 2.0
    log_norm = math.lgamma(0.5 * (dof + 1.0)) - math.lgamma(0.5 * dof) - 0.5 * math.log(dof * math.pi)
    t = min(max(guess, low), high)
    for _ in range(100):
        excess = _t_upper_tail(t, dof) - tail       # decreasing in t
        if excess > 0.0:
            low = t
        else:
            high = t
        density = math.exp(log_norm - 0.5 * (dof + 1.0) * math.log1p(t * t / dof))
        step = t + excess / density
        t_next = step if low < step < high else 0.5 * (low + high)
        if abs(t_next - t) <= 1e-14 * max(1.0, abs(t)):
            return t_next
        t = t_next
    return t
