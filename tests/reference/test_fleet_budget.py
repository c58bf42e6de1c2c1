"""A plant-wide false-alarm budget turned into thresholds: the arithmetic, and the variance chart's fit."""

from __future__ import annotations

import math

import numpy as np
import pytest

from estimator.detection.run_length import offset_arl, variance_reference
from service.config.false_alarm_budget import VARIANCE_FIT, derive_thresholds
from service.config.settings import ConfigError, parse_config


def test_one_false_alarm_per_ten_minutes_over_a_thousand_channels() -> None:
    # EEMUA 191's steady-state figure (about one alarm per ten minutes per operator; secondary sources,
    # see REFERENCES.md) spent on false alarms alone: 1,000 channels sampled every 10 s, 3 detectors each.
    b = derive_thresholds(1.0, 600.0, 10.0, 1000)
    assert b.rate_per_detector == pytest.approx(1.0 / (600.0 * 3 * 1000))
    assert b.arl0 == pytest.approx(180_000.0)
    assert offset_arl(b.offset_h, 1.0, states=200) >= b.arl0 > offset_arl(b.offset_h * 0.99, 1.0, states=200)
    a, slope = VARIANCE_FIT
    assert math.exp(a + slope * b.variance_h) == pytest.approx(b.arl0, rel=1e-9)
    assert b.drift_alpha == pytest.approx(b.rate_per_detector * 10.0 * 25)
    assert 1.0 < b.offset_delay < 10.0 and b.variance_delay > 10.0
    assert "180000" in b.explain().replace(",", "") or "1.8e+05" in b.explain()


def test_more_channels_or_a_tighter_budget_raise_the_thresholds() -> None:
    base = derive_thresholds(1.0, 600.0, 10.0, 100)
    more = derive_thresholds(1.0, 600.0, 10.0, 10_000)
    assert more.offset_h > base.offset_h and more.variance_h > base.variance_h and more.drift_alpha < base.drift_alpha
    assert more.offset_delay > base.offset_delay


def test_a_budget_that_leaves_no_room_is_refused_with_its_key() -> None:
    with pytest.raises(ValueError, match="every sample may alarm"):
        derive_thresholds(100.0, 1.0, 1.0, 1)
    with pytest.raises(ConfigError, match=r"alarms\.budget"):
        parse_config({"channels": {"a": {"terms": ["1"]}},
                      "alarms": {"budget": {"false_alarms": 100, "per_seconds": 1, "sample_period": 1}}})


def test_the_budget_sets_thresholds_a_channel_does_not_set_itself() -> None:
    channels = {"a": {"terms": ["1"]}, "b": {"terms": ["1"], "detectors": {"offset": {"h": 9.5}}}}
    config = parse_config({"channels": channels,
                           "alarms": {"budget": {"false_alarms": 1, "per_seconds": 600, "sample_period": 10}}})
    budget = config.budget_thresholds()
    settings = config.channel_settings()
    assert budget is not None
    assert settings["a"].detectors.offset_h == budget.offset_h
    assert settings["b"].detectors.offset_h == 9.5
    assert settings["a"].detectors.variance_h == settings["b"].detectors.variance_h == budget.variance_h


@pytest.mark.parametrize("h", [20.0, 25.0])
def test_variance_chart_fit_matches_simulated_run_lengths(h: float) -> None:
    # Re-measures the fit VARIANCE_FIT was made from (differences of N(0,1) innovations, ratio 2, clip 3; our own
    # Monte Carlo). Tolerance: 4 standard errors of the simulated mean plus the fit's worst residual, 3 %.
    k = variance_reference(2.0)
    rng = np.random.default_rng(int(h))
    runs = 2000
    s = np.zeros(runs)
    previous = rng.normal(size=runs)
    length = np.zeros(runs)
    going = np.ones(runs, dtype=bool)
    for n in range(1, 200_000):
        x = rng.normal(size=runs)
        d = x - previous
        previous = x
        s = np.where(going, np.maximum(0.0, s + np.minimum(0.5 * d * d, 9.0) - k), s)
        hit = going & (s > h)
        length[hit] = n
        going &= ~hit
        if not going.any():
            break
    assert not going.any()
    se = length.std(ddof=1) / math.sqrt(runs)
    fitted = math.exp(VARIANCE_FIT[0] + VARIANCE_FIT[1] * h)
    assert abs(length.mean() - fitted) < 4.0 * se + 0.03 * fitted, (length.mean(), se, fitted)
