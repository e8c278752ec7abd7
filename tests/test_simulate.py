"""Tests of the event-driven hybrid simulator (modemap.simulation.simulator)."""

from __future__ import annotations

import numpy as np
import pytest
from scipy.integrate import solve_ivp

from modemap import SimulationError
from modemap.model.hybrid import Guard, HybridModel, RegimeModel
from modemap.simulation.simulator import SimulationResult, simulate


def regime(rid: int, terms: list[str], coef) -> RegimeModel:
    c = np.asarray(coef, dtype=float).reshape(len(terms), -1)
    return RegimeModel(
        id=rid, samples=0, terms=terms, coefficients=c, stderr=0 * c, noise_cov=np.eye(c.shape[1])
    )


def relaxation_oscillator(mu: float = 1.0) -> HybridModel:
    # x' = y, y' = mu (1 - x^2) y - x, written in canonical terms
    reg = regime(0, ["x", "y", "x^2*y"], [[0, -1], [1, mu], [0, -mu]])
    return HybridModel(
        states=["x", "y"],
        inputs=[],
        form="continuous",
        regimes=[reg],
        data_range={"x": (-2.5, 2.5), "y": (-3.0, 3.0)},
    )


def first_order_switch(nonlinear: bool) -> HybridModel:
    """x' = (10 - x) / 2 until x > 5, then x' = -x.

    With ``nonlinear`` a zero-coefficient ``x^2`` term forces the ODE-solver path.
    """
    terms0 = ["1", "x", "x^2"] if nonlinear else ["1", "x"]
    coef0 = [5.0, -0.5, 0.0] if nonlinear else [5.0, -0.5]
    r0 = regime(0, terms0, coef0)
    r1 = regime(1, ["x"], [-1.0])
    g = Guard(source=0, target=1, terms=["x"], weights=np.array([1.0]), offset=-5.0)
    return HybridModel(
        states=["x"], inputs=[], form="continuous", regimes=[r0, r1], guards=[g],
        data_range={"x": (0.0, 10.0)},
    )  # fmt: skip


def buck(nonlinear_on: bool = False) -> HybridModel:
    """Gate-driven converter in scaled units: i' = q*10 - v, v' = i - v."""
    off = regime(0, ["i", "v"], [[0, 1], [-1, -1]])
    if nonlinear_on:
        on = regime(1, ["1", "i", "v", "v^2"], [[10, 0], [0, 1], [-1, -1], [0, 0]])
    else:
        on = regime(1, ["1", "i", "v"], [[10, 0], [0, 1], [-1, -1]])
    guards = [
        Guard(0, 1, ["q"], np.array([1.0]), -0.5),
        Guard(1, 0, ["q"], np.array([-1.0]), 0.5),
    ]
    return HybridModel(
        states=["i", "v"], inputs=["q"], form="continuous", regimes=[off, on], guards=guards,
        data_range={"i": (0.0, 10.0), "v": (0.0, 10.0), "q": (0.0, 1.0)},
    )  # fmt: skip


def thermostat(low: float = 55.0, high: float = 65.0) -> HybridModel:
    heat = regime(0, ["1", "T"], [8.0, -0.1])  # equilibrium 80
    cool = regime(1, ["1", "T"], [2.0, -0.1])  # equilibrium 20
    guards = [
        Guard(0, 1, ["T"], np.array([1.0]), -high),
        Guard(1, 0, ["T"], np.array([-1.0]), low),
    ]
    return HybridModel(
        states=["T"], inputs=[], form="continuous", regimes=[heat, cool], guards=guards,
        data_range={"T": (20.0, 80.0)},
    )  # fmt: skip


@pytest.mark.parametrize("method", ["auto", "Radau", "RK45"])
def test_single_regime_matches_solve_ivp(method):
    model = relaxation_oscillator()
    t = np.linspace(0.0, 10.0, 201)
    res = simulate(model, t, [2.0, 0.0], method=method, rtol=1e-9, atol=1e-11)
    assert isinstance(res, SimulationResult) and res.status == 0
    # reference library: scipy.integrate.solve_ivp (DOP853, tight tolerances)
    ref = solve_ivp(
        lambda _t, z: [z[1], (1 - z[0] ** 2) * z[1] - z[0]], (0, 10), [2.0, 0.0],
        t_eval=t, method="DOP853", rtol=1e-12, atol=1e-12,
    )  # fmt: skip
    np.testing.assert_allclose(res.states, ref.y.T, atol=5e-6)
    assert np.all(res.regimes == 0) and res.switches == [] and res.nfev > 0


