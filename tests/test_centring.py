"""Selection on centred variables, estimation on raw ones (modemap.fit.centring)."""

import numpy as np
import pytest
from sklearn.preprocessing import PolynomialFeatures

from modemap.fit.centring import centring_matrix, fit_sparse_centred
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
