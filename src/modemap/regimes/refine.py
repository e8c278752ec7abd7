"""Dynamics-aware refinement of regime labels: hard-EM switching regression.

Starting from proposed labels, we alternate

(a) **fit**: one local model per regime from additive statistics (one pass over the data
    with :func:`modemap.fit.statistics.accumulate_by_label`, then sequentially thresholded least
    squares or the affine operator per regime); a regime with fewer than ``min_samples`` samples is
    dropped and its samples are reassigned in step (c);
(b) **score**: the log-likelihood of every sample under every regime: the residual
    ``Y - Theta(Z) @ coef_k`` is Gaussian with the regime's residual covariance (maximum
    likelihood, plus a floor of ``cov_floor`` times each target's variance), computed chunk by
    chunk so that the term matrix never exists for all rows; optionally plus
    ``location_weight`` times a Gaussian log-density of where the state sits (per-regime mean
    and covariance of the states);
(c) **relabel**: Viterbi decoding of all runs (never across runs) with a sticky Markov chain:
    transition probabilities from the current switch counts plus Dirichlet pseudo-counts
    (self-transitions get ``sticky`` of them), or fixed at ``sticky`` when
    ``learn_transitions=False``;

until the labels stop changing or ``max_iter`` is reached.  With the sparse model the first
iterations use plain least squares on all terms (labels far from settled would otherwise prune
terms that matter); once the labels settle the sparse fit takes over until they settle again.
Each step cannot lower the complete-data likelihood when the fits are plain least squares, so
this is the classification (hard) version of EM for a Markov-switching regression, as in
autoregressive hidden Markov models.  The switching model: "A new approach to the economic
analysis of nonstationary time series and the business cycle", Econometrica 57(2), 1989,
DOI 10.2307/1912559, and "Analysis of time series subject to changes in regime", Journal of
Econometrics 45, 1990, DOI 10.1016/0304-4076(90)90093-9.
"""

from __future__ import annotations

import functools
from collections.abc import Sequence
from dataclasses import dataclass, field, replace
from typing import Any

import numpy as np
from threadpoolctl import ThreadpoolController

from modemap._exceptions import FitError
from modemap._progress import ProgressCallback, null_progress
from modemap.fit.statistics import GramStats, accumulate_by_label
from modemap.regimes.hygiene import drop_small, enforce_min_dwell
from modemap.regimes.viterbi import viterbi_runs

__all__ = [
    "ConvergenceRecord",
    "RefineResult",
    "fit_regimes",
    "pair_counts",
    "path_log_prob",
    "predict_by_label",
    "refine",
    "regime_log_likelihood",
    "residuals",
    "transition_model",
]

_CHUNK = 65536
_CACHE_BYTES = 1 << 20


@functools.cache
def _blas_controller() -> ThreadpoolController:
    return ThreadpoolController()  # scanning the loaded libraries costs ~5 ms: once


def _one_blas_thread() -> Any:
    """Context limiting BLAS to one thread (tall-skinny products: threads only hurt)."""
    return _blas_controller().limit(limits=1, user_api="blas")


@dataclass
class ConvergenceRecord:
    """What happened at each refinement iteration.

    Attributes
    ----------
    history : list of float
        Viterbi log-probability (complete-data log-likelihood) per iteration.
    changes : list of int
        Samples whose label changed per iteration.
    n_regimes : list of int
        Regimes alive per iteration.
    converged : bool
        True when an iteration changed no label.
    """

    history: list[float] = field(default_factory=list)
    changes: list[int] = field(default_factory=list)
    n_regimes: list[int] = field(default_factory=list)
    converged: bool = False

    @property
    def iterations(self) -> int:
        return len(self.history)


@dataclass
class RefineResult:
    """Outcome of :func:`refine`.

    Attributes
    ----------
    labels : ndarray of shape (n,)
    n_regimes : int
    fits : list of LocalFit
    covariances : ndarray of shape (K, m, m)
        Residual covariances used in the likelihood (with the floor).
    loglik : float
        Complete-data log-likelihood of ``labels`` under the final fits and chain.
    log_start, log_trans : ndarray
    stats : list of GramStats
    monitor : ConvergenceRecord
    notes : list of str
    targets : ndarray or None
        The targets the fits used when they were re-estimated after labelling
        (continuous form, see :mod:`modemap.regimes.segments`); None otherwise.
    """

    labels: np.ndarray
    n_regimes: int
    fits: list[Any]
    covariances: np.ndarray
    loglik: float
    log_start: np.ndarray
    log_trans: np.ndarray
    stats: list[GramStats]
    monitor: ConvergenceRecord
    notes: list[str]
    covariance: str = "tied"
    location_weight: float = 0.0
    targets: np.ndarray | None = None  # set when the targets differ from the input Y