@pytest.mark.parametrize("nonlinear", [False, True])
def test_switch_at_analytic_time(nonlinear):
    # textbook first-order response x(t) = 10 (1 - exp(-t/2)) crosses 5 at t* = 2 ln 2
    # (common practice); afterwards x(t) = 5 exp(-(t - t*)).
    model = first_order_switch(nonlinear)
    t = np.linspace(0.0, 4.0, 41)
    res = simulate(model, t, [0.0], regime0=0, rtol=1e-10)
    t_star = 2.0 * np.log(2.0)
    assert len(res.switches) == 1
    ts, a, b = res.switches[0]
    assert (a, b) == (0, 1)
    assert ts == pytest.approx(t_star, abs=1e-7)
    before, after = t < t_star, t > t_star
    np.testing.assert_allclose(res.states[before, 0], 10 * (1 - np.exp(-t[before] / 2)), atol=1e-6)
    np.testing.assert_allclose(res.states[after, 0], 5 * np.exp(-(t[after] - t_star)), atol=1e-6)
    assert np.all(res.regimes[before] == 0) and np.all(res.regimes[after] == 1)


def _piecewise_reference(model: HybridModel, t, x0, q):
    """Integrate each zero-order-hold interval separately with solve_ivp (reference library)."""
    x = np.asarray(x0, float)
    out = [x]
    for k in range(t.size - 1):
        on = q[k] > 0.5
        sol = solve_ivp(
            lambda _t, z, on=on: [10.0 * on - z[1], z[0] - z[1]], (t[k], t[k + 1]), x,
            method="DOP853", rtol=1e-12, atol=1e-12,
        )  # fmt: skip
        x = sol.y[:, -1]
        out.append(x)
    return np.array(out)


@pytest.mark.parametrize("nonlinear_on", [False, True])
def test_gate_driven_model_matches_piecewise_reference(nonlinear_on):
    model = buck(nonlinear_on)
    t = np.arange(400) * 0.01
    q = ((t % 0.2) < 0.12).astype(float)
    res = simulate(model, t, [0.0, 0.0], q[:, None], rtol=1e-10, atol=1e-12)
    assert res.status == 0
    ref = _piecewise_reference(model, t, [0.0, 0.0], q)
    np.testing.assert_allclose(res.states, ref, atol=1e-7)
    edges = np.flatnonzero(np.diff(q) != 0) + 1
    assert [s[0] for s in res.switches] == pytest.approx(list(t[edges]))
    np.testing.assert_array_equal(res.regimes, (q > 0.5).astype(int))


def test_many_gate_edges_are_fast_and_average_correctly():
    model = buck()
    t = np.arange(20000) * 0.01
    q = ((t % 0.2) < 0.12).astype(float)  # duty 0.6, 2000 edges
    res = simulate(model, t, [0.0, 0.0], q[:, None])
    assert res.status == 0 and len(res.switches) == np.count_nonzero(np.diff(q))
    # averaged converter: steady output voltage = duty * input voltage (common practice)
    assert np.mean(res.states[-2000:, 1]) == pytest.approx(0.6 * 10.0, rel=0.02)


def test_hysteresis_cycle_and_initial_regime():
    model = thermostat()
    t = np.linspace(0.0, 30.0, 3001)
    # x0 = 70 is above the upper threshold: only regime 1 (cooling) has no firing guard
    res = simulate(model, t, [70.0])
    assert res.regimes[0] == 1
    # exponential approach: cooling from 65 towards 20 with tau = 10 reaches 55 after
    # 10 ln(45/35); heating from 55 towards 80 reaches 65 after 10 ln(25/15) (common practice)
    times = np.array([s[0] for s in res.switches])
    cool, heat = 10 * np.log(45 / 35), 10 * np.log(25 / 15)
    np.testing.assert_allclose(np.diff(times)[0:2], [heat, cool], rtol=1e-6)
    assert res.states[t > 5, 0].min() > 55.0 - 1e-6 and res.states[t > 5, 0].max() < 65.0 + 1e-6


