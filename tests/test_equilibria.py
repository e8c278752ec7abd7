"""Tests of equilibria, Jacobians and stability classes (modemap.model.equilibria).

Textbook: "Nonlinear Dynamics and Chaos", Westview/CRC Press, 2nd ed., 2015
(linear classification, the double-well oscillator, the 1963 convection model).
Reference library for eigenvalues: numpy.linalg.eigvals on analytic Jacobians.
"""

from __future__ import annotations

import numpy as np
import pytest

from modemap._exceptions import FitError
from modemap.model.equilibria import (
    affine_equilibrium,
    classify,
    find_equilibria,
    jacobian,
    timescales,
)
from modemap.terms.library import TermLibrary


def model(variables: list[str], degree: int, rhs: list[dict[str, float]], constant: bool = True):
    """Library and coefficient matrix from per-state {term: coefficient} dicts."""
    library = TermLibrary(degree=degree, constant=constant).fit(variables)
    coef = np.zeros((library.n_terms_, len(rhs)))
    for j, terms in enumerate(rhs):
        for term, value in terms.items():
            coef[library.terms_.index(term), j] = value
    return library, coef


def test_damped_oscillator_affine_model() -> None:
    # x'' + 2 zeta omega x' + omega^2 x = 0 as x' = v, v' = -omega^2 x - 2 zeta omega v + f.
    # Textbook: eigenvalues -zeta*omega +- i*omega*sqrt(1 - zeta^2), a stable focus for
    # 0 < zeta < 1, damped period 2*pi/omega_d; equilibrium x = f/omega^2.
    zeta, omega, force = 0.2, 3.0, 1.8
    library, coef = model(
        ["x", "v", "f"],
        1,
        [{"v": 1.0}, {"x": -(omega**2), "v": -2 * zeta * omega, "f": 1.0}],
    )
    (eq,) = find_equilibria(
        library, coef, n_states=2, input_values=[force], bounds=[[0.0, 1.0], [-1.0, 1.0]]
    )
    assert eq.point == pytest.approx({"x": force / omega**2, "v": 0.0}, abs=1e-12)
    omega_d = omega * np.sqrt(1 - zeta**2)
    expected = np.array([-zeta * omega + 1j * omega_d, -zeta * omega - 1j * omega_d])
    got = np.sort_complex(eq.eigenvalues)
    np.testing.assert_allclose(got, np.sort_complex(expected), rtol=1e-3)
    assert eq.stability == "stable focus"
    assert eq.period == pytest.approx(2 * np.pi / omega_d, rel=1e-3)
    assert eq.time_constants == pytest.approx([1 / (zeta * omega)], rel=1e-3)
    assert eq.inside and eq.note == ""


@pytest.mark.parametrize("delta", [0.0, 0.2, 0.5])
def test_double_well_equilibria(delta: float) -> None:
    # x'' = x - x^3 - delta x': equilibria (0, 0) saddle, (+-1, 0) stable focus for
    # 0 < delta < 2*sqrt(2), centres for delta = 0 (textbook, double-well oscillator).
    library, coef = model(["x", "v"], 3, [{"v": 1.0}, {"x": 1.0, "x^3": -1.0, "v": -delta}])
    eqs = find_equilibria(library, coef, n_states=2, bounds=[[-1.5, 1.5], [-1.0, 1.0]])
    points = [(e.point["x"], e.point["v"]) for e in eqs]
    np.testing.assert_allclose(points, [(-1, 0), (0, 0), (1, 0)], atol=1e-9)
    assert eqs[1].stability == "saddle"
    wells = "centre-like" if delta == 0 else "stable focus"
    assert eqs[0].stability == eqs[2].stability == wells
    for e, x in zip(eqs, (-1.0, 0.0, 1.0), strict=True):
        analytic = np.array([[0.0, 1.0], [1.0 - 3.0 * x**2, -delta]])
        # Reference: numpy.linalg.eigvals of the analytic Jacobian.
        np.testing.assert_allclose(
            np.sort_complex(e.eigenvalues), np.sort_complex(np.linalg.eigvals(analytic)), atol=1e-9
        )
        np.testing.assert_allclose(jacobian(library, coef, [x, 0.0], 2), analytic, atol=1e-12)


