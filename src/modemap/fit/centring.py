"""Sparse selection on centred variables, estimation on the raw ones.

Over a narrow operating range (a tank held between 55 and 60 degC) the raw
monomials ``1``, ``T`` and ``T^2`` are nearly collinear: their least-squares
coefficients are large and of opposite signs, so thresholding cannot tell a
needed term from a spurious one.  The cure is classical: build the monomials
of the standardised variables ``(z - mean) / scale``.  Because every such
monomial is a fixed linear combination of raw monomials (binomial
expansion), ``Theta_std = Theta_raw M`` and the normal-equation statistics
transform without touching the samples: ``G_std = M' G M``,
``b_std = M' b``.

:func:`fit_sparse_centred` therefore

1. takes the mean and scale of every variable from the statistics themselves
   (the constant and linear terms' products, weighted by the constant column: a
   regime's own operating point when the statistics are a regime's, for sample
   and for integral statistics alike, see :func:`_moments`);
2. selects terms by sequentially thresholded least squares on the centred
   statistics;
3. maps each selected centred monomial to the raw monomials of its expansion
   (a set closed under lowering exponents);
4. selects again, in raw coordinates, among those candidates only (so a raw
   term whose coefficient is negligible, like ``z`` in ``x*(rho - z)``, is
   dropped), and refits by least squares on the final support.

The model keeps the canonical raw terms of the model file.  Terms that are
not monomials (``sin(x)``, user expressions) are left as they are.  When the
library lacks the constant or a variable's linear term, or a needed lower
monomial, the plain raw fit is used.
"""

from __future__ import annotations

from collections.abc import Sequence
from itertools import product
from math import comb

import numpy as np

from modemap.fit.sparse import LocalFit, fit_sparse, refit_support
from modemap.fit.statistics import GramStats
from modemap.terms.library import monomial_exponents

__all__ = ["centring_matrix", "fit_sparse_centred"]


def _exponents(term: str, variables: Sequence[str]) -> tuple[int, ...] | None:
    """Exponent vector of a canonical monomial (``1``, ``x``, ``x^2*u``), else None."""
    return monomial_exponents(term, variables)


def centring_matrix(
    terms: Sequence[str], variables: Sequence[str], mean: np.ndarray, scale: np.ndarray
) -> np.ndarray | None:
    """``M`` with ``Theta_std = Theta_raw @ M``; None when a needed raw monomial is missing.

    Column ``j`` expands the monomial of term ``j`` in the standardised variables
    ``(z - mean) / scale`` into raw monomials (rows).  Non-monomial terms map to
    themselves.
    """
    exps = [_exponents(t, variables) for t in terms]
    where = {e: i for i, e in enumerate(exps) if e is not None}
    p = len(terms)
    M = np.zeros((p, p))
    for j, e in enumerate(exps):
        if e is None:
            M[j, j] = 1.0
            continue
        for ks in product(*(range(k + 1) for k in e)):
            i = where.get(tuple(ks))
            if i is None:
                return None
            c = 1.0
            for k, ek, mu, s in zip(ks, e, mean, scale, strict=True):
                c *= comb(ek, k) * (-mu) ** (ek - k) / s**ek
            M[i, j] += c
    return M


def _moments(
    stats: GramStats, terms: Sequence[str], variables: Sequence[str]
) -> tuple[np.ndarray, np.ndarray] | None:
    """Mean and standard deviation of each variable, weighted by the constant column.

    With ``g`` the constant term's column, a variable's column ``z`` has the mean
    ``mu = g'z / g'g`` (the least-squares coefficient of ``z`` on ``g``) and the
    variance ``z'z / g'g - mu^2`` (the squared residual of that fit per unit of
    ``g'g``), so ``z - mu g`` is orthogonal to ``g``.  On sample statistics ``g`` is a
    column of ones (weights, when the statistics are weighted): the plain mean and
    variance.  On integral statistics, whose rows are windows, ``g`` holds the windows'
    durations ``T`` and ``z`` the integrals ``T zbar`` of the variable: the mean is that of
    the windows' averages ``zbar`` weighted by ``T^2`` (for windows of one length, their
    plain mean), where the sum of ``z`` over the number of windows would be ``T`` times
    too large.
    None when the library has no constant term (nothing to centre against) or there are
    fewer than two rows.
    """
    index = {t: i for i, t in enumerate(terms)}
    if "1" not in index or stats.n <= 1:
        return None
    one = index["1"]
    weight = stats.gram[one, one]
    if not weight > 0:
        return None
    mean, scale = np.zeros(len(variables)), np.ones(len(variables))
    for v, name in enumerate(variables):
        i = index.get(name)
        if i is None:
            continue  # variable absent from the library (e.g. a switching input)
        mu = stats.gram[one, i] / weight
        var = stats.gram[i, i] / weight - mu * mu
        mean[v] = mu
        scale[v] = np.sqrt(var) if var > 1e-12 * max(mu * mu, 1.0) else 1.0
    return mean, scale


def _transformed(stats: GramStats, M: np.ndarray) -> GramStats:
    return GramStats(
        gram=M.T @ stats.gram @ M,
        cross=M.T @ stats.cross,
        yy=stats.yy,
        n=stats.n,
        term_sum=M.T @ stats.term_sum,
        target_sum=stats.target_sum,
    )


def fit_sparse_centred(
    stats: GramStats,
    terms: Sequence[str],
    variables: Sequence[str],
    *,
    threshold: float | str | np.ndarray = "auto",
    ridge: float = 0.0,
    criterion: str = "bic",
    max_iter: int = 20,
) -> LocalFit:
    """Sparse fit with selection on centred variables and estimation on raw ones.

    Parameters
    ----------
    stats : GramStats
        Statistics of the raw terms.
    terms : sequence of str
        Canonical raw terms (the library's ``terms_``).
    variables : sequence of str
        The library's variables, in order.
    threshold, ridge, criterion, max_iter
        As in :func:`modemap.fit.sparse.fit_sparse`.

    Returns
    -------
    LocalFit
        In raw terms; ``threshold`` is the one chosen on the centred statistics.
    """
    options = {"threshold": threshold, "ridge": ridge, "criterion": criterion, "max_iter": max_iter}
    moments = _moments(stats, terms, variables)
    M = None if moments is None else centring_matrix(terms, variables, *moments)
    if M is None:
        return fit_sparse(stats, terms, **options)
    centred = fit_sparse(_transformed(stats, M), terms, **options)
    candidates = (np.abs(M) > 0).astype(float) @ centred.support.astype(float) > 0
    support = np.zeros_like(candidates)
    for j in range(stats.n_targets):
        idx = np.flatnonzero(candidates[:, j])
        if idx.size == 0:
            continue
        sub = stats.select(terms=idx, targets=[j])
        raw = fit_sparse(sub, [terms[i] for i in idx], **options)
        support[idx, j] = raw.support[:, 0]
    return refit_support(stats, terms, support, threshold=centred.threshold)
