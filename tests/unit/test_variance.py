"""Noise-variance tracker: unbiasedness on simulated plants, twins, state, arguments.

Reference facts used below:
* v = e^2 / (1 + kappa h) has mean sigma^2 (estimator/noise/variance.py, eq. (1)); under
  Gaussian noise v / sigma^2 ~ chi2_1, so Var(v) = 2 sigma^4 (common practice).
* An EWMA of such samples has variance 2 sigma^4 alpha / (2 - alpha) (Roberts 1959);
  over T samples there are about T alpha / (2 - alpha) independent windows, so the
  time mean of the EWMA has variance about 2 sigma^4 / T, as the plain mean of T samples.
"""

from __future__ import annotations

import math

import numpy as np
import pytest

from estimator.noise.variance import NoiseVarianceTracker, TrackerState
from estimator.recursive.rwls import RecursiveWLSBank

SIGMAS = 4.0   # every noisy tolerance below is 4 standard errors: a false failure rate of 6e-5 per check


def _mean_tolerance(level: float, n_samples: int) -> float:
    """4 standard errors of the time mean of a tracked variance at ``level`` over n samples.

    Var(v) = 2 level^2 (chi2_1); the time mean of the EWMA has about the variance of the
    plain mean of its n samples (see the module docstring), 2 level^2 / n.
    """
    return SIGMAS * level * math.sqrt(2.0 / n_samples)


def _simulate(rng: np.random.Generator, trackers: list[NoiseVarianceTracker], n_steps: int,
              forgetting_factor: float, variance_at, *, feedback: bool = False,
              outlier_rate: float = 0.0) -> tuple[list[np.ndarray], np.ndarray]:
    """Run a real bank on y = 2 + 0.5 u + noise, u ~ N(0, 4), K channels in parallel.

    Feeds every tracker the bank's innovation, leverage and kappa (read before the
    update). With ``feedback`` the bank's weights are 1 / (first tracker's variance
    before the sample), 1 while it has none. Outliers replace the noise by
    +-10 sigma with probability ``outlier_rate``.

    Returns the trackers' variance after each step, each (n_steps, K), and the
    reference: the same EWMA run on the true variance (its expectation for a
    non-robust sample-based tracker), also (n_steps, K).
    """
    first = trackers[0]
    k = first.n_channels
    bank = RecursiveWLSBank(k, 2, forgetting_factor)
    reference = NoiseVarianceTracker(k, first.state().half_life, warmup=first.warmup)
    out = [np.empty((n_steps, k)) for _ in trackers]
    ref = np.empty((n_steps, k))
    for step in range(n_steps):
        u = 2.0 * rng.standard_normal(k)
        z = np.column_stack([np.ones(k), u])
        sigma = np.sqrt(np.broadcast_to(variance_at(step), (k,)))
        noise = sigma * rng.standard_normal(k)
        if outlier_rate:
            hit = rng.random(k) < outlier_rate
            noise = np.where(hit, 10.0 * sigma * rng.choice([-1.0, 1.0], size=k), noise)
        weight = None
        if feedback:
            prior = first.variance()
            weight = np.where(np.isfinite(prior), 1.0 / np.where(np.isfinite(prior), prior, 1.0), 1.0)
        kappa = bank.kappa()
        result = bank.update(z, 2.0 + 0.5 * u + noise, weight)
        for tracker, record in zip(trackers, out, strict=True):
            used = tracker.update(None, result.innovation, result.leverage, kappa)
            record[step] = tracker.variance()
        # v = sigma^2 exactly with leverage 0: the EWMA of the true variance, same skips
        reference.update(None, np.where(used, sigma, np.nan), np.zeros(k), 1.0)
        ref[step] = reference.variance()
    return out, ref


