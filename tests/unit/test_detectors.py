"""Detectors and alarm conditions: the CUSUM recursions, hysteresis and delays, the drift test's level, baselines."""

from __future__ import annotations

import math

import numpy as np
import pytest

from estimator.channels.channel import ChannelSettings, Sample
from estimator.channels.channel_bank import ChannelBank
from estimator.detection.baseline import Baseline
from estimator.detection.detectors import ConditionTiming, DetectorBank, DetectorSettings
from estimator.detection.quantiles import chi2_quantile
from estimator.detection.run_length import variance_reference


def _bank(settings: DetectorSettings, channels: int = 1, sigma: float = 1.0) -> DetectorBank:
    bank = DetectorBank([settings] * channels, 2)
    for i in range(channels):
        bank.set_baseline(i, Baseline(1, "engineer", np.zeros(2), np.zeros((2, 2)), sigma, t=0.0))
    return bank


def _feed(bank: DetectorBank, eps: list[float], t0: float = 1.0, channel: int = 0) -> None:
    """Normalised innovations with no leverage and unit variance, one per second from t0."""
    one = np.ones(1)
    for k, value in enumerate(eps):
        bank.step(np.array([channel]), np.array([t0 + k]), np.array([value]), np.zeros(1), one, one)


def _drift_at(bank: DetectorBank, t: float, d2: float) -> None:
    """A drift check whose statistic is exactly ``d2`` (baseline at 0, covariance I, exact reference)."""
    bank.check_drift(np.array([0]), np.array([t]), np.array([[math.sqrt(d2), 0.0]]), np.eye(2)[None],
                     np.array([True]))


def test_offset_cusum_follows_the_tabular_recursion_and_signals_past_h() -> None:
    # A scale that never moves (half-life 1e15 samples) and no noise-shape table (the Gaussian case): eps
    # goes into the CUSUM as it is.
    bank = _bank(DetectorSettings(calibration_samples=0, offset_k=0.5, offset_h=4.0, offset_scale_half_life=1e15))
    eps = [0.2, 1.4, -0.3, 2.0, 1.5, 1.8, 0.9]
    up = down = 0.0
    for k, x in enumerate(eps):
        _feed(bank, [x], t0=1.0 + k)
        up, down = max(0.0, up + x - 0.5), max(0.0, down - x - 0.5)      # Page (1954), tabular form
        assert bank.statistics(0)["offset"] == pytest.approx(max(up, down), abs=1e-15)
    events = bank.take_events()
    assert [(e.kind, e.active, e.t) for e in events] == [("offset", True, 7.0)]   # 4.3 > 4 at the 7th sample
    assert events[0].onset == 1.0                       # the upper CUSUM was last zero at t = 1
    assert events[0].statistic == pytest.approx(4.3) and events[0].limit == 4.0


def test_variance_cusum_counts_halved_squared_differences_and_one_spike_cannot_raise_it() -> None:
    # A spike touches two differences, each clipped at clip^2 = 9: with h > 2 (9 - k) it cannot alarm alone.
    k = variance_reference(2.0)
    bank = _bank(DetectorSettings(calibration_samples=0, variance_h=20.0, variance_clip=3.0))
    _feed(bank, [0.0, 2.0])
    assert bank.statistics(0)["variance"] == pytest.approx(max(0.0, 2.0 - k))          # (2 - 0)^2 / 2 = 2
    _feed(bank, [0.0, 50.0, 0.0], t0=3.0)            # a spike: each difference is clipped at 3^2 = 9
    assert bank.statistics(0)["variance"] == pytest.approx(2.0 * (2.0 - k) + 2.0 * (9.0 - k))
    assert bank.take_events() == []
    _feed(bank, [0.0] * 20, t0=6.0)                               # back to quiet: it decays to 0
    assert bank.statistics(0)["variance"] == 0.0
    _feed(bank, [4.0 * (-1) ** j for j in range(6)], t0=30.0)   # the noise itself has grown
    assert [(e.kind, e.active) for e in bank.take_events()] == [("variance", True)]


def test_a_statistic_hovering_at_its_limit_does_not_chatter() -> None:
    # A statistic that wanders within a hair of its limit crosses it hundreds of times; with a 10 %
    # deadband the condition rises once and only clears after falling clearly below.
    rng = np.random.default_rng(5)
    bank = _bank(DetectorSettings(drift_alpha=0.01, timing=(("drift", ConditionTiming(deadband=0.1)),)))
    limit = chi2_quantile(0.99, 2)
    values = limit * (1.0 + rng.normal(0.0, 0.02, size=500))
    crossings = int(np.count_nonzero(np.diff(np.sign(values - limit)) != 0))
    for k, value in enumerate(values):
        _drift_at(bank, float(k), float(value))
    assert crossings > 100
    assert [e.active for e in bank.take_events()] == [True]
    for k in range(500, 503):                    # below limit * (1 - deadband): it clears
        _drift_at(bank, float(k), 0.85 * limit)
    assert [(e.active, e.t) for e in bank.take_events()] == [(False, 500.0)]


def test_on_and_off_delays_hold_a_condition_back_by_sample_time() -> None:
    timing = ConditionTiming(deadband=0.0, on_delay=10.0, off_delay=5.0)
    bank = _bank(DetectorSettings(drift_alpha=0.01, timing=(("drift", timing),)))
    high, low = 3.0 * chi2_quantile(0.99, 2), 0.1
    for t in range(0, 9):                         # 8 s above the limit: shorter than the on-delay
        _drift_at(bank, float(t), high)
    _drift_at(bank, 9.0, low)
    assert bank.take_events() == []
    for t in range(20, 31):                       # above from t = 20: active at t = 30
        _drift_at(bank, float(t), high)
    events = bank.take_events()
    assert [(e.active, e.t, e.onset) for e in events] == [(True, 30.0, 20.0)]
    for t in range(31, 37):                       # below from 31: cleared once 5 s have passed, at 36
        _drift_at(bank, float(t), low)
    assert [(e.active, e.t) for e in bank.take_events()] == [(False, 36.0)]


