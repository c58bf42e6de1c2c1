"""One channel through the ChannelBank: weights, order of work, rejections that leave state untouched."""

from __future__ import annotations

import math

import numpy as np
import pytest

from estimator.channels.channel import ChannelSettings, Sample, SampleOutcome, WeightRule
from estimator.channels.channel_bank import ChannelBank
from estimator.recursive.rwls import RecursiveWLSBank


class OneChannel:
    """One channel of a ChannelBank, with the single-channel call shape these tests read best in."""

    def __init__(self, settings: ChannelSettings) -> None:
        self.bank_of_channels = ChannelBank({"c": settings})
        group = self.bank_of_channels._lanes["c"].group
        self.estimator, self.tracker = group.wls, group.tracker
        self.builder = self.bank_of_channels._lanes["c"].builder
        self.counters = self.bank_of_channels._lanes["c"].counters

    def apply(self, inputs: dict, y: float, **kwargs: float) -> SampleOutcome:
        return self.bank_of_channels.apply_one(Sample("c", y, inputs, **kwargs))


def _state_arrays(pipeline: OneChannel) -> list[np.ndarray]:
    bank = pipeline.estimator.state()
    tracker = pipeline.tracker.state()
    arrays = [bank.factor, bank.effective_count, bank.effective_count_sq, bank.sample_count]
    arrays += [np.asarray(v) for v in vars(tracker).values() if isinstance(v, np.ndarray)]
    return arrays


def _same(a: list[np.ndarray], b: list[np.ndarray]) -> bool:
    return len(a) == len(b) and all(np.array_equal(x, y, equal_nan=True) for x, y in zip(a, b, strict=True))


def test_unit_weighting_is_the_bank_with_unit_weights_bit_for_bit() -> None:
    rng = np.random.default_rng(1)
    pipeline = OneChannel(ChannelSettings(terms=("1", "u", "u^2"), forgetting_factor=0.99))
    bank = RecursiveWLSBank(1, 3, 0.99)
    for _ in range(300):
        u = float(rng.normal())
        y = 1.0 + 2.0 * u - 0.5 * u * u + float(rng.normal(0.0, 0.1))
        outcome = pipeline.apply({"u": u}, y)
        e, leverage = bank.update_one(0, [1.0, u, u * u], y, 1.0)
        assert outcome.status == "applied" and outcome.weight == 1.0
        assert (outcome.innovation == e or (math.isnan(e) and math.isnan(outcome.innovation)))
        assert outcome.leverage == leverage
    assert np.array_equal(pipeline.estimator.factor(), bank.factor())


def test_sample_weighting_uses_sigma_then_weight_and_rejects_neither() -> None:
    pipeline = OneChannel(ChannelSettings(terms=("1",), weighting="sample"))
    assert pipeline.apply({}, 1.0, sigma=0.5).weight == 4.0          # w = 1 / sigma^2
    assert pipeline.apply({}, 1.0, weight=3.0).weight == 3.0
    assert pipeline.apply({}, 1.0, sigma=0.5, weight=3.0).weight == 4.0   # sigma wins
    assert pipeline.apply({}, 1.0).reason == "missing_weight"
    assert pipeline.apply({}, 1.0, sigma=0.0).reason == "bad_sigma"
    assert pipeline.apply({}, 1.0, sigma=1e-200).reason == "bad_sigma"   # 1 / sigma^2 overflows
    assert pipeline.apply({}, 1.0, sigma=1e200).reason == "bad_sigma"    # 1 / sigma^2 underflows to 0
    assert pipeline.apply({}, 1.0, weight=-1.0).reason == "bad_weight"
    assert pipeline.counters.applied == 3
    assert pipeline.counters.refused == {"missing_weight": 1, "bad_sigma": 3, "bad_weight": 1}


def test_tracked_weight_is_the_inverse_variance_known_before_the_sample() -> None:
    rng = np.random.default_rng(2)
    settings = ChannelSettings(terms=("1", "u"), weighting="tracked", initial_sigma=2.0, noise_warmup=5)
    pipeline = OneChannel(settings)
    for k in range(200):
        before = pipeline.tracker.variance_one(0)
        u = float(rng.normal())
        outcome = pipeline.apply({"u": u}, 0.5 + u + float(rng.normal(0.0, 0.3)))
        expected = 1.0 / before if math.isfinite(before) else 1.0 / 4.0   # initial_sigma^2 = 4
        assert outcome.weight == expected, k


