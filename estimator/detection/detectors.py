"""Drift detectors, vectorised over channels: noise level, variance increase, offset step, parameter drift.

Each applied sample brings its innovation ``e``, its leverage ``h = w z^T P z``
and the bank's ``kappa`` (see :mod:`estimator.recursive.rwls`); the innovation's
variance is about ``V (1 + kappa h)`` with ``V`` the sample's noise variance.
The innovation is normalised by its baseline spread,
``eps_ref = e / sqrt(V_ref (1 + kappa h))`` with ``V_ref`` the baseline's noise
variance (at the sample's operating point when the channel has a noise model;
the declared ``sigma^2`` or ``1 / weight`` under ``sample`` weighting):
unit spread while the channel is as commissioned, but Gaussian only if its
noise is.

Noise shape. The offset and variance CUSUMs are designed for N(0, 1) input,
and a heavy-tailed noise of the same variance would make them raise false
alarms many times too often. So they judge the normal score
``z = Phi^-1(G(eps_ref))`` through the channel's own calibration
distribution ``G``, learned from the ``calibration_samples`` samples after
each baseline (:mod:`estimator.detection.noise_shape`; the CUSUMs are not judged in the
meantime): close to N(0, 1) in control whatever the noise's shape, so their
Gaussian thresholds, Markov-chain run lengths and the fleet budget hold.
``calibration_samples = 0`` takes the noise as Gaussian: ``z = eps_ref``,
judged from the baseline on (the special case, exactly the detectors as they
were before the tables).

``d`` is the difference of consecutive ``z``; ``d^2 / 2`` is chi-square with
one degree of freedom like ``z^2`` while the noise is as calibrated, but a
level shift or a slow drift of the mean (which a tracking estimator turns
into a transient or a steady bias of the innovations) leaves it almost
untouched. Two EWMAs of halved squared differences, each clipped at
``clip^2`` times its own level so that one spike cannot lift it while a real
rise still does: ``D`` (half-life ``noise_half_life``, of ``eps_ref``) for
the noise level in engineering units, and a faster ``F`` (half-life
``offset_scale_half_life``, of ``z``) that scales the offset detector to the
noise of the moment, ``z_now = z / sqrt(F)`` (``F`` before the sample: no
look-ahead).

Detectors (statistics compared with limits; a channel without a baseline, or
a sample the bank could not predict, leaves them untouched):

``offset``
    Two-sided tabular CUSUM on ``z_now`` with reference value ``k`` and
    decision interval ``h`` in sigma units (Page 1954; Montgomery, Introduction
    to Statistical Quality Control, ch. 9): ``C+ = max(0, C+ + eps - k)``,
    ``C- = max(0, C- - eps - k)``; statistic ``max(C+, C-)``. The defaults,
    ``k = 1``, ``h = 7``, are tuned to steps of 2 sigma or more (found in about
    8 samples; in-control ARL 2.9e6 by the Markov chain): a smaller persistent
    offset, or the steady bias of a slow drift, is the drift test's to find.
    ``eps`` is clipped at ``+-offset_clip`` first, so one gross outlier adds at
    most ``clip - k`` (a 4-sigma clip moves the in-control ARL by less than the
    6e-5 chance of a sample beyond it).
``variance``
    One-sided CUSUM, tuned to a variance ratio ``rho`` (reference value from
    :func:`estimator.detection.run_length.variance_reference`), of ``d^2 / (2 (1 + m))``
    clipped at ``clip^2`` (a spike touches two differences: keep
    ``h > 2 (clip^2 - k)``). ``m`` is the margin for the calibration's own
    sampling error (:func:`estimator.detection.run_length.calibration_margin`, 3.7 %
    for h = 60 and 1,000 calibration samples; 0 without a table) that keeps
    the false-alarm rate averaged over channels at the nominal one:
    the variance detector answers the noise, the offset and drift detectors
    the mean. Consecutive differences are correlated, so the
    Markov-chain ARL of the iid chart overstates the in-control ARL (measured
    by simulation: 6,800 samples against 38,800 at h = 30, k = 1.39).
``noise_level``
    The noise sigma tracked from successive differences, ``sigma_base * sqrt(D)``,
    against ``min(noise_high, noise_ratio * sigma_base)``. (The tracker that
    makes the weights sees every innovation, including those of an estimator
    still adapting to a step or a drift, which is not noise.)
``drift``
    ``d^2 = (theta - theta_ref)^T (C + C_ref)^-1 (theta - theta_ref)`` every
    ``drift_every`` samples against the chi-square quantile with n degrees of
    freedom at level ``1 - drift_alpha``; not judged (held) while the caller
    says the channel is not identifiable or too poorly excited.

Alarm conditions. Each statistic becomes a condition with hysteresis and
delays: it turns active when the statistic has exceeded its limit for
``on_delay`` seconds of sample time, and clears when it has stayed below
``limit * (1 - deadband)`` for ``off_delay`` seconds. Samples without a time
take effect at once. A CUSUM condition that clears restarts its CUSUM from
zero (Page 1954: the scheme restarts after it acts), so a second raise needs
a new excursion, as rare in control as the first. The defaults
(:data:`DEFAULT_TIMING`): deadband 0.5 for the CUSUMs and the drift test, 0.1
for the noise level; no on-delay; a 30-minute off-delay for every detector,
so a condition that clears and returns within minutes raises once. Every
change is a :class:`ConditionEvent` with its evidence (statistic, limit,
estimated onset: for a CUSUM the last time it was zero, the classical
change-point estimate).
"""

