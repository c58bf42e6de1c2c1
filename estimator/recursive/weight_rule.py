"""Whether a sample's declared sigma or weight can weight the recursion: one rule, for one value or whole arrays.

A weight ``w`` is usable when it is finite and ``> 0`` (the update scales its row by
``sqrt(w)``). A sigma is usable when it is ``> 0`` and the weight it stands for,
``w = 1 / sigma^2``, is usable: the square must neither overflow (then ``w = 0``)
nor come so close to zero that its reciprocal overflows (then ``w = inf``).

The rule is written once, as an expression of comparisons and one product that
means the same for a Python float and for a float64 array (``&`` of bools is
``and`` for both), so the scalar forms (the exact decoder, one sample at a time)
and the array forms (whole columns, a vectorised update) cannot drift apart.
Division is kept out of it on purpose: a Python float divided by zero raises
where numpy gives ``inf``. In IEEE double, ``1 / v`` rounds to infinity exactly
when ``v <= 2**-1024``: from ``2**-1024`` up, ``1 / v`` lies below the midpoint
``2**1024 - 2**970`` between the largest double and ``2**1024``, and the next
double above ``2**-1024`` (a subnormal, ``2**-1024 + 2**-1074``) already does.
So ``1 / sigma^2`` is finite and ``> 0`` exactly when ``2**-1024 < sigma^2 < inf``.
"""

from __future__ import annotations

import math
from typing import overload

import numpy as np
from numpy.typing import ArrayLike, NDArray

__all__ = ["sigma_is_usable", "usable_sigmas", "usable_weights", "weight_is_usable"]

FloatArray = NDArray[np.float64]
BoolArray = NDArray[np.bool_]

# The largest variance whose reciprocal overflows: 1 / v is finite exactly when v > 2**-1024 (docstring).
_RECIPROCAL_OVERFLOWS_AT = 2.0**-1024


@overload
def _weight_rule(weight: float) -> bool: ...
@overload
def _weight_rule(weight: FloatArray) -> BoolArray: ...
def _weight_rule(weight: float | FloatArray) -> bool | BoolArray:
    return (weight > 0.0) & (weight < math.inf)            # NaN fails both


@overload
def _sigma_rule(sigma: float) -> bool: ...
@overload
def _sigma_rule(sigma: FloatArray) -> BoolArray: ...
def _sigma_rule(sigma: float | FloatArray) -> bool | BoolArray:
    variance = sigma * sigma
    # w = 1 / sigma^2 finite and > 0, without dividing (module docstring); NaN fails every comparison.
    return (sigma > 0.0) & (variance > _RECIPROCAL_OVERFLOWS_AT) & (variance < math.inf)


def weight_is_usable(weight: float) -> bool:
    """Whether a declared weight is finite and ``> 0`` (the rule of :func:`usable_weights` for one value)."""
    return _weight_rule(weight)


def sigma_is_usable(sigma: float) -> bool:
    """Whether ``sigma > 0`` and ``1 / sigma^2`` is a usable weight (:func:`usable_sigmas` for one value)."""
    return _sigma_rule(sigma)


def usable_weights(weight: ArrayLike) -> BoolArray:
    """Which weights are finite and ``> 0``.

    Parameters
    ----------
    weight : array_like, shape (n,)
        Declared weights (NaN, inf, zero and negative values are not usable).

    Returns
    -------
    ndarray of bool, shape (n,)
    """
    return _weight_rule(np.asarray(weight, dtype=np.float64))


def usable_sigmas(sigma: ArrayLike) -> BoolArray:
    """Which sigmas are ``> 0`` with ``1 / sigma^2`` finite and ``> 0``.

    Parameters
    ----------
    sigma : array_like, shape (n,)
        Declared noise standard deviations, in units of y.

    Returns
    -------
    ndarray of bool, shape (n,)
    """
    s = np.asarray(sigma, dtype=np.float64)
    with np.errstate(over="ignore", under="ignore", invalid="ignore"):   # a square past either end is judged
        return _sigma_rule(s)
