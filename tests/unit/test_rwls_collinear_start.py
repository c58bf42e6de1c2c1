"""A start with too little excitation (estimator/recursive/rwls.py, "Unexcited directions stay unexcited"):
bounded while a direction is unexcited, least squares once it is excited.

The scenario is the one reported: ``y = 2.06 + 0.80 u``, the first samples all at ``u = 51.28`` (a regressor
stuck at one value), then ``u`` spread over 40..60, noise sd 0.01, ``forgetting_factor = 0.995``, default limit.
Before the fix the estimate jumped to ~1e13 at the second sample and was still ~1e7 after 135.
"""

from __future__ import annotations

import math

import numpy as np
import pytest

from estimator import RecursiveWLSBank, fit_wls

LAMBDA = 0.995
STUCK_U = 51.28
THETA = np.array([2.06, 0.80])


def _stream(seed: int, stuck: int, excited: int, jitter: float = 0.0) -> tuple[np.ndarray, np.ndarray]:
    """Rows ``[1, u]`` and outputs: ``stuck`` samples at 51.28 (times ``1 +- jitter``), then ``excited`` ones."""
    rng = np.random.default_rng(seed)
    u = np.concatenate([STUCK_U * (1.0 + jitter * rng.choice([-1.0, 1.0], stuck)), rng.uniform(40.0, 60.0, excited)])
    Z = np.column_stack([np.ones_like(u), u])
    return Z, Z @ THETA + rng.normal(0.0, 0.01, u.size)


def _forgotten_lstsq(Z: np.ndarray, y: np.ndarray, lam: float) -> np.ndarray:
    # numpy.linalg.lstsq as reference implementation, on the rows scaled by sqrt(lambda^(N-1-i)).
    root = np.sqrt(lam ** np.arange(len(y) - 1, -1, -1.0))
    return np.linalg.lstsq(Z * root[:, None], y * root, rcond=None)[0]


def _relative_error(theta: np.ndarray, reference: np.ndarray) -> float:
    return float(np.abs(theta - reference).max() / np.abs(reference).max())


@pytest.mark.parametrize("seed", range(4))
def test_stuck_start_stays_bounded_then_is_the_forgotten_least_squares_solution(seed: int) -> None:
    Z, y = _stream(seed, stuck=5, excited=130)
    bank = RecursiveWLSBank(1, 2, forgetting_factor=LAMBDA)
    for t in range(len(y)):
        bank.update_one(0, Z[t], y[t])
        theta, identifiable = bank.solution()
        theta = theta[:, 0]
        if t < 5:
            # Rank 1: not identifiable, and the basic solution (theta_u = 0) reproduces the operating point.
            assert not identifiable[0]
            assert theta[1] == 0.0
            assert abs(theta[0] - THETA @ Z[0]) < 0.05          # 5 sd of the noise
        else:
            assert identifiable[0]
        if t + 1 in (6, 10, 135):
            # rtol 1e-9: both are backward-stable solutions of the same problem (cond(Z) ~ 1e2 after the
            # sixth sample); measured 3e-13 over 50 seeds.
            assert _relative_error(theta, _forgotten_lstsq(Z[:t + 1], y[:t + 1], LAMBDA)) < 1e-9
            assert _relative_error(theta, fit_wls(Z[:t + 1], y[:t + 1], forgetting_factor=LAMBDA).parameters) < 1e-9


@pytest.mark.parametrize("forgetting_factor", [1.0, 0.995, 0.9])
@pytest.mark.parametrize("terms", ["1 u", "1 u u^2"])
def test_repeated_regressor_leaves_the_unexcited_directions_exactly_unexcited(forgetting_factor: float,
                                                                              terms: str) -> None:
    # Weights vary, so even lambda = 1 leaves rounding residues that must not become information.
    rng = np.random.default_rng(11)
    z = np.array([1.0, STUCK_U, STUCK_U**2])[: len(terms.split())]
    n = z.size
    bank = RecursiveWLSBank(1, n, forgetting_factor=forgetting_factor)
    for _ in range(300):
        innovation, leverage = bank.update_one(0, z, 43.084 + 0.01 * float(rng.normal()), float(rng.lognormal()))
        assert math.isnan(innovation) and leverage == math.inf
        R = bank.factor()[0]
        assert R[0, 0] > 0.0
        assert (np.diag(R)[1:n] == 0.0).all()
    theta, identifiable = bank.solution()
    assert not identifiable[0]
    assert (theta[1:, 0] == 0.0).all() and abs(theta[0, 0] - 43.084) < 0.01


def test_a_spread_above_rounding_identifies_the_channel() -> None:
    # 1e-12 relative is some 4,500 eps, far above the residue tolerance (128 eps of the column): genuine
    # excitation, however weak, is kept.
    bank = RecursiveWLSBank(1, 2, forgetting_factor=LAMBDA, covariance_limit=np.inf)
    bank.update_one(0, [1.0, STUCK_U], 43.0)
    bank.update_one(0, [1.0, STUCK_U * (1.0 + 1e-12)], 43.0)
    assert bank.solution()[1][0]


def test_scalar_and_vectorised_paths_agree_bit_for_bit_through_collinear_starts(assert_same_state) -> None:
    # Each channel starts with a run of one repeated row (residues at R_ii == 0, in lockstep and in
    # partial batches), then random rows; nearly collinear runs and a dead stretch reach the bound.
    k, n = 6, 3
    lam = np.array([1.0, 0.995, 0.98, 0.9, 0.995, 0.999])
    limit = np.repeat([[1e6], [1e6], [10.0], [1e-2], [1e6], [1e6]], n, axis=1)
    vectorised = RecursiveWLSBank(k, n, forgetting_factor=lam, covariance_limit=limit)
    scalar = RecursiveWLSBank(k, n, forgetting_factor=lam, covariance_limit=limit)
    rng = np.random.default_rng(12)
    stuck_u = rng.uniform(-60.0, 60.0, k)
    run = rng.integers(5, 60, size=k)
    jitter = np.array([0.0, 1e-10, 1e-11, 0.0, 1e-9, 1e-7])
    count = np.zeros(k, dtype=int)
    for step in range(400):
        full = step % 3 == 0
        channels = np.arange(k) if full else np.sort(rng.permutation(k)[: rng.integers(1, k + 1)])
        z = rng.normal(size=(channels.size, n)) * 10.0
        early = count[channels] < run[channels]
        u = stuck_u[channels] * (1.0 + jitter[channels] * rng.choice([-1.0, 1.0], size=channels.size))
        z[early] = np.column_stack([np.ones_like(u), u, u * u])[early]       # terms 1, u, u^2
        if 250 <= step < 330:
            z[:] = 0.0                      # a dead stretch: the bound holds what was determined
        y = rng.normal(size=channels.size) + 40.0
        w = rng.lognormal(size=channels.size)
        result = vectorised.update(z, y, w) if full else vectorised.update(z, y, w, channels=channels)
        for i, channel in enumerate(channels):
            innovation, leverage = scalar.update_one(int(channel), z[i], y[i], w[i])
            assert innovation == result.innovation[i] or (math.isnan(innovation) and math.isnan(result.innovation[i]))
            assert leverage == result.leverage[i]
        count[channels] += 1
    assert np.array_equal(vectorised.factor(), scalar.factor())
    assert_same_state(vectorised.state(), scalar.state())
