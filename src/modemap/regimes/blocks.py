"""The regime stage's work as tasks over blocks of runs, for an executor to map.

The refinement needs two things of all rows at every pass, and both are a map over runs
followed by a reduction here, so they can run wherever an executor (:mod:`modemap.engine`)
sends them:

* **statistics** (:func:`stats_by_label`): each block's
  :class:`~modemap.fit.statistics.GramStats` per regime label
  (:func:`modemap.fit.statistics.accumulate_by_label` on the block's rows), summed in block
  order;
* **decoding** (:func:`decode_blocks`): each block's emission log-likelihood under every
  regime and the Viterbi path of each of its runs (:func:`modemap.regimes.viterbi.viterbi_runs`),
  and, when asked, the joint log-probability of the current labels.  Runs are independent,
  so the paths and log-probabilities do not depend on where they were computed.

A block holds one or more whole runs (:class:`RunBlock`).  In this process all rows form
one block (:func:`split_blocks` with ``per_run=False``), so the work is the same as one
pass over all rows; on a cluster each run is a block.  The task functions are module-level,
so an executor that ships functions (Dask's own serialisation) can send them.
"""

from __future__ import annotations

from collections.abc import Sequence
from typing import Any, NamedTuple

import numpy as np

from modemap.fit.statistics import GramStats, accumulate_by_label
from modemap.regimes.likelihood import path_log_prob, regime_log_likelihood
from modemap.regimes.viterbi import forward_backward, viterbi_runs

__all__ = ["Decoded", "RunBlock", "decode_blocks", "split_blocks", "stats_by_label"]


class RunBlock(NamedTuple):
    """Rows of whole runs: variables ``Z (n, n_vars)``, targets ``Y (n, m)``, run lengths."""

    Z: np.ndarray
    Y: np.ndarray
    lengths: np.ndarray


def split_blocks(
    Z: np.ndarray, Y: np.ndarray, lengths: Sequence[int] | np.ndarray, *, per_run: bool = True
) -> list[RunBlock]:
    """Cut stacked rows into one :class:`RunBlock` per run, or one for all (views, no copy)."""
    lengths = np.asarray(lengths, dtype=np.int64)
    if not per_run:
        return [RunBlock(Z, Y, lengths)]
    bounds = np.cumsum(lengths)[:-1]
    return [
        RunBlock(z, y, np.array([n], dtype=np.int64))
        for z, y, n in zip(np.split(Z, bounds), np.split(Y, bounds), lengths, strict=True)
    ]


def block_sizes(blocks: Sequence[RunBlock]) -> list[int]:
    """Rows in each block."""
    return [int(np.sum(b.lengths)) for b in blocks]


def compact(labels: np.ndarray) -> np.ndarray:
    """Labels in the smallest integer type that holds them (-1 included): less to ship."""
    labels = np.asarray(labels)
    top = int(labels.max(initial=0))
    return labels.astype(np.int8 if top < 127 else np.int16 if top < 32767 else np.int64)


def _block_stats(
    item: tuple[RunBlock, np.ndarray], *, library: Any, n_labels: int
) -> list[GramStats]:
    """Task: one block's statistics per label."""
    block, labels = item
    return accumulate_by_label(library, block.Z, block.Y, labels, n_labels)


def stats_by_label(
    engine: Any,
    blocks: Sequence[Any],
    labels: Sequence[np.ndarray],
    library: Any,
    n_labels: int,
) -> list[GramStats]:
    """Per-label statistics of all blocks: a map over blocks, summed in block order.

    Parameters
    ----------
    engine : Engine
        Where the tasks run (:mod:`modemap.engine`).
    blocks : sequence of RunBlock (or what ``engine.scatter`` returned for them)
    labels : sequence of ndarray of int
        Labels of each block's rows (``-1`` rows are skipped).
    library : fitted TermLibrary
    n_labels : int

    Returns
    -------
    list of GramStats, length ``n_labels``
    """
    items = list(zip(blocks, [compact(x) for x in labels], strict=True))
    per_block = engine.map(_block_stats, items, library=library, n_labels=n_labels)
    totals = list(per_block[0])
    for stats in per_block[1:]:
        totals = [a + b for a, b in zip(totals, stats, strict=True)]
    return totals


