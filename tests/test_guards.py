"""Tests of the switching surfaces (modemap.model.guards)."""

from __future__ import annotations

import re

import numpy as np
import pytest
from sklearn.base import clone
from sklearn.linear_model import LogisticRegression

from modemap import FitError, ParameterError
from modemap.model.equilibria import place_equilibria
from modemap.model.guard_rules import guard_text, predict_labels
from modemap.model.guards import SwitchingSurfaces
from modemap.model.hybrid import Equilibrium, Guard, HybridModel, RegimeModel
from modemap.simulation.simulator import simulate


def regime(rid: int, terms: list[str], coef) -> RegimeModel:
    c = np.asarray(coef, dtype=float).reshape(len(terms), -1)
    return RegimeModel(
        id=rid, samples=0, terms=terms, coefficients=c, stderr=0 * c, noise_cov=np.eye(c.shape[1])
    )


def thermostat(low: float = 55.0, high: float = 65.0) -> HybridModel:
    heat = regime(0, ["1", "T"], [8.0, -0.1])  # equilibrium 80 degC, time constant 10
    cool = regime(1, ["1", "T"], [2.0, -0.1])  # equilibrium 20 degC
    guards = [
        Guard(0, 1, ["T"], np.array([1.0]), -high),
        Guard(1, 0, ["T"], np.array([-1.0]), low),
    ]
    return HybridModel(
        states=["T"], inputs=[], form="continuous", regimes=[heat, cool], guards=guards,
        data_range={"T": (20.0, 80.0)}, units={"T": "degC"},
    )  # fmt: skip


def labelled_runs(model, x0s, t, inputs=None, noise=0.1, seed=0):
    """Simulate runs of a hand-built model, add measurement noise, keep the true labels."""
    rng = np.random.default_rng(seed)
    Z, labels, lengths = [], [], []
    for x0 in x0s:
        res = simulate(model, t, x0, inputs)
        assert res.status == 0
        x = res.states + rng.normal(0.0, noise, res.states.shape)
        Z.append(x if inputs is None else np.hstack([x, inputs]))
        labels.append(res.regimes)
        lengths.append(t.size)
    return np.vstack(Z), np.concatenate(labels), lengths


@pytest.fixture(scope="module")
def thermostat_data():
    t = np.arange(0.0, 150.0, 0.1)
    return labelled_runs(thermostat(), [[50.0], [58.0], [62.0]], t)


def test_thermostat_thresholds_and_hysteresis(thermostat_data):
    Z, labels, lengths = thermostat_data
    surf = SwitchingSurfaces().fit(Z, labels, lengths, ["T"], units={"T": "degC"})
    # hysteresis (the simulated truth switches at 65 up and 55 down): between 55 and 65 both
    # regimes are seen at the same T, so knowing the past regime classifies far better
    # (common practice: a memoryless classifier cannot hold two thresholds for one variable)
    assert surf.kind_ == "per-source"
    ev = surf.family_evidence_
    assert ev["hysteresis"] and ev["chosen_by"] == "evidence" and ev["family"] == "per-source"
    assert ev["gain"] > 0.1 and ev["gain"] > ev["critical"] * ev["stderr"]
    assert ev["memory"] == pytest.approx(ev["memoryless"] + ev["gain"])
    assert "hysteresis" in ev["reason"]
    by_pair = {(g.source, g.target): g for g in surf.guards_}
    assert set(by_pair) == {(0, 1), (1, 0)}
    up, down = by_pair[(0, 1)], by_pair[(1, 0)]
    # the simulated ground truth switches at 65 (heating -> cooling) and 55 degC
    assert -up.offset / up.weights[0] == pytest.approx(65.0, abs=0.3)
    assert -down.offset / down.weights[0] == pytest.approx(55.0, abs=0.3)
    assert up.weights[0] > 0 > down.weights[0]
    m_up = re.fullmatch(r"switch 0 -> 1 when T > (\d+\.\d) degC", up.text)
    m_down = re.fullmatch(r"switch 1 -> 0 when T < (\d+\.\d) degC", down.text)
    assert m_up and m_down, (up.text, down.text)
    assert float(m_up.group(1)) == pytest.approx(65.0, abs=0.3)
    assert surf.variables_ == ["T"]


