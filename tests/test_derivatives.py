"""Tests of derivative estimation (modemap.data.derivatives).

References: analytic derivatives of sin, a cubic polynomial and an
exponential (calculus); error bounds below were chosen from the known order of
each method (common practice) and checked with margin on fixed seeds.
"""

from __future__ import annotations

import numpy as np
import pytest

from modemap._exceptions import DataError
from modemap.data.derivatives import DERIVATIVE_METHODS, differentiate, estimate_noise

N = 2001
T = np.linspace(0.0, 10.0, N)
SIGNALS = {
    "sin": (np.sin(2 * T), 2 * np.cos(2 * T)),
    "poly": (0.1 * T**3 - T, 0.3 * T**2 - 1),
    "exp": (np.exp(-0.3 * T), -0.3 * np.exp(-0.3 * T)),
}

# Relative RMS error bounds (error RMS / derivative RMS) by method and noise level
# (noise standard deviation as a fraction of the signal's standard deviation).
BOUNDS = {
    ("central", 0.0): 1e-4,  # O(h^2) truncation only
    ("savgol", 0.0): 1e-4,
    ("spline", 0.0): 1e-5,
    ("tv", 0.0): 1e-3,
    ("auto", 0.0): 1e-4,
    ("savgol", 1e-3): 0.04,
    ("spline", 1e-3): 0.01,
    ("tv", 1e-3): 0.04,
    # "auto" lets through up to 10% noise by design (it feeds a least-squares fit, which
    # averages noise but not smoothing bias), so its pointwise error bound is looser.
    ("auto", 1e-3): 0.15,
    ("savgol", 1e-2): 0.08,
    ("spline", 1e-2): 0.1,
    ("tv", 1e-2): 0.08,
    ("auto", 1e-2): 0.15,
}


def relative_error(estimate: np.ndarray, exact: np.ndarray) -> float:
    return float(np.sqrt(np.mean((estimate - exact) ** 2) / np.mean(exact**2)))


@pytest.mark.parametrize(("method", "noise"), sorted(BOUNDS))
@pytest.mark.parametrize("signal", sorted(SIGNALS))
def test_error_against_analytic_derivative(method: str, noise: float, signal: str) -> None:
    x, dx = SIGNALS[signal]
    rng = np.random.default_rng(11)
    noisy = x + noise * np.std(x) * rng.normal(size=N)
    estimate, settings = differentiate(T, noisy, method)
    assert estimate.shape == (N,)
    assert relative_error(estimate, dx) < BOUNDS[(method, noise)]
    assert settings["method"] in DERIVATIVE_METHODS


def test_noise_makes_central_differences_poor() -> None:
    # Sanity of the test above: the smoothing methods beat raw differences on noise.
    x, dx = SIGNALS["sin"]
    noisy = x + 1e-2 * np.random.default_rng(2).normal(size=N)
    raw = relative_error(differentiate(T, noisy, "central")[0], dx)
    smooth = relative_error(differentiate(T, noisy, "savgol", window=31)[0], dx)
    assert raw > 0.2 and smooth < raw / 5


def test_non_uniform_time_central_second_order() -> None:
    # Second-order accuracy on a jittered grid: halving the spacing divides the
    # error by about 4 (textbook finite differences).
    errors = []
    for n in (201, 401):
        base = np.linspace(0.0, 2.0, n)
        jitter = np.random.default_rng(n).uniform(-0.2, 0.2, n) * (base[1] - base[0])
        jitter[[0, -1]] = 0.0
        t = base + jitter
        errors.append(np.max(np.abs(differentiate(t, np.sin(t), "central")[0] - np.cos(t))))
    assert 2.5 < errors[0] / errors[1] < 6.0


def test_tv_recovers_a_step_in_the_derivative() -> None:
    # A tent signal |t - 5| has derivative -1 then +1 (calculus): TV keeps the jump sharp.
    t = np.linspace(0.0, 10.0, 1001)
    noisy = np.abs(t - 5.0) + 0.01 * np.random.default_rng(5).normal(size=t.size)
    estimate, settings = differentiate(t, noisy, "tv")
    exact = np.sign(t - 5.0)
    away = np.abs(t - 5.0) > 0.3
    assert np.median(np.abs(estimate[away] - exact[away])) < 0.05
    assert settings["iterations"] == 30 and len(settings["alpha"]) == 1


def test_multi_column_and_settings_are_recorded() -> None:
    X = np.column_stack([SIGNALS["sin"][0], SIGNALS["exp"][0]])
    estimate, settings = differentiate(T, X, "savgol", window=21, order=3)
    assert estimate.shape == (N, 2)
    assert settings == {"method": "savgol", "window": 21, "order": 3, "step": pytest.approx(0.005)}
    _, spline = differentiate(T, X, "spline", degree=3)
    assert spline["degree"] == 3 and len(spline["smoothing"]) == 2


def test_short_signals() -> None:
    t = np.array([0.0, 0.1, 0.2, 0.3])
    dx, settings = differentiate(t, 3.0 * t + 1.0)  # a line: exact derivative 3
    np.testing.assert_allclose(dx, 3.0)
    assert settings["method"] == "central"
    for method in DERIVATIVE_METHODS:
        t6 = np.linspace(0.0, 0.5, 6)
        np.testing.assert_allclose(differentiate(t6, 2.0 * t6, method)[0], 2.0, rtol=1e-6)
    two, _ = differentiate(np.array([0.0, 2.0]), np.array([[1.0], [5.0]]))
    np.testing.assert_allclose(two, 2.0)


