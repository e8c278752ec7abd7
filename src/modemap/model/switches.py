"""Matching of switch times: which measured switch a predicted one stands for.

Used by the guard stage to choose a guard family on held-out switch times and by the
validation to report switch timing.
"""

from __future__ import annotations

import numpy as np

__all__ = ["match_switches"]


def match_switches(
    measured: np.ndarray, predicted: np.ndarray, window: float = np.inf
) -> tuple[np.ndarray, np.ndarray]:
    """Match two lists of switch times one to one.

    A measured and a predicted switch are matched when each is the other's
    nearest neighbour in time and they are at most ``window`` apart.

    Parameters
    ----------
    measured, predicted : ndarray of shape (n,), (m,)
    window : float

    Returns
    -------
    (mi, pi) : tuple of int ndarrays
        Indices into ``measured`` and ``predicted`` of the matched pairs.
    """
    m = np.asarray(measured, dtype=float).reshape(-1)
    p = np.asarray(predicted, dtype=float).reshape(-1)
    if m.size == 0 or p.size == 0:
        empty = np.zeros(0, dtype=np.int64)
        return empty, empty
    om, op = np.argsort(m, kind="stable"), np.argsort(p, kind="stable")
    ms, ps = m[om], p[op]
    nm = _nearest(ps, ms)
    np_ = _nearest(ms, ps)
    ok = (np_[nm] == np.arange(ms.size)) & (np.abs(ms - ps[nm]) <= window)
    return om[ok], op[nm[ok]]


def _nearest(sorted_ref: np.ndarray, query: np.ndarray) -> np.ndarray:
    """Index of the nearest element of ``sorted_ref`` for every query (ties to the left)."""
    j = np.searchsorted(sorted_ref, query)
    left = np.clip(j - 1, 0, sorted_ref.size - 1)
    right = np.clip(j, 0, sorted_ref.size - 1)
    use_right = np.abs(sorted_ref[right] - query) < np.abs(query - sorted_ref[left])
    return np.where(use_right, right, left)