from __future__ import annotations

import math
from collections.abc import Callable, Sequence
from dataclasses import dataclass
from enum import StrEnum
from typing import Any

import numpy as np
from numpy.typing import NDArray

from estimator.detection import noise_shape
from estimator.detection.baseline import Baseline
from estimator.detection.quantiles import chi2_quantile
from estimator.detection.run_length import calibration_margin, variance_reference

__all__ = [
    "DEFAULT_TIMING",
    "KINDS",
    "ConditionEvent",
    "ConditionTiming",
    "DetectorBank",
    "DetectorKind",
    "DetectorSettings",
    "DetectorState",
]

FloatArray = NDArray[np.float64]
IndexArray = NDArray[np.intp]

class DetectorKind(StrEnum):
    """What a detector judges; the channel's alarm of that kind has the same name."""

    NOISE_LEVEL = "noise_level"
    VARIANCE = "variance"
    OFFSET = "offset"
    DRIFT = "drift"


KINDS = tuple(DetectorKind)        # the order of the condition rows


@dataclass(frozen=True)
class ConditionTiming:
    """Hysteresis and delays of one alarm condition (``deadband`` a fraction of the limit, delays in seconds)."""

    deadband: float = 0.1
    on_delay: float = 0.0
    off_delay: float = 0.0

    def __post_init__(self) -> None:
        if not 0.0 <= self.deadband < 1.0:
            raise ValueError(f"deadband must be in [0, 1), got {self.deadband}")
        for name in ("on_delay", "off_delay"):
            value = getattr(self, name)
            if not (math.isfinite(value) and value >= 0.0):
                raise ValueError(f"{name} must be finite and >= 0 seconds, got {value}")


# Default hysteresis and delays per detector (module docstring, "Alarm conditions"). A CUSUM clears at half
# its decision interval and then restarts from zero; every condition must have stayed clear for 30 minutes
# of sample time before it clears, so a condition that clears and returns within minutes raises once.
DEFAULT_TIMING = {"noise_level": ConditionTiming(deadband=0.1, off_delay=1800.0),
                  "variance": ConditionTiming(deadband=0.5, off_delay=1800.0),
                  "offset": ConditionTiming(deadband=0.5, off_delay=1800.0),
                  "drift": ConditionTiming(deadband=0.5, off_delay=1800.0)}


@dataclass(frozen=True)
class DetectorSettings:
    """A channel's detector limits (see the module docstring); ``inf`` turns a limit off."""

    commissioning_samples: int = 1000
    calibration_samples: int = 1000
    noise_ratio: float = 2.0
    noise_high: float = math.inf
    variance_ratio: float = 2.0
    variance_h: float = 60.0
    variance_clip: float = 3.0
    noise_half_life: float = 200.0
    offset_scale_half_life: float = 100.0
    offset_k: float = 1.0
    offset_h: float = 8.0
    offset_clip: float = 4.0
    drift_alpha: float = 1e-6
    drift_every: int = 25
    timing: tuple[tuple[str, ConditionTiming], ...] = ()

    def __post_init__(self) -> None:
        if self.commissioning_samples < 0:
            raise ValueError(f"commissioning_samples must be >= 0, got {self.commissioning_samples}")
        if self.calibration_samples < 0:
            raise ValueError(f"calibration_samples must be >= 0, got {self.calibration_samples}")
        for name in ("noise_ratio", "noise_high", "variance_h", "offset_h", "variance_clip", "offset_clip",
                     "noise_half_life", "offset_scale_half_life"):
            value = getattr(self, name)
            if not value > 0.0:
                raise ValueError(f"{name} must be > 0, got {value}")
        if not (math.isfinite(self.variance_ratio) and self.variance_ratio > 1.0):
            raise ValueError(f"variance_ratio must be finite and > 1, got {self.variance_ratio}")
        if not (math.isfinite(self.offset_k) and self.offset_k >= 0.0):
            raise ValueError(f"offset_k must be finite and >= 0, got {self.offset_k}")
        if not 0.0 < self.drift_alpha < 1.0:
            raise ValueError(f"drift_alpha must be in (0, 1), got {self.drift_alpha}")
        if self.drift_every < 1:
            raise ValueError(f"drift_every must be >= 1, got {self.drift_every}")
        unknown = [kind for kind, _ in self.timing if kind not in KINDS]
        if unknown:
            raise ValueError(f"timing for unknown detector(s) {unknown}; known: {', '.join(KINDS)}")

    def timing_of(self, kind: str) -> ConditionTiming:
        return dict(self.timing).get(kind, DEFAULT_TIMING[kind])


