"""Held-out validation of a hybrid model: re-simulation and one-step figures.

Re-simulation (:func:`validate`)
    Each test run is simulated from its first measured state with its measured
    inputs (initial regime: the first assigned label when labels are given,
    else classified by the simulator).  Per run:

    * ``nrmse`` per state: root mean squared error divided by the range
      (max - min) of the measured state over the run (by 1 when the range is
      zero), over the samples the simulation reached;
    * ``horizon``: time from the start until the normalised error
      ``max_j |sim_j - meas_j| / range_j`` first exceeds ``tolerance`` (the run
      duration when it never does; the stop time when the simulation stopped);
    * with labels: ``regime_agreement`` (share of labelled samples whose
      simulated regime equals the label), ``switches_measured`` (label changes,
      unassigned samples skipped), ``switches_matched`` / ``switches_missed`` /
      ``switches_spurious`` (measured switches with a simulated one paired by
      :func:`match_switches`, measured ones without, simulated ones without),
      ``switch_timing_error`` (mean absolute time
      difference of switches matched by :func:`match_switches`, window half the
      median measured dwell); ``None`` when labels are not given or nothing
      matched;
    * ``switches_simulated``, ``status`` and ``message`` from the simulator.

One-step quality (:func:`one_step_quality`)
    Per regime, R^2 and RMSE per state of the model's prediction of the
    regression target (the derivative in continuous form, the next sample in
    discrete form) on the rows labelled with that regime.  R^2 follows the
    usual definition ``1 - SS_res / SS_tot`` (1 for a perfect fit of a constant
    target, 0 otherwise, as scikit-learn's ``r2_score`` does).
"""

from __future__ import annotations

from collections.abc import Mapping
from typing import Any

import numpy as np

from modemap._exceptions import DataError
from modemap.data.dataset import Dataset
from modemap.model.hybrid import HybridModel
from modemap.model.switches import match_switches
from modemap.terms.library import TermLibrary

__all__ = ["one_step_quality", "validate"]


def _labels_per_run(labels: Any, test: Dataset) -> list[np.ndarray] | None:
    if labels is None:
        return None
    if isinstance(labels, Mapping):
        out = [np.asarray(labels[r.name]).astype(np.int64) for r in test.runs]
    elif isinstance(labels, np.ndarray) and labels.ndim == 1 and labels.size == test.n_samples:
        out = list(np.split(labels.astype(np.int64), np.cumsum(test.lengths)[:-1]))
    else:
        out = [np.asarray(lab).astype(np.int64) for lab in labels]
    if len(out) != len(test.runs) or any(
        lab.size != r.n_samples for lab, r in zip(out, test.runs, strict=False)
    ):
        raise DataError("labels do not match the test runs (one label per sample and run)")
    return out


def _label_switch_times(time: np.ndarray, lab: np.ndarray) -> np.ndarray:
    idx = np.flatnonzero(lab >= 0)
    if idx.size < 2:
        return np.zeros(0)
    pos = idx[1:][lab[idx[1:]] != lab[idx[:-1]]]
    return time[pos]


def _run_figures(model, run, lab, tolerance, sim_options) -> dict[str, Any]:
    from modemap.simulation.simulator import (
        simulate,  # local import: simulate imports nothing from here
    )

    regime0 = None
    if lab is not None and np.any(lab >= 0):
        regime0 = int(lab[np.flatnonzero(lab >= 0)[0]])
    inputs = run.inputs if len(model.inputs) else None
    res = simulate(model, run.time, run.states[0], inputs, regime0, **sim_options)
    meas, sim = run.states, res.states
    scale = np.ptp(meas, axis=0)
    scale = np.where(scale > 0, scale, 1.0)
    reached = np.all(np.isfinite(sim), axis=1)
    err = (sim - meas) / scale
    nrmse = {
        s: (float(np.sqrt(np.mean(err[reached, j] ** 2))) if reached.any() else None)
        for j, s in enumerate(model.states)
    }
    worst = np.where(reached, np.max(np.abs(np.where(reached[:, None], err, 0)), axis=1), np.inf)
    over = np.flatnonzero(worst > tolerance)
    horizon = float(run.time[over[0]] - run.time[0]) if over.size else float(run.duration)
    out: dict[str, Any] = {
        "run": run.name,
        "nrmse": nrmse,
        "regime_agreement": None,
        "switches_measured": None,
        "switches_simulated": len(res.switches),
        "switches_matched": None,
        "switches_missed": None,
        "switches_spurious": None,
        "switch_timing_error": None,
        "horizon": horizon,
        "status": int(res.status),
        "message": res.message,
    }
    if lab is not None:
        out.update(_regime_figures(run.time, lab, res))
    return out


def _regime_figures(time: np.ndarray, lab: np.ndarray, res) -> dict[str, Any]:
    known = lab >= 0
    agree = float(np.mean(res.regimes[known] == lab[known])) if known.any() else None
    t_meas = _label_switch_times(time, lab)
    t_sim = np.array([s[0] for s in res.switches])
    dwell = np.diff(t_meas)
    window = 0.5 * float(np.median(dwell)) if dwell.size else float(time[-1] - time[0])
    mi, pi = match_switches(t_meas, t_sim, window)
    timing = float(np.mean(np.abs(t_meas[mi] - t_sim[pi]))) if mi.size else None
    return {
        "regime_agreement": agree,
        "switches_measured": int(t_meas.size),
        "switches_matched": int(mi.size),
        "switches_missed": int(t_meas.size - mi.size),
        "switches_spurious": int(t_sim.size - pi.size),
        "switch_timing_error": timing,
    }


