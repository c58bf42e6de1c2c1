"""Shared pieces of the estimator benchmarks: timing loop, table printing, plain RLS peers.

The peers are the covariance-form RLS with exponential forgetting (the
textbook recursion: no square root, no anti-windup)::

    Pz = P z
    s = lambda / w + z^T Pz             # = (lambda + w z^T P z) / w
    K = Pz / s                          # gain
    theta <- theta + K (y - z^T theta)
    P <- (P - K Pz^T) / lambda

in two batch layouts: structure-of-arrays ``P: (n, n, K)`` (one numpy call acts
on a contiguous ``(K,)`` slice for all channels) and array-of-structures
``P: (K, n, n)`` (batched matmul/einsum over the leading axis), and per sample.

Every ``RESYMMETRISE_EVERY`` updates the peers replace P by ``(P + P^T) / 2``
(well under 1 % of their time). They need it: ``K Pz^T = Pz Pz^T / s`` is
symmetric, so the antisymmetric part of P (rounding error) is never reduced
and ``P /= lambda`` multiplies it by ``1 / lambda`` each update. At lambda =
0.98 it grows as 1.0204^k and overflows after about 36 000 updates (measured,
n = 2, 4, 8, from P0 = 1e8 I), long before a timing loop ends.
"""

from __future__ import annotations

import hashlib
import os
import platform
import sys
import time
from collections.abc import Callable, Sequence
from dataclasses import dataclass

import numpy as np
from numpy.typing import NDArray

import estimator

FloatArray = NDArray[np.float64]

# Diffuse prior of the covariance-form peers: P0 = DIFFUSE_PRIOR * I.
DIFFUSE_PRIOR = 1e8
# Updates between re-symmetrisations of the peers' P (see the module docstring).
RESYMMETRISE_EVERY = 500


# ---------------------------------------------------------------- environment
def estimator_fingerprint() -> str:
    """Short hash of the estimator's source files, to tell which version produced a table."""
    digest = hashlib.sha256()
    package_dir = os.path.dirname(estimator.__file__)
    for name in sorted(os.listdir(package_dir)):
        if name.endswith(".py"):
            with open(os.path.join(package_dir, name), "rb") as source:
                digest.update(name.encode() + b"\0" + source.read())
    return digest.hexdigest()[:12]


def environment_line() -> str:
    """One line naming the software and the machine the figures come from."""
    return (f"numpy {np.__version__} | python {platform.python_version()} (GIL switch interval "
            f"{sys.getswitchinterval() * 1000:g} ms) | {os.cpu_count()} CPUs | "
            f"{platform.machine()} {platform.system()} | "
            f"estimator sources sha256 {estimator_fingerprint()}")


def print_header(what: str) -> None:
    """Blank line, then the title of a benchmark table and the environment."""
    print()
    print(f"== {what}")
    print(f"   {environment_line()}")


def print_table(columns: Sequence[str], rows: Sequence[Sequence[object]]) -> None:
    """Right-aligned plain-text table; floats are pre-formatted by the caller."""
    cells = [[str(c) for c in columns]] + [[str(v) for v in row] for row in rows]
    widths = [max(len(r[i]) for r in cells) for i in range(len(columns))]
    lines = ["  ".join(c.rjust(w) for c, w in zip(r, widths, strict=True)) for r in cells]
    print(lines[0])
    print("  ".join("-" * w for w in widths))
    for line in lines[1:]:
        print(line)
    sys.stdout.flush()


# --------------------------------------------------------------------- timing
@dataclass(frozen=True)
class Budget:
    """Bounds of one measurement.

    Each of ``rounds`` rounds calls the function until ``min_time`` seconds
    have passed or ``max_calls`` calls were made, whichever comes first (at
    least one call); the result is the best
    round's time per call (the least disturbed by the rest of the machine).
    """

    min_time: float = 0.25
    max_calls: int = 100_000
    rounds: int = 3


def best_times(candidates: dict[str, Callable[[], object]], budget: Budget) -> dict[str, float]:
    """Seconds per call of each candidate, best of ``budget.rounds`` rounds.

    Rounds of the candidates are interleaved (A B C, A B C, ...), so a slow
    spell of the machine hits every candidate rather than one of them and the
    ratios computed from one call are comparable.
    """
    best = {name: float("inf") for name in candidates}
    for _ in range(budget.rounds):
        for name, fn in candidates.items():
            calls = 0
            start = time.perf_counter()
            while True:
                fn()
                calls += 1
                elapsed = time.perf_counter() - start
                if calls >= budget.max_calls or elapsed >= budget.min_time:
                    break
            best[name] = min(best[name], elapsed / calls)
    return best


class Cycler:
    """Hands out the items of a pre-generated pool in turn (fresh data, no generation in the timed loop)."""

    def __init__(self, pool: Sequence[object]) -> None:
        self._pool = list(pool)
        self._i = 0

    def next(self) -> object:
        item = self._pool[self._i]
        self._i = (self._i + 1) % len(self._pool)
        return item


