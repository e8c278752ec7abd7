"""The whole pipeline as one estimator (modemap.identify.identifier)."""

from __future__ import annotations

import numpy as np
import pytest
from sklearn.base import clone

import modemap
from modemap.identify import HybridIdentifier, labels_frame
from modemap.regimes import RegimeFinder
from relay_data import relay_frame


@pytest.fixture(scope="module")
def relay():
    frame = relay_frame()
    ds = modemap.read_data(frame, time="t", states=["x"], run="run")
    return frame, ds, HybridIdentifier().fit(ds)


def test_relay_oscillator_is_recovered(relay) -> None:
    frame, _, ident = relay
    model = ident.model_
    assert model.n_regimes == 2 and model.guard_kind == "per-source"
    # The two first-order responses dx/dt = -x and dx/dt = 10 - x (textbook first-order
    # system, common practice): coefficients within 0.5 %.
    rhs = {}
    for r in model.regimes:
        coef = dict(zip(r.terms, r.coefficients[:, 0], strict=True))
        rhs[round(coef.get("1", 0.0))] = coef
    assert rhs[0]["x"] == pytest.approx(-1.0, rel=5e-3)
    assert rhs[10]["1"] == pytest.approx(10.0, rel=5e-3)
    assert rhs[10]["x"] == pytest.approx(-1.0, rel=5e-3)
    # hysteresis: switch on below 2, off above 8, as one-variable thresholds
    thresholds = sorted(-g.offset / g.weights[g.terms.index("x")] for g in model.guards)
    assert thresholds == pytest.approx([2.0, 8.0], abs=0.02)
    # the family was chosen by the evidence of hysteresis, recorded in the model's metadata
    evidence = model.metadata["guard_evidence"]
    assert evidence["hysteresis"] and evidence["family"] == "per-source"
    assert evidence["chosen_by"] == "evidence" and evidence["gain"] > evidence["margin"]
    assert set(model.metadata["guard_significance"]) == {"0->1", "1->0"}
    # both equilibria (0 and 10) are virtual: the relay switches before reaching them
    assert all(not e.inside for r in model.regimes for e in r.equilibria)
    # every sample labelled as the truth, up to the naming of ids
    lab = ident.labels_["regime"].to_numpy()
    truth = frame["true_regime"].to_numpy()
    assert max(np.mean(lab == truth), np.mean(lab != truth)) > 0.995


def test_validation_describes_the_saved_model(relay) -> None:
    _, _, ident = relay
    val = ident.model_.validation
    assert val["holdout"] == "runs" and len(val["runs"]) == 1
    run = val["runs"][0]
    assert run["status"] == 0 and run["nrmse"]["x"] < 0.01
    assert run["switches_measured"] == run["switches_simulated"]
    assert set(val["one_step"]) == {"0", "1"}
    # the held-out run was not used for the fit
    assert {r.name for r in ident.train_.runs}.isdisjoint({r.name for r in ident.test_.runs})


def test_labels_frame_has_one_row_per_input_row_in_order(relay) -> None:
    frame, ds, ident = relay
    labels = ident.labels_
    assert list(labels.columns) == ["run", "time", "regime"]
    assert len(labels) == len(frame)
    np.testing.assert_array_equal(labels["time"].to_numpy(), frame["t [s]"].to_numpy())
    assert labels["run"].tolist() == frame["run"].astype(str).tolist()
    assert (labels["regime"] >= 0).all()
    # labels_frame leaves rows without a label at -1
    partial = labels_frame(ds, {})
    assert (partial["regime"] == -1).all() and len(partial) == len(frame)


def test_estimator_conventions() -> None:
    est = HybridIdentifier.from_options(n_regimes=2, degree=1, seed=3)
    twin = clone(est)

    def settings(e):  # every nested setting that is a value (sub-estimators are new copies)
        return {k: v for k, v in e.get_params(deep=True).items() if not hasattr(v, "get_params")}

    assert settings(twin) == settings(est) and repr(twin) == repr(est)
    assert twin.regimes is not est.regimes
    assert not hasattr(twin, "model_")
    # scikit-learn's nested parameters reach every stage's settings (sklearn.base)
    deep = est.get_params(deep=True)
    assert deep["regimes__local_model__degree"] == 1 and deep["guards__seed"] == 3
    est.set_params(regimes__sticky=0.995, regimes__local_model__threshold=0.05)
    assert est.regimes.sticky == 0.995 and est.regimes.local_model.threshold == 0.05


@pytest.mark.parametrize(
    "params, message",
    [
        ({"form": "sideways"}, "form"),
        ({"model": "neural"}, "model"),
        ({"n_regimes": 0}, "regimes"),
        ({"holdout": 1.5}, "holdout"),
    ],
)
def test_bad_parameters_are_reported_at_fit(relay, params, message) -> None:
    _, ds, _ = relay
    with pytest.raises(modemap.ParameterError, match=message):
        HybridIdentifier.from_options(**params).fit(ds)


def test_single_run_holds_out_its_tail() -> None:
    frame = relay_frame(n_runs=1, duration=30.0)
    ds = modemap.read_data(frame, time="t", states=["x"], run="run")
    ident = HybridIdentifier(regimes=RegimeFinder(n_regimes=2)).fit(ds)
    assert ident.model_.validation["holdout"] == "tails"
    assert len(ident.labels_) == len(frame)
    assert (ident.labels_["regime"] >= 0).all()
