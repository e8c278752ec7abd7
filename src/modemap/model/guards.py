"""Switching surfaces (guards) learnt from labelled trajectories.

A guard ``source -> target`` fires where ``weights @ terms(z) + offset > 0``
(terms evaluated on raw, unscaled variables); when several guards of the
current regime fire, the largest value wins.  Two families:

``"memoryless"``
    The regime is a function of where the system is.  For every pair of regimes
    ``i < j`` with a switch seen between them, one logistic regression of "in
    ``j``" against "in ``i``" on the samples labelled ``i`` or ``j``; the guard
    ``i -> j`` is its log-odds and ``j -> i`` the same surface with the sign
    turned, so a pair shares one surface.  Guards are made only for transitions
    seen in the data.
``"per-source"``
    For every source regime ``i`` and target ``j`` seen after it, a logistic
    regression of "switch to ``j``" against "stay in ``i``" on the samples that
    follow a sample in ``i``.  Guards depend on the source, so hysteresis (a
    thermostat switching on at 55 and off at 65) is representable.

Pairing of samples (per-source): for consecutive samples ``k, k+1`` of one run
(never across runs, unassigned labels ``-1`` skipped) the *source* is the regime
at ``k`` and the *features* are the variables at ``k+1``, the first sample where
the new regime is observed.  This puts a threshold between the last sample
before and the first sample after the crossing, and makes a switch on a sampled
input (a gate) separable.

Choice of family (``kind="auto"``): memoryless unless the labelled samples show
hysteresis (:func:`modemap.model.hysteresis.hysteresis_evidence`).
:attr:`SwitchingSurfaces.family_evidence_` records both scores, the gain, its
error, the margin, the decision and a one-line reason.  The surfaces are
logistic regressions with standard errors (:mod:`modemap.model.logistic`).

Significant terms only: a guard's term whose Wald ratio ``|coef| / se`` is below
the two-sided normal critical value at ``alpha`` is a candidate for removal;
the weakest candidate is dropped when a likelihood-ratio test (chi-square, one
degree of freedom, level ``alpha``) agrees, the guard is refitted without it,
and this repeats until no term can be dropped (the last term always stays).
The likelihood-ratio check guards against the Hauck-Donner effect: near
separation the Wald ratio of a strong term shrinks as the coefficient grows
("Wald's test as applied to hypotheses in logit analysis", Hauck and Donner,
Journal of the American Statistical Association 72, 1977,
doi:10.1080/01621459.1977.10479969), so a rare but sure cause of switching (a
load shed) would otherwise be dropped.  Serially correlated samples make both
tests optimistic: they drop only terms the data show nothing for.
:attr:`SwitchingSurfaces.significance_` lists, per guard, the Wald ratios of
the terms kept and of the terms dropped.

The fitted weights are mapped back to raw terms exactly: with standardised
columns ``(f - m) / s`` the raw weights are ``w / s`` and the offset
``b - sum(w m / s)`` (exact for any degree because the standardisation is
applied to the term columns, not to the variables).  Every guard is scaled so
that its value is a signed distance in standard deviations of the term columns.
Per-source guards are then re-centred on the observed crossings (the "stay"
class is much larger, which pulls the boundary into it).

Readable guards: for every guard the variable it leans on is tried as a
threshold ``v > c`` or ``v < c`` whose location maximises the balanced accuracy
(midpoint between the neighbouring samples of the two classes).  When it scores
within ``simplify_tol`` of the full guard on the held-out tails of the runs
(training samples when the held-out part lacks a class), it replaces the full
guard, and the text reads ``switch 0 -> 1 when T < 55.0 degC``.  When that would
drop a variable the full guard leans on, the threshold must also catch every
training switch the full guard catches: a rare cause of switching (a load shed
that turns a heater off below its thermostat threshold) moves the balanced
accuracy by a percent or so, but losing it makes the model wrong.
"""

from __future__ import annotations

import math
from collections.abc import Sequence
from typing import Any, ClassVar

import numpy as np
from scipy import stats
from sklearn.base import BaseEstimator

from modemap._exceptions import FitError
from modemap._params import Interval, Options, check_params
from modemap.model.guard_rules import guard_text, guard_values, threshold_of
from modemap.model.guard_spread import block_indices, printed_numbers, spread
from modemap.model.hybrid import Guard
from modemap.model.hysteresis import hysteresis_evidence, position_in_run
from modemap.model.logistic import LogisticFit, fit_logistic
from modemap.terms.expressions import quote_name
from modemap.terms.library import TermLibrary

