"""Sparse regression on candidate terms: sequentially thresholded least squares.

The method is that of "Discovering governing equations from data by sparse
identification of nonlinear dynamical systems", Proceedings of the National
Academy of Sciences 113(15):3932-3937, 2016, DOI 10.1073/pnas.1517517113:
solve least squares on the active terms, drop the terms whose coefficient is
below a threshold, repeat until the set of active terms stops changing.

Everything here works on :class:`~modemap.fit.statistics.GramStats` (normal-equation
statistics), never on raw samples, so the same code fits one chunk, a run, a
regime or 10^7 samples.

Normalisation
    Thresholds are applied to *normalised* coefficients
    ``w_ij = c_ij * rms(term_i) / rms(target_j)``: the contribution of a term
    to the target, relative to the target's size.  A threshold of 0.05 drops
    terms contributing less than 5 % of the target's root mean square, in any
    units.  Ridge penalties are relative to the mean diagonal of the
    normalised Gram matrix (i.e. ``ridge * n``).

Automatic threshold (``threshold="auto"``)
    For each target separately: the unthresholded normalised coefficients
    give a grid of candidate thresholds (the geometric midpoints between
    consecutive distinct magnitudes, plus a geometric grid spanning them, plus
    one above the largest, which gives the empty model), never below
    ``MIN_THRESHOLD`` (0.001).  Every distinct
    support found on the grid is scored from the statistics alone by
    ``BIC = n ln(RSS/n) + k ln n`` (or ``AIC = n ln(RSS/n) + 2k``), ``k`` the
    number of nonzero coefficients; the lowest score wins, ties go to the
    smaller support.  With ``criterion="cv"`` and per-block statistics, the
    held-out residual sum of squares over leave-one-block-out folds is used
    instead.  The final coefficients are an ordinary least-squares refit on
    the chosen support (the ridge only steers the selection).
"""

from __future__ import annotations

import itertools
from collections.abc import Sequence
from dataclasses import dataclass

import numpy as np
import pandas as pd
import scipy.linalg as sla
from sklearn.base import BaseEstimator, RegressorMixin
from sklearn.linear_model import Lasso, LassoCV
from sklearn.model_selection import KFold
from sklearn.utils.validation import check_is_fitted, validate_data

from modemap._exceptions import FitError, ParameterError
from modemap.fit.statistics import GramStats

__all__ = [
    "CRITERIA",
    "LocalFit",
    "SparseRegression",
    "count_rounds",
    "fit_sparse",
    "fit_sparse_cv",
    "refit_support",
    "threshold_least_squares",
]

CRITERIA = ("bic", "aic", "cv")
#: Smallest normalised threshold the automatic choice considers: terms that
#: contribute less than 0.1 % of a target's RMS are never kept.  On clean data
#: the residual is dominated by the derivative estimate's systematic error, and
#: an information criterion would otherwise buy tiny spurious terms with it.
MIN_THRESHOLD = 1e-3
_GRID_POINTS = 40


@dataclass
class LocalFit:
    """One local model: coefficients on candidate terms and their uncertainty.

    Attributes
    ----------
    terms : list of str
        Canonical term strings, one per row of ``coef``.
    coef : ndarray of shape (p, m)
        Column ``j`` is the right-hand side for target ``j``.
    support : ndarray of bool, shape (p, m)
        Which coefficients are active (nonzero by selection).
    stderr : ndarray of shape (p, m)
        Standard errors on the support, 0 elsewhere.
    noise_cov : ndarray of shape (m, m)
        Residual covariance.
    n_samples : int
    threshold : ndarray of shape (m,)
        Normalised threshold used per target (0 for a plain least-squares fit).
    rss : ndarray of shape (m,)
        Residual sum of squares per target.
    n_params : int
        Number of active coefficients (``support.sum()``).
    path : list of dict or None
        Thresholds tried by the automatic choice, one dict per threshold (target,
        threshold, nonzeros, rss, criterion, chosen); :attr:`SparseRegression.path_` shows
        them as a table.
    """

    terms: list[str]
    coef: np.ndarray
    support: np.ndarray
    stderr: np.ndarray
    noise_cov: np.ndarray
    n_samples: int
    threshold: np.ndarray
    rss: np.ndarray
    n_params: int
    path: list[dict] | None = None

    def __sklearn_tags__(self):
        tags = super().__sklearn_tags__()
        tags.target_tags.multi_output = True
        return tags

    def predict(self, theta: np.ndarray) -> np.ndarray:
        """Right-hand side evaluated on a term matrix ``theta (n, p)``."""
        return np.asarray(theta, dtype=np.float64) @ self.coef


