"""HybridIdentifier end to end on the three invented demo datasets (continuous form, defaults).

Each fixture runs what ``modemap fit datasets/<name>.csv --time t --states ... --inputs ...
--run run`` runs: :func:`modemap.read_data` then ``HybridIdentifier().fit`` with default options
(one run of four held out for validation).  The reference values come from outside the fit: the
truth sidecars ``datasets/<name>.truth.json`` (written by the seeded generators of
:mod:`modemap.demos`), textbook converter equations, and ``scipy.optimize.fsolve`` on the true
reactor model.  Checks marked ``xfail(strict=True)`` are targets measured as not met (figures in
the reason); they fail the day they pass, so the marker must then be removed.
"""

from __future__ import annotations

import json
from pathlib import Path

import numpy as np
import pandas as pd
import pytest
from scipy.optimize import linear_sum_assignment

from modemap import read_data
from modemap.demos import reactor as reactor_demo
from modemap.identify.identifier import HybridIdentifier
from modemap.simulation.simulator import simulate

pytestmark = pytest.mark.slow

DATA = Path(__file__).resolve().parents[1] / "datasets"


def _identify(name: str, states: list[str], inputs: list[str]):
    ds = read_data(DATA / f"{name}.csv", time="t", states=states, inputs=inputs, run="run")
    ident = HybridIdentifier().fit(ds)
    frame = pd.read_csv(DATA / f"{name}.csv")
    truth = json.loads((DATA / f"{name}.truth.json").read_text(encoding="utf-8"))
    return ident, ds, frame, truth


def _matching(labels: np.ndarray, truth: np.ndarray) -> tuple[float, dict[int, int]]:
    """Accuracy after the best id matching (scipy's assignment solver) and ours -> true ids."""
    k = int(max(labels.max(), truth.max())) + 1
    counts = np.zeros((k, k))
    np.add.at(counts, (labels, truth), 1)
    rows, cols = linear_sum_assignment(-counts)
    match = dict(zip(rows.tolist(), cols.tolist(), strict=True))
    return float(counts[rows, cols].sum() / labels.size), match


# --------------------------------------------------------------------------------- buck
@pytest.fixture(scope="module")
def buck():
    return _identify("buck", ["i_L", "v_C"], ["g"])


def test_buck_two_regimes_with_textbook_matrices(buck) -> None:
    ident, _, frame, truth = buck
    model = ident.model_
    assert model.n_regimes == 2
    acc, match = _matching(ident.labels_["regime"].to_numpy(), frame["true_regime"].to_numpy())
    assert acc >= 0.97
    for reg in model.regimes:
        # ideal buck in continuous conduction, switch on / off: L di/dt = g V_in - v,
        # C dv/dt = i - v/R ("Fundamentals of Power Electronics", Springer, 3rd ed. 2020,
        # chapter 2); the truth sidecar holds these coefficients for L, C, R, V_in of the demo
        true = truth["regimes"][match[reg.id]]["coefficients"]
        for j, state in enumerate(model.states):
            for term, value in true[state].items():
                got = reg.coefficients[reg.terms.index(term), j]
                assert got == pytest.approx(value, rel=0.03), (reg.id, state, term)
            others = [t for t in reg.terms if t not in true[state]]
            for term in others:  # no spurious term: below 3 % of the 1/L, 1/C entries (10)
                assert abs(reg.coefficients[reg.terms.index(term), j]) < 0.03 * 10.0


def test_buck_held_out_labels_follow_the_gate(buck) -> None:
    # the gate steps on the sample grid and the true regime is the gate (truth sidecar); the
    # held-out run is labelled by predict, whose derivatives are not taken across the gate's
    # steps (measured: 100 % of the held-out samples; 97.6 % with whole-run derivatives)
    ident, _, frame, _ = buck
    _, match = _matching(ident.labels_["regime"].to_numpy(), frame["true_regime"].to_numpy())
    held = frame["run"].astype(str).isin([str(r.origin) for r in ident.test_.runs]).to_numpy()
    ours = np.vectorize(match.get)(ident.labels_["regime"].to_numpy()[held])
    assert np.mean(ours == frame["true_regime"].to_numpy()[held]) >= 0.999


def test_buck_guards_switch_on_the_gate(buck) -> None:
    ident, _, _, _ = buck
    guards = ident.model_.guards
    assert {(g.source, g.target) for g in guards} == {(0, 1), (1, 0)}
    for g in guards:
        w = np.asarray(g.weights)
        used = [t for t, c in zip(g.terms, w, strict=True) if c != 0]
        assert used == ["g"], g.text
        threshold = -g.offset / w[g.terms.index("g")]
        assert 0.0 < threshold < 1.0  # the gate takes the values 0 and 1 (truth sidecar)


