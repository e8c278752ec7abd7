"""The regime chain's recursions over many short runs at once.

hmmlearn runs its compiled forward, backward and Viterbi recursions one run at a time, from a
Python loop over the runs; with ten thousand runs of ten samples that loop, not the
arithmetic, is the cost (minutes for what one run of the same rows does in a second).  Here
the runs of similar length are laid side by side, padded to the longest of their group, and
each step of a recursion is one numpy operation over all of them.  The same textbook
recursions, so the results agree with hmmlearn's run-by-run ones to round-off (checked in
``tests/test_regimes_short_runs.py``):

* scaled forward-backward ("A tutorial on hidden Markov models and selected applications in
  speech recognition", Proceedings of the IEEE 77(2), 1989, DOI 10.1109/5.18626, section V.A):
  ``alpha_t = (alpha_{t-1} A) * b_t / c_t``, ``beta_t = A (b_{t+1} beta_{t+1}) / c_{t+1}``,
  ``log p = sum_t log c_t``, ``gamma_t = alpha_t beta_t``, and the expected transitions
  ``xi_t(i, j) = alpha_t(i) A(i, j) b_{t+1}(j) beta_{t+1}(j) / c_{t+1}``;
* Viterbi decoding in log space ("The Viterbi algorithm", Proceedings of the IEEE 61(3),
  1973, DOI 10.1109/PROC.1973.9030) with back-pointers.

Which runs are batched is :func:`modemap.data.batches.batched`'s rule (at least 16 runs of at
most 64 samples; a step loop over a long run would be slow in Python); callers keep the other
runs on hmmlearn's compiled per-run code, so data of a few long runs (the bundled demos, most
plant logs) take exactly the path they took before.
"""

from __future__ import annotations

from collections.abc import Iterator

import numpy as np

from modemap.data.batches import MIN_BATCH, SHORT_RUN, batched, run_starts

__all__ = [
    "MIN_BATCH",
    "SHORT_RUN",
    "batched",
    "forward_backward_scaled",
    "run_starts",
    "viterbi_batched",
]


def _groups(lengths: np.ndarray) -> Iterator[np.ndarray]:
    """Indices of the runs, in groups of lengths within a factor 2 (little padding)."""
    order = np.argsort(lengths, kind="stable")
    size = lengths[order]
    bucket = np.floor(np.log2(np.maximum(size, 1))).astype(np.int64)
    for b in np.unique(bucket):
        yield order[bucket == b]


