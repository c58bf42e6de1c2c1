"""A plant-wide false-alarm budget turned into per-channel detector thresholds, and what detection costs.

The operator states the budget as "at most B false alarms per T seconds over
the whole plant" (EEMUA 191 puts an operator's sustainable steady load near
one alarm per ten minutes; secondary sources, see REFERENCES.md). With N
channels sampled every ``p`` seconds and three statistical detectors each
(offset, variance, drift; the noise-level limit is in engineering units and
set by the engineer), the budget is shared equally:

* false-alarm rate allowed per detector: ``r = B / (T * 3 N)`` per second;
* in-control average run length it needs: ``ARL0 = 1 / (r p)`` samples;
* offset CUSUM: the smallest h whose two-sided Markov-chain ARL0 (Brook &
  Evans 1972, :mod:`estimator.detection.run_length`) reaches it, for the channel's k;
* variance CUSUM (on differences, so its run lengths are correlated and the
  Markov chain does not apply): ``ln ARL0 = a + b h`` fitted to run lengths
  measured by simulation for the default tuning (ratio 2, clip 3):
  a = 3.138, b = 0.189 from h = 15 ... 40 (3,000 runs each, worst residual
  3 %; tests/reference/test_fleet_budget.py re-measures h = 20 and 25),
  extrapolated beyond;
* drift test, one check every ``m`` samples: level ``alpha = r p m`` per check
  (taking checks as independent, which overstates the rate: consecutive
  checks share most of their data).

Non-Gaussian noise. These are Gaussian results, and they hold on heavy-tailed,
spiky or quantised noise because the offset and variance CUSUMs judge normal
scores of the innovations through each channel's own calibration distribution
(:mod:`estimator.detection.noise_shape`): in control the scores are close to N(0, 1)
whatever the noise's shape, so the Markov chain and the fit above apply to
them. Measured (tests/reference/test_noise_shape_run_lengths.py, our own Monte
Carlo at shortened thresholds): in-control ARLs within 0.9 to 1.6 times the
Gaussian design for Gaussian, Student t (3 and 5 dof), Laplace, quantised and
spiky noise of equal variance, where judging the raw innovations gave 0.2 to
0.3 times for the offset CUSUM under t_3 and Laplace noise. Each channel's
reference is learned from a finite sample (1,000 scores by default), whose
error would raise the fleet's average false-alarm rate above that of one
exact channel (the average of a log-normal); the variance CUSUM's increments
carry the margin that cancels it (:func:`estimator.detection.run_length.calibration_margin`,
3.7 % at h = 60), and the offset CUSUM scales itself to the scores' spread of
the moment. What it costs: the CUSUMs judge only after the calibration
(1,000 samples after the baseline's 1,000), and a doubled variance is found
later under heavy tails (2.3x the Gaussian delay for t_5, 2.9x Laplace, 4.7x
t_3; offsets and a gain drift within 1.5x).

The price is detection delay: the offset CUSUM's ARL for a 2-sigma step, the
variance CUSUM's for a doubled variance (Markov chain on independent squares,
an approximation), and for the drift test the next check after the
parameters have moved ``sqrt(limit)`` standard errors.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

from estimator import chi2_quantile, offset_arl, threshold_for_arl, variance_arl, variance_reference

__all__ = ["VARIANCE_FIT", "BudgetThresholds", "derive_thresholds"]

VARIANCE_FIT = (3.138, 0.189)    # ln ARL0 = a + b h, differenced variance CUSUM, ratio 2, clip 3 (measured)
DETECTORS_PER_CHANNEL = 3


@dataclass(frozen=True)
class BudgetThresholds:
    """Thresholds that meet a budget, and what they cost in detection delay."""

    channels: int
    sample_period: float
    rate_per_detector: float      # false alarms per second allowed to one detector of one channel
    arl0: float                   # in-control average run length that needs, samples
    offset_h: float
    variance_h: float
    drift_alpha: float
    offset_delay: float           # samples, 2-sigma step
    variance_delay: float         # samples, doubled variance
    drift_limit: float            # the d^2 limit, with n parameters

    def explain(self) -> str:
        p = self.sample_period
        return (f"{self.channels} channels x {DETECTORS_PER_CHANNEL} detectors share the budget: each may raise "
                f"{self.rate_per_detector * 86400:.3g} false alarms a day, an in-control ARL of {self.arl0:.3g} "
                f"samples ({self.arl0 * p / 86400:.3g} days at {p:g} s). Offset h = {self.offset_h:.3g} "
                f"(2-sigma step found after {self.offset_delay:.1f} samples, {self.offset_delay * p:.0f} s); "
                f"variance h = {self.variance_h:.3g} (doubled variance after {self.variance_delay:.0f} samples, "
                f"{self.variance_delay * p:.0f} s); drift alpha = {self.drift_alpha:.3g} per check "
                f"(d^2 limit {self.drift_limit:.1f}).")


def derive_thresholds(false_alarms: float, per_seconds: float, sample_period: float, channels: int, *,
                      offset_k: float = 1.0, drift_every: int = 25, n_params: int = 2) -> BudgetThresholds:
    """Thresholds for every channel from a plant-wide budget (module docstring).

    Raises
    ------
    ValueError
        A non-positive argument, or a budget no threshold in range can meet.
    """
    for name, value in (("false_alarms", false_alarms), ("per_seconds", per_seconds),
                        ("sample_period", sample_period)):
        if not (math.isfinite(value) and value > 0.0):
            raise ValueError(f"{name} must be finite and > 0, got {value}")
    if channels < 1:
        raise ValueError(f"channels must be >= 1, got {channels}")
    rate = false_alarms / (per_seconds * DETECTORS_PER_CHANNEL * channels)
    arl0 = 1.0 / (rate * sample_period)
    if arl0 <= 2.0:
        raise ValueError(f"a budget of {false_alarms:g} per {per_seconds:g} s over {channels} channels leaves an "
                         f"in-control ARL of {arl0:.3g} samples: loose enough that every sample may alarm")
    offset_h = threshold_for_arl(arl0, lambda h: offset_arl(h, offset_k, states=200))
    a, b = VARIANCE_FIT
    variance_h = max(2.0 * (9.0 - variance_reference(2.0)) + 1.0, (math.log(arl0) - a) / b)
    alpha = min(0.1, rate * sample_period * drift_every)
    return BudgetThresholds(
        channels=channels, sample_period=sample_period, rate_per_detector=rate, arl0=arl0, offset_h=offset_h,
        variance_h=variance_h, drift_alpha=alpha,
        offset_delay=offset_arl(offset_h, offset_k, 2.0, states=200),
        variance_delay=variance_arl(variance_h, variance_reference(2.0), 2.0, states=200),
        drift_limit=chi2_quantile(1.0 - alpha, n_params))
