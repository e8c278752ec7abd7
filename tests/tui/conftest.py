"""Tiny hand-built models and data for the dashboard tests.

The scenario is invented: a cart whose position x [m] and speed v [m/s] follow
a fixed sum of two sines; regimes are position bands.  Nothing is fitted: the
model objects are written by hand so the tests do not depend on the fitting
modules, and every number is fixed (no random draws, no clocks).
"""

from __future__ import annotations

import asyncio
import functools
import time as _time
from types import SimpleNamespace

import numpy as np
import pandas as pd

from modemap.app.tui.app import DashboardApp
from modemap.app.tui.widgets.tables import plain_equations
from modemap.data.dataset import Dataset, Run
from modemap.model.hybrid import Equilibrium, Guard, HybridModel, RegimeModel

STEP = 0.1


def trajectory(t: np.ndarray, phase: float) -> np.ndarray:
    x = 2.0 * np.sin(0.3 * t + phase) + 0.3 * np.sin(1.1 * t)
    v = 0.6 * np.cos(0.3 * t + phase) + 0.33 * np.cos(1.1 * t)
    return np.column_stack([x, v])


def make_dataset() -> Dataset:
    runs = []
    for i, phase in enumerate((0.0, 1.3)):
        t = np.round(np.arange(0, 40 + i * 10, STEP), 10)
        runs.append(
            Run(
                f"r{i + 1}",
                f"r{i + 1}",
                t,
                trajectory(t, phase),
                np.zeros((t.size, 0)),
                np.arange(t.size),
            )
        )
    return Dataset(
        runs=tuple(runs),
        time_name="t",
        state_names=("x", "v"),
        units={"t": "s", "x": "m", "v": "m/s"},
        step=STEP,
        source="<invented>",
    )


def bands(k: int) -> np.ndarray:
    """Position thresholds splitting [-2.3, 2.3] into k bands."""
    return np.linspace(-2.3, 2.3, k + 1)[1:-1]


def make_labels(ds: Dataset, k: int) -> pd.DataFrame:
    frames = []
    for r in ds.runs:
        reg = (
            np.searchsorted(bands(k), r.states[:, 0]) if k > 1 else np.zeros(r.n_samples, dtype=int)
        )
        frames.append(pd.DataFrame({"run": r.name, "time": r.time, "regime": reg}))
    return pd.concat(frames, ignore_index=True)


