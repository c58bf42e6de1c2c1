"""Microseconds per update of one channel, and the bank's per-channel cost, against per-sample peers.

rwls paths: ``ScalarRecursiveWLS.update(z, y, w)`` (one channel on Python
floats, what ``rwls replay`` runs), ``bank.update_one(0, z, y, w)`` (the same
step on one channel of a bank; z as a list, as a parsed message gives it, and
as a numpy row) and ``bank.update`` with K = 1.
Peers, all on the same samples:

* a straightforward per-sample numpy RLS loop (covariance form, ``_common.NumpyRLS``);
* filterpy ``KalmanFilter`` used as an RLS: state theta, F = I, Q = 0, H = z^T
  and R = 1 / w per sample, predict + update per sample. Forgetting is exact
  through its fading-memory setting: predict does ``P <- alpha^2 P`` and with
  ``alpha^2 = 1 / lambda`` predict + update is the RLS recursion with factor lambda;
* statsmodels ``RecursiveLS(endog, exog).fit()`` on N = 20 000 samples (cost per
  update = time / N), and its filter alone (``model.ssm.filter()``, no smoother
  pass and no results object), the fastest way through it. RecursiveLS has no
  forgetting and no weights: its rows are passed pre-scaled by sqrt(w) (the
  same WLS problem) and its column is filled for lambda = 1 only.

Issue goals: the robust single-channel update (scalar channel) at n = 4 no
slower than the numpy loop; the bank's
cost per channel-update (K = 1e4) >= 20x below statsmodels RecursiveLS and
filterpy per update. Timings are printed, never asserted.
"""

from __future__ import annotations

from collections.abc import Callable
from dataclasses import dataclass

import numpy as np
import pytest
from filterpy.kalman import KalmanFilter
from numpy.typing import NDArray
from statsmodels.regression.recursive_ls import RecursiveLS

from estimator.recursive.rwls import RecursiveWLSBank
from estimator.recursive.statistics import bank_statistics
from tests.benchmarks._common import (
    DIFFUSE_PRIOR,
    Budget,
    Cycler,
    NumpyRLS,
    best_times,
    print_header,
    print_table,
    regression_pool,
)
from tests.support.scalar_rwls import ScalarRecursiveWLS

pytestmark = pytest.mark.benchmark

FloatArray = NDArray[np.float64]

N_PARAMS = (2, 4, 8)
FORGETTING_FACTORS = (1.0, 0.98)
BLOCK = 500                 # updates per timed call
N_BLOCKS = 16               # distinct blocks cycled through
STATSMODELS_SAMPLES = 20_000
CHECK_SAMPLES = 2_000
BANK_CHANNELS = 10_000
PER_SAMPLE_BUDGET = Budget(min_time=0.3, max_calls=1_000, rounds=3)


@dataclass(frozen=True)
class Block:
    """One block of samples in every form the callers take (prepared outside the timed loop)."""

    Z: FloatArray                 # (B, n); Z[i] is a numpy row
    z_lists: list[list[float]]    # Z as Python lists
    y: list[float]
    w: list[float]
    Z_rows: FloatArray            # (B, 1, n): a K = 1 batch per sample, also filterpy's H
    y_rows: FloatArray            # (B, 1)
    w_rows: FloatArray            # (B, 1)
    y_columns: FloatArray         # (B, 1, 1): filterpy's measurement


def _samples(rng: np.random.Generator, n_samples: int, n: int) -> tuple[FloatArray, FloatArray, FloatArray]:
    """y = Z theta + e / sqrt(w), weights uniform on [0.5, 2]."""
    theta = rng.standard_normal(n)
    Z = rng.standard_normal((n_samples, n))
    w = rng.uniform(0.5, 2.0, n_samples)
    y = Z @ theta + 0.1 * rng.standard_normal(n_samples) / np.sqrt(w)
    return Z, y, w


def _block(Z: FloatArray, y: FloatArray, w: FloatArray) -> Block:
    b, n = Z.shape
    return Block(Z=Z, z_lists=Z.tolist(), y=y.tolist(), w=w.tolist(), Z_rows=Z.reshape(b, 1, n),
                 y_rows=y.reshape(b, 1), w_rows=w.reshape(b, 1), y_columns=y.reshape(b, 1, 1))


