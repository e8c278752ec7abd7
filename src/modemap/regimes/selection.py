"""Choice of model: how many regimes, and which library of candidate terms.

Every candidate is a number of regimes ``K`` and a library order ``d`` (one of the local
model's :meth:`~modemap.fit.local_model.LocalModel.candidate_degrees`), fitted by the
refinement.  All candidates are scored on the same rows and the same targets with the same
noise model:

* **targets** (:class:`Windows`): continuous form, the increments of the measured states
  over non-overlapping windows of ``h`` sample intervals, against the trapezoid integrals of
  the terms over the same window (the integral form of the model: no derivative estimate,
  so neither a smoothing window's bias nor its smearing across a switch); discrete form,
  the next samples against the terms at the sample;
* **each regime refitted on the windows**: the candidate brings its labels and library;
  the coefficients (and, for a sparse model, the terms) are those the common targets give;
* **likelihood**: the marginal likelihood of a Markov-switching model, every regime path
  counted (:func:`~modemap.regimes.viterbi.forward_backward`; the switching model of "A new
  approach to the economic analysis of nonstationary time series and the business cycle",
  Econometrica 57(2), 1989, DOI 10.2307/1912559), Gaussian residuals with the refinement's
  noise model (one covariance shared by the regimes in continuous form, one per regime in
  discrete form), transition probabilities from the candidate's counts of consecutive
  windows with the sticky prior (a window that holds a switch has no regime, so the switch
  itself is not counted and costs what the prior allows: docs/method.md, limit (5)).  When a
  classifier of the variables predicts the switches better than the constant chain by more
  than its parameters cost (BIC on the windows), the chain's transitions are gated by it
  (:func:`~modemap.regimes.viterbi.forward_gated`): regimes selected by where the state
  sits are then not charged for switches that the state explains.  Two gates are tried, the
  better after its parameters kept: one classifier shared by every source regime (a
  surface), and one per source regime (:func:`_source_gates`: where a relay switches
  depends on the regime it leaves);
* **windows that hold a switch** (their samples' labels disagree; in discrete form the
  sample interval that holds the switch) carry no emission (the same for every regime), and
  the log-likelihood is scaled up to all windows by the share scored, so that no candidate
  gains by giving the mixed windows a regime of their own;
* **serial correlation**: slowly varying model error makes neighbouring residuals alike,
  and a likelihood that counts every window as independent overstates the evidence.  The
  log-likelihood is divided by the residuals' integrated autocorrelation time
  ``tau = 1 + 2 sum_k rho_k``, summed as Geyer's initial positive sequence (the sums of
  adjacent pairs ``rho_2k + rho_2k+1`` while they stay positive: "Practical Markov chain
  Monte Carlo", Statistical Science 7(4), 1992, DOI 10.1214/ss/1177011137), estimated
  once, on the whitened residuals of the candidate that fits best, so every candidate is
  judged on one scale; ``n / tau`` is the effective number of windows.

The criterion is then

    C = -2 loglik / tau + n_params ln(n / tau)

(the Bayesian information criterion of "Estimating the dimension of a model", Annals of
Statistics 6(2), 1978, DOI 10.1214/aos/1176344136, on the effective sample), with the
parameters counted honestly: every nonzero coefficient of every regime and state, the
residual covariances (``m (m + 1) / 2`` once, or per regime), ``K (K - 1)`` transition and
``K - 1`` initial probabilities, and those of the gate and of optional emission terms.  The
lowest ``C`` wins, the fewer parameters on a tie.  A candidate whose refinement lost regimes
(it asked for ``K`` and kept fewer) is shown as collapsed and never chosen.

**Distinct regimes.**  A regime is its equations: two regimes whose models the data cannot
tell apart are one regime, however much the chain gains by telling their stretches apart (a
region of a piecewise-affine field entered from two sides can be split in two copies whose
only difference is where each goes next).  With a noise covariance shared by the regimes
(so that regimes differ by their dynamics alone), every pair of regimes is compared by a
Wald test of the difference of their window fits' coefficients, over the union of their
terms and every state, with each fit's least-squares covariance scaled by the
autocorrelation time (:func:`distinct_regimes`).  A pair whose difference is not
significant at the 1 % level (:data:`DISTINCT_LEVEL`, the level the guards' terms are
tested at) counts as one regime, and a candidate with fewer distinct regimes than ``K`` is
shown as collapsed, with ``n_regimes`` its distinct regimes.  With one covariance per regime
(discrete form) regimes may differ in their noise alone, and no pair is merged.
"""

