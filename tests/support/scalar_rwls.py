"""One channel of recursive WLS on Python floats: the scalar twin of :class:`RecursiveWLSBank`.

For a single channel, numpy's per-call overhead (about 1 us) dominates arrays of
five numbers; this path keeps the factor as nested lists and does the same IEEE
operations, in the same order, as the vectorised bank step, so the two give the
same bits (``tests/unit/test_rwls.py`` holds them to it). No production code uses it: it lives with the
tests as an independent witness of the scalar kernel that :meth:`RecursiveWLSBank.update_one` runs on one of
a bank's channels (what ``rwls replay`` and the service do when a round holds one sample of a group).
"""

from __future__ import annotations

import math
from collections.abc import Sequence

import numpy as np
from numpy.typing import NDArray

from estimator.recursive._givens import scalar_step
from estimator.recursive.rwls import BankState, RecursiveWLSBank, checked_sample, forgotten_excess

__all__ = ["ScalarRecursiveWLS"]


class ScalarRecursiveWLS:
    """One channel: the same estimator as a K = 1 :class:`RecursiveWLSBank`, on floats.

    Parameters
    ----------
    n_params : int
    forgetting_factor : float in (0, 1]
    covariance_limit : float or sequence of n floats
        As for the bank.
    """

    def __init__(self, n_params: int, forgetting_factor: float = 1.0,
                 covariance_limit: float | Sequence[float] = 1e6) -> None:
        # The bank validates the arguments and works out the effective limits.
        self._load(RecursiveWLSBank(1, n_params, forgetting_factor, covariance_limit).state())

    def _load(self, state: BankState) -> None:
        self.n_params = state.factor.shape[1] - 1
        self._A: list[list[float]] = state.factor[0].tolist()
        self._lambda = float(state.forgetting_factor[0])
        self._sl = math.sqrt(self._lambda)
        self._forgotten = float(forgotten_excess(state.forgetting_factor, self.n_params)[0])
        limit = state.covariance_limit[0]
        bounded = bool(np.isfinite(limit).any())
        self._limit: list[float] | None = limit.tolist() if bounded else None
        self._inv_limit: list[float] | None = (1.0 / limit).tolist() if bounded else None
        self._n_eff = float(state.effective_count[0])
        self._n_eff_sq = float(state.effective_count_sq[0])
        self._count = int(state.sample_count[0])

    def update(self, z: Sequence[float], y: float, weight: float = 1.0) -> tuple[float, float]:
        """Apply one sample; returns ``(innovation, leverage)``.

        Raises
        ------
        SampleRefused
            ``bad_shape``, ``non_finite`` or ``bad_weight``; the state is untouched then.
        """
        zs, y, weight = checked_sample(z, y, weight, self.n_params)
        count = self._count + 1
        result = scalar_step(self._A, zs, y, weight, self._sl, count, self._limit, self._inv_limit,
                             self._forgotten)
        lam = self._lambda
        self._n_eff = lam * self._n_eff + 1.0
        self._n_eff_sq = lam * lam * self._n_eff_sq + 1.0
        self._count = count
        return result

    def kappa(self) -> float:
        """``sum lambda^(2(k-i)) / sum lambda^(k-i)``, as :meth:`RecursiveWLSBank.kappa`."""
        return self._n_eff_sq / self._n_eff if self._n_eff > 0.0 else 1.0

    @property
    def effective_count(self) -> float:
        return self._n_eff

    @property
    def sample_count(self) -> int:
        return self._count

    def factor(self) -> NDArray[np.float64]:
        """``[[R, q], [0, rho]]``, shape (n+1, n+1) (a copy)."""
        return np.array(self._A, dtype=np.float64)

    def state(self) -> BankState:
        """The state as a one-channel :class:`BankState` (copies)."""
        n = self.n_params
        limit = np.array(self._limit if self._limit is not None else [np.inf] * n)
        return BankState(
            factor=self.factor()[None],
            forgetting_factor=np.array([self._lambda]),
            covariance_limit=limit[None],
            effective_count=np.array([self._n_eff]),
            effective_count_sq=np.array([self._n_eff_sq]),
            sample_count=np.array([self._count], dtype=np.int64),
        )

    @classmethod
    def from_state(cls, state: BankState) -> ScalarRecursiveWLS:
        """Rebuild exactly from a one-channel :class:`BankState`."""
        if state.factor.shape[0] != 1:
            raise ValueError(f"state must hold one channel, got {state.factor.shape[0]}")
        channel = cls.__new__(cls)
        channel._load(state)
        return channel
