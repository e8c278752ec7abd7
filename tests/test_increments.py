"""Discrete-form selection on the increments (modemap.fit.increments).

References: statsmodels' ordinary least squares (``statsmodels.api.OLS``) for the refit, and
the exact discretisation of a first-order linear system, ``x[k+1] = e^(-a dt) x[k] + (1 -
e^(-a dt)) (b / a) u[k]`` under a zero-order hold (textbook: the matrix-exponential solution
of a linear ODE with piecewise-constant input).
"""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest
import statsmodels.api as sm

from lag_data import held_lag
from modemap import read_data
from modemap.fit.centring import fit_sparse_centred
from modemap.fit.increments import fit_on_increments, increment_stats, persistence_matrix
from modemap.fit.local_model import SparseLocalModel
from modemap.fit.sparse import fit_sparse
from modemap.fit.statistics import GramStats
from modemap.identify.local_dynamics import LocalDynamics

A, B, DT = 0.002, 0.05, 0.05  # 1/s, K/s per unit input, s: a dt = 0.0001


def _slow_tank(seed: int = 0, n: int = 6000, noise: float = 2e-5) -> pd.DataFrame:
    """A first-order lag sampled 10^4 times faster than its time constant (invented)."""
    rng = np.random.default_rng(seed)
    u = np.repeat(rng.uniform(0.0, 2.0, n // 200 + 1), 200)[:n]
    x = held_lag(30.0, u[:-1], DT, A, B)
    t = DT * np.arange(n)
    return pd.DataFrame({"t": t, "x": x + noise * rng.standard_normal(n), "u": u})


def test_increment_stats_equal_the_statistics_of_the_differences() -> None:
    rng = np.random.default_rng(1)
    theta = np.column_stack([np.ones(200), rng.normal(size=(200, 3))])
    Y = rng.normal(size=(200, 2))
    terms, states = ["1", "x", "y", "u"], ["x", "y"]
    E = persistence_matrix(terms, states)
    moved = increment_stats(GramStats.from_arrays(theta, Y), E)
    direct = GramStats.from_arrays(theta, Y - theta[:, 1:3])
    for name in ("gram", "cross", "yy", "term_sum", "target_sum"):
        np.testing.assert_allclose(getattr(moved, name), getattr(direct, name), atol=1e-9)
    assert persistence_matrix(["1", "x", "u"], states) is None  # y's own term missing


def test_refit_is_ordinary_least_squares_on_the_next_state() -> None:
    # noise 1e-3: the residual sum of squares comes from the statistics (y'y - 2 c'b + c'Gc),
    # whose round-off grows as the residual shrinks against the target's size
    frame = _slow_tank(noise=1e-3)
    x, u = frame["x"].to_numpy(), frame["u"].to_numpy()
    theta = np.column_stack([np.ones(x.size - 1), x[:-1], u[:-1]])
    stats = GramStats.from_arrays(theta, x[1:, None])
    terms = ["1", "x", "u"]
    fit = fit_on_increments(lambda s: fit_sparse(s, terms), stats, terms, ["x"])
    support = fit.support[:, 0]
    assert support[1] and support[2]  # the own term is always kept; u carries the dynamics
    ols = sm.OLS(x[1:], theta[:, support]).fit()
    np.testing.assert_allclose(fit.coef[support, 0], ols.params, rtol=1e-8)
    np.testing.assert_allclose(fit.stderr[support, 0], ols.bse, rtol=1e-6)


def test_discrete_form_keeps_the_dynamics_of_a_fast_sampled_lag() -> None:
    # against the next state, the input's contribution is ~0.01 % of its size: below the
    # selection's floor, so a selection on x[k+1] keeps x alone (x[k+1] = x[k])
    frame = _slow_tank()
    ds = read_data(frame, time="t", states=["x"], inputs=["u"])
    model = LocalDynamics(form="discrete", local_model=SparseLocalModel(degree=1)).fit(ds)
    coef = dict(zip(model.terms_, model.coef_[:, 0], strict=True))
    phi = np.exp(-A * DT)
    # exact zero-order-hold discretisation (textbook), noise 2e-5 on x
    assert coef["x"] == pytest.approx(phi, abs=1e-6)
    assert coef["u"] == pytest.approx((1.0 - phi) * B / A, rel=0.03)
    stats = GramStats.from_arrays(
        np.column_stack([np.ones(len(frame) - 1), frame["x"][:-1], frame["u"][:-1]]),
        frame["x"].to_numpy()[1:, None],
    )
    plain = fit_sparse_centred(stats, ["1", "x", "u"], ["x", "u"])
    assert not plain.support[2, 0]  # what the selection on x[k+1] does on these data
