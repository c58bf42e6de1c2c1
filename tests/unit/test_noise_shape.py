"""The noise-shape table: normal scores through a channel's own calibration, ties, tails, and how the bank uses it."""

from __future__ import annotations

import math

import numpy as np
import pytest
from scipy.special import ndtri
from scipy.stats import norm

from estimator.detection import noise_shape
from estimator.detection.baseline import Baseline
from estimator.detection.detectors import DEFAULT_TIMING, DetectorBank, DetectorSettings
from estimator.detection.run_length import calibration_margin, variance_exponent, variance_reference
from service.config.settings import parse_config
from tests.support.state_equality import assert_same_state


def _table(values: np.ndarray) -> np.ndarray:
    """The score table (KNOTS,) of one channel calibrated on ``values``, one at a time."""
    table = np.zeros((1, noise_shape.KNOTS))
    row = np.zeros(1, dtype=np.intp)
    for x in values:
        noise_shape.accumulate(table, row, np.array([x]))
    return noise_shape.finish(table[0], len(values))


def _score(table: np.ndarray, x: float) -> float:
    return float(noise_shape.scores(table[None, :], np.zeros(1, dtype=np.intp), np.array([x]))[0])


def test_gaussian_noise_gives_nearly_the_identity() -> None:
    # The Gaussian special case: z = Phi^-1(G(x)) is x up to the empirical distribution's sampling error,
    # sqrt(p (1 - p) / N) / phi(x) in score units (common practice: the binomial standard error of an
    # empirical CDF, carried through Phi^-1 by the delta method). Tolerance: 4 of those plus the grid's 0.25.
    n = 4000
    table = _table(np.random.default_rng(1).standard_normal(n))
    for x in (-2.5, -1.0, -0.3, 0.0, 0.6, 1.5, 2.5):
        p = norm.cdf(x)
        se = math.sqrt(p * (1.0 - p) / n) / norm.pdf(x)
        assert abs(_score(table, x) - x) < 4.0 * se + 0.02, x
    assert np.all(np.diff(table) >= 0.0)                     # monotone


def test_heavy_tails_are_pulled_in_and_the_scores_are_standard_normal() -> None:
    # Student t with 3 dof, unit variance: its normal scores are N(0, 1) whatever the tails (the
    # probability-integral transform; common practice). Scores of fresh values: mean 0, variance 1 and the
    # normal's tail share, within 4 standard errors of our own Monte Carlo.
    rng = np.random.default_rng(2)
    calibration = rng.standard_t(3.0, 2000) / math.sqrt(3.0)
    table = _table(calibration)
    fresh = rng.standard_t(3.0, 20_000) / math.sqrt(3.0)
    z = noise_shape.scores(np.repeat(table[None, :], fresh.size, axis=0), np.arange(fresh.size), fresh)
    assert abs(z.mean()) < 4.0 / math.sqrt(fresh.size) + 0.05
    assert abs(z.var() - 1.0) < 4.0 * math.sqrt(2.0 / fresh.size) + 4.0 * math.sqrt(2.0 / calibration.size)
    assert abs(np.mean(np.abs(z) > 2.0) - 2.0 * norm.sf(2.0)) < 0.012
    # The raw values carry eight times the normal's share beyond 3 sigma; the scores none beyond the table.
    assert np.abs(fresh).max() > 10.0 and np.abs(z).max() <= np.abs(table).max()


def test_ties_map_to_the_middle_of_their_jump_then_to_unit_variance() -> None:
    # Values published in steps: -1, 0, 1 with probabilities 1/4, 1/2, 1/4. Mid-ranks: Phi^-1(1/8), 0,
    # Phi^-1(7/8); standardised by their own spread over the calibration (the tie correction).
    values = np.repeat([-1.0, 0.0, 0.0, 1.0], 250)
    table = _table(values)
    mid = float(ndtri(7.0 / 8.0))
    spread = math.sqrt(0.5 * mid * mid)
    assert _score(table, 0.0) == pytest.approx(0.0, abs=1e-12)
    assert _score(table, 1.0) == pytest.approx(mid / spread, rel=1e-12)
    assert _score(table, -1.0) == pytest.approx(-mid / spread, rel=1e-12)
    # An atom between two knots is split between them and read back with the same weights: still mid-jump.
    shifted = _table(values + 0.1)
    assert _score(shifted, 0.1) == pytest.approx(0.0, abs=0.05)


def test_values_beyond_the_calibration_saturate() -> None:
    table = _table(np.linspace(-1.0, 1.0, 500))
    assert _score(table, 7.0) == _score(table, 1e6) == table[-1]
    assert _score(table, -50.0) == table[0]
    assert math.isnan(_score(table, math.nan))


def test_calibration_margin_follows_from_the_exponent() -> None:
    # theta* of a CUSUM of chi2_1 increments with k = 2 ln 2 (ratio 2) is exactly 1/4:
    # -ln(1 - 2/4) / 2 = ln 2 / 2 = (2 ln 2) / 4 (common practice, exact).
    k = variance_reference(2.0)
    assert variance_exponent(k) == pytest.approx(0.25, abs=1e-12)
    # Larger thresholds are more sensitive to a wrong reference; a longer calibration needs less margin.
    assert calibration_margin(60.0, k, 1000) > calibration_margin(16.0, k, 1000) > 0.0
    assert calibration_margin(60.0, k, 4000) == pytest.approx(calibration_margin(60.0, k, 1000) / 4.0)
    assert calibration_margin(60.0, k, 0) == 0.0


