"""The OLS-versus-WLS comparison of the commissioning report, against statsmodels on the same data.

statsmodels' OLS (conventional and ``cov_type="HC0"``, White 1980) and WLS are the reference
implementations; the data are heteroscedastic with known inverse-variance weights.
"""

from __future__ import annotations

from collections.abc import Callable

import numpy as np
import pytest
import statsmodels.api as sm

from service.offline.ols_vs_wls import compare


def test_both_fits_and_their_standard_errors_match_statsmodels(make_regression: Callable[..., object]) -> None:
    data = make_regression(seed=11, n_samples=400, n_params=3)
    Z, y, w = data.Z, data.y, data.weight                 # type: ignore[attr-defined]
    result = compare(Z, y, w)
    assert result is not None
    ols = sm.OLS(y, Z).fit()
    ols_hc0 = sm.OLS(y, Z).fit(cov_type="HC0")
    wls = sm.WLS(y, Z, weights=w).fit()
    np.testing.assert_allclose(result.ols, ols.params, rtol=1e-10)          # statsmodels OLS
    np.testing.assert_allclose(result.ols_se, ols.bse, rtol=1e-9)           # statsmodels OLS bse
    np.testing.assert_allclose(result.ols_se_robust, ols_hc0.bse, rtol=1e-9)   # statsmodels HC0 (White 1980)
    np.testing.assert_allclose(result.wls, wls.params, rtol=1e-10)          # statsmodels WLS
    np.testing.assert_allclose(result.wls_se, wls.bse, rtol=1e-9)           # statsmodels WLS bse
    wls_hc0 = sm.WLS(y, Z, weights=w).fit(cov_type="HC0")
    np.testing.assert_allclose(result.wls_se_robust, wls_hc0.bse, rtol=1e-9)  # statsmodels WLS HC0
    np.testing.assert_allclose(result.gain, (ols_hc0.bse / wls_hc0.bse) ** 2, rtol=1e-8)
    assert result.weights_vary and np.all(result.gain > 1.0)     # weights 0.2..5: WLS is more precise


def test_equal_weights_make_wls_ols_and_the_gain_one(make_regression: Callable[..., object]) -> None:
    data = make_regression(seed=12, n_samples=200, n_params=2, unit_weights=True)
    result = compare(data.Z, data.y, data.weight)           # type: ignore[attr-defined]
    assert result is not None and not result.weights_vary
    np.testing.assert_allclose(result.wls, result.ols, rtol=1e-12)
    np.testing.assert_allclose(result.wls_se, result.ols_se, rtol=1e-12)
    assert result.gain.tolist() == [1.0, 1.0]               # exactly: one estimator compared with itself


def test_too_few_samples_or_a_singular_design_give_no_comparison() -> None:
    assert compare(np.ones((2, 2)), np.ones(2), np.ones(2)) is None
    Z = np.column_stack([np.ones(10), np.ones(10)])          # collinear columns
    assert compare(Z, np.arange(10.0), np.ones(10)) is None


@pytest.mark.parametrize("bad", [np.nan, np.inf])
def test_non_finite_input_is_refused(bad: float) -> None:
    Z = np.column_stack([np.ones(10), np.arange(10.0)])
    y = np.arange(10.0)
    y[3] = bad
    with pytest.raises(ValueError):
        compare(Z, y, np.ones(10))