__all__ = ["SwitchingSurfaces"]

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


def _prune(
    X: np.ndarray, y: np.ndarray, w: np.ndarray, C: float, alpha: float
) -> tuple[np.ndarray, LogisticFit, dict[int, float]]:
    """Backward elimination of the columns of ``X`` the data do not support.

    Returns the mask of kept columns, the fit on them and the Wald ratio of every
    dropped column at the time it was dropped.
    """
    z_crit = float(stats.norm.ppf(1.0 - alpha / 2.0))
    lr_crit = float(stats.chi2.ppf(1.0 - alpha, 1))
    active = np.ones(X.shape[1], dtype=bool)
    fit = fit_logistic(X, y, C=C, sample_weight=w)
    dropped: dict[int, float] = {}
    while active.sum() > 1:
        cols = np.flatnonzero(active)
        z = np.abs(fit.wald)
        done = True
        for pos in np.argsort(z, kind="stable"):
            if z[pos] >= z_crit:
                break
            trial = active.copy()
            trial[cols[pos]] = False
            reduced = fit_logistic(X[:, trial], y, C=C, sample_weight=w)
            if 2.0 * (fit.loglik - reduced.loglik) < lr_crit:
                dropped[int(cols[pos])] = float(fit.wald[pos])
                active, fit, done = trial, reduced, False
                break
        if done:
            break
    return active, fit, dropped


# -- evidence for the guard family -------------------------------------------------------------
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


def _thin(y: np.ndarray, cap: int) -> tuple[np.ndarray, np.ndarray]:
    """Rows to keep and their frequency weights: every row of a class with at most ``cap``
    rows, else ``cap`` evenly strided rows of it, each standing for ``n_class / cap`` rows.
    The weighted likelihood approximates the full one, and the fit cost stays bounded on
    long records."""
    keep, weight = [], []
    for c in np.unique(y):
        rows = np.flatnonzero(y == c)
        if rows.size > cap:
            w = rows.size / cap
            rows = rows[np.linspace(0, rows.size - 1, cap).astype(np.int64)]
        else:
            w = 1.0
        keep.append(rows)
        weight.append(np.full(rows.size, w))
    keep_all, weight_all = np.concatenate(keep), np.concatenate(weight)
    order = np.argsort(keep_all, kind="stable")
    return keep_all[order], weight_all[order]


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


