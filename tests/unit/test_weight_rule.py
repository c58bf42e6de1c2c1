"""The one rule for a sample's sigma and weight: scalar and array forms, and every path that applies it."""

from __future__ import annotations

import math

import numpy as np
import pytest

from estimator import (
    ChannelBank,
    ChannelSettings,
    Sample,
    SampleColumns,
    sigma_is_usable,
    usable_sigmas,
    usable_weights,
    weight_is_usable,
)
from service.broker_link.payload import decode_payload
from service.broker_link.payload_columns import decode_columns

# 2**-1024 is the largest variance whose reciprocal overflows (the module's docstring); its square root is
# 2**-512, so sigmas near 2**-512 and near sqrt(largest double) are where the rule turns.
SMALL_EDGE = 2.0**-512
LARGE_EDGE = math.sqrt(np.finfo(np.float64).max)


def _near(x: float, steps: int = 4) -> list[float]:
    """``x`` and its ``steps`` nearest doubles on either side."""
    out = [x]
    below = above = x
    for _ in range(steps):
        below, above = float(np.nextafter(below, -math.inf)), float(np.nextafter(above, math.inf))
        out += [below, above]
    return out


def _sigmas() -> list[float]:
    rng = np.random.default_rng(20)
    # Random bit patterns cover every exponent, subnormals, infinities and NaNs alike.
    bits = np.iinfo(np.int64)
    patterns = rng.integers(bits.min, bits.max, size=20_000, dtype=np.int64, endpoint=True).view(np.float64).tolist()
    specials = [0.0, -0.0, 1.0, -1.0, math.inf, -math.inf, math.nan, 5e-324, 1e-155, 1e-200, 1e200, 1e155]
    return [*specials, *_near(SMALL_EDGE), *_near(LARGE_EDGE), *_near(-SMALL_EDGE), *patterns]


def _weight_by_division(sigma: float) -> float:
    """The weight a sigma stands for, ``1 / sigma^2``, computed as the definition says."""
    with np.errstate(all="ignore"):
        return float(np.float64(1.0) / (np.float64(sigma) * np.float64(sigma)))


def test_a_sigma_is_usable_exactly_when_it_is_positive_and_its_weight_is_finite_and_positive() -> None:
    sigmas = _sigmas()
    by_definition = [s > 0.0 and 0.0 < _weight_by_division(s) < math.inf for s in sigmas]
    assert [sigma_is_usable(s) for s in sigmas] == by_definition
    assert usable_sigmas(sigmas).tolist() == by_definition
    # The edges themselves: 1 / sigma^2 overflows at sigma = 2**-512 and is finite one double above.
    assert not sigma_is_usable(SMALL_EDGE) and sigma_is_usable(float(np.nextafter(SMALL_EDGE, 1.0)))
    assert sum(by_definition) > 1000                # the random patterns reach both answers


def test_a_weight_is_usable_exactly_when_it_is_finite_and_positive() -> None:
    weights = _sigmas()
    by_definition = [math.isfinite(w) and w > 0.0 for w in weights]
    assert [weight_is_usable(w) for w in weights] == by_definition
    assert usable_weights(weights).tolist() == by_definition


def test_the_array_forms_judge_whole_columns_without_warnings() -> None:
    # Squares that overflow and underflow are judged, not warned about (warnings are errors in this run).
    assert usable_sigmas(np.array([1e300, 1e-300, 0.5, math.nan])).tolist() == [False, False, True, False]
    assert usable_weights(np.array([], dtype=np.float64)).shape == (0,)


@pytest.mark.parametrize("sigma", [1e-155, 1e-160, 2.0**-512])
def test_a_sigma_whose_weight_overflows_is_refused_alike_by_decoders_and_both_estimator_paths(sigma: float) -> None:
    # sigma^2 is a positive subnormal here, yet 1 / sigma^2 is inf: no weight. The payload decoders always
    # refused it; the estimator now refuses it the same way on its own (a CSV replay reaches it directly).
    assert sigma * sigma > 0.0 and math.isinf(_weight_by_division(sigma))
    body = f'{{"y": 1.0, "u": {{"u": 0.5}}, "sigma": {sigma!r}}}'.encode()
    samples, refusals = decode_payload(body, input_names=["u"])
    assert samples == [] and [r.reason for r in refusals] == ["bad_sigma"]
    assert decode_columns(body, input_names=("u",)) is None            # the short path leaves it to the exact one
    for weighting in ("unit", "sample", "tracked"):
        settings = {"c": ChannelSettings(terms=("1", "u"), weighting=weighting)}
        exact = ChannelBank(settings).apply([Sample("c", 1.0, {"u": 0.5}, sigma=sigma)])
        assert [o.reason for o in exact] == ["bad_sigma"], weighting
        columns = SampleColumns()
        columns.append(1.0, {"u": 0.5}, sigma=sigma)
        assert ChannelBank(settings).apply_columns({"c": columns})["c"].refused == [(0, "bad_sigma")], weighting