def _mean(values: list) -> float | None:
    vals = [v for v in values if v is not None]
    return float(np.mean(vals)) if vals else None


def validate(
    model: HybridModel,
    test: Dataset,
    labels: Any = None,
    tolerance: float = 0.1,
    *,
    holdout: str | None = None,
    **sim_options: Any,
) -> dict[str, Any]:
    """Re-simulate every test run and compare with the measurements.

    Parameters
    ----------
    model : HybridModel
    test : Dataset
        Held-out runs, with the model's states and inputs.
    labels : sequence of int arrays (one per run), dict run name -> array, or
        one array over all test samples, optional
        Regime labels of the test samples (``-1`` unassigned).
    tolerance : float
        Normalised error defining the prediction horizon.
    holdout : {"runs", "tails"}, optional
        How the test set was made; recorded as is (inferred from the run count
        when omitted: ``"runs"`` for several runs, ``"tails"`` for one).
    **sim_options
        Passed to :func:`modemap.simulation.simulator.simulate` (e.g. ``blowup``, ``rtol``).

    Returns
    -------
    dict
        ``{"tolerance", "holdout", "runs": [...], "summary": {...}, "one_step": {}}``;
        the one-step figures are filled by the caller from :func:`one_step_quality`.
    """
    if tuple(test.state_names) != tuple(model.states) or tuple(test.input_names) != tuple(
        model.inputs
    ):
        raise DataError(
            f"test data has states {list(test.state_names)} and inputs {list(test.input_names)}; "
            f"the model needs {model.states} and {model.inputs}",
            source=test.source,
        )
    labs = _labels_per_run(labels, test)
    runs = [
        _run_figures(model, run, None if labs is None else labs[i], tolerance, sim_options)
        for i, run in enumerate(test.runs)
    ]
    summary = {
        "n_runs": len(runs),
        "n_stopped": sum(r["status"] != 0 for r in runs),
        "nrmse": {s: _mean([r["nrmse"][s] for r in runs]) for s in model.states},
        "horizon": _mean([r["horizon"] for r in runs]),
        "regime_agreement": _mean([r["regime_agreement"] for r in runs]),
        "switches_measured": (
            None if labs is None else int(sum(r["switches_measured"] for r in runs))
        ),
        "switches_simulated": int(sum(r["switches_simulated"] for r in runs)),
        **{
            key: None if labs is None else int(sum(r[key] for r in runs))
            for key in ("switches_matched", "switches_missed", "switches_spurious")
        },
        "switch_timing_error": _mean([r["switch_timing_error"] for r in runs]),
    }
    return {
        "tolerance": float(tolerance),
        "holdout": holdout or ("runs" if len(test.runs) > 1 else "tails"),
        "runs": runs,
        "summary": summary,
        "one_step": {},
    }


def _r2(y: np.ndarray, pred: np.ndarray) -> float:
    ss_res = float(np.sum((y - pred) ** 2))
    ss_tot = float(np.sum((y - y.mean()) ** 2))
    if ss_tot == 0:
        return 1.0 if ss_res == 0 else 0.0
    return 1.0 - ss_res / ss_tot


def one_step_quality(
    model: HybridModel, Z: np.ndarray, Y: np.ndarray, labels: np.ndarray
) -> dict[str, dict[str, Any]]:
    """R^2 and RMSE per regime and state of the one-step prediction.

    Parameters
    ----------
    model : HybridModel
    Z : ndarray of shape (n, n_vars)
        Variables (states then inputs).
    Y : ndarray of shape (n, n_states)
        Regression targets: derivatives (continuous form) or next samples
        (discrete form).
    labels : ndarray of shape (n,) of int
        Regime per row (``-1`` rows are ignored).

    Returns
    -------
    dict
        ``{"<regime id>": {"r2": {state: v}, "rmse": {state: v}, "samples": n}}``;
        figures are ``None`` for a regime with fewer than 2 rows.
    """
    Z, Y = np.asarray(Z, dtype=float), np.asarray(Y, dtype=float)
    labels = np.asarray(labels).reshape(-1)
    if Z.shape[0] != labels.size or Y.shape != (labels.size, len(model.states)):
        raise DataError(
            f"Z {Z.shape}, Y {Y.shape} and labels ({labels.size},) do not agree with "
            f"{len(model.states)} states"
        )
    out: dict[str, dict[str, Any]] = {}
    for reg in model.regimes:
        rows = np.flatnonzero(labels == reg.id)
        entry: dict[str, Any] = {"r2": {}, "rmse": {}, "samples": int(rows.size)}
        if rows.size >= 2:
            lib = TermLibrary.from_terms(reg.terms, model.variables)
            pred = lib.transform(Z[rows]) @ np.asarray(reg.coefficients, dtype=float)
        for j, s in enumerate(model.states):
            if rows.size < 2:
                entry["r2"][s] = entry["rmse"][s] = None
                continue
            entry["r2"][s] = _r2(Y[rows, j], pred[:, j])
            entry["rmse"][s] = float(np.sqrt(np.mean((Y[rows, j] - pred[:, j]) ** 2)))
        out[str(reg.id)] = entry
    return out