# ------------------------------------------------------------------ tracker: EWMA
def test_alpha_and_startup_debiasing_by_hand():
    tracker = NoiseVarianceTracker(1, half_life=1.0, warmup=1)   # alpha = 1 - 2^-1 = 1/2
    got = []
    for e in (1.0, 2.0, 3.0):
        tracker.update_one(0, e, 0.0, 1.0)
        got.append(tracker.variance_one(0))
    # debiased EWMA of v = 1, 4, 9 with weights alpha (1 - alpha)^(k-i): 1/2, 1/4, 1/8 normalised
    expected = [1.0, (0.5 * 1.0 + 4.0) / 1.5, (0.25 * 1.0 + 0.5 * 4.0 + 9.0) / 1.75]
    np.testing.assert_allclose(got, expected, rtol=1e-15)   # exact algebra, a few roundings


def test_half_life_halves_the_weight():
    tracker = NoiseVarianceTracker(1, half_life=50.0, warmup=1)
    for _ in range(400):
        tracker.update_one(0, 1.0, 0.0, 1.0)
    for _ in range(50):
        tracker.update_one(0, 0.0, 0.0, 1.0)
    # weights alpha (1 - alpha)^(450 - i): the 400 ones carry 2^-1 (1 - 2^-8) of the total
    # 1 - 2^-9; rel 1e-12 covers the rounding of 450 recursion steps (~1e-14)
    assert tracker.variance_one(0) == pytest.approx(0.5 * (1 - 2.0**-8) / (1 - 2.0**-9), rel=1e-12)


def test_normalisation_is_exact_in_short_runs_with_lambda_one():
    # With lambda = 1 and unit weights Var(e_k | Z) = sigma^2 (1 + h_k) exactly, even while the
    # bank has seen only a few samples and h is large; the raw e^2 is far too big then.
    rng = np.random.default_rng(11)
    k, n_steps, start, sigma2 = 2000, 30, 5, 2.25
    bank = RecursiveWLSBank(k, 2, 1.0)
    long_memory = 1e9   # alpha 7e-10: the debiased EWMA is the plain mean to 1e-8
    normalised = NoiseVarianceTracker(k, long_memory, warmup=1)
    raw = NoiseVarianceTracker(k, long_memory, warmup=1)
    for step in range(n_steps):
        u = 2.0 * rng.standard_normal(k)
        res = bank.update(np.column_stack([np.ones(k), u]), 2.0 + 0.5 * u + 1.5 * rng.standard_normal(k))
        if step >= start:   # from 5 samples on E[h] is finite (Gaussian regressors)
            normalised.update(None, res.innovation, res.leverage, 1.0)
            raw.update(None, res.innovation, np.zeros(k), 1.0)
    n = k * (n_steps - start)
    tol = _mean_tolerance(sigma2, n)   # 0.057 (2.5 %) for 50 000 samples
    assert abs(normalised.variance().mean() - sigma2) < tol   # measured +0.2 %
    # E[h] ~ n / (N - n - 1) for N = 5..29 prior samples: about +20 % on average; measured +20.4 %
    assert raw.variance().mean() - sigma2 > 5 * tol


@pytest.mark.parametrize("forgetting_factor", [1.0, 0.995])
def test_tracked_variance_is_unbiased_for_constant_sigma(forgetting_factor):
    rng = np.random.default_rng(12)
    k, n_steps, burn_in, sigma2 = 20, 3000, 1000, 2.25
    tracker = NoiseVarianceTracker(k, 200.0)
    (tracked,), _ = _simulate(rng, [tracker], n_steps, forgetting_factor, lambda _: sigma2)
    mean = tracked[burn_in:].mean()
    # 4 standard errors of 40 000 samples: 0.064 (2.8 %); measured -0.4 % (lambda 1), -0.3 % (0.995)
    assert abs(mean - sigma2) < _mean_tolerance(sigma2, k * (n_steps - burn_in))


def test_leverage_normalisation_removes_bias_of_short_memory():
    # lambda = 0.95 (memory 20 samples): E[kappa h] ~ 5 %, twice the tolerance.
    rng = np.random.default_rng(13)
    k, n_steps, burn_in, sigma2 = 20, 3000, 1000, 1.0
    tracker = NoiseVarianceTracker(k, 200.0)
    raw = _RawTracker(k, 200.0)
    (tracked, raw_tracked), _ = _simulate(rng, [tracker, raw], n_steps, 0.95, lambda _: sigma2)
    tol = _mean_tolerance(sigma2, k * (n_steps - burn_in))   # 0.028
    assert abs(tracked[burn_in:].mean() - sigma2) < tol   # measured +0.04 %
    assert raw_tracked[burn_in:].mean() - sigma2 > tol     # measured +5.5 %


