"""RegimeFinder on the three invented demo scenarios (modemap.demos), against their truth.

The demo frames carry ``true_regime``: the regime active over ``[t_k, t_k+1)``, which is the
regime of regression row ``k`` in discrete form (row ``k`` models the state at ``k + 1``).
The scenarios switch on a fast clock (PWM) or at threshold crossings, and the discrete form
needs no derivatives, so it is the form checked for labels and the number of regimes.  The
coefficients are checked in the continuous form as well (the estimator's default:
derivatives re-estimated within regime stretches, then the integral-form refit), where the
truth's ODE coefficients are read off directly; end-to-end fits with every default are in
test_identify_demos.py.  Checks marked ``xfail(strict=True)`` are targets we measured as not
met (numbers in the reason); they turn into failures the day they pass, so the marker must
then be removed.
"""

from __future__ import annotations

import numpy as np
import pytest
from scipy.linalg import logm
from scipy.optimize import linear_sum_assignment

from modemap.data.intake import read_data
from modemap.demos import make_demo
from modemap.fit.local_model import AffineLocalModel, SparseLocalModel
from modemap.regimes import RegimeFinder

pytestmark = pytest.mark.slow


def _fit(name: str, inputs: list[str], *, model: str = "sparse", terms=None, **options):
    frame, truth = make_demo(name, seed=0)
    states = [s["column"] for s in truth["states"]]
    ds = read_data(frame, time=frame.columns[0], states=states, inputs=inputs, run="run")
    local = AffineLocalModel() if model == "affine" else SparseLocalModel(terms=terms)
    options = {
        "form": "discrete",
        "min_dwell": 2,
        "max_regimes": 3,
        "local_model": local,
        **options,
    }
    finder = RegimeFinder(**options).fit(ds)
    return finder, frame["true_regime"].to_numpy(), truth, ds


def _matching(labels: np.ndarray, truth: np.ndarray) -> tuple[float, dict[int, int]]:
    """Accuracy after the best id matching (scipy's assignment solver) and the matching."""
    k = int(max(labels.max(), truth.max())) + 1
    c = np.array([[np.sum((labels == i) & (truth == j)) for j in range(k)] for i in range(k)])
    rows, cols = linear_sum_assignment(-c)
    return c[rows, cols].sum() / labels.size, dict(zip(rows.tolist(), cols.tolist(), strict=True))


@pytest.fixture(scope="module")
def buck():
    # the gate column is left out: it *is* the regime; the states alone must reveal it
    return _fit("buck", [], model="affine")


@pytest.fixture(scope="module")
def heaters():
    return _fit("water_heaters", ["w [L/min]", "shed"], terms=["1", "T", "w", "T*w"])


@pytest.fixture(scope="module")
def heaters_continuous():
    # the estimator's defaults (continuous form, derivatives re-estimated within regime
    # stretches, K = 1..6 by BIC) on the true terms
    options = {"form": "continuous", "min_dwell": 1, "max_regimes": 6}
    return _fit("water_heaters", ["w [L/min]", "shed"], terms=["1", "T", "w", "T*w"], **options)


@pytest.fixture(scope="module")
def reactor():
    # both regimes share one vector field (bistable): only where the state sits tells them
    # apart, hence the location term
    terms = ["1", "C_A", "T", "Tc", "C_A*exp(-8750/T)"]
    return _fit("reactor", ["Tc [K]"], terms=terms, n_regimes=2, location_weight=1.0)


def test_buck_regimes_and_equations(buck) -> None:
    finder, truth_labels, truth, ds = buck
    assert finder.n_regimes_ == 2
    assert [lab.size for lab in finder.labels_] == ds.lengths.tolist()  # one label per sample
    acc, match = _matching(np.concatenate(finder.labels_), truth_labels)
    assert acc >= 0.97
    for ours, fit in enumerate(finder.local_fits_):
        true = truth["regimes"][match[ours]]["coefficients"]
        # exact discrete -> continuous map of an affine system: A = logm(Ad) / dt,
        # c = A (Ad - I)^-1 cd (matrix exponential solution, textbook)
        cd, ad = fit.coef[0], fit.coef[1:].T
        a = np.real(logm(ad)) / ds.step
        c = a @ np.linalg.solve(ad - np.eye(2), cd)
        for j, state in enumerate(ds.state_names):
            for term, value in true[state].items():
                got = c[j] if term == "1" else a[j, ds.state_names.index(term)]
                assert got == pytest.approx(value, rel=0.03), (ours, state, term)