def _layout(starts: np.ndarray, lengths: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Row index (T, R) of step t of run r (0 where the run has ended) and the live mask."""
    top = int(lengths.max())
    steps = np.arange(top)[:, None]
    live = steps < lengths[None, :]
    return np.where(live, starts[None, :] + steps, 0), live


def forward_backward_scaled(
    frameprob: np.ndarray,
    starts: np.ndarray,
    lengths: np.ndarray,
    startprob: np.ndarray,
    transmat: np.ndarray,
    *,
    need_xi: bool = True,
) -> tuple[np.ndarray, np.ndarray, np.ndarray, np.ndarray]:
    """Scaled forward-backward over the runs ``rows[starts[r] : starts[r] + lengths[r]]``.

    Parameters
    ----------
    frameprob : ndarray of shape (n, K)
        Emission probability of each row under each regime (rows of other runs are ignored).
    starts, lengths : ndarray of int, shape (R,)
    startprob : ndarray of shape (K,)
    transmat : ndarray of shape (K, K)
        ``transmat[i, j]`` = P(regime j at t | regime i at t - 1).
    need_xi : bool
        Compute the expected transition counts.

    Returns
    -------
    log_prob : ndarray of shape (R,)
        ``log p(run's rows)``.
    posteriors : ndarray of shape (n, K)
        Regime probabilities of the rows of these runs (zero elsewhere).
    xi_sum : ndarray of shape (K, K)
        Expected transitions summed over steps and runs (zeros if not ``need_xi``).
    start_sum : ndarray of shape (K,)
        Posteriors of the first rows, summed over runs.

    Raises
    ------
    ValueError
        When every regime's probability underflows at some step (as hmmlearn's scaled
        recursion does).
    """
    starts = np.asarray(starts, dtype=np.int64)
    lengths = np.asarray(lengths, dtype=np.int64)
    n, k = frameprob.shape
    log_prob = np.zeros(lengths.size)
    posteriors = np.zeros((n, k))
    xi_sum = np.zeros((k, k))
    start_sum = np.zeros(k)
    for group in _groups(lengths):
        rows, live = _layout(starts[group], lengths[group])
        b = frameprob[rows]  # (T, R, K)
        b[~live] = 1.0  # an ended run: probabilities carried unchanged
        top = rows.shape[0]
        alpha = np.empty_like(b)
        scale = np.empty(rows.shape)
        a = startprob[None, :] * b[0]
        for t in range(top):
            if t:
                a = (alpha[t - 1] @ transmat) * b[t]
            scale[t] = a.sum(axis=1)
            if np.any(scale[t][live[t]] == 0):
                raise ValueError("forward pass failed with underflow")
            alpha[t] = a / scale[t][:, None]
        beta = np.ones_like(b)
        for t in range(top - 2, -1, -1):
            nxt = (b[t + 1] * beta[t + 1]) @ transmat.T / scale[t + 1][:, None]
            beta[t] = np.where(live[t + 1][:, None], nxt, 1.0)
        gamma = alpha * beta
        gamma /= gamma.sum(axis=2, keepdims=True)
        log_prob[group] = np.where(live, np.log(np.where(live, scale, 1.0)), 0.0).sum(axis=0)
        posteriors[rows[live]] = gamma[live]
        start_sum += gamma[0].sum(axis=0)
        if need_xi and top > 1:
            ahead = b[1:] * beta[1:] / scale[1:, :, None] * live[1:, :, None]
            xi_sum += transmat * np.einsum("tri,trj->ij", alpha[:-1], ahead)
    return log_prob, posteriors, xi_sum, start_sum


def viterbi_batched(
    log_emission: np.ndarray,
    starts: np.ndarray,
    lengths: np.ndarray,
    log_start: np.ndarray,
    log_trans: np.ndarray,
) -> tuple[np.ndarray, np.ndarray]:
    """Most probable regime path of each run ``rows[starts[r] : starts[r] + lengths[r]]``.

    Parameters
    ----------
    log_emission : ndarray of shape (n, K)
        Finite log-likelihoods (rows of other runs are ignored).
    starts, lengths : ndarray of int, shape (R,)
    log_start : ndarray of shape (K,)
    log_trans : ndarray of shape (K, K)
        ``log_trans[i, j]`` = log P(regime j at t | regime i at t - 1).

    Returns
    -------
    path : ndarray of shape (n,) of int64
        The path on the rows of these runs (zero elsewhere).
    log_prob : ndarray of shape (R,)
        Each run's best joint log-probability.
    """
    starts = np.asarray(starts, dtype=np.int64)
    lengths = np.asarray(lengths, dtype=np.int64)
    n, k = log_emission.shape
    path = np.zeros(n, dtype=np.int64)
    log_prob = np.zeros(lengths.size)
    stay = np.arange(k)
    for group in _groups(lengths):
        rows, live = _layout(starts[group], lengths[group])
        top, r = rows.shape
        back = np.empty((top, r, k), dtype=np.int64)
        back[0] = stay
        delta = log_start[None, :] + log_emission[rows[0]]
        every = live.all(axis=1)  # steps where no run of the group has ended
        for t in range(1, top):
            cand = delta[:, :, None] + log_trans[None, :, :]  # (R, from, to)
            best = cand.argmax(axis=1)
            new = cand.max(axis=1)  # the value at ``best``
            new += log_emission[rows[t]]
            if every[t]:
                delta, back[t] = new, best
            else:
                on = live[t][:, None]
                delta = np.where(on, new, delta)
                back[t] = np.where(on, best, stay)
        state = delta.argmax(axis=1)
        log_prob[group] = delta[np.arange(r), state]
        states = np.empty((top, r), dtype=np.int64)
        states[top - 1] = state
        for t in range(top - 1, 0, -1):
            state = back[t, np.arange(r), state]
            states[t - 1] = state
        path[rows[live]] = states[live]
    return path, log_prob
