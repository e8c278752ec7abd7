"""Uncertainty of local fits: standard errors and block-bootstrap ensembles.

Standard errors are the textbook least-squares ones on the selected support,
``sqrt(sigma^2 diag((Theta_S' Theta_S)^-1))`` with ``sigma^2 = RSS / (n - k)``.
They ignore the selection step and the serial correlation of residuals, so
:func:`block_bootstrap` also offers an ensemble view: how often each term is
selected when the data are resampled, in the spirit of "... Robust sparse
model discovery in the low-data, high-noise limit, with active learning and
control", Proceedings of the Royal Society A 478, 2022, DOI
10.1098/rspa.2021.0904 (title abbreviated).

Resampling follows the moving-block bootstrap for dependent data
("Resampling methods for dependent data", Springer, 2003): contiguous blocks
are drawn with replacement within each run, so short-range correlation is
kept.  To make a replicate cheap, each run is cut once into sub-blocks of a
quarter block length and their statistics are computed in a single pass; a
block may start at any sub-block boundary, so a replicate is the weighted
sum of sub-block statistics (weight = how many drawn blocks cover the
sub-block) and costs a few small tensor contractions, independent of the
number of samples.
"""

from __future__ import annotations

from collections.abc import Sequence

import numpy as np

from modemap.fit.increments import fit_on_increments
from modemap.fit.sparse import _inverse_diag, fit_sparse
from modemap.fit.statistics import GramStats, _Transformer, accumulate_by_label

__all__ = [
    "block_bootstrap",
    "default_block_length",
    "fitted_value_covariance",
    "standard_errors",
]

_SUB = 4  # sub-blocks per block: block starts are on a grid of block/4
_MAX_SUBBLOCKS = 4096  # caps memory at 4096 * p^2 floats


def standard_errors(stats: GramStats, coef: np.ndarray, support: np.ndarray) -> np.ndarray:
    """Least-squares standard errors of the coefficients on their support.

    Parameters
    ----------
    stats : GramStats
    coef : ndarray of shape (p, m)
        Coefficients (least squares on the support for the formula to hold).
    support : ndarray of bool, shape (p, m)

    Returns
    -------
    ndarray of shape (p, m)
        0 outside the support; NaN where ``n <= k``.
    """
    coef = np.asarray(coef, dtype=np.float64).reshape(stats.n_terms, -1)
    support = np.asarray(support, dtype=bool).reshape(coef.shape)
    scale = stats.column_scale()
    gn = stats.gram / np.outer(scale, scale)
    rss, k, n = stats.rss(coef), support.sum(axis=0), float(stats.n)
    out = np.zeros(coef.shape)
    for j in range(coef.shape[1]):
        idx = np.flatnonzero(support[:, j])
        if idx.size == 0:
            continue
        sigma2 = rss[j] / (n - k[j]) if n > k[j] else np.nan
        var = _inverse_diag(gn[np.ix_(idx, idx)]) / scale[idx] ** 2
        out[idx, j] = np.sqrt(np.clip(var, 0.0, None) * sigma2)
    return out


