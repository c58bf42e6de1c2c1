"""Log-variance model: recovery of a variance function on a simulated plant, floors, twins, state, arguments.

Reference facts used below:
* v = e^2 / (1 + kappa h) has mean sigma^2 (estimator/noise/variance.py, eq. (1)); under
  Gaussian noise v / sigma^2 ~ chi2_1.
* E[ln chi2_1] = psi(1/2) + ln 2 = -(gamma + ln 2) = -1.2704 (Harvey 1976, Econometrica 44;
  psi(1/2) = -gamma - 2 ln 2, Abramowitz & Stegun 6.3.3); Var(ln chi2_1) = pi^2 / 2
  (psi'(1/2) = pi^2 / 2, Abramowitz & Stegun 6.4.4).
"""

from __future__ import annotations

import math

import numpy as np
import pytest

from estimator.noise.log_variance import LogVarianceModel, LogVarianceState
from estimator.recursive.rwls import RecursiveWLSBank
from tests.unit.test_variance import SIGMAS, _random_residuals

LOG_CHI2_MEAN = -(0.5772156649015329 + math.log(2.0))   # E[ln chi2_1], Harvey 1976
LOG_CHI2_VAR = math.pi**2 / 2.0                          # Var[ln chi2_1], A&S 6.4.4


@pytest.mark.parametrize("seed", [30, 40])   # with seed 40 an early relative floor once locked a channel
def test_log_model_recovers_variance_function_and_correction_matters(seed):
    # ln sigma^2 = a + b load, load ~ U(0, 3); main bank y = 2 + 0.5 u weighted by the model's own
    # prediction (the intended use), K channels in parallel.
    rng = np.random.default_rng(seed)
    a, b = -2.0, 0.8
    k, n_steps = 10, 4000
    bank = RecursiveWLSBank(k, 2, 1.0)
    model = LogVarianceModel(k, 2)   # default forgetting 0.999, warmup 100
    v_all, load_all = [], []
    for _ in range(n_steps):
        u = 2.0 * rng.standard_normal(k)
        load = rng.uniform(0.0, 3.0, k)
        z_op = np.column_stack([np.ones(k), load])
        sigma = np.exp(0.5 * (a + b * load))
        predicted = model.variance(None, z_op)
        weight = np.where(np.isfinite(predicted), 1.0 / np.where(np.isfinite(predicted), predicted, 1.0), 1.0)
        kappa = bank.kappa()
        res = bank.update(np.column_stack([np.ones(k), u]), 2.0 + 0.5 * u + sigma * rng.standard_normal(k), weight)
        model.update(None, z_op, res.innovation, res.leverage, kappa)
        ok = np.isfinite(res.innovation)
        v_all.append((res.innovation**2 / (1.0 + kappa * res.leverage))[ok])
        load_all.append(load[ok])
    beta = model.coefficients()
    # Steady-state Cov(beta) ~ Var(ln chi2_1) (1 - lambda) / (1 + lambda) (E[z z^T])^-1 with
    # (E zz^T)^-1 = [[4, -2], [-2, 4/3]] for load ~ U(0, 3): sd 0.099 (a), 0.057 (b) per channel;
    # the mean over 10 channels has sd 0.031 and 0.018; tolerances 4 sd.
    lam = 0.999
    scale = LOG_CHI2_VAR * (1 - lam) / (1 + lam) / k
    tol_a, tol_b = SIGMAS * math.sqrt(4.0 * scale), SIGMAS * math.sqrt(4.0 / 3.0 * scale)
    assert abs(beta[:, 0].mean() - a) < tol_a   # 0.125; measured error +0.005 (seed 30), -0.07 (40)
    assert abs(beta[:, 1].mean() - b) < tol_b   # 0.072; measured error -0.008 (seed 30), +0.03 (40)
    np.testing.assert_allclose(model.variance(np.arange(k), np.column_stack([np.ones(k), np.zeros(k)])),
                               np.exp(beta[:, 0]), rtol=1e-12)   # exp of the intercept, a few roundings
    # The correction matters: an uncorrected least-squares fit of ln v on [1, load] over all
    # samples lands at a + E[ln chi2_1] = a - 1.27 (Harvey 1976); sd sqrt(pi^2/2 * 4 / 40 000) = 0.022.
    v, load = np.concatenate(v_all), np.concatenate(load_all)
    uncorrected, *_ = np.linalg.lstsq(np.column_stack([np.ones(v.size), load]), np.log(v), rcond=None)
    assert abs(uncorrected[0] - (a + LOG_CHI2_MEAN)) < SIGMAS * math.sqrt(LOG_CHI2_VAR * 4.0 / v.size)


