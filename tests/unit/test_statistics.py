"""Estimates, covariances, standard errors and excitation from a factor (estimator/recursive/statistics.py)."""

from __future__ import annotations

import itertools
import math

import numpy as np
import pytest
import statsmodels.api as sm

from estimator import RecursiveWLSBank, bank_statistics, student_t_quantile


def _qr_factor(Z: np.ndarray, y: np.ndarray, w: np.ndarray) -> np.ndarray:
    """Augmented factor [[R, q], [0, rho]] of sqrt(w)-scaled [Z | y] by numpy's QR, diagonal made >= 0.

    Independent of the recursive bank: it checks bank_statistics as a function of any such factor.
    """
    root = np.sqrt(w)
    F = np.linalg.qr(np.column_stack([Z * root[:, None], y * root]), mode="r")
    return F * np.where(np.diag(F) < 0.0, -1.0, 1.0)[:, None]


def _data(seed: int, count: int = 80, n: int = 3) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    rng = np.random.default_rng(seed)
    Z = rng.normal(size=(count, n))
    Z[:, 0] = 1.0
    w = rng.uniform(0.2, 5.0, size=count)
    y = Z @ rng.uniform(-2.0, 2.0, size=n) + 0.5 * rng.normal(size=count) / np.sqrt(w)
    return Z, y, w


def test_unit_weight_bank_gives_classical_ols_standard_errors() -> None:
    Z, y, _ = _data(seed=1)
    count, n = Z.shape
    bank = RecursiveWLSBank(1, n, forgetting_factor=1.0)
    for k in range(count):
        bank.update_one(0, Z[k], y[k])
    st = bank_statistics(bank.factor(), bank.effective_count)
    # Independent textbook computation: s^2 = RSS / (N - n), SE = s sqrt(diag((Z^T Z)^-1)).
    theta, rss, _, _ = np.linalg.lstsq(Z, y, rcond=None)
    s2 = rss[0] / (count - n)
    expected_se = np.sqrt(s2 * np.diag(np.linalg.inv(Z.T @ Z)))
    # rtol 1e-9: exact algebra on cond(Z) ~ 1.3, through different factorisations.
    np.testing.assert_allclose(st.parameters[0], theta, rtol=1e-9)
    np.testing.assert_allclose(st.std_errors[0], expected_se, rtol=1e-9)
    np.testing.assert_allclose(st.residual_sd[0], math.sqrt(s2), rtol=1e-9)
    assert st.dof[0] == count - n
    assert st.effective_count[0] == count


def test_relative_weights_give_the_weighted_least_squares_standard_errors_of_statsmodels() -> None:
    Z, y, w = _data(seed=2)
    st = bank_statistics(_qr_factor(Z, y, w)[None], [Z.shape[0]])
    reference = sm.WLS(y, Z, weights=w).fit()
    # rtol 1e-9: the same estimator, exact algebra, cond(Z) ~ 1.4.
    np.testing.assert_allclose(st.parameters[0], reference.params, rtol=1e-9)
    np.testing.assert_allclose(st.std_errors[0], reference.bse, rtol=1e-9)
    np.testing.assert_allclose(st.covariance[0], reference.cov_params(), rtol=1e-9,
                               atol=1e-12 * np.abs(reference.cov_params()).max())
    np.testing.assert_allclose(st.residual_sd[0] ** 2, reference.scale, rtol=1e-9)


def test_known_scale_gives_the_unscaled_covariance() -> None:
    Z, y, w = _data(seed=3)
    factor = _qr_factor(Z, y, w)[None]
    st = bank_statistics(factor, [Z.shape[0]], scale="known")
    expected = np.linalg.inv(Z.T @ (w[:, None] * Z))
    # rtol 1e-9 (atol for small off-diagonal entries): (Z^T W Z)^-1, cond ~ 2.
    np.testing.assert_allclose(st.covariance[0], expected, rtol=1e-9, atol=1e-12 * np.abs(expected).max())
    np.testing.assert_array_equal(st.covariance, st.unscaled_covariance)
    np.testing.assert_allclose(st.std_errors[0], np.sqrt(np.diag(expected)), rtol=1e-9)
    estimated = bank_statistics(factor, [Z.shape[0]])
    # The estimated scale is P times s^2 = rho^2 / (N - n); rtol 1e-14 for one product.
    np.testing.assert_allclose(estimated.covariance, st.covariance * estimated.residual_sd[:, None, None] ** 2,
                               rtol=1e-14)


