"""Batch weighted least squares (estimator/recursive/batch.py) against independent numpy solutions."""

from __future__ import annotations

import numpy as np
import pytest

from estimator import NotIdentifiable, fit_wls


def _design(seed: int, count: int = 120, n: int = 4) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    rng = np.random.default_rng(seed)
    Z = rng.normal(size=(count, n))
    Z[:, 0] = 1.0
    y = Z @ rng.uniform(-3.0, 3.0, size=n) + 0.3 * rng.normal(size=count)
    w = rng.uniform(0.1, 10.0, size=count)
    return Z, y, w


def _set(array: np.ndarray, index: tuple[int, ...], value: float) -> np.ndarray:
    changed = array.copy()
    changed[index] = value
    return changed


def test_ordinary_least_squares_equals_lstsq() -> None:
    Z, y, _ = _design(seed=1)
    fit = fit_wls(Z, y)
    expected, rss, _, _ = np.linalg.lstsq(Z, y, rcond=None)
    # rtol 1e-10: two backward-stable solvers on a design with cond(Z) = 1.3 (measured gap 2e-15).
    np.testing.assert_allclose(fit.parameters, expected, rtol=1e-10)
    np.testing.assert_allclose(fit.residual_ss, rss[0], rtol=1e-10)
    assert fit.effective_count == 120.0
    np.testing.assert_array_equal(fit.weights, np.ones(120))


def test_weighted_fit_equals_ordinary_fit_of_sqrt_weight_scaled_rows() -> None:
    Z, y, w = _design(seed=2)
    fit = fit_wls(Z, y, w)
    root = np.sqrt(w)
    expected, rss, _, _ = np.linalg.lstsq(Z * root[:, None], y * root, rcond=None)
    # rtol 1e-10: exact algebra, cond = 1.5 after weighting (measured gap 2e-15).
    np.testing.assert_allclose(fit.parameters, expected, rtol=1e-10)
    np.testing.assert_allclose(fit.residual_ss, rss[0], rtol=1e-10)
    np.testing.assert_allclose(fit_wls(Z * root[:, None], y * root).parameters, expected, rtol=1e-10)


def test_unscaled_covariance_is_inverse_weighted_information() -> None:
    Z, y, w = _design(seed=3)
    fit = fit_wls(Z, y, w)
    expected = np.linalg.inv(Z.T @ (w[:, None] * Z))
    # rtol 1e-10 (atol for near-zero off-diagonal entries): cond(Z^T W Z) = 1.7, measured gap 4e-16.
    np.testing.assert_allclose(fit.unscaled_covariance, expected, rtol=1e-10, atol=1e-13 * np.abs(expected).max())
    np.testing.assert_array_equal(fit.unscaled_covariance, fit.unscaled_covariance.T)


def test_residual_ss_is_the_weighted_sum_of_squared_residuals() -> None:
    Z, y, w = _design(seed=4)
    fit = fit_wls(Z, y, w, forgetting_factor=0.97)
    r = y - Z @ fit.parameters
    # rtol 1e-12: the same sum evaluated in a different order.
    np.testing.assert_allclose(fit.residual_ss, np.sum(fit.weights * r * r), rtol=1e-12)


@pytest.mark.parametrize("forgetting_factor", [0.999, 0.98, 0.9])
def test_forgetting_equals_explicit_geometric_weights(forgetting_factor: float) -> None:
    Z, y, w = _design(seed=5)
    count = y.shape[0]
    decay = forgetting_factor ** np.arange(count - 1, -1, -1, dtype=np.float64)   # lambda^(N-1-i)
    fit = fit_wls(Z, y, w, forgetting_factor=forgetting_factor)
    explicit = fit_wls(Z, y, w * decay)
    # rtol 1e-12: the same problem; only the order of forming w * lambda^(N-1-i) may differ.
    np.testing.assert_allclose(fit.parameters, explicit.parameters, rtol=1e-12)
    np.testing.assert_allclose(fit.weights, w * decay, rtol=1e-15)
    np.testing.assert_allclose(fit.residual_ss, explicit.residual_ss, rtol=1e-12)
    # sum lambda^(N-1-i) = (1 - lambda^N) / (1 - lambda); rtol 1e-12 for summation order.
    np.testing.assert_allclose(fit.effective_count, (1 - forgetting_factor**count) / (1 - forgetting_factor),
                               rtol=1e-12)


