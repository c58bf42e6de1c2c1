"""What a group of channels is judged against: baselines, commissioning, and the detectors after each round.

Both application paths of :class:`~estimator.channels.channel_bank.ChannelBank` call
:meth:`GroupWatch.after_round` with the same arrays for every round, so the
detectors see the same numbers whichever path ran (and give the same bits).

Commissioning: a channel without a baseline learns one from its own estimates
once it has applied ``commissioning_samples`` samples and is identifiable
(parameters, their covariance, the noise sigma, the operating-point model); 0
means never learn, wait for a baseline from ``rwls fit`` or an engineer. The
baseline sigma is the mean of ``e^2 / (1 + kappa h)`` over every predictable
sample since the last baseline (or reset), not the tracker's exponentially
weighted value: the variance detector is judged against it, and over a
commissioning period of N samples its relative error is about
``sqrt(2 / N)`` (4.5 % for N = 1000) rather than that of the tracker's
shorter memory. A channel with an operating-point noise model has that
model's coefficients in its baseline: those when commissioning ends, their
intercept then calibrated on the next ``commissioning_samples / 2`` samples
(the mean ratio of squared innovations to predictions), so its commissioning
takes half as long again.
"""

from __future__ import annotations

import math
from collections.abc import Sequence
from dataclasses import dataclass

import numpy as np
from numpy.typing import NDArray

from estimator.channels.channel import ChannelSettings
from estimator.detection.baseline import Baseline, BaselineHistory
from estimator.detection.detectors import ConditionEvent, DetectorBank, DetectorState
from estimator.noise.log_variance import LogVarianceModel
from estimator.noise.variance import NoiseVarianceTracker
from estimator.recursive.rwls import RecursiveWLSBank
from estimator.recursive.statistics import CONDITION_LIMIT, bank_statistics

__all__ = ["MIN_SIGMA_SAMPLES", "GroupWatch", "WatchNotice", "WatchState"]

MIN_SIGMA_SAMPLES = 30      # fewer samples since the last baseline: the tracker's sigma is taken instead

FloatArray = NDArray[np.float64]
IndexArray = NDArray[np.intp]


@dataclass(frozen=True)
class WatchNotice:
    """What changed in how a channel is judged, in sample order with the detectors' condition events.

    ``kind``: ``baseline`` (a new one in force), ``restart`` (a reset: none in force, commissioning
    again) or ``judged`` (the drift test can, or can no longer, judge the estimates: ``judged`` says).
    """

    index: int
    kind: str
    t: float                        # sample time (NaN when unknown)
    baseline: Baseline | None = None
    judged: bool | None = None


@dataclass(frozen=True)
class WatchState:
    """Copy of what a :class:`GroupWatch` gathers and holds; its settings are the configuration's.

    Channel axis first, each (K,) unless said: ``commissioned`` (int64), samples since the start or the
    last reset; ``square_sum`` and ``square_count`` (int64), the squares towards the next baseline's
    sigma; ``candidate`` (K, m), the operating-point model's coefficients when commissioning ended (None
    without a model), with ``ratio_sum`` and ``ratio_count`` (int64) calibrating its level; ``judged``
    (bool), whether the drift test could judge at its last check; ``last_innovation`` and
    ``last_spread``, the newest applied sample's innovation and its predicted spread. ``detectors``:
    the detectors' state; ``baselines``: each channel's baselines, oldest first. Events not yet taken
    are no state: the owner takes them after every batch.
    """

    commissioned: NDArray[np.int64]
    square_sum: FloatArray
    square_count: NDArray[np.int64]
    candidate: FloatArray | None
    ratio_sum: FloatArray
    ratio_count: NDArray[np.int64]
    judged: NDArray[np.bool_]
    last_innovation: FloatArray
    last_spread: FloatArray
    detectors: DetectorState
    baselines: tuple[tuple[Baseline, ...], ...]