def test_water_heaters_regimes(heaters) -> None:
    finder, truth_labels, _, _ = heaters
    assert finder.n_regimes_ == 2
    acc, _ = _matching(np.concatenate(finder.labels_), truth_labels)
    assert acc >= 0.97


def test_water_heaters_coefficients(heaters_continuous) -> None:
    # the demo's sheds take the tank from 60 down to 15-25 degC and the recoveries back up,
    # so the constant, T, w and T*w terms are separable in both regimes (measured, seed 0:
    # worst 0.19 %, the heater-off constant; generator seeds 0-7 gave 0.05-0.33 %, and auto
    # chose 2 on all eight; with the final fit on the derivatives: 1.78 %, seeds 0.86-4.09 %)
    finder, truth_labels, truth, _ = heaters_continuous
    assert finder.n_regimes_ == 2
    acc, match = _matching(np.concatenate(finder.labels_), truth_labels)
    assert acc >= 0.97
    for ours, fit in enumerate(finder.local_fits_):
        true = truth["regimes"][match[ours]]["coefficients"]["T"]
        for term, value in true.items():
            got = fit.coef[fit.terms.index(term), 0]
            assert got == pytest.approx(value, rel=0.03), (match[ours], term)


def test_water_heaters_labels_change_at_the_shed_edges(heaters_continuous) -> None:
    # a shed start turns a running heater off, a shed end turns it back on, exactly at the
    # sample where the flag steps (truth sidecar); the labels must change at that sample, not
    # one later (measured before stretches were cut at every stepped input: 6 of 12 late)
    finder, truth_labels, _, ds = heaters_continuous
    labels = np.concatenate(finder.labels_)
    _, match = _matching(labels, truth_labels)
    ours = np.vectorize(match.get)(labels)
    shed = np.concatenate([run.inputs[:, ds.input_names.index("shed")] for run in ds.runs])
    starts = np.concatenate([[0], np.cumsum(ds.lengths)[:-1]])
    edges = np.flatnonzero(np.diff(shed)) + 1
    edges = edges[~np.isin(edges, starts)]
    switched = edges[truth_labels[edges] != truth_labels[edges - 1]]
    assert switched.size >= 8
    for e in switched:
        assert ours[e - 1] == truth_labels[e - 1] and ours[e] == truth_labels[e], e


def test_water_heaters_coefficients_discrete_form(heaters) -> None:
    # a row whose 10 s interval holds a thermostat switch mixes both regimes; the regimes
    # are fitted without the last row of each stretch (measured, seed 0: worst 2.09 %, the
    # heater-off constant; with those rows the heater-on T coefficient was +6.9 %)
    finder, truth_labels, truth, ds = heaters
    _, match = _matching(np.concatenate(finder.labels_), truth_labels)
    for ours, fit in enumerate(finder.local_fits_):
        true = truth["regimes"][match[ours]]["coefficients"]["T"]
        cont = fit.coef[:, 0].copy()
        cont[fit.terms.index("T")] -= 1.0
        cont /= ds.step  # first-order map x[k+1] = x + dt f(x): (a + b w) dt < 0.004 here
        for term, value in true.items():
            assert cont[fit.terms.index(term)] == pytest.approx(value, rel=0.03)


def test_reactor_regimes_with_location(reactor) -> None:
    finder, truth_labels, _, _ = reactor
    acc, _ = _matching(np.concatenate(finder.labels_), truth_labels)
    assert acc >= 0.97


def _reactor_truth(truth) -> dict[str, dict[str, float]]:
    """The CSTR balances of the truth sidecar (both regimes share them), term by term."""
    p = truth["parameters"]
    dilution, cooling = p["q"] / p["V"], p["UA"] / (p["V"] * p["rho_cp"])
    return {
        "C_A": {"1": dilution * p["C_Af"], "C_A": -dilution, "C_A*exp(-8750/T)": -p["k0"]},
        "T": {
            "1": dilution * p["T_f"],
            "T": -dilution - cooling,
            "Tc": cooling,
            "C_A*exp(-8750/T)": -p["dH"] / p["rho_cp"] * p["k0"],
        },
    }


