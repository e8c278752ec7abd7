"""First guess of the regime labels: a sticky Gaussian hidden Markov model on features.

The features are whatever separates operating points at a glance (states, their increments or
derivatives, inputs).  They are standardised per column, then a Gaussian HMM (hmmlearn, with
expectation-maximisation by forward-backward passes: "A maximization technique occurring in
the statistical analysis of probabilistic functions of Markov chains", Annals of Mathematical
Statistics 41(1), 1970, DOI 10.1214/aoms/1177697196) is fitted with

* means and covariances initialised by k-means (hmmlearn's own initialisation, seeded),
* a sticky initial transition matrix (diagonal ``sticky``, the rest spread evenly),
* a Dirichlet prior on each transition row that adds self-transition pseudo-counts equal to
  10 % of the expected samples per regime, so short flickers are discouraged,
* at most 30 EM iterations, stopping when the log-likelihood gains less than 0.001 per fitted
  sample (a proposal only needs to be roughly right),
* ``n_restarts`` seeded restarts; the one with the highest log-likelihood is kept (a restart
  whose full covariances degenerate is redone with diagonal ones; if every fit fails, plain
  k-means clusters are returned).

All runs are fitted together through hmmlearn's ``lengths``.  When there are more than
``max_samples`` samples (default :data:`MAX_FIT_SAMPLES` = 20,000), the HMM is fitted on
contiguous windows of 2,000 samples (or shorter when runs are shorter) drawn at random
(seeded) without replacement up to ``max_samples`` in total, kept in data order; every sample
is then decoded with our own Viterbi.  The proposal is only a starting point for the exact
refinement on all samples (:mod:`.refine`), so its fit is kept bounded: its cost does not grow
with the data beyond the decoding pass.

hmmlearn's expectation step and score loop over the runs in Python; with many short runs
(thousands of runs of ten samples) that loop is the cost, so :class:`_ShortRunsHMM` does the
short runs' forward-backward passes side by side (:mod:`.short_runs`) and leaves longer runs,
and data with few short runs, to hmmlearn as before.
"""

from __future__ import annotations

import logging
import warnings

import numpy as np
from hmmlearn import hmm
from sklearn.cluster import KMeans
from threadpoolctl import threadpool_limits

from modemap.regimes.short_runs import batched, forward_backward_scaled, run_starts
from modemap.regimes.viterbi import viterbi_runs

__all__ = ["MAX_FIT_SAMPLES", "gaussian_log_density", "propose", "standardise"]

_WINDOW = 2000
MAX_FIT_SAMPLES = 20_000
"""Samples the HMM is fitted on at most (10 windows of 2,000); every sample is decoded."""
_TOL_PER_SAMPLE = 1e-3  # EM stops when the log-likelihood gains less than this per sample


def standardise(features: np.ndarray) -> np.ndarray:
    """Centre and scale each column (a constant column is only centred)."""
    f = np.asarray(features, dtype=np.float64)
    scale = f.std(axis=0)
    scale[~(scale > 0)] = 1.0
    out = f - f.mean(axis=0)  # one copy of the data; the division is done in place
    out /= scale
    return out


def propose(
    features: np.ndarray,
    lengths: np.ndarray | list[int],
    n_regimes: int,
    *,
    sticky: float = 0.99,
    n_restarts: int = 3,
    seed: int = 0,
    max_samples: int = MAX_FIT_SAMPLES,
    covariance: str = "full",
) -> np.ndarray:
    """Propose regime labels with a sticky Gaussian HMM.

    Parameters
    ----------
    features : ndarray of shape (n, f)
    lengths : sequence of int
        Samples per run (sums to ``n``); the HMM never links two runs.
    n_regimes : int
    sticky : float
        Initial self-transition probability.
    n_restarts : int
        Seeded restarts (seeds ``seed``, ``seed + 1``, ...); the best log-likelihood wins.
    seed : int
    max_samples : int
        Fit on at most this many samples (contiguous windows); decode all.
    covariance : {"full", "diag"}

    Returns
    -------
    labels : ndarray of shape (n,) of int64
    """
    x = standardise(features)
    lengths = np.asarray(lengths, dtype=np.int64)
    if n_regimes <= 1:
        return np.zeros(x.shape[0], dtype=np.int64)
    fit_x, fit_lengths = _subsample(x, lengths, max_samples, seed)
    best, best_score = None, -np.inf
    # small dense problems: BLAS/OpenMP threads only add overhead (and stall on a busy machine)
    with threadpool_limits(limits=1):
        for r in range(max(1, n_restarts)):
            for cov in dict.fromkeys((covariance, "diag")):  # diag when full is degenerate
                try:
                    model = _fit_one(fit_x, fit_lengths, n_regimes, sticky, seed + r, cov)
                    score = model.score(fit_x, fit_lengths)
                except (np.linalg.LinAlgError, ValueError):
                    continue
                if np.isfinite(score) and score > best_score:
                    best, best_score = model, score
                break
    if best is None:  # every HMM fit failed: plain k-means clusters
        return KMeans(n_clusters=n_regimes, n_init=3, random_state=seed).fit_predict(x)
    log_em = gaussian_log_density(x, best.means_, best.covars_)
    with np.errstate(divide="ignore"):
        path, _ = viterbi_runs(log_em, lengths, np.log(best.startprob_), np.log(best.transmat_))
    return path


