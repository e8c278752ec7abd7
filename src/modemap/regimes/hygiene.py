"""Label hygiene: small regimes, short dwells, and a stable order of regime ids.

* **Small regimes** (:func:`drop_small`): a regime with fewer than ``min_samples`` samples has
  too little data for its own model.  Its samples are marked ``-1`` and the remaining ids are
  compacted; the refinement then hands those samples to the remaining regimes by Viterbi.  A
  single regime is never dropped.  The minimum follows what a regime must estimate, one
  equation of ``p`` candidate terms per state (:func:`default_min_samples`): when the number of
  regimes is chosen, 5 rows per term and at least 20 (a smaller group of rows is a transient
  the criterion should not have to weigh); when it is given, 2 rows per term plus 2 and at
  least 10 (any regime whose equations the rows can determine is kept: a 28-sample level
  regime is legitimate).
* **Short dwells** (:func:`enforce_min_dwell`): a stretch shorter than ``min_dwell`` samples
  takes the regime of the preceding long-enough stretch of the same run (the following one at
  the start of a run).  ``min_dwell=1`` changes nothing.
* **Order of ids** (:func:`order_regimes`): ids are sorted by the mean of the first state over
  the samples of each regime, ascending; exact ties are broken by first appearance in the data
  (run order, then time).  The ordering only depends on the labels and the data, so reruns
  with the same seed give identical ids.
"""

from __future__ import annotations

import numpy as np

__all__ = ["default_min_samples", "drop_small", "enforce_min_dwell", "order_regimes"]


def default_min_samples(n_terms: int, given_k: bool = False) -> int:
    """Smallest regime kept: ``max(20, 5 p)`` rows when K is chosen, ``max(10, 2 p + 2)``
    when it is given (``p`` candidate terms per equation)."""
    return max(10, 2 * n_terms + 2) if given_k else max(20, 5 * n_terms)


def drop_small(
    labels: np.ndarray, n_regimes: int, min_samples: int
) -> tuple[np.ndarray, int, list[str]]:
    """Mark regimes with too few samples as unassigned (``-1``) and compact the ids.

    Returns
    -------
    labels : ndarray
        New labels in ``-1, 0..K'-1``.
    n_regimes : int
        ``K'``, the number of regimes kept.
    notes : list of str
    """
    labels = np.asarray(labels, dtype=np.int64)
    counts = np.bincount(labels + 1, minlength=n_regimes + 1)[1:]
    if n_regimes == 1 and counts[0] > 0:
        return labels, 1, []  # one regime holds every row: nothing to give its rows to
    keep = np.flatnonzero(counts >= min_samples)
    notes = [
        f"regime {k} dropped: {int(counts[k])} samples < minimum {min_samples}; "
        "its samples were reassigned"
        for k in range(n_regimes)
        if 0 < counts[k] < min_samples
    ]
    if keep.size == n_regimes:
        return labels, n_regimes, notes  # nothing dropped: no relabelling copy (large arrays)
    mapping = np.full(n_regimes + 1, -1, dtype=np.int64)
    mapping[keep] = np.arange(keep.size)
    return mapping[labels], int(keep.size), notes


def enforce_min_dwell(labels: np.ndarray, lengths: np.ndarray, min_dwell: int) -> np.ndarray:
    """Relabel stretches shorter than ``min_dwell`` samples to the neighbouring regime."""
    labels = np.asarray(labels, dtype=np.int64)
    if min_dwell <= 1 or labels.size == 0:
        return labels  # nothing to do: no copy (large arrays)
    out = labels.copy()
    offset = 0
    for length in np.asarray(lengths, dtype=np.int64):
        out[offset : offset + length] = _fill_short(labels[offset : offset + length], min_dwell)
        offset += length
    return out


def _fill_short(lab: np.ndarray, min_dwell: int) -> np.ndarray:
    n = lab.size
    if n == 0:
        return lab
    change = np.flatnonzero(lab[1:] != lab[:-1]) + 1
    start = np.concatenate([[0], change])
    length = np.diff(np.concatenate([start, [n]]))
    good = length >= min_dwell
    if good.all() or not good.any():
        return lab.copy()
    # forward fill from the last good stretch, back fill before the first one
    idx = np.where(good, np.arange(start.size), -1)
    idx = np.maximum.accumulate(idx)
    first = int(np.flatnonzero(good)[0])
    idx[idx < 0] = first
    return np.repeat(lab[start][idx], length)


def order_regimes(
    labels: np.ndarray, first_state: np.ndarray, n_regimes: int
) -> tuple[np.ndarray, np.ndarray]:
    """Renumber ids by the mean of the first state (ascending), ties by first appearance.

    Parameters
    ----------
    labels : ndarray of shape (n,)
        Ids in ``-1, 0..K-1`` over all runs concatenated in order.
    first_state : ndarray of shape (n,)
        The first state at each sample.
    n_regimes : int

    Returns
    -------
    labels : ndarray
        Renumbered ids (``-1`` kept).
    order : ndarray of shape (K,)
        ``order[new_id] = old_id``.
    """
    labels = np.asarray(labels, dtype=np.int64)
    ok = labels >= 0
    counts = np.bincount(labels[ok], minlength=n_regimes).astype(np.float64)
    sums = np.bincount(labels[ok], weights=np.asarray(first_state, float)[ok], minlength=n_regimes)
    means = np.where(counts > 0, sums / np.maximum(counts, 1), np.inf)
    first_seen = np.full(n_regimes, labels.size, dtype=np.int64)
    ids, pos = np.unique(labels[ok], return_index=True)
    first_seen[ids] = np.flatnonzero(ok)[pos]
    order = np.lexsort((first_seen, means))
    rank = np.empty(n_regimes + 1, dtype=np.int64)
    rank[order] = np.arange(n_regimes)
    rank[-1] = -1
    return rank[labels], order
