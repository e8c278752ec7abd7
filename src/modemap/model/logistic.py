"""Binary logistic regression with standard errors, for switching surfaces.

Logistic regression ("The regression analysis of binary sequences", Cox,
Journal of the Royal Statistical Society B 20, 1958) is fitted by penalised
Newton-Raphson (iteratively reweighted least squares: "Generalized linear
models", Nelder and Wedderburn, Journal of the Royal Statistical Society A 135,
1972, doi:10.2307/2344614) on standardised term columns with a weak ridge
penalty ``1 / (2 C)`` on the slopes, so the boundary of nearly separable data is
set by the data yet stays finite.  Standard errors are the square roots of the
diagonal of the inverse observed information (the Hessian of the penalised
negative log-likelihood at the estimate).
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np
from scipy.special import expit

__all__ = ["LogisticFit", "fit_logistic"]


@dataclass
class LogisticFit:
    """A binary logistic regression ``P(y = 1) = expit(X @ coef + intercept)``.

    Attributes
    ----------
    coef : ndarray of shape (p,)
    intercept : float
    stderr : ndarray of shape (p + 1,)
        Standard errors of ``coef`` then of ``intercept``: square roots of the diagonal
        of the inverse observed information at the estimate.
    loglik : float
        Log-likelihood (without the penalty) at the estimate.
    """

    coef: np.ndarray
    intercept: float
    stderr: np.ndarray
    loglik: float

    @property
    def wald(self) -> np.ndarray:
        """``coef / stderr`` of the slopes."""
        with np.errstate(divide="ignore", invalid="ignore"):
            return np.where(self.stderr[:-1] > 0, self.coef / self.stderr[:-1], np.inf)


def _objective(A, y, w, beta, pen) -> tuple[float, np.ndarray]:
    eta = A @ beta
    loglik = -float(np.sum(w * (np.logaddexp(0.0, eta) - y * eta)))
    return -loglik + 0.5 * float(np.sum(pen * beta**2)), eta


def fit_logistic(
    X: np.ndarray,
    y: np.ndarray,
    *,
    C: float = np.inf,
    sample_weight: np.ndarray | None = None,
    max_iter: int = 100,
    tol: float = 1e-10,
) -> LogisticFit:
    """Binary logistic regression by penalised Newton-Raphson, with standard errors.

    Minimises ``-sum(w log L) + ||coef||^2 / (2 C)`` (the intercept is not penalised;
    ``C = inf``: maximum likelihood), the objective scikit-learn's
    ``LogisticRegression(C=C)`` minimises.  Newton steps with step halving on the
    objective (iteratively reweighted least squares; Nelder and Wedderburn, 1972,
    doi:10.2307/2344614).

    Parameters
    ----------
    X : ndarray of shape (n, p)
    y : ndarray of shape (n,)
        0 or 1.
    C : float, default inf
        Inverse ridge strength on the slopes.
    sample_weight : ndarray of shape (n,), optional
        Frequency weights.
    max_iter : int
    tol : float
        Convergence on the largest Newton step (relative to the coefficients).

    Returns
    -------
    LogisticFit
        With standard errors from the observed information ``A' diag(w p (1-p)) A``
        (``A = [X, 1]``) plus the penalty's ``1/C`` on the slopes.
    """
    X = np.asarray(X, dtype=float)
    y = np.asarray(y, dtype=float).reshape(-1)
    n, p = X.shape
    w = np.ones(n) if sample_weight is None else np.asarray(sample_weight, dtype=float)
    A = np.hstack([X, np.ones((n, 1))])
    pen = np.zeros(p + 1)
    if np.isfinite(C):
        pen[:p] = 1.0 / float(C)
    # start from the intercept of the constant model
    mean = float(np.clip(np.sum(w * y) / max(np.sum(w), 1e-300), 1e-12, 1 - 1e-12))
    beta = np.zeros(p + 1)
    beta[-1] = math.log(mean / (1.0 - mean))
    f, eta = _objective(A, y, w, beta, pen)
    H = np.eye(p + 1)
    for _ in range(max_iter):
        prob = expit(eta)
        grad = A.T @ (w * (prob - y)) + pen * beta
        H = (A * (w * prob * (1.0 - prob))[:, None]).T @ A + np.diag(pen)
        try:
            step = np.linalg.solve(H, grad)
        except np.linalg.LinAlgError:
            step = np.linalg.lstsq(H, grad, rcond=None)[0]
        t = 1.0
        for _ in range(40):
            f_new, eta_new = _objective(A, y, w, beta - t * step, pen)
            if f_new <= f - 1e-4 * t * float(grad @ step) or f_new <= f:
                break
            t *= 0.5
        else:
            break
        beta, f, eta = beta - t * step, f_new, eta_new
        if np.max(np.abs(t * step)) <= tol * (1.0 + np.max(np.abs(beta))):
            break
    prob = expit(eta)
    H = (A * (w * prob * (1.0 - prob))[:, None]).T @ A + np.diag(pen)
    try:
        cov = np.linalg.inv(H)
    except np.linalg.LinAlgError:
        cov = np.linalg.pinv(H)
    se = np.sqrt(np.clip(np.diag(cov), 0.0, None))
    loglik = -float(np.sum(w * (np.logaddexp(0.0, eta) - y * eta)))
    return LogisticFit(coef=beta[:p].copy(), intercept=float(beta[p]), stderr=se, loglik=loglik)