# ---------------------------------------------------------------------------
# linear algebra
# ---------------------------------------------------------------------------
def _solve_spd(A: np.ndarray, b: np.ndarray) -> np.ndarray:
    """Solve a symmetric positive (semi)definite system; lstsq when singular."""
    try:
        factor = sla.cho_factor(A, check_finite=False)
        d = np.abs(np.diag(factor[0]))
        if d.min() <= 1e-7 * d.max():  # condition number above ~1e14
            raise np.linalg.LinAlgError("ill-conditioned")
        return sla.cho_solve(factor, b, check_finite=False)
    except (np.linalg.LinAlgError, ValueError):
        return sla.lstsq(A, b, cond=1e-13, check_finite=False)[0]


def _inverse_diag(A: np.ndarray) -> np.ndarray:
    """Diagonal of the (pseudo-)inverse of a symmetric positive matrix."""
    if A.shape[0] == 0:
        return np.zeros(0)
    return np.diag(_solve_spd(A, np.eye(A.shape[0]))).copy()


def _normalised(gram: np.ndarray, cross: np.ndarray, scale: np.ndarray | None):
    p = gram.shape[0]
    s = np.ones(p) if scale is None else np.asarray(scale, dtype=np.float64)
    return gram / np.outer(s, s), cross / s[:, None], s


class _Target:
    """Thresholded least squares for one target, with solves cached by support."""

    def __init__(self, gn: np.ndarray, cn: np.ndarray, lam: float, max_iter: int) -> None:
        self.gn, self.cn, self.lam, self.max_iter = gn, cn, lam, max_iter
        self._cache: dict[bytes, np.ndarray] = {}
        self.rounds = 0

    def solve(self, active: np.ndarray) -> np.ndarray:
        key = np.packbits(active).tobytes()
        w = self._cache.get(key)
        if w is None:
            w = np.zeros(active.shape[0])
            if active.any():
                idx = np.flatnonzero(active)
                A = self.gn[np.ix_(idx, idx)] + self.lam * np.eye(idx.size)
                w[idx] = _solve_spd(A, self.cn[idx])
            self._cache[key] = w
        return w

    def run(self, threshold: float) -> tuple[np.ndarray, np.ndarray]:
        active = np.ones(self.gn.shape[0], dtype=bool)
        w = self.solve(active)
        self.rounds = 1
        for _ in range(self.max_iter):
            new = active & (np.abs(w) >= threshold)
            if np.array_equal(new, active):
                break
            active = new
            w = self.solve(active)
            self.rounds += 1
        return w, active


def count_rounds(
    stats: GramStats, threshold: np.ndarray, *, ridge: float = 0.0, max_iter: int = 20
) -> int:
    """Solve-and-threshold rounds needed at ``threshold`` (largest over targets)."""
    ty = stats.target_scale()
    gn, cn, _ = _normalised(stats.gram, stats.cross / ty, stats.column_scale())
    lam, rounds = _ridge_lambda(gn, ridge), 0
    thr = np.broadcast_to(np.asarray(threshold, dtype=np.float64), (cn.shape[1],))
    for j in range(cn.shape[1]):
        solver = _Target(gn, cn[:, j], lam, max_iter)
        solver.run(float(thr[j]))
        rounds = max(rounds, solver.rounds)
    return rounds