def _check_balances(finder, ds, truth) -> None:
    true = _reactor_truth(truth)
    for fit in finder.local_fits_:
        for j, state in enumerate(ds.state_names):
            kept = {t for t, on in zip(fit.terms, fit.support[:, j], strict=True) if on}
            assert kept == set(true[state]), (state, kept)
            for term, value in true[state].items():
                coef = fit.coef[fit.terms.index(term), j]
                assert coef == pytest.approx(value, rel=0.03), (state, term)


@pytest.fixture(scope="module")
def reactor_one_field():
    # the estimator's defaults (continuous form, K by BIC, integral-form refit) with the
    # Arrhenius term among the candidates and no location term
    terms = ["1", "C_A", "T", "Tc", "C_A*exp(-8750/T)"]
    options = {"form": "continuous", "min_dwell": 1, "max_regimes": 6}
    return _fit("reactor", ["Tc [K]"], terms=terms, **options)


def test_reactor_balances_with_the_arrhenius_term(reactor_one_field) -> None:
    # every regime found carries the truth's balances: the exact terms and each coefficient
    # within 3 % (measured: one regime, worst 0.38 %, the T constant; generator seeds 0-5:
    # one regime each, the exact terms on five, worst 0.38-0.75 % there, 2.8 % on seed 3)
    finder, _, truth, ds = reactor_one_field
    _check_balances(finder, ds, truth)


def test_reactor_arrhenius_library_finds_one_vector_field(reactor_one_field) -> None:
    # with the true rate law among the candidates, the two branches are one set of equations
    # (the truth sidecar's regimes share them) and BIC keeps one regime; with the default
    # polynomial terms each branch gets its own approximation and auto chooses two
    # (tests/test_identify_demos.py)
    finder, _, _, _ = reactor_one_field
    assert finder.n_regimes_ == 1


def test_reactor_coefficients_per_branch() -> None:
    # two regimes told apart by where the state sits (the location term, its covariance
    # shared by the regimes): each branch must carry the true balances, exact terms and
    # every coefficient within 3 %.  Measured: labels 98.9 %, worst 1.32 % (high branch)
    # and 0.30 % (low).  The weight matters: at 1 the labels are 97.6 % right but the high
    # branch loses part of its ignition and extinction transients and keeps wrong terms
    # (its C_A constant 20.5 % off); 3 and 10 give the same fit.  With one location
    # covariance per regime the transients went to the low branch at any weight (95 %).
    # Generator seeds 0-5 at weight 3: labels 98.6-98.9 % right, the low branch exact on
    # all (worst 0.11-0.59 %), the high branch exact on three (0.69-1.55 %) and one term
    # off on the other three (worst 2.5-4.4 %): the high branch is at the edge of what its
    # data can separate, so this check on seed 0 is not a guarantee for every log.
    terms = ["1", "C_A", "T", "Tc", "C_A*exp(-8750/T)"]
    options = {"form": "continuous", "min_dwell": 1, "n_regimes": 2, "location_weight": 3.0}
    finder, truth_labels, truth, ds = _fit("reactor", ["Tc [K]"], terms=terms, **options)
    acc, _ = _matching(np.concatenate(finder.labels_), truth_labels)
    assert acc >= 0.97
    _check_balances(finder, ds, truth)


@pytest.mark.xfail(
    strict=True,
    reason="measured: with identical dynamics in both regimes, BIC with the location term "
    "keeps adding regimes up to 6 (69 % accuracy; log-likelihood 21631, 45068, 52401, "
    "54900, 56388, 57725 for K = 1..6). The six are operating clusters, one Gaussian each: "
    "each branch's holds at 304 K, each branch's holds at 296-300 K, the ignition "
    "transients (Tc 320 K) and the extinction ones (Tc 276 K). With max_regimes=3, K = 3 "
    "and 95 % of labels right. Sharing the location covariance between the regimes, or "
    "letting the location mean follow the inputs (tried), did not change the choice; the "
    "dynamics-only log-likelihood also grows with K in discrete form (+500 from K = 1 to 2, "
    "+1200 from 2 to 3), so leaving the location density out of BIC does not fix it. In "
    "continuous form without the location term, auto keeps one regime (one vector field)",
)
def test_reactor_auto_chooses_two() -> None:
    terms = ["1", "C_A", "T", "Tc", "C_A*exp(-8750/T)"]
    finder, _, _, _ = _fit("reactor", ["Tc [K]"], terms=terms, location_weight=1.0, max_regimes=6)
    assert finder.n_regimes_ == 2
