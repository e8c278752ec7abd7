"""Tests of modemap.fit.sparse: sequentially thresholded least squares from statistics."""

from __future__ import annotations

import numpy as np
import pytest
from scipy.integrate import solve_ivp
from scipy.signal import savgol_filter
from sklearn.linear_model import Lasso
from sklearn.utils.estimator_checks import parametrize_with_checks

from modemap.fit.sparse import SparseRegression, fit_sparse, fit_sparse_cv, threshold_least_squares
from modemap.fit.statistics import GramStats, accumulate
from modemap.terms.library import TermLibrary

# Lorenz system, "Deterministic nonperiodic flow", Journal of the Atmospheric
# Sciences 20(2), 1963: sigma = 10, rho = 28, beta = 8/3.
SIGMA, RHO, BETA = 10.0, 28.0, 8.0 / 3.0


def _lorenz(t: float, s: np.ndarray) -> list[float]:
    x, y, z = s
    return [SIGMA * (y - x), x * (RHO - z) - y, x * y - BETA * z]


def _lorenz_truth(terms: list[str]) -> np.ndarray:
    """Exact coefficients of the Lorenz right-hand side on the degree-2 library."""
    truth = np.zeros((len(terms), 3))
    idx = {t: i for i, t in enumerate(terms)}
    truth[idx["x"], 0], truth[idx["y"], 0] = -SIGMA, SIGMA
    truth[idx["x"], 1], truth[idx["y"], 1], truth[idx["x*z"], 1] = RHO, -1.0, -1.0
    truth[idx["z"], 2], truth[idx["x*y"], 2] = -BETA, 1.0
    return truth


@pytest.fixture(scope="module")
def lorenz() -> tuple[float, np.ndarray]:
    dt = 0.002
    t = np.arange(0.0, 16.0, dt)
    sol = solve_ivp(_lorenz, (0, t[-1]), [-8.0, 7.0, 27.0], t_eval=t, rtol=1e-10, atol=1e-10)
    return dt, sol.y.T


@pytest.mark.parametrize("noise, window, tol", [(0.0, 7, 0.005), (0.01, 15, 0.03)])
def test_lorenz_support_and_coefficients(lorenz, noise, window, tol) -> None:
    dt, X = lorenz
    X = X + noise * X.std(axis=0) * np.random.default_rng(0).normal(size=X.shape)
    # Savitzky-Golay derivative (common practice for noisy samples)
    D = savgol_filter(X, window, 3, deriv=1, delta=dt, axis=0)
    lib = TermLibrary(degree=2).fit(["x", "y", "z"])
    fit = fit_sparse(accumulate(lib, X, D, chunk_size=3000), lib.terms_)
    truth = _lorenz_truth(lib.terms_)
    # the seven-term support of the Lorenz equations (Journal of the Atmospheric Sciences, 1963)
    np.testing.assert_array_equal(fit.support, truth != 0)
    rel = np.abs(fit.coef[truth != 0] / truth[truth != 0] - 1)
    assert rel.max() < tol
    assert fit.n_params == 7 and fit.n_samples == X.shape[0]
    assert fit.path is not None and sum(row["chosen"] for row in fit.path) == 3


def test_tiny_threshold_equals_lstsq() -> None:
    rng = np.random.default_rng(1)
    theta = rng.normal(size=(400, 8)) * np.geomspace(0.01, 100, 8)
    y = theta @ rng.normal(size=(8, 2)) + rng.normal(size=(400, 2))
    s = GramStats.from_arrays(theta, y)
    coef, support = threshold_least_squares(s.gram, s.cross, 1e-12, scale=s.column_scale())
    # reference: numpy.linalg.lstsq on the full term matrix
    ref = np.linalg.lstsq(theta, y, rcond=None)[0]
    np.testing.assert_allclose(coef, ref, rtol=1e-9, atol=1e-12)
    assert support.all()
    fit = fit_sparse(s, [f"t{i}" for i in range(8)], threshold=0.0)
    np.testing.assert_allclose(fit.coef, ref, rtol=1e-9, atol=1e-12)