def _ridge_lambda(gn: np.ndarray, ridge: float) -> float:
    p = gn.shape[0]
    return float(ridge) * float(np.trace(gn)) / max(p, 1)


def threshold_least_squares(
    gram: np.ndarray,
    cross: np.ndarray,
    threshold: float | np.ndarray,
    *,
    ridge: float = 0.0,
    max_iter: int = 20,
    scale: np.ndarray | None = None,
) -> tuple[np.ndarray, np.ndarray]:
    """Sequentially thresholded least squares from normal-equation statistics.

    Parameters
    ----------
    gram : ndarray of shape (p, p)
        ``Theta' Theta``.
    cross : ndarray of shape (p, m)
        ``Theta' Y``.
    threshold : float or ndarray of shape (m,)
        Coefficients with ``|c_ij * scale_i| < threshold_j`` are dropped.
    ridge : float, default 0
        Ridge penalty relative to the mean diagonal of the scaled Gram matrix.
    max_iter : int, default 20
        Maximum number of solve-and-threshold rounds.
    scale : ndarray of shape (p,), optional
        Column scale (e.g. :meth:`GramStats.column_scale`); thresholds apply to
        ``coef * scale``.  None: thresholds apply to the raw coefficients.

    Returns
    -------
    coef : ndarray of shape (p, m)
        In the original (unscaled) units.
    support : ndarray of bool, shape (p, m)
    """
    gram = np.asarray(gram, dtype=np.float64)
    cross = np.asarray(cross, dtype=np.float64)
    if cross.ndim == 1:
        cross = cross[:, None]
    gn, cn, s = _normalised(gram, cross, scale)
    p, m = cn.shape
    thr = np.broadcast_to(np.asarray(threshold, dtype=np.float64), (m,))
    lam = _ridge_lambda(gn, ridge)
    coef, support = np.zeros((p, m)), np.zeros((p, m), dtype=bool)
    for j in range(m):
        w, active = _Target(gn, cn[:, j], lam, max_iter).run(float(thr[j]))
        coef[:, j], support[:, j] = w / s, active
    return coef, support


# ---------------------------------------------------------------------------
# threshold choice
# ---------------------------------------------------------------------------
def _threshold_grid(w0: np.ndarray, floor: float) -> np.ndarray:
    """Candidate thresholds for one target from its unthresholded coefficients."""
    v = np.unique(np.abs(w0[np.isfinite(w0)]))
    v = v[v > floor]
    if v.size == 0:
        return np.array([floor])
    mids = np.sqrt(v[:-1] * v[1:])
    geo = np.geomspace(v[0], v[-1], _GRID_POINTS) if v.size > 1 else v
    return np.unique(np.r_[floor, mids, geo, v[-1] * 1.01])


def _score(rss: float, k: int, n: float, yy: float, criterion: str) -> float:
    floor = max(1e-13 * yy, 1e-300)
    term = n * np.log(max(rss, floor) / n)
    return float(term + k * (np.log(n) if criterion == "bic" else 2.0))


def _check_criterion(criterion: str) -> None:
    if criterion not in CRITERIA:
        raise ParameterError(f"criterion must be one of {CRITERIA}, got {criterion!r}")


