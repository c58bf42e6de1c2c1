"""Chi-square tail probabilities and quantiles, from the regularised incomplete gamma function.

``P(a, x) = gamma(a, x) / Gamma(a)`` by its power series for ``x < a + 1`` and
by the Lentz continued fraction of ``Q = 1 - P`` otherwise (Numerical Recipes,
3rd ed., section 6.2; Abramowitz & Stegun 6.5.29 and 6.5.31). The chi-square
distribution with ``nu`` degrees of freedom has ``F(x) = P(nu / 2, x / 2)``.
Quantiles by bisection on the tail, which is monotone: slow next to Newton,
but exact to the last bits it can resolve, and only computed at configuration
time.
"""

from __future__ import annotations

import math

__all__ = ["chi2_quantile", "chi2_sf", "normal_cdf"]

_EPS = 1e-16
_TINY = 1e-300
_MAX_TERMS = 10_000


def _lower_series(a: float, x: float) -> float:
    """P(a, x) by the series, for x < a + 1."""
    term = total = 1.0 / a
    ap = a
    for _ in range(_MAX_TERMS):
        ap += 1.0
        term *= x / ap
        total += term
        if abs(term) < abs(total) * _EPS:
            break
    return total * math.exp(-x + a * math.log(x) - math.lgamma(a))


def _upper_fraction(a: float, x: float) -> float:
    """Q(a, x) by the continued fraction (modified Lentz), for x >= a + 1."""
    b = x + 1.0 - a
    c = 1.0 / _TINY
    d = 1.0 / b
    h = d
    for i in range(1, _MAX_TERMS):
        an = -i * (i - a)
        b += 2.0
        d = an * d + b
        d = _TINY if abs(d) < _TINY else d
        c = b + an / c
        c = _TINY if abs(c) < _TINY else c
        d = 1.0 / d
        delta = d * c
        h *= delta
        if abs(delta - 1.0) < _EPS:
            break
    return math.exp(-x + a * math.log(x) - math.lgamma(a)) * h


def chi2_sf(x: float, dof: float) -> float:
    """Upper tail ``P(X > x)`` of the chi-square distribution with ``dof`` degrees of freedom."""
    if not dof > 0.0:
        raise ValueError(f"dof must be > 0, got {dof}")
    if x <= 0.0:
        return 1.0
    a, half = 0.5 * dof, 0.5 * x
    if half < a + 1.0:
        return 1.0 - _lower_series(a, half)
    return _upper_fraction(a, half)


def chi2_quantile(probability: float, dof: float) -> float:
    """x with ``P(X <= x) = probability`` for X chi-square with ``dof`` degrees of freedom.

    Raises
    ------
    ValueError
        ``probability`` outside (0, 1) or ``dof`` not positive.
    """
    if not 0.0 < probability < 1.0:
        raise ValueError(f"probability must be in (0, 1), got {probability}")
    if not dof > 0.0:
        raise ValueError(f"dof must be > 0, got {dof}")
    tail = 1.0 - probability
    low, high = 0.0, max(1.0, dof)
    while chi2_sf(high, dof) > tail:
        high *= 2.0
    for _ in range(200):
        mid = 0.5 * (low + high)
        if chi2_sf(mid, dof) > tail:
            low = mid
        else:
            high = mid
        if high - low <= 4.0 * _EPS * high:
            break
    return 0.5 * (low + high)


def normal_cdf(x: float) -> float:
    """Standard normal ``P(Z <= x)``, from ``erfc`` (accurate in both tails)."""
    return 0.5 * math.erfc(-x / math.sqrt(2.0))
