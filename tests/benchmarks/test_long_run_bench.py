"""10^8 channel-updates: a bank of K = 1e4 channels, n = 4, for 1e4 steps at lambda = 0.98.

Excitation comes and goes: stretches of 1000 steps with z = 0 (the plant at
rest; y is noise only) alternate with excited stretches, and every channel's
true parameters jump to new values when a quiet stretch begins, so the
estimate has to catch up once excitation returns. With lambda = 0.98 a quiet
stretch would shrink the information by 0.98^1000 ~ 2e-9 and blow P up
without anti-windup; the bank bounds it by ``covariance_limit / lambda^n``.

Printed: elapsed time (total and inside ``update``), the largest diagonal
entry of P seen (P from ``bank_statistics(..., scale="known")`` every 500
steps and at the end of every quiet stretch), whether anything became
non-finite, and the parameter error at fixed delays after excitation returns.
A plain covariance-form RLS on the first 100 channels, fed the same data, is
run alongside for scale. The run is bounded: a short calibration extrapolates
its duration, and if it would exceed TIME_BUDGET only the steps that fit are
run and the fraction is printed.
"""

from __future__ import annotations

import time
from collections.abc import Callable

import numpy as np
import pytest

from estimator import RecursiveWLSBank
from estimator.recursive.statistics import bank_statistics
from tests.benchmarks._common import PlainRLSBankSoA, print_header, print_table

pytestmark = pytest.mark.benchmark

K = 10_000
N_PARAMS = 4
STEPS = 10_000
LAMBDA = 0.98
COVARIANCE_LIMIT = 1e6          # the bank's default, passed explicitly to print the bound
CYCLE = 2_500                   # steps 1000..1999 of each cycle are quiet (z = 0)
QUIET = (1_000, 2_000)
P_EVERY = 500
RECOVERY_DELAYS = (1, 5, 10, 25, 50, 100, 200)
PLAIN_CHANNELS = 100
CALIBRATION_STEPS = 200
TIME_BUDGET = 900.0             # seconds, about 15 minutes
NOISE_SD = 0.1


def _quiet(step: int) -> bool:
    return QUIET[0] <= step % CYCLE < QUIET[1]


def _relative_errors(theta_hat: np.ndarray, theta_true: np.ndarray) -> tuple[float, float, int]:
    """Median and 99th percentile over channels of ||theta_hat - theta|| / ||theta||, and NaN count."""
    err = np.linalg.norm(theta_hat - theta_true, axis=1) / np.linalg.norm(theta_true, axis=1)
    finite = np.isfinite(err)
    return float(np.median(err[finite])), float(np.percentile(err[finite], 99)), int((~finite).sum())