def test_memoryless_family_cannot_hold_two_thresholds(thermostat_data):
    Z, labels, lengths = thermostat_data
    surf = SwitchingSurfaces(kind="memoryless").fit(Z, labels, lengths, ["T"])
    assert surf.kind_ == "memoryless"
    up, down = sorted(surf.guards_, key=lambda g: g.source)
    # one boundary, shared by both directions (values of opposite sign)
    assert -up.offset / up.weights[0] == pytest.approx(-down.offset / down.weights[0], abs=1e-9)


def test_predict_next_and_guard_values(thermostat_data):
    Z, labels, lengths = thermostat_data
    surf = SwitchingSurfaces(kind="per-source").fit(Z, labels, lengths, ["T"])
    assert surf.predict_next(np.array([66.0]), 0) == 1
    assert surf.predict_next(np.array([60.0]), 0) == 0  # inside the band: stay
    assert surf.predict_next(np.array([60.0]), 1) == 1
    assert surf.predict_next(np.array([54.0]), 1) == 0
    vals = surf.guard_values(np.array([60.0]), 0)
    assert list(vals) == [1] and vals[1] < 0


def test_gate_driven_guards_use_the_gate():
    off = regime(0, ["i", "v"], [[0, 1], [-1, -1]])
    on = regime(1, ["1", "i", "v"], [[10, 0], [0, 1], [-1, -1]])
    truth = [Guard(0, 1, ["q"], np.array([1.0]), -0.5), Guard(1, 0, ["q"], np.array([-1.0]), 0.5)]
    model = HybridModel(
        states=["i", "v"], inputs=["q"], form="continuous", regimes=[off, on], guards=truth,
        data_range={"i": (0.0, 10.0), "v": (0.0, 10.0), "q": (0.0, 1.0)},
    )  # fmt: skip
    t = np.arange(3000) * 0.01
    q = ((t % 0.2) < 0.12).astype(float)[:, None]
    Z, labels, lengths = labelled_runs(model, [[0.0, 0.0]], t, inputs=q, noise=0.02)
    surf = SwitchingSurfaces().fit(Z, labels, lengths, ["i", "v", "q"])
    texts = sorted(g.text for g in surf.guards_)
    assert texts == ["switch 0 -> 1 when q > 0.50", "switch 1 -> 0 when q < 0.50"]
    for g in surf.guards_:
        w = dict(zip(g.terms, g.weights, strict=True))
        assert w["i"] == 0 and w["v"] == 0 and w["q"] != 0
    # the regime is the gate (simulated truth): memoryless, nothing gained from the past
    assert surf.kind_ == "memoryless" and not surf.family_evidence_["hysteresis"]
    # every sample at q = 1 is in regime 1 and every one at q = 0 in regime 0: the gate
    # forces one way and blocks the other (an infinite maximum-likelihood weight, Albert and
    # Anderson, Biometrika 1984)
    assert surf.significance_["0->1"]["override"] == {"q": "forces at 1, blocks at 0"}
    assert surf.significance_["1->0"]["override"] == {"q": "blocks at 1, forces at 0"}
    # the gate pattern is reproduced exactly (common practice)
    pred = predict_labels(surf.guards_, ["i", "v", "q"], Z, int(labels[0]))
    assert np.array_equal(pred, labels)


