"""Most probable regime sequence (Viterbi decoding), vectorised with numpy.

The Viterbi recursion ("The Viterbi algorithm", Proceedings of the IEEE 61(3), 1973,
DOI 10.1109/PROC.1973.9030) is a chain of max-plus matrix-vector products

    delta_t = delta_{t-1} (x) M_t,   M_t[j, i] = log_trans[j, i] + log_emission[t, i],

and max-plus products are associative.  We cut the sequence into about sqrt(n) blocks of
equal length and run every pass as a loop over the position inside a block, vectorised across
all blocks at once:

1. the max-plus product of each block's matrices (vectorised over blocks);
2. a short sequential pass over the blocks gives the score vector entering each block;
3. the ordinary recursion inside every block at once, storing back-pointers (int8/int16);
4. back-pointer maps composed per block, a short pass over blocks, then the back-tracking
   inside every block at once.

So a Python loop runs about 4 sqrt(n) times over small arrays instead of n times.  Runs
(``lengths``) are decoded independently by a "reset" step at each run start whose matrix is
``log_start[i] + log_emission[t, i]`` whatever the previous regime: the best path of the
concatenation is then the concatenation of the best paths of the runs, and the log-probability
is their sum (as hmmlearn reports for ``decode(X, lengths)``).
"""

from __future__ import annotations

import numpy as np

__all__ = ["viterbi", "viterbi_runs"]

_NORMAL, _RESET, _PAD = 0, 1, 2


def viterbi(
    log_emission: np.ndarray, log_start: np.ndarray, log_trans: np.ndarray
) -> tuple[np.ndarray, float]:
    """Most probable state sequence of one run.

    Parameters
    ----------
    log_emission : ndarray of shape (n, K)
        Log-likelihood of each sample under each regime.
    log_start : ndarray of shape (K,)
        Log-probability of the first regime.
    log_trans : ndarray of shape (K, K)
        ``log_trans[j, i]`` = log P(regime i at t | regime j at t-1).

    Returns
    -------
    path : ndarray of shape (n,) of int64
    log_prob : float
        Joint log-probability of ``path`` and the data.
    """
    n = np.asarray(log_emission).shape[0]
    return viterbi_runs(log_emission, np.array([n]), log_start, log_trans)


def viterbi_runs(
    log_emission: np.ndarray,
    lengths: np.ndarray | list[int],
    log_start: np.ndarray,
    log_trans: np.ndarray,
) -> tuple[np.ndarray, float]:
    """Viterbi decoding of several runs stacked in one array, never across runs.

    Parameters
    ----------
    log_emission : ndarray of shape (n, K)
    lengths : sequence of int
        Samples per run; must sum to ``n``.
    log_start : ndarray of shape (K,)
    log_trans : ndarray of shape (K, K)

    Returns
    -------
    path : ndarray of shape (n,) of int64
    log_prob : float
        Sum over runs of each run's best joint log-probability.
    """
    e = np.asarray(log_emission, dtype=np.float64)
    if e.ndim != 2:
        raise ValueError("log_emission must be 2-D (n_samples, n_regimes)")
    n, k = e.shape
    lengths = np.asarray(lengths, dtype=np.int64)
    if lengths.sum() != n or np.any(lengths < 0):
        raise ValueError(f"lengths sum to {int(lengths.sum())}, expected {n}")
    lengths = lengths[lengths > 0]
    if n == 0:
        return np.zeros(0, dtype=np.int64), 0.0
    log_start = np.asarray(log_start, dtype=np.float64).reshape(k)
    log_trans = np.asarray(log_trans, dtype=np.float64).reshape(k, k)
    if k == 1:
        runs = lengths.size
        log_prob = e.sum() + log_start[0] * runs + log_trans[0, 0] * (n - runs)
        return np.zeros(n, dtype=np.int64), float(log_prob)
    block = max(8, int(np.ceil(np.sqrt(n))))
    layout = _Layout(e, lengths, block)
    products = _block_products(layout, log_start, log_trans)
    entering = _entering_scores(products)
    psi, final = _forward(layout, entering, log_start, log_trans)
    last = int(np.argmax(final[-1]))
    path = _backtrack(psi, last)
    return path.T.reshape(-1)[:n].astype(np.int64), float(final[-1, last])


class _Layout:
    """Emissions seen as (n_blocks, block, K) without copying the full blocks.

    Slot ``t`` of the sequence lives at block ``t // block``, position ``t % block``.  Only the
    last, partial block is copied into a small padded array.  ``kind[s]`` holds the step kind
    of position ``s`` in every block (normal, run start, padding) and ``special[s]`` whether
    any block has a non-normal step there.
    """

    def __init__(self, e: np.ndarray, lengths: np.ndarray, block: int) -> None:
        n, k = e.shape
        full = n // block
        rest = n - full * block
        self.block, self.k = block, k
        self.n_blocks = full + (1 if rest else 0)
        self.full = e[: full * block].reshape(full, block, k)
        self.tail = None
        if rest:
            self.tail = np.zeros((1, block, k))
            self.tail[0, :rest] = e[full * block :]
        kind = np.full(self.n_blocks * block, _NORMAL, dtype=np.int8)
        kind[np.concatenate([[0], np.cumsum(lengths)[:-1]])] = _RESET
        kind[n:] = _PAD
        self.kind = kind.reshape(self.n_blocks, block).T.copy()
        self.special = self.kind.any(axis=1)

    def column(self, s: int) -> np.ndarray:
        """Emissions of position ``s`` of every block: (n_blocks, K)."""
        if self.tail is None:
            return self.full[:, s, :]
        return np.concatenate([self.full[:, s, :], self.tail[:, s, :]], axis=0)