def _scan_information(
    stats: GramStats, ridge: float, max_iter: int, criterion: str
) -> tuple[np.ndarray, np.ndarray, list[dict]]:
    """Pick a support per target by an information criterion over the grid."""
    scale, ty = stats.column_scale(), stats.target_scale()
    gn, cn, _ = _normalised(stats.gram, stats.cross / ty, scale)
    lam, n = _ridge_lambda(gn, ridge), float(stats.n)
    p, m = cn.shape
    support, chosen_thr, rows = np.zeros((p, m), dtype=bool), np.zeros(m), []
    yyn = np.diag(stats.yy) / ty**2
    for j in range(m):
        solver = _Target(gn, cn[:, j], lam, max_iter)
        seen: dict[bytes, int] = {}
        best = (np.inf, 0, 0.0, np.ones(p, dtype=bool), -1)
        for t in _threshold_grid(solver.solve(np.ones(p, dtype=bool)), MIN_THRESHOLD):
            _, active = solver.run(t)
            key = np.packbits(active).tobytes()
            if key in seen:
                continue
            seen[key] = len(rows)
            w = _ls_on(gn, cn[:, j], active)
            rss = float(yyn[j] - 2 * w @ cn[:, j] + w @ gn @ w)
            k = int(active.sum())
            score = _score(max(rss, 0.0), k, n, float(yyn[j]), criterion)
            rows.append(
                dict(
                    target=j,
                    threshold=t,
                    nonzeros=k,
                    rss=max(rss, 0.0) * ty[j] ** 2,
                    criterion=score,
                    chosen=False,
                )
            )
            if (score, k) < best[:2]:
                best = (score, k, t, active, len(rows) - 1)
        support[:, j], chosen_thr[j] = best[3], best[2]
        rows[best[4]]["chosen"] = True
    return support, chosen_thr, rows


def _ls_on(gn: np.ndarray, cn: np.ndarray, active: np.ndarray) -> np.ndarray:
    w = np.zeros(gn.shape[0])
    if active.any():
        idx = np.flatnonzero(active)
        w[idx] = _solve_spd(gn[np.ix_(idx, idx)], cn[idx])
    return w


def _scan_cv(
    blocks: Sequence[GramStats], ridge: float, max_iter: int
) -> tuple[np.ndarray, np.ndarray, list[dict]]:
    """Pick a threshold per target by leave-one-block-out held-out RSS."""
    total = sum(blocks)
    scale, ty = total.column_scale(), total.target_scale()
    gn, cn, _ = _normalised(total.gram, total.cross / ty, scale)
    lam = _ridge_lambda(gn, ridge)
    p, m = cn.shape
    folds = []
    for b in blocks:
        train = total - b
        g, c, _ = _normalised(train.gram, train.cross / ty, scale)
        folds.append((g, c, b))
    support, chosen_thr, rows = np.zeros((p, m), dtype=bool), np.zeros(m), []
    for j in range(m):
        full = _Target(gn, cn[:, j], lam, max_iter)
        fold_solvers = [_Target(g, c[:, j], lam, max_iter) for g, c, _ in folds]
        best = (np.inf, 0, 0.0, None, -1)
        for t in _threshold_grid(full.solve(np.ones(p, dtype=bool)), MIN_THRESHOLD):
            held = 0.0
            for solver, (_, _, b) in zip(fold_solvers, folds, strict=True):
                _, active = solver.run(t)
                wc = np.zeros((p, m))
                wc[:, j] = _ls_on(solver.gn, solver.cn, active) / scale * ty[j]
                held += float(b.rss(wc)[j])
            _, active = full.run(t)
            k = int(active.sum())
            rows.append(
                dict(target=j, threshold=t, nonzeros=k, rss=held, criterion=held, chosen=False)
            )
            if (held, k) < best[:2]:
                best = (held, k, t, active, len(rows) - 1)
        support[:, j], chosen_thr[j] = best[3], best[2]
        rows[best[4]]["chosen"] = True
    return support, chosen_thr, rows


