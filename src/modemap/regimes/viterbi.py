"""The Markov chain of regimes over emissions we compute ourselves: the most probable regime
sequence (Viterbi decoding), and each sample's regime probabilities with the marginal
likelihood (forward-backward).

The Viterbi recursion ("The Viterbi algorithm", Proceedings of the IEEE 61(3), 1973,
DOI 10.1109/PROC.1973.9030) runs in hmmlearn's compiled decoder: :class:`_GivenEmissions`
subclasses hmmlearn's base HMM with an emission log-likelihood that is the matrix we pass in
(the Gaussian residual log-likelihood of each regime's local model, plus any location term),
which is the extension point hmmlearn documents for custom emissions.  A per-sample Python
loop would take seconds on 10^6 samples; the compiled loop takes a few tens of milliseconds.

The forward-backward recursions ("A maximization technique occurring in the statistical
analysis of probabilistic functions of Markov chains", Annals of Mathematical Statistics
41(1), 1970, DOI 10.1214/aoms/1177697196) run in hmmlearn's compiled log-space code the same
way (:func:`forward_backward`): the forward pass gives the marginal log-likelihood of the
data, ``log p(y) = log sum over all regime paths of p(path) p(y | path)``, and the two passes
together each sample's regime probabilities given all the data of its run (the smoothed
probabilities of a Markov-switching model).

Runs (``lengths``) are decoded independently: each run starts from ``log_start`` whatever the
previous run ended in, so the best path of the concatenation is the concatenation of the best
paths of the runs, and the log-probability is their sum (as hmmlearn reports for
``decode(X, lengths)``).  Many short runs are decoded side by side in numpy instead of
one by one (:mod:`.short_runs`); a few long runs take hmmlearn's code as before.
"""

from __future__ import annotations

from typing import Any

import numpy as np
from hmmlearn.base import BaseHMM

from modemap.regimes.short_runs import (
    batched,
    forward_backward_scaled,
    run_starts,
    viterbi_batched,
)

__all__ = ["forward_backward", "forward_gated", "viterbi", "viterbi_runs"]

#: Stand-in for an emission log-likelihood of -inf (hmmlearn's input check rejects
#: non-finite values); far below any finite score, so such a regime is never chosen
#: where another one is possible.
_IMPOSSIBLE = -1e200


class _GivenEmissions(BaseHMM):
    """hmmlearn HMM whose "observations" are the emission log-likelihoods themselves."""

    def _compute_log_likelihood(self, X: np.ndarray) -> np.ndarray:
        return X


def _checked(
    log_emission: np.ndarray, lengths: Any, log_start: np.ndarray, log_trans: np.ndarray
) -> tuple[np.ndarray, np.ndarray, np.ndarray, np.ndarray]:
    """Emissions (n, K) as finite floats (-inf: impossible), run lengths, the chain's logs."""
    e = np.ascontiguousarray(log_emission, dtype=np.float64)
    if e.ndim != 2:
        raise ValueError("log_emission must be 2-D (n_samples, n_regimes)")
    n, k = e.shape
    lengths = np.asarray(lengths, dtype=np.int64)
    if lengths.sum() != n or np.any(lengths < 0):
        raise ValueError(f"lengths sum to {int(lengths.sum())}, expected {n}")
    if not np.isfinite(e).all():
        if np.isnan(e).any():
            raise ValueError("log_emission contains NaN")
        e = np.maximum(e, _IMPOSSIBLE)  # -inf -> impossible (+inf is rejected below)
    log_start = np.asarray(log_start, dtype=np.float64).reshape(k)
    log_trans = np.asarray(log_trans, dtype=np.float64).reshape(k, k)
    return e, lengths, log_start, log_trans


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
    e, lengths, log_start, log_trans = _checked(log_emission, lengths, log_start, log_trans)
    n, k = e.shape
    lengths = lengths[lengths > 0]
    if n == 0:
        return np.zeros(0, dtype=np.int64), 0.0
    if k == 1:
        runs = lengths.size
        log_prob = e.sum() + log_start[0] * runs + log_trans[0, 0] * (n - runs)
        return np.zeros(n, dtype=np.int64), float(log_prob)
    short = batched(lengths)
    if not short.any():
        return _viterbi_hmmlearn(e, lengths, log_start, log_trans)
    path, log_probs = viterbi_batched(
        e, run_starts(lengths)[short], lengths[short], *chain_of(log_start, log_trans)
    )
    log_prob = float(log_probs.sum())
    if not short.all():
        rows = np.repeat(~short, lengths)
        long_path, long_prob = _viterbi_hmmlearn(e[rows], lengths[~short], log_start, log_trans)
        path[rows] = long_path
        log_prob += long_prob
    return path, log_prob


