"""Tests of held-out validation (modemap.simulation.validation)."""

from __future__ import annotations

import json

import numpy as np
import pytest
from sklearn.metrics import mean_squared_error, r2_score

from modemap import DataError
from modemap.data.dataset import Dataset, Run
from modemap.data.split import split_holdout
from modemap.model.hybrid import Guard, HybridModel, RegimeModel
from modemap.model.switches import match_switches
from modemap.simulation.validation import one_step_quality, validate


def regime(rid: int, terms: list[str], coef) -> RegimeModel:
    c = np.asarray(coef, dtype=float).reshape(len(terms), -1)
    return RegimeModel(
        id=rid, samples=0, terms=terms, coefficients=c, stderr=0 * c, noise_cov=np.eye(c.shape[1])
    )


def run(name: str, t, x, u=None) -> Run:
    x = np.asarray(x, float).reshape(len(t), -1)
    u = np.zeros((len(t), 0)) if u is None else np.asarray(u, float).reshape(len(t), -1)
    return Run(name, name, np.asarray(t, float), x, u, np.arange(len(t)))


def dataset(runs, states=("x",), inputs=()) -> Dataset:
    return Dataset(
        runs=tuple(runs), time_name="t", state_names=states, input_names=inputs, step=0.1
    )


def switching_model() -> HybridModel:
    """x' = (10 - x) / 2 until x > 5, then x' = -x; switch at t* = 2 ln 2."""
    r0, r1 = regime(0, ["1", "x"], [5.0, -0.5]), regime(1, ["x"], [-1.0])
    g = Guard(0, 1, ["x"], np.array([1.0]), -5.0)
    return HybridModel(
        states=["x"], inputs=[], form="continuous", regimes=[r0, r1], guards=[g],
        data_range={"x": (0.0, 10.0)},
    )  # fmt: skip


def test_split_holdout_runs_and_tails():
    runs = [run(f"r{i}", np.arange(10) * 0.1, np.zeros(10)) for i in range(5)]
    train, test = split_holdout(dataset(runs), 0.25)
    # ceil(0.25 * 5) = 2 whole runs held out, the last ones
    assert [r.name for r in train.runs] == ["r0", "r1", "r2"]
    assert [r.name for r in test.runs] == ["r3", "r4"]
    train, test = split_holdout(dataset(runs[:2]), 0.9)
    assert len(train.runs) == 1 and len(test.runs) == 1  # at least one run stays in train
    single = dataset([run("a", np.arange(100) * 0.1, np.arange(100.0))])
    train, test = split_holdout(single, 0.25)
    assert train.runs[0].n_samples == 75 and test.runs[0].n_samples == 25
    assert test.runs[0].time[0] == pytest.approx(7.5) and test.runs[0].index[0] == 75
    with pytest.raises(DataError, match="fraction"):
        split_holdout(single, 1.5)


def test_match_switches_mutual_nearest():
    mi, pi = match_switches(np.array([1.0, 5.0, 9.0]), np.array([1.2, 8.0, 8.5, 30.0]), window=2.0)
    # worked by hand: 1.0<->1.2 and 9.0<->8.5 are mutual nearest within 2; the nearest
    # prediction of 5.0 is 8.0, whose nearest measurement is 9.0 -> 5.0 stays unmatched
    assert list(zip(mi, pi, strict=True)) == [(0, 0), (2, 2)]


def test_validate_figures_against_hand_computation():
    model = HybridModel(
        states=["x"], inputs=[], form="continuous", regimes=[regime(0, ["x"], [-1.0])],
        data_range={"x": (0.0, 1.0)},
    )  # fmt: skip
    t = np.arange(41) * 0.1
    truth = np.exp(-t)  # analytic solution of x' = -x (common practice)
    meas = truth.copy()
    meas[t >= 2.0 - 1e-9] += 0.2  # an offset from t = 2 on
    meas[0] = 1.0
    out = validate(model, dataset([run("a", t, meas)]), tolerance=0.1)
    r = out["runs"][0]
    span = meas.max() - meas.min()
    # hand computation: RMSE of the offset divided by the measured range
    n_off = np.count_nonzero(t >= 2.0 - 1e-9)
    assert r["nrmse"]["x"] == pytest.approx(np.sqrt(n_off * 0.04 / t.size) / span, rel=1e-5)
    # normalised error 0.2 / span > 0.1 from t = 2: horizon 2
    assert 0.2 / span > 0.1
    assert r["horizon"] == pytest.approx(2.0)
    assert r["status"] == 0 and r["switches_simulated"] == 0 and r["regime_agreement"] is None
    assert out["holdout"] == "tails" and out["tolerance"] == 0.1
    json.dumps(out)  # JSON-friendly
    # a perfect measurement: horizon = whole run, error ~ solver tolerance
    perfect = validate(model, dataset([run("b", t, truth)]))["runs"][0]
    assert perfect["horizon"] == pytest.approx(4.0) and perfect["nrmse"]["x"] < 1e-5