def test_log_model_floors_zero_innovations():
    # One constant term, lambda = 1: beta is the plain mean of the targets ln(v) + 1.2704.
    model = LogVarianceModel(2, 1, forgetting_factor=1.0, floor_ratio=1e-6, warmup=1)
    correction = -LOG_CHI2_MEAN
    # channel 0: no prediction yet, so v = 0 is floored at the smallest normal float
    model.update_one(0, [1.0], 0.0, 0.0, 1.0)
    assert model.coefficients([0])[0, 0] == pytest.approx(math.log(np.finfo(np.float64).tiny) + correction,
                                                          rel=1e-14)   # one addition
    # channel 1: 20 samples with v = 1, then e == 0 exactly: floored at 1e-6 * exp(prediction)
    for _ in range(20):
        model.update(np.array([1]), [[1.0]], [1.0], [0.0], 1.0)
    prediction = correction
    floored = math.log(1e-6) + prediction + correction
    expected = (20 * correction + floored) / 21
    model.update(np.array([1]), [[1.0]], [0.0], [0.0], 1.0)
    # the recursion's mean of 21 targets, rounding ~1e-15 relative
    assert model.coefficients([1])[0, 0] == pytest.approx(expected, rel=1e-12)
    assert np.isfinite(model.state().bank.factor).all()


def test_log_model_relative_floor_waits_for_warmup():
    # Before warmup the fit may be wild; only the smallest-normal floor applies then.
    model = LogVarianceModel(1, 1, forgetting_factor=1.0, warmup=5)
    correction = -LOG_CHI2_MEAN
    for _ in range(2):
        model.update_one(0, [1.0], 1.0, 0.0, 1.0)          # targets 0 + 1.2704
    model.update_one(0, [1.0], 1e-20, 0.0, 1.0)            # ln v = -92.1, below ln(1e-6) + prediction
    expected = (2 * correction + math.log(1e-40) + correction) / 3
    assert model.coefficients()[0, 0] == pytest.approx(expected, rel=1e-12)   # mean of 3 targets
    assert math.isnan(model.variance_one(0, [1.0]))


def test_log_model_scalar_and_vector_paths_are_bit_identical():
    rng = np.random.default_rng(31)
    k, n = 4, 1500
    vector = LogVarianceModel(k, 2, forgetting_factor=[0.99, 0.999, 1.0, 0.95], warmup=5)
    scalar = LogVarianceModel(k, 2, forgetting_factor=[0.99, 0.999, 1.0, 0.95], warmup=5)
    e, h, kappa, _ = _random_residuals(rng, k, n)
    e[rng.random((n, k)) < 0.02] = 0.0   # quantised: exercises the floor
    load = rng.uniform(0.0, 3.0, (n, k))
    for i in range(n):
        channels = rng.permutation(k)[: rng.integers(1, k + 1)]
        z = np.column_stack([np.ones(channels.size), load[i, channels]])
        used = vector.update(channels, z, e[i, channels], h[i, channels], kappa[i, channels])
        for j, c in enumerate(channels):
            assert scalar.update_one(int(c), z[j].tolist(), e[i, c], h[i, c], kappa[i, c]) == used[j]
    assert np.array_equal(vector.state().bank.factor, scalar.state().bank.factor)
    assert scalar.sample_count.min() > 500
    z = np.column_stack([np.ones(k), np.linspace(0.0, 3.0, k)])
    assert np.array_equal(vector.variance(None, z), [scalar.variance_one(c, z[c].tolist()) for c in range(k)])


