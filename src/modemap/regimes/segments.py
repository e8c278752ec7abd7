"""Derivatives re-estimated within regime segments (continuous form).

A smoothing derivative (Savitzky-Golay, spline, total variation) computed over
a whole run blurs every switch: a sample within half a window of a regime
change gets a derivative that mixes both regimes' vector fields.  With fast
switching (a PWM converter switches every few tens of samples) these mixed
samples are a large share of the data and look like extra regimes.

Once labels exist, the derivative is therefore re-estimated inside each
stretch of constant label, exactly as derivatives are never taken across run
boundaries.  The method and its options are the ones recorded for the run;
stretches too short for them fall back to central differences.  A one-sample
stretch next to an input step takes the estimate of the stretch on the step's
other side (the step is a fact, the label change a hypothesis); between two
input steps it takes the mean slope of its own interval; between two label
changes it keeps its whole-run value.

A step of a piecewise-constant input (a draw switched on, a coolant set point
moved) puts a kink in the states just as a regime change does, so stretches are
also cut where such an input changes.  An input counts as stepped when it
changes at no more than a quarter of the samples (a sampled continuous signal
changes at almost every sample and is left alone).  Measured on an earlier
version of the invented water-heater demo (30 s samples, draws held 6 min on
average) with its true labels: without these cuts the heater-off fit carried
spurious ``T^2`` and ``w^2`` terms (the draw stepped every 12 samples on
average, inside a 9-sample smoothing window); with them it kept ``T`` and
``T*w`` only.

Many short stretches of the same length and settings (many short runs give tens of
thousands) are differentiated together, as one array: central differences with NumPy's own
formulas, term by term, which give each stretch exactly the numbers it gets alone, and
Savitzky-Golay with SciPy's filter along the stacked axis, which agrees to round-off (its
end-point polynomial fits are one least-squares solve for all stretches).  Checked against
the one-stretch path in ``tests/test_regimes_segments.py``.  Only the stretches of short
runs are batched, under the rule of the regime chain's recursions
(:func:`modemap.regimes.short_runs.batched`: at least 16 runs of at most 64 samples), so data
of a few long runs take the one-stretch path exactly as before; other methods always do.
"""

from __future__ import annotations

from collections import defaultdict
from itertools import pairwise
from typing import Any

import numpy as np
from scipy.signal import savgol_filter

from modemap.data.derivatives import (
    RECORD_ONLY,
    UNIFORM_TOLERANCE,
    differentiate,
    gradient_rows,
)
from modemap.regimes.short_runs import batched

__all__ = ["segment_derivatives", "stepped_columns"]

_MIN_SMOOTH = 7  # shortest stretch given to the recorded (smoothing) method
_MAX_STEP_SHARE = 0.25  # an input changing at more samples than this is not "stepped"


def segment_derivatives(
    time: np.ndarray,
    states: np.ndarray,
    Y: np.ndarray,
    lengths: np.ndarray,
    labels: np.ndarray,
    settings: dict[str, Any],
    inputs: np.ndarray | None = None,
) -> np.ndarray:
    """Derivatives recomputed within each stretch of constant label of each run.

    Parameters
    ----------
    time : ndarray of shape (n,)
    states : ndarray of shape (n, m)
    Y : ndarray of shape (n, m)
        Whole-run derivatives (kept for one-sample stretches).
    lengths : ndarray of int
        Rows per run (rows never cross runs).
    labels : ndarray of shape (n,)
    settings : dict
        Recorded derivative settings; ``settings["per_run"]`` (one dict per run)
        is used when present.
    inputs : ndarray of shape (n, n_inputs), optional
        Stretches are also cut where a stepped input changes (see the module notes).

    Returns
    -------
    ndarray of shape (n, m)
    """
    out = np.array(Y, dtype=np.float64, copy=True)
    per_run = settings.get("per_run") or [settings] * len(lengths)
    if len(per_run) != len(lengths):
        per_run = [settings] * len(lengths)
    steps = _input_steps(inputs, labels.size)
    jobs: list[tuple[int, int, dict[str, Any]]] = []  # stretch rows a:b and its settings
    targets: list[tuple[slice | int, slice | int]] = []  # rows of out <- rows of the result
    together: list[bool] = []  # the stretch may be computed with others
    short = batched(np.asarray(lengths)).tolist()
    offset = 0
    for length, run_settings, in_batch in zip(lengths, per_run, short, strict=True):
        first = len(jobs)
        stop = offset + int(length)
        lab = labels[offset:stop]
        cuts = np.flatnonzero((lab[1:] != lab[:-1]) | steps[offset + 1 : stop]) + 1
        edges = (np.concatenate([[0], cuts, [lab.size]]) + offset).tolist()
        for i, (a, b) in enumerate(pairwise(edges)):
            if b - a >= 2:
                jobs.append((a, b, run_settings))
                targets.append((slice(a, b), slice(None)))
                continue
            # one sample between an input step and a label change: the step is a fact, the
            # label change a hypothesis, so take the sample's derivative from the stretch on
            # the side without the step (else it would keep the smeared whole-run value)
            left_step = a > offset and steps[a]
            right_step = b < stop and steps[b]
            if left_step and not right_step and b < stop:
                jobs.append((a, edges[i + 2], run_settings))
                targets.append((a, 0))
            elif right_step and not left_step and a > offset:
                jobs.append((edges[i - 1], b, run_settings))
                targets.append((a, -1))
            elif left_step and right_step:
                # the input holds for this one interval only: its mean slope
                out[a] = (states[b] - states[a]) / (time[b] - time[a])
        together += [in_batch] * (len(jobs) - first)
        offset = stop
    results = _stretches(time, states, jobs, together)
    for (rows, pick), dx in zip(targets, results, strict=True):
        out[rows] = dx[pick]
    return out


