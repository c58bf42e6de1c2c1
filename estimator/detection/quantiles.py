"""Quantiles of the Student t and chi-square distributions, from ``scipy.special``.

The estimator judges its numbers by two distributions: Student t for the
intervals of the estimates (``dof = N_eff - n``, real with forgetting) and
chi-square for the drift test's limit. scipy computes both; this module fixes
the argument order (probability first, lower tail) and refuses arguments that
make no sense with a ``ValueError`` instead of scipy's silent NaN.
"""

from __future__ import annotations

import math

from scipy import special

__all__ = ["chi2_quantile", "student_t_quantile"]


def student_t_quantile(probability: float, dof: float) -> float:
    """Quantile of Student's t distribution with ``dof`` (real, >= 1) degrees of freedom.

    Parameters
    ----------
    probability : float
        Lower-tail probability, in (0, 1).
    dof : float
        Degrees of freedom; real values are allowed.

    Returns
    -------
    float
        ``t`` with ``P(T <= t) = probability`` (``scipy.special.stdtrit``); NaN
        when ``dof`` is below 1 or NaN, where an interval would say nothing.

    Raises
    ------
    ValueError
        ``probability`` outside (0, 1).
    """
    if not 0.0 < probability < 1.0:
        raise ValueError(f"probability must be in (0, 1), got {probability}")
    if not dof >= 1.0:
        return math.nan
    return float(special.stdtrit(dof, probability))


def chi2_quantile(probability: float, dof: float) -> float:
    """Quantile of the chi-square distribution with ``dof`` (real, > 0) degrees of freedom.

    The distribution function is the regularised lower incomplete gamma
    function, ``F(x) = P(dof / 2, x / 2)`` (common practice), so the quantile
    is ``2 P^-1(dof / 2, probability)`` (``scipy.special.gammaincinv``).

    Parameters
    ----------
    probability : float
        Lower-tail probability, in (0, 1).
    dof : float
        Degrees of freedom, > 0.

    Returns
    -------
    float
        ``x`` with ``P(X <= x) = probability``.

    Raises
    ------
    ValueError
        ``probability`` outside (0, 1) or ``dof`` not positive.
    """
    if not 0.0 < probability < 1.0:
        raise ValueError(f"probability must be in (0, 1), got {probability}")
    if not dof > 0.0:
        raise ValueError(f"dof must be > 0, got {dof}")
    return float(2.0 * special.gammaincinv(0.5 * dof, probability))