def test_weight_rules_multiply_inside_the_band_only() -> None:
    rule = WeightRule(input="u", low=1.0, high=2.0, factor=4.0)
    pipeline = OneChannel(ChannelSettings(terms=("1", "u"), weight_rules=(rule,)))
    assert pipeline.apply({"u": 1.5}, 1.0).weight == 4.0
    assert pipeline.apply({"u": 2.0}, 1.0).weight == 4.0     # bounds are inclusive
    assert pipeline.apply({"u": 2.5}, 1.0).weight == 1.0


@pytest.mark.parametrize("inputs, y, kwargs, reason", [
    ({"u": math.nan}, 1.0, {}, "non_finite"),
    ({"u": 1.0}, math.inf, {}, "non_finite"),
    ({}, 1.0, {}, "missing_input"),
    ({"u": 1.0}, 1.0, {"t": 9.0}, "duplicate_time"),   # the last accepted t is 9
    ({"u": 1.0}, 1.0, {"t": 5.0}, "out_of_order"),
])
def test_rejected_sample_leaves_every_array_and_lag_untouched(inputs: dict, y: float, kwargs: dict,
                                                              reason: str) -> None:
    pipeline = OneChannel(ChannelSettings(terms=("1", "u", "y[-1]"), forgetting_factor=0.98,
                                               weighting="tracked"))
    rng = np.random.default_rng(3)
    for k in range(50):
        pipeline.apply({"u": float(rng.normal())}, float(rng.normal()), t=float(k) - 40.0)
    before = _state_arrays(pipeline)
    lags = pipeline.builder.state()
    outcome = pipeline.apply(inputs, y, **kwargs)
    assert (outcome.status, outcome.reason) == ("refused", reason)
    assert _same(before, _state_arrays(pipeline))
    assert pipeline.builder.state() == lags
    assert pipeline.counters.refused == {reason: 1}


def test_arx_channel_reports_warmup_until_its_lags_fill() -> None:
    pipeline = OneChannel(ChannelSettings(terms=("1", "y[-2]", "u[-1]")))
    statuses = [pipeline.apply({"u": float(k)}, float(k) * 0.5).status for k in range(4)]
    assert statuses == ["warmup", "warmup", "applied", "applied"]
    assert (pipeline.counters.warmup, pipeline.counters.applied) == (2, 2)


def test_operating_point_model_supplies_the_tracked_weight_once_warm() -> None:
    rng = np.random.default_rng(4)
    settings = ChannelSettings(terms=("1", "load"), weighting="tracked", noise_model_terms=("1", "load"))
    pipeline = OneChannel(settings)
    for _ in range(3000):
        load = float(rng.uniform(0.0, 3.0))
        sigma = math.exp(0.5 * (-2.0 + 0.8 * load))   # ln sigma^2 = -2 + 0.8 load (invented)
        pipeline.apply({"load": load}, 1.0 + 0.2 * load + float(rng.normal(0.0, sigma)))
    low = pipeline.apply({"load": 0.1}, 1.02).weight
    high = pipeline.apply({"load": 2.9}, 1.58).weight
    # The model's weights follow the operating point: exp(0.8 * 2.8) = 9.4 times apart
    # in truth; a factor 4 either side of that is generous for 3000 noisy samples.
    assert 9.4 / 4 < low / high < 9.4 * 4


def test_settings_validate_their_arguments() -> None:
    with pytest.raises(ValueError, match=r"forgetting_factor must be in \(0, 1\], got 0.0"):
        ChannelSettings(terms=("1",), forgetting_factor=0.0)
    with pytest.raises(ValueError, match="weighting must be one of"):
        ChannelSettings(terms=("1",), weighting="other")
    with pytest.raises(ValueError, match="factor must be finite and > 0"):
        WeightRule("u", 0.0, 1.0, 0.0)