def _filterpy_rls(n: int, lam: float) -> KalmanFilter:
    kf = KalmanFilter(dim_x=n, dim_z=1)
    kf.x = np.zeros((n, 1))
    kf.P = DIFFUSE_PRIOR * np.eye(n)
    kf.F = np.eye(n)
    kf.Q = np.zeros((n, n))
    kf.alpha = 1.0 / np.sqrt(lam)        # predict: P <- P / lambda
    return kf


# ------------------------------------------------------------- the callers
def _run_scalar(channel: ScalarRecursiveWLS, blocks: Cycler) -> Callable[[], None]:
    update = channel.update

    def run() -> None:
        blk: Block = blocks.next()
        for z, y, w in zip(blk.z_lists, blk.y, blk.w, strict=True):
            update(z, y, w)

    return run


def _run_update_one(bank: RecursiveWLSBank, blocks: Cycler) -> Callable[[], None]:
    update_one = bank.update_one

    def run() -> None:
        blk: Block = blocks.next()
        for z, y, w in zip(blk.z_lists, blk.y, blk.w, strict=True):
            update_one(0, z, y, w)

    return run


def _run_update_one_ndarray(bank: RecursiveWLSBank, blocks: Cycler) -> Callable[[], None]:
    update_one = bank.update_one

    def run() -> None:
        blk: Block = blocks.next()
        for z, y, w in zip(blk.Z, blk.y, blk.w, strict=True):
            update_one(0, z, y, w)

    return run


def _run_update_k1(bank: RecursiveWLSBank, blocks: Cycler) -> Callable[[], None]:
    update = bank.update

    def run() -> None:
        blk: Block = blocks.next()
        for z, y, w in zip(blk.Z_rows, blk.y_rows, blk.w_rows, strict=True):
            update(z, y, w)

    return run


def _run_numpy(peer: NumpyRLS, blocks: Cycler) -> Callable[[], None]:
    update = peer.update

    def run() -> None:
        blk: Block = blocks.next()
        for z, y, w in zip(blk.Z, blk.y, blk.w, strict=True):
            update(z, y, w)

    return run


def _run_filterpy(kf: KalmanFilter, blocks: Cycler) -> Callable[[], None]:
    def run() -> None:
        blk: Block = blocks.next()
        for H, y, w in zip(blk.Z_rows, blk.y_columns, blk.w, strict=True):
            kf.predict()
            kf.update(y, R=1.0 / w, H=H)

    return run


# --------------------------------------------------------------- agreement
def _agreement(rng: np.random.Generator, n: int, lam: float) -> dict[str, float]:
    """max |theta - theta_batch| / max |theta_batch| after CHECK_SAMPLES samples, per implementation.

    Tolerance 1e-6 relative: the covariance-form peers start from
    P0 = 1e8 I and lose digits there; rwls and statsmodels start exactly diffuse.
    """
    Z, y, w = _samples(rng, CHECK_SAMPLES, n)
    blk = _block(Z, y, w)
    scalar = ScalarRecursiveWLS(n, forgetting_factor=lam)
    _run_scalar(scalar, Cycler([blk]))()
    one = RecursiveWLSBank(1, n, forgetting_factor=lam)
    _run_update_one(one, Cycler([blk]))()
    batch1 = RecursiveWLSBank(1, n, forgetting_factor=lam)
    _run_update_k1(batch1, Cycler([blk]))()
    peer = NumpyRLS(n, lam)
    _run_numpy(peer, Cycler([blk]))()
    kf = _filterpy_rls(n, lam)
    _run_filterpy(kf, Cycler([blk]))()
    found = {
        "scalar channel": bank_statistics(scalar.factor()[None], [scalar.effective_count],
                                          scale="known").parameters[0],
        "update_one": bank_statistics(one.factor(), one.effective_count, scale="known").parameters[0],
        "update K=1": bank_statistics(batch1.factor(), batch1.effective_count, scale="known").parameters[0],
        "numpy loop": peer.theta,
        "filterpy": kf.x[:, 0],
    }
    if lam == 1.0:
        sw = np.sqrt(w)
        found["statsmodels"] = RecursiveLS(y * sw, Z * sw[:, None]).fit().recursive_coefficients.filtered[:, -1]
    sw = np.sqrt(w * lam ** np.arange(CHECK_SAMPLES - 1, -1, -1))
    exact = np.linalg.lstsq(Z * sw[:, None], y * sw, rcond=None)[0]
    scale = np.abs(exact).max()
    for name, theta in found.items():
        np.testing.assert_allclose(theta, exact, rtol=0, atol=1e-6 * scale, err_msg=name)
    return {name: float(np.abs(theta - exact).max() / scale) for name, theta in found.items()}