def test_discrete_form_geometric_sequence():
    # x[k+1] = 0.5 x[k] + 1 from 0 gives x_k = 2 - 2 * 0.5**k (geometric series, common
    # practice); it passes 1.5 at k = 3 (x_3 = 1.75), where regime 1 (x[k+1] = 0.5 x[k]) takes over.
    r0 = regime(0, ["1", "x"], [1.0, 0.5])
    r1 = regime(1, ["x"], [0.5])
    g = Guard(0, 1, ["x"], np.array([1.0]), -1.5)
    model = HybridModel(
        states=["x"], inputs=[], form="discrete", regimes=[r0, r1], guards=[g], step=1.0,
        data_range={"x": (0.0, 2.0)},
    )  # fmt: skip
    res = simulate(model, np.arange(6.0), [0.0], regime0=0)
    np.testing.assert_allclose(res.states[:, 0], [0, 1, 1.5, 1.75, 0.875, 0.4375])
    np.testing.assert_array_equal(res.regimes, [0, 0, 0, 1, 1, 1])
    assert res.switches == [(3.0, 0, 1)]


def test_chattering_cap_stops_and_reports():
    model = thermostat(low=59.99, high=60.01)  # a band of 0.02 degC: fast cycling
    t = np.linspace(0.0, 10.0, 101)
    res = simulate(model, t, [59.0], regime0=0, max_switch_rate=5.0)
    assert res.status == 2 and "chattering" in res.message
    assert np.isnan(res.states[-1, 0]) and res.regimes[-1] == -1


def test_sliding_surface_loop_is_stopped():
    # x' = 1 below 0 and x' = -1 above: an ideal sliding mode (infinitely many switches)
    up, down = regime(0, ["1"], [1.0]), regime(1, ["1"], [-1.0])
    guards = [Guard(0, 1, ["x"], np.array([1.0]), 0.0), Guard(1, 0, ["x"], np.array([-1.0]), 0.0)]
    model = HybridModel(
        states=["x"], inputs=[], form="continuous", regimes=[up, down], guards=guards,
        data_range={"x": (-1.0, 1.0)},
    )  # fmt: skip
    res = simulate(model, np.linspace(0, 3, 31), [-1.0], regime0=0)
    assert res.status == 2
    assert res.switches[0][0] == pytest.approx(1.0)


@pytest.mark.parametrize("nonlinear", [False, True])
def test_blowup_stops_and_reports(nonlinear):
    # x' = x from 1 leaves the box [0 - 10*1, 1 + 10*1] = [-10, 11] at t = ln 11
    terms, coef = (["x", "x^2"], [1.0, 0.0]) if nonlinear else (["x"], [1.0])
    model = HybridModel(
        states=["x"], inputs=[], form="continuous", regimes=[regime(0, terms, coef)],
        data_range={"x": (0.0, 1.0)},
    )  # fmt: skip
    t = np.linspace(0.0, 5.0, 501)
    res = simulate(model, t, [1.0], blowup=10.0)
    assert res.status == 1 and "blow-up" in res.message
    reached = np.isfinite(res.states[:, 0])
    # exponential growth exp(t) reaches 11 at ln 11 (common practice)
    assert t[reached][-1] == pytest.approx(np.log(11.0), abs=0.011)
    assert np.all(res.regimes[~reached] == -1)


def test_stiff_regime_uses_implicit_solver_and_is_accurate():
    # x' = -x, y' = -1e4 y (+ zero x^2 term to force the ODE path): stiffness ratio 1e4
    reg = regime(0, ["x", "y", "x^2"], [[-1, 0], [0, -1e4], [0, 0]])
    model = HybridModel(
        states=["x", "y"], inputs=[], form="continuous", regimes=[reg],
        data_range={"x": (0.0, 1.0), "y": (0.0, 1.0)},
    )  # fmt: skip
    t = np.linspace(0.0, 5.0, 51)
    res = simulate(model, t, [1.0, 1.0], rtol=1e-8)
    # analytic: exp(-t) and exp(-1e4 t) (common practice)
    np.testing.assert_allclose(res.states[:, 0], np.exp(-t), atol=1e-6)
    np.testing.assert_allclose(res.states[1:, 1], 0.0, atol=1e-6)
    assert res.nfev < 5000


