"""Tests of the candidate-term library (modemap.terms.library)."""

from __future__ import annotations

from math import comb

import numpy as np
import pytest
from sklearn.base import clone
from sklearn.preprocessing import PolynomialFeatures

from modemap._exceptions import DataError, ExpressionError
from modemap.terms.library import TermLibrary, evaluate_terms

VARS = ["x", "y", "u"]
Z = np.random.default_rng(3).uniform(-2.0, 2.0, size=(200, 3))


def test_canonical_names_two_variables() -> None:
    assert TermLibrary(degree=2).fit(["x", "y"]).terms_ == ["1", "x", "y", "x^2", "x*y", "y^2"]


def test_canonical_names_three_variables_degree_three() -> None:
    lib = TermLibrary(degree=3).fit(VARS)
    # Number of monomials of degree <= d in n variables is C(n+d, d) (textbook combinatorics).
    assert lib.n_terms_ == comb(3 + 3, 3) == 20
    assert lib.terms_[:10] == ["1", "x", "y", "u", "x^2", "x*y", "x*u", "y^2", "y*u", "u^2"]
    assert "x^2*u" in lib.terms_ and "x*y*u" in lib.terms_ and "u^3" in lib.terms_
    assert lib.variables_ == tuple(VARS)


@pytest.mark.parametrize("order", ["C", "F"])
def test_transform_matches_scikit_learn_polynomial_features(order: str) -> None:
    # Reference library: scikit-learn's polynomial expansion; its names with ' '
    # replaced by '*' are our canonical names, so columns are matched by name.
    lib = TermLibrary(degree=3).fit(VARS)
    reference = PolynomialFeatures(degree=3).fit(Z)
    names = [n.replace(" ", "*") for n in reference.get_feature_names_out(VARS)]
    expected = reference.transform(Z)[:, [names.index(t) for t in lib.terms_]]
    out = np.empty((Z.shape[0], lib.n_terms_), order=order)
    np.testing.assert_allclose(lib.transform(Z, out=out), expected, rtol=1e-13, atol=1e-13)


def test_transform_spans_several_row_blocks() -> None:
    big = np.random.default_rng(4).normal(size=(20_000, 2))
    lib = TermLibrary(degree=4, constant=False).fit(["a", "b"])
    reference = PolynomialFeatures(degree=4, include_bias=False).fit_transform(big)
    # Reference: scikit-learn (same graded lexicographic order for two variables).
    np.testing.assert_allclose(lib.transform(big), reference, rtol=1e-12)


def test_trig_and_custom_terms() -> None:
    lib = TermLibrary(degree=1, trig=["x"], custom=["exp(-y)", "y*x", "x"]).fit(VARS)
    # "y*x" is the monomial x*y; "x" is already there and is dropped.
    assert lib.terms_ == ["1", "x", "y", "u", "sin(x)", "cos(x)", "exp(-y)", "x*y"]
    x, y, _ = Z.T
    theta = lib.transform(Z)
    # Reference: numpy directly.
    np.testing.assert_allclose(
        theta[:, 4:], np.column_stack([np.sin(x), np.cos(x), np.exp(-y), x * y])
    )


def test_partials_match_finite_differences() -> None:
    # Reference: central finite differences (common practice).
    lib = TermLibrary(degree=3, trig=["y"], custom=["exp(-x*u)", "x/(1 + y^2)"]).fit(VARS)
    analytic = lib.partials(Z)
    assert analytic.shape == (200, lib.n_terms_, 3)
    h = 1e-6
    for k in range(3):
        zp, zm = Z.copy(), Z.copy()
        zp[:, k] += h
        zm[:, k] -= h
        numeric = (lib.transform(zp) - lib.transform(zm)) / (2 * h)
        np.testing.assert_allclose(analytic[:, :, k], numeric, rtol=1e-6, atol=1e-6)


def test_from_terms_round_trip_and_order() -> None:
    lib = TermLibrary(degree=3, trig=["x"], custom=["tanh(u - 1)"]).fit(VARS)
    shuffled = lib.terms_[::-1]
    again = TermLibrary.from_terms(shuffled, VARS)
    assert again.terms_ == shuffled
    np.testing.assert_allclose(again.transform(Z), lib.transform(Z)[:, ::-1], rtol=1e-14)
    # a monomial whose lower-degree prefixes are not in the list
    sparse = TermLibrary.from_terms(["x^3*y^2", "1"], ["x", "y"])
    x, y = Z[:, 0], Z[:, 1]
    np.testing.assert_allclose(sparse.transform(Z[:, :2])[:, 0], x**3 * y**2, rtol=1e-13)
    np.testing.assert_allclose(evaluate_terms(["x*u"], VARS, Z)[:, 0], Z[:, 0] * Z[:, 2])


def test_errors() -> None:
    with pytest.raises(ExpressionError, match="is empty"):
        TermLibrary().fit(["x", " "])
    with pytest.raises(ExpressionError, match="appears twice"):
        TermLibrary().fit(["x", "x"])
    with pytest.raises(ExpressionError, match="trig variable 'z'"):
        TermLibrary(trig=["z"]).fit(VARS)
    with pytest.raises(ExpressionError, match="unknown name"):
        TermLibrary(custom=["q*x"]).fit(VARS)
    with pytest.raises(ExpressionError, match="are the same term"):
        TermLibrary.from_terms(["x*y", "y*x"], VARS)
    with pytest.raises(ExpressionError, match="empty"):
        TermLibrary(degree=0, constant=False).fit(VARS)
    with pytest.raises(DataError, match="expected \\(n, 3\\)"):
        TermLibrary().fit(VARS).transform(np.ones((4, 2)))


def test_scikit_learn_conventions() -> None:
    lib = TermLibrary(degree=3, trig=("x",))
    assert lib.get_params() == {"degree": 3, "constant": True, "trig": ("x",), "custom": ()}
    copy = clone(lib).fit(VARS)
    assert list(copy.get_feature_names_out()) == copy.terms_
    assert lib.fit(VARS) is lib


def test_degree_in_states() -> None:
    lib = TermLibrary(degree=2, trig=["u"], custom=["exp(x)"]).fit(VARS)
    degrees = dict(zip(lib.terms_, lib.degree_in(["x", "y"]), strict=True))
    assert degrees["1"] == 0 and degrees["x*u"] == 1 and degrees["x*y"] == 2
    assert degrees["sin(u)"] == 0 and degrees["exp(x)"] is None