def _sparse_problem(seed: int = 2) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    rng = np.random.default_rng(seed)
    theta = rng.normal(size=(500, 15))
    true = np.zeros(15)
    true[[2, 7, 11]] = [1.5, -2.0, 0.8]
    return theta, theta @ true + 0.05 * rng.normal(size=500), true


def test_support_agrees_with_sklearn_lasso() -> None:
    theta, y, true = _sparse_problem()
    s = GramStats.from_arrays(theta, y)
    alpha = 0.1
    # hard threshold at the Lasso penalty on unit-RMS columns: for a near-orthogonal design both
    # select the same terms (soft vs hard thresholding of the same statistic; common practice)
    _, support = threshold_least_squares(s.gram, s.cross, alpha, scale=s.column_scale())
    scale = s.column_scale()
    ref = Lasso(alpha=alpha, fit_intercept=False).fit(theta / scale, y)  # reference library
    np.testing.assert_array_equal(support[:, 0], ref.coef_ != 0)
    np.testing.assert_array_equal(support[:, 0], true != 0)


def test_auto_threshold_recovers_sparse_support() -> None:
    theta, y, true = _sparse_problem(3)
    names = [f"t{i}" for i in range(15)]
    fit = fit_sparse(GramStats.from_arrays(theta, y), names, criterion="bic")
    np.testing.assert_array_equal(fit.support[:, 0], true != 0)
    # AIC penalises less than BIC (2 < ln n): its support contains BIC's (common practice)
    aic = fit_sparse(GramStats.from_arrays(theta, y), names, criterion="aic")
    assert np.all(aic.support[:, 0] >= fit.support[:, 0])


def test_cv_over_blocks() -> None:
    theta, y, true = _sparse_problem(4)
    blocks = [GramStats.from_arrays(theta[i : i + 100], y[i : i + 100]) for i in range(0, 500, 100)]
    fit = fit_sparse_cv(blocks, [f"t{i}" for i in range(15)])
    np.testing.assert_array_equal(fit.support[:, 0], true != 0)


def test_stderr_and_noise_cov_match_ols_formula() -> None:
    theta, y, true = _sparse_problem(5)
    support = (true != 0)[:, None]
    fit = fit_sparse(GramStats.from_arrays(theta, y), [f"t{i}" for i in range(15)])
    # textbook OLS: sigma^2 (X'X)^-1 with sigma^2 = RSS / (n - k)
    X = theta[:, support[:, 0]]
    beta, rss = np.linalg.lstsq(X, y, rcond=None)[:2]
    cov = rss[0] / (500 - 3) * np.linalg.inv(X.T @ X)
    np.testing.assert_allclose(fit.coef[support[:, 0], 0], beta, rtol=1e-10)
    np.testing.assert_allclose(fit.stderr[support[:, 0], 0], np.sqrt(np.diag(cov)), rtol=1e-8)
    assert np.all(fit.stderr[~support[:, 0], 0] == 0)
    np.testing.assert_allclose(fit.noise_cov[0, 0], rss[0] / (500 - 3), rtol=1e-8)


@pytest.mark.parametrize("solver, criterion", [("lsq", "bic"), ("lsq", "cv"), ("lasso", "bic")])
def test_estimator(solver, criterion) -> None:
    theta, y, true = _sparse_problem(6)
    est = SparseRegression(solver=solver, criterion=criterion).fit(theta, y)
    if solver == "lsq":
        np.testing.assert_array_equal(est.support_[:, 0], true != 0)
    else:  # cross-validated Lasso keeps every true term, maybe a few more (common practice)
        assert np.all(est.support_[true != 0, 0])
    assert est.coef_.shape == (15, 1) and est.predict(theta).shape == (500,)
    # R^2 of the refit model on its own data (scikit-learn RegressorMixin.score)
    assert est.score(theta, y) > 0.99


def test_estimator_params_are_stored_untouched() -> None:
    est = SparseRegression(threshold=0.2, ridge=-1.0)
    assert est.get_params()["threshold"] == 0.2 and est.get_params()["ridge"] == -1.0
    with pytest.raises(ValueError, match="solver"):
        SparseRegression(solver="nope").fit(np.eye(3), np.ones(3))


# reference: scikit-learn's own estimator API checks
@parametrize_with_checks([SparseRegression()])
def test_sklearn_api(estimator, check) -> None:
    check(estimator)