class _RawTracker(NoiseVarianceTracker):
    """The tracker fed e^2 without the (1 + kappa h) normalisation."""

    def update(self, channels, innovation, leverage, kappa, elapsed=None):
        return super().update(channels, innovation, np.where(np.isinf(leverage), np.inf, 0.0), kappa, elapsed)


def test_tracked_variance_follows_step_and_ramp():
    rng = np.random.default_rng(14)
    k, half_life = 200, 100.0
    t_step, t_ramp, t_end = 400, 1400, 2300

    def variance_at(step):   # 1, step to 9 at 400, back to 1 at 1400, ramp to 9 over 300 samples
        if step < t_step:
            return 1.0
        if step < t_ramp:
            return 9.0
        return 1.0 + 8.0 * min(1.0, (step - t_ramp) / 300.0)

    tracker = NoiseVarianceTracker(k, half_life)
    (tracked,), reference = _simulate(rng, [tracker], t_end, 0.995, variance_at)
    per_channel_sd = 9.0 * math.sqrt(2 * (1 - 2**(-1 / half_life)) / (1 + 2**(-1 / half_life)))
    tol = SIGMAS * per_channel_sd / math.sqrt(k)   # 4 sd of a mean over 200 channels at level 9: 0.21
    for step in (t_step + 100, t_step + 300, t_step + 600, t_ramp + 150, t_ramp + 300, t_ramp + 600):
        # the channel mean follows the EWMA of the true variance (its expectation); measured |diff| <= 0.08
        assert abs(tracked[step].mean() - reference[step].mean()) < tol, step
    # three half-lives after the step, the old level keeps a weight 2^-3: within 11 % (+ noise) of 9;
    # measured 8.03
    assert abs(tracked[t_step + 300].mean() - 9.0) < 8.0 / 8.0 + tol


def test_tracked_weights_loop_stays_unbiased_with_heteroscedastic_noise():
    # w_k = 1 / (tracked variance before sample k) fed back into the bank; sigma^2 varies
    # 0.5 .. 3.5 with period 1500 samples, slowly against the half-life of 100.
    rng = np.random.default_rng(15)
    k, n_steps, burn_in = 20, 4000, 1000

    def variance_at(step):
        return 2.0 + 1.5 * math.sin(2 * math.pi * step / 1500.0)

    tracker = NoiseVarianceTracker(k, 100.0)
    (tracked,), reference = _simulate(rng, [tracker], n_steps, 0.995, variance_at, feedback=True)
    ratio = tracked[burn_in:].mean() / reference[burn_in:].mean()
    rms = math.sqrt(2.0**2 + 1.5**2 / 2)
    # 4 standard errors of 60 000 samples at the rms level 2.26, relative to the mean level 2:
    # 0.026; measured -0.4 %
    assert abs(ratio - 1.0) < _mean_tolerance(rms, k * (n_steps - burn_in)) / 2.0


# ------------------------------------------------------------------ tracker: robust
def test_consistency_factor_matches_quadrature():
    # E[min(X, c^2)], X ~ chi2_1, as 2 int_0^inf min(t^2, c^2) phi(t) dt; the trapezoid rule on a
    # 1e-4 grid to t = 40 is accurate to ~1e-9 (h^2 f'' / 12 with a kink at t = c)
    t = np.linspace(0.0, 40.0, 400_001)
    phi = np.exp(-0.5 * t * t) / math.sqrt(2 * math.pi)
    for clip in (0.5, 1.0, 1.5, 2.0, 3.0, 5.0):
        expected = 2.0 * np.trapezoid(np.minimum(t * t, clip * clip) * phi, t)
        got = NoiseVarianceTracker(1, robust=True, clip=clip).consistency_factor
        assert got == pytest.approx(expected, rel=1e-7), clip
    assert NoiseVarianceTracker(1).consistency_factor == 1.0