def make_model(k: int, ds: Dataset, labels: pd.DataFrame) -> HybridModel:
    edges = np.concatenate([[-2.3], bands(k), [2.3]]) if k else np.array([])
    regimes = []
    for j in range(k):
        x_eq = 0.5 * (edges[j] + edges[j + 1])
        coef = np.array([[0.0, 0.09 * x_eq], [0.0, -0.09], [1.0, -0.05]])
        stderr = np.array([[0.0, 0.001], [0.0, 0.002], [0.01, 0.004]])
        eq = Equilibrium(
            point={"x": float(x_eq), "v": 0.0},
            eigenvalues=np.array([-0.025 + 0.3j, -0.025 - 0.3j]),
            stability="stable focus" if j % 2 == 0 else "unstable focus",
            inside=j != 1,
            time_constants=[40.0],
            period=20.9,
        )
        n = int((labels["regime"] == j).sum())
        regimes.append(RegimeModel(j, n, ["1", "x", "v"], coef, stderr, np.eye(2) * 1e-4, [eq]))
    guards = []
    for j in range(k - 1):
        b = float(edges[j + 1])
        guards.append(Guard(j, j + 1, ["x"], np.array([1.0]), -b, f"x > {b:.3g} m"))
        guards.append(Guard(j + 1, j, ["x"], np.array([-1.0]), b - 0.1, f"x < {b - 0.1:.3g} m"))
    if k >= 3:  # one oblique surface, to draw a half-plane boundary
        guards.append(Guard(0, k - 1, ["x", "v"], np.array([1.0, 2.0]), -1.0, "x + 2 v > 1"))
    share = labels["regime"].value_counts(normalize=True)
    trans = np.zeros((k, k), dtype=int)
    for _, g in labels.groupby("run"):
        r = g["regime"].to_numpy()
        np.add.at(trans, (r[:-1][r[:-1] != r[1:]], r[1:][r[:-1] != r[1:]]), 1)
    stats = {
        "share": {str(j): float(share.get(j, 0.0)) for j in range(k)},
        "dwell": {
            str(j): {"count": 4 + j, "mean": 3.5, "median": 3.1, "min": 0.4, "max": 9.2}
            for j in range(k)
        },
        "transitions": trans.tolist(),
    }
    validation = {
        "tolerance": 0.1,
        "holdout": "runs",
        "runs": [
            {
                "run": "r2",
                "nrmse": {"x": 0.052, "v": 0.081},
                "regime_agreement": 0.93,
                "switches_measured": 6,
                "switches_simulated": 7,
                "switch_timing_error": 0.4,
                "horizon": 50.0,
                "status": "ok",
            }
        ],
        "summary": {"nrmse": 0.066, "regime_agreement": 0.93},
        "one_step": {
            str(j): {"r2": {"x": 0.99, "v": 0.97}, "rmse": {"x": 0.01, "v": 0.02}} for j in range(k)
        },
    }
    selection = [
        {
            "K": kk,
            "degree": 1,
            "n_regimes": kk,
            "loglik": -500.0 + 40 * kk,
            "n_params": 8 * kk,
            "criterion": 1000.0 - 30 * kk,
            "effective_windows": 900.0,
            "collapsed": False,
            "chosen": kk == k,
        }
        for kk in range(1, k + 1)
    ]
    return HybridModel(
        states=["x", "v"],
        inputs=[],
        form="continuous",
        regimes=regimes,
        guards=guards,
        time_name="t",
        units={"t": "s", "x": "m", "v": "m/s"},
        step=STEP,
        data_range={"x": (-2.3, 2.3), "v": (-0.93, 0.93)},
        selection=selection,
        statistics=stats,
        validation=validation,
        metadata={"options": {"degree": 1, "threshold": "auto"}},
    )


def fake_simulate(model, time, x0, inputs, regime0):
    """Deterministic stand-in: the run's own trajectory, a little damped."""
    phase = 0.0 if np.isclose(x0[0], 0.0) else 1.3
    states = trajectory(np.asarray(time), phase) * np.exp(-0.004 * np.asarray(time))[:, None]
    k = max(model.n_regimes, 1)
    regimes = np.searchsorted(bands(k), states[:, 0]) if k > 1 else np.zeros(len(time), dtype=int)
    return SimpleNamespace(
        time=np.asarray(time), states=states, regimes=regimes, switches=[], status=0, message="ok"
    )


def demo_app(k: int = 3, *, with_data: bool = True, **kwargs) -> DashboardApp:
    ds = make_dataset()
    labels = make_labels(ds, k)
    model = make_model(k, ds, labels)
    kwargs.setdefault("simulate", fake_simulate)
    kwargs.setdefault("formatter", plain_equations)
    kwargs.setdefault("refit", refit_to(4))
    return DashboardApp(model, ds if with_data else None, labels if with_data else None, **kwargs)


def refit_to(k: int):
    """Fake refit: reports progress in five steps, returns the hand-built ``k``-regime model."""

    def refit(dataset, options, progress):
        for i in range(5):
            progress(i / 5, f"step {i + 1} of 5")
        labels = make_labels(dataset, k)
        return make_model(k, dataset, labels), labels

    return refit


def endless_refit(dataset, options, progress):
    """Fake refit that only stops when the progress callback raises FitCancelled."""
    start = _time.monotonic()
    while _time.monotonic() - start < 20.0:
        progress(0.5, "working")
        _time.sleep(0.01)
    raise AssertionError("the fit was never cancelled")


def sync(fn):
    """Run an ``async`` test body with ``asyncio.run`` (no async pytest plugin needed)."""

    @functools.wraps(fn)
    def wrapper(*args, **kwargs):
        return asyncio.run(fn(*args, **kwargs))

    return wrapper


__all__ = [
    "demo_app",
    "endless_refit",
    "make_dataset",
    "make_labels",
    "make_model",
    "refit_to",
]