def test_oblique_boundary_matches_logistic_reference():
    # regime = 1 where x + 2 y > 1 (memoryless); two variables are needed
    rng = np.random.default_rng(3)
    n = 4000
    Z = rng.uniform(-1.0, 2.0, size=(n, 2))
    Z[:, 1] = np.cumsum(rng.normal(0, 0.05, n)) % 1.5  # slow second variable
    Z[:, 0] = 0.5 + 1.2 * np.sin(np.arange(n) / 37.0)
    labels = (Z[:, 0] + 2 * Z[:, 1] > 1).astype(int)
    surf = SwitchingSurfaces(kind="memoryless").fit(Z, labels, [n], ["x", "y"])
    g = next(g for g in surf.guards_ if g.source == 0)
    w = dict(zip(g.terms, g.weights, strict=True))
    # direction and location of the boundary x + 2 y = 1
    assert w["y"] / w["x"] == pytest.approx(2.0, rel=0.1)
    assert -g.offset / w["x"] == pytest.approx(1.0, abs=0.1)  # crosses y = 0 at x = 1
    # reference library: scikit-learn's own logistic regression on the raw variables
    ref = LogisticRegression(C=1e3, class_weight="balanced", max_iter=5000).fit(Z, labels)
    ref_dir = ref.coef_[0] / np.linalg.norm(ref.coef_[0])
    ours = np.array([w["x"], w["y"]]) / np.hypot(w["x"], w["y"])
    assert ours @ ref_dir == pytest.approx(1.0, abs=2e-3)
    assert re.fullmatch(r"switch 0 -> 1 when [\d.]+ x \+ [\d.]+ y > [-\d.]+", g.text), g.text


def test_degree_two_guard_is_exact_in_raw_terms():
    # regime 1 outside the unit circle: x^2 + y^2 > 1 (memoryless)
    rng = np.random.default_rng(5)
    ang = np.cumsum(rng.normal(0.05, 0.01, 3000))
    rad = 1.0 + 0.6 * np.sin(np.arange(3000) / 23.0)
    Z = np.column_stack([rad * np.cos(ang), rad * np.sin(ang)])
    labels = (rad > 1.0).astype(int)
    surf = SwitchingSurfaces(kind="memoryless", degree=2, simplify_tol=0.0).fit(
        Z, labels, [3000], ["x", "y"]
    )
    g = next(g for g in surf.guards_ if g.source == 0)
    # ground truth circle: the guard's own sign agrees with the circle on almost every sample
    w = dict(zip(g.terms, g.weights, strict=True))
    vals = w["x^2"] * Z[:, 0] ** 2 + w["y^2"] * Z[:, 1] ** 2 + w["x"] * Z[:, 0] + w["y"] * Z[:, 1]
    vals += w["x*y"] * Z[:, 0] * Z[:, 1] + g.offset
    assert np.mean((vals > 0) == (rad > 1.0)) > 0.99
    assert w["x^2"] == pytest.approx(w["y^2"], rel=0.1)
    # re-predicted label sequence from the guards agrees with the ground truth
    pred = predict_labels(surf.guards_, ["x", "y"], Z, int(labels[0]))
    assert np.mean(pred == labels) > 0.98


def test_degenerate_cases():
    Z = np.linspace(0, 1, 50)[:, None]
    # a single regime: no guards
    surf = SwitchingSurfaces().fit(Z, np.zeros(50, int), [50], ["x"])
    assert surf.guards_ == []
    # regime 1 is entered and never left: guards only from regime 0
    labels = (Z[:, 0] > 0.5).astype(int)
    surf = SwitchingSurfaces(kind="per-source", holdout=0.0).fit(Z, labels, [50], ["x"])
    assert [(g.source, g.target) for g in surf.guards_] == [(0, 1)]
    # midpoint between the samples 24/49 and 25/49 on either side: 0.5
    assert surf.guards_[0].text == "switch 0 -> 1 when x > 0.50"
    with pytest.raises(FitError, match="lengths sum"):
        SwitchingSurfaces().fit(Z, labels, [40], ["x"])
    with pytest.raises(ParameterError, match="kind"):
        SwitchingSurfaces(kind="other").fit(Z, labels, [50], ["x"])


def test_estimator_conventions():
    est = SwitchingSurfaces(kind="memoryless", degree=2, C=5.0)
    # scikit-learn convention: parameters stored as given, clone reproduces them
    assert clone(est).get_params() == est.get_params()
    assert not hasattr(est, "guards_")