def test_log_model_nan_before_warmup_and_skips_unusable_samples():
    model = LogVarianceModel(2, 2)
    assert model.warmup == 100   # default 50 per term
    z = np.array([[1.0, 0.5], [1.0, 2.0]])
    rng = np.random.default_rng(32)
    for i in range(99):
        model.update(None, z + np.array([0.0, 0.01 * i]), rng.standard_normal(2), [0.0, 0.0], 1.0)
    assert np.isnan(model.variance(None, z)).all() and math.isnan(model.variance_one(0, [1.0, 1.0]))
    model.update(None, z, rng.standard_normal(2), [0.0, 0.0], 1.0)
    assert np.isfinite(model.variance(None, z)).all() and math.isfinite(model.variance_one(0, [1.0, 1.0]))
    before = model.state()
    used = model.update(None, z, [np.nan, 1.0], [0.0, np.inf], 1.0)
    assert not used.any() and model.update_one(0, [1.0, 1.0], math.nan, 0.0, 1.0) is False
    assert np.array_equal(before.bank.factor, model.state().bank.factor)
    # reads may repeat a channel: the variance function of channel 0 at three loads
    curve = model.variance([0, 0, 0], [[1.0, 0.0], [1.0, 1.0], [1.0, 2.0]])
    assert curve.shape == (3,) and np.isfinite(curve).all()


def test_log_model_state_round_trip_is_exact():
    rng = np.random.default_rng(33)
    model = LogVarianceModel(3, 2, forgetting_factor=0.995, floor_ratio=1e-4, warmup=7)
    e, h, kappa, _ = _random_residuals(rng, 3, 300)
    z = np.stack([np.column_stack([np.ones(3), rng.uniform(0, 3, 3)]) for _ in range(300)])
    for i in range(150):
        model.update(None, z[i], e[i], h[i], kappa[i])
    snapshot = model.state()
    assert isinstance(snapshot, LogVarianceState)
    copy = LogVarianceModel.from_state(snapshot)
    for i in range(150, 300):
        model.update(None, z[i], e[i], h[i], kappa[i])
        copy.update(None, z[i], e[i], h[i], kappa[i])
    assert np.array_equal(model.state().bank.factor, copy.state().bank.factor)
    assert np.array_equal(model.sample_count, copy.sample_count)
    assert (copy.floor_ratio, copy.warmup) == (1e-4, 7)
    assert not np.array_equal(snapshot.bank.factor, model.state().bank.factor)


@pytest.mark.parametrize(("kwargs", "match"), [
    ({"n_channels": 0, "n_terms": 2}, "n_channels"),
    ({"n_channels": 2, "n_terms": 0}, "n_terms"),
    ({"n_channels": 2, "n_terms": 2, "forgetting_factor": 1.5}, "forgetting_factor"),
    ({"n_channels": 2, "n_terms": 2, "floor_ratio": 0.0}, "floor_ratio"),
    ({"n_channels": 2, "n_terms": 2, "floor_ratio": 1.0}, "floor_ratio"),
    ({"n_channels": 2, "n_terms": 2, "warmup": 0}, "warmup"),
])
def test_log_model_rejects_bad_arguments(kwargs, match):
    with pytest.raises(ValueError, match=match):
        LogVarianceModel(**kwargs)


def test_log_model_update_rejects_bad_arguments_and_keeps_state():
    model = LogVarianceModel(2, 2, warmup=1)
    model.update(None, [[1.0, 0.5], [1.0, 1.0]], [1.0, 2.0], [0.0, 0.0], 1.0)
    before = model.state().bank.factor
    with pytest.raises(ValueError, match="z_op"):
        model.update(None, [[1.0, 0.5]], [1.0, 2.0], [0.0, 0.0], 1.0)
    with pytest.raises(ValueError, match="z_op"):
        model.update(None, [[1.0, np.nan], [1.0, 1.0]], [1.0, 2.0], [0.0, 0.0], 1.0)
    with pytest.raises(ValueError, match="z_op"):
        model.update_one(0, [1.0], 1.0, 0.0, 1.0)
    with pytest.raises(ValueError, match="leverage"):
        model.update_one(0, [1.0, 0.5], 1.0, -1.0, 1.0)
    with pytest.raises(ValueError, match="channels"):
        model.update([1, 1], [[1.0, 0.5], [1.0, 1.0]], [1.0, 2.0], [0.0, 0.0], 1.0)
    with pytest.raises(ValueError, match="channel"):
        model.variance_one(2, [1.0, 0.5])
    assert np.array_equal(before, model.state().bank.factor)
