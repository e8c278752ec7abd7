"""Derivatives re-estimated within regime stretches (modemap.regimes.segments)."""

import numpy as np
import pytest

from modemap.data.derivatives import differentiate
from modemap.regimes.segments import segment_derivatives


def test_no_blur_across_a_regime_change() -> None:
    # Piecewise-linear trajectory: slope +2 then -3 (a kink at a switch). Within each stretch
    # the exact derivative is the constant slope (elementary calculus).
    t = np.arange(0.0, 10.0, 0.05)
    k = t.size // 2
    x = np.where(np.arange(t.size) < k, 2.0 * t, 2.0 * t[k - 1] - 3.0 * (t - t[k - 1]))[:, None]
    labels = (np.arange(t.size) >= k).astype(int)
    settings = {"method": "savgol", "window": 21, "order": 3}
    whole, _ = differentiate(t, x, **settings)
    assert np.abs(whole[k - 5 : k + 5, 0] - np.where(labels[k - 5 : k + 5], -3, 2)).max() > 0.5
    seg = segment_derivatives(t, x, whole, np.array([t.size]), labels, settings)
    np.testing.assert_allclose(seg[:k, 0], 2.0, atol=1e-9)
    np.testing.assert_allclose(seg[k:, 0], -3.0, atol=1e-9)


def test_runs_are_separate_and_short_stretches_use_central_differences() -> None:
    t = np.concatenate([np.arange(6.0), np.arange(6.0)])
    x = np.concatenate([t[:6] ** 2, 3.0 * t[6:]])[:, None]
    labels = np.array([0, 0, 0, 1, 1, 1, 1, 1, 1, 1, 1, 1])
    out = segment_derivatives(
        t, x, np.zeros_like(x), np.array([6, 6]), labels, {"method": "savgol"}
    )
    # x = t^2 on 3-point stretches: second-order differences are exact for a quadratic
    np.testing.assert_allclose(out[:6, 0], 2.0 * t[:6], atol=1e-9)
    np.testing.assert_allclose(out[6:, 0], 3.0, atol=1e-9)


def test_input_steps_also_cut_stretches() -> None:
    # One regime throughout, but the input steps at sample k and the slope follows it:
    # dx/dt = u (elementary calculus: the exact derivative of each linear piece).
    t = np.arange(0.0, 10.0, 0.05)
    k = t.size // 2
    u = np.where(np.arange(t.size) < k, 1.0, -2.0)
    x = np.concatenate([[0.0], np.cumsum(u[:-1] * 0.05)])[:, None]
    labels = np.zeros(t.size, dtype=int)
    settings = {"method": "savgol", "window": 21, "order": 3}
    whole, _ = differentiate(t, x, **settings)
    out = segment_derivatives(t, x, whole, np.array([t.size]), labels, settings, inputs=u[:, None])
    np.testing.assert_allclose(out[: k - 1, 0], 1.0, atol=1e-9)
    np.testing.assert_allclose(out[k + 1 :, 0], -2.0, atol=1e-9)


def test_a_sample_between_an_input_step_and_a_label_change_takes_the_step_side() -> None:
    # The input steps at sample k and the slope follows it (dx/dt = u, exact per linear piece).
    # Labels one sample late (change at k + 1) leave sample k alone between the step and the
    # label change: its derivative comes from the stretch after the step, not the whole-run
    # estimate smeared across the kink.  Labels one sample early: from the stretch before.
    t = np.arange(0.0, 10.0, 0.05)
    k = t.size // 2
    u = np.where(np.arange(t.size) < k, 1.0, -2.0)
    x = np.concatenate([[0.0], np.cumsum(u[:-1] * 0.05)])[:, None]
    settings = {"method": "savgol", "window": 21, "order": 3}
    whole, _ = differentiate(t, x, **settings)
    assert abs(whole[k, 0] + 2.0) > 0.5 and abs(whole[k - 1, 0] - 1.0) > 0.1
    late = (np.arange(t.size) > k).astype(int)
    out = segment_derivatives(t, x, whole, np.array([t.size]), late, settings, inputs=u[:, None])
    assert out[k, 0] == pytest.approx(-2.0, abs=1e-9)
    early = (np.arange(t.size) >= k - 1).astype(int)
    out = segment_derivatives(t, x, whole, np.array([t.size]), early, settings, inputs=u[:, None])
    assert out[k - 1, 0] == pytest.approx(1.0, abs=1e-9)


def test_an_input_held_for_one_sample_gives_that_interval_s_slope() -> None:
    # dx/dt = u with u = 1, then -2 for one sample only, then 1 again: the sample between the
    # two steps has no stretch to smooth over; its derivative is the mean slope of its own
    # interval, exact for these linear pieces (elementary calculus)
    t = np.arange(0.0, 10.0, 0.05)
    k = t.size // 2
    u = np.ones(t.size)
    u[k] = -2.0
    x = np.concatenate([[0.0], np.cumsum(u[:-1] * 0.05)])[:, None]
    labels = np.zeros(t.size, dtype=int)
    settings = {"method": "savgol", "window": 21, "order": 3}
    whole, _ = differentiate(t, x, **settings)
    assert abs(whole[k, 0] + 2.0) > 0.5
    out = segment_derivatives(t, x, whole, np.array([t.size]), labels, settings, inputs=u[:, None])
    assert out[k, 0] == pytest.approx(-2.0, abs=1e-9)


# --------------------------------------------------------------------------- stretches together


@pytest.mark.parametrize("seed", range(4))
def test_stretches_together_equal_each_stretch_alone(seed, monkeypatch) -> None:
    # reference: the one-stretch path (np.gradient, or differentiate -> scipy's savgol_filter)
    from modemap.regimes import segments
    from modemap.regimes.segments import _stretch, _stretches

    alone_calls = []
    monkeypatch.setattr(
        segments, "_stretch", lambda t, x, s: alone_calls.append(1) or _stretch(t, x, s)
    )
    rng = np.random.default_rng(seed)
    n = 20000
    uniform = np.arange(n) * 0.1
    jittered = np.cumsum(rng.uniform(0.05, 0.15, n))
    time = uniform if seed % 2 else jittered
    states = rng.normal(size=(n, 2)).cumsum(axis=0)
    settings = [
        {"method": "central"},
        {"method": "savgol", "window": 5, "order": 3, "step": 0.1, "auto": True},
        {"method": "savgol", "window": 9, "order": 2},
        {"method": "spline", "degree": 4, "smoothing": [1.0, 1.0]},
    ]
    jobs, a = [], 0
    while a < n - 40:
        b = a + int(rng.integers(2, 14))
        choice = settings[int(rng.integers(0, 3 if seed % 2 else 1))]
        if seed == 3 and rng.random() < 0.05:
            choice = settings[3]
        jobs.append((a, b, choice))
        a = b
    together = _stretches(time, states, jobs, [True] * len(jobs))
    assert len(alone_calls) < len(jobs) / 2  # most went in batches
    for (a, b, s), got in zip(jobs, together, strict=True):
        alone = _stretch(time[a:b], states[a:b], s)
        if s["method"] == "savgol" and b - a >= 7:  # one least-squares solve for all ends
            np.testing.assert_allclose(got, alone, rtol=1e-12, atol=1e-12)
        else:  # NumPy's formulas term by term: the same numbers
            np.testing.assert_array_equal(got, alone)