def test_auto_rule() -> None:
    rng = np.random.default_rng(3)
    x = SIGNALS["sin"][0]
    clean = differentiate(T, x)[1]
    assert clean["method"] == "central" and clean["auto"] is True
    light = differentiate(T, x + 1e-3 * rng.normal(size=N))[1]
    heavy = differentiate(T, x + 3e-2 * rng.normal(size=N))[1]
    assert light["method"] == heavy["method"] == "savgol"
    assert 5 <= light["window"] < heavy["window"] <= 101
    assert heavy["noise"][0] == pytest.approx(3e-2, rel=0.15)
    jittered = T + np.concatenate([[0.0], rng.uniform(-1e-3, 1e-3, N - 2), [0.0]])
    assert differentiate(jittered, x + 1e-2 * rng.normal(size=N))[1]["method"] == "spline"


def test_noise_estimate_matches_known_sigma() -> None:
    # MAD-based estimate from fourth differences of white noise (common practice).
    noise = 0.05 * np.random.default_rng(9).normal(size=(5000, 2))
    np.testing.assert_allclose(
        estimate_noise(noise + np.sin(np.arange(5000) / 500)[:, None]), 0.05, rtol=0.05
    )


def test_errors() -> None:
    with pytest.raises(DataError, match="unknown derivative method"):
        differentiate(T, T, "fourier")
    with pytest.raises(DataError, match="uniform time step"):
        differentiate(T**2, T, "savgol")
    with pytest.raises(DataError, match="strictly increasing"):
        differentiate(np.array([0.0, 1.0, 1.0, 2.0]), np.zeros(4))
    with pytest.raises(DataError, match="NaN"):
        differentiate(T, np.full(N, np.nan))
    with pytest.raises(DataError, match="unknown option"):
        differentiate(T, T, "central", window=5)
    with pytest.raises(DataError, match="odd"):
        differentiate(T, T, "savgol", window=8)
    with pytest.raises(DataError, match="at least 2 samples"):
        differentiate(np.zeros(1), np.zeros(1))


@pytest.mark.parametrize("method", ["auto", *DERIVATIVE_METHODS])
def test_recorded_settings_replay_the_same_estimate(method: str) -> None:
    # A model file stores the settings; passing them back must reproduce the
    # derivative exactly (internal consistency; no outside reference needed
    # beyond the analytic check that it is still a good derivative).
    x, dx = SIGNALS["exp"]
    noisy = x + 1e-3 * np.random.default_rng(8).normal(size=N)
    first, settings = differentiate(T, noisy, method)
    replay_options = {k: v for k, v in settings.items() if k != "method"}
    again, _ = differentiate(T, noisy, settings["method"], **replay_options)
    np.testing.assert_array_equal(again, first)
    if method != "central":  # raw differences of noisy data are poor (see above)
        assert relative_error(again, dx) < 0.1


# --------------------------------------------------------------------------- runs together


@pytest.mark.parametrize("seed", range(3))
def test_runs_together_equal_each_run_alone(seed, monkeypatch) -> None:
    # reference: differentiate() run by run (its own auto rule, NumPy's and SciPy's code)
    from modemap.data import derivatives

    alone_calls = []
    one_run = derivatives.differentiate
    monkeypatch.setattr(
        derivatives, "differentiate", lambda *a, **k: alone_calls.append(1) or one_run(*a, **k)
    )
    rng = np.random.default_rng(seed)
    lengths = rng.integers(2, 50, size=300)
    parts_t, parts_x = [], []
    for n in lengths:
        step = 0.1 if seed != 1 else [0.1, 0.2][int(rng.integers(0, 2))]
        t = np.arange(n) * step + rng.uniform(0, 5)
        if seed == 2 and rng.random() < 0.2:  # some irregular runs (spline or refused)
            t = np.cumsum(rng.uniform(0.05, 0.15, n))
        noise = 10 ** rng.uniform(-6, -1)  # clean runs take central, noisy ones savgol
        x = np.column_stack([np.sin(t), np.cos(2 * t)]) + noise * rng.standard_normal((n, 2))
        parts_t.append(t), parts_x.append(x)
    time, X = np.concatenate(parts_t), np.concatenate(parts_x)
    # the auto rule, and recorded Savitzky-Golay settings replayed (as a refit does)
    request = {} if seed != 2 else {"method": "savgol", "window": 7, "order": 3, "noise": [0.1]}
    try:
        dx, settings = derivatives.differentiate_runs(time, X, lengths, **request)
    except DataError:  # an irregular run refused for savgol, as it is alone
        assert seed == 2
        keep = [
            i for i, (t, n) in enumerate(zip(parts_t, lengths, strict=True))
            if n < 3 or np.ptp(np.diff(t)) < 1e-9
        ]  # fmt: skip
        lengths = lengths[keep]
        time = np.concatenate([parts_t[i] for i in keep])
        X = np.concatenate([parts_x[i] for i in keep])
        alone_calls.clear()
        dx, settings = derivatives.differentiate_runs(time, X, lengths, **request)
    assert len(alone_calls) < len(lengths) / 2  # most runs went in batches
    methods = set()
    for r, (a, b) in enumerate(zip(np.cumsum(lengths) - lengths, np.cumsum(lengths), strict=True)):
        alone, used = one_run(time[a:b], X[a:b], **request)
        assert settings[r] == used
        methods.add(used["method"])
        if used["method"] == "savgol":  # end-point fits: one least-squares solve for all runs
            np.testing.assert_allclose(dx[a:b], alone, rtol=1e-12, atol=1e-12)
        else:
            np.testing.assert_array_equal(dx[a:b], alone)
    assert ({"savgol"} if seed == 2 else {"central", "savgol"}) <= methods
