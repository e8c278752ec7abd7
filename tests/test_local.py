"""Tests of modemap.identify.local_dynamics: regression rows and the LocalDynamics estimator."""

from __future__ import annotations

import numpy as np
import pytest
from scipy.integrate import solve_ivp

from modemap.data.dataset import Dataset, Run
from modemap.data.regression import prepare_regression
from modemap.fit.local_model import AffineLocalModel, SparseLocalModel
from modemap.identify.local_dynamics import LocalDynamics

# Lorenz system, "Deterministic nonperiodic flow", Journal of the Atmospheric
# Sciences 20(2), 1963: sigma = 10, rho = 28, beta = 8/3.
SIGMA, RHO, BETA = 10.0, 28.0, 8.0 / 3.0


def _lorenz(t: float, s: np.ndarray) -> list[float]:
    x, y, z = s
    return [SIGMA * (y - x), x * (RHO - z) - y, x * y - BETA * z]


def _dataset(runs: list[tuple[np.ndarray, np.ndarray, np.ndarray]], states, inputs=()) -> Dataset:
    made, offset = [], 0
    for i, (t, x, u) in enumerate(runs):
        idx = offset + np.arange(t.size)
        made.append(Run(name=str(i), origin=str(i), time=t, states=x, inputs=u, index=idx))
        offset += t.size
    step = float(np.median(np.concatenate([np.diff(r[0]) for r in runs])))
    return Dataset(
        runs=tuple(made),
        time_name="t",
        state_names=tuple(states),
        input_names=tuple(inputs),
        units={"t": "s"},
        step=step,
    )


@pytest.fixture(scope="module")
def lorenz_runs() -> list[tuple[np.ndarray, np.ndarray]]:
    dt = 0.002
    out = []
    for x0 in ([-8.0, 7.0, 27.0], [5.0, -3.0, 15.0]):
        t = np.arange(0.0, 8.0, dt)
        sol = solve_ivp(_lorenz, (0, t[-1]), x0, t_eval=t, rtol=1e-10, atol=1e-10)
        out.append((t, sol.y.T))
    return out


def _truth(terms: list[str]) -> np.ndarray:
    truth = np.zeros((len(terms), 3))
    i = {t: k for k, t in enumerate(terms)}
    truth[i["x"], 0], truth[i["y"], 0] = -SIGMA, SIGMA
    truth[i["x"], 1], truth[i["y"], 1], truth[i["x*z"], 1] = RHO, -1.0, -1.0
    truth[i["z"], 2], truth[i["x*y"], 2] = -BETA, 1.0
    return truth


# noisy case: cubic Savitzky-Golay over 15 samples ("Smoothing and differentiation of data by
# simplified least squares procedures", Analytical Chemistry, 1964)
@pytest.mark.parametrize(
    "noise, derivative, tol",
    [
        (0.0, "auto", 0.005),
        (0.01, "auto", 0.03),
        (0.01, {"method": "savgol", "window": 15, "order": 3}, 0.03),
    ],
)
def test_lorenz(lorenz_runs, noise, derivative, tol) -> None:
    rng = np.random.default_rng(0)
    runs = [
        (t, x + noise * x.std(axis=0) * rng.normal(size=x.shape), np.zeros((t.size, 0)))
        for t, x in lorenz_runs
    ]
    est = LocalDynamics(local_model=SparseLocalModel(degree=2), derivative=derivative).fit(
        _dataset(runs, "xyz")
    )
    truth = _truth(est.terms_)
    # exact seven-term support of the Lorenz equations (Journal of the Atmospheric Sciences, 1963)
    np.testing.assert_array_equal(est.support_, truth != 0)
    assert np.abs(est.coef_[truth != 0] / truth[truth != 0] - 1).max() < tol
    # Lorenz equilibria: origin and (+-sqrt(beta (rho - 1)), +-sqrt(beta (rho - 1)), rho - 1)
    # (Journal of the Atmospheric Sciences, 1963)
    c = np.sqrt(BETA * (RHO - 1))
    pts = sorted(tuple(round(v, 0) for v in e.point.values()) for e in est.equilibria_)
    assert pts == sorted(
        [(0.0, 0.0, 0.0), (-round(c), -round(c), 27.0), (round(c), round(c), 27.0)]
    )
    assert est.derivative_settings_["method"] in ("central", "savgol")
    assert est.equations_[0].startswith("dx/dt [/s] =") or est.equations_[0].startswith("dx/dt =")
    frame = est.to_frame()
    assert frame.shape == (10, 3) and frame.loc["x*y", "z"] == pytest.approx(1.0, rel=tol)