def test_place_equilibria_marks_virtual_and_reachable():
    model = thermostat()
    model.regimes[0].equilibria = [Equilibrium({"T": 80.0}, np.array([-0.1]), "stable node")]
    model.regimes[1].equilibria = [Equilibrium({"T": 20.0}, np.array([-0.1]), "stable node")]
    place_equilibria(model)
    # both equilibria lie beyond their regime's threshold: virtual (the system switches first)
    assert [r.equilibria[0].inside for r in model.regimes] == [False, False]
    wide = thermostat(low=10.0, high=90.0)
    wide.regimes[0].equilibria = [Equilibrium({"T": 80.0}, np.array([-0.1]), "stable node")]
    place_equilibria(wide.guards, wide.regimes, wide.variables)
    assert wide.regimes[0].equilibria[0].inside is True


def test_guard_text_half_plane_with_units():
    g = Guard(1, 2, ["T", "w"], np.array([0.83, -0.56]), -12.1 * np.hypot(0.83, 0.56))
    text = guard_text(g, {"T": "degC", "w": "L/min"}, {"T": 20.0, "w": 5.0})
    assert text == "switch 1 -> 2 when 0.829 T[degC] - 0.559 w[L/min] > 12.1"


def test_a_rare_cause_of_switching_is_kept_in_the_guard() -> None:
    # A thermostat whose heating is also stopped by a load-shed flag (an override; switching
    # rule of the simulated truth): heating -> cooling when T > 65 or shed = 1, cooling ->
    # heating when T < 55 and shed = 0.  Shed-caused switches are a few among ~100
    # thermostat ones, so a threshold on T alone scores almost as well in balanced accuracy;
    # it must not replace the guard, since it would never stop heating for a shed.
    heat = regime(0, ["1", "T"], [8.0, -0.1])
    cool = regime(1, ["1", "T"], [2.0, -0.1])
    guards = [
        Guard(0, 1, ["T", "shed"], np.array([1.0, 100.0]), -65.0),
        Guard(1, 0, ["T", "shed"], np.array([-1.0, -100.0]), 55.0),
    ]
    model = HybridModel(
        states=["T"], inputs=["shed"], form="continuous", regimes=[heat, cool], guards=guards,
        data_range={"T": (20.0, 80.0), "shed": (0.0, 1.0)}, units={"T": "degC"},
    )  # fmt: skip
    t = np.arange(0.0, 300.0, 0.1)
    shed = np.zeros((t.size, 1))
    for start in (40.0, 130.0, 220.0):
        shed[(t >= start) & (t < start + 6.0)] = 1.0
    Z, labels, lengths = labelled_runs(model, [[50.0], [58.0], [62.0]], t, inputs=shed)
    surf = SwitchingSurfaces(kind="per-source").fit(Z, labels, lengths, ["T", "shed"])
    stop = next(g for g in surf.guards_ if g.source == 0)

    def fires(temp: float, flag: float) -> bool:
        w = dict(zip(stop.terms, np.asarray(stop.weights), strict=True))
        return w.get("T", 0.0) * temp + w.get("shed", 0.0) * flag + stop.offset > 0

    assert fires(60.0, 1.0) and fires(66.0, 0.0) and not fires(60.0, 0.0)
    # every shed start seen while heating switched: the maximum-likelihood weight of the flag
    # is infinite (Albert and Anderson, Biometrika 1984), so the shed forces the switch at
    # any temperature of the data; near separation its Wald ratio is small (Hauck and
    # Donner, JASA 1977: the ratio shrinks as the effect grows), yet the likelihood-ratio
    # test keeps it (two-sided 1 % normal quantile 2.576, common practice)
    assert fires(float(Z[:, 0].min()), 1.0)
    sig = surf.significance_["0->1"]
    assert abs(sig["kept"]["shed"]) < 2.576 and sig["override"] == {"shed": "forces at 1"}
    # during a shed the heater never comes back on, down to the coldest sample
    start = next(g for g in surf.guards_ if g.source == 1)
    w = dict(zip(start.terms, np.asarray(start.weights), strict=True))
    assert w["T"] * Z[:, 0].min() + w["shed"] + start.offset < 0
    assert surf.significance_["1->0"]["override"] == {"shed": "blocks at 1"}


