"""Channel-updates per second of the full-bank step ``RecursiveWLSBank.update(Z, y, w)``.

Beside it, in the same run and on the same data, two plain covariance-form RLS
banks (see ``_common``): structure-of-arrays ``P: (n, n, K)`` and
array-of-structures ``P: (K, n, n)``. Issue goal: the robust bank at K = 1e4,
n = 4 reaches >= 5 million channel-updates/s and >= 0.5x the plain SoA step.
Nothing here asserts on time; the agreement check only makes sure the three
implementations compute the same estimates, so the ratios compare like with like.
"""

from __future__ import annotations

from collections.abc import Callable

import numpy as np
import pytest

from estimator import RecursiveWLSBank
from estimator.recursive.statistics import bank_statistics
from tests.benchmarks._common import (
    Budget,
    Cycler,
    PlainRLSBankAoS,
    PlainRLSBankSoA,
    best_times,
    print_header,
    print_table,
    regression_pool,
)

pytestmark = pytest.mark.benchmark

N_PARAMS = (2, 4, 8)
N_CHANNELS = (1, 1_000, 10_000, 100_000)
FORGETTING_FACTORS = (1.0, 0.98)


def _budget(n_channels: int) -> Budget:
    if n_channels >= 100_000:
        return Budget(min_time=1.0, max_calls=2, rounds=3)   # one call is 15-100 ms
    return Budget(min_time=0.25, max_calls=20_000, rounds=3)


def _pool_size(n_channels: int, n_params: int) -> int:
    # Enough distinct draws that no data set repeats within a short loop,
    # capped at about 16 M floats of Z in total.
    return int(np.clip(2_000_000 // (n_channels * n_params), 4, 64))


def _stepper(update: Callable[..., object], data: Cycler) -> Callable[[], object]:
    def step() -> object:
        Z, y, w = data.next()
        return update(Z, y, w)

    return step


def _exact_estimates(pool: list[tuple[np.ndarray, np.ndarray, np.ndarray]], lam: float) -> np.ndarray:
    """Batch WLS per channel with weights lambda^(k-i) w_i (one lstsq on sqrt-weighted rows), (K, n)."""
    Z = np.stack([p[0] for p in pool])          # (steps, K, n)
    y = np.stack([p[1] for p in pool])
    w = np.stack([p[2] for p in pool])
    steps, k, _ = Z.shape
    sw = np.sqrt(w * lam ** np.arange(steps - 1, -1, -1)[:, None])
    return np.stack([np.linalg.lstsq(Z[:, c] * sw[:, c, None], y[:, c] * sw[:, c], rcond=None)[0]
                     for c in range(k)])


def _agreement(rng: np.random.Generator, n: int, lam: float) -> tuple[float, float, float]:
    """Largest |theta - theta_batch| / max |theta_batch| of the robust, plain SoA and plain AoS banks.

    64 channels, 40 n steps of the same data from a diffuse start, against
    batch WLS with the forgetting weights. Tolerances: 1e-8 for the robust
    bank (exact algebra; the margin leaves room for its anti-windup, which may
    add a little information); 1e-5 for the covariance-form peers, which start from
    P0 = 1e8 I and lose digits in the first n updates and under forgetting
    (about 2e-6 measured at n = 8, lambda = 0.98).
    """
    k, steps = 64, 40 * n
    theta_true = rng.standard_normal((k, n))
    pool = regression_pool(rng, steps, k, n, theta_true)
    robust = RecursiveWLSBank(k, n, forgetting_factor=lam)
    soa = PlainRLSBankSoA(k, n, lam)
    aos = PlainRLSBankAoS(k, n, lam)
    for Z, y, w in pool:
        robust.update(Z, y, w)
        soa.update(Z, y, w)
        aos.update(Z, y, w)
    exact = _exact_estimates(pool, lam)
    scale = np.abs(exact).max()
    estimates = (bank_statistics(robust.factor(), robust.effective_count, scale="known").parameters,
                 soa.parameters(), aos.parameters())
    np.testing.assert_allclose(estimates[0], exact, rtol=0, atol=1e-8 * scale)
    np.testing.assert_allclose(estimates[1], exact, rtol=0, atol=1e-5 * scale)
    np.testing.assert_allclose(estimates[2], exact, rtol=0, atol=1e-5 * scale)
    d_robust, d_soa, d_aos = (float(np.abs(e - exact).max() / scale) for e in estimates)
    return d_robust, d_soa, d_aos


def test_bank_throughput_vs_plain_rls(make_rng: Callable[[int], np.random.Generator]) -> None:
    rng = make_rng(20240601)
    print_header("RecursiveWLSBank.update (full bank, channels=None): channel-updates per second, "
                 "vs plain covariance-form RLS banks (SoA (n,n,K), AoS (K,n,n))")

    agreement_rows = []
    for lam in FORGETTING_FACTORS:
        for n in N_PARAMS:
            d_robust, d_soa, d_aos = _agreement(rng, n, lam)
            agreement_rows.append((f"{lam:g}", n, f"{d_robust:.1e}", f"{d_soa:.1e}", f"{d_aos:.1e}"))
    print("agreement with batch WLS (64 channels, 40 n steps, same data): max |theta - theta_batch| / max |theta|")
    print_table(("lambda", "n", "robust", "plain SoA", "plain AoS"), agreement_rows)
    print()

    rows = []
    goal = {}
    for lam in FORGETTING_FACTORS:
        for n in N_PARAMS:
            for k in N_CHANNELS:
                theta_true = rng.standard_normal((k, n))
                data = Cycler(regression_pool(rng, _pool_size(k, n), k, n, theta_true))
                robust = RecursiveWLSBank(k, n, forgetting_factor=lam)
                soa = PlainRLSBankSoA(k, n, lam)
                aos = PlainRLSBankAoS(k, n, lam)
                candidates = {
                    "robust": _stepper(robust.update, data),
                    "soa": _stepper(soa.update, data),
                    "aos": _stepper(aos.update, data),
                }
                for step in candidates.values():     # past the rank-deficient start
                    for _ in range(2 * n + 2):
                        step()
                t = best_times(candidates, _budget(k))
                rate = {name: k / seconds for name, seconds in t.items()}
                rows.append((
                    f"{lam:g}", n, k,
                    f"{rate['robust'] / 1e6:.3f}", f"{rate['soa'] / 1e6:.3f}", f"{rate['aos'] / 1e6:.3f}",
                    f"{rate['robust'] / rate['soa']:.2f}", f"{rate['robust'] / rate['aos']:.2f}",
                    f"{t['robust'] * 1e6:.1f}",
                ))
                if n == 4 and k == 10_000:
                    goal[lam] = (rate["robust"], rate["robust"] / rate["soa"])
                assert np.isfinite(robust.factor()).all()
    print("figures in million channel-updates per second (M/s); best of 3 interleaved rounds")
    print_table(("lambda", "n", "K", "robust M/s", "plain SoA M/s", "plain AoS M/s",
                 "robust/SoA", "robust/AoS", "robust us/step"), rows)
    print()
    for lam, (rate, ratio) in goal.items():
        print(f"goal K=1e4 n=4 lambda={lam:g}: robust {rate / 1e6:.2f} M/s (goal >= 5), "
              f"{ratio:.2f}x plain SoA (goal >= 0.5)")