def _recentre(
    guard: Guard, variables: list[str], Z: np.ndarray, events: np.ndarray | None, ok2: np.ndarray
) -> Guard:
    """Shift the offset so the guard is zero at the median crossing midpoint.

    For a switch first observed at row ``r`` the crossing lies between the last
    source sample ``r-1`` and the "after" value of :func:`_after`; the guard is
    set to zero, in the median, halfway between the two.  The "stay" class is far
    larger than the "switch" class, which alone would pull the boundary into it.
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


# -- the estimator -----------------------------------------------------------------------------
class SwitchingSurfaces(BaseEstimator):
    """Learn the guards of a hybrid model from labelled samples.

    Parameters
    ----------
    kind : {"auto", "per-source", "memoryless"}, default "auto"
        Guard family; ``"auto"``: memoryless unless the labelled samples show
        hysteresis (:func:`hysteresis_evidence`).
    degree : int, default 1
        Polynomial degree of the guard terms (1: half-planes).
    C : float, default 1e3
        Inverse ridge strength of the logistic regressions (on standardised term
        columns; large = weak regularisation).
    alpha : float, default 0.01
        Level of the tests: the one-sided test of the hysteresis evidence and the
        two-sided tests that drop guard terms the data do not support.
    hysteresis_margin : float, default 0.01
        Smallest cross-validated gain of balanced accuracy from knowing the past
        regime that counts as hysteresis.
    memory_lag : "auto" or int, default "auto"
        How far back the memory classifier of the evidence looks, in samples;
        ``"auto"``: a tenth of the median complete stay, at least 2.
    n_folds : int, default 5
        Cross-validation folds of the evidence (contiguous blocks assigned in turn).
    holdout : float, default 0.25
        Fraction at the end of every run used to judge the one-variable
        simplification of guards.
    simplify_tol : float, default 0.02
        Largest loss of balanced accuracy accepted for a one-variable guard.
    n_boot : int, default 40
        Block-bootstrap refits behind the standard errors of the printed guard numbers
        (:mod:`modemap.model.guard_spread`); 0 skips them.
    seed : int, default 0

    Attributes
    ----------
    guards_ : list of Guard
    kind_ : str
        The family used.
    family_evidence_ : dict
        What :func:`hysteresis_evidence` returned, plus ``family`` (the family used)
        and ``chosen_by`` (``"evidence"`` or ``"kind"`` when the family was set).
    significance_ : dict
        ``"i->j"`` -> ``{"kept": {term: wald ratio}, "dropped": {term: wald ratio}}``
        for every guard (ratios on the standardised term columns).
    stderr_ : dict
        ``"i->j"`` -> ``{"numbers": [...], "stderr": [...], "replicates": n}``: the
        printed numbers of the guard (a threshold; or the unit-normal weights of its terms
        then the offset) and their block-bootstrap standard errors; guards with too few
        usable replicates are left out.
    variables_ : list of str
    """

    _parameter_constraints: ClassVar[dict[str, list]] = {
        "kind": [Options(KINDS)],
        "degree": [Interval(int, 1, None)],
        "C": [Interval(float, 0, None, closed="neither")],
        "alpha": [Interval(float, 0, 1, closed="neither")],
        "hysteresis_margin": [Interval(float, 0, 1, closed="left")],
        "memory_lag": [Options(("auto",)), Interval(int, 1, None)],
        "n_folds": [Interval(int, 2, None)],
        "holdout": [Interval(float, 0, 1, closed="left")],
        "simplify_tol": [Interval(float, 0, None)],
        "n_boot": [Interval(int, 0, None)],
        "seed": [Interval(int, 0, 2**32 - 1)],
    }

    def __init__(
        self,
        *,
        kind: str = "auto",
        degree: int = 1,
        C: float = 1e3,
        alpha: float = 0.01,
        hysteresis_margin: float = 0.01,
        memory_lag: str | int = "auto",
        n_folds: int = 5,
        holdout: float = 0.25,
        simplify_tol: float = 0.02,
        n_boot: int = 40,
        seed: int = 0,
    ) -> None:
        self.kind = kind
        self.degree = degree
        self.C = C
        self.alpha = alpha
        self.hysteresis_margin = hysteresis_margin
        self.memory_lag = memory_lag
        self.n_folds = n_folds
        self.holdout = holdout
        self.simplify_tol = simplify_tol
        self.n_boot = n_boot
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
        self._units = dict(units or {})
        self._spans = {v: float(np.ptp(Z[:, i])) for i, v in enumerate(self._vars)}
        self._prepare(Z, labels, lengths)

        evidence = self._evidence(Z, labels, lengths)
        if self.kind == "auto":
            chosen = "per-source" if evidence["hysteresis"] else "memoryless"
        else:
            chosen = self.kind
        evidence["family"] = chosen
        evidence["chosen_by"] = "evidence" if self.kind == "auto" else "kind"

        # one-variable simplification judged on the held-out tails, then all samples
        train, test = _split_runs(lengths, self.holdout)
        self._choice_map: dict = {}
        self._fixed_terms: dict[tuple[int, int], set[str]] = {}
        self._significance: dict[tuple[int, int], dict] = {}
        if test.any():
            self._fit_kind(chosen, Z, labels, lengths, train, test)
            choices: dict | None = self._choice_map
        else:
            choices = None
        self._significance = {}
        guards = self._fit_kind(chosen, Z, labels, lengths, np.ones_like(train), None, choices)
        for g in guards:
            g.text = guard_text(g, self._units, self._spans)
        self.guards_ = guards
        self.kind_ = chosen
        self.family_evidence_ = evidence
        self.significance_ = {
            f"{g.source}->{g.target}": self._significance[(g.source, g.target)]
            for g in guards
            if (g.source, g.target) in self._significance
        }
        self.variables_ = list(self._vars)
        self.stderr_ = self._bootstrap(chosen, Z, labels, lengths)
        del self._Z, self._ok2
        return self

    def _prepare(self, Z: np.ndarray, labels: np.ndarray, lengths: Sequence[int]) -> None:
        """The working values every surface fit reads: the rows, the previous regime of
        each sample, which switches were seen, and which samples have two predecessors."""
        self._Z = Z
        prev, cur = _pairs(labels, lengths)
        k = int(labels.max()) + 1 if labels.size else 0
        self._transitions = np.zeros((max(k, 1), max(k, 1)), dtype=bool)
        moved = labels[prev] != labels[cur]
        self._transitions[labels[prev][moved], labels[cur][moved]] = True
        self._prev = np.full(labels.size, -2, dtype=np.int64)
        self._prev[cur] = labels[prev]
        self._ok2 = position_in_run(lengths) >= 2

    def _bootstrap(self, kind: str, Z, labels, lengths) -> dict[str, dict]:
        """Block-bootstrap standard errors of the printed guard numbers (``stderr_``)."""
        if self.n_boot == 0 or not self.guards_:
            return {}
        blocks = block_indices(labels, lengths)
        rng = np.random.default_rng(self.seed)
        choices = dict(self._choice_map)  # the structure of every guard, held fixed
        self._fixed_terms = {
            (g.source, g.target): {t for t, w in zip(g.terms, g.weights, strict=True) if w}
            for g in self.guards_
        }
        for i, j in list(self._fixed_terms):  # memoryless pairs: one surface both ways
            self._fixed_terms.setdefault((j, i), self._fixed_terms[(i, j)])
        kept = self._significance
        one = {(g.source, g.target): threshold_of(g, self._vars) is not None for g in self.guards_}
        reps: dict[tuple[int, int], list[np.ndarray]] = {k: [] for k in one}
        final = {(g.source, g.target): g for g in self.guards_}
        for _ in range(int(self.n_boot)):
            picks = rng.integers(0, len(blocks), len(blocks))
            idx = np.concatenate([blocks[i] for i in picks])
            lens = [blocks[i].size for i in picks]
            self._prepare(Z[idx], labels[idx], lens)
            ones = np.ones(idx.size, dtype=bool)
            for g in self._fit_kind(kind, Z[idx], labels[idx], lens, ones, None, choices):
                key = (g.source, g.target)
                if key in final:
                    reps[key].append(printed_numbers(final[key], g, one[key]))
        self._prepare(Z, labels, lengths)
        self._significance, self._fixed_terms = kept, {}
        out = {}
        for key, g in final.items():
            se = spread(reps[key])
            if se is not None:
                numbers = printed_numbers(g, g, one[key]).tolist()
                out[f"{key[0]}->{key[1]}"] = {
                    "numbers": numbers,
                    "stderr": se,
                    "replicates": len(reps[key]),
                }
        return out

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

    def _evidence(self, Z, labels, lengths) -> dict[str, Any]:
        assigned = labels >= 0
        if not assigned.any():
            feats = np.zeros((labels.size, 0))
        else:
            f = _Features(self._vars, int(self.degree)).fit(Z[assigned])
            feats = f(Z)
        lag = None if self.memory_lag == "auto" else int(self.memory_lag)
        return hysteresis_evidence(
            feats,
            labels,
            lengths,
            lag=lag,
            n_folds=int(self.n_folds),
            margin=float(self.hysteresis_margin),
            alpha=float(self.alpha),
            C=float(self.C),
            seed=int(self.seed),
        )

    def _fit_kind(self, kind, Z, labels, lengths, train, test, choices=None) -> list[Guard]:
        prev, cur = _pairs(labels, lengths)
        use = train[prev] & train[cur]
        held = None if test is None else (test[prev] & test[cur])
        if kind == "per-source":
            groups = self._per_source_groups(labels, prev, cur)
        else:
            groups = self._memoryless_groups(labels)
        guards: list[Guard] = []
        for key, (rows, y, pairs) in groups.items():
            tr = rows[use[pairs]] if pairs is not None else rows[train[rows]]
            ytr = y[use[pairs]] if pairs is not None else y[train[rows]]
            if held is not None:
                ho = rows[held[pairs]] if pairs is not None else rows[test[rows]]
                yho = y[held[pairs]] if pairs is not None else y[test[rows]]
            else:
                ho, yho = rows[:0], y[:0]
            guards += self._guards_for(kind, key, Z, tr, ytr, ho, yho, choices)
        return guards

    def _per_source_groups(self, labels, prev, cur):
        """(source, target) -> (feature rows, switched?, pair index)."""
        out = {}
        for src in np.unique(labels[prev]):
            sel_src = labels[prev] == src
            for tgt in np.unique(labels[cur][sel_src]):
                if tgt == src:
                    continue
                sel = np.flatnonzero(sel_src & np.isin(labels[cur], [src, tgt]))
                out[(int(src), int(tgt))] = (cur[sel], labels[cur[sel]] == tgt, sel)
        return out

    def _memoryless_groups(self, labels):
        """(i, j), i < j with a switch seen between them -> (rows, in j?, None)."""
        out = {}
        obs = self._transitions
        for i in range(obs.shape[0]):
            for j in range(i + 1, obs.shape[0]):
                if obs[i, j] or obs[j, i]:
                    rows = np.flatnonzero((labels == i) | (labels == j))
                    out[(i, j)] = (rows, labels[rows] == j, None)
        return out

    def _surface(self, kind, key, Z, tr, ytr) -> tuple[_Features, np.ndarray, float, dict] | None:
        """Logistic surface on the significant terms: features, standardised weights (zero
        where dropped), intercept and the Wald ratios kept / dropped.

        Memoryless: a plain (unweighted) logistic regression, whose boundary is where the
        two regimes are equally likely.  Per-source: switches are rare, so each class is
        weighted to the size of the smaller one (a balanced case-control sample of the
        switches, "Logistic regression in rare events data", King and Zeng, Political
        Analysis 9, 2001, doi:10.1093/oxfordjournals.pan.a004868): the boundary is not
        swamped by the "stay" samples, and the tests see the information the switches
        carry, not that of every sample.  The ridge is scaled with the total weight, so
        the estimate is that of the class-balanced fit with ``C`` per sample.
        """
        if ytr.all() or not ytr.any():
            return None
        feats = _Features(self._vars, int(self.degree)).fit(Z[tr])
        keep, weight = _thin(ytr.astype(np.int64), _MAX_ROWS_PER_CLASS)
        X, y = feats(Z[tr[keep]]), ytr[keep].astype(float)
        C = float(self.C)
        if kind == "per-source":
            n_class = np.array([np.sum(weight[y == c]) for c in (0.0, 1.0)])
            weight = weight * n_class.min() / n_class[y.astype(np.int64)]
            C *= n_class.sum() / (2.0 * n_class.min())
        fixed = self._fixed_terms.get(key)
        if fixed is None:
            active, fit, dropped = _prune(X, y, weight, C, float(self.alpha))
        else:  # the bootstrap refits the terms the guard has
            active = np.isin(feats.terms, list(fixed))
            fit, dropped = fit_logistic(X[:, active], y, C=C, sample_weight=weight), {}
        w = np.zeros(X.shape[1])
        w[active] = fit.coef
        record = {
            "kept": {
                feats.terms[c]: float(z)
                for c, z in zip(np.flatnonzero(active), fit.wald, strict=True)
            },
            "dropped": {feats.terms[c]: z for c, z in dropped.items()},
        }
        return feats, w, fit.intercept, record

    def _guards_for(self, kind, key, Z, tr, ytr, ho, yho, choices) -> list[Guard]:
        surface = self._surface(kind, key, Z, tr, ytr)
        if surface is None:
            return []
        feats, w_std, b_std, record = surface
        w, off = feats.to_raw(w_std, b_std)
        i, j = key
        full = Guard(source=i, target=j, terms=list(feats.terms), weights=w, offset=off)
        if kind == "per-source":
            events = tr[ytr]
            ok2 = self._prev[events - 1] == i
            full = _recentre(full, self._vars, Z, events, ok2)
        full, record["override"] = self._overrides(full, tr, ytr)
        if kind == "per-source":
            g = self._simplify(full, kind, (tr, ytr), (ho, yho), choices, (events, ok2))
            self._significance[(i, j)] = record
            return [g]
        # memoryless: one surface per pair, each direction only where a switch was seen
        g = self._simplify(full, kind, (tr, ytr), (ho, yho), choices, (None, None))
        out = []
        if self._transitions[i, j]:
            out.append(g)
            self._significance[(i, j)] = record
        if self._transitions[j, i]:
            back = Guard(j, i, list(g.terms), -np.asarray(g.weights, dtype=float), -g.offset)
            out.append(back)
            turned = {"forces": "blocks", "blocks": "forces"}
            self._significance[(j, i)] = {
                **record,
                "override": {
                    t: ", ".join(
                        turned[part.split(" ", 1)[0]] + " " + part.split(" ", 1)[1]
                        for part in v.split(", ")
                    )
                    for t, v in record["override"].items()
                },
            }
        return out

    def _overrides(self, guard: Guard, rows: np.ndarray, y: np.ndarray) -> tuple[Guard, dict]:
        """Two-valued terms whose one value is seen only with the switch (or only without).

        At such a value (a load-shed flag at 1, a gate) the maximum-likelihood weight of
        the term is infinite ("On the existence of maximum likelihood estimates in logistic
        regression models", Albert and Anderson, Biometrika 71, 1984,
        doi:10.1093/biomet/71.1.1): raising it makes those samples certain without
        changing the others.  The ridge keeps the fitted weight finite, just large enough
        for the values of the other terms seen with it, so the guard would stop forcing
        (or blocking) the switch a little beyond them.  The weight is therefore raised,
        with the offset moved so the guard is unchanged at the other value, until at that
        value the guard is at least 1 (forces) or at most -1 (blocks) everywhere in the box
        of the data.  Returns the guard and ``{term: "forces at v" | "blocks at v"}`` (both,
        comma-separated, when each value is seen with one class only: a gate).
        """
        lib = TermLibrary.from_terms(guard.terms, self._vars)
        T = lib.transform(self._Z[rows])
        box = lib.transform(self._Z)
        lo, hi = box.min(axis=0), box.max(axis=0)
        w = np.asarray(guard.weights, dtype=float).copy()
        off = float(guard.offset)
        found: dict[str, list[str]] = {}
        for t in np.flatnonzero(w != 0):
            values = np.unique(T[:, t])
            if values.size != 2:
                continue
            for b_val, a_val in ((values[1], values[0]), (values[0], values[1])):
                seen = y[T[:, t] == b_val]
                if seen.all():
                    sign = 1.0
                elif not seen.any():
                    sign = -1.0
                else:
                    continue
                others = np.arange(w.size) != t
                wo = w[others]
                low = np.where(wo > 0, wo * lo[others], wo * hi[others]).sum()
                high = np.where(wo > 0, wo * hi[others], wo * lo[others]).sum()
                worst = (low if sign > 0 else high) + w[t] * b_val + off
                if sign * worst < 1.0:
                    delta = (sign - worst) / (b_val - a_val)
                    w[t] += delta
                    off -= delta * a_val
                word = "forces" if sign > 0 else "blocks"
                name = guard.terms[t]
                found.setdefault(name, []).append(f"{word} at {b_val:.6g}")
        if not found:
            return guard, {}
        text = {name: ", ".join(parts) for name, parts in found.items()}
        return Guard(guard.source, guard.target, list(guard.terms), w, off), text

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
            if kind == "memoryless":
                thr, sign = self._logistic_threshold(self._Z[tr, v], ytr)
            else:  # the location is set by the crossings (re-centred below)
                thr, sign, _ = _threshold(self._Z[tr, v], ytr)
            sd = float(np.std(self._Z[tr, v])) or 1.0
            w = np.zeros(len(self._vars))
            w[v] = sign / sd
            terms = [quote_name(v) for v in self._vars]
            g = Guard(full.source, full.target, terms, w, -sign * thr / sd)
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

    def _logistic_threshold(self, v: np.ndarray, y: np.ndarray) -> tuple[float, int]:
        """Threshold and direction of a one-variable memoryless guard.

        Where the two regimes overlap (noise blurs the boundary) the threshold is where a
        one-variable logistic regression finds them equally likely; the best balanced
        accuracy would weigh the smaller regime up and move the cut into the larger one.
        Where they do not overlap (a gate), the middle of the gap between them.
        """
        thr, sign, score = _threshold(v, y)
        if score >= 1.0:
            return thr, sign
        keep, weight = _thin(y.astype(np.int64), _MAX_ROWS_PER_CLASS)
        mu, sd = float(v.mean()), float(v.std()) or 1.0
        fit = fit_logistic(((v[keep] - mu) / sd)[:, None], y[keep], C=self.C, sample_weight=weight)
        coef = float(fit.coef[0])
        if coef == 0.0:
            return thr, sign
        return mu - sd * fit.intercept / coef, 1 if coef > 0 else -1

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