def chain_of(log_start: np.ndarray, log_trans: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """The chain's logs as hmmlearn sees them (after its exp and log)."""
    with np.errstate(divide="ignore"):
        return np.log(np.exp(log_start)), np.log(np.exp(log_trans))


def _viterbi_hmmlearn(
    e: np.ndarray, lengths: np.ndarray, log_start: np.ndarray, log_trans: np.ndarray
) -> tuple[np.ndarray, float]:
    chain = _GivenEmissions(n_components=e.shape[1], algorithm="viterbi")
    chain.startprob_ = np.exp(log_start)
    chain.transmat_ = np.exp(log_trans)
    log_prob, path = chain.decode(e, lengths=lengths)
    return path.astype(np.int64, copy=False), float(log_prob)


def forward_backward(
    log_emission: np.ndarray,
    lengths: np.ndarray | list[int],
    log_start: np.ndarray,
    log_trans: np.ndarray,
) -> tuple[float, np.ndarray]:
    """Marginal log-likelihood and regime probabilities of several runs, never across runs.

    Parameters
    ----------
    log_emission : ndarray of shape (n, K)
        Log-likelihood of each sample under each regime.
    lengths : sequence of int
        Samples per run; must sum to ``n``.
    log_start : ndarray of shape (K,)
    log_trans : ndarray of shape (K, K)
        ``log_trans[j, i]`` = log P(regime i at t | regime j at t-1).

    Returns
    -------
    log_likelihood : float
        Sum over runs of ``log p(run's samples)``, every regime path counted.
    posteriors : ndarray of shape (n, K)
        ``P(regime at t | all samples of t's run)``; rows sum to one.
    """
    e, lengths, log_start, log_trans = _checked(log_emission, lengths, log_start, log_trans)
    n, k = e.shape
    if n == 0:
        return 0.0, np.zeros((0, k))
    if k == 1:
        _, log_prob = viterbi_runs(e, lengths, log_start, log_trans)
        return log_prob, np.ones((n, 1))
    lengths = lengths[lengths > 0]
    short = batched(lengths)
    if not short.any():
        return _forward_backward_hmmlearn(e, lengths, log_start, log_trans)
    # scaled recursions on each row's emissions relative to its best regime (no underflow
    # where any regime is possible); the row maxima are added back to the log-likelihood
    peak = e.max(axis=1, keepdims=True)
    rows = np.repeat(short, lengths)
    with np.errstate(under="ignore"):
        frame = np.exp(e - peak)
    try:
        log_probs, posteriors, _, _ = forward_backward_scaled(
            frame, run_starts(lengths)[short], lengths[short], np.exp(log_start),
            np.exp(log_trans), need_xi=False,
        )  # fmt: skip
    except ValueError:  # a run with no possible path: hmmlearn's log-space code says -inf
        return _forward_backward_hmmlearn(e, lengths, log_start, log_trans)
    log_prob = float(log_probs.sum() + peak[rows, 0].sum())
    if not short.all():
        long_prob, long_post = _forward_backward_hmmlearn(
            e[~rows], lengths[~short], log_start, log_trans
        )
        posteriors[~rows] = long_post
        log_prob += long_prob
    return log_prob, posteriors


def _forward_backward_hmmlearn(
    e: np.ndarray, lengths: np.ndarray, log_start: np.ndarray, log_trans: np.ndarray
) -> tuple[float, np.ndarray]:
    """hmmlearn's compiled recursions, run by run: the scaled ones on each row's emissions
    relative to its best regime (the row maxima added back to the log-likelihood; two to
    three times faster than the log-space ones, whose posteriors take a log-sum-exp per run),
    and the log-space ones when a run has no possible path (the scaled pass underflows)."""
    start, trans = np.exp(log_start), np.exp(log_trans)
    peak = e.max(axis=1, keepdims=True)
    chain = _GivenEmissions(n_components=e.shape[1], implementation="scaling")
    chain.startprob_, chain.transmat_ = start, trans
    try:
        log_prob, posteriors = chain.score_samples(e - peak, lengths=lengths)
    except ValueError:  # underflow: a run with no possible path
        log_prob = np.nan
    if np.isfinite(log_prob) and np.isfinite(posteriors).all():
        return float(log_prob + peak.sum()), posteriors
    chain = _GivenEmissions(n_components=e.shape[1], implementation="log")
    chain.startprob_, chain.transmat_ = start, trans
    log_prob, posteriors = chain.score_samples(e, lengths=lengths)
    return float(log_prob), posteriors


def forward_gated(
    log_emission: np.ndarray,
    lengths: np.ndarray | list[int],
    log_trans: np.ndarray,
    log_gate: np.ndarray,
) -> float:
    """Marginal log-likelihood of a chain whose transitions depend on the variables.

    The transition from regime ``i`` to ``j`` at step ``t`` has the probability
    ``trans[i, j] g_t(j) / sum_j' trans[i, j'] g_t(j')``, with ``g_t`` the probability of
    each regime given the variables at ``t`` (a switching surface's classifier): a chain
    whose switches are predicted by where the variables are (an input-output hidden
    Markov model: "Input-output HMMs for sequence processing", IEEE Transactions on Neural
    Networks 7(5), 1996, DOI 10.1109/72.536317).  With a gate per source regime,
    ``g_t(j | i)`` replaces ``g_t(j)`` (the input-output model's own form, one transition
    classifier per state: where a switch happens may then depend on the regime it leaves,
    as with hysteresis).  The first step of each run has the probabilities ``g_0``
    (normalised; with a gate per source, their mean over the sources).  The forward pass
    runs over all runs at once, one step at a time.

    Parameters
    ----------
    log_emission : ndarray of shape (n, K)
    lengths : sequence of int
        Steps per run; must sum to ``n``.
    log_trans : ndarray of shape (K, K)
    log_gate : ndarray of shape (n, K) or (n, K, K)
        ``log g_t(j)``, or ``log g_t(j | i)`` indexed ``[t, i, j]``.

    Returns
    -------
    float
        Sum over runs of ``log p(run's samples)``.
    """
    e, lengths, _, log_trans = _checked(
        log_emission, lengths, np.zeros(np.shape(log_emission)[1]), log_trans
    )
    lengths = lengths[lengths > 0]
    if lengths.size == 0:
        return 0.0
    # scaled probabilities (the normalised forward variables of the textbook recursion):
    # alpha_t(j) = e_t(j) sum_i alpha_t-1(i) T_t(i, j), with each step's transition matrix
    # T_t(i, j) = trans(i, j) g_t(j | i) / sum_j' trans(i, j') g_t(j' | i) (a shared gate
    # is the same for every source i); the log of every step's normaliser is summed
    g = np.exp(np.maximum(np.asarray(log_gate, dtype=np.float64), _IMPOSSIBLE))
    g /= np.maximum(g.sum(axis=-1, keepdims=True), 1e-300)
    if g.ndim == 2:
        g = g[:, None, :]
    step_trans = np.exp(log_trans)[None] * g
    step_trans /= np.maximum(step_trans.sum(axis=2, keepdims=True), 1e-300)
    g = g.mean(axis=1)  # the first steps
    peak = e.max(axis=1, keepdims=True)
    em = np.exp(e - peak)
    top = int(lengths.max())
    starts = np.concatenate([[0], np.cumsum(lengths)[:-1]])
    # steps laid out (step, run): padded runs stop contributing once they end
    idx = starts[None, :] + np.arange(top)[:, None]
    live = np.arange(top)[:, None] < lengths[None, :]
    idx = np.where(live, idx, 0)
    alpha = g[starts] * em[starts]
    total = alpha.sum(axis=1)
    loglik = float(np.log(np.maximum(total, 1e-300)).sum() + peak[starts].sum())
    alpha /= np.maximum(total, 1e-300)[:, None]
    for step in range(1, top):
        rows, on = idx[step], live[step]
        new = np.einsum("ri,rij->rj", alpha, step_trans[rows]) * em[rows]
        norm = new.sum(axis=1)
        ok = on & (norm > 0)
        loglik += float(np.log(norm[ok]).sum() + peak[rows[ok], 0].sum())
        if not np.all(ok[on]):  # an impossible step: the run's likelihood is zero
            return -np.inf
        alpha = np.where(on[:, None], new / np.where(norm > 0, norm, 1.0)[:, None], alpha)
    return loglik
