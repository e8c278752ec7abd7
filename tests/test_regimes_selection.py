"""Choice of K: likelihood and BIC checked against statsmodels OLS for one regime."""

from __future__ import annotations

import numpy as np
import pytest
import statsmodels.api as sm

from modemap.regimes.selection import (
    count_parameters,
    holdout_split,
    information_criterion,
)
from modemap.terms.library import TermLibrary
from refine_helpers import refine_rows


@pytest.fixture(scope="module")
def one_regime():
    rng = np.random.default_rng(0)
    z = rng.standard_normal((1500, 2))
    y = 0.5 + z @ np.array([1.5, -0.7]) + 0.3 * rng.standard_normal(1500)
    library = TermLibrary(degree=1).fit(["a", "b"])
    result = refine_rows(
        z,
        y[:, None],
        [1500],
        np.zeros(1500, int),
        library,
        n_regimes=1,
        model="affine",
        cov_floor=0.0,
    )
    return result, sm.OLS(y, sm.add_constant(z)).fit()


def test_single_regime_loglik_equals_ols(one_regime) -> None:
    result, ols = one_regime
    # reference: statsmodels OLS log-likelihood (Gaussian, maximum-likelihood variance)
    assert result.loglik == pytest.approx(ols.llf, rel=1e-9)


def test_bic_counts_the_variance_too(one_regime) -> None:
    result, ols = one_regime
    n_params = count_parameters(result, 1)
    assert n_params == 3 + 1  # three coefficients and the residual variance; K = 1: no chain
    # statsmodels' OLS BIC counts the coefficients only: ours adds ln(n) for the variance
    bic = information_criterion(result.loglik, n_params, 1500)
    assert bic == pytest.approx(ols.bic + np.log(1500), rel=1e-9)


def test_holdout_is_the_tail_of_every_run() -> None:
    mask = holdout_split(np.array([10, 5]))
    expected = [False] * 8 + [True] * 2 + [False] * 4 + [True]  # last 20 %, rounded down
    np.testing.assert_array_equal(mask, expected)
