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
"""

from __future__ import annotations

from itertools import pairwise
from typing import Any

import numpy as np

from modemap.data.derivatives import differentiate

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
    offset = 0
    for length, run_settings in zip(lengths, per_run, strict=True):
        stop = offset + int(length)
        lab = labels[offset:stop]
        cuts = np.flatnonzero((lab[1:] != lab[:-1]) | steps[offset + 1 : stop]) + 1
        edges = np.concatenate([[0], cuts, [lab.size]]) + offset
        for i, (a, b) in enumerate(pairwise(edges)):
            if b - a >= 2:
                out[a:b] = _stretch(time[a:b], states[a:b], run_settings)
                continue
            # one sample between an input step and a label change: the step is a fact, the
            # label change a hypothesis, so take the sample's derivative from the stretch on
            # the side without the step (else it would keep the smeared whole-run value)
            left_step = a > offset and steps[a]
            right_step = b < stop and steps[b]
            if left_step and not right_step and b < stop:
                c = edges[i + 2]
                out[a] = _stretch(time[a:c], states[a:c], run_settings)[0]
            elif right_step and not left_step and a > offset:
                c = edges[i - 1]
                out[a] = _stretch(time[c:b], states[c:b], run_settings)[-1]
            elif left_step and right_step:
                # the input holds for this one interval only: its mean slope
                out[a] = (states[b] - states[a]) / (time[b] - time[a])
        offset = stop
    return out


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
