"""The answer does not depend on N (marker ``perf``; ``pytest tests/perf/bench_invariance.py
-m perf -s``).

One invented system, a continuous piecewise-affine field of two states with three regions
cut by two parallel lines (the field is continuous across them: only its slope changes),
driven around by a piecewise-constant input, is recorded as runs of 10,000 samples and fitted
with the defaults at 2 x 10^4 and at 10^6 samples (``HybridIdentifier().fit``, what
``modemap fit`` runs, without file input and output).  The number of regimes and the label
accuracy must agree between the two sizes; the time of the 10^6 fit is printed against the
target of 60 s on two cores and against a floor measured in the same run (one pass of the
normal equations of the cubic terms over all rows: what any fit of this library must at
least do).  The speed target is printed, not enforced.
"""

from __future__ import annotations

import time

import numpy as np
import pandas as pd
import pytest
from scipy.optimize import linear_sum_assignment

from modemap import read_data
from modemap.identify import HybridIdentifier
from modemap.terms.library import TermLibrary

pytestmark = pytest.mark.perf

RUN = 10_000
STEP = 0.01
#: the base field (a stable focus), the two lines x1 = -1 and x1 = 1, and the change of the
#: field's first column across each (invented values)
A0 = np.array([[-0.4, 2.0], [-2.0, -0.4]])
B = np.array([0.0, 1.0])
LINES = (-1.0, 1.0)
KINKS = (np.array([0.0, 1.5]), np.array([0.0, -1.5]))


def _field(x: np.ndarray, u: np.ndarray) -> np.ndarray:
    out = x @ A0.T + u[:, None] * B
    out += np.maximum(0.0, LINES[0] - x[:, :1]) * KINKS[0]  # left of x1 = -1
    out += np.maximum(0.0, x[:, :1] - LINES[1]) * KINKS[1]  # right of x1 = 1
    return out


def _region(x: np.ndarray) -> np.ndarray:
    return np.digitize(x[:, 0], LINES)


def invented_pwa(n_samples: int, seed: int = 0) -> tuple[pd.DataFrame, np.ndarray]:
    """Runs of ``RUN`` samples (RK4 at ``STEP``, the input held over each interval), 0.1 %
    noise of each state's range; the frame and the true region of every row."""
    rng = np.random.default_rng(seed)
    n_runs = max(1, n_samples // RUN)
    x = rng.uniform(-2.0, 2.0, size=(n_runs, 2))
    hold = rng.integers(150, 400, size=n_runs)
    u = rng.uniform(-3.0, 3.0, size=n_runs)
    states = np.empty((RUN, n_runs, 2))
    inputs = np.empty((RUN, n_runs))
    for k in range(RUN):
        change = (k % hold) == 0
        u = np.where(change, rng.uniform(-3.0, 3.0, size=n_runs), u)
        states[k], inputs[k] = x, u
        k1 = _field(x, u)
        k2 = _field(x + 0.5 * STEP * k1, u)
        k3 = _field(x + 0.5 * STEP * k2, u)
        k4 = _field(x + STEP * k3, u)
        x = x + STEP / 6.0 * (k1 + 2 * k2 + 2 * k3 + k4)
    states = states.transpose(1, 0, 2).reshape(-1, 2)
    inputs = inputs.T.reshape(-1)
    truth = _region(states)
    span = states.max(axis=0) - states.min(axis=0)
    noisy = states + 0.001 * span * rng.standard_normal(states.shape)
    frame = pd.DataFrame(
        {
            "t": np.tile(np.arange(RUN) * STEP, n_runs),
            "run": np.repeat(np.arange(n_runs), RUN),
            "x1": noisy[:, 0],
            "x2": noisy[:, 1],
            "u": inputs,
        }
    )
    return frame, truth


def _accuracy(labels: np.ndarray, truth: np.ndarray) -> float:
    k = int(max(labels.max(), truth.max())) + 1
    counts = np.zeros((k, k))
    np.add.at(counts, (labels, truth), 1)
    rows, cols = linear_sum_assignment(-counts)
    return float(counts[rows, cols].sum() / labels.size)


def _floor(frame: pd.DataFrame) -> float:
    start = time.perf_counter()
    lib = TermLibrary(degree=3).fit(["x1", "x2", "u"])
    theta = lib.transform(frame[["x1", "x2", "u"]].to_numpy())
    gram = theta.T @ theta
    np.linalg.solve(gram + 1e-9 * np.eye(gram.shape[0]), theta.T @ theta[:, :2])
    return time.perf_counter() - start


def _fit(n: int) -> dict:
    frame, truth = invented_pwa(n)
    ds = read_data(frame, time="t", states=["x1", "x2"], inputs=["u"], run="run")
    start = time.perf_counter()
    ident = HybridIdentifier().fit(ds)
    seconds = time.perf_counter() - start
    labels = ident.labels_["regime"].to_numpy()
    return {
        "n": len(frame),
        "regimes": ident.model_.n_regimes,
        "accuracy": _accuracy(labels, truth),
        "seconds": seconds,
        "floor": _floor(frame),
    }


def test_same_answer_at_two_sizes() -> None:
    small, large = _fit(20_000), _fit(1_000_000)
    for r in (small, large):
        print(
            f"N = {r['n']:>9,}: K = {r['regimes']}, labels {100 * r['accuracy']:.1f} % right, "
            f"fit {r['seconds']:.1f} s, floor {r['floor']:.2f} s, "
            f"ratio {r['seconds'] / r['floor']:.0f}"
        )
    print(f"target: 10^6 within 60 s on 2 cores: {'met' if large['seconds'] <= 60 else 'missed'}")
    assert small["regimes"] == 3
    assert large["regimes"] == small["regimes"]
    assert abs(large["accuracy"] - small["accuracy"]) < 0.01
