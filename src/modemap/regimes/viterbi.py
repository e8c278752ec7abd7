"""Most probable regime sequence (Viterbi decoding) for emissions we compute ourselves.

The Viterbi recursion ("The Viterbi algorithm", Proceedings of the IEEE 61(3), 1973,
DOI 10.1109/PROC.1973.9030) runs in hmmlearn's compiled decoder: :class:`_GivenEmissions`
subclasses hmmlearn's base HMM with an emission log-likelihood that is the matrix we pass in
(the Gaussian residual log-likelihood of each regime's local model, plus any location term),
which is the extension point hmmlearn documents for custom emissions.  A per-sample Python
loop would take seconds on 10^6 samples; the compiled loop takes a few tens of milliseconds.

Runs (``lengths``) are decoded independently: each run starts from ``log_start`` whatever the
previous run ended in, so the best path of the concatenation is the concatenation of the best
paths of the runs, and the log-probability is their sum (as hmmlearn reports for
``decode(X, lengths)``).
"""

from __future__ import annotations

import numpy as np
from hmmlearn.base import BaseHMM

__all__ = ["viterbi", "viterbi_runs"]

#: Stand-in for an emission log-likelihood of -inf (hmmlearn's input check rejects
#: non-finite values); far below any finite score, so such a regime is never chosen
#: where another one is possible.
_IMPOSSIBLE = -1e200


class _GivenEmissions(BaseHMM):
    """hmmlearn HMM whose "observations" are the emission log-likelihoods themselves."""

    def _compute_log_likelihood(self, X: np.ndarray) -> np.ndarray:
        return X


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
        Rows of ``exp(log_start)`` and ``exp(log_trans)`` must sum to one.
    log_trans : ndarray of shape (K, K)

    Returns
    -------
    path : ndarray of shape (n,) of int64
    log_prob : float
        Sum over runs of each run's best joint log-probability.
    """
    e = np.ascontiguousarray(log_emission, dtype=np.float64)
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
    if not np.isfinite(e).all():
        if np.isnan(e).any():
            raise ValueError("log_emission contains NaN")
        e = np.maximum(e, _IMPOSSIBLE)  # -inf -> impossible (+inf is rejected below)
    chain = _GivenEmissions(n_components=k, algorithm="viterbi")
    chain.startprob_ = np.exp(log_start)
    chain.transmat_ = np.exp(log_trans)
    log_prob, path = chain.decode(e, lengths=lengths)
    return path.astype(np.int64, copy=False), float(log_prob)