class GroupWatch:
    """Detectors, baselines and commissioning counts of one group's K channels."""

    def __init__(self, settings: Sequence[ChannelSettings], wls: RecursiveWLSBank,
                 tracker: NoiseVarianceTracker, model: LogVarianceModel | None) -> None:
        self.wls = wls
        self.tracker = tracker
        self.model = model
        self.detectors = DetectorBank([s.detectors for s in settings], wls.n_params)
        self.histories = [BaselineHistory() for _ in settings]
        self._estimated = np.array([s.covariance_scale == "estimated" for s in settings])
        self._target = np.array([s.detectors.commissioning_samples for s in settings], dtype=np.int64)
        self.commissioned = np.zeros(len(settings), dtype=np.int64)   # samples since start or reset
        self._square_sum = np.zeros(len(settings))      # sum of e^2 / (1 + kappa h) since the last baseline
        self._square_count = np.zeros(len(settings), dtype=np.int64)
        # Channels with an operating-point model: its coefficients when commissioning ended, and the
        # squares over their prediction since, to calibrate its level before the baseline is set.
        self._candidate = np.full((len(settings), model.n_terms), np.nan) if model is not None else None
        self._ratio_sum = np.zeros(len(settings))
        self._ratio_count = np.zeros(len(settings), dtype=np.int64)
        self._intercept = [s.noise_model_terms.index("1") if "1" in s.noise_model_terms else None for s in settings]
        # Condition events and notices in one list, in the order they happened.
        self._events: list[ConditionEvent | WatchNotice] = []
        self.detectors.sink = self._events
        if model is not None:
            self.detectors.expect_model(model.n_terms)
        self._judged = np.ones(len(settings), dtype=bool)             # could the drift test judge, last check
        # The last applied sample's innovation (before its update) and the standard deviation predicted
        # for it, sqrt(sigma^2 (1 + kappa z^T P z)): what a trend of residuals shows.
        self.last_innovation = np.full(len(settings), np.nan)
        self.last_spread = np.full(len(settings), np.nan)

    # ------------------------------------------------------------------ rounds
    def after_round(self, idx: IndexArray, t: FloatArray, e: FloatArray, h: FloatArray, kappa: FloatArray,
                    declared: FloatArray, z_op: FloatArray | None) -> None:
        """The detectors for one applied sample of each channel ``idx`` (after the WLS update, tracker and model)."""
        with np.errstate(invalid="ignore", over="ignore"):
            v = e * e / (1.0 + kappa * h)
        counted = np.isfinite(v) & np.isnan(declared)
        self._square_sum[idx] += np.where(counted, v, 0.0)
        self._square_count[idx] += counted
        if self._candidate is not None and z_op is not None:
            calibrating = counted & ~np.isnan(self._candidate[idx, 0])
            if calibrating.any():
                chosen = idx[calibrating]
                beta = self._candidate[chosen]
                log_v = z_op[calibrating, 0] * beta[:, 0]
                for j in range(1, beta.shape[1]):
                    log_v = log_v + z_op[calibrating, j] * beta[:, j]
                with np.errstate(over="ignore", invalid="ignore", divide="ignore"):
                    ratio = v[calibrating] / np.exp(log_v)
                usable = np.isfinite(ratio)
                self._ratio_sum[chosen] += np.where(usable, ratio, 0.0)
                self._ratio_count[chosen] += usable
        v_ref = np.where(np.isnan(declared), self.detectors.reference_variance(idx, z_op), declared)
        self.last_innovation[idx] = e
        # Its spread at the noise of the moment: declared, else tracked (NaN while the tracker warms up).
        v_now = np.where(np.isnan(declared), self.tracker.variance_of(idx), declared)
        with np.errstate(invalid="ignore", over="ignore"):
            self.last_spread[idx] = np.sqrt(v_now * (1.0 + kappa * h))
        due = self.detectors.step(idx, t, e, h, kappa, v_ref)
        if due.any():
            checked = idx[due]
            theta, cov, judged = self._estimates(checked)
            flipped = judged != self._judged[checked]
            if flipped.any():
                for j in np.flatnonzero(flipped).tolist():
                    self._events.append(WatchNotice(int(checked[j]), "judged", float(t[due][j]),
                                                    judged=bool(judged[j])))
                self._judged[checked] = judged
            self.detectors.check_drift(checked, t[due], theta, cov, judged)
        self.commissioned[idx] += 1
        waiting = (self._target[idx] > 0) & ~self.detectors.has_baseline[idx] \
            & (self.commissioned[idx] >= self._target[idx])
        if waiting.any():
            for j in np.flatnonzero(waiting).tolist():
                i = int(idx[j])
                if self._candidate is not None and not self._calibrated(i):
                    continue
                self.learn(i, float(t[j]), "learned", samples=int(self.commissioned[i]))

    def _calibrated(self, channel: int) -> bool:
        """Whether a model channel's level calibration is complete; starts it when commissioning ends."""
        if self._candidate is None or self.model is None:
            return True
        if np.isnan(self._candidate[channel, 0]):
            coefficients = self.model.coefficients([channel])[0]
            if np.isfinite(coefficients).all() and self._intercept[channel] is not None:
                self._candidate[channel] = coefficients
                self._ratio_sum[channel] = 0.0
                self._ratio_count[channel] = 0
            return self._intercept[channel] is None             # nothing to calibrate without an intercept
        needed = max(MIN_SIGMA_SAMPLES, int(self._target[channel]) // 2)
        return bool(self._ratio_count[channel] >= needed)

    def _estimates(self, idx: IndexArray) -> tuple[FloatArray, FloatArray, NDArray[np.bool_]]:
        """theta (B, n), its covariance ``kappa P s^2`` (B, n, n) and whether it may be judged."""
        stats = bank_statistics(self.wls.factor(idx), self.wls.effective_count[idx], scale="known")
        scale = np.where(self._estimated[idx], stats.residual_sd ** 2, 1.0) * self.wls.kappa(idx)
        cov = stats.unscaled_covariance * scale[:, None, None]
        judged = stats.identifiable & (stats.dof >= 1.0) & (stats.information_condition <= CONDITION_LIMIT)
        return stats.parameters, cov, judged

    # -------------------------------------------------------------- baselines
    def learn(self, channel: int, t: float | None, source: str, samples: int = 0, note: str = "") -> Baseline | None:
        """A baseline from the channel's current estimates; None while they are not usable."""
        theta, cov, judged = self._estimates(np.array([channel], dtype=np.intp))
        count = int(self._square_count[channel])
        variance = (float(self._square_sum[channel]) / count if count >= MIN_SIGMA_SAMPLES
                    else self.tracker.variance_one(channel))
        sigma = math.sqrt(variance) if variance > 0.0 else math.nan
        if not (judged[0] and math.isfinite(sigma)):
            return None
        beta = None
        if self.model is not None and self._candidate is not None:
            coefficients = self.model.coefficients([channel])[0]
            # The coefficients when commissioning ended, their level calibrated on the samples since
            # (the intercept absorbs the mean ratio of squared innovations to predictions).
            ratios, position = int(self._ratio_count[channel]), self._intercept[channel]
            candidate = self._candidate[channel]
            if ratios >= MIN_SIGMA_SAMPLES and position is not None and self._ratio_sum[channel] > 0.0 \
                    and not np.isnan(candidate[0]):
                coefficients = candidate.copy()
                coefficients[position] += math.log(float(self._ratio_sum[channel]) / ratios)
            beta = coefficients if np.isfinite(coefficients).all() else None
        baseline = Baseline(self.histories[channel].next_version, source, theta[0], cov[0], sigma, beta,
                            None if t is None or math.isnan(t) else t, samples, note)
        self.set(channel, baseline)
        return baseline

    def set(self, channel: int, baseline: Baseline) -> None:
        """Put ``baseline`` in force (its version must be the next one)."""
        self.histories[channel].add(baseline)
        self.detectors.set_baseline(channel, baseline)
        self._clear_sums(channel)
        self._events.append(WatchNotice(channel, "baseline", math.nan if baseline.t is None else baseline.t,
                                        baseline=baseline))

    def _clear_sums(self, channel: int) -> None:
        """Forget what commissioning gathered towards the next baseline and noise model of ``channel``."""
        self._square_sum[channel] = 0.0
        self._square_count[channel] = 0
        self._ratio_sum[channel] = 0.0
        self._ratio_count[channel] = 0
        if self._candidate is not None:
            self._candidate[channel] = np.nan

    def restart(self, channel: int, t: float | None) -> None:
        """After a reset: no baseline in force (the history stays), commissioning from zero."""
        self.detectors.clear_baseline(channel, t)
        self.commissioned[channel] = 0
        self._clear_sums(channel)
        self._judged[channel] = True
        self.last_innovation[channel] = np.nan
        self.last_spread[channel] = np.nan
        self._events.append(WatchNotice(channel, "restart", math.nan if t is None else t))

    # ------------------------------------------------------------------ state
    def state(self) -> WatchState:
        """Copy of every array, the detectors' state and the baselines; see :class:`WatchState`."""
        return WatchState(
            commissioned=self.commissioned.copy(), square_sum=self._square_sum.copy(),
            square_count=self._square_count.copy(),
            candidate=None if self._candidate is None else self._candidate.copy(),
            ratio_sum=self._ratio_sum.copy(), ratio_count=self._ratio_count.copy(), judged=self._judged.copy(),
            last_innovation=self.last_innovation.copy(), last_spread=self.last_spread.copy(),
            detectors=self.detectors.state(), baselines=tuple(tuple(h.versions) for h in self.histories))

    def restore(self, state: WatchState) -> None:
        """Take back a :meth:`state` of a watch over as many channels; ``state()`` then equals it.

        Raises
        ------
        ValueError
            An array of another shape, a candidate where this group has no operating-point model (or
            none where it has), baselines not numbered 1, 2, ...; nothing is changed then.
        """
        k = len(self.histories)
        for name in ("commissioned", "square_sum", "square_count", "ratio_sum", "ratio_count", "judged",
                     "last_innovation", "last_spread"):
            if np.shape(getattr(state, name)) != (k,):
                raise ValueError(f"state.{name} must have shape ({k},), got {np.shape(getattr(state, name))}")
        wanted = None if self._candidate is None else self._candidate.shape
        given = None if state.candidate is None else np.shape(state.candidate)
        if given != wanted:
            raise ValueError(f"state.candidate must have shape {wanted}, got {given}")
        if len(state.baselines) != k:
            raise ValueError(f"state.baselines must list {k} channels, got {len(state.baselines)}")
        for channel, versions in enumerate(state.baselines):
            numbers = [b.version for b in versions]
            if numbers != list(range(1, len(numbers) + 1)):
                raise ValueError(f"state.baselines of channel {channel} must be versions 1, 2, ..., got {numbers}")
        self.detectors.restore(state.detectors)
        self.commissioned[...] = state.commissioned
        self._square_sum[...] = state.square_sum
        self._square_count[...] = state.square_count
        if self._candidate is not None and state.candidate is not None:
            self._candidate[...] = state.candidate
        self._ratio_sum[...] = state.ratio_sum
        self._ratio_count[...] = state.ratio_count
        self._judged[...] = state.judged
        self.last_innovation[...] = state.last_innovation
        self.last_spread[...] = state.last_spread
        for history, versions in zip(self.histories, state.baselines, strict=True):
            history.versions[:] = versions

    def take(self) -> list[ConditionEvent | WatchNotice]:
        """Condition changes and notices since the last call, in order."""
        events = list(self._events)
        self._events.clear()
        return events