from __future__ import annotations

import dataclasses
from dataclasses import dataclass, field
from typing import Any

import numpy as np
import pandas as pd
from scipy.sparse import coo_matrix
from scipy.sparse.csgraph import connected_components
from scipy.special import log_softmax
from scipy.stats import chi2

from modemap.fit.statistics import GramStats
from modemap.regimes.likelihood import SurfaceTerm, pair_counts, transition_model
from modemap.regimes.refine import RefineResult
from modemap.regimes.rows import Rows
from modemap.regimes.viterbi import forward_backward, forward_gated

__all__ = [
    "Candidate",
    "Windows",
    "autocorrelation_time",
    "choose",
    "count_parameters",
    "distinct_regimes",
    "information_criterion",
    "library_criteria",
    "score",
]

#: Lags the autocorrelation time sums at most, as a share of the shortest run's rows.
_MAX_LAG_SHARE = 0.25

#: Log-probability of a regime never seen after a source regime, under that source's gate.
_IMPOSSIBLE_GATE = -30.0

#: Two regimes count as one when a Wald test cannot tell their models apart at this level
#: (the module notes; the level of the guards' term tests, common practice).
DISTINCT_LEVEL = 0.01


@dataclass
class Candidate:
    """One candidate model: ``k`` regimes asked for, a library order, its fit and score.

    Attributes
    ----------
    k : int
        Regimes the search asked for.
    degree : int or None
        Library order (None: a library given term by term).
    local : BoundLocalModel
        The local model at that library.
    result : RefineResult
        The fit (labels, regime models, chain).
    loglik : float
        Marginal log-likelihood of the common targets, scaled to all rows.
    n_params : int
    scored : int
        Rows whose emissions were scored (the others are next to a switch).
    residuals : ndarray of shape (n, m)
        Each row's residual under its own regime (whitened), for the autocorrelation time.
    posteriors : ndarray of shape (n, K)
        Each row's regime probabilities given all the data of its run.
    """

    k: int
    degree: int | None
    local: Any
    result: RefineResult
    loglik: float = float("nan")
    n_params: int = 0
    scored: int = 0
    residuals: np.ndarray | None = field(default=None, repr=False)
    posteriors: np.ndarray | None = field(default=None, repr=False)
    wald: list[tuple[int, int, float, int]] = field(default_factory=list, repr=False)

    @property
    def collapsed(self) -> bool:
        """The refinement kept fewer regimes than asked for."""
        return self.result.n_regimes < self.k


def count_parameters(result: RefineResult, n_targets: int, extra: int = 0) -> int:
    """Nonzero coefficients + covariance entries + transition and initial probabilities
    (+ ``extra``, the parameters of optional emission terms)."""
    k = result.n_regimes
    coefs = sum(int(np.count_nonzero(f.coef)) for f in result.fits)
    n_cov = 1 if result.covariance == "tied" else k
    cov = n_targets * (n_targets + 1) // 2
    location = (k * n_targets + n_cov * cov) if result.location_weight else 0
    return coefs + n_cov * cov + location + k * (k - 1) + (k - 1) + int(extra)


def information_criterion(
    loglik: float, n_params: int, n_samples: float, tau: float = 1.0
) -> float:
    """``-2 loglik / tau + n_params ln(n / tau)``: BIC on the effective number of rows."""
    tau = max(float(tau), 1.0)
    return -2.0 * loglik / tau + n_params * np.log(max(n_samples / tau, 1.0))