def test_robust_estimate_is_unbiased_for_gaussian_noise():
    # clip = 1.5 cuts 13 % of chi2_1 samples; without the factor 0.778 the estimate would be 22 % low
    rng = np.random.default_rng(16)
    k, n_steps, burn_in, sigma2 = 20, 3000, 1000, 2.0
    robust = NoiseVarianceTracker(k, 200.0, robust=True, clip=1.5)
    (tracked,), _ = _simulate(rng, [robust], n_steps, 0.995, lambda _: sigma2)
    # clipped samples have a smaller variance than chi2_1, so the chi2_1 tolerance is conservative;
    # measured -0.6 %
    assert abs(tracked[burn_in:].mean() - sigma2) < _mean_tolerance(sigma2, k * (n_steps - burn_in))


def test_robust_estimate_resists_gross_outliers():
    rng = np.random.default_rng(17)
    k, n_steps, burn_in, sigma2, rate = 20, 3000, 1000, 1.0, 0.01
    plain = NoiseVarianceTracker(k, 200.0)
    robust = NoiseVarianceTracker(k, 200.0, robust=True, clip=3.0)
    (p, r), _ = _simulate(rng, [plain, robust], n_steps, 0.995, lambda _: sigma2, outlier_rate=rate)
    # Plain: E[v] = 0.99 sigma^2 + 0.01 * 100 sigma^2 = 1.99 sigma^2; measured 1.99 +- 0.04 over 8 seeds.
    assert p[burn_in:].mean() > 1.5 * sigma2
    # Robust (Huber-type, bounded influence): every outlier is clipped at c^2 s^2, so the fixed
    # point s^2 = ((1 - eps) f sigma^2 + eps c^2 s^2) / f gives s^2 = (1 - eps) f / (f - eps c^2)
    # = 1.088 sigma^2 for f = 0.995, eps = 0.01, c = 3. The outliers also shake theta (unit
    # weights): kappa h (sigma_eff^2 - sigma^2) ~ 0.5 * 0.01 * 0.99 = +0.5 %. Tolerance: that bias
    # plus 4 standard errors, widened by 1.25 because clipped outliers (c^2 s^2 = 9) make Var(v)
    # about 2.8 instead of 2. Measured 1.117 here; 1.094 +- 0.007 over 8 other seeds.
    f = robust.consistency_factor
    predicted = (1 - rate) * f / (f - rate * 9.0) * 1.005
    tol = (predicted - 1.0) + 1.25 * _mean_tolerance(sigma2, k * (n_steps - burn_in))
    assert abs(r[burn_in:].mean() - sigma2) < tol


def test_robust_zero_estimate_is_not_absorbing():
    tracker = NoiseVarianceTracker(1, 10.0, robust=True, warmup=2)
    for _ in range(5):
        tracker.update_one(0, 0.0, 0.0, 1.0)   # a quantised sensor: e == 0 exactly
    assert tracker.variance_one(0) == 0.0
    for _ in range(5):
        tracker.update_one(0, 1.0, 0.0, 1.0)
    assert tracker.variance_one(0) > 0.1   # clipping at c^2 * 0 would have kept it at 0


# ------------------------------------------------------------------ tracker: time based
def test_time_based_with_constant_interval_equals_sample_based():
    rng = np.random.default_rng(18)
    k, dt = 4, 0.25   # dt / (50 dt) == 1 / 50 exactly, so alpha is identical
    for robust in (False, True):
        by_sample = NoiseVarianceTracker(k, 50.0, robust=robust)
        by_time = NoiseVarianceTracker(k, 50.0 * dt, time_based=True, robust=robust)
        for _ in range(600):
            e = rng.standard_normal(k) * np.where(rng.random(k) < 0.02, 10.0, 1.0)
            e[rng.random(k) < 0.05] = np.nan
            h = rng.exponential(0.05, k)
            by_sample.update(None, e, h, 0.7)
            by_time.update(None, e, h, 0.7, dt)
        a, b = by_sample.state(), by_time.state()
        assert np.array_equal(a.weighted_sum, b.weighted_sum)
        assert np.array_equal(a.weight_sum, b.weight_sum)
        assert np.array_equal(by_sample.variance(), by_time.variance())


