"""Local models on short windows of rows: a proposal that looks at dynamics only.

Regimes that differ only in their dynamics (the same operating point, another time constant
or gain) look alike to a proposal built on where the state sits, and hard-EM refinement
started from such a proposal can settle on a split by level that is a fixed point of its
iterations.  Here each run is cut into consecutive windows of ``window`` rows, one
least-squares model per window is fitted on the candidate terms, and the window's coefficients
become the features of the regime proposal (a sticky HMM over the sequence of windows, so
neighbouring windows tend to share a regime).  Clustering local parameter vectors to start a
piecewise model is the idea of "A clustering technique for the identification of piecewise
affine systems", Automatica 39(2), 2003, DOI 10.1016/S0005-1098(02)00224-8; here the local
data sets are time windows, which suits records whose regimes persist.

A window's normal equations are shrunk towards the model fitted to all rows with the weight of
``prior`` rows (a ridge penalty centred on the global fit), so a window whose states barely
move, and whose coefficients the data cannot fix, stays near the global model instead of
producing a wild outlier.
"""

from __future__ import annotations

from typing import Any

import numpy as np

__all__ = ["window_coefficients", "window_lengths"]

_CHUNK_ROWS = 8192


def window_lengths(lengths: np.ndarray, window: int) -> tuple[np.ndarray, np.ndarray]:
    """Windows per run and rows per window.

    Each run is cut into ``max(1, length // window)`` windows; the rows left over at the end
    of a run join its last window.

    Returns
    -------
    per_run : ndarray of int
        Number of windows of each run.
    sizes : ndarray of int
        Rows in each window, runs one after the other.
    """
    per_run, sizes = [], []
    for length in np.asarray(lengths, dtype=np.int64):
        count = max(1, int(length) // window)
        run_sizes = np.full(count, window, dtype=np.int64)
        run_sizes[-1] += int(length) - count * window
        per_run.append(count)
        sizes.append(run_sizes)
    return np.array(per_run, dtype=np.int64), np.concatenate(sizes)


def window_coefficients(
    library: Any,
    Z: np.ndarray,
    Y: np.ndarray,
    sizes: np.ndarray,
    *,
    prior: float = 2.0,
) -> np.ndarray:
    """Least-squares coefficients of every window, flattened: (n_windows, n_terms * m).

    Parameters
    ----------
    library : fitted TermLibrary
    Z : ndarray of shape (n, n_vars)
    Y : ndarray of shape (n, m)
    sizes : ndarray of int
        Rows per window (from :func:`window_lengths`); sums to ``n``.
    prior : float
        Weight, in rows, of the shrinkage towards the model fitted to all rows.

    Returns
    -------
    ndarray of shape (n_windows, n_terms * m)
    """
    Z = np.asarray(Z, dtype=np.float64)
    Y = np.asarray(Y, dtype=np.float64)
    sizes = np.asarray(sizes, dtype=np.int64)
    p, m = int(library.n_terms_), Y.shape[1]
    starts = np.concatenate([[0], np.cumsum(sizes)[:-1]])
    gram = np.empty((sizes.size, p, p))
    cross = np.empty((sizes.size, p, m))
    # windows in groups of about _CHUNK_ROWS rows: one term matrix per group, its rows laid
    # out as (window, row in window, [terms | targets]) with zero padding (a window holds at
    # most twice the regular count), then one batched product gives every window's sums
    first = 0
    while first < sizes.size:
        last = int(np.searchsorted(starts, starts[first] + _CHUNK_ROWS, side="right"))
        last = max(last, first + 1)
        lo, hi = starts[first], starts[last - 1] + sizes[last - 1]
        local = sizes[first:last]
        window = np.repeat(np.arange(local.size), local)
        offset = np.arange(hi - lo) - np.repeat(starts[first:last] - lo, local)
        padded = np.zeros((local.size, int(local.max()), p + m))
        padded[window, offset, :p] = library.transform(Z[lo:hi])
        padded[window, offset, p:] = Y[lo:hi]
        sums = np.matmul(padded.transpose(0, 2, 1), padded)
        gram[first:last], cross[first:last] = sums[:, :p, :p], sums[:, :p, p:]
        first = last
    total_gram, total_cross = gram.sum(axis=0), cross.sum(axis=0)
    n = max(int(sizes.sum()), 1)
    scale = np.diag(total_gram) / n  # mean square of each term
    tiny = 1e-12 * (scale.max() + 1.0)
    beta = np.linalg.solve(total_gram + tiny * n * np.eye(p), total_cross)
    ridge = np.diag(prior * scale + tiny)  # ``prior`` rows' worth of each term's scale
    coef = np.linalg.solve(gram + ridge, cross + ridge @ beta)
    return coef.reshape(coef.shape[0], -1)
