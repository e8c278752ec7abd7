"""Scores of samples under regimes: the Gaussian residual likelihood, the location term,
the Markov chain of the regimes and the joint log-probability of a labelling.

These are the pieces every step of the regime stage shares: the refinement's relabelling
(:mod:`.refine`), the per-block tasks an executor runs (:mod:`.blocks`), the choice of the
number of regimes (:mod:`.selection`) and the decoding of new data.
"""

from __future__ import annotations

import functools
from collections.abc import Sequence
from dataclasses import dataclass, field
from typing import Any

import numpy as np
from threadpoolctl import ThreadpoolController

__all__ = [
    "LocationTerm",
    "SurfaceTerm",
    "location_density",
    "location_parameters",
    "one_blas_thread",
    "pair_counts",
    "path_log_prob",
    "predict_by_label",
    "regime_log_likelihood",
    "residuals",
    "transition_model",
]

_CHUNK = 65536
_CACHE_BYTES = 1 << 20


@functools.cache
def _blas_controller() -> ThreadpoolController:
    return ThreadpoolController()  # scanning the loaded libraries costs ~5 ms: once


def one_blas_thread() -> Any:
    """Context limiting BLAS to one thread (tall-skinny products: threads only hurt)."""
    return _blas_controller().limit(limits=1, user_api="blas")


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
    with one_blas_thread():
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


@dataclass(frozen=True)
class LocationTerm:
    """``weight`` times the Gaussian log-density of where the states sit, per regime
    (:func:`location_parameters`, :func:`location_density`)."""

    weight: float
    means: np.ndarray
    chols: np.ndarray

    @classmethod
    def fit(cls, Z: np.ndarray, n_states: int, labels: np.ndarray, k: int, **options: Any):
        """From the states of ``labels``' regimes (``options``: ``weight``, ``kind``)."""
        kind = options.get("kind", "tied")
        means, chols = location_parameters(Z[:, :n_states], labels, k, kind)
        return cls(float(options.get("weight", 1.0)), means, chols)

    def log_prob(self, Z: np.ndarray, n_states: int) -> np.ndarray:
        """(n, K) to add to the emissions of the rows ``Z``."""
        return self.weight * location_density(Z[:, :n_states], self.means, self.chols)

    @property
    def n_regimes(self) -> int:
        return int(self.means.shape[0])

    def reordered(self, order: np.ndarray) -> LocationTerm:
        """The term for regimes renumbered so that new id ``i`` is old id ``order[i]``."""
        return LocationTerm(self.weight, self.means[order], self.chols[order])


#: Rows the classifier of :class:`SurfaceTerm` is fitted on at most (evenly strided).
SURFACE_ROWS = 5_000


@dataclass(frozen=True)
class SurfaceTerm:
    """``weight`` times the log-probability of each regime given the variables, from a
    memoryless classifier of the current labels (multinomial logistic regression on the
    standardised states and inputs, scikit-learn's ``LogisticRegression``; "The regression
    analysis of binary sequences", Journal of the Royal Statistical Society B 20(2), 1958).

    Where two regimes' dynamics agree (a field that is continuous across a switching
    surface, a regime chosen by a logged command) the residuals cannot place the switch;
    the classifier says on which side of the surface the variables are, so every crossing
    is placed by the one surface all of them share.  Where a hysteresis band lets both
    regimes occupy the same variables, its probabilities are near even there and the
    dynamics decide.  The classifier is fitted on the rows whose regime the dynamics
    decide (the caller passes the others as ``-1``): labels that lag a switch where the
    dynamics cannot tell would otherwise teach it a surface shifted along the motion.
    """

    weight: float
    mean: np.ndarray
    scale: np.ndarray
    coef: np.ndarray  # (K, n_vars)
    intercept: np.ndarray  # (K,)
    classifier: Any = field(default=None, repr=False, compare=False)

    @classmethod
    def fit(cls, Z: np.ndarray, n_states: int, labels: np.ndarray, k: int, **options: Any):
        """From ``labels`` (``options``: ``weight``; ``C``, the inverse regularisation of the
        classifier on standardised variables, default 1; ``previous``: the term of the last
        pass, whose classifier the fit starts from); None when fewer than two regimes have
        rows."""
        from sklearn.linear_model import LogisticRegression

        rows = np.flatnonzero(labels >= 0)
        if rows.size > SURFACE_ROWS:
            rows = rows[np.linspace(0, rows.size - 1, SURFACE_ROWS).astype(np.int64)]
        present = np.unique(labels[rows])
        if present.size < 2:
            return None
        x = Z[rows]
        mean, scale = x.mean(axis=0), x.std(axis=0)
        scale = np.where(scale > 0, scale, 1.0)
        previous = options.get("previous")
        clf = previous.classifier if previous is not None else None
        if clf is None or not np.array_equal(clf.classes_, present):
            C = float(options.get("C", 1.0))
            clf = LogisticRegression(C=C, max_iter=500, warm_start=True)
        clf.fit((x - mean) / scale, labels[rows])
        W, b = clf.coef_, clf.intercept_
        if W.shape[0] == 1:  # binary: log-odds of classes_[1] against classes_[0]
            W, b = np.vstack([-0.5 * W[0], 0.5 * W[0]]), np.array([-0.5 * b[0], 0.5 * b[0]])
        coef = np.zeros((k, Z.shape[1]))
        intercept = np.full(k, -30.0)  # a regime without rows: all but impossible
        coef[clf.classes_], intercept[clf.classes_] = W, b
        term = cls(float(options.get("weight", 1.0)), mean, scale, coef, intercept)
        object.__setattr__(term, "classifier", clf)  # kept to start the next pass from
        return term

    def log_prob(self, Z: np.ndarray, n_states: int) -> np.ndarray:
        """(n, K) to add to the emissions of the rows ``Z``."""
        s = ((Z - self.mean) / self.scale) @ self.coef.T + self.intercept
        s -= s.max(axis=1, keepdims=True)
        s -= np.log(np.exp(s).sum(axis=1, keepdims=True))
        return self.weight * s

    @property
    def n_regimes(self) -> int:
        return int(self.intercept.shape[0])

    def reordered(self, order: np.ndarray) -> SurfaceTerm:
        """The term for regimes renumbered so that new id ``i`` is old id ``order[i]``."""
        coef, intercept = self.coef[order], self.intercept[order]
        return SurfaceTerm(self.weight, self.mean, self.scale, coef, intercept)


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
    with one_blas_thread():
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
    with one_blas_thread():
        for start in range(0, n, chunk_size):
            stop = min(start + chunk_size, n)
            theta = library.transform(Z[start:stop], out=buf[: stop - start])
            lab = labels[start:stop]
            for j, c in enumerate(coefs):
                sel = lab == j
                r = Y[start:stop][sel] - theta[sel] @ c
                sse += np.einsum("ij,ij->j", r, r)
    return sse
