"""Switching surfaces (guards) learnt from labelled trajectories.

A guard ``source -> target`` fires where ``weights @ terms(z) + offset > 0``
(terms evaluated on raw, unscaled variables); when several guards of the
current regime fire, the largest value wins.  Two families are fitted:

``"per-source"``
    For every source regime ``i``, a class-balanced logistic regression on the
    transitions out of ``i`` (classes "stay" and "switch to j", multinomial
    when ``i`` has several targets).  The guard ``i -> j`` is the log-odds of
    ``j`` against staying.  Guards depend on the source, so hysteresis (a
    thermostat switching on at 55 and off at 65) is representable.
``"memoryless"``
    One multinomial logistic regression of the regime from the variables; the
    guard ``i -> j`` is ``w_j - w_i`` (the regime switches to the most probable
    one).  Guards are made only for transitions seen in the data.

Pairing of samples: for consecutive samples ``k, k+1`` of one run (never across
runs, unassigned labels ``-1`` skipped) the *source* is the regime at ``k`` and
the *features* are the variables at ``k+1``, the first sample where the new
regime is observed.  Pairing the variables at ``k+1`` (rather than ``k``) puts
a threshold between the last sample before and the first sample after the
crossing, i.e. around the true switching value, and makes a switch on a sampled
input (a gate) separable.

Logistic regression ("The regression analysis of binary sequences", Journal of
the Royal Statistical Society B, 1958) runs on standardised term columns with
weak regularisation (large ``C``) so that the boundary location on
near-separable data is set by the data.  The fitted weights are mapped back to
raw terms exactly: with standardised columns ``(f - m) / s`` the raw weights are
``w / s`` and the offset ``b - sum(w m / s)`` (exact for any degree because the
standardisation is applied to the term columns, not to the variables).  Every
guard is scaled so that its value is a signed distance in standard deviations
of the term columns, which keeps values comparable between guards.

Readable guards: for every guard, each single variable is tried as a threshold
``v > c`` or ``v < c`` whose location maximises the balanced accuracy (midpoint
between the neighbouring samples of the two classes).  When the best single
variable scores within ``simplify_tol`` of the full guard on the held-out
samples (training samples when the held-out part lacks a class), it replaces
the full guard, and the text reads ``switch 0 -> 1 when T < 55.0 degC``.  When
that would drop a variable the full guard leans on, the threshold must also
catch every training switch the full guard catches: a rare cause of switching
(a load shed that turns a heater off below its thermostat threshold) moves the
balanced accuracy by a percent or so, but losing it makes the model wrong.

Choice of family (``kind="auto"``): both families are fitted on the first
``1 - holdout`` of every run, the label sequence of the last ``holdout`` part is
re-predicted from its first measured label by evaluating the guards on the
measured variables, and the predicted switches are matched to the measured
ones (see :func:`modemap.model.switches.match_switches`).  The cost is
``(missed + spurious) / max(1, measured) + timing_mae / median_dwell`` (times
in samples); the lower cost wins, ties go to ``"memoryless"`` (the simpler
family).  The chosen family is then refitted on all samples.
"""

from __future__ import annotations

import math
import warnings
from collections.abc import Sequence
from dataclasses import dataclass
from typing import ClassVar

import numpy as np
from scipy.special import expit
from sklearn.base import BaseEstimator
from sklearn.exceptions import ConvergenceWarning
from sklearn.linear_model import LogisticRegression

from modemap._exceptions import FitError
from modemap._params import Interval, Options, check_params
from modemap.model.hybrid import Guard
from modemap.model.switches import match_switches
from modemap.terms.library import TermLibrary

__all__ = [
    "LogisticFit",
    "SwitchingSurfaces",
    "fit_logistic",
    "guard_text",
    "guard_values",
    "predict_labels",
]

KINDS = ("auto", "per-source", "memoryless")
_MAX_ROWS_PER_CLASS = 20_000


# -- sample pairing ----------------------------------------------------------------------------
def _pairs(labels: np.ndarray, lengths: Sequence[int]) -> tuple[np.ndarray, np.ndarray]:
    """Positions ``(k, k+1)`` of consecutive samples of one run with both labels assigned."""
    n = labels.size
    ok = np.ones(n, dtype=bool)
    ends = np.cumsum(np.asarray(lengths, dtype=np.int64))
    ok[ends[ends <= n] - 1] = False  # the last sample of a run has no successor
    ok[-1] = False
    prev = np.flatnonzero(ok)
    cur = prev + 1
    keep = (labels[prev] >= 0) & (labels[cur] >= 0)
    return prev[keep], cur[keep]