def test_badly_scaled_polynomial_columns_are_fitted_to_the_exact_answer() -> None:
    # y is exactly quadratic in x (x up to 1e4, x^2 up to 1e8): cond(Z) = 1.3e8,
    # 16 after column scaling. Z and y are exact binary numbers, so the fit must
    # return the coefficients. Measured error 7e-15; without the two refinement
    # steps the QR solution is off by 3.5e-10 (plain np.linalg.lstsq by 3.4e-9),
    # so rtol 1e-12 holds the refinement to its claim.
    x = np.arange(0.0, 10_001.0, 250.0)
    Z = np.column_stack([np.ones_like(x), x, x * x])
    y = 7.0 - 3.0 * x + 0.5 * x * x
    fit = fit_wls(Z, y)
    np.testing.assert_allclose(fit.parameters, [7.0, -3.0, 0.5], rtol=1e-12)


def test_columns_spanning_twenty_decades_are_not_mistaken_for_rank_deficiency() -> None:
    # A quartic in an input up to 1e5: column norms from 8 to 3e20. The rank test
    # compares R's diagonal after column scaling; on the raw columns the ratio
    # would be 2e-18, below N eps = 1.3e-14, and the fit would wrongly refuse.
    rng = np.random.default_rng(8)
    x = np.linspace(0.0, 1e5, 60)
    Z = np.column_stack([x**p for p in range(5)])
    s = x / 1e5
    y = 2.0 - s + 0.5 * s**2 + 0.25 * s**3 + 0.125 * s**4 + 1e-3 * rng.normal(size=60)
    norms = np.linalg.norm(Z, axis=0)
    expected = np.linalg.lstsq(Z / norms, y, rcond=None)[0] / norms     # independent column-normalised solve
    # rtol 1e-10: cond of the normalised design is 4e2; measured gap 8e-14.
    np.testing.assert_allclose(fit_wls(Z, y).parameters, expected, rtol=1e-10)


@pytest.mark.parametrize(
    ("make_Z", "match"),
    [
        (lambda Z: np.column_stack([Z, Z[:, 1]]), "rank deficient"),
        (lambda Z: np.column_stack([Z, 2.0 * Z[:, 1] - Z[:, 2]]), "rank deficient"),
        (lambda Z: np.column_stack([Z, np.zeros(Z.shape[0])]), r"column\(s\) \[4\] are all zero"),
        (lambda Z: Z[:3], "3 samples for 4 parameters"),
    ],
    ids=["duplicate_column", "linear_combination", "zero_column", "fewer_samples_than_parameters"],
)
def test_rank_deficient_design_raises_not_identifiable(make_Z, match: str) -> None:
    Z, _, _ = _design(seed=6)
    Zd = make_Z(Z)
    y = np.arange(Zd.shape[0], dtype=np.float64)
    with pytest.raises(NotIdentifiable, match=match):
        fit_wls(Zd, y)


def test_not_identifiable_is_a_value_error() -> None:
    assert issubclass(NotIdentifiable, ValueError)


@pytest.mark.parametrize(
    ("change", "match"),
    [
        (lambda Z, y, w: (Z[:, 0], y, w, 1.0), r"Z must be \(N, n\) and y \(N,\), got \(120,\) and \(120,\)"),
        (lambda Z, y, w: (Z, y[:-1], w, 1.0), r"Z must be \(N, n\) and y \(N,\), got \(120, 4\) and \(119,\)"),
        (lambda Z, y, w: (Z, y, w[:-1], 1.0), r"weight must have shape \(120,\), got \(119,\)"),
        (lambda Z, y, w: (Z, y, w, 0.0), r"forgetting_factor must be in \(0, 1\], got 0.0"),
        (lambda Z, y, w: (Z, y, w, 1.5), r"forgetting_factor must be in \(0, 1\], got 1.5"),
        (lambda Z, y, w: (Z, y, w, float("nan")), r"forgetting_factor must be in \(0, 1\], got nan"),
        (lambda Z, y, w: (_set(Z, (3, 2), np.inf), y, w, 1.0), "Z and y must be finite"),
        (lambda Z, y, w: (Z, _set(y, (7,), np.nan), w, 1.0), "Z and y must be finite"),
        (lambda Z, y, w: (Z, y, _set(w, (0,), 0.0), 1.0), "weight must be finite and > 0"),
        (lambda Z, y, w: (Z, y, -w, 1.0), "weight must be finite and > 0"),
        (lambda Z, y, w: (Z, y, _set(w, (5,), np.nan), 1.0), "weight must be finite and > 0"),
    ],
    ids=["Z_1d", "y_length", "weight_length", "lambda_zero", "lambda_above_one", "lambda_nan",
         "Z_inf", "y_nan", "weight_zero", "weight_negative", "weight_nan"],
)
def test_bad_arguments_raise_value_error_naming_them(change, match: str) -> None:
    Z, y, w = _design(seed=7)
    Zc, yc, wc, lam = change(Z, y, w)
    with pytest.raises(ValueError, match=match) as info:
        fit_wls(Zc, yc, wc, forgetting_factor=lam)
    assert not isinstance(info.value, NotIdentifiable)