def fit_regimes(
    stats: Sequence[GramStats],
    terms: Sequence[str],
    *,
    model: str = "sparse",
    threshold="auto",
    variables: Sequence[str] | None = None,
    increments: bool = False,
) -> list[Any]:
    """One local fit per regime from its statistics (``model``: "sparse" or "affine").

    With ``variables`` the sparse selection runs on centred variables
    (:func:`modemap.fit.centring.fit_sparse_centred`), the estimate on raw ones.  With
    ``increments`` (discrete form; the targets are the next states, the first variables)
    the selection runs on the increments (:mod:`modemap.fit.increments`).
    """
    if model == "affine":
        from modemap.fit.affine import fit_affine

        return [fit_affine(s, list(terms)) for s in stats]
    from modemap.fit.sparse import fit_sparse

    if variables is not None:
        from modemap.fit.centring import fit_sparse_centred

        def select(s):
            return fit_sparse_centred(s, list(terms), list(variables), threshold=threshold)
    else:

        def select(s):
            return fit_sparse(s, list(terms), threshold=threshold)

    if not increments or variables is None:
        return [select(s) for s in stats]
    from modemap.fit.increments import fit_on_increments

    states = list(variables)[: stats[0].n_targets] if stats else []
    return [fit_on_increments(select, s, list(terms), states) for s in stats]


def _covariances(
    stats: Sequence[GramStats], fits: Sequence[Any], rel_floor: float, kind: str = "tied"
) -> np.ndarray:
    """Residual covariances (K, m, m): per regime ("full") or pooled over regimes ("tied").

    ``rel_floor`` times each target's variance (over all labelled rows, from the statistics)
    is added to the diagonal.
    """
    total = sum(stats)
    count = max(float(total.n), 1.0)
    mean = total.target_sum / count
    floor = rel_floor * (np.maximum(np.diag(total.yy) / count - mean**2, 0.0) + 1e-300)
    products = [s.residual_products(np.asarray(f.coef)) for s, f in zip(stats, fits, strict=True)]
    counts = [max(float(s.n), 1.0) for s in stats]
    if kind == "tied":
        pooled = sum(products) / sum(counts) + np.diag(floor)
        return np.repeat(pooled[None], len(stats), axis=0)
    return np.array([p / c + np.diag(floor) for p, c in zip(products, counts, strict=True)])