# -- family evidence: hysteresis only when the data show it ---------------------------------------
def two_region_field() -> HybridModel:
    """A memoryless two-region switched system (invented numbers): a continuous piecewise-affine
    field, an expanding focus left of the line x1 = 0.3 and a contracting one right of it,
    so every run winds onto one cycle that crosses the line both ways at different x2."""
    left = regime(0, ["x1", "x2"], [[0.1, 1.0], [-1.0, 0.1]])
    # right: the left field minus 0.9 (x1 - 0.3) in dx1/dt, equal on the line (continuous)
    right = regime(1, ["1", "x1", "x2"], [[0.27, 0.0], [-0.8, 1.0], [-1.0, 0.1]])
    line = [Guard(0, 1, ["x1"], np.array([1.0]), -0.3), Guard(1, 0, ["x1"], np.array([-1.0]), 0.3)]
    return HybridModel(
        states=["x1", "x2"], inputs=[], form="continuous", regimes=[left, right], guards=line,
        data_range={"x1": (-2.0, 2.0), "x2": (-2.0, 2.0)},
    )  # fmt: skip


@pytest.fixture(scope="module")
def two_region_data():
    t = np.arange(0.0, 150.0, 0.05)
    return labelled_runs(two_region_field(), [[0.1, 0.0], [1.5, 0.0], [0.0, -1.2]], t, noise=0.02)


def late(labels: np.ndarray, lengths, by: int) -> np.ndarray:
    """Labels that report every switch ``by`` samples late (as a decoder may)."""
    out, start = labels.copy(), 0
    for m in lengths:
        out[start + by : start + m] = labels[start : start + m - by]
        start += m
    return out


@pytest.mark.parametrize("delay", [0, 3])
def test_memoryless_switching_is_not_taken_for_hysteresis(two_region_data, delay) -> None:
    Z, labels, lengths = two_region_data
    surf = SwitchingSurfaces().fit(Z, late(labels, lengths, delay), lengths, ["x1", "x2"])
    # the simulated truth is memoryless: the past regime adds nothing a quarter of a stay on,
    # even with labels that report each switch three samples late (a phantom band)
    ev = surf.family_evidence_
    assert surf.kind_ == "memoryless" and not ev["hysteresis"], ev["reason"]
    assert abs(ev["gain"]) < ev["margin"] and "no evidence of hysteresis" in ev["reason"]
    by_pair = {(g.source, g.target): g for g in surf.guards_}
    assert set(by_pair) == {(0, 1), (1, 0)}
    up, down = by_pair[(0, 1)], by_pair[(1, 0)]
    # one shared surface, both ways (values of opposite sign)
    assert np.allclose(up.weights, -np.asarray(down.weights)) and up.offset == -down.offset
    if delay == 0:
        # the line x1 = 0.3 of the simulated truth; x2 carries nothing and is dropped
        assert up.text == "switch 0 -> 1 when x1 > 0.30", up.text
        assert "x2" in surf.significance_["0->1"]["dropped"]
        assert list(surf.significance_["0->1"]["kept"]) == ["x1"]


def test_thermostat_with_a_late_decoder_keeps_its_band(thermostat_data) -> None:
    # true hysteresis (55 / 65 degC, simulated truth) stays visible with late labels
    Z, labels, lengths = thermostat_data
    surf = SwitchingSurfaces().fit(Z, late(labels, lengths, 3), lengths, ["T"])
    assert surf.kind_ == "per-source" and surf.family_evidence_["hysteresis"]


def test_kind_set_by_hand_keeps_the_evidence(two_region_data) -> None:
    Z, labels, lengths = two_region_data
    surf = SwitchingSurfaces(kind="per-source").fit(Z, labels, lengths, ["x1", "x2"])
    assert surf.kind_ == "per-source"
    ev = surf.family_evidence_
    assert ev["chosen_by"] == "kind" and ev["family"] == "per-source" and not ev["hysteresis"]


