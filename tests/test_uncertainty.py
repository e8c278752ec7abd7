"""Tests of modemap.fit.uncertainty: standard errors and the block bootstrap."""

from __future__ import annotations

import numpy as np
import pytest
import statsmodels.api as sm
from scipy.signal import lfilter

from modemap.fit.sparse import fit_sparse
from modemap.fit.statistics import GramStats, accumulate
from modemap.fit.uncertainty import _coverage, _subblocks, block_bootstrap, standard_errors
from modemap.terms.library import TermLibrary


def _problem(n: int = 3000, seed: int = 0) -> tuple[TermLibrary, np.ndarray, np.ndarray]:
    """y = 1.5 x - 0.8 x*u + 0.3 with AR(1) noise (invented test problem)."""
    rng = np.random.default_rng(seed)
    Z = np.column_stack([rng.normal(size=n), rng.uniform(-1, 1, size=n)])
    noise = lfilter([1.0], [1.0, -0.5], 0.3 * rng.normal(size=n))
    y = 1.5 * Z[:, 0] - 0.8 * Z[:, 0] * Z[:, 1] + 0.3 + noise
    return TermLibrary(degree=2).fit(["x", "u"]), Z, y[:, None]


def test_standard_errors_match_statsmodels() -> None:
    lib, Z, y = _problem(500)
    theta = lib.transform(Z)
    stats = GramStats.from_arrays(theta, y)
    support = np.zeros((lib.n_terms_, 1), dtype=bool)
    support[[lib.terms_.index(t) for t in ("1", "x", "x*u")], 0] = True
    coef = np.zeros((lib.n_terms_, 1))
    ref = sm.OLS(y[:, 0], theta[:, support[:, 0]]).fit()  # reference library: statsmodels OLS
    coef[support[:, 0], 0] = ref.params
    se = standard_errors(stats, coef, support)
    np.testing.assert_allclose(se[support[:, 0], 0], ref.bse, rtol=1e-6)
    assert np.all(se[~support[:, 0]] == 0)


def test_replicate_weights_cover_each_run() -> None:
    labels, runs = _subblocks(np.array([100, 7, 50]), 5)
    assert labels.shape == (157,) and runs == [(0, 20), (20, 2), (22, 10)]
    cover = _coverage(np.random.default_rng(0), runs, 32)
    # each run is rebuilt from ceil(count/4) blocks of 4 sub-blocks (moving-block bootstrap)
    assert cover[:20].sum() == 4 * 5 and cover[20:22].sum() == 2 and cover[22:].sum() == 4 * 3


def test_bootstrap_inclusion_true_vs_spurious() -> None:
    lib, Z, y = _problem()
    out = block_bootstrap(lib, Z, y, [1500, 1500], n_boot=30, seed=1)
    incl = out["inclusion"][:, 0]
    true = np.isin(lib.terms_, ["1", "x", "x*u"])
    # true terms selected in (almost) every replicate, spurious ones rarely (common practice)
    assert incl[true].min() >= 0.9
    assert incl[~true].max() <= 0.4
    fit = fit_sparse(accumulate(lib, Z, y), lib.terms_)
    # the ensemble mean is close to the full-data fit, within a few bootstrap deviations
    dev = np.abs(out["coef_mean"][true, 0] - fit.coef[true, 0])
    assert np.all(dev <= 3 * out["coef_std"][true, 0] + 1e-12)
    assert np.all(out["coef_std"][true, 0] > 0)


def test_fitted_value_variance_matches_statsmodels_prediction() -> None:
    # reference: statsmodels OLS, standard error of the mean prediction at a point
    from modemap.fit.uncertainty import fitted_value_covariance

    rng = np.random.default_rng(3)
    x = rng.uniform(50.0, 60.0, size=400)  # far from 0: a badly conditioned Gram matrix
    theta = np.column_stack([np.ones_like(x), x, x**2])
    e = rng.normal(size=(400, 2)) @ np.array([[0.3, 0.0], [0.2, 0.1]])
    y = np.column_stack([1.0 + 0.5 * x, 2.0 - 0.01 * x**2]) + e
    coef = np.linalg.lstsq(theta, y, rcond=None)[0]
    point = np.array([1.0, 57.0, 57.0**2])
    cov = fitted_value_covariance(
        GramStats.from_arrays(theta, y), coef, np.ones(coef.shape, dtype=bool), point
    )
    for j in range(2):
        ref = sm.OLS(y[:, j], theta).fit().get_prediction(point[None, :]).se_mean[0]
        assert np.sqrt(cov[j, j]) == pytest.approx(ref, rel=1e-6)
    # same support for both states: the fitted values correlate like the residuals
    resid = y - theta @ coef
    assert cov[0, 1] / np.sqrt(cov[0, 0] * cov[1, 1]) == pytest.approx(
        np.corrcoef(resid.T)[0, 1], rel=1e-6
    )