def test_validate_switch_timing_and_agreement():
    model = switching_model()
    t = np.arange(31) * 0.1
    t_star = 2.0 * np.log(2.0)  # 1.3863
    meas = np.where(t < t_star, 10 * (1 - np.exp(-t / 2)), 5 * np.exp(-(t - t_star)))
    labels = (t >= 1.5).astype(int)  # labelled switch at 1.5 (two samples late)
    out = validate(model, dataset([run("a", t, meas)]), labels=[labels])
    r = out["runs"][0]
    assert r["switches_measured"] == 1 and r["switches_simulated"] == 1
    # |1.5 - 2 ln 2| worked by hand
    assert r["switch_timing_error"] == pytest.approx(1.5 - t_star, abs=1e-6)
    # simulated regime is 1 from t = 1.4 on; labels say 1 from 1.5: one sample of 31 differs
    assert r["regime_agreement"] == pytest.approx(30 / 31)
    assert out["summary"]["switches_measured"] == 1
    assert (r["switches_matched"], r["switches_missed"], r["switches_spurious"]) == (1, 0, 0)
    # labels that switch back at 2.5 as well: a measured switch the simulation never makes
    twice = ((t >= 1.5) & (t < 2.5)).astype(int)
    r2 = validate(model, dataset([run("a", t, meas)]), labels=[twice])["runs"][0]
    assert r2["switches_measured"] == 2 and r2["switches_simulated"] == 1
    assert (r2["switches_matched"], r2["switches_missed"], r2["switches_spurious"]) == (1, 1, 0)
    with pytest.raises(DataError, match="labels"):
        validate(model, dataset([run("a", t, meas)]), labels=[labels[:-1]])


def test_validate_reports_a_stopped_simulation():
    model = HybridModel(
        states=["x"], inputs=[], form="continuous", regimes=[regime(0, ["x"], [1.0])],
        data_range={"x": (0.0, 1.0)},
    )  # fmt: skip
    t = np.arange(51) * 0.1
    out = validate(model, dataset([run("a", t, np.ones(51))]), blowup=2.0)
    r = out["runs"][0]
    # exp(t) leaves [-2, 3] at ln 3 = 1.0986 (common practice)
    assert r["status"] == 1 and out["summary"]["n_stopped"] == 1
    assert r["horizon"] <= np.log(3.0) + 0.1


def test_one_step_quality_against_sklearn():
    rng = np.random.default_rng(0)
    model = HybridModel(
        states=["x", "y"], inputs=["u"], form="continuous",
        regimes=[
            regime(0, ["x", "u"], [[-1.0, 0.5], [1.0, 0.0]]),
            regime(1, ["1", "y"], [[2.0, 0.0], [0.0, -3.0]]),
            regime(2, ["1"], [[0.0, 0.0]]),
        ],
    )  # fmt: skip
    Z = rng.normal(size=(200, 3))
    labels = rng.integers(0, 2, 200)
    labels[:5] = -1
    theta0 = np.column_stack([Z[:, 0], Z[:, 2]])
    Y = np.where(
        (labels == 0)[:, None],
        theta0 @ np.array([[-1.0, 0.5], [1.0, 0.0]]),
        np.column_stack([2.0 + 0 * Z[:, 0], -3.0 * Z[:, 1]]),
    ) + rng.normal(0, 0.3, (200, 2))
    out = one_step_quality(model, Z, Y, labels)
    for rid, coef_pred in (
        ("0", lambda z: np.column_stack([-z[:, 0] + z[:, 2], 0.5 * z[:, 0]])),
        ("1", lambda z: np.column_stack([2.0 + 0 * z[:, 0], -3.0 * z[:, 1]])),
    ):
        rows = labels == int(rid)
        pred = coef_pred(Z[rows])
        for j, s in enumerate(["x", "y"]):
            # reference library: sklearn.metrics.r2_score / mean_squared_error
            assert out[rid]["r2"][s] == pytest.approx(r2_score(Y[rows, j], pred[:, j]))
            rmse = np.sqrt(mean_squared_error(Y[rows, j], pred[:, j]))
            assert out[rid]["rmse"][s] == pytest.approx(rmse)
        assert out[rid]["samples"] == int(rows.sum())
    assert out["2"]["samples"] == 0 and out["2"]["r2"]["x"] is None
    json.dumps(out)