def test_evidence_scores_match_scikit_learn_cross_validation() -> None:
    # reference: scikit-learn's cross_val_predict with the same predefined folds and
    # balanced_accuracy_score, on a two-threshold relay sequence built here
    from sklearn.metrics import balanced_accuracy_score
    from sklearn.model_selection import PredefinedSplit, cross_val_predict

    from modemap.model.hysteresis import contiguous_blocks, hysteresis_evidence

    rng = np.random.default_rng(11)
    n, lag = 4000, 10
    x = 0.5 + 0.6 * np.sin(np.arange(n) / 25.0) + rng.normal(0, 0.02, n)
    labels = np.zeros(n, dtype=int)
    for k in range(1, n):  # relay: on above 0.8, off below 0.2
        labels[k] = 1 if x[k] > 0.8 else 0 if x[k] < 0.2 else labels[k - 1]
    F = ((x - x.mean()) / x.std())[:, None]
    ev = hysteresis_evidence(F, labels, [n], lag=lag, n_folds=5)
    rows = np.arange(lag, n)
    size = max(int(np.ceil(n / 40)), 2 * lag)
    folds = contiguous_blocks([n], size)[rows] % 5
    clf = LogisticRegression(C=1e3, solver="newton-cholesky", max_iter=200)
    memory = (labels[rows - lag][:, None] == np.array([0, 1])[None, :]).astype(float)
    cv = PredefinedSplit(folds)
    a = cross_val_predict(clf, F[rows], labels[rows], cv=cv)
    b = cross_val_predict(clf, np.hstack([F[rows], memory]), labels[rows], cv=cv)
    assert ev["memoryless"] == pytest.approx(balanced_accuracy_score(labels[rows], a), abs=1e-12)
    assert ev["memory"] == pytest.approx(balanced_accuracy_score(labels[rows], b), abs=1e-12)
    assert ev["blocks"] == 40 and ev["samples"] == rows.size and ev["hysteresis"]


def test_contiguous_blocks_never_span_two_runs() -> None:
    from modemap.model.hysteresis import contiguous_blocks

    ids = contiguous_blocks([5, 3], 2)
    assert ids.tolist() == [0, 0, 1, 1, 2, 3, 3, 4]  # hand count


# -- logistic regression and significant terms ----------------------------------------------------
def test_logistic_fit_matches_statsmodels_logit() -> None:
    # reference: statsmodels' Logit on the Spector and Mazzeo (1980) grades data it ships;
    # standard errors from the inverse observed information
    sm = pytest.importorskip("statsmodels.api")
    from modemap.model.logistic import fit_logistic

    data = sm.datasets.spector.load_pandas()
    ref = sm.Logit(data.endog, sm.add_constant(data.exog)).fit(disp=0)
    fit = fit_logistic(data.exog.to_numpy(), data.endog.to_numpy())
    assert fit.intercept == pytest.approx(ref.params["const"], rel=1e-6)
    assert fit.coef == pytest.approx(ref.params[["GPA", "TUCE", "PSI"]].to_numpy(), rel=1e-6)
    se = ref.bse[["GPA", "TUCE", "PSI", "const"]].to_numpy()
    assert fit.stderr == pytest.approx(se, rel=1e-5)
    assert fit.loglik == pytest.approx(ref.llf, rel=1e-9)
    assert fit.wald == pytest.approx(ref.tvalues[["GPA", "TUCE", "PSI"]].to_numpy(), rel=1e-5)


def test_penalised_logistic_fit_matches_scikit_learn() -> None:
    # reference: scikit-learn's LogisticRegression minimises the same ridge-penalised objective
    from modemap.model.logistic import fit_logistic

    rng = np.random.default_rng(2)
    X = rng.normal(size=(500, 3))
    y = (X @ [1.5, -0.5, 0.0] + rng.logistic(size=500) > 0).astype(int)
    ref = LogisticRegression(C=0.5, tol=1e-12, max_iter=10_000).fit(X, y)
    fit = fit_logistic(X, y, C=0.5)
    assert fit.coef == pytest.approx(ref.coef_[0], abs=1e-6)
    assert fit.intercept == pytest.approx(ref.intercept_[0], abs=1e-6)


