"""Tests of modemap.fit.affine: the affine operator from normal-equation statistics."""

from __future__ import annotations

import numpy as np
import pytest
import statsmodels.api as sm
from scipy.integrate import solve_ivp
from scipy.signal import savgol_filter
from sklearn.utils.estimator_checks import parametrize_with_checks

from modemap.fit.affine import AffineRegression, affine_parts, fit_affine
from modemap.fit.statistics import GramStats

ZETA, OMEGA, GAIN = 0.1, 2.0, 1.5


def _u(t: np.ndarray | float) -> np.ndarray | float:
    return np.sin(0.7 * t)


def _oscillator(t: float, s: np.ndarray) -> list[float]:
    x, v = s
    return [v, -(OMEGA**2) * x - 2 * ZETA * OMEGA * v + GAIN * _u(t)]


@pytest.fixture(scope="module")
def oscillator() -> tuple[np.ndarray, np.ndarray, list[str]]:
    dt = 0.01
    t = np.arange(0.0, 30.0, dt)
    sol = solve_ivp(_oscillator, (0, t[-1]), [1.0, 0.0], t_eval=t, rtol=1e-10, atol=1e-12)
    X = sol.y.T
    D = savgol_filter(X, 7, 4, deriv=1, delta=dt, axis=0)  # common practice
    theta = np.column_stack([np.ones_like(t), X, _u(t)])
    return theta, D, ["1", "x", "v", "u"]


def test_damped_oscillator_eigenvalues(oscillator) -> None:
    theta, D, terms = oscillator
    fit = fit_affine(GramStats.from_arrays(theta, D), terms)
    A, B, c = affine_parts(fit, 2, 1)
    eig = np.sort_complex(np.linalg.eigvals(A))
    # textbook (second-order system x'' + 2 zeta omega x' + omega^2 x = gain u):
    # lambda = -zeta*omega +- i*omega*sqrt(1 - zeta^2)
    wd = OMEGA * np.sqrt(1 - ZETA**2)
    expected = np.sort_complex(np.array([-ZETA * OMEGA - 1j * wd, -ZETA * OMEGA + 1j * wd]))
    np.testing.assert_allclose(eig, expected, atol=1e-3)
    np.testing.assert_allclose(B[:, 0], [0.0, GAIN], atol=1e-3)
    np.testing.assert_allclose(c, 0.0, atol=1e-3)


def test_standard_errors_match_statsmodels(oscillator) -> None:
    theta, D, terms = oscillator
    noisy = D + 0.05 * np.random.default_rng(0).normal(size=D.shape)
    fit = fit_affine(GramStats.from_arrays(theta, noisy), terms)
    for j in range(2):
        ref = sm.OLS(noisy[:, j], theta).fit()  # reference library: statsmodels OLS
        np.testing.assert_allclose(fit.coef[:, j], ref.params, rtol=1e-8, atol=1e-12)
        np.testing.assert_allclose(fit.stderr[:, j], ref.bse, rtol=1e-6)
        np.testing.assert_allclose(fit.rss[j], ref.ssr, rtol=1e-8)
        # residual variance with n - p degrees of freedom (statsmodels mse_resid)
        np.testing.assert_allclose(fit.noise_cov[j, j], ref.mse_resid, rtol=1e-8)


def test_rejects_nonlinear_terms(oscillator) -> None:
    theta, D, _ = oscillator
    with pytest.raises(ValueError, match="degree-1"):
        fit_affine(GramStats.from_arrays(theta, D), ["1", "x", "x^2", "u"])


def test_estimator_matches_function(oscillator) -> None:
    theta, D, terms = oscillator
    est = AffineRegression().fit(theta[:, 1:], D)
    A, B, c = affine_parts(fit_affine(GramStats.from_arrays(theta, D), terms), 2, 1)
    np.testing.assert_allclose(est.A_, A)
    np.testing.assert_allclose(est.B_, B)
    np.testing.assert_allclose(est.c_, c)
    np.testing.assert_allclose(est.predict(theta[:, 1:]), theta @ est.coef_, rtol=1e-12)
    # R^2 from scikit-learn's RegressorMixin.score: the model explains the derivatives
    assert est.score(theta[:, 1:], D) > 0.999


# reference: scikit-learn's own estimator API checks
@parametrize_with_checks([AffineRegression()])
def test_sklearn_api(estimator, check) -> None:
    check(estimator)