def _bank(settings: DetectorSettings, channels: int = 1) -> DetectorBank:
    bank = DetectorBank([settings] * channels, 2)
    for i in range(channels):
        bank.set_baseline(i, Baseline(1, "engineer", np.zeros(2), np.zeros((2, 2)), 1.0, t=0.0))
    return bank


def _step(bank: DetectorBank, t: float, eps: np.ndarray) -> None:
    k = eps.shape[0]
    bank.step(np.arange(k, dtype=np.intp), np.full(k, t), eps, np.zeros(k), np.ones(k), np.ones(k))


def test_nothing_is_judged_by_the_cusums_while_the_shape_is_learned() -> None:
    bank = _bank(DetectorSettings(calibration_samples=50, offset_h=3.0, variance_h=20.0, noise_ratio=math.inf))
    rng = np.random.default_rng(3)
    for n in range(50):                       # heavy-tailed noise twice the baseline's sigma: no alarm yet
        _step(bank, float(n), np.array([2.0 * rng.standard_t(3.0)]))
    assert [e.kind for e in bank.take_events()] == []
    assert bank.calibration(0) == (50, 50)
    assert bank.statistics(0)["offset"] == 0.0
    # Judged from the next sample on, against the calibration: the same noise is in control, and a step of
    # 6 (three times its scale) is found.
    for n in range(50, 90):
        _step(bank, float(n), np.array([2.0 * rng.standard_t(3.0)]))
    assert bank.take_events() == []
    for n in range(90, 100):
        _step(bank, float(n), np.array([6.0 + 2.0 * rng.standard_t(3.0)]))
    assert ("offset", True) in [(e.kind, e.active) for e in bank.take_events()]


def test_a_new_baseline_learns_the_shape_anew() -> None:
    bank = _bank(DetectorSettings(calibration_samples=5))
    for n in range(5):
        _step(bank, float(n), np.array([0.5]))
    assert bank.calibration(0) == (5, 5)
    bank.set_baseline(0, Baseline(2, "engineer", np.zeros(2), np.zeros((2, 2)), 1.0, t=10.0))
    assert bank.calibration(0) == (0, 5) and math.isnan(bank.statistics(0)["offset"])


def test_the_batch_and_one_channel_at_a_time_give_the_same_bits() -> None:
    rng = np.random.default_rng(4)
    eps = rng.standard_t(3.0, size=(300, 5)) * np.array([1.0, 2.0, 0.5, 3.0, 1.0])
    settings = DetectorSettings(calibration_samples=100, offset_h=4.0, variance_h=18.0)
    together = _bank(settings, channels=5)
    alone = _bank(settings, channels=5)
    for n in range(300):
        _step(together, float(n), eps[n])
        for i in range(5):
            alone.step(np.array([i]), np.array([float(n)]), eps[n, i:i + 1], np.zeros(1), np.ones(1), np.ones(1))
    assert_same_state(together.state(), alone.state())


def test_a_cleared_cusum_restarts_and_a_quick_return_raises_nothing_new() -> None:
    # The chattering: a condition that clears and comes back within minutes. At the default timing
    # (offset: clear below h / 2 held for 30 minutes) the alarm stays raised through a short lull.
    bank = _bank(DetectorSettings(calibration_samples=0, offset_scale_half_life=1e15))
    t = 0.0
    for _ in range(10):                                  # a 3-sigma offset: raised
        t += 10.0
        _step(bank, t, np.array([3.0]))
    for _ in range(60):                                  # ten minutes back to normal, then the offset again
        t += 10.0
        _step(bank, t, np.array([0.0]))
    for _ in range(10):
        t += 10.0
        _step(bank, t, np.array([3.0]))
    assert [(e.kind, e.active) for e in bank.take_events()] == [("offset", True)]
    for _ in range(200):                                 # 2,000 s back to normal: cleared once, CUSUM at 0
        t += 10.0
        _step(bank, t, np.array([0.0]))
    events = bank.take_events()
    assert [(e.kind, e.active) for e in events] == [("offset", False)]
    assert events[0].t - (t - 2000.0) >= DEFAULT_TIMING["offset"].off_delay
    assert bank.statistics(0)["offset"] == 0.0


def test_alarm_timing_defaults_per_detector_and_a_table_overrides_only_what_it_names() -> None:
    config = parse_config({"channels": {"a": {"terms": ["1"], "alarms": {"offset": {"off_delay": 60}}}}})
    detectors = config.channel_settings()["a"].detectors
    assert detectors.timing_of("offset").off_delay == 60.0
    assert detectors.timing_of("offset").deadband == DEFAULT_TIMING["offset"].deadband == 0.5
    assert detectors.timing_of("noise_level") == DEFAULT_TIMING["noise_level"]
    assert detectors.calibration_samples == 1000