def test_convection_model_equilibria() -> None:
    # "Deterministic nonperiodic flow", Journal of the Atmospheric Sciences, 1963:
    # sigma=10, rho=28, beta=8/3 has the origin and C+- = (+-sqrt(beta(rho-1)), same, rho-1);
    # all three unstable: the origin a saddle, C+- saddle-foci (one real negative eigenvalue,
    # a complex pair with positive real part) (textbook).
    s, r, b = 10.0, 28.0, 8.0 / 3.0
    library, coef = model(
        ["x", "y", "z"],
        2,
        [{"x": -s, "y": s}, {"x": r, "y": -1.0, "x*z": -1.0}, {"x*y": 1.0, "z": -b}],
        constant=False,
    )
    eqs = find_equilibria(library, coef, n_states=3, bounds=[[-20, 20], [-25, 25], [0, 50]])
    c = np.sqrt(b * (r - 1))
    points = np.array([[e.point[k] for k in "xyz"] for e in eqs])
    np.testing.assert_allclose(points, [[-c, -c, r - 1], [0, 0, 0], [c, c, r - 1]], atol=1e-8)
    assert [e.stability for e in eqs] == ["saddle"] * 3
    for e, (x, y, z) in zip(eqs, points, strict=True):
        analytic = np.array([[-s, s, 0], [r - z, -1, -x], [y, x, -b]])
        np.testing.assert_allclose(
            np.sort_complex(e.eigenvalues), np.sort_complex(np.linalg.eigvals(analytic)), atol=1e-8
        )
    assert np.sum(np.abs(eqs[2].eigenvalues.imag) > 1) == 2


def test_discrete_affine_map() -> None:
    # x[k+1] = a x[k] + c with |a| < 1: fixed point c/(1 - a), a stable node (textbook, maps);
    # time constant -step/ln(a).
    a, c, step = 0.8, 0.5, 0.1
    library, coef = model(["x"], 1, [{"1": c, "x": a}])
    (eq,) = find_equilibria(
        library, coef, n_states=1, bounds=[[0.0, 5.0]], form="discrete", step=step
    )
    assert eq.point["x"] == pytest.approx(c / (1 - a))
    assert eq.stability == "stable node" and eq.inside
    assert eq.time_constants == pytest.approx([-step / np.log(a)])
    (flip,) = find_equilibria(
        library,
        model(["x"], 1, [{"1": c, "x": -0.5}])[1],
        n_states=1,
        bounds=[[0, 1]],
        form="discrete",
    )
    assert flip.stability == "stable focus" and flip.period == pytest.approx(2.0)


def test_discrete_nonlinear_map_logistic() -> None:
    # Logistic map x -> r x (1 - x), r = 2.5: fixed points 0 (unstable, slope r) and
    # 1 - 1/r (stable, slope 2 - r) (textbook, chapter on one-dimensional maps).
    r = 2.5
    library, coef = model(["x"], 2, [{"x": r, "x^2": -r}])
    eqs = find_equilibria(library, coef, n_states=1, bounds=[[0.0, 1.0]], form="discrete")
    assert [e.point["x"] for e in eqs] == pytest.approx([0.0, 1 - 1 / r], abs=1e-10)
    assert [e.stability for e in eqs] == ["unstable node", "stable focus"]  # slope -0.5 < 0


def test_outside_bounds_and_singular_affine() -> None:
    library, coef = model(["x"], 1, [{"1": 1.0, "x": -0.1}])  # x* = 10
    (eq,) = find_equilibria(library, coef, n_states=1, bounds=[[0.0, 1.0]])
    assert eq.point["x"] == pytest.approx(10.0) and not eq.inside
    assert eq.stability == "stable node"
    # x' = y - x, y' = x - y: a line of equilibria (singular linear part).
    library, coef = model(["x", "y"], 1, [{"x": -1.0, "y": 1.0}, {"x": 1.0, "y": -1.0}])
    (line,) = find_equilibria(library, coef, n_states=2, bounds=[[0, 1], [0, 1]])
    assert "not isolated" in line.note and line.stability == "degenerate"
    # x' = 1 (no equilibrium at all)
    library, coef = model(["x", "y"], 1, [{"1": 1.0}, {"y": -1.0}])
    assert find_equilibria(library, coef, n_states=2, bounds=[[0, 1], [0, 1]]) == []


def test_nonlinear_without_roots_in_box() -> None:
    # x' = x^2 + 1 has no real root.
    library, coef = model(["x"], 2, [{"1": 1.0, "x^2": 1.0}])
    assert find_equilibria(library, coef, n_states=1, bounds=[[-2.0, 2.0]]) == []