def _block_products(layout: _Layout, log_start: np.ndarray, log_trans: np.ndarray) -> np.ndarray:
    """Max-plus product of the step matrices inside each block: (n_blocks, K, K).

    ``prod[a, i, b]`` (blocks last, so that every operation runs over a contiguous axis) is
    the best score of reaching regime ``i`` at the current position of block ``b`` from regime
    ``a`` just before the block.
    """
    k, nb = layout.k, layout.n_blocks
    prod = np.where(np.eye(k, dtype=bool), 0.0, -np.inf)[:, :, None].repeat(nb, axis=2)
    acc = np.empty_like(prod)
    tmp = np.empty_like(prod)
    trans = log_trans[:, None, :, None]  # (j, 1, i, 1)
    for s in range(layout.block):
        em = layout.column(s).T  # (K, nb)
        np.add(prod[:, 0, None, :], trans[0], out=acc)
        for j in range(1, k):
            np.add(prod[:, j, None, :], trans[j], out=tmp)
            np.maximum(acc, tmp, out=acc)
        if layout.special[s]:
            kind = layout.kind[s]
            reset = kind == _RESET
            if reset.any():
                best = prod[:, :, reset].max(axis=1)  # (a, blocks)
                acc[:, :, reset] = best[:, None, :] + log_start[None, :, None]
            pad = kind == _PAD
            acc[:, :, pad] = prod[:, :, pad]
            em = np.where(pad[None, :], 0.0, em)
        np.add(acc, em[None, :, :], out=prod)
    return prod.transpose(2, 0, 1)


def _entering_scores(products: np.ndarray) -> np.ndarray:
    """Score vector entering each block (sequential over blocks only)."""
    n_blocks, k, _ = products.shape
    entering = np.zeros((n_blocks, k))
    for b in range(1, n_blocks):
        entering[b] = np.max(entering[b - 1][:, None] + products[b - 1], axis=0)
    return entering


def _forward(
    layout: _Layout,
    entering: np.ndarray,
    log_start: np.ndarray,
    log_trans: np.ndarray,
) -> tuple[np.ndarray, np.ndarray]:
    """The recursion inside every block at once; back-pointers (block, n_blocks, K)."""
    block, nb, k = layout.block, layout.n_blocks, layout.k
    psi = np.empty((block, k, nb), dtype=np.int8 if k <= 127 else np.int16)
    delta = np.ascontiguousarray(entering.T)  # (K, nb)
    best = np.empty((k, nb))
    tmp = np.empty((k, nb))
    better = np.empty((k, nb), dtype=bool)
    trans = log_trans[:, :, None]  # (j, i, 1)
    for s in range(block):
        arg = psi[s]
        np.add(delta[0, None, :], trans[0], out=best)
        arg.fill(0)
        for j in range(1, k):
            np.add(delta[j, None, :], trans[j], out=tmp)
            np.greater(tmp, best, out=better)  # strict: the first maximum wins, as argmax
            np.maximum(best, tmp, out=best)
            arg[better] = j
        em = layout.column(s).T
        if layout.special[s]:
            kind = layout.kind[s]
            reset = kind == _RESET
            if reset.any():
                first = np.argmax(delta[:, reset], axis=0)
                arg[:, reset] = first[None, :]
                best[:, reset] = delta[first, np.flatnonzero(reset)][None, :] + log_start[:, None]
            pad = kind == _PAD
            if pad.any():
                arg[:, pad] = np.arange(k)[:, None]
                best[:, pad] = delta[:, pad]
                em = np.where(pad[None, :], 0.0, em)
        np.add(best, em, out=delta)
    return psi.transpose(0, 2, 1), delta.T


def _backtrack(psi: np.ndarray, last: int) -> np.ndarray:
    """Follow the back-pointers; returns the path as (block, n_blocks)."""
    block, n_blocks, k = psi.shape
    rows = np.arange(n_blocks)
    # compose each block's back-pointer maps: state at block end -> state before block start
    compose = np.broadcast_to(np.arange(k, dtype=psi.dtype), (n_blocks, k)).copy()
    for s in range(block - 1, -1, -1):
        compose = np.take_along_axis(psi[s], compose.astype(np.intp), axis=1)
    ends = np.empty(n_blocks, dtype=np.intp)
    ends[-1] = last
    for b in range(n_blocks - 1, 0, -1):
        ends[b - 1] = compose[b, ends[b]]
    path = np.empty((block, n_blocks), dtype=psi.dtype)
    cur = ends
    for s in range(block - 1, -1, -1):
        path[s] = cur
        cur = psi[s][rows, cur]
    return path