# ---------------------------------------------------------------------------
# final refit and public entry points
# ---------------------------------------------------------------------------
def refit_support(
    stats: GramStats,
    terms: Sequence[str],
    support: np.ndarray,
    *,
    threshold: np.ndarray | float = 0.0,
    path: list[dict] | None = None,
) -> LocalFit:
    """Ordinary least squares on a given support, with standard errors.

    Parameters
    ----------
    stats : GramStats
    terms : sequence of str
        One name per term (row of the statistics).
    support : ndarray of bool, shape (p, m)
    threshold : float or ndarray of shape (m,), default 0
        Recorded in the result.
    path : list of dict, optional
        Recorded in the result.

    Returns
    -------
    LocalFit
        ``stderr = sqrt(sigma_j^2 diag(G_S^-1))`` with ``sigma_j^2 = RSS_j / (n - k_j)``;
        ``noise_cov = (Y - Theta C)'(Y - Theta C) / (n - max_j k_j)``.
    """
    support = np.asarray(support, dtype=bool).reshape(stats.n_terms, stats.n_targets)
    scale = stats.column_scale()
    gn = stats.gram / np.outer(scale, scale)
    cn = stats.cross / scale[:, None]
    p, m = support.shape
    coef, var_unit = np.zeros((p, m)), np.zeros((p, m))
    for j in range(m):
        idx = np.flatnonzero(support[:, j])
        if idx.size:
            sub = gn[np.ix_(idx, idx)]
            coef[idx, j] = _solve_spd(sub, cn[idx, j]) / scale[idx]
            var_unit[idx, j] = _inverse_diag(sub) / scale[idx] ** 2
    rss = stats.rss(coef)
    k = support.sum(axis=0)
    n = float(stats.n)
    with np.errstate(divide="ignore", invalid="ignore"):
        sigma2 = np.where(n - k > 0, rss / (n - k), np.nan)
        stderr = np.where(support, np.sqrt(np.clip(var_unit, 0, None) * sigma2), 0.0)
    dof = n - (int(k.max()) if k.size else 0)
    noise_cov = stats.residual_products(coef) / dof if dof > 0 else np.full((m, m), np.nan)
    return LocalFit(
        terms=list(terms),
        coef=coef,
        support=support,
        stderr=stderr,
        noise_cov=noise_cov,
        n_samples=round(n),
        threshold=np.broadcast_to(np.asarray(threshold, dtype=np.float64), (m,)).copy(),
        rss=rss,
        n_params=int(support.sum()),
        path=path,
    )


def _check_stats(stats: GramStats, terms: Sequence[str]) -> None:
    if len(terms) != stats.n_terms:
        raise ValueError(f"{len(terms)} term names for statistics of {stats.n_terms} terms")
    if stats.n <= 0:
        raise FitError("no samples to fit")


def fit_sparse(
    stats: GramStats | Sequence[GramStats],
    terms: Sequence[str],
    *,
    threshold: float | str | np.ndarray = "auto",
    ridge: float = 0.0,
    criterion: str = "bic",
    max_iter: int = 20,
) -> LocalFit:
    """Sparse model by sequentially thresholded least squares.

    Parameters
    ----------
    stats : GramStats or sequence of GramStats
        Statistics of the term matrix against the targets.  A sequence (for
        instance one per contiguous block) is summed; it is required for
        ``criterion="cv"``, where each element is one fold's held-out block.
    terms : sequence of str
        Names of the terms (rows of the statistics).
    threshold : "auto", float or ndarray of shape (m,), default "auto"
        Normalised threshold (see module notes), or "auto" to choose it per
        target with ``criterion``.
    ridge : float, default 0
        Relative ridge penalty used while selecting the support.
    criterion : {"bic", "aic", "cv"}, default "bic"
    max_iter : int, default 20

    Returns
    -------
    LocalFit
    """
    _check_criterion(criterion)
    blocks = [stats] if isinstance(stats, GramStats) else list(stats)
    total = blocks[0] if len(blocks) == 1 else sum(blocks)
    _check_stats(total, terms)
    if isinstance(threshold, str):
        if threshold != "auto":
            raise ParameterError(f"threshold must be 'auto' or a number, got {threshold!r}")
        if criterion == "cv":
            if len(blocks) < 2:
                raise ParameterError("criterion='cv' needs statistics for at least 2 blocks")
            support, thr, rows = _scan_cv(blocks, ridge, max_iter)
        else:
            support, thr, rows = _scan_information(total, ridge, max_iter, criterion)
        return refit_support(total, terms, support, threshold=thr, path=rows)
    thr = np.broadcast_to(np.asarray(threshold, dtype=np.float64), (total.n_targets,))
    if np.any(thr < 0) or not np.all(np.isfinite(thr)):
        raise ParameterError(f"threshold must be finite and >= 0, got {threshold!r}")
    _, support = threshold_least_squares(
        total.gram,
        total.cross,
        thr * total.target_scale(),
        ridge=ridge,
        max_iter=max_iter,
        scale=total.column_scale(),
    )
    return refit_support(total, terms, support, threshold=thr)