def _fit_one(
    x: np.ndarray, lengths: np.ndarray, k: int, sticky: float, seed: int, covariance: str
) -> hmm.GaussianHMM:
    n = x.shape[0]
    trans = np.full((k, k), (1.0 - sticky) / (k - 1))
    np.fill_diagonal(trans, sticky)
    prior = np.ones((k, k)) + np.eye(k) * max(1.0, 0.1 * n / k)
    model = _ShortRunsHMM(
        n_components=k,
        covariance_type=covariance,
        n_iter=30,
        tol=max(1e-2, _TOL_PER_SAMPLE * n),
        random_state=seed,
        init_params="mc",
        params="stmc",
        transmat_prior=prior,
        min_covar=1e-3,
        implementation="scaling",
    )
    model.startprob_ = np.full(k, 1.0 / k)
    model.transmat_ = trans
    log = logging.getLogger("hmmlearn.base")
    disabled, log.disabled = log.disabled, True  # hide "not converging" chatter near optimum
    try:
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")
            model.fit(x, lengths)
    finally:
        log.disabled = disabled
    return model


class _ShortRunsHMM(hmm.GaussianHMM):
    """hmmlearn's Gaussian HMM (scaled recursions) with the short runs of an expectation
    step or a score batched; the sufficient statistics are the same sums."""

    def _do_estep(self, X: np.ndarray, lengths: np.ndarray):  # type: ignore[override]
        lengths = np.asarray(lengths, dtype=np.int64)
        short = batched(lengths)
        if self.implementation != "scaling" or not short.any():
            return super()._do_estep(X, lengths)
        rows = np.repeat(short, lengths)
        stats, log_prob = (
            super()._do_estep(X[~rows], lengths[~short])
            if not short.all()
            else (self._initialize_sufficient_statistics(), 0.0)
        )
        x = X[rows]
        frame = self._compute_likelihood(x)
        short_lengths = lengths[short]
        probs, post, xi_sum, start_sum = forward_backward_scaled(
            frame, run_starts(short_lengths), short_lengths, self.startprob_, self.transmat_,
            need_xi="t" in self.params,
        )  # fmt: skip
        stats["nobs"] += int(short.sum())
        if "s" in self.params:
            stats["start"] += start_sum
        if "t" in self.params:
            stats["trans"] += xi_sum
        params, self.params = self.params, self.params.replace("s", "").replace("t", "")
        try:  # the emission statistics (sums over rows): one call for all short runs
            self._accumulate_sufficient_statistics(stats, x, frame, post, None, None)
        finally:
            self.params = params
        stats["nobs"] -= 1  # that call counted the rows as one more sequence
        return stats, log_prob + float(probs.sum())

    def _score_scaling(self, X, lengths=None, *, compute_posteriors):  # type: ignore[override]
        lengths = np.asarray([len(X)] if lengths is None else lengths, dtype=np.int64)
        short = batched(lengths)
        if not short.any():
            return super()._score_scaling(X, lengths, compute_posteriors=compute_posteriors)
        rows = np.repeat(short, lengths)
        frame = self._compute_likelihood(X[rows])
        short_lengths = lengths[short]
        probs, post, _, _ = forward_backward_scaled(
            frame, run_starts(short_lengths), short_lengths, self.startprob_, self.transmat_,
            need_xi=False,
        )  # fmt: skip
        log_prob = float(probs.sum())
        posteriors = np.zeros((len(X), self.n_components))
        posteriors[rows] = post
        if not short.all():
            long_prob, long_post = super()._score_scaling(
                X[~rows], lengths[~short], compute_posteriors=compute_posteriors
            )
            log_prob += long_prob
            if compute_posteriors:
                posteriors[~rows] = long_post
        return log_prob, posteriors if compute_posteriors else np.empty((0, self.n_components))


def _subsample(
    x: np.ndarray, lengths: np.ndarray, max_samples: int, seed: int
) -> tuple[np.ndarray, np.ndarray]:
    """Contiguous windows (<= 2,000 samples) drawn at random up to ``max_samples``."""
    n = x.shape[0]
    if n <= max_samples:
        return x, lengths
    starts, sizes = [], []
    offset = 0
    for length in lengths:
        for a in range(0, int(length), _WINDOW):
            starts.append(offset + a)
            sizes.append(min(_WINDOW, int(length) - a))
        offset += int(length)
    starts, sizes = np.array(starts), np.array(sizes)
    order = np.random.default_rng(seed).permutation(starts.size)
    keep = order[: max(1, int(np.searchsorted(np.cumsum(sizes[order]), max_samples)))]
    keep.sort()
    idx = np.concatenate([np.arange(starts[i], starts[i] + sizes[i]) for i in keep])
    return x[idx], sizes[keep]


def gaussian_log_density(
    x: np.ndarray, means: np.ndarray, covars: np.ndarray, *, chunk_size: int = 65536
) -> np.ndarray:
    """Log-density of each row of ``x`` under each Gaussian: (n, K).

    ``covars`` is (K, f, f) (hmmlearn's ``covars_`` property always returns full matrices).
    With ``Sigma = L L'``, the Mahalanobis term is ``|(x - mu) L^-T|^2``: one small
    triangular inverse per Gaussian, then a matrix product over row chunks (no (f, n)
    temporaries and no general solve on the data).
    """
    n, f = x.shape
    k = means.shape[0]
    out = np.empty((n, k))
    whiten, consts = [], []
    for cov in covars:
        chol = np.linalg.cholesky(cov + 1e-9 * np.eye(f))
        whiten.append(np.linalg.inv(chol).T)
        consts.append(-np.log(np.diag(chol)).sum() - 0.5 * f * np.log(2 * np.pi))
    shifts = [mu @ w for mu, w in zip(means, whiten, strict=True)]
    for start in range(0, n, chunk_size):
        block = x[start : start + chunk_size]
        for j in range(k):
            z = block @ whiten[j]
            z -= shifts[j]
            out[start : start + block.shape[0], j] = consts[j] - 0.5 * np.einsum("ij,ij->i", z, z)
    return out
