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
from modemap.terms.library import TermLibrary

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
    for fit in finder.local_fits_:
        _check_fit(fit, ds, truth)


def _check_fit(fit, ds, truth) -> None:
    true = _reactor_truth(truth)
    for j, state in enumerate(ds.state_names):
        kept = {t for t, on in zip(fit.terms, fit.support[:, j], strict=True) if on}
        assert kept == set(true[state]), (state, kept)
        for term, value in true[state].items():
            coef = fit.coef[fit.terms.index(term), j]
            assert coef == pytest.approx(value, rel=0.03), (state, term)


def _field_error(finder, ds, truth, labels_from) -> list[float]:
    """Per regime: RMS difference between the regime's fitted right-hand side and the
    truth's balances on the regime's own samples, over the spread of the true right-hand
    side there, worst state.  Measures the field, not the coefficients: at one operating
    point a constant and a state term can trade places without changing the field."""
    true = _reactor_truth(truth)
    names = list(ds.variable_names)
    z = np.vstack([np.hstack([r.states, r.inputs]) for r in ds.runs])
    labels = np.concatenate(labels_from)
    out = []
    for k, fit in enumerate(finder.local_fits_):
        lib = TermLibrary.from_terms(fit.terms, names)
        own = z[labels == k]
        theta = lib.transform(own)
        worst = 0.0
        for j, state in enumerate(ds.state_names):
            ref = TermLibrary.from_terms(list(true[state]), names).transform(own)
            f_true = ref @ np.array(list(true[state].values()))
            err = theta @ fit.coef[:, j] - f_true
            worst = max(worst, float(np.sqrt(np.mean(err**2)) / np.std(f_true)))
        out.append(worst)
    return out


def test_reactor_one_field_with_the_arrhenius_term() -> None:
    # a user who states one regime and gives the true rate law among the candidates gets the
    # truth's balances: the exact terms and each coefficient within 3 % (measured: worst
    # 0.38 %, the T constant)
    terms = ["1", "C_A", "T", "Tc", "C_A*exp(-8750/T)"]
    options = {"form": "continuous", "min_dwell": 1, "n_regimes": 1}
    finder, _, truth, ds = _fit("reactor", ["Tc [K]"], terms=terms, **options)
    _check_balances(finder, ds, truth)


@pytest.mark.xfail(
    strict=True,
    reason="measured: K left to the criterion gives two regimes by branch (log-likelihood "
    "3866 at K = 1, 4039 at K = 2 on 2284 integral windows; labels 95.7 %); the low "
    "branch's field is right (0.2 % of its spread) but the high branch's C_A balance "
    "takes T instead of C_A (37 % of its spread): along that branch C_A and T move "
    "together, and with noisy states in the terms two attenuated fits beat one exact "
    "field by more than the criterion charges (docs/method.md, limits)",
)
def test_reactor_arrhenius_library_auto_keeps_the_field() -> None:
    # with the true rate law among the candidates, the two branches are one field (the
    # truth sidecar's regimes share it): at most the branches as regimes, each with the
    # true field on its own samples
    terms = ["1", "C_A", "T", "Tc", "C_A*exp(-8750/T)"]
    options = {"form": "continuous", "min_dwell": 1, "max_regimes": 6}
    finder, _, truth, ds = _fit("reactor", ["Tc [K]"], terms=terms, **options)
    assert finder.n_regimes_ <= 2
    assert max(_field_error(finder, ds, truth, finder.labels_)) < 0.05


def test_reactor_coefficients_per_branch() -> None:
    # two regimes told apart by where the state sits (the location term, its covariance
    # shared by the regimes): labels by branch, the low branch with the exact terms and
    # every coefficient within 3 % (measured 0.30 %), and the high branch's field right on
    # its samples.  The high branch's coefficients are at the edge of what its data can
    # separate (generator seeds 0-5 at weight 3, earlier method: exact on three, one term
    # off on the other three; seed 0 here: a C_A term of -2.59 in the T balance with the
    # constant 5 % off, which trade places at the branch's operating point)
    terms = ["1", "C_A", "T", "Tc", "C_A*exp(-8750/T)"]
    options = {"form": "continuous", "min_dwell": 1, "n_regimes": 2, "location_weight": 3.0}
    finder, truth_labels, truth, ds = _fit("reactor", ["Tc [K]"], terms=terms, **options)
    acc, _ = _matching(np.concatenate(finder.labels_), truth_labels)
    assert acc >= 0.97  # measured 98.4 %
    errors = _field_error(finder, ds, truth, finder.labels_)
    assert max(errors) < 0.05
    labels = np.concatenate(finder.labels_)
    temperature = np.concatenate([r.states[:, 1] for r in ds.runs])
    low = int(np.argmin([temperature[labels == k].mean() for k in range(2)]))
    _check_fit(finder.local_fits_[low], ds, truth)
