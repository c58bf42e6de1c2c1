"""Noise variance from the a-priori residuals of a :class:`~estimator.recursive.rwls.RecursiveWLSBank`.

Normalisation. With weights consistent with the noise (``w_k = c / sigma_k^2``
for any c > 0) the a-priori innovation ``e_k = y_k - z_k^T theta_{k-1}`` has

    Var(e_k) ~= sigma_k^2 (1 + kappa_{k-1} h_k),       h_k = w_k z_k^T P_{k-1} z_k

because the estimate's error is independent of the new noise and has
covariance ``~ kappa c P_{k-1}``; ``kappa = sum lambda^(2(k-i)) / sum lambda^(k-i)``
is the bank's :meth:`~estimator.recursive.rwls.RecursiveWLSBank.kappa`, read before the
update that produced ``e_k``. For lambda = 1 (kappa = 1) the relation is exact
given the regressors. Hence

    v_k = e_k^2 / (1 + kappa h_k)                                          (1)

is an unbiased one-sample estimate of ``sigma_k^2``; under Gaussian noise
``v_k / sigma_k^2 ~ chi2_1``. For lambda < 1, ``kappa P`` is a steady-state
approximation of the estimate's covariance; measured with two Gaussian
regressors and unit weights, the mean of ``v_k / sigma^2`` is 1.000 at
lambda = 0.995, 1.002 at 0.95, 0.993 at 0.9 and 0.973 at 0.8 (raw ``e^2``:
1.005, 1.056, 1.109, 1.239). Samples the bank could not yet predict (NaN
innovation, infinite leverage) carry no information and are skipped.

This module holds :class:`NoiseVarianceTracker`, an EWMA of ``v_k`` per channel
(Roberts 1959), debiased at start-up, optionally robust (Huber-type clipping);
:class:`~estimator.noise.log_variance.LogVarianceModel`, a regression of ``ln v_k``,
checks the bank's by-products as it does (:mod:`estimator.noise.residual_checks`).
The tracker's vectorised path over channels and its scalar path for one
channel perform the same IEEE operations in the same order, so their states
agree bit for bit; ``expm1`` goes through numpy's ufunc in both paths, since
``math`` and numpy may differ in the last bit where numpy uses SIMD kernels.

References
----------
Roberts, S. W. (1959). Control chart tests based on geometric moving averages.
    Technometrics 1(3), 239-250.
Huber, P. J. (1964). Robust estimation of a location parameter. Annals of
    Mathematical Statistics 35(1), 73-101.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np
from numpy.typing import ArrayLike, NDArray

from estimator.noise.residual_checks import batch_vector, check_int, check_positive, check_residual_one, check_residuals

__all__ = ["NoiseVarianceTracker", "TrackerState"]

FloatArray = NDArray[np.float64]
IndexArray = NDArray[np.intp]

_LN2 = math.log(2.0)


def _clipped_chi2_1_mean(clip: float) -> float:
    """``E[min(X, c^2)]`` for X ~ chi2_1, in closed form.

    ``E[X; X <= t] = P(chi2_3 <= t)`` because ``x f_1(x) = f_3(x)``, so
    ``E[min(X, t)] = P(chi2_3 <= t) + t P(chi2_1 > t)`` with
    ``P(chi2_1 <= t) = erf(sqrt(t/2))`` and
    ``P(chi2_3 <= t) = erf(sqrt(t/2)) - sqrt(2t/pi) exp(-t/2)``
    (Abramowitz & Stegun 1964, section 26.4, odd degrees of freedom).
    """
    t = clip * clip
    p1 = math.erf(math.sqrt(t / 2.0))
    p3 = p1 - math.sqrt(2.0 * t / math.pi) * math.exp(-t / 2.0)
    return p3 + t * (1.0 - p1)


@dataclass(frozen=True)
class TrackerState:
    """Copy of every array of a :class:`NoiseVarianceTracker`; enough to rebuild it exactly.

    ``half_life``, ``weighted_sum`` (S), ``weight_sum`` (C) and ``sample_count``
    have shape (K,).
    """

    half_life: FloatArray
    time_based: bool
    robust: bool
    clip: float
    warmup: int
    weighted_sum: FloatArray
    weight_sum: FloatArray
    sample_count: NDArray[np.int64]


class NoiseVarianceTracker:
    """Per-channel noise variance: debiased EWMA of the normalised squared innovations (1).

    With ``alpha = 1 - 2^(-1/half_life)`` (``1 - 2^(-elapsed/half_life)`` when
    time based) the recursions

        S_k = (1 - alpha) S_{k-1} + alpha v_k,    C_k = (1 - alpha) C_{k-1} + alpha

    give the estimate ``S_k / C_k``: a normalised weighted mean of the ``v_i``,
    hence unbiased from the first sample (start-up debiasing, common practice).
    The first sample of a channel has no preceding interval; it enters with the
    weight of the second (for a constant interval this is exactly the debiased
    EWMA started from ``S = C = 0``). A sample's weight halves every half-life.
    The estimate's variance in steady state is ``2 sigma^4 alpha / (2 - alpha)``
    under Gaussian noise (EWMA of chi2_1 samples).

    Robust option (Huber-type). Once an estimate exists, ``v_k`` is clipped at
    ``clip^2 * estimate_{k-1}`` and the estimate is divided by the consistency
    factor ``E[min(X, clip^2)]``, X ~ chi2_1, so that it stays unbiased for
    Gaussian noise; the factor assumes Gaussian noise, and for heavier-tailed
    noise the robust estimate is biased low. Samples that cannot be clipped
    (before ``warmup``, or while the estimate is exactly zero, which would
    otherwise absorb every later sample) enter as ``factor * v_k``, their
    expected clipped value, so the scale of ``S / C`` is the same throughout;
    they are not protected against outliers.

    Parameters
    ----------
    n_channels : int
        K, number of channels.
    half_life : float or ndarray, shape (K,)
        In samples, or in seconds when ``time_based``; finite and > 0.
    time_based : bool
        Decay by the ``elapsed`` seconds passed to each update (irregular sampling).
    robust : bool
        Clip outlying samples as described above.
    clip : float
        c, the clipping point in standard deviations; > 0 (2-3 is usual).
    warmup : int
        Tracked samples before :meth:`variance` reports a value; >= 1.

    References
    ----------
    Roberts (1959); Huber (1964); see the module docstring.
    """

    def __init__(self, n_channels: int, half_life: ArrayLike = 200.0, *, time_based: bool = False,
                 robust: bool = False, clip: float = 3.0, warmup: int = 10) -> None:
        k = check_int(n_channels, "n_channels", 1)
        hl = np.asarray(half_life, dtype=np.float64)
        if hl.ndim == 0:
            hl = np.full(k, float(hl))
        if hl.shape != (k,):
            raise ValueError(f"half_life must be a scalar or shape ({k},), got {hl.shape}")
        good = np.isfinite(hl) & (hl > 0.0)
        if not good.all():
            raise ValueError(f"half_life must be finite and > 0, got {hl[~good][0]}")
        if not isinstance(time_based, bool):
            raise ValueError(f"time_based must be a bool, got {time_based!r}")
        if not isinstance(robust, bool):
            raise ValueError(f"robust must be a bool, got {robust!r}")
        c = check_positive(clip, "clip")
        self.n_channels = k
        self.time_based = time_based
        self.robust = robust
        self.clip = c
        self.warmup = check_int(warmup, "warmup", 1)
        self._half_life: FloatArray = hl.copy()
        # alpha = 1 - 2^(-1/H) = -expm1(-ln2 / H): expm1 keeps the digits when H is long.
        self._alpha: FloatArray = -np.expm1(-_LN2 * (1.0 / hl))
        self._clip2 = c * c
        self._factor = _clipped_chi2_1_mean(c) if robust else 1.0
        self._S: FloatArray = np.zeros(k)
        self._C: FloatArray = np.zeros(k)
        self._count: NDArray[np.int64] = np.zeros(k, dtype=np.int64)

    @property
    def consistency_factor(self) -> float:
        """``E[min(X, clip^2)]``, X ~ chi2_1 (Gaussian noise assumed); 1 when not robust."""
        return self._factor

    @property
    def sample_count(self) -> NDArray[np.int64]:
        """Tracked samples per channel, shape (K,) (a copy)."""
        return self._count.copy()

    # ---------------------------------------------------------------- updates
    def _check_elapsed(self, elapsed: ArrayLike | None, idx: IndexArray) -> FloatArray | None:
        if not self.time_based:
            if elapsed is not None:
                raise ValueError(f"elapsed is only accepted when time_based=True, got {elapsed!r}")
            return None
        if elapsed is None:
            if (self._count[idx] > 0).any():
                raise ValueError("elapsed is required when time_based=True once a channel has tracked samples, "
                                 "got None")
            return np.full(idx.shape[0], np.inf)   # first samples: alpha is not used
        dt = batch_vector(elapsed, idx.shape[0], "elapsed")
        if not (dt > 0.0).all():
            raise ValueError(f"elapsed must be > 0 seconds (inf when unknown), got {dt[~(dt > 0.0)][0]}")
        return dt

    def update(self, channels: ArrayLike | None, innovation: ArrayLike, leverage: ArrayLike,
               kappa: ArrayLike, elapsed: ArrayLike | None = None) -> NDArray[np.bool_]:
        """Track one sample for each of B distinct channels.

        Parameters
        ----------
        channels : array_like of int, shape (B,), or None
            Channel indices, each at most once; None means ``arange(K)``.
        innovation, leverage : array_like, shape (B,)
            From the bank's :class:`~estimator.recursive.rwls.UpdateResult`. A sample with
            A non-finite innovation (NaN, or inf after an overflow)
            or infinite leverage is skipped (not counted).
        kappa : float or array_like, shape (B,)
            The bank's ``kappa(channels)`` read before that update; 1 when lambda = 1.
        elapsed : float or array_like, shape (B,), optional
            Only when ``time_based``: seconds since the channel's previous
            *tracked* sample (> 0; inf when unknown). Ignored for a channel's
            first tracked sample; None is accepted while none of the channels
            in the batch has a tracked sample yet.

        Returns
        -------
        ndarray of bool, shape (B,)
            Which samples were tracked.

        Raises
        ------
        ValueError
            Shapes, channel indices or values out of their domain; nothing is
            applied then.
        """
        idx, e, h, kap = check_residuals(self.n_channels, channels, innovation, leverage, kappa)
        return self.update_trusted(idx, e, h, kap, self._check_elapsed(elapsed, idx))

    def update_trusted(self, idx: IndexArray, e: FloatArray, h: FloatArray, kap: FloatArray,
                       dt: FloatArray | None) -> NDArray[np.bool_]:
        """:meth:`update` without its checks, for a caller that made them (same arithmetic, same bits).

        ``idx`` distinct channel indices; ``e``, ``h``, ``kap`` float64 of shape (B,) in their
        domains; ``dt`` > 0 (inf when unknown) exactly when ``time_based``, else None.
        """
        used = np.isfinite(e) & (h < np.inf)
        if not used.all():
            idx, e, h, kap = idx[used], e[used], h[used], kap[used]
            dt = None if dt is None else dt[used]
        if idx.shape[0] == 0:
            return used
        v = e * e / (1.0 + kap * h)                  # (1)
        S = self._S[idx]
        C = self._C[idx]
        count = self._count[idx]
        alpha = self._alpha[idx] if dt is None else -np.expm1(-_LN2 * (dt / self._half_life[idx]))
        if self.robust:
            warm = count >= self.warmup
            limit = self._clip2 * (S / np.where(warm, C, 1.0) / self._factor)
            clippable = warm & (limit > 0.0)
            v = np.where(clippable, np.minimum(v, limit), v * self._factor)
        second = count == 1                          # first sample takes the second one's weight
        S = np.where(second, S * alpha, S)
        C = np.where(second, C * alpha, C)
        keep = 1.0 - alpha
        S = keep * S + alpha * v                     # S_k = (1 - alpha) S_{k-1} + alpha v_k
        C = keep * C + alpha                         # C_k = (1 - alpha) C_{k-1} + alpha
        first = count == 0
        self._S[idx] = np.where(first, v, S)
        self._C[idx] = np.where(first, 1.0, C)
        self._count[idx] = count + 1
        return used

    def update_one(self, channel: int, innovation: float, leverage: float, kappa: float,
                   elapsed: float | None = None) -> bool:
        """Scalar path for one sample of one channel; bit-identical to :meth:`update`.

        Returns
        -------
        bool
            Whether the sample was tracked.

        Raises
        ------
        ValueError
            As :meth:`update`; the state is untouched then.
        """
        e, h, kap = check_residual_one(self.n_channels, channel, innovation, leverage, kappa)
        dt = math.inf
        if self.time_based:
            if elapsed is None:
                if self._count[channel] > 0:
                    raise ValueError("elapsed is required when time_based=True once the channel has tracked "
                                     "samples, got None")
            else:
                dt = float(elapsed)
            if not dt > 0.0:
                raise ValueError(f"elapsed must be > 0 seconds (inf when unknown), got {dt}")
        elif elapsed is not None:
            raise ValueError(f"elapsed is only accepted when time_based=True, got {elapsed!r}")
        if not math.isfinite(e) or h == math.inf:
            return False
        v = e * e / (1.0 + kap * h)                  # (1)
        s = float(self._S[channel])
        c = float(self._C[channel])
        count = int(self._count[channel])
        if self.time_based:
            alpha = -float(np.expm1(-_LN2 * (dt / float(self._half_life[channel]))))
        else:
            alpha = float(self._alpha[channel])
        if self.robust:
            limit = self._clip2 * (s / c / self._factor) if count >= self.warmup else 0.0
            v = min(v, limit) if limit > 0.0 else v * self._factor
        if count == 0:
            s, c = v, 1.0
        else:
            if count == 1:
                s = s * alpha
                c = c * alpha
            keep = 1.0 - alpha
            s = keep * s + alpha * v
            c = keep * c + alpha
        self._S[channel] = s
        self._C[channel] = c
        self._count[channel] = count + 1
        return True

    def reset_channel(self, channel: int) -> None:
        """Forget channel ``channel``'s noise estimate."""
        self._S[channel] = 0.0
        self._C[channel] = 0.0
        self._count[channel] = 0

    # ------------------------------------------------------------------ reads
    def variance(self) -> FloatArray:
        """Noise variance per channel, shape (K,); NaN before ``warmup`` tracked samples."""
        ready = self._count >= self.warmup
        return np.where(ready, self._S / np.where(ready, self._C, 1.0) / self._factor, np.nan)

    def variance_of(self, idx: IndexArray) -> FloatArray:
        """:meth:`variance` of the channels ``idx`` only, shape (B,) (same bits)."""
        ready = self._count[idx] >= self.warmup
        return np.where(ready, self._S[idx] / np.where(ready, self._C[idx], 1.0) / self._factor, np.nan)

    def variance_one(self, channel: int) -> float:
        """Scalar twin of :meth:`variance` for one channel."""
        if isinstance(channel, bool) or not isinstance(channel, int | np.integer) \
                or not 0 <= channel < self.n_channels:
            raise ValueError(f"channel must be an integer in 0..{self.n_channels - 1}, got {channel!r}")
        if self._count[channel] < self.warmup:
            return math.nan
        return float(self._S[channel]) / float(self._C[channel]) / self._factor

    def state(self) -> TrackerState:
        """Copy of every array; see :class:`TrackerState`."""
        return TrackerState(half_life=self._half_life.copy(), time_based=self.time_based,
                            robust=self.robust, clip=self.clip, warmup=self.warmup,
                            weighted_sum=self._S.copy(), weight_sum=self._C.copy(),
                            sample_count=self._count.copy())

    @classmethod
    def from_state(cls, state: TrackerState) -> NoiseVarianceTracker:
        """Rebuild a tracker exactly from :meth:`state`."""
        k = np.shape(state.half_life)[0] if np.ndim(state.half_life) == 1 else 0
        tracker = cls(k, state.half_life, time_based=state.time_based, robust=state.robust,
                      clip=state.clip, warmup=state.warmup)
        tracker.restore(state)
        return tracker

    def restore(self, state: TrackerState) -> None:
        """Take back a :meth:`state` of a tracker with these settings; ``state()`` then equals it.

        Raises
        ------
        ValueError
            An array of another shape, or settings other than this tracker's; nothing is changed then.
        """
        k = self.n_channels
        for name in ("weighted_sum", "weight_sum", "sample_count"):
            if np.shape(getattr(state, name)) != (k,):
                raise ValueError(f"state.{name} must have shape ({k},), got {np.shape(getattr(state, name))}")
        if not (np.array_equal(state.half_life, self._half_life) and state.time_based == self.time_based
                and state.robust == self.robust and state.clip == self.clip and state.warmup == self.warmup):
            raise ValueError("state holds other settings (half-life, time base, robustness, clip, warmup) than "
                             "this tracker's")
        self._S[...] = state.weighted_sum
        self._C[...] = state.weight_sum
        self._count[...] = state.sample_count
