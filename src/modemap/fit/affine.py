"""The affine local model ``dx/dt = A x + B u + c`` (or ``x[k+1] = A x[k] + B u[k] + c``).

The affine operator is an ordinary least-squares fit of the targets on the
degree-1 terms ``[1, x_1..x_n, u_1..u_k]``, computed from the same
:class:`~modemap.fit.statistics.GramStats` as the sparse model, with standard errors
and residual covariance.  :func:`affine_parts` reshapes the coefficient
matrix into the state-space matrices.
"""

from __future__ import annotations

from collections.abc import Sequence

import numpy as np
from sklearn.base import BaseEstimator, RegressorMixin
from sklearn.utils.validation import check_is_fitted, validate_data

from modemap._exceptions import FitError
from modemap.fit.sparse import LocalFit, refit_support
from modemap.fit.statistics import GramStats
from modemap.terms.expressions import variable_of

__all__ = ["AffineRegression", "affine_parts", "fit_affine"]


def _is_linear(term: str) -> bool:
    return term == "1" or variable_of(term) is not None


def fit_affine(stats: GramStats, terms: Sequence[str]) -> LocalFit:
    """Least-squares affine model on all degree-1 terms.

    Parameters
    ----------
    stats : GramStats
        Statistics of the degree-1 term matrix ``[1, x.., u..]`` against the targets.
    terms : sequence of str
        ``["1", "x1", ..., "u1", ...]`` (the degree-1 library; "1" optional).

    Returns
    -------
    LocalFit
        Every coefficient active; ``threshold`` is 0.

    Raises
    ------
    ValueError
        When a term is not the constant or a bare variable.
    FitError
        When there are no samples.
    """
    bad = [t for t in terms if not _is_linear(t)]
    if bad:
        raise ValueError(f"fit_affine needs the degree-1 terms only, got {bad[0]!r}")
    if len(terms) != stats.n_terms:
        raise ValueError(f"{len(terms)} term names for statistics of {stats.n_terms} terms")
    if stats.n <= 0:
        raise FitError("no samples to fit")
    support = np.ones((stats.n_terms, stats.n_targets), dtype=bool)
    return refit_support(stats, terms, support, threshold=0.0)


def affine_parts(
    fit: LocalFit, n_states: int, n_inputs: int = 0
) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """State-space matrices of an affine fit.

    Parameters
    ----------
    fit : LocalFit
        From :func:`fit_affine`, terms ``[1, x_1..x_n, u_1..u_k]`` in this order
        (the constant may be absent).
    n_states, n_inputs : int

    Returns
    -------
    A : ndarray of shape (n_states, n_states)
        ``A[i, j]`` is the coefficient of ``x_j`` in the equation of ``x_i``.
    B : ndarray of shape (n_states, n_inputs)
    c : ndarray of shape (n_states,)
    """
    offset = 1 if fit.terms and fit.terms[0] == "1" else 0
    if len(fit.terms) != offset + n_states + n_inputs or fit.coef.shape[1] != n_states:
        raise ValueError(f"terms {fit.terms} do not match {n_states} states and {n_inputs} inputs")
    coef = fit.coef
    c = coef[0].copy() if offset else np.zeros(n_states)
    A = coef[offset : offset + n_states].T.copy()
    B = coef[offset + n_states :].T.copy()
    return A, B, c


class AffineRegression(RegressorMixin, BaseEstimator):
    """Affine model ``y = A x + B u + c`` fitted by least squares.

    ``fit(Z, Y)`` takes ``Z = [states, inputs]`` (samples in rows) and
    ``Y (n, n_states)``; the first ``Y.shape[1]`` columns of ``Z`` are the states.

    Attributes
    ----------
    A_, B_, c_ : ndarrays
        See :func:`affine_parts`.
    coef_, stderr_ : ndarray of shape (1 + n_vars, n_states)
    noise_cov_ : ndarray of shape (n_states, n_states)
    local_fit_ : LocalFit
    n_features_in_ : int
    """

    def __init__(self) -> None:
        pass

    def fit(self, Z: np.ndarray, Y: np.ndarray) -> AffineRegression:
        """Fit on variables ``Z (n, n_vars)`` and targets ``Y (n, n_states)``."""
        Z, Y = validate_data(self, Z, Y, multi_output=True, y_numeric=True, dtype=np.float64)
        self._single = Y.ndim == 1
        Y = Y[:, None] if Y.ndim == 1 else Y
        n_states = Y.shape[1]
        if Z.shape[1] < n_states:
            raise ValueError(f"Z has {Z.shape[1]} columns, fewer than the {n_states} states")
        theta = np.hstack([np.ones((Z.shape[0], 1)), Z])
        terms = ["1"] + [f"z{i}" for i in range(Z.shape[1])]
        fit = fit_affine(GramStats.from_arrays(theta, Y), terms)
        self.A_, self.B_, self.c_ = affine_parts(fit, n_states, Z.shape[1] - n_states)
        self.coef_, self.stderr_, self.noise_cov_ = fit.coef, fit.stderr, fit.noise_cov
        self.local_fit_ = fit
        return self

    def predict(self, Z: np.ndarray) -> np.ndarray:
        """``A x + B u + c`` for every row of ``Z``."""
        check_is_fitted(self, "coef_")
        Z = validate_data(self, Z, dtype=np.float64, reset=False)
        out = self.c_ + Z @ np.hstack([self.A_, self.B_]).T
        return out[:, 0] if self._single else out

    def __sklearn_tags__(self):
        tags = super().__sklearn_tags__()
        tags.target_tags.multi_output = True
        return tags