def test_buck_resimulated_mean_voltage(buck) -> None:
    ident, _, _, truth = buck
    test = ident.test_.runs[0]
    sim = simulate(ident.model_, test.time, test.states[0], test.inputs, None)
    p = truth["parameters"]
    # volt-second balance of the ideal converter in continuous conduction: mean v_C = D V_in
    # (same textbook, chapter 2); D measured from the gate over the second half (after start-up)
    half = test.time.size // 2
    duty = float(test.inputs[half:, 0].mean())
    mean_v = float(sim.states[half:, 1].mean())
    assert mean_v == pytest.approx(duty * p["V_in"], rel=0.01)


# ------------------------------------------------------------------------ water heaters
@pytest.fixture(scope="module")
def heaters():
    return _identify("water_heaters", ["T"], ["w", "shed"])


def test_heaters_labels(heaters) -> None:
    ident, _, frame, _ = heaters
    assert ident.model_.n_regimes == 2
    acc, _ = _matching(ident.labels_["regime"].to_numpy(), frame["true_regime"].to_numpy())
    assert acc >= 0.97


def test_heaters_energy_balance_coefficients(heaters) -> None:
    # the default degree-2 library on T, w and shed: the selection must find the energy
    # balance's four terms (no T^2, w^2, shed terms) and each coefficient within 3 %
    # (measured: worst 0.20 %, heater-on T; 0.82 % with the final fit on the derivatives)
    ident, _, frame, truth = heaters
    _, match = _matching(ident.labels_["regime"].to_numpy(), frame["true_regime"].to_numpy())
    for reg in ident.model_.regimes:
        true = truth["regimes"][match[reg.id]]["coefficients"]["T"]
        coef = dict(zip(reg.terms, np.asarray(reg.coefficients)[:, 0], strict=True))
        assert {t for t, c in coef.items() if c != 0} == set(true), reg.id
        for term, value in true.items():
            assert coef[term] == pytest.approx(value, rel=0.03), (reg.id, term)


def _guard_value(guard, **values: float) -> float:
    weights = dict(zip(guard.terms, np.asarray(guard.weights), strict=True))
    return float(sum(w * values[t] for t, w in weights.items()) + guard.offset)


def test_heaters_thermostat_thresholds_and_hysteresis(heaters) -> None:
    ident, _, frame, truth = heaters
    model = ident.model_
    _, match = _matching(ident.labels_["regime"].to_numpy(), frame["true_regime"].to_numpy())
    on = next(k for k, v in match.items() if v == 1)
    off = 1 - on
    assert model.guard_kind == "per-source"
    rules = truth["switching"]
    guards = {g.source: g for g in model.guards}
    assert set(guards) == {0, 1}

    def crossing(guard, shed: float, w: float = 0.0) -> float:
        """T where the guard changes sign (it is linear in T)."""
        g0 = _guard_value(guard, T=0.0, w=w, shed=shed)
        slope = _guard_value(guard, T=1.0, w=w, shed=shed) - g0
        return -g0 / slope

    # hysteresis thermostat of the truth sidecar: off -> on when T falls to T_low,
    # on -> off when T rises to T_high (no shed, at the median draw: the learnt guards
    # may lean on w a little; measured: 0.007 K per L/min off -> on, 0.018 on -> off)
    w = float(frame["w [L/min]"].median())
    assert _guard_value(guards[off], T=rules["T_low"] - 1.0, w=w, shed=0.0) > 0
    assert crossing(guards[off], shed=0.0, w=w) == pytest.approx(rules["T_low"], abs=0.3)
    assert _guard_value(guards[on], T=rules["T_high"] + 1.0, w=w, shed=0.0) > 0
    assert crossing(guards[on], shed=0.0, w=w) == pytest.approx(rules["T_high"], abs=0.3)
    # during a shed the heater does not come on, down to the coldest logged temperature,
    # and a shed start turns a running heater off at any temperature of the thermostat band
    cold = float(frame["T [degC]"].min())
    for w in (0.0, 6.0):
        for temp in (cold, rules["T_low"] - 1.0):
            assert _guard_value(guards[off], T=temp, w=w, shed=1.0) < 0, (w, temp)
        for temp in (rules["T_low"] - 3.0, rules["T_high"] - 0.5):
            assert _guard_value(guards[on], T=temp, w=w, shed=1.0) > 0, (w, temp)


