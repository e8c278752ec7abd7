"""Benchmark of many short runs (marker ``perf``; run with
``pytest tests/perf/bench_short_runs.py -m perf -s``).

An invented one-state switched affine system, logged as 10,000 runs of 10 samples (the
shape of a batch process logged per batch, or of a test bench's short records).  The floor is
the same rows read as one run, fitted in the same process: per-run work done run by run in
Python (the regime chain's recursions, the derivatives in each stretch) made the short runs
cost minutes where the one run costs seconds; batched over runs, the two should be close.

Printed: both wall times and their ratio (target <= 5; measured figures are in
docs/performance.md).  Pass or fail: the ratio target, and that the fit of the short runs
finds the two regimes of the invented system (the one run has a jump at every run boundary,
so its answer is not checked: it is only the floor of the cost).
"""

from __future__ import annotations

import os
import time

import numpy as np
import pandas as pd
import pytest

from modemap.data.intake import read_data
from modemap.identify import HybridIdentifier

pytestmark = pytest.mark.perf

RUNS = int(os.environ.get("MODEMAP_BENCH_RUNS", "10000"))
SAMPLES = 10
STEP = 0.1
TARGET_RATIO = 5.0


def short_runs(n_runs: int = RUNS, seed: int = 0) -> pd.DataFrame:
    """Invented data: dx/dt = -(x - 2) in regime 0 and -3 (x + 1) in regime 1, each run
    starting anywhere in [-2, 3] and switching once with probability 1/2 (exact solution of
    the affine flow between samples, plus noise of 0.01)."""
    rng = np.random.default_rng(seed)
    rows = []
    for r in range(n_runs):
        x = rng.uniform(-2.0, 3.0)
        regime = int(rng.integers(0, 2))
        switch = int(rng.integers(1, 2 * SAMPLES))  # beyond the run: no switch
        for k in range(SAMPLES):
            rows.append((r, k * STEP, x + 0.01 * rng.standard_normal(), regime))
            rate, target = (1.0, 2.0) if regime == 0 else (3.0, -1.0)
            x = target + (x - target) * np.exp(-rate * STEP)
            if k + 1 == switch:
                regime = 1 - regime
    return pd.DataFrame(rows, columns=["run", "t", "x", "true_regime"])


def _fit(frame: pd.DataFrame, run: str | None) -> tuple[float, HybridIdentifier]:
    ds = read_data(frame, time="t", states=["x"], run=run)
    ident = HybridIdentifier.from_options(seed=0)
    start = time.perf_counter()
    ident.fit(ds)
    return time.perf_counter() - start, ident


def test_many_short_runs_cost_about_what_one_run_costs() -> None:
    frame = short_runs()
    one = frame.copy()
    one["t"] = np.arange(len(one)) * STEP  # the same rows as one run
    floor, single = _fit(one.drop(columns="run"), None)
    elapsed, many = _fit(frame, "run")
    print(
        f"\n{RUNS} runs x {SAMPLES} samples: {elapsed:.1f} s; the same rows as one run: "
        f"{floor:.1f} s; ratio {elapsed / floor:.1f} (target <= {TARGET_RATIO:g}); "
        f"regimes found {many.model_.n_regimes} (one run: {single.model_.n_regimes})"
    )
    assert many.model_.n_regimes == 2
    assert elapsed / floor <= TARGET_RATIO
