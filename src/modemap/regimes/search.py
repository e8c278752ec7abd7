"""Starts for K + 1 regimes from a fitted K-regime model: its worst-fitting regime cut in two.

The search over the number of regimes is nested: besides fresh proposals, the refinement
of K + 1 regimes starts from the best K-regime fit with one regime split, so the K + 1 fit
starts where the K fit ended (one regime's samples shared by two models fit at least as well
as by one) and the best likelihood found cannot drop as K grows the way it can when every K
is refined from unrelated starts.  Splitting the component that fits worst is the usual
move of divisive (top-down) mixture fitting (common practice).

The regime split is the one whose residuals exceed the noise the most: with the residuals
whitened by the shared covariance, a regime that holds the samples of one model has a
squared residual near ``m`` per sample (``m`` states), and one that mixes two models more.
Its samples are cut two ways, each a start of its own:

* by where the state sits: two clusters of its states (k-means, scikit-learn's
  ``KMeans``), for regimes told apart by a switching surface in the state space;
* by the direction of its residuals: the sign of the whitened residuals along their first
  principal axis, smoothed over a few samples within each run, for regimes that overlap in
  the state space but differ in their dynamics.
"""

from __future__ import annotations

from typing import Any

import numpy as np
from sklearn.cluster import KMeans

from modemap.regimes.refine import RefineResult
from modemap.regimes.rows import Rows

__all__ = ["split_starts", "worst_regime"]

_SMOOTH = 9  # samples over which the residual direction is averaged before its sign is taken


def worst_regime(library: Any, rows: Rows, result: RefineResult) -> tuple[int, np.ndarray]:
    """The regime with the largest excess squared residual, and its whitened residuals.

    Returns
    -------
    regime : int
    whitened : ndarray of shape (n_j, m)
        Whitened residuals of that regime's rows, in row order.
    """
    labels, m = result.labels, rows.n_states
    theta = library.transform(rows.Z)
    excess, whitened = [], []
    for j, (fit, cov) in enumerate(zip(result.fits, result.covariances, strict=True)):
        sel = labels == j
        r = rows.Y[sel] - theta[sel] @ np.asarray(fit.coef)
        w = np.linalg.solve(np.linalg.cholesky(cov), r.T).T
        whitened.append(w)
        excess.append(float(np.sum(w * w)) - m * int(sel.sum()))
    j = int(np.argmax(excess))
    return j, whitened[j]


def split_starts(
    library: Any, rows: Rows, result: RefineResult, *, seed: int = 0, min_rows: int = 2
) -> list[np.ndarray]:
    """Labels for ``result.n_regimes + 1`` regimes: the worst regime cut by location and by
    residual direction (see the module notes).  Cuts that leave fewer than ``min_rows`` rows
    on a side are not returned.

    Parameters
    ----------
    library : fitted TermLibrary
        The terms of ``result``'s fits.
    rows : Rows
        The rows ``result`` was fitted on (its targets).
    result : RefineResult
    seed : int, default 0
    min_rows : int, default 2

    Returns
    -------
    list of ndarray of int
    """
    labels, k = result.labels, result.n_regimes
    j, whitened = worst_regime(library, rows, result)
    members = np.flatnonzero(labels == j)
    if members.size < 2 * min_rows:
        return []
    cuts = [_by_location(rows.Z[members, : rows.n_states], seed)]
    cuts.append(_by_direction(whitened, members, rows.lengths))
    starts = []
    for cut in cuts:
        if min(int(cut.sum()), int((~cut).sum())) < min_rows:
            continue
        new = labels.copy()
        new[members[cut]] = k
        starts.append(new)
    return starts


def _by_location(x: np.ndarray, seed: int) -> np.ndarray:
    scale = x.std(axis=0)
    scale[~(scale > 0)] = 1.0
    z = (x - x.mean(axis=0)) / scale
    return KMeans(n_clusters=2, n_init=3, random_state=seed).fit_predict(z).astype(bool)


def _by_direction(whitened: np.ndarray, members: np.ndarray, lengths: np.ndarray) -> np.ndarray:
    centred = whitened - whitened.mean(axis=0)
    _, _, vt = np.linalg.svd(centred, full_matrices=False)
    s = centred @ vt[0]
    # average over neighbouring members of the same run (their row numbers are consecutive)
    run_of = np.repeat(np.arange(lengths.size), lengths)[members]
    breaks = np.flatnonzero((np.diff(members) != 1) | (np.diff(run_of) != 0)) + 1
    out = np.empty_like(s)
    kernel = np.ones(_SMOOTH) / _SMOOTH
    for seg in np.split(np.arange(s.size), breaks):
        part = s[seg]
        out[seg] = np.convolve(part, kernel, mode="same") if part.size >= _SMOOTH else part.mean()
    return out > 0