def fit_sparse_cv(
    stats_list: Sequence[GramStats],
    terms: Sequence[str],
    *,
    ridge: float = 0.0,
    max_iter: int = 20,
) -> LocalFit:
    """Threshold chosen by k-fold cross-validation over contiguous blocks.

    Parameters
    ----------
    stats_list : sequence of GramStats
        Statistics of each block (at least 2); fold ``b`` trains on the sum of
        the others and scores the residual sum of squares on block ``b``.
    terms : sequence of str
    ridge, max_iter : see :func:`fit_sparse`

    Returns
    -------
    LocalFit
    """
    return fit_sparse(
        stats_list, terms, threshold="auto", ridge=ridge, criterion="cv", max_iter=max_iter
    )


# ---------------------------------------------------------------------------
# scikit-learn style estimator on an in-memory term matrix
# ---------------------------------------------------------------------------
class SparseRegression(RegressorMixin, BaseEstimator):
    """Sparse linear regression on a term matrix (scikit-learn estimator).

    Parameters
    ----------
    threshold : "auto" or float, default "auto"
        Normalised threshold (see :mod:`modemap.fit.sparse`), or chosen by ``criterion``.
    ridge : float, default 0
        Relative ridge penalty while selecting the support.
    criterion : {"bic", "aic", "cv"}, default "bic"
        How ``threshold="auto"`` is resolved; "cv" uses ``n_folds`` contiguous blocks.
    max_iter : int, default 20
    solver : {"lsq", "lasso"}, default "lsq"
        "lsq": sequentially thresholded least squares.  "lasso": the support of
        :class:`sklearn.linear_model.Lasso` on RMS-normalised columns (``alpha``
        given, or chosen by ``LassoCV`` over ``n_folds`` contiguous folds).
        Either way the coefficients are a least-squares refit on the support.
    alpha : float or None, default None
        Lasso penalty on the normalised columns (solver "lasso" only).
    n_folds : int, default 5
        Contiguous folds for ``criterion="cv"`` and ``LassoCV``.

    Attributes
    ----------
    coef_ : ndarray of shape (n_features, n_targets)
    support_ : ndarray of bool, shape (n_features, n_targets)
    threshold_ : ndarray of shape (n_targets,)
        Threshold used per target (the Lasso ``alpha`` for solver "lasso").
    stderr_ : ndarray of shape (n_features, n_targets)
    noise_cov_ : ndarray of shape (n_targets, n_targets)
    path_ : pandas.DataFrame or None
        Thresholds tried (target, threshold, nonzeros, rss, criterion, chosen).
    local_fit_ : LocalFit
    n_iter_ : int
        Solve-and-threshold rounds at the chosen threshold (Lasso: coordinate-descent
        iterations), largest over targets.
    n_features_in_ : int
    """

    def __init__(
        self,
        *,
        threshold: float | str = "auto",
        ridge: float = 0.0,
        criterion: str = "bic",
        max_iter: int = 20,
        solver: str = "lsq",
        alpha: float | None = None,
        n_folds: int = 5,
    ) -> None:
        self.threshold = threshold
        self.ridge = ridge
        self.criterion = criterion
        self.max_iter = max_iter
        self.solver = solver
        self.alpha = alpha
        self.n_folds = n_folds

    def fit(self, theta: np.ndarray, y: np.ndarray) -> SparseRegression:
        """Fit on a term matrix ``theta (n, p)`` and targets ``y (n,)`` or ``(n, m)``."""
        given = _feature_names(theta)
        X, Y = validate_data(self, theta, y, multi_output=True, y_numeric=True, dtype=np.float64)
        self._single = Y.ndim == 1
        Y = Y[:, None] if Y.ndim == 1 else Y
        names = given or [f"t{i}" for i in range(X.shape[1])]
        stats = GramStats.from_arrays(X, Y)
        if self.solver == "lasso":
            support, alphas, n_iter = _lasso_support(X, Y, self.alpha, self.n_folds)
            fit = refit_support(stats, names, support, threshold=alphas)
        elif self.solver == "lsq":
            blocks = stats
            if self.criterion == "cv" and self.threshold == "auto":
                edges = np.linspace(0, X.shape[0], self.n_folds + 1).astype(int)
                blocks = [
                    GramStats.from_arrays(X[a:b], Y[a:b]) for a, b in itertools.pairwise(edges)
                ]
            fit = fit_sparse(
                blocks,
                names,
                threshold=self.threshold,
                ridge=self.ridge,
                criterion=self.criterion,
                max_iter=self.max_iter,
            )
            n_iter = count_rounds(stats, fit.threshold, ridge=self.ridge, max_iter=self.max_iter)
        else:
            raise ParameterError(f"solver must be 'lsq' or 'lasso', got {self.solver!r}")
        self.local_fit_, self.n_iter_ = fit, n_iter
        self.coef_, self.support_, self.stderr_ = fit.coef, fit.support, fit.stderr
        self.threshold_, self.noise_cov_ = fit.threshold, fit.noise_cov
        self.path_ = None if fit.path is None else _path_frame(fit.path)
        self.n_features_in_ = X.shape[1]
        if given:
            self.feature_names_in_ = np.asarray(names, dtype=object)
        return self

    def __sklearn_tags__(self):
        tags = super().__sklearn_tags__()
        tags.target_tags.multi_output = True
        return tags

    def predict(self, theta: np.ndarray) -> np.ndarray:
        """Predicted targets, shape ``(n,)`` or ``(n, m)`` as in ``fit``."""
        check_is_fitted(self, "coef_")
        X = validate_data(self, theta, dtype=np.float64, reset=False)
        out = X @ self.coef_
        return out[:, 0] if self._single else out