def test_malformed_requests_raise_simulation_error():
    model = buck()
    t = np.arange(10) * 0.1
    with pytest.raises(SimulationError, match="x0 has 3 values"):
        simulate(model, t, [0.0, 0.0, 0.0], np.zeros((10, 1)))
    with pytest.raises(SimulationError, match="inputs missing"):
        simulate(model, t, [0.0, 0.0])
    with pytest.raises(SimulationError, match=r"inputs have shape \(9, 1\)"):
        simulate(model, t, [0.0, 0.0], np.zeros((9, 1)))
    with pytest.raises(SimulationError, match="strictly increasing"):
        simulate(model, t[::-1], [0.0, 0.0], np.zeros((10, 1)))
    with pytest.raises(SimulationError, match="initial regime 5 is not a regime"):
        simulate(model, t, [0.0, 0.0], np.zeros((10, 1)), regime0=5)


def test_discrete_blowup_stops_at_the_right_sample():
    # x[k+1] = 1.5 x[k] from 1: 1.5**k first exceeds 1 + 10 * 1 = 11 at k = 6
    # (1.5**5 = 7.59, 1.5**6 = 11.39; geometric growth, worked by hand)
    model = HybridModel(
        states=["x"], inputs=[], form="discrete", regimes=[regime(0, ["x"], [1.5])], step=1.0,
        data_range={"x": (0.0, 1.0)},
    )  # fmt: skip
    res = simulate(model, np.arange(20.0), [1.0])
    assert res.status == 1
    np.testing.assert_allclose(res.states[:6, 0], 1.5 ** np.arange(6))
    assert np.all(np.isnan(res.states[6:, 0])) and np.all(res.regimes[6:] == -1)


@pytest.mark.parametrize("nonlinear", [False, True])
def test_linear_hold_input_matches_interpolated_reference(nonlinear):
    # x' = -x + u with u taking many values -> "auto" hold is piecewise-linear interpolation
    terms, coef = (["x", "u", "x^2"], [-1.0, 1.0, 0.0]) if nonlinear else (["x", "u"], [-1.0, 1.0])
    model = HybridModel(
        states=["x"], inputs=["u"], form="continuous", regimes=[regime(0, terms, coef)],
        data_range={"x": (-2.0, 2.0), "u": (-1.0, 1.0)},
    )  # fmt: skip
    t = np.linspace(0.0, 6.0, 61)
    u = np.sin(1.3 * t) + 0.3 * np.cos(5.0 * t)
    res = simulate(model, t, [0.5], u[:, None], rtol=1e-10, atol=1e-12)
    # reference library: solve_ivp with numpy's piecewise-linear interpolation of u
    ref = solve_ivp(
        lambda tt, x: [-x[0] + np.interp(tt, t, u)], (0, 6), [0.5], t_eval=t,
        method="DOP853", rtol=1e-12, atol=1e-12, max_step=0.05,
    )  # fmt: skip
    np.testing.assert_allclose(res.states[:, 0], ref.y[0], atol=1e-7)


# -- every run ends: blow-up box without a data range, budgets, switching loops ------------


def riccati(data_range=None, metadata=None) -> HybridModel:
    """x' = x^2: from x0 = 1 the solution 1 / (1 - t) blows up at t = 1 (common practice)."""
    return HybridModel(
        states=["x"], inputs=[], form="continuous", regimes=[regime(0, ["x^2"], [1.0])],
        data_range=data_range or {}, metadata=metadata or {},
    )  # fmt: skip


def test_blowup_without_a_data_range_stops_at_the_default_box():
    # box: x0 +- 1e6 * max(1, |x0|) = [-999999, 1000001]; 1 / (1 - t) = 1000001 at
    # t = 1 - 1/1000001 (worked by hand).  Near the singularity the solver's dense output
    # overshoots, so the stop is located within 1e-4 before it, never after t = 1.
    t = np.linspace(0.0, 2.0, 201)
    res = simulate(riccati(), t, [1.0])
    assert res.status == 1 and "blow-up" in res.message
    t_stop = float(res.message.split("t=")[1].split(":")[0])
    assert 1 - 1e-4 < t_stop <= 1 - 1 / 1000001
    assert np.all(np.isnan(res.states[t > 1.0, 0]))