def test_prepare_regression_discrete_rows_and_index() -> None:
    t = np.arange(5.0)
    runs = [
        (t, np.arange(5.0)[:, None], np.ones((5, 1))),
        (t[:3], np.zeros((3, 1)), np.zeros((3, 1))),
    ]
    reg = prepare_regression(_dataset(runs, ["x"], ["u"]), form="discrete")
    np.testing.assert_array_equal(reg.lengths, [4, 2])
    np.testing.assert_array_equal(reg.sample_index, [0, 1, 2, 3, 5, 6])
    np.testing.assert_array_equal(reg.Y[:4, 0], [1, 2, 3, 4])
    assert reg.Z.shape == (6, 2) and reg.derivative == {}


def test_discrete_affine_map_and_fixed_point() -> None:
    # x[k+1] = a x[k] + b u[k] + c; fixed point x* = (b u + c) / (1 - a) (textbook, linear maps)
    a, b, c = 0.9, 0.5, 0.2
    rng = np.random.default_rng(0)
    u = rng.uniform(0, 1, size=(400, 1))
    x = np.zeros((400, 1))
    for k in range(399):
        x[k + 1] = a * x[k] + b * u[k] + c + 0.01 * rng.normal()
    est = LocalDynamics(form="discrete", local_model=AffineLocalModel()).fit(
        _dataset([(np.arange(400.0), x, u)], ["x"], ["u"])
    )
    assert est.terms_ == ["1", "x", "u"]
    np.testing.assert_allclose(est.coef_[:, 0], [c, a, b], atol=0.02)
    um = float(np.median(u))
    (eq,) = est.equilibria_
    assert eq.point["x"] == pytest.approx((b * um + c) / (1 - a), rel=0.05)
    assert est.equations_[0].startswith("x[k+1] = ")
    np.testing.assert_allclose(
        est.predict_derivative(np.c_[x, u][:3]),
        est.coef_[0] + np.c_[x, u][:3] @ est.coef_[1:],
        rtol=1e-12,
    )


def test_bootstrap_inclusion_attribute(lorenz_runs) -> None:
    runs = [(t, x, np.zeros((t.size, 0))) for t, x in lorenz_runs]
    est = LocalDynamics(n_bootstrap=5, derivative="savgol").fit(_dataset(runs, "xyz"))
    truth = _truth(est.terms_)
    # true terms kept in every replicate on clean data (common practice)
    assert np.all(est.inclusion_[truth != 0] == 1.0)
    assert est.to_frame("inclusion").shape == (10, 3)


def test_bad_parameters_raise_at_fit() -> None:
    est = LocalDynamics(local_model="quadratic")
    assert est.get_params()["local_model"] == "quadratic"
    with pytest.raises(ValueError, match="local_model"):
        est.fit(None)


def test_cross_validated_threshold(lorenz_runs) -> None:
    runs = [(t, x, np.zeros((t.size, 0))) for t, x in lorenz_runs]
    est = LocalDynamics(local_model=SparseLocalModel(criterion="cv"), derivative="central").fit(
        _dataset(runs, "xyz")
    )
    # the seven Lorenz terms (Journal of the Atmospheric Sciences, 1963) by held-out error
    np.testing.assert_array_equal(est.support_, _truth(est.terms_) != 0)