def fitted_value_covariance(
    stats: GramStats, coef: np.ndarray, support: np.ndarray, values: np.ndarray
) -> np.ndarray:
    """Covariance of the fitted right-hand sides at one point: (m, m).

    For state ``j`` fitted by least squares on its support ``S_j``, the fitted value at a
    point with term values ``x`` is ``x_S' c_j``; its variance is ``s_jj x_S' G_jj^-1 x_S``
    (the variance of the fitted mean response, textbook least squares), and two states'
    fitted values covary as ``s_jk x_Sj' G_jj^-1 G_jk G_kk^-1 x_Sk`` (equations fitted one
    by one with correlated residuals, common practice).  ``s_jk`` divides the residual
    products by ``n - (k_j + k_k) / 2``, so ``s_jj`` is the variance behind
    :func:`standard_errors`.  The quadratic forms are computed through a Cholesky factor of
    the normalised Gram matrix (a sum of squares, never negative); cross terms are kept
    within correlation +-1.

    Parameters
    ----------
    stats : GramStats
    coef : ndarray of shape (p, m)
    support : ndarray of bool, shape (p, m)
    values : ndarray of shape (p,)
        Term values at the point.

    Returns
    -------
    ndarray of shape (m, m)
        NaN where ``n`` does not exceed the terms or a Gram block is singular.
    """
    coef = np.asarray(coef, dtype=np.float64).reshape(stats.n_terms, -1)
    support = np.asarray(support, dtype=bool).reshape(coef.shape)
    m = coef.shape[1]
    scale = stats.column_scale()
    gn = stats.gram / np.outer(scale, scale)
    xn = np.asarray(values, dtype=np.float64) / scale
    products, k, n = stats.residual_products(coef), support.sum(axis=0), float(stats.n)
    idx = [np.flatnonzero(support[:, j]) for j in range(m)]
    u = []  # G_jj^-1 x_S (normalised), with the squared norm of the whitened vector
    for i in idx:
        if i.size == 0:
            u.append((np.zeros(0), 0.0))
            continue
        try:
            chol = np.linalg.cholesky(gn[np.ix_(i, i)])
        except np.linalg.LinAlgError:
            u.append(_pseudo_solve(gn[np.ix_(i, i)], xn[i]))
            continue
        w = np.linalg.solve(chol, xn[i])
        u.append((np.linalg.solve(chol.T, w), float(w @ w)))
    out = np.empty((m, m))
    for j in range(m):
        for q in range(m):
            dof = n - 0.5 * (k[j] + k[q])
            s = products[j, q] / dof if dof > 0 else np.nan
            if j == q:
                out[j, j] = s * u[j][1]
            else:
                out[j, q] = s * (u[j][0] @ gn[np.ix_(idx[j], idx[q])] @ u[q][0])
    var = np.sqrt(np.clip(np.diag(out), 0.0, None))
    bound = np.outer(var, var)
    return np.where(np.eye(m, dtype=bool), out, np.clip(out, -bound, bound))


def _pseudo_solve(gram: np.ndarray, x: np.ndarray) -> tuple[np.ndarray, float]:
    """``G^+ x`` and ``x' G^+ x`` through the eigen-decomposition of a Gram matrix that
    Cholesky refuses (terms collinear to rounding, as cubes of a variable far from zero
    are).  Directions with eigenvalues below ``1e-12`` of the largest are left out: the
    fitted value is bounded along the others.  NaN when ``x`` leans on a left-out
    direction by more than 1e-6 of its norm (the point is not bounded by the data)."""
    lam, vec = np.linalg.eigh(gram)
    keep = lam > 1e-12 * max(float(lam[-1]), 0.0)
    proj = vec.T @ x
    if not keep.any() or np.linalg.norm(proj[~keep]) > 1e-6 * np.linalg.norm(x):
        return np.full(x.size, np.nan), np.nan
    w = proj[keep] / np.sqrt(lam[keep])
    return vec[:, keep] @ (proj[keep] / lam[keep]), float(w @ w)


def default_block_length(lengths: Sequence[int] | np.ndarray) -> int:
    """Block length: ``n^(1/3)`` (at least 8), enlarged so there are at most ~1000 blocks.

    The cube-root rate is the usual order for the moving-block bootstrap
    ("Resampling methods for dependent data", Springer, 2003).
    """
    n = int(np.sum(lengths))
    return int(max(8, np.ceil(n ** (1.0 / 3.0)), np.ceil(_SUB * n / _MAX_SUBBLOCKS)))