def test_blowup_without_a_data_range_falls_back_to_the_training_centroids():
    # x' = x from 1 with centroids 0 and 2: span max(2 - 0, 2, 1) = 2, box [-20, 22];
    # exp(t) reaches 22 at ln 22 (common practice)
    model = HybridModel(
        states=["x"], inputs=[], form="continuous", regimes=[regime(0, ["x", "x^2"], [1.0, 0.0])],
        data_range={"x": (float("nan"), float("nan"))},
        metadata={"regime_centroids": {"0": [0.0], "1": [2.0]}},
    )  # fmt: skip
    t = np.linspace(0.0, 5.0, 501)
    res = simulate(model, t, [1.0])
    assert res.status == 1
    assert t[np.isfinite(res.states[:, 0])][-1] == pytest.approx(np.log(22.0), abs=0.011)


def fast_oscillator(omega: float) -> HybridModel:
    # x' = -omega y, y' = omega x (+ a zero x^2 term: the ODE-solver path)
    reg = regime(0, ["x", "y", "x^2"], [[0, omega], [-omega, 0], [0, 0]])
    return HybridModel(
        states=["x", "y"], inputs=[], form="continuous", regimes=[reg],
        data_range={"x": (-1.0, 1.0), "y": (-1.0, 1.0)},
    )  # fmt: skip


def test_fast_oscillator_over_a_long_horizon_stops_at_the_step_budget():
    # 1e6 rad/s over 1000 s is 1.6e8 periods: far beyond any budget
    t = np.linspace(0.0, 1000.0, 11)
    res = simulate(fast_oscillator(1e6), t, [1.0, 0.0], max_nfev=2000)
    assert res.status == 3 and "step budget of 2000" in res.message
    assert res.nfev == 2001 and np.all(res.regimes[1:] == -1)


def test_step_budget_default_leaves_ordinary_runs_alone():
    # omega = 1: x = cos t, y = sin t (common practice), finished well inside the budget
    t = np.linspace(0.0, 20.0, 201)
    res = simulate(fast_oscillator(1.0), t, [1.0, 0.0], rtol=1e-9, atol=1e-11)
    assert res.status == 0 and res.nfev < 20_000
    np.testing.assert_allclose(res.states[:, 0], np.cos(t), atol=1e-6)


def test_wall_time_budget_stops_a_long_run():
    t = np.linspace(0.0, 1000.0, 11)
    res = simulate(fast_oscillator(1e6), t, [1.0, 0.0], max_nfev=10**9, max_seconds=0.2)
    assert res.status == 3 and "wall-time budget of 0.2 s" in res.message


def test_a_grid_far_finer_than_the_model_step_is_refused_or_bounded():
    model = relaxation_oscillator()
    t = np.arange(100) * 1e-300
    with pytest.raises(SimulationError, match=r"step of 1e-300 after sample \d+ is below 1e-12"):
        simulate(HybridModel(**{**model.__dict__, "step": 0.1}), t, [2.0, 0.0])
    res = simulate(model, t, [2.0, 0.0])  # no sampling step recorded: the budget ends it
    assert res.status == 3 and "step budget of 22000" in res.message


@pytest.mark.parametrize("form", ["continuous", "discrete"])
@pytest.mark.parametrize("terms", [["1"], ["1", "x^2"]])
def test_guards_forming_a_cycle_at_one_instant_stop_with_a_message(form, terms):
    # 0 -> 1 and 1 -> 0 on the same condition x > -1: both fire at once from x0 = 0
    coef = [1.0] + [0.0] * (len(terms) - 1)
    regs = [regime(0, terms, coef), regime(1, terms, coef)]
    guards = [Guard(k, 1 - k, ["x"], np.array([1.0]), 1.0) for k in (0, 1)]
    model = HybridModel(
        states=["x"], inputs=[], form=form, regimes=regs, guards=guards, step=1.0,
        data_range={"x": (-1.0, 1.0)},
    )  # fmt: skip
    res = simulate(model, np.arange(10.0), [0.0], regime0=0)
    assert res.status == 2
    assert "switching loop at one instant (regimes 0 -> 1 -> 0" in res.message


def test_budget_options_are_checked():
    from modemap import ParameterError

    with pytest.raises(ParameterError, match="max_nfev"):
        simulate(relaxation_oscillator(), np.arange(3.0), [0.0, 0.0], max_nfev=0)
    with pytest.raises(ParameterError, match="max_seconds"):
        simulate(relaxation_oscillator(), np.arange(3.0), [0.0, 0.0], max_seconds=-1.0)