@dataclass(frozen=True)
class ConditionEvent:
    """An alarm condition turned active or cleared."""

    index: int               # channel index in the bank
    kind: str
    active: bool
    t: float                 # sample time (NaN when unknown)
    statistic: float
    limit: float
    onset: float             # estimated start of the change (sample time; NaN when unknown)


@dataclass(frozen=True)
class DetectorState:
    """Copy of everything a :class:`DetectorBank` learns and holds; its settings are the configuration's.

    Channel axis first. ``has_baseline`` (K,) bool; ``sigma_ref`` (K,), the baseline noise sigma in
    engineering units (NaN without a baseline); ``theta_ref`` (K, n) and ``cov_ref`` (K, n, n), the baseline
    parameters and their covariance; ``beta_ref`` (K, m), the baseline's operating-point model (None when
    no channel has room for one); ``running`` (K, 11), each channel's running statistics (CUSUMs, their
    last zero times, the noise and scale levels, the previous scores, the drift statistic);
    ``since_drift`` (K,) int64, samples since the last drift check; ``active`` (K, 4) bool and
    ``conditions`` (K, 4, 4), each alarm condition (kinds in ``KINDS`` order) and its pending times,
    statistic and onset; ``shape_count`` (K,) int64 and ``shape`` (K, 65), the noise-shape calibration.
    """

    has_baseline: NDArray[np.bool_]
    sigma_ref: FloatArray
    theta_ref: FloatArray
    cov_ref: FloatArray
    beta_ref: FloatArray | None
    running: FloatArray
    since_drift: NDArray[np.int64]
    active: NDArray[np.bool_]
    conditions: FloatArray
    shape_count: NDArray[np.int64]
    shape: FloatArray


# Columns of the per-channel detector state, one row per channel (one gather and one scatter per round).
# _PREV is the previous eps_ref (the noise level's differences), _SPREV the previous normal score.
_UP, _DOWN, _VAR, _PREV, _ZUP, _ZDOWN, _ZVAR, _NOISE, _DRIFT, _SCALE, _SPREV = range(11)
STATE_COLUMNS = 11
# Columns of the per-kind condition state.
_ON, _OFF, _STAT, _ONSET = range(4)
# Columns of the per-channel constants.
_K, _H, _VK, _VH, _CLIP2, _RATIO, _HIGH, _SIGMA, _CLIP, _ALPHA, _FAST, _VSHRINK = range(12)


