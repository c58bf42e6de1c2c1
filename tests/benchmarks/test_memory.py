"""Bytes of estimator state per channel of a ``RecursiveWLSBank``.

Counted two ways: the ``nbytes`` of every ndarray the bank holds (state, and
separately the update workspace), and tracemalloc's peak while building the
bank and while running one full-bank update (numpy reports its buffers to
tracemalloc). Issue goal: <= 1 KiB of state per channel at n = 4, K = 1e4.
The plain covariance-form SoA peer's state, ``P (n, n, K)`` and
``theta (n, K)``, is printed beside it for scale.
"""

from __future__ import annotations

import gc
import tracemalloc
from collections.abc import Callable

import numpy as np
import pytest

from estimator import RecursiveWLSBank
from tests.benchmarks._common import PlainRLSBankSoA, print_header, print_table, regression_pool

pytestmark = pytest.mark.benchmark

# The bank's state arrays. Those a given version does not have are reported as
# absent; arrays it has beyond these are counted and listed too.
NAMED_STATE = ("_A", "_sqrt_lambda", "_lambda", "_limit", "_inv_limit", "_has_limit",
               "_n_eff", "_n_eff_sq", "_count", "_all_channels")
SIZES = ((4, 10_000), (2, 10_000), (8, 10_000), (4, 1_000), (4, 100_000))
KIB = 1024


def _arrays(obj: object) -> dict[str, np.ndarray]:
    return {name: value for name, value in vars(obj).items() if isinstance(value, np.ndarray)}


def _traced_build(k: int, n: int) -> tuple[RecursiveWLSBank, int, int]:
    """The bank, and tracemalloc's (retained, peak) bytes while constructing it."""
    gc.collect()
    tracemalloc.start()
    try:
        base = tracemalloc.get_traced_memory()[0]
        tracemalloc.reset_peak()
        bank = RecursiveWLSBank(k, n, forgetting_factor=0.98)
        current, peak = tracemalloc.get_traced_memory()
    finally:
        tracemalloc.stop()
    return bank, current - base, peak - base


def _traced_update_peak(bank: RecursiveWLSBank, rng: np.random.Generator) -> int:
    """Transient bytes above the steady state during one full-bank update (temporaries, result)."""
    k, n = bank.n_channels, bank.n_params
    Z, y, w = regression_pool(rng, 1, k, n, rng.standard_normal((k, n)))[0]
    for _ in range(2 * n + 2):             # past the diffuse start: the bounded-covariance branch is live
        bank.update(Z, y, w)
    gc.collect()
    tracemalloc.start()
    try:
        base = tracemalloc.get_traced_memory()[0]
        tracemalloc.reset_peak()
        result = bank.update(Z, y, w)
        peak = tracemalloc.get_traced_memory()[1]
    finally:
        tracemalloc.stop()
    del result
    return peak - base


def test_state_bytes_per_channel(make_rng: Callable[[int], np.random.Generator]) -> None:
    rng = make_rng(11)
    print_header("RecursiveWLSBank memory: bytes of state per channel (ndarray nbytes and tracemalloc), "
                 "forgetting_factor 0.98")

    # Per-attribute breakdown at the goal size.
    n, k = SIZES[0]
    bank = RecursiveWLSBank(k, n, forgetting_factor=0.98)
    state = _arrays(bank)
    workspace = _arrays(bank._workspace)
    rows = [(name, "x".join(map(str, a.shape)), str(a.dtype), a.nbytes, f"{a.nbytes / k:.1f}")
            for name, a in state.items()]
    rows += [(f"_workspace.{name}", "x".join(map(str, a.shape)), str(a.dtype), a.nbytes, f"{a.nbytes / k:.1f}")
             for name, a in workspace.items()]
    print(f"arrays of one bank, n = {n}, K = {k}")
    print_table(("attribute", "shape", "dtype", "bytes", "bytes/channel"), rows)
    absent = [name for name in NAMED_STATE if name not in state]
    extra = [name for name in state if name not in NAMED_STATE]
    print(f"named in the issue but absent in this version: {', '.join(absent) or 'none'}")
    print(f"present beyond the issue's list (counted): {', '.join(extra) or 'none'}")
    print()

    summary = []
    per_channel = {}
    for n, k in SIZES:
        bank, retained, build_peak = _traced_build(k, n)
        state_bytes = sum(a.nbytes for a in _arrays(bank).values())
        workspace_bytes = sum(a.nbytes for a in _arrays(bank._workspace).values())
        update_peak = _traced_update_peak(bank, rng)
        plain = PlainRLSBankSoA(k, n, 0.98)
        plain_state = plain.P.nbytes + plain.theta.nbytes
        per_channel[n, k] = state_bytes / k
        summary.append((
            n, k,
            f"{state_bytes / k:.1f}", f"{workspace_bytes / k:.1f}", f"{(state_bytes + workspace_bytes) / k:.1f}",
            f"{retained / k:.1f}", f"{build_peak / k:.1f}", f"{update_peak / k:.1f}", f"{plain_state / k:.1f}",
        ))
        assert np.isfinite(bank.factor()).all()
    print("bytes per channel; 'workspace' is preallocated to K channels, so it scales with K like the state; "
          "'update transient' = tracemalloc peak during one full-bank update above the steady state")
    print_table(("n", "K", "state", "workspace", "state+workspace", "traced retained (build)",
                 "traced peak (build)", "update transient", "plain SoA P+theta"), summary)
    print()
    print(f"goal n=4 K=1e4: state {per_channel[4, 10_000]:.0f} B/channel "
          f"({per_channel[4, 10_000] / KIB:.2f} KiB; goal <= 1 KiB, workspace listed separately)")
