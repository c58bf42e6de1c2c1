"""Operating-point dependent noise variance: a recursive fit of ``ln sigma^2 = z_op^T beta``.

The targets are the normalised squared a-priori innovations of a
:class:`~estimator.recursive.rwls.RecursiveWLSBank`,

    v_k = e_k^2 / (1 + kappa h_k),

equation (1) of :mod:`estimator.noise.variance` (which derives it and states when it
is unbiased): an unbiased one-sample estimate of ``sigma_k^2`` with
``v_k / sigma_k^2 ~ chi2_1`` under Gaussian noise. :class:`LogVarianceModel`
fits ``ln v_k`` on operating-point regressors ``z_op`` with a second bank and
corrects the bias of the log with Harvey's (1976) constant
``-E[ln chi2_1] = 1.2704``. Samples the main bank could not yet predict (NaN
innovation, infinite leverage) are skipped.

The vectorised path over channels and the scalar path for one channel perform
the same IEEE operations in the same order, so their states agree bit for bit;
the estimates come from the bank's :meth:`~estimator.recursive.rwls.RecursiveWLSBank.solution`
and :meth:`~estimator.recursive.rwls.RecursiveWLSBank.solution_one`, which are twins in
the same sense. Transcendental functions go through numpy's ufuncs in both
paths: ``math.log`` and ``np.log`` may differ in the last bit where numpy uses
SIMD kernels.

References
----------
Harvey, A. C. (1976). Estimating regression models with multiplicative
    heteroscedasticity. Econometrica 44(3), 461-465.
"""

from __future__ import annotations

import math
from collections.abc import Sequence
from dataclasses import dataclass

import numpy as np
from numpy.typing import ArrayLike, NDArray

from estimator.noise.residual_checks import check_int, check_positive, check_residual_one, check_residuals
from estimator.recursive.rwls import BankState, RecursiveWLSBank

__all__ = ["LogVarianceModel", "LogVarianceState"]

FloatArray = NDArray[np.float64]
IndexArray = NDArray[np.intp]

_EULER_GAMMA = 0.5772156649015329
# -E[ln chi2_1] = -(psi(1/2) + ln 2) = gamma_Euler + ln 2 = 1.2704 (Harvey 1976;
# psi(1/2) = -gamma - 2 ln 2, Abramowitz & Stegun 6.3.3).
_LOG_CHI2_BIAS = _EULER_GAMMA + math.log(2.0)
_TINY = float(np.finfo(np.float64).tiny)   # smallest positive normal float
_LOG_MAX = math.log(float(np.finfo(np.float64).max))   # exp overflows above this


@dataclass(frozen=True)
class LogVarianceState:
    """Copy of a :class:`LogVarianceModel`: the state of its bank, its settings and the samples fitted.

    ``sample_count`` has shape (K,); it counts what the model fitted, as ``bank.sample_count`` does.
    """

    bank: BankState
    floor_ratio: float
    warmup: int
    sample_count: NDArray[np.int64]