class DetectorBank:
    """The detectors and alarm conditions of K channels with n parameters.

    Parameters
    ----------
    settings : sequence of DetectorSettings, one per channel
    n_params : int
        Parameters per channel (the drift test's degrees of freedom).
    """

    def __init__(self, settings: Sequence[DetectorSettings], n_params: int) -> None:
        k = len(settings)
        if k < 1:
            raise ValueError("settings must list at least one channel")
        self.n_channels = k
        self.n_params = n_params
        self.settings = tuple(settings)
        # Per-channel constants are worked out once per distinct settings object, then spread by index:
        # the same values whether 100,000 channels share one object or each has its own.
        distinct: dict[int, int] = {}
        unique: list[DetectorSettings] = []
        for s in settings:
            if id(s) not in distinct:
                distinct[id(s)] = len(unique)
                unique.append(s)
        which = np.fromiter((distinct[id(s)] for s in settings), dtype=np.intp, count=k)

        def per_channel(values: list[float] | list[int], dtype: type = np.float64) -> NDArray[Any]:
            return np.array(values, dtype=dtype)[which]

        def column(name: str) -> FloatArray:
            return per_channel([float(getattr(s, name)) for s in unique])

        self._offset_k = column("offset_k")
        self._offset_h = column("offset_h")
        self._offset_clip = column("offset_clip")
        self._variance_k = per_channel([variance_reference(s.variance_ratio) for s in unique])
        self._variance_h = column("variance_h")
        self._clip2 = column("variance_clip") ** 2
        self._noise_ratio = column("noise_ratio")
        self._noise_high = column("noise_high")
        self._drift_limit = per_channel([chi2_quantile(1.0 - s.drift_alpha, n_params) for s in unique])
        self._drift_every = per_channel([s.drift_every for s in unique], np.int64)
        # The variance CUSUM's increments shrink by 1 + m against a reference learned from a finite
        # calibration sample (run_length.calibration_margin): the fleet's average rate stays nominal.
        self._variance_margin = per_channel([calibration_margin(s.variance_h, variance_reference(s.variance_ratio),
                                                                s.calibration_samples) for s in unique])

        self.has_baseline = np.zeros(k, dtype=bool)
        self._sigma_ref = np.full(k, np.nan)
        self._theta_ref = np.zeros((k, n_params))
        self._cov_ref = np.zeros((k, n_params, n_params))
        self._beta_ref: FloatArray | None = None
        self._state = np.full((k, STATE_COLUMNS), np.nan)
        self._state[:, [_UP, _DOWN, _VAR]] = 0.0
        self._since_drift = np.zeros(k, dtype=np.int64)
        # The noise shape (estimator.detection.noise_shape): calibration values taken since the baseline, and per
        # channel its binned masses while calibrating, then its score table. A target of 0: no table.
        self._shape_target = per_channel([s.calibration_samples for s in unique], np.int64)
        self._shape_count = np.zeros(k, dtype=np.int64)
        self._shape = np.zeros((k, noise_shape.KNOTS))
        self._active = np.zeros((len(KINDS), k), dtype=bool)
        self._conditions = np.full((len(KINDS), k, 4), np.nan)
        timing = np.array([[[t.deadband, t.on_delay, t.off_delay] for t in (s.timing_of(kind) for s in unique)]
                           for kind in KINDS], dtype=np.float64)
        self._timing = timing[:, which]
        # Where condition events go; the owner may share its own list, holding notices of its own too.
        self.sink: list[Any] = []
        self._pack(column)

    def _pack(self, column: Callable[[str], FloatArray]) -> None:
        """The per-channel constants side by side: one gather per round."""
        self._constants = np.stack([self._offset_k, self._offset_h, self._variance_k, self._variance_h,
                                    self._clip2, self._noise_ratio, self._noise_high, self._sigma_ref,
                                    self._offset_clip, -np.expm1(-math.log(2.0) / column("noise_half_life")),
                                    -np.expm1(-math.log(2.0) / column("offset_scale_half_life")),
                                    1.0 / (1.0 + self._variance_margin)], axis=1)

    # -------------------------------------------------------------- baselines
    def set_baseline(self, channel: int, baseline: Baseline) -> None:
        """Judge channel against ``baseline`` from now on: statistics restart, active conditions clear."""
        if baseline.parameters.shape != (self.n_params,):
            raise ValueError(f"baseline must have {self.n_params} parameters, got {baseline.parameters.shape[0]}")
        self.has_baseline[channel] = True
        self._sigma_ref[channel] = baseline.noise_sigma
        self._constants[channel, _SIGMA] = baseline.noise_sigma
        self._theta_ref[channel] = baseline.parameters
        self._cov_ref[channel] = baseline.covariance
        if baseline.noise_model is not None:
            if self._beta_ref is None:
                self._beta_ref = np.full((self.n_channels, baseline.noise_model.shape[0]), np.nan)
            self._beta_ref[channel] = baseline.noise_model
        elif self._beta_ref is not None:
            self._beta_ref[channel] = np.nan
        self._restart(channel, baseline.t)

    def expect_model(self, n_terms: int) -> None:
        """The channels have an operating-point noise model of ``n_terms`` terms (room for its baseline)."""
        if self._beta_ref is None:
            self._beta_ref = np.full((self.n_channels, n_terms), np.nan)

    def clear_baseline(self, channel: int, t: float | None = None) -> None:
        """No reference any more (a reset): nothing is judged until a new baseline is set."""
        self.has_baseline[channel] = False
        self._sigma_ref[channel] = np.nan
        self._constants[channel, _SIGMA] = np.nan
        self._restart(channel, t)

    def _restart(self, channel: int, t: float | None) -> None:
        now = math.nan if t is None else t
        row = self._state[channel]
        row[:] = np.nan
        row[[_UP, _DOWN, _VAR]] = 0.0
        row[[_ZUP, _ZDOWN, _ZVAR]] = now
        row[[_NOISE, _SCALE]] = 1.0 if self.has_baseline[channel] else np.nan    # D and F start at the baseline
        self._since_drift[channel] = 0
        self._shape_count[channel] = 0          # a new baseline, a new normalisation: its shape is learned anew
        self._shape[channel] = 0.0
        for q, kind in enumerate(KINDS):
            if self._active[q, channel]:
                self.sink.append(ConditionEvent(channel, kind, False, now, math.nan, math.nan, math.nan))
            self._active[q, channel] = False
            self._conditions[q, channel] = np.nan

    def reference_variance(self, idx: IndexArray, z_op: FloatArray | None) -> FloatArray:
        """Baseline noise variance of each sample: at its operating point where the baseline has a model."""
        variance = self._sigma_ref[idx] ** 2
        if self._beta_ref is not None and z_op is not None:
            beta = self._beta_ref[idx]
            modelled = ~np.isnan(beta[:, 0])
            if modelled.any():
                log_v = z_op[:, 0] * beta[:, 0]
                for j in range(1, beta.shape[1]):
                    log_v = log_v + z_op[:, j] * beta[:, j]
                variance = np.where(modelled, np.exp(np.minimum(log_v, 700.0)), variance)
        return variance

    # ------------------------------------------------------------------ steps
    def step(self, idx: IndexArray, t: FloatArray, e: FloatArray, h: FloatArray, kappa: FloatArray,
             v_ref: FloatArray) -> NDArray[np.bool_]:
        """One sample for each of B distinct channels; returns which of them are due for a drift check.

        Parameters
        ----------
        idx : (B,) channel indices
        t : (B,) sample times (NaN when unknown)
        e, h, kappa : (B,) innovation, leverage, the bank's kappa before the update
        v_ref : (B,) the sample's baseline noise variance (:meth:`reference_variance`, or declared)
        """
        ready = self.has_baseline[idx] & np.isfinite(e) & (h < np.inf)
        if not ready.any():
            return ready                                   # commissioning, or nothing predictable
        s = self._state[idx]
        p = self._constants[idx]
        target = self._shape_target[idx]
        shaped = (target > 0) & (self._shape_count[idx] >= target)       # judged through a score table
        with np.errstate(all="ignore"):
            eps_ref = e / np.sqrt(v_ref * (1.0 + kappa * h))
            referenced = ready & np.isfinite(eps_ref)
            # What the offset and variance CUSUMs see: eps_ref itself without a shape table (the Gaussian
            # case), its normal score with one, nothing while the table is being learned.
            z = np.where(target == 0, eps_ref, np.nan)
            if shaped.any():
                z = np.where(shaped, noise_shape.scores(self._shape, idx, eps_ref), z)
            scored = referenced & np.isfinite(z)
            eps_now = np.clip(z / np.sqrt(s[:, _SCALE]), -p[:, _CLIP], p[:, _CLIP])
            live = scored & np.isfinite(eps_now)
            k = p[:, _K]
            up = np.where(live, np.maximum(0.0, s[:, _UP] + eps_now - k), s[:, _UP])
            down = np.where(live, np.maximum(0.0, s[:, _DOWN] - eps_now - k), s[:, _DOWN])
            s[:, _ZUP] = np.where(live & (up == 0.0), t, s[:, _ZUP])
            s[:, _ZDOWN] = np.where(live & (down == 0.0), t, s[:, _ZDOWN])
            s[:, _UP] = up
            s[:, _DOWN] = down

            paired = scored & np.isfinite(s[:, _SPREV])
            dz = z - s[:, _SPREV]
            x = np.minimum(0.5 * dz * dz * p[:, _VSHRINK], p[:, _CLIP2])
            variance = np.where(paired, np.maximum(0.0, s[:, _VAR] + x - p[:, _VK]), s[:, _VAR])
            s[:, _VAR] = variance
            s[:, _ZVAR] = np.where(paired & (variance == 0.0), t, s[:, _ZVAR])
            s[:, _SPREV] = np.where(scored, z, s[:, _SPREV])
            # F scales the offset CUSUM's input (the scores' spread of the moment); D is the noise level of
            # eps_ref itself, in engineering units once multiplied by the baseline sigma.
            noisy = referenced & np.isfinite(s[:, _PREV])
            d = eps_ref - s[:, _PREV]
            s[:, _PREV] = np.where(referenced, eps_ref, s[:, _PREV])
            for column, rate, half, on in ((_NOISE, p[:, _ALPHA], 0.5 * d * d, noisy),
                                           (_SCALE, p[:, _FAST], 0.5 * dz * dz, paired)):
                level = s[:, column]                 # clipped relative to its own level (module docstring)
                s[:, column] = np.where(on, (1.0 - rate) * level + rate * np.minimum(half, p[:, _CLIP2] * level),
                                        level)
            noise = p[:, _SIGMA] * np.sqrt(s[:, _NOISE])
            self._state[idx] = s
            # noise_level, variance, offset judged together: rows in KINDS order.
            b = idx.shape[0]
            statistic, limit, onset = np.empty((3, b)), np.empty((3, b)), np.empty((3, b))
            statistic[0] = noise
            np.copyto(statistic[1], np.where(paired, variance, np.nan))
            np.copyto(statistic[2], np.where(live, np.maximum(up, down), np.nan))
            np.minimum(p[:, _HIGH], p[:, _RATIO] * p[:, _SIGMA], out=limit[0])
            limit[1] = p[:, _VH]
            limit[2] = p[:, _H]
            onset[0] = np.nan
            onset[1] = s[:, _ZVAR]
            np.copyto(onset[2], np.where(up >= down, s[:, _ZUP], s[:, _ZDOWN]))
            fall = self._judge(slice(0, 3), idx, t, statistic, limit, onset)
            if fall is not None and (fall[1].any() or fall[2].any()):
                self._restart_cusums(idx, t, fall[1], fall[2])
            learning = referenced & (target > 0) & ~shaped
            if learning.any():
                self._learn_shape(idx[learning], t[learning], eps_ref[learning])
        since = self._since_drift[idx] + ready
        due = ready & (since >= self._drift_every[idx])
        self._since_drift[idx] = np.where(due, 0, since)
        return due

    def check_drift(self, idx: IndexArray, t: FloatArray, theta: FloatArray, covariance: FloatArray,
                    judged: NDArray[np.bool_]) -> None:
        """The drift test for channels ``idx``: theta (B, n), its covariance (B, n, n); ``judged`` False holds."""
        delta = theta - self._theta_ref[idx]
        total = covariance + self._cov_ref[idx]
        d2 = np.full(idx.shape[0], np.nan)
        ok = judged & np.isfinite(delta).all(axis=1) & np.isfinite(total).all(axis=(1, 2))
        with np.errstate(all="ignore"):
            if ok.any():
                try:
                    solved = np.linalg.solve(total[ok], delta[ok][:, :, None])[:, :, 0]
                    d2[ok] = np.einsum("bi,bi->b", delta[ok], solved)
                except np.linalg.LinAlgError:
                    pass                                   # a singular covariance: not judged this time
            d2 = np.where(np.isfinite(d2) & (d2 >= 0.0), d2, np.nan)
            self._state[idx, _DRIFT] = np.where(np.isnan(d2), self._state[idx, _DRIFT], d2)
            self._judge(slice(3, 4), idx, t, d2[None], self._drift_limit[idx][None], np.full((1, idx.shape[0]), np.nan))

    def _judge(self, kinds: slice, idx: IndexArray, t: FloatArray, statistic: FloatArray, limit: FloatArray,
               onset: FloatArray) -> NDArray[np.bool_] | None:
        """Hysteresis and delays of the conditions ``KINDS[kinds]`` (module docstring), all at once.

        ``statistic``, ``limit``, ``onset``: (Q, B), one row per kind; NaN statistics hold a condition
        as it is, a NaN onset falls back to the time the statistic first exceeded its limit. Called
        inside ``np.errstate(all="ignore")``: NaN comparisons are meant. Returns which conditions
        cleared (Q, B), or None when none was active.
        """
        c = self._conditions[kinds][:, idx]                 # (Q, B, 4)
        active = self._active[kinds][:, idx]                # (Q, B)
        valid = ~np.isnan(statistic)
        over = valid & (statistic > limit)
        if not (over.any() or active.any()):
            # The usual case: nothing over its limit, nothing active; only pending rises are cancelled.
            c[..., _STAT] = np.where(valid, statistic, c[..., _STAT])
            c[..., _ON] = np.where(valid, np.nan, c[..., _ON])
            self._put(kinds, idx, c)
            return None
        timing = self._timing[kinds][:, idx]                # (Q, B, 3)
        deadband, on_delay, off_delay = timing[..., 0], timing[..., 1], timing[..., 2]
        under = valid & (statistic < limit * (1.0 - deadband))
        on_since = np.where(~active & over, np.where(np.isnan(c[..., _ON]), t, c[..., _ON]),
                            np.where(~active & valid, np.nan, c[..., _ON]))
        off_since = np.where(active & under, np.where(np.isnan(c[..., _OFF]), t, c[..., _OFF]),
                             np.where(active & valid, np.nan, c[..., _OFF]))
        # Unknown times (NaN) give no delay: ~(nan < delay) is True.
        rise = ~active & over & ~(t - on_since < on_delay)
        fall = active & under & ~(t - off_since < off_delay)
        c[..., _ON] = np.where(rise, np.nan, on_since)
        c[..., _OFF] = np.where(fall, np.nan, off_since)
        c[..., _STAT] = np.where(valid, statistic, c[..., _STAT])
        c[..., _ONSET] = np.where(rise, np.where(np.isnan(onset), on_since, onset), c[..., _ONSET])
        self._put(kinds, idx, c)
        first = kinds.start or 0
        for q in range(c.shape[0]):
            self._active[first + q, idx] = (active[q] | rise[q]) & ~fall[q]
            for j in np.flatnonzero(rise[q] | fall[q]).tolist():
                self.sink.append(ConditionEvent(int(idx[j]), KINDS[first + q], bool(rise[q, j]), float(t[j]),
                                                   float(statistic[q, j]), float(limit[q, j]),
                                                   float(c[q, j, _ONSET])))
        return fall

    def _restart_cusums(self, idx: IndexArray, t: FloatArray, variance: NDArray[np.bool_],
                        offset: NDArray[np.bool_]) -> None:
        """A cleared CUSUM condition restarts its CUSUM from zero (Page 1954: a CUSUM restarts after it acts).

        The condition cleared because its statistic stayed below ``h (1 - deadband)`` for the off-delay;
        from zero, another raise needs a new excursion as rare as the first (an in-control ARL), not the
        last stretch of the old one.
        """
        for rows, columns in ((variance, ((_VAR, _ZVAR),)), (offset, ((_UP, _ZUP), (_DOWN, _ZDOWN)))):
            if rows.any():
                chosen = idx[rows]
                for column, zero_time in columns:
                    self._state[chosen, column] = 0.0
                    self._state[chosen, zero_time] = t[rows]

    def _learn_shape(self, rows: IndexArray, t: FloatArray, eps_ref: FloatArray) -> None:
        """Calibration values for channels ``rows`` (distinct); a channel whose calibration is complete gets
        its score table, and its offset and variance CUSUMs start from zero at its last calibration sample."""
        noise_shape.accumulate(self._shape, rows, eps_ref)
        self._shape_count[rows] += 1
        complete = self._shape_count[rows] >= self._shape_target[rows]
        for j in np.flatnonzero(complete).tolist():
            channel = int(rows[j])            # one channel at a time: a table's bits never depend on the batch
            self._shape[channel] = noise_shape.finish(self._shape[channel], int(self._shape_count[channel]))
            row = self._state[channel]
            row[[_UP, _DOWN, _VAR]] = 0.0
            row[[_ZUP, _ZDOWN, _ZVAR]] = t[j]
            row[_SCALE] = 1.0
            row[_SPREV] = np.nan

    def _put(self, kinds: slice, idx: IndexArray, c: FloatArray) -> None:
        first = kinds.start or 0
        for q in range(c.shape[0]):
            self._conditions[first + q, idx] = c[q]

    # ------------------------------------------------------------------ reads
    def take_events(self) -> list[ConditionEvent]:
        """Condition changes since the last call, in the order they happened."""
        events = [e for e in self.sink if isinstance(e, ConditionEvent)]
        self.sink.clear()
        return events

    def limits(self, channel: int) -> dict[str, float]:
        """Each detector's current limit for one channel."""
        return {"noise_level": float(min(self._noise_high[channel],
                                         self._noise_ratio[channel] * self._sigma_ref[channel])),
                "variance": float(self._variance_h[channel]), "offset": float(self._offset_h[channel]),
                "drift": float(self._drift_limit[channel])}

    def judging(self, idx: IndexArray) -> NDArray[np.bool_]:
        """Whether the offset and variance CUSUMs of channels ``idx`` are judged (a baseline, no calibration due)."""
        target = self._shape_target[idx]
        judged: NDArray[np.bool_] = self.has_baseline[idx] & ((target == 0) | (self._shape_count[idx] >= target))
        return judged

    def calibration(self, channel: int) -> tuple[int, int]:
        """Noise-shape calibration of one channel: (values taken since its baseline, values it needs)."""
        return int(self._shape_count[channel]), int(self._shape_target[channel])

    def statistics(self, channel: int) -> dict[str, float]:
        """Each detector's latest statistic for one channel (NaN when not judged yet)."""
        s = self._state[channel]
        judged = bool(self.judging(np.array([channel], dtype=np.intp))[0])
        noise = float(self._sigma_ref[channel] * math.sqrt(s[_NOISE]))
        return {"noise_level": noise, "variance": float(s[_VAR]) if judged else math.nan,
                "offset": float(max(s[_UP], s[_DOWN])) if judged else math.nan, "drift": float(s[_DRIFT])}

    def readings_columns(self, idx: IndexArray) -> tuple[FloatArray, FloatArray, NDArray[np.bool_]]:
        """Over the channels of ``idx``: their statistics and limits ``(B, 4)`` and active flags ``(B, 4)``,
        each row in KINDS order (fresh arrays)."""
        s = self._state[idx]
        judged = self.judging(idx)
        sigma = self._sigma_ref[idx]
        with np.errstate(invalid="ignore"):
            statistics = np.stack([sigma * np.sqrt(s[:, _NOISE]), np.where(judged, s[:, _VAR], np.nan),
                                   np.where(judged, np.maximum(s[:, _UP], s[:, _DOWN]), np.nan), s[:, _DRIFT]], axis=1)
        limits = np.stack([np.minimum(self._noise_high[idx], self._noise_ratio[idx] * sigma), self._variance_h[idx],
                           self._offset_h[idx], self._drift_limit[idx]], axis=1)
        active = self._active[:, idx].T.copy()
        return statistics, limits, active

    def active(self, channel: int) -> dict[str, bool]:
        """Whether each detector's alarm condition is active for one channel."""
        return {kind: bool(self._active[q, channel]) for q, kind in enumerate(KINDS)}

    def onset(self, channel: int, kind: str) -> float:
        """Estimated onset of an active condition (sample time; NaN when unknown)."""
        return float(self._conditions[KINDS.index(kind), channel, _ONSET])

    def state(self) -> DetectorState:
        """Copy of every array the detectors learn and hold (channel axis first); see :class:`DetectorState`."""
        return DetectorState(
            has_baseline=self.has_baseline.copy(), sigma_ref=self._sigma_ref.copy(),
            theta_ref=self._theta_ref.copy(), cov_ref=self._cov_ref.copy(),
            beta_ref=None if self._beta_ref is None else self._beta_ref.copy(), running=self._state.copy(),
            since_drift=self._since_drift.copy(), active=self._active.T.copy(),
            conditions=self._conditions.transpose(1, 0, 2).copy(), shape_count=self._shape_count.copy(),
            shape=self._shape.copy())

    def restore(self, state: DetectorState) -> None:
        """Take back a :meth:`state` of detectors of this shape; ``state()`` then equals it.

        Raises
        ------
        ValueError
            An array of another shape; nothing is changed then.
        """
        k, n = self.n_channels, self.n_params
        expected = {"has_baseline": (k,), "sigma_ref": (k,), "theta_ref": (k, n), "cov_ref": (k, n, n),
                    "running": self._state.shape, "since_drift": (k,), "active": (k, len(KINDS)),
                    "conditions": (k, len(KINDS), self._conditions.shape[2]), "shape_count": (k,),
                    "shape": self._shape.shape}
        for name, shape in expected.items():
            if np.shape(getattr(state, name)) != shape:
                raise ValueError(f"state.{name} must have shape {shape}, got {np.shape(getattr(state, name))}")
        if state.beta_ref is not None and (np.ndim(state.beta_ref) != 2 or np.shape(state.beta_ref)[0] != k):
            raise ValueError(f"state.beta_ref must have shape ({k}, m), got {np.shape(state.beta_ref)}")
        self.has_baseline[...] = state.has_baseline
        self._sigma_ref[...] = state.sigma_ref
        self._constants[:, _SIGMA] = self._sigma_ref          # the packed copy the rounds read
        self._theta_ref[...] = state.theta_ref
        self._cov_ref[...] = state.cov_ref
        self._beta_ref = None if state.beta_ref is None else np.array(state.beta_ref, dtype=np.float64)
        self._state[...] = state.running
        self._since_drift[...] = state.since_drift
        self._active[...] = np.transpose(state.active)
        self._conditions[...] = np.transpose(state.conditions, (1, 0, 2))
        self._shape_count[...] = state.shape_count
        self._shape[...] = state.shape