def test_long_run_windup_and_recovery(make_rng: Callable[[int], np.random.Generator]) -> None:
    rng = make_rng(2024)
    print_header(f"long run: {K * STEPS:.0e} channel-updates (K = {K}, n = {N_PARAMS}, {STEPS} steps, "
                 f"lambda = {LAMBDA}), quiet stretches (z = 0) of {QUIET[1] - QUIET[0]} steps every {CYCLE}")
    bank = RecursiveWLSBank(K, N_PARAMS, forgetting_factor=LAMBDA, covariance_limit=COVARIANCE_LIMIT)
    plain = PlainRLSBankSoA(PLAIN_CHANNELS, N_PARAMS, LAMBDA)
    theta_true = rng.standard_normal((K, N_PARAMS))
    zeros = np.zeros((K, N_PARAMS))

    p_rows: list[tuple[object, ...]] = []
    recovery_rows: list[tuple[object, ...]] = []
    max_p = {"bank": 0.0, "plain": 0.0}
    before_quiet: dict[int, tuple[float, float, int]] = {}
    non_finite_results = 0
    update_seconds = 0.0
    steps_to_run = STEPS
    start = time.perf_counter()

    def inspect(step: int, label: str) -> None:
        stats = bank_statistics(bank.factor(), bank.effective_count, scale="known")
        diag = np.diagonal(stats.unscaled_covariance, axis1=1, axis2=2)
        plain_diag = np.diagonal(plain.P, axis1=0, axis2=1)
        max_p["bank"] = max(max_p["bank"], float(np.nanmax(diag)))
        max_p["plain"] = max(max_p["plain"], float(np.nanmax(plain_diag)))
        med, p99, _ = _relative_errors(stats.parameters, theta_true)
        p_rows.append((step, label, f"{np.nanmax(diag):.3e}", f"{np.nanmedian(diag):.3e}",
                       int((~stats.identifiable).sum()), f"{med:.2e}", f"{p99:.2e}",
                       f"{np.nanmax(plain_diag):.3e}"))

    step = 0
    while step < steps_to_run:
        quiet = _quiet(step)
        if quiet and step % CYCLE == QUIET[0]:
            # Last excited step just passed: record the settled error, then move the truth.
            stats = bank_statistics(bank.factor(), bank.effective_count, scale="known")
            before_quiet[step] = _relative_errors(stats.parameters, theta_true)
            theta_true = rng.standard_normal((K, N_PARAMS))
        w = rng.uniform(0.5, 2.0, K)
        noise = NOISE_SD * rng.standard_normal(K) / np.sqrt(w)
        if quiet:
            Z = zeros
            y = noise
        else:
            Z = rng.standard_normal((K, N_PARAMS))
            y = np.einsum("ki,ki->k", Z, theta_true) + noise
        t0 = time.perf_counter()
        result = bank.update(Z, y, w)
        update_seconds += time.perf_counter() - t0
        plain.update(Z[:PLAIN_CHANNELS], y[:PLAIN_CHANNELS], w[:PLAIN_CHANNELS])
        if step >= N_PARAMS:     # before that the innovation is NaN by design (not identifiable)
            non_finite_results += int(np.count_nonzero(~np.isfinite(result.innovation))
                                      + np.count_nonzero(~np.isfinite(result.leverage)))
        step += 1

        if step == CALIBRATION_STEPS:
            per_step = (time.perf_counter() - start) / step
            # The inspections add roughly 30 ms each, about 60 of them.
            projected = per_step * STEPS + 60 * 0.05
            print(f"calibration: {CALIBRATION_STEPS} steps in {per_step * step:.2f} s, "
                  f"projected full run {projected:.0f} s (budget {TIME_BUDGET:.0f} s)")
            if projected > TIME_BUDGET:
                steps_to_run = int(STEPS * TIME_BUDGET / projected)
                print(f"running {steps_to_run} of {STEPS} steps ({steps_to_run / STEPS:.0%})")
        if step % P_EVERY == 0:
            inspect(step, "quiet" if quiet else "excited")
        elif quiet and not _quiet(step):
            inspect(step, "end of quiet")
        if not quiet and step % CYCLE > QUIET[1] and (step % CYCLE) - QUIET[1] in RECOVERY_DELAYS:
            delay = (step % CYCLE) - QUIET[1]
            began = step - delay - (QUIET[1] - QUIET[0])
            stats = bank_statistics(bank.factor(), bank.effective_count, scale="known")
            med, p99, nan = _relative_errors(stats.parameters, theta_true)
            settled = before_quiet[began]
            recovery_rows.append((began, delay, f"{med:.2e}", f"{p99:.2e}", nan,
                                  f"{settled[0]:.2e}", f"{settled[1]:.2e}"))
        if time.perf_counter() - start > TIME_BUDGET and step < steps_to_run:
            print(f"time budget reached after {step} of {STEPS} steps ({step / STEPS:.0%})")
            steps_to_run = step
    elapsed = time.perf_counter() - start

    ran = steps_to_run
    print(f"ran {ran} of {STEPS} steps ({ran / STEPS:.0%}); {ran * K:.3e} channel-updates in {elapsed:.1f} s "
          f"total, {update_seconds:.1f} s inside bank.update "
          f"({ran * K / update_seconds / 1e6:.2f} M channel-updates/s)")
    if ran < STEPS:
        print(f"extrapolated full run: {elapsed * STEPS / ran:.0f} s")
    print()
    print(f"P diagonal (unscaled, 'known' scale) and relative parameter error ||theta_hat - theta|| / ||theta|| "
          f"over channels; plain = covariance-form RLS without a bound, first {PLAIN_CHANNELS} channels")
    print_table(("step", "phase", "max P_jj", "median P_jj", "not identifiable", "median err", "p99 err",
                 "plain max P_jj"), p_rows)
    print()
    print("recovery after excitation returns (truth changed when the quiet stretch began): "
          "relative error, vs the settled error just before the quiet stretch")
    print_table(("quiet began", "steps after return", "median err", "p99 err", "NaN",
                 "settled median", "settled p99"), recovery_rows)
    print()
    bound = COVARIANCE_LIMIT / LAMBDA ** N_PARAMS
    factor_finite = bool(np.isfinite(bank.factor()).all())
    print(f"max P_jj seen (bank): {max_p['bank']:.4e}; documented bound covariance_limit / lambda^n = "
          f"{bound:.4e}; within: {max_p['bank'] <= bound}")
    print(f"max P_jj seen (plain RLS, no bound): {max_p['plain']:.4e}")
    print(f"non-finite: factor {'no' if factor_finite else 'YES'}; innovations/leverages non-finite after "
          f"the first n steps: {non_finite_results}")
    assert factor_finite
    assert non_finite_results == 0
