"""Derivatives re-estimated within regime segments (continuous form).

A smoothing derivative (Savitzky-Golay, spline, total variation) computed over
a whole run blurs every switch: a sample within half a window of a regime
change gets a derivative that mixes both regimes' vector fields.  With fast
switching (a PWM converter switches every few tens of samples) these mixed
samples are a large share of the data and look like extra regimes.

Once labels exist, the derivative is therefore re-estimated inside each
stretch of constant label, exactly as derivatives are never taken across run
boundaries.  The method and its options are the ones recorded for the run;
stretches too short for them fall back to central differences, and a
one-sample stretch keeps its whole-run value.
"""

from __future__ import annotations

from itertools import pairwise
from typing import Any

import numpy as np

from modemap.derivatives import differentiate

__all__ = ["segment_derivatives"]

_MIN_SMOOTH = 7  # shortest stretch given to the recorded (smoothing) method


def segment_derivatives(
    time: np.ndarray,
    states: np.ndarray,
    Y: np.ndarray,
    lengths: np.ndarray,
    labels: np.ndarray,
    settings: dict[str, Any],
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

    Returns
    -------
    ndarray of shape (n, m)
    """
    out = np.array(Y, dtype=np.float64, copy=True)
    per_run = settings.get("per_run") or [settings] * len(lengths)
    if len(per_run) != len(lengths):
        per_run = [settings] * len(lengths)
    offset = 0
    for length, run_settings in zip(lengths, per_run, strict=True):
        stop = offset + int(length)
        lab = labels[offset:stop]
        cuts = np.flatnonzero(lab[1:] != lab[:-1]) + 1
        edges = np.concatenate([[0], cuts, [lab.size]]) + offset
        for a, b in pairwise(edges):
            if b - a >= 2:
                out[a:b] = _stretch(time[a:b], states[a:b], run_settings)
        offset = stop
    return out


def _stretch(t: np.ndarray, x: np.ndarray, settings: dict[str, Any]) -> np.ndarray:
    method = settings.get("method", "central")
    if method == "central" or t.size < _MIN_SMOOTH:
        return np.gradient(x, t, axis=0, edge_order=2 if t.size >= 3 else 1)
    options = {k: v for k, v in settings.items() if k != "method"}
    dx, _ = differentiate(t, x, method=method, **options)
    return dx