def test_noise_level_follows_differences_not_a_shifted_mean() -> None:
    # Doubled noise raises it; a mean shift of 5 sigma (what an adapting estimator's innovations look
    # like after a step) barely moves it.
    rng = np.random.default_rng(8)
    shifted = _bank(DetectorSettings(noise_ratio=1.5, offset_h=math.inf))
    _feed(shifted, list(5.0 + rng.normal(size=400)))
    assert shifted.statistics(0)["noise_level"] < 1.3
    noisy = _bank(DetectorSettings(noise_ratio=1.5))
    _feed(noisy, list(2.0 * rng.normal(size=400)))
    assert noisy.statistics(0)["noise_level"] == pytest.approx(2.0, rel=0.15)
    assert ("noise_level", True) in [(e.kind, e.active) for e in noisy.take_events()]


def test_without_a_baseline_nothing_is_judged() -> None:
    bank = DetectorBank([DetectorSettings(offset_h=1.0)], 2)
    _feed(bank, [5.0] * 10)
    assert bank.take_events() == []
    assert math.isnan(bank.statistics(0)["offset"])


@pytest.mark.parametrize("forgetting_factor", [1.0, 0.995])
def test_drift_test_false_alarm_rate_matches_its_nominal_level(forgetting_factor: float) -> None:
    # In control (the true parameters are the baseline, taken as exact), d^2 at a check is chi-square
    # with n dof, so the share of channels over the 1 - alpha quantile is alpha. Tolerance: 3 binomial
    # standard errors for 2,000 channels.
    channels, n_samples, alpha = 2000, 600, 0.05
    # One check per channel, near the end (the first samples are not predictable and not counted).
    settings = ChannelSettings(terms=("1", "u"), forgetting_factor=forgetting_factor,
                               detectors=DetectorSettings(commissioning_samples=0, drift_alpha=alpha,
                                                          drift_every=n_samples - 10, noise_ratio=math.inf))
    bank = ChannelBank({f"c{k}": settings for k in range(channels)})
    theta = np.array([1.0, 0.5])
    for k in range(channels):
        bank.set_baseline(f"c{k}", theta, noise_sigma=0.2)
    rng = np.random.default_rng(11)
    u = rng.normal(size=(n_samples, channels))
    y = theta[0] + theta[1] * u + rng.normal(0.0, 0.2, size=(n_samples, channels))
    for j in range(n_samples):
        bank.apply([Sample(f"c{k}", float(y[j, k]), {"u": float(u[j, k])}) for k in range(channels)])
    raised = {e.channel for e in bank.take_events() if e.condition is not None and e.condition.kind == "drift"}
    share = len(raised) / channels
    assert abs(share - alpha) < 3.0 * math.sqrt(alpha * (1 - alpha) / channels), share
    views = bank.view()
    d2 = np.array([v.detectors["drift"].statistic for v in views.values()])
    assert np.isfinite(d2).all()
    assert abs(np.mean(d2 > chi2_quantile(0.5, 2)) - 0.5) < 0.05          # the median too


def test_baseline_is_learned_after_commissioning_versioned_and_cleared_by_a_reset() -> None:
    settings = ChannelSettings(terms=("1", "u"), detectors=DetectorSettings(commissioning_samples=50))
    bank = ChannelBank({"a": settings})
    rng = np.random.default_rng(2)

    def feed(count: int, start: int, gain: float = 0.5) -> None:
        for j in range(start, start + count):
            u = float(rng.normal())
            bank.apply_one(Sample("a", 1.0 + gain * u + float(rng.normal(0, 0.1)), {"u": u}, float(j)))

    feed(49, 0)
    assert bank.view()["a"].baseline is None and bank.baselines("a") == []
    feed(1, 49)
    first = bank.view()["a"].baseline
    assert first is not None and (first.version, first.source, first.samples, first.t) == (1, "learned", 50, 49.0)
    assert first.parameters == pytest.approx([1.0, 0.5], abs=0.05)
    assert first.noise_sigma == pytest.approx(0.1, rel=0.35)
    events = bank.take_events()
    assert [e.baseline.version for e in events if e.baseline is not None] == [1]
    engineer = bank.set_baseline("a", [1.0, 0.5], noise_sigma=0.1, note="calibrated 2026-11-30")
    assert engineer.version == 2 and [b.version for b in bank.baselines("a")] == [1, 2]
    bank.reset("a", t=100.0)
    assert bank.view()["a"].baseline is None and bank.view()["a"].commissioned == 0
    assert [b.version for b in bank.baselines("a")] == [1, 2]          # the history stays
    feed(50, 100)
    assert bank.view()["a"].baseline.version == 3


def test_a_gain_change_raises_the_drift_condition_and_not_the_others() -> None:
    settings = ChannelSettings(terms=("1", "u"), forgetting_factor=0.995,
                               detectors=DetectorSettings(commissioning_samples=300))
    bank = ChannelBank({"a": settings})
    rng = np.random.default_rng(4)
    for j in range(1500):
        gain = 0.5 if j < 800 else 0.53                 # a 6 % gain change at sample 800
        u = float(rng.normal())
        bank.apply_one(Sample("a", 1.0 + gain * u + float(rng.normal(0, 0.05)), {"u": u}, float(j)))
    kinds = [(e.condition.kind, e.condition.active) for e in bank.take_events() if e.condition is not None]
    assert ("drift", True) in kinds
    assert {k for k, _ in kinds} == {"drift"}, kinds