def _split_runs(lengths: Sequence[int], holdout: float) -> tuple[np.ndarray, np.ndarray]:
    """Masks of the training head and held-out tail of every run."""
    lengths = np.asarray(lengths, dtype=np.int64)
    n = int(lengths.sum())
    test = np.zeros(n, dtype=bool)
    start = 0
    for m in lengths:
        n_test = math.ceil(holdout * m) if holdout > 0 else 0
        if 0 < n_test < m:
            test[start + m - n_test : start + m] = True
        start += m
    return ~test, test


# -- logistic regression with standard errors --------------------------------------------------
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


# -- fitting helpers ---------------------------------------------------------------------------
def _balanced_accuracy(y_true: np.ndarray, fired: np.ndarray) -> float:
    pos = y_true.astype(bool)
    if pos.all() or not pos.any():
        return float("nan")
    return 0.5 * (fired[pos].mean() + (~fired[~pos]).mean())


def _threshold(v: np.ndarray, y: np.ndarray) -> tuple[float, int, float]:
    """Best threshold of one variable by balanced accuracy.

    Returns ``(threshold, sign, score)``; the rule fires where ``sign * (v - threshold) > 0``.
    """
    order = np.argsort(v, kind="stable")
    vs, ys = v[order], y[order].astype(bool)
    n1, n0 = ys.sum(), (~ys).sum()
    # cut after position p: "v > c" fires for positions > p
    pos_above = n1 - np.cumsum(ys)
    neg_below = np.cumsum(~ys)
    bacc = 0.5 * (pos_above / n1 + neg_below / n0)
    valid = np.append(vs[1:] > vs[:-1], False)
    score = np.where(valid, np.abs(bacc - 0.5), -1.0)
    if not valid.any():
        return float(vs[0]), 1, 0.5
    best = score.max()
    ties = np.flatnonzero(score >= best - 1e-12)
    p = int(ties[ties.size // 2])
    sign = 1 if bacc[p] >= 0.5 else -1
    return float(0.5 * (vs[p] + vs[p + 1])), sign, float(0.5 + best)


def _thin(y: np.ndarray, cap: int) -> np.ndarray:
    """Rows to keep: every row of a class with at most ``cap`` rows, else ``cap`` evenly
    strided rows of it.  With class-balanced weights the objective is unchanged in
    expectation, and the fit cost stays bounded on long records."""
    keep = []
    for c in np.unique(y):
        rows = np.flatnonzero(y == c)
        if rows.size > cap:
            rows = rows[np.linspace(0, rows.size - 1, cap).astype(np.int64)]
        keep.append(rows)
    return np.sort(np.concatenate(keep))


def _logistic(F: np.ndarray, y: np.ndarray, C: float, seed: int) -> tuple[np.ndarray, np.ndarray]:
    """Class-balanced logistic regression; returns (classes, W (n_classes, p), b (n_classes,))."""
    rows = _thin(y, _MAX_ROWS_PER_CLASS)
    F, y = F[rows], y[rows]
    clf = LogisticRegression(C=C, class_weight="balanced", max_iter=2000, random_state=seed)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", ConvergenceWarning)
        clf.fit(F, y)
    W, b = clf.coef_, clf.intercept_
    if W.shape[0] == 1:  # binary: log-odds of classes_[1] against classes_[0]
        W = np.vstack([np.zeros_like(W[0]), W[0]])
        b = np.array([0.0, b[0]])
    return clf.classes_, W, b


class _Features:
    """Term columns of the variables, standardised column by column."""

    def __init__(self, variables: list[str], degree: int) -> None:
        self.lib = TermLibrary(degree=degree, constant=False).fit(variables)
        self.terms = list(self.lib.terms_)

    def fit(self, Z: np.ndarray) -> _Features:
        F = self.lib.transform(Z)
        self.mu = F.mean(axis=0)
        sd = F.std(axis=0)
        self.sd = np.where(sd > 0, sd, 1.0)
        return self

    def __call__(self, Z: np.ndarray) -> np.ndarray:
        return (self.lib.transform(Z) - self.mu) / self.sd

    def to_raw(self, w: np.ndarray, b: float) -> tuple[np.ndarray, float]:
        nrm = float(np.linalg.norm(w))
        if nrm == 0:
            return np.zeros_like(w), -1.0
        w, b = w / nrm, b / nrm
        return w / self.sd, float(b - np.sum(w * self.mu / self.sd))


def _after(guard: Guard, variables: list[str], Z: np.ndarray, prev2_ok: np.ndarray) -> np.ndarray:
    """Guard value "after" each row: the larger of the value at the row and at the
    source trend extrapolated one step, ``2 z[r-1] - z[r-2]`` (where ``prev2_ok``).

    States are continuous, so after a switch the measured sample may already have
    turned back (a thermostat's temperature peaks at the crossing): the
    extrapolation of the source regime shows the crossing.  Inputs jump (a gate),
    and the measured row shows the crossing.  The larger value covers both.
    """
    after = guard_values(guard, variables, Z[1:])
    rows = np.flatnonzero(prev2_ok[1:]) + 1
    if rows.size:
        ext = guard_values(guard, variables, 2.0 * Z[rows - 1] - Z[rows - 2])
        after[rows - 1] = np.maximum(after[rows - 1], ext)
    return np.concatenate([[guard_values(guard, variables, Z[:1])[0]], after])


def _recentre(
    guard: Guard, variables: list[str], Z: np.ndarray, events: np.ndarray | None, ok2: np.ndarray
) -> Guard:
    """Shift the offset so the guard is zero at the median crossing midpoint.

    For a switch first observed at row ``r`` the crossing lies between the last
    source sample ``r-1`` and the "after" value of :func:`_after`; the guard is
    set to zero, in the median, halfway between the two.  Class-balanced
    weighting alone would pull the boundary into the much larger "stay" class.
    """
    if events is None or events.size == 0:
        return guard
    before = guard_values(guard, variables, Z[events - 1])
    after = guard_values(guard, variables, Z[events])
    sel = np.flatnonzero(ok2)
    if sel.size:
        e = events[sel]
        ext = guard_values(guard, variables, 2.0 * Z[e - 1] - Z[e - 2])
        after[sel] = np.maximum(after[sel], ext)
    guard.offset = float(guard.offset - np.median(0.5 * (before + after)))
    return guard


def guard_values(guard: Guard, variables: Sequence[str], Z: np.ndarray) -> np.ndarray:
    """Values of ``guard`` at the raw variables ``Z (n, n_vars)``; it fires where > 0."""
    lib = TermLibrary.from_terms(guard.terms, list(variables))
    return lib.transform(Z) @ np.asarray(guard.weights, dtype=float) + guard.offset


# -- text --------------------------------------------------------------------------------------
def _decimals(span: float) -> int:
    if not np.isfinite(span) or span <= 0:
        return 3
    return max(0, 2 - math.floor(math.log10(span)))


def guard_text(
    guard: Guard, units: dict[str, str] | None = None, spans: dict[str, float] | None = None
) -> str:
    """Readable text of a guard: a threshold for one variable, else a normalised half-plane."""
    spans = spans or {}
    # a dimensionless marker ("-", "1") is not shown after a number
    units = {k: v for k, v in (units or {}).items() if v not in ("-", "1", "")}
    w = np.asarray(guard.weights, dtype=float)
    nz = np.flatnonzero(w != 0)
    head = f"switch {guard.source} -> {guard.target} when "
    if nz.size == 0:
        return head + ("always" if guard.offset > 0 else "never")
    if nz.size == 1 and guard.terms[nz[0]] in spans:
        name = guard.terms[nz[0]]
        thr = -guard.offset / w[nz[0]]
        op = ">" if w[nz[0]] > 0 else "<"
        unit = f" {units[name]}" if units.get(name) else ""
        digits = _decimals(spans[name])
        return head + f"{name} {op} {round(thr, digits) + 0.0:.{digits}f}{unit}"
    nrm = float(np.linalg.norm(w))
    parts = []
    for i in nz:
        c = w[i] / nrm
        t = guard.terms[i]
        label = f"{t}[{units[t]}]" if units.get(t) else t
        sign = "-" if c < 0 else "+"
        parts.append(f"{sign} {abs(c):.3g} {label}")
    lhs = " ".join(parts)
    lhs = lhs[2:] if lhs.startswith("+ ") else "-" + lhs[2:]
    return head + f"{lhs} > {-guard.offset / nrm:.4g}"


# -- label prediction --------------------------------------------------------------------------
def predict_labels(
    guards: Sequence[Guard], variables: Sequence[str], Z: np.ndarray, start: int
) -> np.ndarray:
    """Re-predict a label sequence by evaluating guards on measured variables.

    Starting from ``start``, the regime switches at the first sample where a
    guard of the current regime fires; a guard's value at sample ``m`` is its
    "after" value (the larger of the value at ``z[m]`` and at the source trend
    ``2 z[m-1] - z[m-2]``, see :func:`_after`).

    Parameters
    ----------
    guards : sequence of Guard
    variables : sequence of str
    Z : ndarray of shape (n, n_vars)
        Measured variables of one run (or stretch).
    start : int
        Regime at the first sample.

    Returns
    -------
    ndarray of shape (n,) of int
    """
    n = Z.shape[0]
    out = np.full(n, start, dtype=np.int64)
    if not guards or n < 2:
        return out
    ok2 = np.arange(n) >= 2
    G = np.column_stack([_after(g, list(variables), Z, ok2) for g in guards])
    nxt: dict[int, np.ndarray] = {}
    for src in {g.source for g in guards} | {start}:
        cols = [i for i, g in enumerate(guards) if g.source == src]
        nx = np.full(n, src, dtype=np.int64)
        if cols:
            sub = G[:, cols]
            fire = sub.max(axis=1) > 0
            tg = np.array([guards[i].target for i in cols])[np.argmax(sub, axis=1)]
            nx[fire] = tg[fire]
        nxt[src] = nx
    cur, m = start, 1
    while m < n:
        nx = nxt.get(cur)
        if nx is None:
            break
        hits = np.flatnonzero(nx[m:] != cur)
        if hits.size == 0:
            break
        m_sw = m + int(hits[0])
        out[m:m_sw] = cur
        cur = int(nx[m_sw])
        out[m_sw:] = cur
        m = m_sw + 1
    return out


def _switch_positions(labels: np.ndarray) -> np.ndarray:
    """Sample positions where the (forward-filled, assigned) label changes."""
    idx = np.flatnonzero(labels >= 0)
    if idx.size < 2:
        return np.zeros(0, dtype=np.int64)
    lab = labels[idx]
    return idx[1:][lab[1:] != lab[:-1]]


# -- the estimator -----------------------------------------------------------------------------
class SwitchingSurfaces(BaseEstimator):
    """Learn the guards of a hybrid model from labelled samples.

    Parameters
    ----------
    kind : {"auto", "per-source", "memoryless"}
        Guard family; ``"auto"`` chooses by held-out prediction of switch times.
    degree : int
        Polynomial degree of the guard terms (1: half-planes).
    C : float
        Inverse regularisation strength of the logistic regressions (on
        standardised term columns; large = weak regularisation).
    holdout : float
        Fraction at the end of every run used for the family choice and for
        simplifying guards to one variable.
    simplify_tol : float
        Largest loss of balanced accuracy accepted for a one-variable guard.
    seed : int

    Attributes
    ----------
    guards_ : list of Guard
    kind_ : str
    scores_ : dict
        Per family: ``cost``, ``timing_mae`` (samples), ``missed``, ``spurious``,
        ``n_measured``.
    variables_ : list of str
    """

    _parameter_constraints: ClassVar[dict[str, list]] = {
        "kind": [Options(KINDS)],
        "degree": [Interval(int, 1, None)],
        "C": [Interval(float, 0, None, closed="neither")],
        "holdout": [Interval(float, 0, 1, closed="left")],
        "simplify_tol": [Interval(float, 0, None)],
        "seed": [Interval(int, 0, 2**32 - 1)],
    }

    def __init__(
        self,
        *,
        kind: str = "auto",
        degree: int = 1,
        C: float = 1e3,
        holdout: float = 0.25,
        simplify_tol: float = 0.02,
        seed: int = 0,
    ) -> None:
        self.kind = kind
        self.degree = degree
        self.C = C
        self.holdout = holdout
        self.simplify_tol = simplify_tol
        self.seed = seed

    # public ------------------------------------------------------------------------------------
    def fit(
        self,
        Z: np.ndarray,
        labels: np.ndarray,
        lengths: Sequence[int],
        variables: Sequence[str],
        units: dict[str, str] | None = None,
    ) -> SwitchingSurfaces:
        """Fit the guards.

        Parameters
        ----------
        Z : ndarray of shape (n, n_vars)
            Variables (states then inputs), runs stacked.
        labels : ndarray of shape (n,) of int
            Regime per sample, ``-1`` for unassigned.
        lengths : sequence of int
            Samples per run.
        variables : sequence of str
        units : dict, optional
            Variable -> unit text, used in the guard texts.

        Returns
        -------
        self
        """
        Z, labels, lengths = self._validate(Z, labels, lengths, variables)
        self._vars = list(variables)
        self._Z = Z
        self._units = dict(units or {})
        self._spans = {v: float(np.ptp(Z[:, i])) for i, v in enumerate(self._vars)}
        train, test = _split_runs(lengths, self.holdout)
        prev, cur = _pairs(labels, lengths)
        k = int(labels.max()) + 1 if labels.size else 0
        self._transitions = np.zeros((max(k, 1), max(k, 1)), dtype=bool)
        moved = labels[prev] != labels[cur]
        self._transitions[labels[prev][moved], labels[cur][moved]] = True
        self._choice_map: dict = {}
        self._prev = np.full(labels.size, -2, dtype=np.int64)
        self._prev[cur] = labels[prev]
        run_start = np.repeat(np.cumsum(lengths) - lengths, lengths)
        self._ok2 = np.arange(labels.size) - run_start >= 2
        kinds = ["per-source", "memoryless"] if self.kind == "auto" else [self.kind]
        scores: dict[str, dict] = {}
        fitted: dict[str, list[Guard]] = {}
        for kind in kinds:
            fitted[kind] = self._fit_kind(kind, Z, labels, lengths, train, test)
            if test.any():
                scores[kind] = self._score(fitted[kind], Z, labels, lengths, test)
        if len(kinds) == 1:
            chosen = kinds[0]
        elif not scores:
            chosen = "per-source"
        else:
            chosen = min(kinds, key=lambda k: (scores[k]["cost"], k != "memoryless"))
        choices = self._choice_map if test.any() else None
        guards = self._fit_kind(chosen, Z, labels, lengths, np.ones_like(train), None, choices)
        for g in guards:
            g.text = guard_text(g, self._units, self._spans)
        self.guards_ = guards
        self.kind_ = chosen
        self.scores_ = scores
        self.variables_ = list(self._vars)
        del self._Z, self._ok2
        return self

    def guard_values(self, z: np.ndarray, current: int) -> dict[int, float]:
        """Values of the guards leaving ``current`` at the raw variables ``z`` (n_vars,)."""
        z = np.asarray(z, dtype=float).reshape(1, -1)
        return {
            g.target: float(guard_values(g, self.variables_, z)[0])
            for g in self.guards_
            if g.source == current
        }

    def predict_next(self, z: np.ndarray, current: int) -> int:
        """Regime after ``current`` at the raw variables ``z``: the largest firing guard wins."""
        vals = self.guard_values(z, current)
        firing = {t: v for t, v in vals.items() if v > 0}
        return max(firing, key=firing.get) if firing else int(current)

    # fitting -----------------------------------------------------------------------------------
    def _validate(self, Z, labels, lengths, variables):
        check_params(self)
        Z = np.asarray(Z, dtype=float)
        labels = np.asarray(labels).astype(np.int64).reshape(-1)
        lengths = np.asarray(lengths, dtype=np.int64).reshape(-1)
        if Z.ndim != 2 or Z.shape[0] != labels.size or Z.shape[1] != len(variables):
            raise FitError(
                f"Z has shape {Z.shape}; expected ({labels.size}, {len(variables)}) for {variables}"
            )
        if int(lengths.sum()) != labels.size:
            raise FitError(
                f"lengths sum to {int(lengths.sum())} but there are {labels.size} samples"
            )
        if not np.all(np.isfinite(Z)):
            raise FitError("Z contains NaN or infinite values")
        return Z, labels, lengths

    def _fit_kind(self, kind, Z, labels, lengths, train, test, choices=None) -> list[Guard]:
        prev, cur = _pairs(labels, lengths)
        use = train[prev] & train[cur]
        held = None if test is None else (test[prev] & test[cur])
        if kind == "per-source":
            groups = self._per_source_groups(labels, prev, cur)
        else:
            groups = self._memoryless_groups(labels, prev, cur)
        guards: list[Guard] = []
        for key, (rows, y, pairs) in groups.items():
            tr = rows[use[pairs]] if pairs is not None else rows[train[rows]]
            ytr = y[use[pairs]] if pairs is not None else y[train[rows]]
            if held is not None:
                ho = rows[held[pairs]] if pairs is not None else rows[test[rows]]
                yho = y[held[pairs]] if pairs is not None else y[test[rows]]
            else:
                ho, yho = rows[:0], y[:0]
            new = self._guards_for(kind, key, Z, tr, ytr, ho, yho, choices)
            guards += new
        return guards

    def _per_source_groups(self, labels, prev, cur):
        """Source regime -> (feature rows, next labels, pair index)."""
        out = {}
        for src in np.unique(labels[prev]):
            sel = np.flatnonzero(labels[prev] == src)
            if np.all(labels[cur[sel]] == src):
                continue  # never left: no guards
            out[("per-source", int(src))] = (cur[sel], labels[cur[sel]], sel)
        return out

    def _memoryless_groups(self, labels, prev, cur):
        rows = np.flatnonzero(labels >= 0)
        if np.unique(labels[rows]).size < 2:
            return {}
        return {("memoryless", -1): (rows, labels[rows], None)}

    def _guards_for(self, kind, key, Z, tr, ytr, ho, yho, choices) -> list[Guard]:
        src = key[1]
        classes = np.unique(ytr)
        if classes.size < 2:
            return []
        feats = _Features(self._vars, int(self.degree)).fit(Z[tr])
        cls, W, b = _logistic(feats(Z[tr]), ytr, float(self.C), int(self.seed))
        if kind == "per-source":
            stay = int(np.flatnonzero(cls == src)[0]) if src in cls else None
            pairs = [(src, int(c)) for c in cls if c != src]
        else:
            transitions = self._observed_transitions(cls)
            pairs = transitions
        out = []
        for i, j in pairs:
            if kind == "per-source":
                if stay is None:
                    continue
                a, c = stay, int(np.flatnonzero(cls == j)[0])
                sub_tr, sub_ho = np.isin(ytr, [i, j]), np.isin(yho, [i, j])
            else:
                a, c = int(np.flatnonzero(cls == i)[0]), int(np.flatnonzero(cls == j)[0])
                sub_tr, sub_ho = np.isin(ytr, [i, j]), np.isin(yho, [i, j])
            w, off = feats.to_raw(W[c] - W[a], float(b[c] - b[a]))
            full = Guard(source=i, target=j, terms=list(feats.terms), weights=w, offset=off)
            events = tr[ytr == j] if kind == "per-source" else None
            ok2 = None if events is None else self._prev[events - 1] == i
            full = _recentre(full, self._vars, Z, events, ok2)
            g = self._simplify(
                full, kind, (tr[sub_tr], ytr[sub_tr] == j), (ho[sub_ho], yho[sub_ho] == j),
                choices, (events, ok2),
            )  # fmt: skip
            out.append(g)
        return out

    def _observed_transitions(self, cls) -> list[tuple[int, int]]:
        obs = self._transitions
        return [(int(i), int(j)) for i in cls for j in cls if i != j and obs[i, j]]

    def _simplify(self, full, kind, train, held, choices, events) -> Guard:
        """Replace a guard by a one-variable threshold when that scores as well."""
        (tr, ytr), (ho, yho) = train, held
        key = (kind, full.source, full.target)
        if choices is not None and choices.get(key) is None:
            return full
        if ytr.all() or not ytr.any():
            return full
        use_ho = yho.size and yho.any() and not yho.all()
        rows, ys = (ho, yho) if use_ho else (tr, ytr)
        full_score = _balanced_accuracy(ys, self._after_rows(full, rows) > 0)
        cands = [self._leading_variable(full, tr)] if choices is None else [choices[key]]
        best = None
        for v in cands:
            thr, sign, _ = _threshold(self._Z[tr, v], ytr)
            sd = float(np.std(self._Z[tr, v])) or 1.0
            w = np.zeros(len(self._vars))
            w[v] = sign / sd
            g = Guard(full.source, full.target, list(self._vars), w, -sign * thr / sd)
            g = _recentre(g, self._vars, self._Z, *events)
            score = _balanced_accuracy(ys, self._after_rows(g, rows) > 0)
            if best is None or score > best[0]:
                best = (score, v, g)
        if choices is not None:
            return best[2]
        ok = best is not None and best[0] >= full_score - float(self.simplify_tol)
        influence = self._influence(full, tr)
        dropped = np.delete(influence, best[1]) > 1e-9 * influence.max()
        if ok and dropped.any():
            # a variable may be dropped only if no switch the full guard catches needs it
            # (a rare cause of switching, like a load shed, moves balanced accuracy little)
            switches = tr[ytr]
            caught = self._after_rows(full, switches) > 0
            ok = bool(np.all(self._after_rows(best[2], switches)[caught] > 0))
        self._choice_map[key] = best[1] if ok else None
        return best[2] if ok else full

    def _after_rows(self, guard: Guard, rows: np.ndarray) -> np.ndarray:
        """Guard values "after" the given rows, as in :func:`predict_labels` (see
        :func:`_after`): the larger of the value at the row and at the trend
        ``2 z[r-1] - z[r-2]`` when both earlier samples belong to the same run.
        Scoring with the value the simulator and the label prediction use keeps
        a threshold crossed between two samples from counting as a miss."""
        value = guard_values(guard, self._vars, self._Z[rows])
        sel = np.flatnonzero(self._ok2[rows])
        if sel.size:
            r = rows[sel]
            ext = guard_values(guard, self._vars, 2.0 * self._Z[r - 1] - self._Z[r - 2])
            value[sel] = np.maximum(value[sel], ext)
        return value

    def _leading_variable(self, full: Guard, rows: np.ndarray) -> int:
        """The variable the full guard leans on most: largest |d value / d v| * spread(v).

        Only this variable is offered as a one-variable threshold, so a variable that
        merely co-varies with switching (a draw that hastens cooling) cannot replace the
        one the surface is built on (the temperature).
        """
        return int(np.argmax(self._influence(full, rows)))

    def _influence(self, guard: Guard, rows: np.ndarray) -> np.ndarray:
        """Per variable: ``|d value / d v| * spread(v)`` at the centre of ``rows``."""
        Zr = self._Z[rows]
        spread = Zr.std(axis=0)
        centre = Zr.mean(axis=0)
        h = np.where(spread > 0, 1e-3 * spread, 1e-6)
        base = guard_values(guard, self._vars, centre[None, :])[0]
        slopes = np.empty(len(self._vars))
        for v in range(len(self._vars)):
            z = centre.copy()
            z[v] += h[v]
            slopes[v] = (guard_values(guard, self._vars, z[None, :])[0] - base) / h[v]
        return np.abs(slopes) * spread

    def _score(self, guards, Z, labels, lengths, test) -> dict:
        """Held-out prediction of switch positions (in samples)."""
        starts = np.concatenate([[0], np.cumsum(lengths)[:-1]])
        measured, predicted, dwell = [], [], []
        for s, m in zip(starts, lengths, strict=True):
            idx = np.arange(s, s + m)[test[s : s + m]]
            lab = labels[idx]
            valid = np.flatnonzero(lab >= 0)
            if valid.size < 2:
                continue
            idx, lab = idx[valid[0] :], lab[valid[0] :]
            pred = predict_labels(guards, self._vars, Z[idx], int(lab[0]))
            sw_m, sw_p = _switch_positions(lab), _switch_positions(pred)
            measured.append(sw_m + s)
            predicted.append(sw_p + s)
            dwell += list(np.diff(sw_m))
        m_all = np.concatenate(measured) if measured else np.zeros(0)
        p_all = np.concatenate(predicted) if predicted else np.zeros(0)
        med = float(np.median(dwell)) if dwell else float(max(int(test.sum()), 1))
        mi, pi = match_switches(m_all, p_all, window=0.5 * med)
        mae = float(np.mean(np.abs(m_all[mi] - p_all[pi]))) if mi.size else 0.0
        missed, spurious = m_all.size - mi.size, p_all.size - pi.size
        cost = (missed + spurious) / max(1, m_all.size) + mae / med
        return {
            "cost": float(cost),
            "timing_mae": mae,
            "missed": int(missed),
            "spurious": int(spurious),
            "n_measured": int(m_all.size),
        }