class Windows:
    """The common targets every candidate is scored on: the increments of the states over
    windows of ``h`` sample intervals, never across runs.

    Continuous form: window ``[s, s + h]`` has the target ``(x(t_s+h) - x(t_s)) / (t_s+h - t_s)``
    and, for a library of terms, the regressors ``integral of Theta dt / (t_s+h - t_s)`` by
    the trapezoidal rule over its intervals (stepped inputs held over each interval, see
    :func:`modemap.regimes.integral.right_ends`): the integral form of the model, which
    needs no derivative, so the targets carry neither a smoothing window's bias nor its
    smearing across switches.  Discrete form: ``h = 1``, the target is the next sample and
    the regressors the terms at the sample.  A window belongs to a regime when the labels of
    all its samples agree; the others hold a switch.

    Parameters
    ----------
    rows : Rows
        The regression rows (their variables, time and run lengths).
    states : ndarray of shape (n, m)
        Continuous form: the measured states of the rows; discrete form: the next samples.
    h : int
        Sample intervals per window (1 in discrete form).
    integral : bool
        Continuous form (True) or discrete form.
    """

    def __init__(self, rows: Rows, states: np.ndarray, h: int, integral: bool) -> None:
        self.rows, self.h, self.integral = rows, max(1, int(h)), bool(integral)
        starts, counts = [], []
        offset = 0
        span = self.h if self.integral else 1
        for length in rows.lengths:
            length = int(length)
            last = length - 1 - span if self.integral else length - 1  # the last start
            s = np.arange(offset, offset + last + 1, span) if last >= 0 else np.zeros(0, int)
            starts.append(s)
            counts.append(s.size)
            offset += length
        self.start = np.concatenate(starts).astype(np.int64) if starts else np.zeros(0, int)
        self.lengths = np.asarray(counts, dtype=np.int64)
        if self.integral:
            stop = self.start + self.h
            duration = np.asarray(rows.time)[stop] - np.asarray(rows.time)[self.start]
            self.duration = np.where(duration > 0, duration, np.nan)[:, None]
            self.target = (states[stop] - states[self.start]) / self.duration
        else:
            self.target = np.asarray(states, dtype=np.float64)[self.start]
        self._cache: dict[tuple, np.ndarray] = {}

    @classmethod
    def common(cls, rows: Rows, form: str, derivative: dict[str, Any]) -> Windows:
        """The windows the candidates of one fit are scored on.

        Continuous form: windows of a third of the derivative's smoothing window
        (``derivative["window"]``, the noise sets both), at least one interval; discrete
        form: the rows, against their next samples.
        """
        if form == "discrete":
            return cls(rows, rows.Y, 1, integral=False)
        h = max(1, int(derivative.get("window", 3) or 3) // 3)
        return cls(rows, rows.Z[:, : rows.n_states], h, integral=True)

    @property
    def n_windows(self) -> int:
        return int(self.start.size)

    @property
    def variables(self) -> np.ndarray:
        """The states and inputs at the start of every window."""
        return self.rows.Z[self.start]

    def regressors(self, library: Any) -> np.ndarray:
        """The regressors of every window for ``library`` (kept for the next call)."""
        key = (tuple(library.variables_), tuple(library.terms_))
        if key not in self._cache:
            self._cache[key] = self._regressors(library)
        return self._cache[key]

    def _regressors(self, library: Any) -> np.ndarray:
        Z = self.rows.Z
        theta = library.transform(Z)
        if not self.integral:
            return theta[self.start]
        from modemap.regimes.integral import right_ends

        right = library.transform(right_ends(Z, self.rows.n_states, self.rows.lengths))
        dt = np.zeros(Z.shape[0])
        dt[:-1] = np.diff(np.asarray(self.rows.time, dtype=np.float64))
        piece = 0.5 * (theta + right) * dt[:, None]
        cum = np.vstack([np.zeros(piece.shape[1]), np.cumsum(piece, axis=0)])
        return (cum[self.start + self.h] - cum[self.start]) / self.duration

    def labels(self, row_labels: np.ndarray) -> np.ndarray:
        """Each window's regime: that of its samples when they all agree, else -1."""
        row_labels = np.asarray(row_labels, dtype=np.int64)
        span = self.h if self.integral else 1
        first = row_labels[self.start]
        same = np.ones(self.start.size, dtype=bool)
        for j in range(1, span + 1):
            idx = np.minimum(self.start + j, row_labels.size - 1)
            same &= row_labels[idx] == first
        if not self.integral:  # the row's interval: its next sample in the same run
            run_end = np.cumsum(self.rows.lengths) - 1
            same |= np.isin(self.start, run_end)
        return np.where(same & (first >= 0), first, -1)


def score(
    candidate: Candidate,
    windows: Windows,
    *,
    sticky: float,
) -> Candidate:
    """Score ``candidate`` on the common targets (see the module notes), in place.

    Parameters
    ----------
    candidate : Candidate
    windows : Windows
        The common targets.
    sticky : float
        Self-transition weight of the chain's prior (as in the refinement).

    Returns
    -------
    Candidate
        The same object, with ``loglik``, ``n_params``, ``scored``, ``residuals`` and
        ``posteriors`` (per window) set.
    """
    result = candidate.result
    k = result.n_regimes
    G = windows.regressors(candidate.local.library)
    target = windows.target
    labels = windows.labels(result.labels)
    scored = labels >= 0
    m = target.shape[1]
    fits = _window_fits(candidate, G, target, labels)
    coefs = [np.asarray(f.coef) for f in fits]
    resid = np.zeros_like(target)
    for j, c in enumerate(coefs):
        sel = labels == j
        resid[sel] = target[sel] - G[sel] @ c
    # the noise model of the refinement: one covariance per regime ("full", regimes may
    # differ in their noise as in their dynamics) or one shared ("tied", they differ only
    # in their dynamics; a change of noise level alone is then no reason for a regime)
    floor = np.diag(1e-9 * np.atleast_1d(np.var(target, axis=0)) + 1e-300)
    pooled = np.cov(resid[scored].T, bias=True).reshape(m, m) if scored.sum() > 1 else np.eye(m)
    per_regime = result.covariance == "full"
    log_em = np.empty((labels.size, k))
    white = np.full_like(resid, np.nan)
    for j, c in enumerate(coefs):
        own = labels == j
        enough = per_regime and own.sum() > m + 1
        cov = np.cov(resid[own].T, bias=True).reshape(m, m) if enough else pooled
        chol = np.linalg.cholesky(cov + floor)
        const = -np.log(np.diag(chol)).sum() - 0.5 * m * np.log(2 * np.pi)
        w = np.linalg.solve(chol, (target - G @ c).T).T
        log_em[:, j] = const - 0.5 * np.einsum("ij,ij->i", w, w)
        white[own] = w[own]
    log_em[~scored] = 0.0
    lengths = windows.lengths
    log_start, log_trans = transition_model(
        labels, lengths, k, sticky, counts=pair_counts(labels, lengths, k)
    )
    loglik, posteriors = forward_backward(log_em, lengths, log_start, log_trans)
    n_gate = 0
    z = windows.variables
    gates = []
    shared = SurfaceTerm.fit(z, m, labels, k, C=1000) if k > 1 else None
    if shared is not None:  # switches predicted by where the variables are (module notes)
        gates.append((shared.log_prob(z, m), (k - 1) * (z.shape[1] + 1)))
        per_source = _source_gates(z, labels, lengths, k)
        if per_source is not None:
            gates.append(per_source)
    penalty = 0.5 * np.log(max(labels.size, 2))
    for log_gate, extra in gates:  # the best chain after its gate's parameters
        gated = forward_gated(log_em, lengths, log_trans, log_gate)
        if gated - penalty * extra > loglik - penalty * n_gate:
            loglik, n_gate = gated, extra
    share = max(int(scored.sum()), 1) / max(labels.size, 1)
    candidate.loglik = float(loglik / share)
    candidate.n_params = count_parameters(dataclasses.replace(result, fits=fits), m, n_gate)
    candidate.scored = int(scored.sum())
    candidate.residuals = white
    candidate.posteriors = posteriors
    if result.covariance == "tied":
        candidate.wald = _wald_pairs(coefs, G, target, labels)
    return candidate


def _source_gates(
    z: np.ndarray, labels: np.ndarray, lengths: np.ndarray, k: int
) -> tuple[np.ndarray, int] | None:
    """Log-probabilities ``[t, i, j]`` of regime ``j`` at window ``t`` given the variables and
    the regime ``i`` it comes from, one classifier per source regime, and their parameters.

    For each source ``i``: a multinomial logistic regression (scikit-learn's, ``C = 1000`` on
    standardised variables, as the shared gate) of the regime of the windows whose last
    assigned window before them in the run was in ``i``.  A source never left in the labels
    gets no classifier (even probabilities: the chain alone decides there).  None when no
    source has two regimes after it.
    """
    from sklearn.linear_model import LogisticRegression

    n, p = z.shape
    lengths = np.asarray(lengths, dtype=np.int64)
    run_start = np.repeat(np.cumsum(lengths) - lengths, lengths)
    # the last window before each one, in its run, whose regime is assigned
    last = np.maximum.accumulate(np.where(labels >= 0, np.arange(n), -1))
    before = np.r_[-1, last[:-1]]
    previous = np.where(before >= run_start, labels[np.maximum(before, 0)], -1)
    mean, scale = z.mean(axis=0), z.std(axis=0)
    x = (z - mean) / np.where(scale > 0, scale, 1.0)
    log_gate = np.full((n, k, k), -np.log(k))
    extra = 0
    for i in range(k):
        rows = np.flatnonzero((previous == i) & (labels >= 0))
        present = np.unique(labels[rows])
        if present.size < 2:
            continue
        clf = LogisticRegression(C=1000.0, max_iter=500).fit(x[rows], labels[rows])
        decision = clf.decision_function(x)
        if decision.ndim == 1:  # binary: the log-odds of classes_[1]
            decision = np.column_stack([np.zeros(n), decision])
        scores = np.full((n, k), _IMPOSSIBLE_GATE)
        scores[:, clf.classes_] = log_softmax(decision, axis=1)
        log_gate[:, i, :] = scores
        extra += (present.size - 1) * (p + 1)
    return (log_gate, extra) if extra else None


def _wald_pairs(
    coefs: list[np.ndarray], G: np.ndarray, target: np.ndarray, labels: np.ndarray
) -> list[tuple[int, int, float, int]]:
    """``(a, b, W, dof)`` for every pair of regimes: the Wald statistic of the difference of
    their coefficients over the union of their terms and every state, each regime's
    least-squares covariance from its own windows (a pair either of whose regimes has too
    few windows for its terms is left out)."""
    m = target.shape[1]
    covs: list[list[np.ndarray] | None] = []
    for j, coef in enumerate(coefs):
        sel = labels == j
        Gj = G[sel]  # the regime's windows, its residuals and normal matrix once
        rss = ((target[sel] - Gj @ coef) ** 2).sum(axis=0)
        gram = Gj.T @ Gj
        per_state: list[np.ndarray] | None = []
        for s in range(m):
            support = np.flatnonzero(coef[:, s] != 0)
            V = np.zeros((coef.shape[0], coef.shape[0]))
            if support.size:
                if Gj.shape[0] <= support.size + 1:
                    per_state = None
                    break
                sigma2 = float(rss[s]) / (Gj.shape[0] - support.size)
                block = np.ix_(support, support)
                V[block] = sigma2 * np.linalg.pinv(gram[block])
            per_state.append(V)
        covs.append(per_state)
    out = []
    for a in range(len(coefs)):
        for b in range(a + 1, len(coefs)):
            if covs[a] is None or covs[b] is None:
                continue
            W, dof = 0.0, 0
            for s in range(m):
                union = np.flatnonzero((coefs[a][:, s] != 0) | (coefs[b][:, s] != 0))
                if not union.size:
                    continue
                V = covs[a][s][np.ix_(union, union)] + covs[b][s][np.ix_(union, union)]
                d = (coefs[a][:, s] - coefs[b][:, s])[union]
                W += float(d @ np.linalg.pinv(V) @ d)
                dof += int(union.size)
            if dof:
                out.append((a, b, W, dof))
    return out


def distinct_regimes(candidate: Candidate, tau: float = 1.0) -> int:
    """The candidate's regimes that a Wald test tells apart (module notes): regimes joined
    by a pair whose difference is not significant at :data:`DISTINCT_LEVEL`, with each
    statistic divided by the autocorrelation time ``tau``, count as one."""
    k = candidate.result.n_regimes
    same = [
        (a, b)
        for a, b, W, dof in candidate.wald
        if chi2.sf(W / max(float(tau), 1.0), dof) > DISTINCT_LEVEL
    ]
    if not same:
        return k
    a, b = np.array(same).T
    joined = coo_matrix((np.ones(a.size), (a, b)), shape=(k, k))
    return int(connected_components(joined, directed=False)[0])


def library_criteria(locals_: list[Any], windows: Windows) -> list[float]:
    """The criterion of one regime at each of several library orders (lower is better).

    Each bound local model is fitted on the windows' common targets (:class:`Windows`) and
    scored like a one-regime candidate: Gaussian log-likelihood with its maximum-likelihood
    covariance, divided by the residuals' autocorrelation time, and the nonzero
    coefficients plus the covariance counted on the effective number of windows.
    """
    target = windows.target
    m, n = target.shape[1], windows.n_windows
    out, residuals, fits = [], [], []
    for local in locals_:
        G = windows.regressors(local.library)
        fit = local.fit(_statistics(local, G, target))
        r = target - G @ np.asarray(fit.coef)
        cov = np.cov(r.T, bias=True).reshape(m, m) + np.diag(1e-9 * np.var(target, 0) + 1e-300)
        chol = np.linalg.cholesky(cov)
        loglik = -0.5 * n * (2.0 * np.log(np.diag(chol)).sum() + m * (1 + np.log(2 * np.pi)))
        residuals.append(np.linalg.solve(chol, r.T).T)
        fits.append((loglik, int(np.count_nonzero(fit.coef)) + m * (m + 1) // 2))
    best = int(np.argmax([f[0] for f in fits]))
    tau = autocorrelation_time(residuals[best], windows.lengths)
    for loglik, k in fits:
        out.append(information_criterion(loglik, k, n, tau))
    return out


def _window_fits(
    candidate: Candidate, G: np.ndarray, target: np.ndarray, labels: np.ndarray
) -> list[Any]:
    """Each regime's model fitted on its windows with the candidate's local model (terms
    chosen again on them): the candidate judged by its labels and library, with the
    coefficients the common targets give.  A regime with too few windows keeps its fit."""
    out = []
    for j, fit in enumerate(candidate.result.fits):
        sel = labels == j
        if sel.sum() <= G.shape[1]:
            out.append(fit)
            continue
        out.append(candidate.local.fit(_statistics(candidate.local, G[sel], target[sel])))
    return out


def _statistics(local: Any, G: np.ndarray, target: np.ndarray) -> GramStats | list[GramStats]:
    """The windows' statistics, in five contiguous blocks for a model that chooses its
    threshold by cross-validation."""
    spec = local.spec
    if getattr(spec, "criterion", None) == "cv" and getattr(spec, "threshold", 0) == "auto":
        parts = np.array_split(np.arange(G.shape[0]), 5)
        return [GramStats.from_arrays(G[i], target[i]) for i in parts]
    return GramStats.from_arrays(G, target)


def autocorrelation_time(residuals: np.ndarray, lengths: np.ndarray) -> float:
    """Integrated autocorrelation time of residuals (n, m) over runs, averaged over columns.

    Missing rows (NaN) are set to zero after centring.  ``tau = -1 + 2 sum_k Gamma_k`` with
    ``Gamma_k = rho_2k + rho_2k+1`` summed while they stay positive (Geyer's initial positive
    sequence, see the module notes), lags at most a quarter of the shortest run; never below
    1.  Summing pairs matters here: the increments of consecutive windows share an end
    sample, so measurement noise alone gives ``rho_1 = -1/2``, and a sum stopped at the
    first negative estimate would never reach the positive correlation of model error at
    longer lags.
    """
    r = np.asarray(residuals, dtype=np.float64)
    r = r[:, None] if r.ndim == 1 else r
    lengths = np.asarray(lengths, dtype=np.int64)
    if r.shape[0] < 4 or lengths.size == 0:
        return 1.0
    max_lag = max(1, int(_MAX_LAG_SHARE * max(int(lengths.min()), 4)))
    taus = []
    for j in range(r.shape[1]):
        col = r[:, j]
        ok = np.isfinite(col)
        if ok.sum() < 4:
            continue
        x = np.where(ok, col - col[ok].mean(), 0.0)
        acf = _acf(x, lengths, max_lag)
        if acf[0] <= 0:
            continue
        rho = acf / acf[0]
        if rho.size % 2:  # lags 0..max_lag in pairs (2k, 2k + 1)
            rho = rho[:-1]
        pairs = rho.reshape(-1, 2).sum(axis=1)
        stop = np.flatnonzero(pairs <= 0)
        pairs = pairs[: stop[0]] if stop.size else pairs
        taus.append(-1.0 + 2.0 * float(pairs.sum()))
    return max(1.0, float(np.mean(taus))) if taus else 1.0


def _acf(x: np.ndarray, lengths: np.ndarray, max_lag: int) -> np.ndarray:
    """Sums of lagged products within runs, lags 0..max_lag (FFT per run)."""
    out = np.zeros(max_lag + 1)
    offset = 0
    for length in lengths:
        seg = x[offset : offset + int(length)]
        offset += int(length)
        if seg.size < 2:
            out[0] += float(seg @ seg)
            continue
        size = 1 << int(np.ceil(np.log2(2 * seg.size)))
        f = np.fft.rfft(seg, size)
        acov = np.fft.irfft(f * np.conj(f), size)[: min(max_lag + 1, seg.size)]
        out[: acov.size] += acov
    return out


def choose(candidates: list[Candidate], windows: Windows) -> tuple[pd.DataFrame, Candidate, float]:
    """The selection table, the chosen candidate and the autocorrelation time used.

    The autocorrelation time is that of the best-fitting candidate's residuals (the highest
    log-likelihood among those that did not collapse); see the module notes.
    """
    live = [c for c in candidates if not c.collapsed] or candidates
    best_fit = max(live, key=lambda c: c.loglik)
    tau = autocorrelation_time(best_fit.residuals, windows.lengths)
    n = windows.n_windows
    distinct = [distinct_regimes(c, tau) for c in candidates]
    table = pd.DataFrame(
        [
            {
                "K": c.k,
                "degree": "terms" if c.degree is None else c.degree,
                "n_regimes": kept,
                "loglik": c.loglik,
                "n_params": c.n_params,
                "criterion": information_criterion(c.loglik, c.n_params, n, tau),
                "effective_windows": n / tau,
                "collapsed": kept < c.k,
                "chosen": False,
            }
            for c, kept in zip(candidates, distinct, strict=True)
        ]
    )
    crit = np.where(table["collapsed"].to_numpy(), np.inf, table["criterion"].to_numpy())
    if not np.isfinite(crit).any():
        crit = table["criterion"].to_numpy()
    # the fewer parameters on a tie, round-off included
    tie = 1e-9 * max(float(np.nanmax(np.abs(table["criterion"]))), 1.0)
    near = np.flatnonzero(crit <= np.nanmin(crit) + tie)
    pick = int(near[np.argmin(table["n_params"].to_numpy()[near])])
    table.loc[pick, "chosen"] = True
    return table, candidates[pick], tau