def _feature_names(theta: object) -> list[str] | None:
    cols = getattr(theta, "columns", None)
    return [str(c) for c in cols] if cols is not None else None


def _lasso_support(
    X: np.ndarray, Y: np.ndarray, alpha: float | None, n_folds: int
) -> tuple[np.ndarray, np.ndarray, int]:
    """Support of the Lasso on RMS-normalised columns, one target at a time."""
    scale = np.sqrt((X**2).mean(axis=0))
    scale[~(scale > 0)] = 1.0
    Xn = X / scale
    support, alphas = np.zeros((X.shape[1], Y.shape[1]), dtype=bool), np.zeros(Y.shape[1])
    n_iter = 0
    for j in range(Y.shape[1]):
        if alpha is None:
            model = LassoCV(
                cv=KFold(n_folds, shuffle=False), fit_intercept=False, max_iter=10000
            ).fit(Xn, Y[:, j])
            alphas[j] = model.alpha_
        else:
            model = Lasso(alpha=alpha, fit_intercept=False, max_iter=10000).fit(Xn, Y[:, j])
            alphas[j] = alpha
        support[:, j] = model.coef_ != 0
        n_iter = max(n_iter, int(model.n_iter_))
    return support, alphas, n_iter


def _path_frame(rows: list[dict]) -> pd.DataFrame:
    """The thresholds tried, as a table."""
    cols = ("target", "threshold", "nonzeros", "rss", "criterion", "chosen")
    return pd.DataFrame({c: np.array([r[c] for r in rows]) for c in cols})
