"""Selection on centred variables, estimation on raw ones (modemap.fit.centring)."""

import numpy as np
import pytest
from sklearn.preprocessing import PolynomialFeatures

from modemap.fit.centring import _moments, centring_matrix, fit_sparse_centred
from modemap.fit.statistics import GramStats
from modemap.terms.library import TermLibrary


def test_centring_matrix_maps_raw_terms_to_standardised_terms() -> None:
    # Reference: scikit-learn's PolynomialFeatures evaluated on the standardised variables.
    rng = np.random.default_rng(1)
    Z = rng.normal(size=(200, 2)) * [2.0, 3.0] + [5.0, -1.0]
    lib = TermLibrary(degree=3).fit(["x", "y"])
    mean, scale = Z.mean(axis=0), Z.std(axis=0)
    M = centring_matrix(lib.terms_, lib.variables_, mean, scale)
    ref = PolynomialFeatures(degree=3).fit((Z - mean) / scale)
    names = [
        n.replace(" ", "*").replace("x0", "x").replace("x1", "y")
        for n in ref.get_feature_names_out()
    ]
    expected = ref.transform((Z - mean) / scale)
    got = lib.transform(Z) @ M
    order = [names.index(t) for t in lib.terms_]
    np.testing.assert_allclose(got, expected[:, order], rtol=1e-9, atol=1e-9)


def test_narrow_operating_range_keeps_the_true_support() -> None:
    # dT/dt = 0.5 - 0.01 T - 0.002 w*T over T in a 5-unit band: 1, T and T^2 are nearly
    # collinear in raw form (common practice: centre before building polynomial terms).
    rng = np.random.default_rng(0)
    n = 4000
    T = rng.uniform(55.0, 60.0, n)
    w = rng.uniform(0.0, 6.0, n)
    y = 0.5 - 0.01 * T - 0.002 * w * T + 1e-4 * rng.normal(size=n)
    lib = TermLibrary(degree=2).fit(["T", "w"])
    stats = GramStats.from_arrays(lib.transform(np.column_stack([T, w])), y[:, None])
    fit = fit_sparse_centred(stats, lib.terms_, lib.variables_)
    chosen = {t for t, s in zip(lib.terms_, fit.support[:, 0], strict=True) if s}
    assert chosen == {"1", "T", "T*w"}
    coef = dict(zip(lib.terms_, fit.coef[:, 0], strict=True))
    assert coef["T"] == pytest.approx(-0.01, rel=0.02)
    assert coef["T*w"] == pytest.approx(-0.002, rel=0.01)


def test_missing_linear_term_falls_back_to_the_plain_fit() -> None:
    rng = np.random.default_rng(2)
    x = rng.normal(size=(500, 1))
    lib = TermLibrary.from_terms(["1", "x^2"], ["x"])
    stats = GramStats.from_arrays(lib.transform(x), (3.0 * x**2 + 1.0))
    fit = fit_sparse_centred(stats, lib.terms_, lib.variables_)
    np.testing.assert_allclose(fit.coef[:, 0], [1.0, 3.0], rtol=1e-9)


def test_moments_of_sample_statistics_are_the_plain_mean_and_deviation() -> None:
    # Reference: numpy's mean and (population) standard deviation, and their weighted
    # forms (np.average); the linear term of a variable absent from the library keeps 0, 1
    rng = np.random.default_rng(3)
    Z = rng.normal(size=(300, 3)) * [2.0, 0.5, 1.0] + [5.0, -1.0, 0.0]
    full = TermLibrary(degree=2).fit(["x", "y", "u"])
    lib = TermLibrary.from_terms([t for t in full.terms_ if "u" not in t], ["x", "y", "u"])
    theta = lib.transform(Z)
    mean, scale = _moments(GramStats.from_arrays(theta, Z[:, :1]), lib.terms_, lib.variables_)
    np.testing.assert_allclose(mean, [*Z[:, :2].mean(axis=0), 0.0], rtol=1e-12)
    np.testing.assert_allclose(scale, [*Z[:, :2].std(axis=0), 1.0], rtol=1e-12)
    w = rng.uniform(0.0, 3.0, 300)
    stats = GramStats.from_arrays(theta, Z[:, :1], weight=w)
    mean, scale = _moments(stats, lib.terms_, lib.variables_)
    ref_mean = np.average(Z[:, :2], axis=0, weights=w)
    ref_var = np.average((Z[:, :2] - ref_mean) ** 2, axis=0, weights=w)
    np.testing.assert_allclose(mean[:2], ref_mean, rtol=1e-12)
    np.testing.assert_allclose(scale[:2], np.sqrt(ref_var), rtol=1e-10)


def test_moments_of_window_statistics_weigh_by_the_window_durations() -> None:
    # Windows of w steps starting at every sample of a ramp x = t (unit steps): the
    # integrals are w (of 1) and w (s + w/2) (of x, exact for the trapezoidal rule on a
    # line), so the mean is that of the windows' midpoints, (n - 1)/2, and the variance
    # that of the N = n - w starts, (N^2 - 1)/12 (the discrete uniform distribution,
    # textbook).  Dividing the integrals' sum by the number of windows would give w times
    # the mean.  The centred column is orthogonal to the constant one (numpy lstsq).
    n, w = 400, 16
    s = np.arange(n - w, dtype=float)
    X = np.column_stack([np.full(s.size, float(w)), w * (s + w / 2.0)])
    stats = GramStats.from_arrays(X, np.zeros((s.size, 1)))
    mean, scale = _moments(stats, ["1", "x"], ["x"])
    assert mean[0] == pytest.approx((n - 1) / 2.0, rel=1e-12)
    assert scale[0] ** 2 == pytest.approx((s.size**2 - 1) / 12.0, rel=1e-10)
    centred = X[:, 1] - mean[0] * X[:, 0]
    coef = np.linalg.lstsq(X[:, :1], centred, rcond=None)[0]
    assert abs(coef[0]) <= 1e-12 * mean[0]


def test_no_constant_term_means_no_centring() -> None:
    rng = np.random.default_rng(4)
    x = rng.normal(size=(50, 1)) + 3.0
    lib = TermLibrary.from_terms(["x", "x^2"], ["x"])
    stats = GramStats.from_arrays(lib.transform(x), x)
    assert _moments(stats, lib.terms_, lib.variables_) is None