class Decoded(NamedTuple):
    """What one decoding task returns for its block."""

    path: np.ndarray
    log_prob: float
    current_log_prob: float
    confident: np.ndarray  # rows whose regime on the path the dynamics alone decide


def _block_decode(
    item: tuple[RunBlock, np.ndarray | None],
    *,
    library: Any,
    coefs: Sequence[np.ndarray],
    covariances: np.ndarray,
    log_start: np.ndarray,
    log_trans: np.ndarray,
    terms: Sequence[Any],
    margin: float,
) -> Decoded:
    """Task: emission log-likelihoods of one block, its runs' Viterbi paths and, with
    ``current``, the joint log-probability of those labels."""
    block, current = item
    log_em = regime_log_likelihood(library, block.Z, block.Y, coefs, covariances)
    if margin < 1.0 and log_em.shape[1] > 1:  # the regime probabilities of the dynamics alone
        _, posterior = forward_backward(log_em, block.lengths, log_start, log_trans)
    else:
        posterior = None
    for term in terms:
        log_em += term.log_prob(block.Z, block.Y.shape[1])
    path, log_prob = viterbi_runs(log_em, block.lengths, log_start, log_trans)
    score = float("nan")
    if current is not None and current.size and current.min() >= 0:
        cur = current.astype(np.int64)
        score = path_log_prob(log_em, cur, block.lengths, log_start, log_trans)
    if posterior is None:
        confident = np.zeros(path.size, dtype=bool)
    else:
        confident = posterior[np.arange(path.size), path] > margin
    return Decoded(compact(path), float(log_prob), score, confident)


def decode_blocks(
    engine: Any,
    blocks: Sequence[Any],
    library: Any,
    coefs: Sequence[np.ndarray],
    covariances: np.ndarray,
    chain: tuple[np.ndarray, np.ndarray],
    *,
    current: Sequence[np.ndarray] | None = None,
    terms: Sequence[Any] = (),
    margin: float = 2.0,
) -> tuple[np.ndarray, float, float, np.ndarray]:
    """Viterbi decoding of every run under per-regime residual models, a map over blocks.

    Parameters
    ----------
    engine : Engine
    blocks : sequence of RunBlock (or scattered handles)
    library : fitted TermLibrary
    coefs : sequence of ndarray of shape (p, m)
        Coefficients of each regime.
    covariances : ndarray of shape (K, m, m)
        Residual covariance of each regime.
    chain : (log_start, log_trans)
        Markov chain of the regimes (see :func:`modemap.regimes.viterbi.viterbi`).
    current : sequence of ndarray, optional
        Current labels of each block; their joint log-probability is returned as well.
    terms : sequence, default ()
        Further emission terms: objects with ``log_prob(Z, n_states) -> (n, K)``
        (:class:`~modemap.regimes.likelihood.LocationTerm`,
        :class:`~modemap.regimes.likelihood.SurfaceTerm`).
    margin : float, default 2 (none)
        Below 1: a row is confident when the probability of its regime on the path, given
        the residual likelihoods and the chain alone (forward-backward), exceeds
        ``margin``.

    Returns
    -------
    path : ndarray of int64
        Most probable regime sequence of all rows, blocks in order.
    log_prob : float
        Sum over blocks of the best joint log-probabilities.
    current_log_prob : float
        Sum over blocks of the joint log-probability of ``current`` (NaN without it).
    confident : ndarray of bool
        Rows whose regime on the path the residual likelihoods decide (see ``margin``).
    """
    cur = [None] * len(blocks) if current is None else [compact(c) for c in current]
    log_start, log_trans = chain
    out = engine.map(
        _block_decode,
        list(zip(blocks, cur, strict=True)),
        library=library,
        coefs=[np.asarray(c, dtype=np.float64) for c in coefs],
        covariances=np.asarray(covariances, dtype=np.float64),
        log_start=np.asarray(log_start, dtype=np.float64),
        log_trans=np.asarray(log_trans, dtype=np.float64),
        terms=tuple(terms),
        margin=float(margin),
    )
    path = np.concatenate([d.path.astype(np.int64) for d in out])
    log_prob = float(sum(d.log_prob for d in out))
    current_log_prob = float(sum(d.current_log_prob for d in out))
    confident = np.concatenate([d.confident for d in out])
    return path, log_prob, current_log_prob, confident