def test_min_information_and_condition_are_eigenvalues_of_the_weighted_information() -> None:
    Z, y, w = _data(seed=4, n=4)
    Z[:, 3] *= 30.0      # spread the eigenvalues: cond(H) ~ 1e3
    st = bank_statistics(_qr_factor(Z, y, w)[None], [Z.shape[0]])
    eig = np.linalg.eigvalsh(Z.T @ (w[:, None] * Z))
    # rtol 1e-8: sigma_min(R)^2 versus eigvalsh of the formed Z^T W Z, which
    # carries rounding of order cond(H) * eps ~ 1e-13 relative to the largest.
    np.testing.assert_allclose(st.min_information[0], eig[0], rtol=1e-8)
    np.testing.assert_allclose(st.information_condition[0], eig[-1] / eig[0], rtol=1e-8)


def test_residual_ss_is_rho_squared() -> None:
    Z, y, w = _data(seed=5)
    factor = _qr_factor(Z, y, w)
    st = bank_statistics(factor[None], [Z.shape[0]])
    theta = np.linalg.lstsq(Z * np.sqrt(w)[:, None], y * np.sqrt(w), rcond=None)[0]
    r = y - Z @ theta
    assert st.residual_ss[0] == factor[-1, -1] ** 2
    # rtol 1e-10: rho^2 from the factor versus the residuals themselves.
    np.testing.assert_allclose(st.residual_ss[0], np.sum(w * r * r), rtol=1e-10)


def test_unidentifiable_channel_reports_nan_next_to_a_good_one() -> None:
    Z, y, w = _data(seed=6)
    good = _qr_factor(Z, y, w)
    bad = good.copy()
    bad[1, 1:] = 0.0           # R_11 = 0: parameter 1 not identifiable
    st = bank_statistics(np.stack([good, bad]), [80.0, 80.0])
    np.testing.assert_array_equal(st.identifiable, [True, False])
    assert np.isfinite(st.parameters[0]).all()
    assert np.isnan(st.parameters[1]).all()
    assert np.isnan(st.covariance[1]).all()
    assert np.isnan(st.unscaled_covariance[1]).all()
    assert st.min_information[1] == 0.0
    assert st.information_condition[1] == np.inf
    alone = bank_statistics(good[None], [80.0])
    # Channels do not mix: the good channel's numbers are those it gets alone (rtol 1e-15).
    np.testing.assert_allclose(st.parameters[0], alone.parameters[0], rtol=1e-15)
    np.testing.assert_allclose(st.std_errors[0], alone.std_errors[0], rtol=1e-15)


def test_no_degrees_of_freedom_gives_nan_residual_sd() -> None:
    Z, y, w = _data(seed=7, count=3, n=3)
    bank = RecursiveWLSBank(1, 3)
    for k in range(3):
        bank.update_one(0, Z[k], y[k], w[k])
    st = bank_statistics(bank.factor(), bank.effective_count)
    assert st.dof[0] == 0.0
    assert np.isnan(st.residual_sd[0])
    assert np.isnan(st.std_errors[0]).all()
    # Three samples, three parameters: an exact fit (rtol 1e-10, cond(Z[:3]) ~ 10).
    np.testing.assert_allclose(st.parameters[0], np.linalg.solve(Z, y), rtol=1e-10)
    known = bank_statistics(bank.factor(), bank.effective_count, scale="known")
    assert np.isfinite(known.std_errors[0]).all()


def test_bad_scale_and_bad_factor_shape_raise() -> None:
    factor = np.eye(3)[None]
    with pytest.raises(ValueError, match="scale must be 'estimated' or 'known', got 'guess'"):
        bank_statistics(factor, [5.0], scale="guess")
    with pytest.raises(ValueError, match=r"factor must have shape \(K, n\+1, n\+1\), got \(3, 3\)"):
        bank_statistics(np.eye(3), [5.0])
    with pytest.raises(ValueError, match=r"got \(1, 3, 2\)"):
        bank_statistics(np.zeros((1, 3, 2)), [5.0])
    with pytest.raises(ValueError, match=r"got \(1, 1, 1\)"):
        bank_statistics(np.zeros((1, 1, 1)), [5.0])