class LogVarianceModel:
    """Operating-point dependent noise variance ``ln sigma^2 = z_op^T beta`` (Harvey 1976).

    Per channel a :class:`~estimator.recursive.rwls.RecursiveWLSBank` with unit weights
    fits ``z_op^T beta`` to the targets ``ln v_k + 1.2704`` with ``v_k`` from
    (1) of :mod:`estimator.noise.variance`.
    Under Gaussian noise ``ln v_k = ln sigma_k^2 + ln chi2_1``, whose mean is
    ``ln sigma_k^2 - 1.2704`` (``E[ln chi2_1] = psi(1/2) + ln 2``) and whose
    variance ``pi^2 / 2`` does not depend on the operating point, so unit
    weights are the right ones. Without the correction the intercept would be
    low by 1.2704, the variance by a factor 3.56.

    Zero guard. Quantised sensors give ``e == 0`` exactly and ``ln 0 = -inf``.
    ``v_k`` is floored at ``floor_ratio`` times the variance predicted before
    the sample once the model predicts (identifiable and past ``warmup``), and
    always at the smallest positive normal float (``ln = -708.4``). Not
    earlier: a fit of a few samples can be wildly too high (a slope of 190 after
    four samples was seen in a test), and a floor relative to it would then
    bind on most samples and hold the fit there for thousands of samples. The floor clips the lower tail of
    ``chi2_1``: with ``floor_ratio = 1e-6`` a fraction 8e-4 of Gaussian samples,
    raising the mean target by about ``4 sqrt(1e-6) / sqrt(2 pi) = 1.6e-3``.

    Parameters
    ----------
    n_channels : int
        K.
    n_terms : int
        m, entries of the operating-point regressor ``z_op`` (e.g. built by
        :class:`~estimator.channels.regressors.RegressorSpec` from ``["1", "load"]``).
    forgetting_factor : float or ndarray, shape (K,)
        lambda of the log fit, in (0, 1]; memory about ``1 / (1 - lambda)``
        samples (common practice).
    floor_ratio : float
        In (0, 1); see the zero guard.
    warmup : int, optional
        Samples fitted before :meth:`variance` reports a value; default
        ``50 m``, where the intercept's standard error is about
        ``sqrt(pi^2 / 2 / 50) = 0.31`` (a factor 1.4 in variance).

    References
    ----------
    Harvey (1976); see the module docstring.
    """

    def __init__(self, n_channels: int, n_terms: int, forgetting_factor: ArrayLike = 0.999,
                 floor_ratio: float = 1e-6, warmup: int | None = None) -> None:
        k = check_int(n_channels, "n_channels", 1)
        m = check_int(n_terms, "n_terms", 1)
        ratio = check_positive(floor_ratio, "floor_ratio")
        if not ratio < 1.0:
            raise ValueError(f"floor_ratio must be in (0, 1), got {ratio}")
        self.warmup = 50 * m if warmup is None else check_int(warmup, "warmup", 1)
        self._bank = RecursiveWLSBank(k, m, forgetting_factor)
        self.n_channels = k
        self.n_terms = m
        self.floor_ratio = ratio
        self._log_floor_ratio = math.log(ratio)
        self._count: NDArray[np.int64] = np.zeros(k, dtype=np.int64)

    @property
    def sample_count(self) -> NDArray[np.int64]:
        """Samples fitted per channel, shape (K,) (a copy)."""
        return self._count.copy()

    # ---------------------------------------------------------------- helpers
    def _check_z(self, z_op: ArrayLike, b: int) -> FloatArray:
        z = np.asarray(z_op, dtype=np.float64)
        if z.shape != (b, self.n_terms):
            raise ValueError(f"z_op must have shape ({b}, {self.n_terms}), got {z.shape}")
        if not np.isfinite(z).all():
            raise ValueError("z_op must be finite")
        return z

    def _check_z_one(self, z_op: Sequence[float]) -> list[float]:
        z = [float(x) for x in z_op]
        if len(z) != self.n_terms:
            raise ValueError(f"z_op must have length {self.n_terms}, got {len(z)}")
        if not all(math.isfinite(x) for x in z):
            raise ValueError(f"z_op must be finite, got {z}")
        return z

    def _log_prediction(self, idx: IndexArray, z: FloatArray) -> tuple[FloatArray, FloatArray, NDArray[np.bool_]]:
        """(z^T beta (B,), beta (m, B), identifiable (B,)); ``idx`` may repeat a channel."""
        beta, identifiable = self._bank.solution(idx)
        lp = z[:, 0] * beta[0]
        for j in range(1, self.n_terms):             # left to right, as the scalar twin
            lp = lp + z[:, j] * beta[j]
        return lp, beta, identifiable

    def _log_prediction_one(self, channel: int, z: list[float]) -> tuple[float, bool]:
        beta, identifiable = self._bank.solution_one(channel)
        lp = z[0] * beta[0]
        for j in range(1, self.n_terms):
            lp = lp + z[j] * beta[j]
        return lp, identifiable

    def _channel_index(self, channels: ArrayLike | None, b: int) -> IndexArray:
        if channels is None:
            if b != self.n_channels:
                raise ValueError(f"without channels, z_op must have {self.n_channels} rows, got {b}")
            return np.arange(self.n_channels)
        raw = np.asarray(channels)
        if raw.shape != (b,) or (b and raw.dtype.kind not in "iu"):
            raise ValueError(f"channels must be integers of shape ({b},), got {raw.dtype} {raw.shape}")
        idx = raw.astype(np.intp)
        if b and (idx.min() < 0 or idx.max() >= self.n_channels):
            raise ValueError(f"channels must be in 0..{self.n_channels - 1}, got {idx.min()}..{idx.max()}")
        return idx

    # ---------------------------------------------------------------- updates
    def update(self, channels: ArrayLike | None, z_op: ArrayLike, innovation: ArrayLike,
               leverage: ArrayLike, kappa: ArrayLike) -> NDArray[np.bool_]:
        """Fit one sample for each of B distinct channels.

        Parameters
        ----------
        channels : array_like of int, shape (B,), or None
            Each at most once; None means ``arange(K)``.
        z_op : array_like, shape (B, m)
            Operating-point regressor rows.
        innovation, leverage : array_like, shape (B,)
        kappa : float or array_like, shape (B,)
            As for :meth:`~estimator.noise.variance.NoiseVarianceTracker.update`; non-finite innovation or
            infinite leverage skips the sample.

        Returns
        -------
        ndarray of bool, shape (B,)
            Which samples were fitted.

        Raises
        ------
        ValueError
            Shapes, channel indices or values out of their domain, ``z_op`` not
            finite; nothing is applied then.
        """
        idx, e, h, kap = check_residuals(self.n_channels, channels, innovation, leverage, kappa)
        return self.update_trusted(idx, self._check_z(z_op, e.shape[0]), e, h, kap)

    def update_trusted(self, idx: IndexArray, z: FloatArray, e: FloatArray, h: FloatArray,
                       kap: FloatArray) -> NDArray[np.bool_]:
        """:meth:`update` without its checks, for a caller that made them (same arithmetic, same bits).

        ``idx`` distinct channel indices; ``z`` finite float64 (B, m); ``e``, ``h``, ``kap`` (B,).
        """
        used = np.isfinite(e) & (h < np.inf)
        if not used.all():
            idx, e, h, kap, z = idx[used], e[used], h[used], kap[used], z[used]
        if idx.shape[0] == 0:
            return used
        v = e * e / (1.0 + kap * h)                  # (1)
        lp, _, identifiable = self._log_prediction(idx, z)
        predicts = identifiable & (self._count[idx] >= self.warmup)
        log_v = np.log(np.maximum(v, _TINY))
        # ln max(v, floor_ratio * exp(z^T beta)) = max(ln v, ln floor_ratio + z^T beta)
        target = np.maximum(log_v, np.where(predicts, self._log_floor_ratio + lp, -np.inf))
        self._bank.update_trusted(z, target + _LOG_CHI2_BIAS, np.ones(idx.shape[0]), idx)
        self._count[idx] += 1
        return used

    def update_one(self, channel: int, z_op: Sequence[float], innovation: float, leverage: float,
                   kappa: float) -> bool:
        """Scalar path for one sample of one channel; bit-identical to :meth:`update`.

        Returns
        -------
        bool
            Whether the sample was fitted.

        Raises
        ------
        ValueError
            As :meth:`update`; the state is untouched then.
        """
        e, h, kap = check_residual_one(self.n_channels, channel, innovation, leverage, kappa)
        z = self._check_z_one(z_op)
        if not math.isfinite(e) or h == math.inf:
            return False
        v = e * e / (1.0 + kap * h)                  # (1)
        lp, identifiable = self._log_prediction_one(channel, z)
        target = float(np.log(max(v, _TINY)))
        if identifiable and self._count[channel] >= self.warmup:
            target = max(target, self._log_floor_ratio + lp)
        self._bank.update_one(channel, z, target + _LOG_CHI2_BIAS)
        self._count[channel] += 1
        return True

    def reset_channel(self, channel: int) -> None:
        """Forget channel ``channel``'s operating-point model."""
        self._bank.reset_channel(channel)
        self._count[channel] = 0

    # ------------------------------------------------------------------ reads
    def variance(self, channels: ArrayLike | None, z_op: ArrayLike) -> FloatArray:
        """Predicted noise variance ``exp(z_op^T beta)``, shape (B,).

        NaN where the channel is not identifiable or has fewer than ``warmup``
        samples; saturates at the largest float instead of overflowing.
        """
        z = np.asarray(z_op, dtype=np.float64)
        if z.ndim != 2:
            raise ValueError(f"z_op must have shape (B, {self.n_terms}), got {z.shape}")
        idx = self._channel_index(channels, z.shape[0])
        z = self._check_z(z, idx.shape[0])
        lp, _, identifiable = self._log_prediction(idx, z)
        ready = identifiable & (self._count[idx] >= self.warmup)
        return np.where(ready, np.exp(np.minimum(lp, _LOG_MAX)), np.nan)

    def variance_one(self, channel: int, z_op: Sequence[float]) -> float:
        """Scalar twin of :meth:`variance`."""
        if isinstance(channel, bool) or not isinstance(channel, int | np.integer) \
                or not 0 <= channel < self.n_channels:
            raise ValueError(f"channel must be an integer in 0..{self.n_channels - 1}, got {channel!r}")
        z = self._check_z_one(z_op)
        if self._count[channel] < self.warmup:
            return math.nan
        lp, identifiable = self._log_prediction_one(channel, z)
        if not identifiable:
            return math.nan
        return float(np.exp(min(lp, _LOG_MAX)))

    def coefficients(self, channels: ArrayLike | None = None) -> FloatArray:
        """beta per channel, shape (B, m) (a copy); NaN rows where not identifiable."""
        idx = np.arange(self.n_channels) if channels is None else np.asarray(channels, dtype=np.intp)
        if idx.ndim != 1 or (idx.shape[0] and (idx.min() < 0 or idx.max() >= self.n_channels)):
            raise ValueError(f"channels must be a vector of indices in 0..{self.n_channels - 1}")
        _, beta, identifiable = self._log_prediction(idx, np.zeros((idx.shape[0], self.n_terms)))
        return np.where(identifiable[:, None], beta.T, np.nan)

    def state(self) -> LogVarianceState:
        """Copy of the bank's arrays, the settings and the counts; see :class:`LogVarianceState`."""
        return LogVarianceState(bank=self._bank.state(), floor_ratio=self.floor_ratio, warmup=self.warmup,
                                sample_count=self._count.copy())

    @classmethod
    def from_state(cls, state: LogVarianceState) -> LogVarianceModel:
        """Rebuild a model exactly from :meth:`state`."""
        k, m1, _ = state.bank.factor.shape
        model = cls(k, m1 - 1, state.bank.forgetting_factor, state.floor_ratio, state.warmup)
        model.restore(state)
        return model

    def restore(self, state: LogVarianceState) -> None:
        """Take back a :meth:`state` of a model of this shape and these settings; ``state()`` then equals it.

        Raises
        ------
        ValueError
            Arrays of another shape, or settings other than this model's; nothing is changed then.
        """
        if np.shape(state.sample_count) != (self.n_channels,):
            raise ValueError(f"state.sample_count must have shape ({self.n_channels},), "
                             f"got {np.shape(state.sample_count)}")
        if state.floor_ratio != self.floor_ratio or state.warmup != self.warmup:
            raise ValueError(f"state holds floor_ratio {state.floor_ratio} and warmup {state.warmup}, this model "
                             f"{self.floor_ratio} and {self.warmup}")
        self._bank.restore(state.bank)
        self._count[...] = state.sample_count
