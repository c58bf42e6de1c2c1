"""CUSUM average run lengths and chi-square quantiles against published tables, cross-checked by simulation.

The chi-square quantile is scipy's (``estimator.detection.quantiles``); the tables here check that we call it right.
"""

from __future__ import annotations

import math
from statistics import NormalDist

import numpy as np
import pytest

from estimator.detection.quantiles import chi2_quantile
from estimator.detection.run_length import offset_arl, threshold_for_arl, variance_arl, variance_reference

SHIFTS = (0.0, 0.25, 0.5, 0.75, 1.0, 1.5, 2.0, 2.5, 3.0, 4.0)
# Two-sided tabular CUSUM, k = 0.5, h = 4: Lucas & Crosier (1982), Table 1.
LUCAS_CROSIER_H4 = (168, 74.2, 26.6, 13.3, 8.38, 4.75, 3.34, 2.62, 2.19, 1.71)
# The same for h = 5: the CUSUM ARL table for k = 1/2 in Montgomery & Runger's applied statistics textbook
# (from memory: edition and table number not checked).
MONTGOMERY_RUNGER_H5 = (465, 139, 38.0, 17.0, 10.4, 5.75, 4.01, 3.11, 2.57, 2.01)


def _printed(value: float, published: float) -> bool:
    """Equal to the table's printed digits (three significant figures): within half a unit of the last."""
    digits = 3 - 1 - math.floor(math.log10(abs(published)))
    return abs(value - published) <= 0.5 * 10.0 ** (-digits) + 1e-9


@pytest.mark.parametrize(("h", "table"), [(4.0, LUCAS_CROSIER_H4), (5.0, MONTGOMERY_RUNGER_H5)])
def test_markov_chain_reproduces_the_published_two_sided_arls(h: float, table: tuple[float, ...]) -> None:
    computed = [offset_arl(h, 0.5, shift) for shift in SHIFTS]
    assert all(_printed(c, p) for c, p in zip(computed, table, strict=True)), list(zip(computed, table, strict=True))


def _simulated_arl(h: float, k: float, shift: float, runs: int, rng: np.random.Generator) -> tuple[float, float]:
    """Mean and standard error of the two-sided CUSUM run length over ``runs`` independent runs."""
    up = np.zeros(runs)
    down = np.zeros(runs)
    length = np.zeros(runs, dtype=np.int64)
    going = np.ones(runs, dtype=bool)
    for step in range(1, 200_000):                      # bounded: every run here ends far sooner
        x = rng.normal(shift, 1.0, size=int(going.sum()))
        up[going] = np.maximum(0.0, up[going] + x - k)
        down[going] = np.maximum(0.0, down[going] - x - k)
        stopped = going.copy()
        stopped[going] = (up[going] > h) | (down[going] > h)
        length[stopped] = step
        going &= ~stopped
        if not going.any():
            break
    assert not going.any()
    return float(length.mean()), float(length.std(ddof=1) / math.sqrt(runs))


@pytest.mark.parametrize(("h", "shift", "published"), [(4.0, 0.0, 168), (4.0, 1.0, 8.38), (5.0, 0.0, 465),
                                                        (5.0, 1.0, 10.4)])
def test_simulation_agrees_with_the_markov_chain_and_the_tables(h: float, shift: float, published: float) -> None:
    # Tolerance: 4 standard errors of the simulated mean, from the runs' own spread (a run length is
    # roughly geometric, so its sd is about its mean; 4,000 runs put the error near 1.6 % of the ARL).
    mean, se = _simulated_arl(h, 0.5, shift, runs=4000, rng=np.random.default_rng(int(10 * h + shift)))
    assert abs(mean - offset_arl(h, 0.5, shift)) < 4.0 * se
    assert abs(mean - published) < 4.0 * se + 0.005 * published


def test_chi_square_quantiles_match_the_published_critical_values() -> None:
    # NIST/SEMATECH e-Handbook of Statistical Methods, 1.3.6.7.4, upper critical values of chi-square.
    assert round(chi2_quantile(0.95, 1), 3) == 3.841
    assert round(chi2_quantile(0.99, 2), 3) == 9.210
    assert round(chi2_quantile(0.999, 3), 3) == 16.266
    assert round(chi2_quantile(0.95, 10), 3) == 18.307
    assert round(chi2_quantile(0.999, 100), 3) == 149.449


def test_chi_square_quantile_has_its_closed_forms_at_one_and_two_degrees_of_freedom() -> None:
    # Independent of scipy, so a wrong argument (an upper for a lower tail, dof for dof / 2) shows.
    for p in (1e-9, 0.05, 0.5, 0.999, 1 - 1e-9):
        # chi2 with 2 dof is exponential with mean 2: x_p = -2 ln(1 - p) (common practice, exact).
        assert chi2_quantile(p, 2) == pytest.approx(-2.0 * math.log1p(-p), rel=1e-12)
    for p in (0.05, 0.5, 0.9, 0.999, 1 - 1e-9):
        # chi2 with 1 dof is Z^2: x_p = z_{(1 + p) / 2}^2 (common practice, exact). rel 1e-7: NormalDist's
        # inverse at (1 + p) / 2 carries the rounding of that sum, 1e-16 / phi(z), up to 1e-8 relative.
        assert chi2_quantile(p, 1) == pytest.approx(NormalDist().inv_cdf(0.5 + 0.5 * p) ** 2, rel=1e-7)


def test_chi_square_quantile_refuses_a_probability_outside_zero_one_and_a_dof_not_positive() -> None:
    for p in (0.0, 1.0, -0.1, 1.5, math.nan):
        with pytest.raises(ValueError, match=r"probability must be in \(0, 1\)"):
            chi2_quantile(p, 2)
    for dof in (0.0, -1.0, math.nan):
        with pytest.raises(ValueError, match="dof must be > 0"):
            chi2_quantile(0.95, dof)


def test_variance_cusum_arl_matches_simulation() -> None:
    # The variance detector's chart: a one-sided CUSUM of eps^2 with k from the design ratio 2.
    k = variance_reference(2.0)
    rng = np.random.default_rng(3)
    for ratio, h in ((1.0, 6.0), (2.0, 6.0)):
        runs = 4000
        s = np.zeros(runs)
        length = np.zeros(runs, dtype=np.int64)
        going = np.ones(runs, dtype=bool)
        for step in range(1, 100_000):
            x = ratio * rng.standard_normal(int(going.sum())) ** 2
            s[going] = np.maximum(0.0, s[going] + x - k)
            stopped = going.copy()
            stopped[going] = s[going] > h
            length[stopped] = step
            going &= ~stopped
            if not going.any():
                break
        se = length.std(ddof=1) / math.sqrt(runs)
        assert abs(length.mean() - variance_arl(h, k, ratio)) < 4.0 * se


def test_threshold_for_a_target_arl_is_the_smallest_that_reaches_it() -> None:
    h = threshold_for_arl(465.0, lambda x: offset_arl(x, 0.5))
    assert h == pytest.approx(5.0, rel=2e-3)
    assert offset_arl(h, 0.5) >= 465.0 > offset_arl(h * 0.995, 0.5)
    with pytest.raises(ValueError, match="no h"):
        threshold_for_arl(1e30, lambda x: offset_arl(x, 0.5), high=6.0)