def _subblocks(lengths: np.ndarray, width: int) -> tuple[np.ndarray, list[tuple[int, int]]]:
    """Sub-block label of every sample, and (first, count) of each run's sub-blocks."""
    labels, runs, first = [], [], 0
    for length in lengths:
        count = max(1, int(np.ceil(length / width)))
        labels.append(first + np.arange(length) // width)
        runs.append((first, count))
        first += count
    return np.concatenate(labels) if labels else np.zeros(0, dtype=np.int64), runs


def _coverage(rng: np.random.Generator, runs: list[tuple[int, int]], total: int) -> np.ndarray:
    """How many drawn blocks cover each sub-block in one replicate."""
    cover = np.zeros(total)
    for first, count in runs:
        if count <= _SUB:  # run shorter than a block: take it whole, as often as drawn
            cover[first : first + count] += 1.0
            continue
        n_starts = count - _SUB + 1
        starts = rng.integers(0, n_starts, size=int(np.ceil(count / _SUB)))
        hits = np.bincount(starts, minlength=n_starts).astype(float)
        cover[first : first + count] += np.convolve(hits, np.ones(_SUB))
    return cover


def _weighted(stacked: dict[str, np.ndarray], weights: np.ndarray) -> GramStats:
    return GramStats(
        gram=np.tensordot(weights, stacked["gram"], axes=1),
        cross=np.tensordot(weights, stacked["cross"], axes=1),
        yy=np.tensordot(weights, stacked["yy"], axes=1),
        n=float(weights @ stacked["n"]),
        term_sum=weights @ stacked["term_sum"],
        target_sum=weights @ stacked["target_sum"],
    )


def block_bootstrap(
    library: _Transformer,
    Z: np.ndarray,
    Y: np.ndarray,
    lengths: Sequence[int] | np.ndarray,
    *,
    n_boot: int = 50,
    block: int | None = None,
    threshold: float | str | np.ndarray = "auto",
    criterion: str = "bic",
    ridge: float = 0.0,
    seed: int = 0,
    chunk_size: int = 65536,
    states: Sequence[str] | None = None,
) -> dict[str, np.ndarray | int]:
    """Moving-block bootstrap of the sparse fit, from per-sub-block statistics.

    Parameters
    ----------
    library : fitted TermLibrary
    Z : ndarray of shape (n, n_vars)
    Y : ndarray of shape (n, m)
    lengths : sequence of int
        Samples per run (blocks never straddle runs).
    n_boot : int, default 50
        Number of replicates.
    block : int, optional
        Block length in samples; default :func:`default_block_length`.
    threshold, criterion, ridge
        Passed to :func:`modemap.fit.sparse.fit_sparse` for every replicate.
    seed : int, default 0
    chunk_size : int, default 65536
    states : sequence of str, optional
        Discrete form: the state names in target order; every replicate then selects its
        terms on the increments (:func:`modemap.fit.increments.fit_on_increments`), as the fit
        itself does.

    Returns
    -------
    dict
        ``inclusion`` (p, m): fraction of replicates selecting each term;
        ``coef_mean``, ``coef_std`` (p, m): over replicates (0 where not selected);
        ``block``: block length used; ``n_boot``.
    """
    lengths = np.asarray(lengths, dtype=np.int64)
    if int(lengths.sum()) != np.asarray(Z).shape[0]:
        raise ValueError(f"lengths sum to {int(lengths.sum())}, Z has {np.asarray(Z).shape[0]}")
    block = int(block) if block is not None else default_block_length(lengths)
    width = max(1, int(np.ceil(block / _SUB)))
    labels, runs = _subblocks(lengths, width)
    total = runs[-1][0] + runs[-1][1] if runs else 0
    parts = accumulate_by_label(library, Z, Y, labels, total, chunk_size=chunk_size)
    stacked = {
        name: np.stack([getattr(s, name) for s in parts])
        for name in ("gram", "cross", "yy", "term_sum", "target_sum")
    }
    stacked["n"] = np.array([float(s.n) for s in parts])
    terms = list(getattr(library, "terms_", [f"t{i}" for i in range(parts[0].n_terms)]))
    rng = np.random.default_rng(seed)

    def select(rep):
        return fit_sparse(rep, terms, threshold=threshold, criterion=criterion, ridge=ridge)

    coefs = np.empty((n_boot, *parts[0].cross.shape))
    chosen = np.empty(coefs.shape, dtype=bool)
    for b in range(n_boot):
        rep = _weighted(stacked, _coverage(rng, runs, total))
        fit = select(rep) if states is None else fit_on_increments(select, rep, terms, states)
        coefs[b], chosen[b] = fit.coef, fit.support
    return {
        "inclusion": chosen.mean(axis=0),
        "coef_mean": coefs.mean(axis=0),
        "coef_std": coefs.std(axis=0, ddof=1) if n_boot > 1 else np.zeros(coefs.shape[1:]),
        "block": width * _SUB,
        "n_boot": n_boot,
    }