def test_time_based_irregular_sampling_is_unbiased_and_forgets_over_gaps():
    rng = np.random.default_rng(19)
    k, n_steps, burn_in, sigma2 = 20, 3000, 1000, 3.0
    tracker = NoiseVarianceTracker(k, 60.0, time_based=True)   # 60 s; mean interval 0.3 s = 200 samples
    means = []
    for step in range(n_steps):
        e = math.sqrt(sigma2) * rng.standard_normal(k)
        tracker.update(None, e, np.zeros(k), 1.0, rng.exponential(0.3, k))
        if step >= burn_in:
            means.append(tracker.variance())
    # irregular intervals weight samples unevenly; the mean stays sigma^2. Tolerance as for
    # 40 000 equally weighted samples, times 1.5 for the uneven weights (Kish's effective
    # size n / (1 + cv^2) with cv = 1 for exponential intervals gives sqrt(2) = 1.41).
    assert abs(np.mean(means) - sigma2) < 1.5 * _mean_tolerance(sigma2, k * (n_steps - burn_in))   # -1.0 %
    # after a gap of 50 half-lives the old estimate (~3) keeps a weight 2^-50 = 9e-16 against the
    # new sample's 0.01: a relative error of 3e-13
    tracker.update(None, np.full(k, 0.1), np.zeros(k), 1.0, 50 * 60.0)
    np.testing.assert_allclose(tracker.variance(), 0.01, rtol=1e-11)


def test_time_based_elapsed_may_be_none_only_before_the_first_tracked_sample():
    vector = NoiseVarianceTracker(2, 10.0, time_based=True, warmup=1)
    scalar = NoiseVarianceTracker(2, 10.0, time_based=True, warmup=1)
    vector.update(None, [np.nan, 2.0], [np.inf, 0.0], 1.0)      # nothing tracked before: no interval
    scalar.update_one(0, math.nan, math.inf, 1.0)
    scalar.update_one(1, 2.0, 0.0, 1.0)
    assert _same_state(vector.state(), scalar.state())
    assert vector.variance()[1] == 4.0
    with pytest.raises(ValueError, match="elapsed"):
        vector.update(None, [1.0, 1.0], [0.0, 0.0], 1.0)      # channel 1 has a tracked sample now
    with pytest.raises(ValueError, match="elapsed"):
        scalar.update_one(1, 1.0, 0.0, 1.0)
    vector.update([0], [1.0], [0.0], 1.0)                     # channel 0 still has none
    assert vector.sample_count.tolist() == [1, 1]


# ------------------------------------------------------------------ tracker: twins, state, arguments
def _random_residuals(rng, k, n):
    e = rng.standard_normal((n, k)) * np.where(rng.random((n, k)) < 0.02, 8.0, 1.0)
    e[rng.random((n, k)) < 0.03] = np.nan
    h = rng.exponential(0.1, (n, k))
    h[rng.random((n, k)) < 0.02] = np.inf
    kappa = rng.uniform(0.5, 1.0, (n, k))
    elapsed = rng.exponential(1.0, (n, k))
    return e, h, kappa, elapsed


@pytest.mark.parametrize(("time_based", "robust"), [(False, False), (False, True), (True, True)])
def test_scalar_and_vector_paths_are_bit_identical(time_based, robust):
    rng = np.random.default_rng(20)
    k, n = 5, 3000
    half_life = np.array([3.0, 20.0, 50.0, 200.0, 1e4])
    vector = NoiseVarianceTracker(k, half_life, time_based=time_based, robust=robust, warmup=3)
    scalar = NoiseVarianceTracker(k, half_life, time_based=time_based, robust=robust, warmup=3)
    e, h, kappa, elapsed = _random_residuals(rng, k, n)
    for i in range(n):
        channels = rng.permutation(k)[: rng.integers(1, k + 1)]
        dt = elapsed[i, channels] if time_based else None
        used = vector.update(channels, e[i, channels], h[i, channels], kappa[i, channels], dt)
        for j, c in enumerate(channels):
            got = scalar.update_one(int(c), e[i, c], h[i, c], kappa[i, c], float(dt[j]) if time_based else None)
            assert got == used[j]
    a, b = vector.state(), scalar.state()
    assert np.array_equal(a.weighted_sum, b.weighted_sum)
    assert np.array_equal(a.weight_sum, b.weight_sum)
    assert np.array_equal(a.sample_count, b.sample_count)
    assert a.sample_count.min() > 1000   # enough updates happened for the comparison to mean something
    assert np.array_equal(vector.variance(), [scalar.variance_one(c) for c in range(k)])