# ------------------------------------------------------------------ timing
def _per_sample_costs(rng: np.random.Generator, n: int, lam: float) -> dict[str, float]:
    """Seconds per update of each single-channel implementation."""
    blocks = [_block(*_samples(rng, BLOCK, n)) for _ in range(N_BLOCKS)]
    scalar = ScalarRecursiveWLS(n, forgetting_factor=lam)
    bank_one = RecursiveWLSBank(1, n, forgetting_factor=lam)
    bank_one_nd = RecursiveWLSBank(1, n, forgetting_factor=lam)
    bank_k1 = RecursiveWLSBank(1, n, forgetting_factor=lam)
    peer = NumpyRLS(n, lam)
    kf = _filterpy_rls(n, lam)
    candidates = {
        "scalar channel": _run_scalar(scalar, Cycler(blocks)),
        "update_one": _run_update_one(bank_one, Cycler(blocks)),
        "update_one nd": _run_update_one_ndarray(bank_one_nd, Cycler(blocks)),
        "update K=1": _run_update_k1(bank_k1, Cycler(blocks)),
        "numpy loop": _run_numpy(peer, Cycler(blocks)),
        "filterpy": _run_filterpy(kf, Cycler(blocks)),
    }
    for run in candidates.values():        # one block each: past the diffuse start, warm caches
        run()
    t = best_times(candidates, PER_SAMPLE_BUDGET)
    for bank in (bank_one, bank_one_nd, bank_k1):
        assert np.isfinite(bank.factor()).all()
    assert np.isfinite(peer.P).all() and np.isfinite(kf.P).all()
    return {name: seconds / BLOCK for name, seconds in t.items()}


def _statsmodels_costs(rng: np.random.Generator, n: int) -> dict[str, float]:
    """Seconds per update of RecursiveLS: full fit, and filter only."""
    Z, y, w = _samples(rng, STATSMODELS_SAMPLES, n)
    sw = np.sqrt(w)
    endog, exog = y * sw, Z * sw[:, None]
    fitted = RecursiveLS(endog, exog).fit().recursive_coefficients.filtered[:, -1]
    filtered = RecursiveLS(endog, exog).ssm.filter().filtered_state[:, -1]
    np.testing.assert_allclose(filtered, fitted, rtol=1e-10)   # same filter, two ways in
    t = best_times({"fit": lambda: RecursiveLS(endog, exog).fit(),
                    "filter": lambda: RecursiveLS(endog, exog).ssm.filter()},
                   Budget(min_time=0.3, max_calls=20, rounds=3))
    return {f"statsmodels {name}": seconds / STATSMODELS_SAMPLES for name, seconds in t.items()}


def _bank_cost(rng: np.random.Generator, n: int, lam: float) -> float:
    """Seconds per channel-update of the full-bank step at K = BANK_CHANNELS."""
    k = BANK_CHANNELS
    data = Cycler(regression_pool(rng, 8, k, n, rng.standard_normal((k, n))))
    bank = RecursiveWLSBank(k, n, forgetting_factor=lam)

    def step() -> None:
        Z, y, w = data.next()
        bank.update(Z, y, w)

    for _ in range(2 * n + 2):
        step()
    seconds = best_times({"bank": step}, Budget(min_time=0.25, max_calls=10_000, rounds=3))["bank"]
    assert np.isfinite(bank.factor()).all()
    return seconds / k