# ---------------------------------------------------------------------- peers
class PlainRLSBankSoA:
    """Covariance-form RLS for K channels, structure-of-arrays: P (n, n, K), theta (n, K).

    Buffers are preallocated and every step is a fixed sequence of ufunc calls
    writing into them. ``P -= K Pz^T`` and ``P /= lambda`` go row by row: an
    ``(n, K)`` temporary stays in cache where a full ``(n, n, K)`` outer
    product would not (measured a little faster for K >= 1e4, about even
    below). With lambda == 1 the division is skipped, as the square-root bank
    skips its sqrt(lambda) scaling.
    """

    def __init__(self, n_channels: int, n_params: int, forgetting_factor: float,
                 prior: float = DIFFUSE_PRIOR) -> None:
        n, k = n_params, n_channels
        self.n_params = n
        self.forgetting_factor = float(forgetting_factor)
        self.P = np.zeros((n, n, k))
        for i in range(n):
            self.P[i, i] = prior
        self.theta = np.zeros((n, k))
        self._zT = np.empty((n, k))
        self._Pz = np.empty((n, k))
        self._gain = np.empty((n, k))
        self._tmp = np.empty((n, k))
        self._s = np.empty(k)
        self._e = np.empty(k)
        self._steps = 0

    def update(self, Z: FloatArray, y: FloatArray, w: FloatArray) -> None:
        """One sample per channel: Z (K, n), y (K,), w (K,)."""
        n, lam = self.n_params, self.forgetting_factor
        P, theta, zT, Pz, gain, tmp = self.P, self.theta, self._zT, self._Pz, self._gain, self._tmp
        s, e = self._s, self._e
        np.copyto(zT, Z.T)                       # channel axis last, contiguous
        np.multiply(P[:, 0], zT[0], out=Pz)      # Pz = sum_j P[:, j] z_j
        for j in range(1, n):
            np.multiply(P[:, j], zT[j], out=tmp)
            np.add(Pz, tmp, out=Pz)
        np.multiply(zT, Pz, out=tmp)
        np.sum(tmp, axis=0, out=s)
        np.divide(lam, w, out=e)
        np.add(s, e, out=s)                      # s = lambda / w + z^T P z
        np.divide(Pz, s, out=gain)               # K = Pz / s
        np.multiply(zT, theta, out=tmp)
        np.sum(tmp, axis=0, out=e)
        np.subtract(y, e, out=e)                 # e = y - z^T theta
        np.multiply(gain, e, out=tmp)
        np.add(theta, tmp, out=theta)            # theta += K e
        for i in range(n):
            Pi = P[i]
            np.multiply(Pz, gain[i], out=tmp)
            np.subtract(Pi, tmp, out=Pi)         # P[i, :] -= K_i Pz^T
            if lam != 1.0:
                np.divide(Pi, lam, out=Pi)       # P <- P / lambda
        self._steps += 1
        if self._steps % RESYMMETRISE_EVERY == 0:
            self.P = 0.5 * (P + P.transpose(1, 0, 2))

    def parameters(self) -> FloatArray:
        """theta per channel, shape (K, n)."""
        return self.theta.T.copy()


class PlainRLSBankAoS:
    """Covariance-form RLS for K channels, array-of-structures: P (K, n, n), theta (K, n)."""

    def __init__(self, n_channels: int, n_params: int, forgetting_factor: float,
                 prior: float = DIFFUSE_PRIOR) -> None:
        self.forgetting_factor = float(forgetting_factor)
        self.P = np.broadcast_to(prior * np.eye(n_params), (n_channels, n_params, n_params)).copy()
        self.theta = np.zeros((n_channels, n_params))
        self._steps = 0

    def update(self, Z: FloatArray, y: FloatArray, w: FloatArray) -> None:
        """One sample per channel: Z (K, n), y (K,), w (K,)."""
        lam = self.forgetting_factor
        Pz = np.matmul(self.P, Z[:, :, None])[:, :, 0]           # (K, n)
        s = lam / w + np.einsum("ki,ki->k", Z, Pz)
        gain = Pz / s[:, None]
        e = y - np.einsum("ki,ki->k", Z, self.theta)
        self.theta += gain * e[:, None]
        self.P -= gain[:, :, None] * Pz[:, None, :]              # P - K Pz^T
        if lam != 1.0:
            self.P /= lam
        self._steps += 1
        if self._steps % RESYMMETRISE_EVERY == 0:
            self.P = 0.5 * (self.P + np.swapaxes(self.P, 1, 2))

    def parameters(self) -> FloatArray:
        """theta per channel, shape (K, n)."""
        return self.theta.copy()


class NumpyRLS:
    """Per-sample covariance-form RLS on small numpy arrays, the straightforward loop body."""

    def __init__(self, n_params: int, forgetting_factor: float, prior: float = DIFFUSE_PRIOR) -> None:
        self.lam = float(forgetting_factor)
        self.P = prior * np.eye(n_params)
        self.theta = np.zeros(n_params)
        self._steps = 0

    def update(self, z: FloatArray, y: float, w: float) -> None:
        P, lam = self.P, self.lam
        Pz = P @ z
        s = lam / w + z @ Pz                 # (lambda + w z^T P z) / w
        K = Pz / s
        e = y - z @ self.theta
        self.theta += K * e
        self.P = (P - np.outer(K, Pz)) / lam
        self._steps += 1
        if self._steps % RESYMMETRISE_EVERY == 0:
            self.P = 0.5 * (self.P + self.P.T)


# ----------------------------------------------------------------------- data
def regression_pool(rng: np.random.Generator, n_sets: int, n_channels: int, n_params: int,
                    theta: FloatArray, noise_sd: float = 0.1) -> list[tuple[FloatArray, FloatArray, FloatArray]]:
    """``n_sets`` independent (Z (K, n), y (K,), w (K,)) draws from y = Z theta_k + e / sqrt(w).

    ``theta`` has shape (K, n). Weights are uniform on [0.5, 2]; they are the
    inverse noise variances (relative to ``noise_sd``), so the weighting is right.
    """
    pool = []
    for _ in range(n_sets):
        Z = rng.standard_normal((n_channels, n_params))
        w = rng.uniform(0.5, 2.0, n_channels)
        y = np.einsum("ki,ki->k", Z, theta) + noise_sd * rng.standard_normal(n_channels) / np.sqrt(w)
        pool.append((Z, y, w))
    return pool
