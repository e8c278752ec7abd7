"""Evidence of hysteresis in labelled trajectories.

Choice of family (``kind="auto"``): memoryless, unless the labelled samples
show hysteresis, i.e. the same part of the variables' space seen under both
regimes, told apart only by the past.  The test (:func:`hysteresis_evidence`)
compares two classifiers of the regime of every labelled sample by blocked
cross-validation: a multinomial logistic regression on the guard terms of the
variables (memoryless) and the same with the regime ``lag`` samples earlier
added as indicator columns (memory).  ``lag`` defaults to a tenth of the
median complete stay (at least 2 samples).  The regime one sample earlier
predicts the current one by persistence alone, and near a crossing blurred by
noise or by labels a few samples late that persistence pays even without
hysteresis, so the lag must exceed the few samples by which fitted labels miss
a switch; and the memory must still be fresh, since a label from before the
last crossing says nothing about which side of a band the system is on.  A tenth
of a stay meets both (measured on fitted labels of the trials' piecewise-affine
fields at 1 % noise: gain -0.0004 to 0.0023 at a tenth, up to 0.019 at 2
samples, against the margin 0.01; on a relay whose band spans a third of its
range: 0.097 ± 0.028 at a tenth, 0.025 ± 0.021 at a quarter, which the test
could not tell from zero).  Folds are
contiguous blocks of samples (runs never share a block) assigned in turn, since
neighbouring samples are strongly correlated ("Cross-validation strategies for
data with temporal, spatial, hierarchical, or phylogenetic structure", Roberts
et al., Ecography 40, 2017, doi:10.1111/ecog.02881).  The score is the
balanced accuracy of the out-of-fold predictions; the gain of the memory model
is written as a sum over blocks, and its standard error is taken from the
spread of the block sums (blocks as independent units).  Per-source is chosen
when the gain is at least ``hysteresis_margin`` and exceeds the one-sided
Student-t critical value at level ``alpha`` (number of blocks - 1 degrees of
freedom) times its standard error.  :attr:`SwitchingSurfaces.family_evidence_`
records both scores, the gain, its error, the margin, the decision and a
one-line reason.
"""

from __future__ import annotations

import itertools
import math
import warnings
from collections.abc import Sequence
from typing import Any

import numpy as np
from scipy import stats
from sklearn.exceptions import ConvergenceWarning
from sklearn.linear_model import LogisticRegression

__all__ = ["contiguous_blocks", "hysteresis_evidence", "median_stay", "position_in_run"]

_MAX_EVIDENCE_ROWS = 60_000
_TARGET_BLOCKS = 40


def position_in_run(lengths: Sequence[int]) -> np.ndarray:
    lengths = np.asarray(lengths, dtype=np.int64)
    return np.arange(int(lengths.sum())) - np.repeat(np.cumsum(lengths) - lengths, lengths)


def median_stay(labels: np.ndarray, lengths: Sequence[int]) -> float:
    """Median length in samples of the complete stays (a switch at both ends, inside one
    run); of every labelled stretch when no stay is complete."""
    complete, cut = [], []
    start = 0
    for m in np.asarray(lengths, dtype=np.int64):
        lab = labels[start : start + m]
        start += m
        edges = np.flatnonzero(lab[1:] != lab[:-1]) + 1
        bounds = np.concatenate([[0], edges, [m]])
        for a, b in itertools.pairwise(bounds):
            if lab[a] < 0:
                continue
            (complete if 0 < a and b < m else cut).append(b - a)
    stays = complete or cut
    return float(np.median(stays)) if stays else float(labels.size)


def contiguous_blocks(lengths: Sequence[int], size: int) -> np.ndarray:
    """Block id of every sample: runs cut into contiguous blocks of ``size`` samples.

    Runs never share a block; the last block of a run may be shorter.  Ids count up
    through the record in order.

    Parameters
    ----------
    lengths : sequence of int
        Samples per run.
    size : int
        Block length in samples (at least 1).

    Returns
    -------
    ndarray of shape (sum(lengths),) of int
    """
    size = max(1, int(size))
    out, first = [], 0
    for m in np.asarray(lengths, dtype=np.int64):
        ids = np.arange(m) // size
        out.append(ids + first)
        first += int(ids[-1]) + 1 if m else 0
    return np.concatenate(out) if out else np.zeros(0, dtype=np.int64)


# -- logistic regression with standard errors --------------------------------------------------


def _thin_rows(rows: np.ndarray, cap: int) -> np.ndarray:
    if rows.size <= cap:
        return rows
    return rows[:: math.ceil(rows.size / cap)]


def _balanced_parts(y: np.ndarray, pred: np.ndarray) -> np.ndarray:
    """Per-sample shares of the balanced accuracy: ``[pred == y] / (K n_y)``; they sum to
    the mean recall over the classes present in ``y``."""
    classes, inverse, counts = np.unique(y, return_inverse=True, return_counts=True)
    return (pred == y) / (classes.size * counts[inverse])


def _cv_predict(X: np.ndarray, y: np.ndarray, folds: np.ndarray, C: float, seed: int) -> np.ndarray:
    pred = np.empty_like(y)
    for f in np.unique(folds):
        test = folds == f
        train = ~test
        classes = np.unique(y[train])
        if classes.size < 2:
            pred[test] = classes[0] if classes.size else -1
            continue
        clf = LogisticRegression(C=C, solver="newton-cholesky", max_iter=200, random_state=seed)
        with warnings.catch_warnings():
            warnings.simplefilter("ignore", ConvergenceWarning)
            clf.fit(X[train], y[train])
        pred[test] = clf.predict(X[test])
    return pred