def test_a_term_the_data_do_not_support_is_dropped() -> None:
    # memoryless oblique boundary x + 2 y > 1 (the truth of the sampled labels) and a third
    # variable w of pure noise: w is dropped, x and y stay, and the text shows x and y only
    rng = np.random.default_rng(3)
    n = 4000
    Z = np.column_stack(
        [
            0.5 + 1.2 * np.sin(np.arange(n) / 37.0),
            np.cumsum(rng.normal(0, 0.05, n)) % 1.5,
            rng.normal(0.0, 1.0, n),
        ]
    )
    labels = (Z[:, 0] + 2 * Z[:, 1] + rng.normal(0, 0.05, n) > 1).astype(int)
    surf = SwitchingSurfaces(kind="memoryless").fit(Z, labels, [n], ["x", "y", "w"])
    g = next(g for g in surf.guards_ if g.source == 0)
    w = dict(zip(g.terms, g.weights, strict=True))
    assert w["w"] == 0 and w["x"] != 0 and w["y"] != 0
    assert g.text == f"switch 0 -> 1 when {g.text.split('when ')[1]}"
    words = g.text.split()
    assert "w" not in words and "x" in words and "y" in words
    sig = surf.significance_["0->1"]
    assert set(sig["kept"]) == {"x", "y"} and set(sig["dropped"]) == {"w"}
    assert abs(sig["dropped"]["w"]) < 2.576  # two-sided 1 % normal quantile (common practice)
    assert w["y"] / w["x"] == pytest.approx(2.0, rel=0.1)


def test_new_parameters_are_checked() -> None:
    Z = np.linspace(0, 1, 50)[:, None]
    labels = (Z[:, 0] > 0.5).astype(int)
    SwitchingSurfaces(memory_lag=3).fit(Z, labels, [50], ["x"])
    for bad in ({"memory_lag": 0}, {"memory_lag": "long"}, {"alpha": 0.0}, {"n_folds": 1}):
        with pytest.raises(ParameterError):
            SwitchingSurfaces(**bad).fit(Z, labels, [50], ["x"])


def test_bootstrap_threshold_error_matches_the_logit_delta_method() -> None:
    # Labels drawn independently with P(switch side) = logistic((x - 0.5) / 0.05): far from
    # separation, so the textbook delta-method standard error of the threshold -b/w from
    # statsmodels' Logit covariance is valid; the block bootstrap must agree with it.
    import statsmodels.api as sm

    rng = np.random.default_rng(11)
    x = rng.uniform(0.0, 1.0, 3000)
    labels = (rng.uniform(size=x.size) < 1 / (1 + np.exp(-(x - 0.5) / 0.05))).astype(np.int64)
    fit = SwitchingSurfaces(kind="memoryless", n_boot=200, holdout=0.0).fit(
        x[:, None], labels, [x.size], ["x"]
    )
    rec = fit.stderr_["0->1"]
    res = sm.Logit(labels, sm.add_constant(x)).fit(disp=0)
    b, w = res.params
    grad = np.array([-1 / w, b / w**2])  # d(-b/w)/d(b, w)
    se_ref = float(np.sqrt(grad @ res.cov_params() @ grad))
    assert rec["numbers"][0] == pytest.approx(-b / w, abs=2 * se_ref)
    assert rec["stderr"][0] == pytest.approx(se_ref, rel=0.3)
    assert rec["replicates"] == 200
    # a name that must be quoted in terms is still a one-variable threshold
    quoted = SwitchingSurfaces(kind="memoryless", n_boot=20, holdout=0.0).fit(
        x[:, None], labels, [x.size], ["Tank Level"]
    )
    assert len(quoted.stderr_["0->1"]["numbers"]) == 1


def test_bootstrap_leaves_the_guards_as_fitted(thermostat_data) -> None:
    Z, labels, lengths = thermostat_data
    a = SwitchingSurfaces(n_boot=0).fit(Z, labels, lengths, ["T"])
    b = SwitchingSurfaces(n_boot=20).fit(Z, labels, lengths, ["T"])
    assert a.stderr_ == {} and set(b.stderr_) == {f"{g.source}->{g.target}" for g in b.guards_}
    for ga, gb in zip(a.guards_, b.guards_, strict=True):
        assert ga.text == gb.text and np.array_equal(ga.weights, gb.weights)
        assert ga.offset == gb.offset
