"""Regime statistics: shares, dwell times, switch counts (never across runs).

Definitions (all computed per run, then pooled; label ``-1`` = unassigned is skipped):

* **share**: fraction of the assigned samples carrying each regime id.
* **dwell**: a dwell is a maximal stretch of consecutive samples of one regime inside one run;
  its duration is ``number of samples x step`` (the nominal sampling step).  A dwell that
  touches the first or the last sample of its run is *censored* (we do not see when it began or
  ended).  ``count``, ``mean``, ``median``, ``min``, ``max`` are over the complete (uncensored)
  dwells; ``censored`` counts the others.  When a regime has no complete dwell the figures are
  taken over its censored dwells (then they are lower bounds) and ``"lower_bound": true``.
* **transitions**: ``K x K`` counts of switches ``from -> to`` between consecutive samples of the
  same run (row = from, column = to; the diagonal is 0: staying is not a switch).
"""

from __future__ import annotations

from collections.abc import Sequence
from typing import Any

import numpy as np

__all__ = ["chain_statistics", "segments", "statistics", "switch_counts"]


def segments(labels: np.ndarray) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Maximal constant stretches of one run: ``(start, length, label)`` arrays."""
    labels = np.asarray(labels)
    if labels.size == 0:
        empty = np.zeros(0, dtype=np.int64)
        return empty, empty, empty
    change = np.flatnonzero(labels[1:] != labels[:-1]) + 1
    start = np.concatenate([[0], change])
    length = np.diff(np.concatenate([start, [labels.size]]))
    return start, length, labels[start]


def switch_counts(labels_per_run: Sequence[np.ndarray], n_regimes: int) -> np.ndarray:
    """Counts of switches ``from -> to`` (K x K, diagonal 0), within runs only."""
    counts = np.zeros((n_regimes, n_regimes), dtype=np.int64)
    for lab in labels_per_run:
        lab = np.asarray(lab)
        a, b = lab[:-1], lab[1:]
        ok = (a >= 0) & (b >= 0) & (a != b)
        np.add.at(counts, (a[ok], b[ok]), 1)
    return counts


def _dwells(
    labels_per_run: Sequence[np.ndarray], n_regimes: int
) -> tuple[list[list[int]], list[list[int]]]:
    complete: list[list[int]] = [[] for _ in range(n_regimes)]
    censored: list[list[int]] = [[] for _ in range(n_regimes)]
    for lab in labels_per_run:
        start, length, seg = segments(lab)
        end = start + length
        for s, ln, g, e in zip(start, length, seg, end, strict=True):
            if g < 0:
                continue
            touches = s == 0 or e == len(lab)
            (censored if touches else complete)[int(g)].append(int(ln))
    return complete, censored


def _describe(samples: list[int], step: float) -> dict[str, Any]:
    d = np.asarray(samples, dtype=np.float64) * step
    return {
        "count": int(d.size),
        "mean": float(d.mean()),
        "median": float(np.median(d)),
        "min": float(d.min()),
        "max": float(d.max()),
    }


def statistics(
    labels_per_run: Sequence[np.ndarray], n_regimes: int, step: float = 1.0
) -> dict[str, Any]:
    """Shares, dwell times and switch counts in the JSON shape of ``HybridModel.statistics``.

    Parameters
    ----------
    labels_per_run : list of ndarray of int
        Regime id per sample of each run (``-1`` = unassigned).
    n_regimes : int
    step : float
        Nominal sampling step (time units per sample).

    Returns
    -------
    dict
        ``{"share": {"0": ..}, "dwell": {"0": {"count", "mean", "median", "min", "max",
        "censored", "lower_bound"}}, "transitions": [[..]]}``.
    """
    allp = np.concatenate([np.asarray(x) for x in labels_per_run]) if labels_per_run else []
    allp = np.asarray(allp, dtype=np.int64)
    assigned = allp[allp >= 0]
    counts = np.bincount(assigned, minlength=n_regimes)[:n_regimes]
    total = max(int(counts.sum()), 1)
    complete, censored = _dwells(labels_per_run, n_regimes)
    dwell = {}
    for k in range(n_regimes):
        use = complete[k] or censored[k]
        if use:
            entry = _describe(use, step)
        else:
            entry = {"count": 0, "mean": None, "median": None, "min": None, "max": None}
        entry["censored"] = len(censored[k])
        entry["lower_bound"] = not complete[k] and bool(censored[k])
        dwell[str(k)] = entry
    return {
        "share": {str(k): float(counts[k] / total) for k in range(n_regimes)},
        "dwell": dwell,
        "transitions": switch_counts(labels_per_run, n_regimes).tolist(),
    }


def chain_statistics(
    transmat: np.ndarray, labels_per_run: Sequence[np.ndarray], step: float = 1.0
) -> dict[str, Any]:
    """The regimes' Markov chain: transition probabilities and expected stays, with errors.

    The standard error of a transition probability ``p_ij`` estimated from ``n_i`` steps
    out of regime ``i`` (stays included) is the multinomial ``sqrt(p_ij (1 - p_ij) / n_i)``
    (common practice); a stay in regime ``i`` lasts ``1 / (1 - p_ii)`` steps on average
    (a geometric duration), with the delta-method error ``se(p_ii) / (1 - p_ii)^2``.

    Parameters
    ----------
    transmat : ndarray of shape (K, K)
        Row ``i``: probabilities of the next regime after regime ``i``.
    labels_per_run : list of ndarray of int
        Regime id per sample of each run (``-1`` = unassigned): the steps counted.
    step : float
        Nominal sampling step (time units per sample).

    Returns
    -------
    dict
        ``{"transition_matrix": [[..]], "transition_stderr": [[..]],
        "expected_duration": {"0": ..}, "expected_duration_stderr": {"0": ..}}``;
        durations in time units; an error is None where no step leaves the regime.
    """
    p = np.asarray(transmat, dtype=np.float64)
    k = p.shape[0]
    steps = np.zeros(k)
    for lab in labels_per_run:
        lab = np.asarray(lab, dtype=np.int64)
        prev, cur = lab[:-1], lab[1:]
        ok = (prev >= 0) & (cur >= 0)
        steps += np.bincount(prev[ok], minlength=k)[:k]
    with np.errstate(divide="ignore", invalid="ignore"):
        se = np.sqrt(p * (1.0 - p) / steps[:, None])
    stay = np.clip(np.diag(p), 0.0, 1.0 - 1e-12)
    duration = step / (1.0 - stay)
    duration_se = step * np.diag(se) / (1.0 - stay) ** 2

    def opt(v: float) -> float | None:
        return float(v) if np.isfinite(v) else None

    return {
        "transition_matrix": [[float(v) for v in row] for row in p],
        "transition_stderr": [[opt(v) for v in row] for row in se],
        "expected_duration": {str(i): opt(duration[i]) for i in range(k)},
        "expected_duration_stderr": {str(i): opt(duration_se[i]) for i in range(k)},
    }