def hysteresis_evidence(
    F: np.ndarray,
    labels: np.ndarray,
    lengths: Sequence[int],
    *,
    lag: int | None = None,
    n_folds: int = 5,
    margin: float = 0.01,
    alpha: float = 0.01,
    C: float = 1e3,
    seed: int = 0,
) -> dict[str, Any]:
    """Do the labelled samples show hysteresis?

    Blocked cross-validation of two classifiers of the regime of every labelled
    sample: a multinomial logistic regression on ``F`` (memoryless) and on ``F`` plus
    indicator columns of the regime ``lag`` samples earlier (memory).  See the module
    notes for the reasoning.

    Parameters
    ----------
    F : ndarray of shape (n, p)
        Features of every sample (the guard terms of the variables, standardised).
    labels : ndarray of shape (n,) of int
        Regime per sample, ``-1`` for unassigned.
    lengths : sequence of int
        Samples per run.
    lag : int, optional
        How far back the memory looks, in samples; default a tenth of the median
        complete stay, at least 2.
    n_folds : int
        Cross-validation folds (blocks are assigned to them in turn).
    margin : float
        Smallest gain of balanced accuracy that counts as hysteresis.
    alpha : float
        Level of the one-sided test of the gain.
    C : float
        Inverse ridge strength of the classifiers.
    seed : int

    Returns
    -------
    dict
        ``memoryless`` and ``memory`` (cross-validated balanced accuracies), ``gain``
        (their difference), ``stderr`` (of the gain, from the block sums), ``critical``
        (the Student-t value the ratio gain / stderr must reach), ``margin``,
        ``alpha``, ``lag``, ``samples``, ``blocks``, ``folds``, ``hysteresis``
        (bool: the decision) and ``reason`` (one line).  With fewer than two regimes
        or too little data the scores are None and ``hysteresis`` is False.
    """
    labels = np.asarray(labels, dtype=np.int64)
    lengths = np.asarray(lengths, dtype=np.int64)
    n = labels.size
    stay = median_stay(labels, lengths)
    lag = int(lag) if lag is not None else max(2, round(stay / 10.0))
    out: dict[str, Any] = {
        "memoryless": None,
        "memory": None,
        "gain": None,
        "stderr": None,
        "critical": None,
        "margin": float(margin),
        "alpha": float(alpha),
        "lag": lag,
        "samples": 0,
        "blocks": 0,
        "folds": int(n_folds),
        "hysteresis": False,
        "reason": "",
    }
    pos = position_in_run(lengths)
    past = np.full(n, -1, dtype=np.int64)
    if lag < n:
        past[lag:] = labels[:-lag]
    usable = (labels >= 0) & (pos >= lag) & (past >= 0)
    rows = np.flatnonzero(usable)
    classes = np.unique(labels[rows])
    if np.unique(labels[labels >= 0]).size < 2:
        out["reason"] = "fewer than two regimes among the labelled samples: nothing to test"
        return out
    if classes.size < 2:
        out["reason"] = (
            f"too few labelled samples with a labelled sample {lag} earlier to test for "
            "hysteresis; memoryless by default"
        )
        return out
    size = max(math.ceil(n / _TARGET_BLOCKS), 2 * lag)
    blocks = contiguous_blocks(lengths, size)
    used_blocks = np.unique(blocks[rows])
    if used_blocks.size < max(n_folds, 3):
        out["reason"] = (
            f"too few samples to test for hysteresis ({used_blocks.size} blocks of {size} "
            "samples); memoryless by default"
        )
        return out
    rows = _thin_rows(rows, _MAX_EVIDENCE_ROWS)
    rank = np.searchsorted(used_blocks, blocks[rows])
    folds = rank % n_folds
    y = labels[rows]
    memory = (past[rows][:, None] == classes[None, :]).astype(float)
    Xa = np.asarray(F, dtype=float)[rows]
    Xb = np.hstack([Xa, memory])
    da = _balanced_parts(y, _cv_predict(Xa, y, folds, C, seed))
    db = _balanced_parts(y, _cv_predict(Xb, y, folds, C, seed))
    block_gain = np.bincount(rank, weights=db - da, minlength=used_blocks.size)
    nb = used_blocks.size
    gain = float(block_gain.sum())
    se = float(math.sqrt(nb / (nb - 1) * np.sum((block_gain - gain / nb) ** 2)))
    crit = float(stats.t.ppf(1.0 - alpha, nb - 1))
    out.update(
        memoryless=float(da.sum()),
        memory=float(db.sum()),
        gain=gain,
        stderr=se,
        critical=crit,
        samples=int(rows.size),
        blocks=int(nb),
    )
    told = (
        f"knowing the regime {lag} samples earlier moves the cross-validated balanced "
        f"accuracy of the regime from the variables from {da.sum():.3f} to {db.sum():.3f} "
        f"(gain {gain:+.3f} ± {se:.3f} over {nb} blocks)"
    )
    if gain < margin:
        out["reason"] = f"{told}: below the margin {margin:g}, no evidence of hysteresis"
    elif gain <= crit * se:
        out["reason"] = f"{told}: not significant at the {alpha:g} level, no evidence of hysteresis"
    else:
        out["hysteresis"] = True
        out["reason"] = (
            f"{told}: above the margin {margin:g} and significant at the {alpha:g} level, "
            "so the same variables are seen under both regimes (hysteresis)"
        )
    return out


# -- fitting helpers ---------------------------------------------------------------------------
