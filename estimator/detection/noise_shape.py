"""A channel's own noise shape: normal scores of its innovations through their calibration distribution.

The offset and variance CUSUMs are designed for N(0, 1) increments: their
thresholds, the Markov-chain run lengths of :mod:`estimator.detection.run_length` and
the fleet budget all assume it. A sensor's noise is rarely Gaussian (heavy
tails, a peaked centre, values published in coarse steps), and the tails
decide a CUSUM's false-alarm rate. So each channel learns the distribution
of its normalised innovations ``eps`` over a calibration period and the
detectors see the normal score

    z = Phi^-1(G(eps))

with ``G`` the calibration distribution: whatever the noise's shape, ``z`` is
close to N(0, 1) while the channel behaves as it did in calibration, and
every Gaussian result keeps holding for ``z``. This is the normal-scores
(inverse normal probability-integral) transform of nonparametric control
charts, here against a reference sample taken in control (all three from
memory): Qiu & Hawkins (2001, "A rank-based multivariate CUSUM procedure",
Technometrics 43(2), 120-132) and Qiu (2014, Introduction to Statistical
Process Control, the chapter on univariate nonparametric charts) chart the
ranks of new observations among an in-control reference sample, turned into
normal scores; Hawkins & Olwell (1998, Cumulative Sum Charts and Charting
for Quality Improvement) transform non-normal data to normality before a
normal-theory CUSUM. The ranks among the reference sample are kept as a
fixed table here, not the sample itself.

Table. ``G`` is held on a fixed grid of ``KNOTS`` = 65 points ``c_j`` from
-8 to 8 in steps of 0.25 (sigma units of the baseline). During calibration
each ``eps`` (clipped to the grid) is split between its two neighbouring
knots in proportion to its distance from them ("linear binning"; Wand 1994,
Fast computation of multivariate kernel estimators, J. Comp. Graph. Stat.
3(4), 433-445, from memory). When the
calibration ends, knot ``j`` gets the mid-rank probability of its mass,
``p_j = (N_{<j} + n_j / 2) / N``, clipped to ``[1 / (2N), 1 - 1 / (2N)]``,
and the table stores the score ``s_j = Phi^-1(p_j)``. A new ``eps`` maps to
the score interpolated linearly between its two knots. Consequences:

* Ties (quantised noise): an atom at ``x`` between two knots is split
  between them by the same weights it is read back with, so it maps to the
  middle of its jump in ``G`` (the mid-rank convention for ties). Mid-ranks
  shrink the scores' variance below 1 (to 0.85 for N(0, 1) published in
  steps of 1.5 sigma), which would lengthen the variance CUSUM's run lengths
  and delays five-fold; so the table is then standardised to mean 0 and
  variance 1 over the calibration's own distribution, the usual correction
  of a rank statistic's variance for ties (Lehmann 1975, Nonparametrics:
  Statistical Methods Based on Ranks, from memory).
* Tails beyond the calibration's range map to at most ``Phi^-1(1 - 1/(2N))``
  (3.29 for N = 1000; the detectors already clip at 3 to 4 sigma): one
  extreme value cannot carry a CUSUM further than a 3.3-sigma value would.
* Gaussian noise is the special case where the table is the identity up to
  its sampling error (standard error of a score about
  ``sqrt(p (1 - p) / N) / phi(z)``: 0.05 at z = 1, 0.26 at z = 3 for N = 1000).

The grid is in sigma units of the baseline: a baseline whose sigma is wrong by
more than a few times (an engineer's guess) piles the calibration into the
end knots and leaves the detectors blind; commissioning learns sigma from the
channel itself, which keeps ``eps`` near unit spread.

Everything here is elementwise or row-wise, with no randomness, so the
vectorised and one-at-a-time paths give the same bits.
"""

from __future__ import annotations

import numpy as np
from numpy.typing import NDArray

__all__ = ["KNOTS", "SPAN", "STEP", "accumulate", "finish", "scores"]

FloatArray = NDArray[np.float64]
IndexArray = NDArray[np.intp]

SPAN = 8.0                   # the grid covers [-SPAN, SPAN] sigma
STEP = 0.25                  # sigma between knots: at most 10 % of the mass of N(0, 1) between two
KNOTS = round(2.0 * SPAN / STEP) + 1


def _place(x: FloatArray) -> tuple[IndexArray, FloatArray]:
    """Left knot index (B,) and the fraction (B,) of the way to the next knot, for values clipped to the grid."""
    u = (np.clip(x, -SPAN, SPAN) + SPAN) / STEP
    j = np.minimum(np.floor(u), KNOTS - 2)
    return j.astype(np.intp), u - j


def accumulate(table: FloatArray, rows: IndexArray, x: FloatArray) -> None:
    """Add one calibration value per row: ``table[rows]`` (B, KNOTS) gains ``x`` (B,) by linear binning.

    ``rows`` must be distinct (one value per channel per call).
    """
    j, f = _place(x)
    table[rows, j] += 1.0 - f
    table[rows, j + 1] += f


def finish(masses: FloatArray, count: int) -> FloatArray:
    """The score table (KNOTS,) of one channel from its binned masses (KNOTS,) of ``count`` values."""
    if count < 1:
        raise ValueError(f"count must be >= 1, got {count}")
    # Imported here, when a calibration completes: scipy.special loads the socket module, which importing
    # the estimator package must not (tests/unit/test_estimator_purity.py).
    from scipy.special import ndtri
    below = np.cumsum(masses) - masses
    p = (below + 0.5 * masses) / count
    floor = 0.5 / count
    score = np.asarray(ndtri(np.clip(p, floor, 1.0 - floor)), dtype=np.float64)
    # Mid-ranks of ties, and the clipped tails, leave the scores with less than unit variance: standardise
    # them over the calibration's own distribution (the tie correction of rank statistics).
    mean = float(np.dot(masses, score)) / count
    variance = float(np.dot(masses, (score - mean) ** 2)) / count
    return (score - mean) / np.sqrt(variance) if variance > 0.0 else score


def scores(table: FloatArray, rows: IndexArray, x: FloatArray) -> FloatArray:
    """Normal scores (B,) of ``x`` (B,) through the score tables ``table[rows]`` (NaN where x is NaN)."""
    finite = np.isfinite(x)
    j, f = _place(np.where(finite, x, 0.0))
    left = table[rows, j]
    z = left + f * (table[rows, j + 1] - left)
    return np.where(finite, z, np.nan)