def test_heaters_resimulated_duty_cycle(heaters) -> None:
    ident, _, frame, _ = heaters
    _, match = _matching(ident.labels_["regime"].to_numpy(), frame["true_regime"].to_numpy())
    on = next(k for k, v in match.items() if v == 1)
    for run in ident.test_.runs:  # held-out runs only
        sim = simulate(ident.model_, run.time, run.states[0], run.inputs, None)
        rows = frame["run"].astype(str).to_numpy() == str(run.origin)
        measured = float(np.mean(frame["true_regime"].to_numpy()[rows] == 1))
        simulated = float(np.mean(sim.regimes == on))
        assert simulated == pytest.approx(measured, rel=0.02)


# ------------------------------------------------------------------------------ reactor
@pytest.fixture(scope="module")
def reactor():
    return _identify("reactor", ["C_A", "T"], ["Tc"])


def test_reactor_auto_chooses_two_regimes(reactor) -> None:
    ident, _, _, _ = reactor
    # the truth sidecar names two regimes: the low- and the high-conversion branch
    assert ident.model_.n_regimes == 2


def test_reactor_regimes_are_the_two_branches(reactor) -> None:
    ident, _, frame, _ = reactor
    acc, _ = _matching(ident.labels_["regime"].to_numpy(), frame["true_regime"].to_numpy())
    # truth sidecar label rule: conversion above or below 0.5; measured 98.1 %
    assert acc >= 0.95


def test_reactor_stable_steady_states_are_reachable_equilibria(reactor) -> None:
    ident, _, frame, _ = reactor
    assert ident.model_.n_regimes == 2
    labels = ident.labels_["regime"].to_numpy()
    _, match = _matching(labels, frame["true_regime"].to_numpy())
    tc = frame["Tc [K]"].to_numpy()
    for reg in ident.model_.regimes:
        # the Tc level the regime sits at most: where identify.py evaluates the inputs
        levels, counts = np.unique(tc[labels == reg.id], return_counts=True)
        level = float(levels[np.argmax(counts)])
        # steady states of the true (Arrhenius) model by scipy.optimize.fsolve at that level
        states = reactor_demo.steady_states(level)
        target = states[0] if match[reg.id] == 0 else states[-1]
        assert target["stability"] == "stable"
        hits = [
            q
            for q in reg.equilibria
            if q.inside
            and abs(q.point["C_A"] - target["C_A"]) <= 0.01 * target["C_A"]
            and abs(q.point["T"] - target["T"]) <= 0.01 * target["T"]
        ]
        assert hits, (reg.id, level, [(q.point, q.stability, q.inside) for q in reg.equilibria])
        assert hits[0].stability.startswith("stable")


def test_reactor_middle_steady_state_reported_unstable(reactor) -> None:
    ident, _, frame, _ = reactor
    levels, counts = np.unique(frame["Tc [K]"].to_numpy(), return_counts=True)
    level = float(levels[np.argmax(counts)])  # the level both regimes sit at most
    # fsolve on the true model: low stable, middle saddle, high stable (sorted by T)
    low, middle, high = reactor_demo.steady_states(level)
    assert middle["stability"] == "saddle"
    # the issue allows "reported as a saddle/unstable equilibrium": one of the regimes must
    # report an unstable equilibrium strictly between the two stable branches (measured: a
    # saddle at C_A 0.604 / T 343.0 in the low-conversion regime; fsolve 0.543 / 347.6)
    between = [
        q
        for reg in ident.model_.regimes
        for q in reg.equilibria
        if not q.stability.startswith("stable")
        and low["T"] < q.point["T"] < high["T"]
        and high["C_A"] < q.point["C_A"] < low["C_A"]
    ]
    assert between, [(q.point, q.stability) for r in ident.model_.regimes for q in r.equilibria]


def test_reactor_equilibria_carry_standard_errors(reactor) -> None:
    ident, _, _, _ = reactor
    for reg in ident.model_.regimes:
        for q in reg.equilibria:
            assert q.stderr is not None and set(q.stderr) == {"C_A", "T"}
            assert all(0.0 < v < np.inf for v in q.stderr.values())
            if q.stability.startswith("stable"):
                # noise of the demo (truth sidecar): 0.003 mol/L and 0.2 K per sample; the
                # steady states, seen by thousands of samples, come out well below it
                # (measured 0.0006-0.0012 mol/L and 0.07-0.09 K)
                assert q.stderr["C_A"] < 0.003 and q.stderr["T"] < 0.2