def _same_state(a: TrackerState, b: TrackerState) -> bool:
    return (np.array_equal(a.weighted_sum, b.weighted_sum) and np.array_equal(a.weight_sum, b.weight_sum)
            and np.array_equal(a.sample_count, b.sample_count))


def test_nan_innovation_and_infinite_leverage_are_skipped_and_keep_state():
    rng = np.random.default_rng(21)
    tracker = NoiseVarianceTracker(3, 20.0, robust=True, warmup=2)
    for _ in range(10):
        tracker.update(None, rng.standard_normal(3), np.full(3, 0.1), 0.8)
    before = tracker.state()
    used = tracker.update(None, [np.nan, 1.0, np.nan], [0.1, np.inf, np.inf], 0.8)
    assert not used.any()
    assert tracker.update_one(0, math.nan, 0.2, 0.8) is False
    assert tracker.update_one(1, 0.5, math.inf, 0.8) is False
    assert _same_state(before, tracker.state())
    # a partly usable batch changes only the usable channel
    used = tracker.update([0, 2], [np.nan, 0.3], [0.1, 0.1], 0.8)
    after = tracker.state()
    assert used.tolist() == [False, True]
    assert after.weighted_sum[0] == before.weighted_sum[0] and after.weighted_sum[2] != before.weighted_sum[2]


def test_variance_is_nan_until_warmup():
    tracker = NoiseVarianceTracker(2, warmup=4)
    for _ in range(3):
        tracker.update(None, [1.0, np.nan], [0.0, np.inf], 1.0)
    assert np.isnan(tracker.variance()).all() and math.isnan(tracker.variance_one(0))
    tracker.update(None, [1.0, np.nan], [0.0, np.inf], 1.0)
    assert tracker.variance()[0] == 1.0 and tracker.variance_one(0) == 1.0
    assert math.isnan(tracker.variance_one(1))
    assert tracker.sample_count.tolist() == [4, 0]


def test_state_round_trip_is_exact_and_a_copy():
    rng = np.random.default_rng(22)
    e, h, kappa, elapsed = _random_residuals(rng, 3, 400)
    tracker = NoiseVarianceTracker(3, [5.0, 50.0, 500.0], time_based=True, robust=True, clip=2.5, warmup=3)
    for i in range(200):
        tracker.update(None, e[i], h[i], kappa[i], elapsed[i])
    snapshot = tracker.state()
    copy = NoiseVarianceTracker.from_state(snapshot)
    for i in range(200, 400):
        tracker.update(None, e[i], h[i], kappa[i], elapsed[i])
        copy.update(None, e[i], h[i], kappa[i], elapsed[i])
    assert _same_state(tracker.state(), copy.state())
    assert not _same_state(snapshot, tracker.state())   # the snapshot did not follow the live state
    assert (copy.robust, copy.time_based, copy.clip, copy.warmup) == (True, True, 2.5, 3)


@pytest.mark.parametrize(("kwargs", "match"), [
    ({"n_channels": 0}, "n_channels"),
    ({"n_channels": 2.0}, "n_channels"),
    ({"n_channels": 2, "half_life": 0.0}, "half_life"),
    ({"n_channels": 2, "half_life": -3.0}, "half_life"),
    ({"n_channels": 2, "half_life": np.inf}, "half_life"),
    ({"n_channels": 2, "half_life": [10.0, np.nan]}, "half_life"),
    ({"n_channels": 2, "half_life": [10.0, 20.0, 30.0]}, "half_life"),
    ({"n_channels": 2, "clip": 0.0}, "clip"),
    ({"n_channels": 2, "clip": np.nan}, "clip"),
    ({"n_channels": 2, "warmup": 0}, "warmup"),
    ({"n_channels": 2, "warmup": 2.5}, "warmup"),
    ({"n_channels": 2, "time_based": 1}, "time_based"),
    ({"n_channels": 2, "robust": "yes"}, "robust"),
])
def test_tracker_rejects_bad_arguments(kwargs, match):
    with pytest.raises(ValueError, match=match):
        NoiseVarianceTracker(**kwargs)