# Upper critical values of Student's t (one-sided probability p), three decimals as printed.
# The quantile itself is scipy's (estimator.detection.quantiles); these check that we call it right.
T_TABLE = [
    (0.975, 5, 2.571),     # NIST/SEMATECH e-Handbook of Statistical Methods, 1.3.6.7.2
    (0.975, 10, 2.228),    # NIST/SEMATECH e-Handbook of Statistical Methods, 1.3.6.7.2
    (0.975, 20, 2.086),    # NIST/SEMATECH e-Handbook of Statistical Methods, 1.3.6.7.2
    (0.975, 30, 2.042),    # NIST/SEMATECH e-Handbook of Statistical Methods, 1.3.6.7.2
    (0.975, 100, 1.984),   # NIST/SEMATECH e-Handbook of Statistical Methods, 1.3.6.7.2
    (0.975, 120, 1.980),   # Abramowitz & Stegun 1964, Table 26.10 (from memory)
    (0.95, 10, 1.812),     # NIST/SEMATECH e-Handbook of Statistical Methods, 1.3.6.7.2
    (0.99, 15, 2.602),     # NIST/SEMATECH e-Handbook of Statistical Methods, 1.3.6.7.2
    (0.995, 20, 2.845),    # NIST/SEMATECH e-Handbook of Statistical Methods, 1.3.6.7.2
]


@pytest.mark.parametrize(("probability", "dof", "table"), T_TABLE)
def test_student_t_quantile_matches_t_table(probability: float, dof: int, table: float) -> None:
    # 5e-4 plus slack: the table's printed rounding.
    assert abs(student_t_quantile(probability, dof) - table) < 6e-4


@pytest.mark.parametrize("probability", [1e-6, 0.1, 0.6, 0.90, 0.975, 0.995, 0.9999])
def test_student_t_quantile_has_its_closed_forms_at_one_and_two_degrees_of_freedom(probability: float) -> None:
    # Independent of scipy, so swapped arguments or an upper for a lower tail show (common practice, exact):
    # with 1 dof t is Cauchy, t_p = tan(pi (p - 1/2)) = -cot(pi p); with 2 dof t_p = (2p - 1) / sqrt(2 p (1 - p)).
    # The cotangent is taken on the nearer tail, where pi p (or pi (1 - p)) keeps its digits.
    p = probability
    cauchy = -1.0 / math.tan(math.pi * p) if p < 0.5 else 1.0 / math.tan(math.pi * (1.0 - p))
    assert student_t_quantile(p, 1.0) == pytest.approx(cauchy, rel=1e-12)
    assert student_t_quantile(p, 2.0) == pytest.approx((2 * p - 1) / math.sqrt(2 * p * (1 - p)), rel=1e-12)


def test_student_t_quantile_takes_real_degrees_of_freedom() -> None:
    # With forgetting, dof = N_eff - n is real: it must not be rounded. The quantile falls strictly as dof grows.
    values = [student_t_quantile(0.975, dof) for dof in (1.0, 1.5, 2.0, 2.5, 3.0)]
    assert all(a > b for a, b in itertools.pairwise(values))


def test_student_t_quantile_is_odd_about_one_half() -> None:
    for dof in (3.0, 12.5, 40.0):
        # rtol 1e-12: the expansion is odd in z; inv_cdf(1 - p) = -inv_cdf(p) up to rounding.
        assert student_t_quantile(0.5, dof) == pytest.approx(0.0, abs=1e-15)
        assert student_t_quantile(0.1, dof) == pytest.approx(-student_t_quantile(0.9, dof), rel=1e-12)


def test_student_t_quantile_rejects_probability_outside_open_unit_interval() -> None:
    for p in (0.0, 1.0, -0.1, 1.5):
        with pytest.raises(ValueError, match=rf"probability must be in \(0, 1\), got {p}"):
            student_t_quantile(p, 10)


def test_student_t_quantile_is_nan_below_one_degree_of_freedom() -> None:
    assert math.isnan(student_t_quantile(0.975, 0.5))
    assert math.isnan(student_t_quantile(0.975, float("nan")))
    assert math.isfinite(student_t_quantile(0.975, 1.0))