def test_single_channel_update_cost_vs_peers(make_rng: Callable[[int], np.random.Generator]) -> None:
    rng = make_rng(7)
    print_header("one channel: microseconds per update (rwls update_one / update K=1, numpy RLS loop, "
                 "filterpy KalmanFilter, statsmodels RecursiveLS) and the bank's cost per channel-update")

    agreement_rows = []
    for lam in FORGETTING_FACTORS:
        for n in N_PARAMS:
            d = _agreement(rng, n, lam)
            shown = ("scalar channel", "update_one", "update K=1", "numpy loop", "filterpy", "statsmodels")
            agreement_rows.append((f"{lam:g}", n, *(f"{d[name]:.1e}" if name in d else "-" for name in shown)))
    print(f"agreement with batch WLS after {CHECK_SAMPLES} samples: max |theta - theta_batch| / max |theta| "
          f"(peers from P0 = {DIFFUSE_PRIOR:g} I; statsmodels has no forgetting)")
    print_table(("lambda", "n", "scalar channel", "update_one", "update K=1", "numpy loop", "filterpy",
                 "statsmodels"), agreement_rows)
    print()

    costs: dict[tuple[float, int], dict[str, float]] = {}
    for n in N_PARAMS:
        sm = _statsmodels_costs(rng, n)
        for lam in FORGETTING_FACTORS:
            c = _per_sample_costs(rng, n, lam)
            c["bank K=1e4"] = _bank_cost(rng, n, lam)
            if lam == 1.0:
                c.update(sm)
            costs[lam, n] = c

    names = ("scalar channel", "update_one", "update_one nd", "update K=1", "numpy loop", "filterpy",
             "statsmodels fit", "statsmodels filter", "bank K=1e4")
    print(f"microseconds per update (best of {PER_SAMPLE_BUDGET.rounds} interleaved rounds of blocks of {BLOCK}; "
          f"statsmodels: time of one call on N = {STATSMODELS_SAMPLES} / N; bank: one step of K = "
          f"{BANK_CHANNELS} / K; 'update_one nd': z passed as a numpy row instead of a list)")
    print_table(("lambda", "n", *names),
                [(f"{lam:g}", n, *(f"{c[name] * 1e6:.3f}" if name in c else "-" for name in names))
                 for (lam, n), c in sorted(costs.items(), key=lambda kv: (-kv[0][0], kv[0][1]))])
    print()

    print("ratios, peer cost / rwls cost (> 1: rwls faster)")
    ratio_rows = []
    for (lam, n), c in sorted(costs.items(), key=lambda kv: (-kv[0][0], kv[0][1])):
        bank = c["bank K=1e4"]
        ratio_rows.append((
            f"{lam:g}", n,
            f"{c['numpy loop'] / c['scalar channel']:.2f}",
            f"{c['numpy loop'] / c['update_one']:.2f}",
            f"{c['numpy loop'] / c['update K=1']:.2f}",
            f"{c['filterpy'] / c['update_one']:.2f}",
            f"{c['filterpy'] / bank:.0f}",
            f"{c['statsmodels fit'] / bank:.0f}" if "statsmodels fit" in c else "-",
            f"{c['statsmodels filter'] / bank:.1f}" if "statsmodels filter" in c else "-",
            f"{c['numpy loop'] / bank:.0f}",
        ))
    print_table(("lambda", "n", "numpy/scalar", "numpy/update_one", "numpy/update K=1", "filterpy/update_one",
                 "filterpy/bank", "sm fit/bank", "sm filter/bank", "numpy/bank"), ratio_rows)
    print()
    for lam in FORGETTING_FACTORS:
        c = costs[lam, 4]
        print(f"goal n=4 lambda={lam:g}: scalar channel {c['scalar channel'] * 1e6:.1f} us "
              f"(bank update_one {c['update_one'] * 1e6:.1f} us) vs numpy loop "
              f"{c['numpy loop'] * 1e6:.1f} us (goal: no slower)")
    c = costs[1.0, 4]
    bank = c["bank K=1e4"]
    print(f"goal n=4 lambda=1: bank {bank * 1e6:.3f} us per channel-update is {c['statsmodels fit'] / bank:.0f}x "
          f"below statsmodels RecursiveLS.fit ({c['statsmodels filter'] / bank:.1f}x below its filter alone) "
          f"and {c['filterpy'] / bank:.0f}x below filterpy (goal >= 20x)")