@pytest.mark.parametrize(("args", "match"), [
    ((None, [1.0, 1.0], [0.1, 0.1], 1.0), "innovation"),                 # B != K without channels
    (([0, 1], [[1.0, 1.0]], [0.1, 0.1], 1.0), "innovation"),
    (([0, 1], [1.0, 1.0], [0.1, -0.1], 1.0), "leverage"),
    (([0, 1], [1.0, 1.0], [0.1, np.nan], 1.0), "leverage"),
    (([0, 1], [1.0, 1.0], [0.1], 1.0), "leverage"),
    (([0, 1], [1.0, 1.0], [0.1, 0.1], 0.0), "kappa"),
    (([0, 1], [1.0, 1.0], [0.1, 0.1], [1.0, np.nan]), "kappa"),
    (([0, 3], [1.0, 1.0], [0.1, 0.1], 1.0), "channels"),
    (([1, 1], [1.0, 1.0], [0.1, 0.1], 1.0), "channels"),
    (([0.0, 1.0], [1.0, 1.0], [0.1, 0.1], 1.0), "channels"),
    (([0, 1], [1.0, 1.0], [0.1, 0.1], 1.0, 1.0), "elapsed"),              # sample-based tracker
])
def test_update_rejects_bad_arguments_and_keeps_state(args, match):
    tracker = NoiseVarianceTracker(3, warmup=1)
    tracker.update(None, [1.0, 2.0, 3.0], [0.1, 0.1, 0.1], 1.0)
    before = tracker.state()
    with pytest.raises(ValueError, match=match):
        tracker.update(*args)
    assert _same_state(before, tracker.state())


def test_infinite_innovation_is_skipped_by_both_paths():
    # An overflowed innovation carries no usable information: skipped like a NaN, never raised.
    vector = NoiseVarianceTracker(2, warmup=1)
    scalar = NoiseVarianceTracker(2, warmup=1)
    vector.update(None, [1.0, 2.0], [0.1, 0.1], 1.0)
    for ch, e in enumerate([1.0, 2.0]):
        scalar.update_one(ch, e, 0.1, 1.0)
    before = vector.state()
    assert vector.update([0, 1], [np.inf, -np.inf], [0.1, 0.1], 1.0).tolist() == [False, False]
    assert scalar.update_one(0, math.inf, 0.1, 1.0) is False
    assert _same_state(before, vector.state())
    assert _same_state(before, scalar.state())


@pytest.mark.parametrize(("args", "match"), [
    ((3, 1.0, 0.1, 1.0), "channel"),
    ((True, 1.0, 0.1, 1.0), "channel"),
    ((0, 1.0, -0.5, 1.0), "leverage"),
    ((0, 1.0, 0.1, -1.0), "kappa"),
    ((0, 1.0, 0.1, 1.0), "elapsed"),          # missing for a time-based tracker
    ((0, 1.0, 0.1, 1.0, 0.0), "elapsed"),
    ((0, 1.0, 0.1, 1.0, math.nan), "elapsed"),
])
def test_update_one_rejects_bad_arguments_and_keeps_state(args, match):
    tracker = NoiseVarianceTracker(3, 10.0, time_based=True, warmup=1)
    tracker.update_one(0, 1.0, 0.1, 1.0, 1.0)
    before = tracker.state()
    with pytest.raises(ValueError, match=match):
        tracker.update_one(*args)
    with pytest.raises(ValueError, match="elapsed"):
        tracker.update([0], [1.0], [0.1], 1.0, [-1.0])
    assert _same_state(before, tracker.state())