def _stretches(
    time: np.ndarray,
    states: np.ndarray,
    jobs: list[tuple[int, int, dict[str, Any]]],
    together: list[bool],
) -> list[np.ndarray]:
    """The derivative of each stretch ``(a, b, settings)``; those marked ``together`` and
    alike (length, settings, step) are computed as one array."""
    results: list[np.ndarray | None] = [None] * len(jobs)
    groups: dict[tuple | None, list[int]] = defaultdict(list)
    alike: dict[tuple | None, list[int]] = defaultdict(list)  # same length and options
    for j, ((a, b, settings), join) in enumerate(zip(jobs, together, strict=True)):
        alike[_options_key(b - a, settings) if join else None].append(j)
    for options, members in alike.items():
        if options is None:
            groups[None] += members
            continue
        rows = np.array([jobs[j][0] for j in members])[:, None] + np.arange(options[1])
        for j, key in zip(members, _batch_keys(time[rows], options), strict=True):
            groups[key].append(j)
    for key, members in groups.items():
        if key is None:
            for j in members:
                a, b, settings = jobs[j]
                results[j] = _stretch(time[a:b], states[a:b], settings)
            continue
        rows = np.array([jobs[j][0] for j in members])[:, None] + np.arange(key[1])
        stack = states[rows]  # (stretches, n, m)
        if key[0] == "savgol":
            _, _, window, order, step = key
            dx = savgol_filter(stack, window, order, deriv=1, delta=step, axis=1, mode="interp")
        else:
            dx = gradient_rows(stack, time[rows], uniform=key[3], edge_order=key[2])
        for j, d in zip(members, dx, strict=True):
            results[j] = d
    return results  # type: ignore[return-value]


def _options_key(n: int, settings: dict[str, Any]) -> tuple | None:
    """The settings of a stretch of ``n`` samples that its derivative depends on, or None
    (a method or option computed one stretch at a time)."""
    method = settings.get("method", "central")
    if method == "central" or n < _MIN_SMOOTH:
        return ("central", n, 2 if n >= 3 else 1)
    options = {k: v for k, v in settings.items() if k not in RECORD_ONLY and k != "method"}
    if method != "savgol" or options.get("window") is None or set(options) - {"window", "order"}:
        return None
    window, order = int(options["window"]), int(options.get("order", 2))
    if window % 2 == 0 or window < 3 or not 1 <= order < window:
        return None  # the one-stretch path says what is wrong
    window = min(window, n if n % 2 else n - 1)
    return ("savgol", n, window, min(order, window - 1))


def _batch_keys(t: np.ndarray, options: tuple) -> list[tuple | None]:
    """Each stretch's key (``t`` is (stretches, n)): its options and what the result depends
    on in its time stamps, with the tests of the one-stretch path row by row."""
    dt = np.diff(t, axis=1)
    if options[0] == "central":  # NumPy's own test for a scalar spacing
        return [(*options, bool(u)) for u in (dt == dt[:, :1]).all(axis=1)]
    step = np.median(dt, axis=1)  # derivatives.is_uniform and the Savitzky-Golay step
    uniform = np.max(np.abs(dt - step[:, None]), axis=1) <= UNIFORM_TOLERANCE * step
    return [(*options, float(h)) if u else None for h, u in zip(step, uniform, strict=True)]


def stepped_columns(inputs: np.ndarray) -> np.ndarray:
    """Which input columns are stepped: they change at no more than a quarter of the samples.

    Parameters
    ----------
    inputs : ndarray of shape (n, n_inputs)

    Returns
    -------
    ndarray of bool, shape (n_inputs,)
    """
    inputs = np.asarray(inputs)
    if inputs.ndim != 2 or inputs.shape[0] < 2:
        return np.zeros(inputs.shape[-1] if inputs.ndim == 2 else 0, dtype=bool)
    return (inputs[1:] != inputs[:-1]).mean(axis=0) <= _MAX_STEP_SHARE


def _input_steps(inputs: np.ndarray | None, n: int) -> np.ndarray:
    """``steps[i]``: a stepped input changes between samples ``i - 1`` and ``i``."""
    steps = np.zeros(n, dtype=bool)
    if inputs is None or np.size(inputs) == 0 or n < 2:
        return steps
    inputs = np.asarray(inputs).reshape(n, -1)
    change = inputs[1:] != inputs[:-1]
    steps[1:] = change[:, stepped_columns(inputs)].any(axis=1)
    return steps


def _stretch(t: np.ndarray, x: np.ndarray, settings: dict[str, Any]) -> np.ndarray:
    method = settings.get("method", "central")
    if method == "central" or t.size < _MIN_SMOOTH:
        return np.gradient(x, t, axis=0, edge_order=2 if t.size >= 3 else 1)
    options = {k: v for k, v in settings.items() if k != "method"}
    dx, _ = differentiate(t, x, method=method, **options)
    return dx