def regime_log_likelihood(
    library: Any,
    Z: np.ndarray,
    Y: np.ndarray,
    coefs: Sequence[np.ndarray],
    covariances: np.ndarray,
    *,
    chunk_size: int = _CHUNK,
) -> np.ndarray:
    """Gaussian log-likelihood of each sample's residual under each regime: (n, K).

    The term matrix is built chunk by chunk (at most ``chunk_size`` rows, fewer when the
    buffers would outgrow about 1 MiB) into one buffer, and the whitened residuals of all
    regimes for that chunk come from one matrix product.
    """
    n, m = Y.shape
    k = len(coefs)
    out = np.empty((n, k))
    # whitening: with Sigma_k = L_k L_k', w_k = (y - theta C_k) L_k^-T = y A_k - theta B_k;
    # all regimes at once: [theta | y] @ [[-B_1 .. -B_K], [A_1 .. A_K]] is one (rows, K m) product
    whiten = [np.linalg.inv(np.linalg.cholesky(c)).T for c in covariances]
    consts = np.array([np.log(np.diag(w)).sum() - 0.5 * m * np.log(2 * np.pi) for w in whiten])
    b_all = [np.asarray(c, dtype=np.float64) @ w for c, w in zip(coefs, whiten, strict=True)]
    p = b_all[0].shape[0]
    weights = np.vstack([-np.hstack(b_all), np.hstack(whiten)])  # (p + m, K m)
    # rows per chunk: the two buffers stay near 1 MiB, in cache between the products
    chunk_size = max(256, min(chunk_size, _CACHE_BYTES // (8 * (p + m + k * m))))
    rows = max(min(chunk_size, n), 1)
    buf = np.empty((rows, p + m))
    white = np.empty((rows, k * m))
    half_sum = np.kron(np.eye(k), np.full((m, 1), -0.5))  # (K m, K): -0.5 * sum of each group
    with _one_blas_thread():
        for start in range(0, n, chunk_size):
            stop = min(start + chunk_size, n)
            b, w = buf[: stop - start], white[: stop - start]
            library.transform(Z[start:stop], out=b[:, :p])
            b[:, p:] = Y[start:stop]
            np.matmul(b, weights, out=w)
            np.multiply(w, w, out=w)
            np.matmul(w, half_sum, out=out[start:stop])  # a product: faster than a small-axis sum
            out[start:stop] += consts
    return out


def _location_log_likelihood(
    x: np.ndarray, labels: np.ndarray, k: int, kind: str = "tied"
) -> np.ndarray:
    """Gaussian log-density of the states under each regime's mean and covariance."""
    return location_density(x, *location_parameters(x, labels, k, kind))


def location_parameters(
    x: np.ndarray, labels: np.ndarray, k: int, kind: str = "tied"
) -> tuple[np.ndarray, np.ndarray]:
    """Mean and Cholesky factor of the states' covariance per regime: (K, d), (K, d, d).

    ``kind="tied"``: one covariance shared by all regimes, pooled from the scatter of each
    regime's samples about its own mean (as in linear discriminant analysis, common
    practice); ``"full"``: one per regime.  With one per regime, a regime whose samples sit
    in a tight cluster (long steady holds) gives samples a little outside it a density so
    low that the other regime takes them, however far from it they are: measured on the
    reactor demo (both regimes one vector field, only the location tells them apart), the
    ignition and extinction transients went to the low-conversion regime (95 % of labels
    right at K = 2; 98.9 % tied).  A regime with fewer than two samples gets NaN factors
    (its density is then left at 0).
    """
    d = x.shape[1]
    means, chols = np.zeros((k, d)), np.full((k, d, d), np.nan)
    total_var = np.var(x, axis=0) + 1e-12
    covs, counts = {}, {}
    for j in range(k):
        sel = x[labels == j]
        if sel.shape[0] < 2:
            continue
        means[j] = sel.mean(axis=0)
        covs[j], counts[j] = np.atleast_2d(np.cov(sel, rowvar=False)), sel.shape[0] - 1
    if kind == "tied" and covs:
        pooled = sum(counts[j] * covs[j] for j in covs) / sum(counts.values())
        covs = dict.fromkeys(covs, pooled)
    for j, cov in covs.items():
        chols[j] = np.linalg.cholesky(cov + np.diag(1e-6 * total_var))
    return means, chols


def location_density(x: np.ndarray, means: np.ndarray, chols: np.ndarray) -> np.ndarray:
    """Gaussian log-density of the rows of ``x`` under each (mean, Cholesky factor): (n, K)."""
    n, d = x.shape
    out = np.zeros((n, means.shape[0]))
    for j, (mu, chol) in enumerate(zip(means, chols, strict=True)):
        if not np.all(np.isfinite(chol)):
            continue
        w = np.linalg.solve(chol, (x - mu).T)
        logdet = 2.0 * np.log(np.diag(chol)).sum()
        out[:, j] = -0.5 * (np.einsum("ij,ij->j", w, w) + logdet + d * np.log(2 * np.pi))
    return out


def transition_model(
    labels: np.ndarray,
    lengths: np.ndarray,
    k: int,
    sticky: float,
    learn: bool = True,
    counts: np.ndarray | None = None,
) -> tuple[np.ndarray, np.ndarray]:
    """Log start and log transition matrix for the relabelling Viterbi pass.

    With ``learn`` the rows are the counts of consecutive pairs within runs (self-transitions
    included; ``counts`` if already computed by :func:`pair_counts`) plus pseudo-counts
    ``10 * (sticky on the diagonal, the rest spread evenly)``; otherwise the fixed sticky
    matrix.  The start distribution is uniform.
    """
    log_start = np.full(k, -np.log(k))
    if k == 1:
        return log_start, np.zeros((1, 1))
    prior = np.full((k, k), (1.0 - sticky) / (k - 1))
    np.fill_diagonal(prior, sticky)
    if not learn:
        return log_start, np.log(prior)
    if counts is None:
        counts = pair_counts(labels, lengths, k)
    trans = counts + 10.0 * prior
    return log_start, np.log(trans / trans.sum(axis=1, keepdims=True))


def pair_counts(labels: np.ndarray, lengths: np.ndarray, k: int) -> np.ndarray:
    """Counts of consecutive label pairs ``from -> to`` within runs (K x K, stays included).

    Pairs with an unassigned (negative) label are skipped.
    """
    labels = np.asarray(labels, dtype=np.int64)
    # codes of (from + 1, to + 1): one bincount, no masks; unassigned (-1) land in row/col 0
    codes = (labels[:-1] + 1) * (k + 1) + labels[1:] + 1
    flat = np.bincount(codes, minlength=(k + 1) ** 2)
    bounds = np.cumsum(lengths)[:-1]
    bounds = bounds[(bounds > 0) & (bounds < labels.size)]
    np.subtract.at(flat, codes[bounds - 1], 1)  # pairs across a run boundary do not count
    return flat.reshape(k + 1, k + 1)[1:, 1:].astype(np.float64)


def path_log_prob(
    log_em: np.ndarray,
    labels: np.ndarray,
    lengths: np.ndarray,
    log_start: np.ndarray,
    log_trans: np.ndarray,
) -> float:
    """Joint log-probability of a given labelling (no maximisation)."""
    n = labels.size
    total = float(np.take_along_axis(log_em, labels[:, None], axis=1).sum())
    starts = np.concatenate([[0], np.cumsum(lengths)[:-1]]).astype(np.int64)
    is_start = np.zeros(n, dtype=bool)
    is_start[starts] = True
    total += float(log_start[labels[is_start]].sum())
    prev, cur = labels[:-1], labels[1:]
    inner = ~is_start[1:]
    return total + float(log_trans[prev[inner], cur[inner]].sum())


def residuals(
    library: Any, Z: np.ndarray, Y: np.ndarray, coef: np.ndarray, *, chunk_size: int = _CHUNK
) -> np.ndarray:
    """``Y - Theta(Z) @ coef`` built chunk by chunk: (n, m)."""
    n = Y.shape[0]
    out = np.empty_like(Y, dtype=np.float64)
    buf = np.empty((max(min(chunk_size, n), 1), np.asarray(coef).shape[0]))
    with _one_blas_thread():
        for start in range(0, n, chunk_size):
            stop = min(start + chunk_size, n)
            theta = library.transform(Z[start:stop], out=buf[: stop - start])
            out[start:stop] = Y[start:stop] - theta @ coef
    return out


def predict_by_label(
    library: Any,
    Z: np.ndarray,
    Y: np.ndarray,
    coefs: Sequence[np.ndarray],
    labels: np.ndarray,
    *,
    chunk_size: int = _CHUNK,
) -> np.ndarray:
    """Sum of squared one-step errors per state, each sample under its own regime: (m,)."""
    n, m = Y.shape
    coefs = [np.asarray(c, dtype=np.float64) for c in coefs]
    buf = np.empty((max(min(chunk_size, n), 1), coefs[0].shape[0]))
    sse = np.zeros(m)
    with _one_blas_thread():
        for start in range(0, n, chunk_size):
            stop = min(start + chunk_size, n)
            theta = library.transform(Z[start:stop], out=buf[: stop - start])
            lab = labels[start:stop]
            for j, c in enumerate(coefs):
                sel = lab == j
                r = Y[start:stop][sel] - theta[sel] @ c
                sse += np.einsum("ij,ij->j", r, r)
    return sse


def refine(
    Z: np.ndarray,
    Y: np.ndarray,
    lengths: np.ndarray,
    labels: np.ndarray,
    library: Any,
    *,
    n_regimes: int,
    model: str = "sparse",
    threshold: Any = "auto",
    sticky: float = 0.99,
    learn_transitions: bool = True,
    location_weight: float = 0.0,
    covariance: str = "tied",
    min_samples: int = 30,
    min_dwell: int = 1,
    max_iter: int = 30,
    cov_floor: float = 1e-6,
    tol: float = 1e-5,
    settle_dense: bool = True,
    increments: bool = False,
    interior: bool = False,
    progress: ProgressCallback | None = None,
    engine: Any = None,
    runs: Sequence[Any] | None = None,
) -> RefineResult:
    """Alternate per-regime fits and Viterbi relabelling (hard-EM switching regression).

    Parameters
    ----------
    Z : ndarray of shape (n, n_vars)
        Variables (states then inputs).
    Y : ndarray of shape (n, m)
        Targets (derivatives, or next states in discrete form).
    lengths : ndarray of int
        Samples per run.
    labels : ndarray of shape (n,)
        Initial labels in ``0..n_regimes-1`` (``-1`` = unassigned).
    library : fitted TermLibrary
    n_regimes : int
    model : {"sparse", "affine"}
    threshold : "auto" or float
        Passed to the sparse fit.
    sticky : float
        Self-transition weight of the Markov chain prior.
    learn_transitions : bool
        Transition probabilities from switch counts (True) or fixed at ``sticky`` (False).
    location_weight : float
        Weight of the Gaussian term on where the state sits (0 = dynamics only).
    covariance : {"tied", "full"}
        One residual covariance shared by all regimes (regimes then differ by their dynamics
        only, as with a non-switching variance) or one per regime.
    min_samples : int
        Regimes with fewer samples are dropped (never below ``n_terms + 1``).
    min_dwell : int
        Stretches shorter than this are relabelled to their neighbour after each pass.
    max_iter : int
    cov_floor : float
        Floor added to residual variances, relative to each target's variance.
    tol : float
        Converged when at most ``tol * n`` labels change in a pass (default 1e-5: below
        10^5 samples this means none; on 10^6 samples, ten).  On long records the last
        passes move a handful of boundary samples back and forth at full cost each.
    settle_dense : bool
        With the sparse model, first let the labels settle under plain least-squares fits
        (so early, unsettled labels do not prune terms); False skips that phase when the
        starting labels come from already fitted models.
    increments : bool
        Discrete form (``Y`` holds the next states): select the sparse terms on the
        increments ``Y - x`` (:mod:`modemap.fit.increments`).
    interior : bool
        Discrete form: fit each regime on the rows inside its stretches, leaving out the
        last row of every stretch (its sample interval may hold the switch, mixing both
        regimes).  Scores, covariances of the emissions and the log-likelihood still use
        every row.
    progress : callable, optional
        ``progress(fraction, message)``, called once per iteration.
    engine : Engine, optional
        Run the statistics and the decoding as a map over runs on this engine
        (:mod:`modemap.engine`, e.g. Dask workers), reduced here in run order.  ``None``
        (default) works on all rows at once in this process, the fastest path on one machine.
    runs : sequence, optional
        The runs as already placed by ``engine.scatter(split_runs(Z, Y, lengths))``, to reuse
        one scatter across calls; by default they are scattered here.

    Returns
    -------
    RefineResult
    """
    progress = progress or null_progress
    Y = np.asarray(Y, dtype=np.float64)
    if Y.ndim == 1:
        Y = Y[:, None]
    opts = _Options(
        model=model,
        threshold=threshold,
        sticky=sticky,
        learn=learn_transitions,
        location_weight=location_weight,
        covariance=covariance,
        min_samples=max(int(min_samples), len(library.terms_) + 1),
        floor=float(cov_floor),
        increments=bool(increments),
        interior=bool(interior),
    )
    Z = np.asarray(Z, dtype=np.float64)
    lengths = np.asarray(lengths, dtype=np.int64)
    labels = np.asarray(labels, dtype=np.int64).copy()
    k = int(n_regimes)
    monitor, notes = ConvergenceRecord(), []
    # phase 1 (sparse model only): plain least squares on all terms until the labels settle,
    # so that early, unsettled labels do not prune terms; phase 2: the requested fit
    dense = settle_dense and model == "sparse" and threshold != 0
    phase_opts = replace(opts, threshold=0.0) if dense else opts
    state = None
    work = _Work(Z, Y, lengths, library, notes, engine, runs)
    settled = int(tol * labels.size)
    for it in range(max(1, max_iter)):
        # keep the previous statistics (updated by the changed samples only), release the
        # previous per-sample scores before computing new ones (memory)
        previous = None if state is None else (state.labels, state.stats)
        state = None
        state = work.score(labels, k, phase_opts, previous=previous)
        labels, k = state.labels, state.k
        new, log_prob = work.decode(state)
        new = enforce_min_dwell(new, lengths, min_dwell)
        changed = int(np.count_nonzero(new != labels))
        monitor.history.append(float(log_prob))
        monitor.changes.append(changed)
        monitor.n_regimes.append(k)
        labels = new
        progress((it + 1) / max_iter, f"refinement iteration {it + 1}: {changed} labels changed")
        if changed <= settled and phase_opts is not opts:
            phase_opts = opts  # labels settled with dense fits: switch to the sparse fit
            continue
        if changed <= settled:
            monitor.converged = True
            break
    if not monitor.converged or monitor.changes[-1] > 0:
        # final fits consistent with the final labels (per-sample scores only if needed)
        previous = (state.labels, state.stats)
        state = None
        state = work.score(labels, k, opts, emissions=False, previous=previous)
        labels, k = state.labels, state.k
        if np.any(labels < 0):
            labels, _ = work.decode(state)
    if monitor.converged and monitor.changes[-1] == 0 and min_dwell <= 1:
        loglik = monitor.history[-1]  # the labels are the Viterbi path of this very state
    else:
        loglik = work.log_prob(state, labels)
    return RefineResult(
        labels=labels,
        n_regimes=k,
        fits=state.fits,
        covariances=state.covs,
        loglik=loglik,
        log_start=state.log_start,
        log_trans=state.log_trans,
        stats=state.stats,
        monitor=monitor,
        notes=notes,
        covariance=covariance,
        location_weight=location_weight,
    )


@dataclass
class _Options:
    model: str
    threshold: Any
    sticky: float
    learn: bool
    location_weight: float
    covariance: str
    min_samples: int
    floor: float  # relative to each target's variance
    increments: bool = False  # discrete form: select terms on x[k+1] - x[k]
    interior: bool = False  # discrete form: fit without the last row of each stretch


@dataclass
class _State:
    labels: np.ndarray
    k: int
    stats: list[GramStats]
    fits: list[Any]
    covs: np.ndarray
    log_em: np.ndarray | None
    log_start: np.ndarray
    log_trans: np.ndarray
    decoded: tuple[np.ndarray, float, float] | None = None  # engine path: path, best, current
    location: Any = None  # engine path: (weight, means, Cholesky factors) or None
    pairs: np.ndarray | None = None  # pair_counts of ``labels`` (local path)


class _Work:
    """Scoring and relabelling on all rows here, or as a map over runs on an engine."""

    def __init__(self, Z, Y, lengths, library, notes, engine, runs) -> None:
        self.Z, self.Y, self.lengths, self.library, self.notes = Z, Y, lengths, library, notes
        self.engine = engine
        if engine is not None and runs is None:
            from modemap.engine import split_runs

            runs = engine.scatter(split_runs(Z, Y, lengths))
        self.runs = runs

    def score(
        self,
        labels: np.ndarray,
        k: int,
        opts: _Options,
        emissions: bool = True,
        previous: tuple[np.ndarray, list[GramStats]] | None = None,
    ) -> _State:
        """Fit the regimes of ``labels``.

        Local path only: ``emissions=False`` skips the per-sample scores unless decoding or
        the location term needs them; ``previous`` (labels and statistics of the last pass)
        lets the statistics be updated from the samples whose label changed.
        """
        if self.engine is None:
            stats = _updated_stats(self.Z, self.Y, self.library, labels, k, opts, previous)
            return _score_labels(
                self.Z,
                self.Y,
                self.lengths,
                labels,
                k,
                self.library,
                opts,
                self.notes,
                emissions,
                stats,
            )
        return _score_labels_engine(self, labels, k, opts)

    def decode(self, state: _State) -> tuple[np.ndarray, float]:
        if state.decoded is not None:
            return state.decoded[0], state.decoded[1]
        return viterbi_runs(state.log_em, self.lengths, state.log_start, state.log_trans)

    def log_prob(self, state: _State, labels: np.ndarray) -> float:
        """Joint log-probability of ``labels`` under the fits and chain of ``state``."""
        if state.decoded is None and state.log_em is None:
            return _stats_log_prob(state, labels, self.lengths)
        if state.decoded is None:
            return path_log_prob(
                state.log_em, labels, self.lengths, state.log_start, state.log_trans
            )
        path, best, current = state.decoded
        if np.array_equal(labels, path):
            return best
        if not np.array_equal(labels, state.labels) or not np.isfinite(current):
            # labels changed after decoding (min_dwell): score them on the engine
            return _score_labels_engine(self, labels, state.k, None, state).decoded[2]
        return current

    def per_run(self, values: np.ndarray) -> list[np.ndarray]:
        return np.split(values, np.cumsum(self.lengths)[:-1])


def _score_labels_engine(
    work: _Work, labels: np.ndarray, k: int, opts: _Options | None, fitted: _State | None = None
) -> _State:
    """Steps (a), (b) and (c) as maps over runs: statistics, then scoring and Viterbi.

    With ``fitted``, its fits and chain are reused and only ``labels`` are scored.
    """
    from modemap.engine import decode_runs, stats_by_label

    if fitted is None:
        labels, k, dropped = drop_small(labels, k, opts.min_samples)
        work.notes += dropped
        if k == 0:
            raise FitError(f"no regime has at least {opts.min_samples} samples; use fewer regimes")
        stats = stats_by_label(work.engine, work.runs, work.per_run(labels), work.library, k)
        terms = list(work.library.terms_)
        fit_stats = stats
        if opts.interior:
            fit_stats = interior_stats(work.Z, work.Y, work.lengths, labels, k, work.library, stats)
        fits = fit_regimes(
            fit_stats,
            terms,
            model=opts.model,
            threshold=opts.threshold,
            variables=work.library.variables_,
            increments=opts.increments,
        )
        covs = _covariances(stats, fits, opts.floor, opts.covariance)
        log_start, log_trans = transition_model(labels, work.lengths, k, opts.sticky, opts.learn)
        location = _engine_location(work, labels, k, opts.location_weight, opts.covariance)
    else:
        stats, fits, covs = fitted.stats, fitted.fits, fitted.covs
        log_start, log_trans, location = fitted.log_start, fitted.log_trans, fitted.location
    paths, best, current = decode_runs(
        work.engine,
        work.runs,
        work.library,
        [f.coef for f in fits],
        covs,
        log_start,
        log_trans,
        current=work.per_run(labels),
        location=location,
    )
    state = _State(labels, k, stats, fits, covs, None, log_start, log_trans)
    state.decoded = (np.concatenate(paths), best, current)
    state.location = location
    return state


def _engine_location(
    work: _Work, labels: np.ndarray, k: int, weight: float, kind: str = "tied"
) -> Any:
    if not weight:
        return None
    means, chols = location_parameters(work.Z[:, : work.Y.shape[1]], labels, k, kind)
    return (float(weight), means, chols)


def _score_labels(
    Z: np.ndarray,
    Y: np.ndarray,
    lengths: np.ndarray,
    labels: np.ndarray,
    k: int,
    library: Any,
    opts: _Options,
    notes: list[str],
    emissions: bool = True,
    stats: list[GramStats] | None = None,
) -> _State:
    """Steps (a) and (b): drop small regimes, fit each regime, score every sample.

    With ``emissions=False`` the per-sample scores are left out (``log_em`` None) when no
    sample is unassigned and there is no location term: the fits and the joint
    log-probability of the labels then come from the statistics alone.  ``stats`` are the
    statistics of ``labels`` if already known (valid only when no regime is dropped).
    """
    if stats is not None and len(stats) == k:
        new_k = k  # _updated_stats found every regime at min_samples or more: none to drop
    else:
        labels, new_k, dropped = drop_small(labels, k, opts.min_samples)
        notes += dropped
    if new_k == 0:
        raise FitError(f"no regime has at least {opts.min_samples} samples; use fewer regimes")
    if stats is None or new_k != k:
        stats = accumulate_by_label(library, Z, Y, labels, new_k)
    k = new_k
    fit_stats = interior_stats(Z, Y, lengths, labels, k, library, stats) if opts.interior else stats
    fits = fit_regimes(
        fit_stats,
        list(library.terms_),
        model=opts.model,
        threshold=opts.threshold,
        variables=library.variables_,
        increments=opts.increments,
    )
    covs = _covariances(stats, fits, opts.floor, opts.covariance)
    pairs = pair_counts(labels, lengths, k)
    log_start, log_trans = transition_model(
        labels, lengths, k, opts.sticky, opts.learn, counts=pairs
    )
    if not emissions and not opts.location_weight and not np.any(labels < 0):
        return _State(labels, k, stats, fits, covs, None, log_start, log_trans, pairs=pairs)
    log_em = regime_log_likelihood(library, Z, Y, [f.coef for f in fits], covs)
    if opts.location_weight:
        x = Z[:, : Y.shape[1]]
        log_em += opts.location_weight * _location_log_likelihood(x, labels, k, opts.covariance)
    return _State(labels, k, stats, fits, covs, log_em, log_start, log_trans, pairs=pairs)


#: Update the statistics from the changed samples when fewer than this share changed (each
#: changed sample is accumulated twice, out of its old regime and into its new one).
_UPDATE_SHARE = 0.25


def _updated_stats(
    Z: np.ndarray,
    Y: np.ndarray,
    library: Any,
    labels: np.ndarray,
    k: int,
    opts: _Options,
    previous: tuple[np.ndarray, list[GramStats]] | None,
) -> list[GramStats] | None:
    """Statistics of ``labels`` as the previous ones minus and plus the changed samples.

    None (compute afresh) without a previous pass, when the number of regimes differs, when a
    regime would be dropped, or when too many samples changed.  The statistics are sums, so
    the update equals a fresh pass up to round-off.
    """
    if previous is None:
        return None
    old_labels, old_stats = previous
    if len(old_stats) != k or old_labels.shape != labels.shape:
        return None
    counts = np.bincount(labels + 1, minlength=k + 1)[1:]
    if k == 0 or counts.min() < opts.min_samples:
        return None  # drop_small will renumber the regimes
    changed = np.flatnonzero(old_labels != labels)
    if changed.size > _UPDATE_SHARE * labels.size:
        return None
    if changed.size == 0:
        return list(old_stats)
    z, y = Z[changed], Y[changed]
    leaving = accumulate_by_label(library, z, y, old_labels[changed], k)
    joining = accumulate_by_label(library, z, y, labels[changed], k)
    return [s - a + b for s, a, b in zip(old_stats, leaving, joining, strict=True)]


#: Above this share of rows ending a stretch, ``interior_stats`` keeps every row.
_MAX_END_SHARE = 0.05


def stretch_ends(labels: np.ndarray, lengths: np.ndarray) -> np.ndarray:
    """Rows that end a stretch of constant label inside a run (the run's last row excluded)."""
    n = labels.size
    last = np.zeros(n, dtype=bool)
    last[:-1] = labels[:-1] != labels[1:]
    ends = np.cumsum(lengths) - 1
    last[ends[ends < n]] = False
    last &= labels >= 0
    return np.flatnonzero(last)


def interior_stats(
    Z: np.ndarray,
    Y: np.ndarray,
    lengths: np.ndarray,
    labels: np.ndarray,
    k: int,
    library: Any,
    stats: Sequence[GramStats],
) -> list[GramStats]:
    """Per-regime statistics without the last row of each stretch (discrete form).

    In discrete form row ``r`` models ``x[r+1]`` from ``x[r]``; when the next row has another
    label, the switch happened somewhere in ``(t_r, t_r+1]`` and row ``r`` mixes both
    regimes.  Measured on the water-heater demo with the true labels: least squares on all
    rows puts the heater-on loss coefficient 25 % off, without these rows within 0.5 %.
    The rows are few, so their statistics are subtracted from ``stats``; a regime left
    with too few rows for its terms keeps all of them.  While more than 5 % of the rows end
    a stretch (unsettled labels, as in a first pass from a rough proposal) every row is
    used: the mixed rows are then the least of the errors, and the pass stays cheap.
    """
    rows = stretch_ends(labels, lengths)
    if rows.size == 0 or rows.size > _MAX_END_SHARE * labels.size:
        return list(stats)
    edge = accumulate_by_label(library, Z[rows], Y[rows], labels[rows], k)
    need = len(library.terms_) + 1
    return [s - e if s.n - e.n >= need else s for s, e in zip(stats, edge, strict=True)]


def _stats_log_prob(state: _State, labels: np.ndarray, lengths: np.ndarray) -> float:
    """Joint log-probability of ``labels`` from the statistics: equals :func:`path_log_prob`
    on the Gaussian residual scores (without a location term), at O(K) cost.

    Per regime, the sum over its samples of log N(r; 0, S) is
    ``-0.5 tr(S^-1 R) - 0.5 n (m log 2 pi + log det S)`` with ``R`` the residual products.
    """
    total = 0.0
    for stats, fit, cov in zip(state.stats, state.fits, state.covs, strict=True):
        m = cov.shape[0]
        chol = np.linalg.cholesky(cov)
        products = stats.residual_products(np.asarray(fit.coef))
        inv_chol = np.linalg.inv(chol)
        quad = float(np.trace(inv_chol @ products @ inv_chol.T))
        logdet = 2.0 * float(np.log(np.diag(chol)).sum())
        total += -0.5 * quad - 0.5 * float(stats.n) * (m * np.log(2.0 * np.pi) + logdet)
    starts = np.concatenate([[0], np.cumsum(lengths)[:-1]]).astype(np.int64)
    starts = starts[starts < labels.size]
    total += float(state.log_start[labels[starts]].sum())
    same = state.pairs is not None and labels is state.labels
    counts = state.pairs if same else pair_counts(labels, lengths, state.k)
    return total + float(np.where(counts > 0, counts * state.log_trans, 0.0).sum())