@pytest.mark.parametrize(
    ("eigenvalues", "form", "expected"),
    [
        # Linear classification by eigenvalues (textbook, linear systems chapter).
        ([-1.0, -2.0], "continuous", "stable node"),
        ([1.0, 2.0], "continuous", "unstable node"),
        ([-1 + 2j, -1 - 2j], "continuous", "stable focus"),
        ([1 + 2j, 1 - 2j], "continuous", "unstable focus"),
        ([-1.0, 2.0], "continuous", "saddle"),
        ([2j, -2j], "continuous", "centre-like"),
        ([0.0, -1.0], "continuous", "degenerate"),
        ([-3.0], "continuous", "stable node"),
        ([0.5], "continuous", "unstable node"),
        # Maps: modulus against 1 (textbook, maps chapter).
        ([0.5, 0.2], "discrete", "stable node"),
        ([0.5 + 0.5j, 0.5 - 0.5j], "discrete", "stable focus"),
        ([1.5, 2.0], "discrete", "unstable node"),
        ([1.2 + 0.5j, 1.2 - 0.5j], "discrete", "unstable focus"),
        ([0.5, 1.5], "discrete", "saddle"),
        ([np.exp(0.3j), np.exp(-0.3j)], "discrete", "centre-like"),
        ([1.0, 0.5], "discrete", "degenerate"),
    ],
)
def test_classify(eigenvalues: list[complex], form: str, expected: str) -> None:
    assert classify(np.array(eigenvalues), form) == expected


def test_timescales_and_affine_helper() -> None:
    constants, period = timescales(np.array([-0.5 + 2j, -0.5 - 2j, -4.0]))
    assert constants == pytest.approx([2.0, 0.25]) and period == pytest.approx(np.pi)
    A = np.array([[-1.0, 0.5], [0.0, -2.0]])
    B = np.array([[1.0], [2.0]])
    x = affine_equilibrium(A, B, np.array([0.1, 0.0]), np.array([3.0]))
    # Reference: numpy.linalg.solve.
    np.testing.assert_allclose(A @ x + B @ [3.0] + [0.1, 0.0], 0.0, atol=1e-12)
    assert affine_equilibrium(np.zeros((2, 2)), B, np.zeros(2), np.ones(1)) is None


def test_errors() -> None:
    library, coef = model(["x", "u"], 1, [{"x": -1.0}])
    with pytest.raises(FitError, match="input values"):
        find_equilibria(library, coef, n_states=1, input_values=[], bounds=[[0, 1]])
    with pytest.raises(FitError, match="shape"):
        find_equilibria(library, coef[:2], n_states=1, input_values=[0.0], bounds=[[0, 1]])
    with pytest.raises(FitError, match="bounds"):
        find_equilibria(library, coef, n_states=1, input_values=[0.0], bounds=[[1, 0]])
    with pytest.raises(FitError, match="form"):
        classify(np.array([-1.0]), "hybrid")


@pytest.mark.parametrize("form", ["continuous", "discrete"])
def test_equilibrium_stderr_matches_the_delta_method_for_a_ratio(form: str) -> None:
    # scalar affine model y = c + a x: the equilibrium is x* = -c / a (continuous) or
    # c / (1 - a) (discrete); its delta-method variance g' Cov(c, a) g with the gradient g
    # of that ratio (common practice) and Cov(c, a) from statsmodels OLS (reference library)
    import statsmodels.api as sm

    from modemap.fit.statistics import GramStats
    from modemap.model.equilibria import equilibrium_stderr
    from modemap.terms.library import TermLibrary

    rng = np.random.default_rng(5)
    x = rng.uniform(2.0, 6.0, size=300)
    a_true = -0.8 if form == "continuous" else 0.6
    y = 3.0 + a_true * x + 0.2 * rng.standard_normal(300)
    library = TermLibrary.from_terms(["1", "x"], ["x"])
    theta = library.transform(x[:, None])
    ols = sm.OLS(y, theta).fit()
    c, a = ols.params
    if form == "continuous":
        point, grad = -c / a, np.array([-1.0 / a, c / a**2])
    else:
        point, grad = c / (1.0 - a), np.array([1.0 / (1.0 - a), c / (1.0 - a) ** 2])
    ref = float(np.sqrt(grad @ ols.cov_params() @ grad))
    se = equilibrium_stderr(
        library,
        ols.params[:, None],
        GramStats.from_arrays(theta, y),
        np.ones((2, 1), dtype=bool),
        np.array([point]),
        1,
        form=form,
    )
    assert se[0] == pytest.approx(ref, rel=1e-6)
