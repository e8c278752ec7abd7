"""Dynamics-aware refinement of regime labels: hard-EM switching regression.

Starting from proposed labels, we alternate

(a) **fit**: one local model per regime from additive statistics (one pass over the data
    with :func:`modemap.fit.statistics.accumulate_by_label`, then the regime's local model,
    :class:`~modemap.fit.local_model.BoundLocalModel`); a regime with fewer than
    ``min_samples`` samples is dropped and its samples are reassigned in step (c);
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

until the labels stop changing or ``max_iter`` is reached.  Statistics and decoding are
maps over blocks of runs on an executor (:mod:`.blocks`, :mod:`modemap.engine`).  With a
local model that selects terms, the first iterations keep every candidate term (labels far
from settled would otherwise prune terms that matter); once the labels settle the selection
takes over until they settle again.  Each step cannot lower the complete-data likelihood
when the fits are plain least squares, so this is the classification (hard) version of EM
for a Markov-switching regression, as in autoregressive hidden Markov models.  The
switching model: "A new approach to the economic analysis of nonstationary time series and
the business cycle", Econometrica 57(2), 1989, DOI 10.2307/1912559, and "Analysis of time
series subject to changes in regime", Journal of Econometrics 45, 1990,
DOI 10.1016/0304-4076(90)90093-9.
"""

from __future__ import annotations

from collections.abc import Sequence
from dataclasses import dataclass, field, replace
from typing import Any

import numpy as np

from modemap._exceptions import FitError
from modemap._progress import ProgressCallback, null_progress
from modemap.fit.local_model import BoundLocalModel
from modemap.fit.statistics import GramStats, accumulate_by_label
from modemap.regimes.hygiene import drop_small, enforce_min_dwell
from modemap.regimes.likelihood import LocationTerm, SurfaceTerm, pair_counts, transition_model
from modemap.regimes.rows import RowWork

__all__ = [
    "ConvergenceRecord",
    "RefineResult",
    "RefineSettings",
    "interior_stats",
    "refine",
    "stretch_ends",
]


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
    terms : tuple
        Further emission terms of the final fits (location, surface), for decoding new data.
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
    terms: tuple = ()  # the further emission terms of the final state (location, surface)


@dataclass(frozen=True)
class RefineSettings:
    """How the refinement fits, scores and relabels.

    Attributes
    ----------
    local : BoundLocalModel
        Each regime's model (library, selection rule, form's rules).
    sticky : float
        Self-transition weight of the Markov chain prior.
    learn_transitions : bool
        Transition probabilities from switch counts (True) or fixed at ``sticky`` (False).
    location_weight : float
        Weight of the Gaussian term on where the state sits (0 = dynamics only).
    surface_weight : float
        Weight of the term on which side of the switching surfaces the variables are
        (:class:`~modemap.regimes.likelihood.SurfaceTerm`, a memoryless classifier fitted
        on the rows the residual likelihoods placed with confidence in the last pass;
        0 = none).
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
        With a model that selects terms, first let the labels settle with every term kept
        (so early, unsettled labels do not prune terms); False skips that phase when the
        starting labels come from already fitted models.
    """

    local: BoundLocalModel
    sticky: float = 0.99
    learn_transitions: bool = True
    location_weight: float = 0.0
    surface_weight: float = 0.0
    covariance: str = "tied"
    min_samples: int = 30
    min_dwell: int = 1
    max_iter: int = 30
    cov_floor: float = 1e-6
    tol: float = 1e-5
    settle_dense: bool = True


def refine(
    work: RowWork,
    labels: np.ndarray,
    settings: RefineSettings,
    *,
    n_regimes: int,
    progress: ProgressCallback | None = None,
) -> RefineResult:
    """Alternate per-regime fits and Viterbi relabelling (hard-EM switching regression).

    Parameters
    ----------
    work : RowWork
        The rows (variables, targets, run lengths) and where their work runs.
    labels : ndarray of shape (n,)
        Initial labels in ``0..n_regimes-1`` (``-1`` = unassigned).
    settings : RefineSettings
    n_regimes : int
    progress : callable, optional
        ``progress(fraction, message)``, called once per iteration.

    Returns
    -------
    RefineResult
    """
    progress = progress or null_progress
    local = settings.local
    min_samples = max(int(settings.min_samples), len(local.terms) + 1)
    settings = replace(settings, min_samples=min_samples)
    labels = np.asarray(labels, dtype=np.int64).copy()
    k = int(n_regimes)
    monitor, notes = ConvergenceRecord(), []
    scorer = _Scorer(work, settings, notes)
    # phase 1 (models that select terms): every candidate term kept until the labels
    # settle, so that early, unsettled labels do not prune terms; phase 2: the model itself
    unpruned = local.unpruned() if settings.settle_dense else None
    phase = unpruned or local
    state = None
    settled = int(settings.tol * labels.size)
    max_iter = int(settings.max_iter)
    # the surface term joins once the labels have settled without it: a regime just split
    # off has few rows the dynamics place with confidence, and would starve under it
    surface, confident = False, None
    for it in range(max(1, max_iter)):
        previous = None if state is None else (state.labels, state.stats)
        taught = confident if surface else None
        state = scorer.fit(labels, k, phase, previous=previous, confident=taught)
        labels, k = state.labels, state.k
        new, log_prob, _, confident = scorer.decode(state)
        new = enforce_min_dwell(new, work.lengths, settings.min_dwell)
        changed = int(np.count_nonzero(new != labels))
        monitor.history.append(float(log_prob))
        monitor.changes.append(changed)
        monitor.n_regimes.append(k)
        labels = new
        moved = f"{changed} sample{'' if changed == 1 else 's'} changed regime"
        progress((it + 1) / max_iter, f"refinement pass {it + 1}: {moved}")
        if changed <= settled and phase is not local:
            phase = local  # labels settled with every term kept: switch to the selection
            continue
        if changed <= settled and settings.surface_weight and k > 1 and not surface:
            surface = True  # settled by the dynamics: place the switches with the surface
            continue
        if changed <= settled:
            monitor.converged = True
            break
    # final fits consistent with the final labels, their terms chosen on these labels
    final = not monitor.converged or monitor.changes[-1] > 0 or not scorer.fresh
    if final:  # final fits consistent with the final labels
        previous = (state.labels, state.stats)
        taught = confident if surface else None
        scorer.selected = None  # the final fits choose their terms afresh
        state = scorer.fit(labels, k, local, previous=previous, confident=taught)
        labels, k = state.labels, state.k
        if np.any(labels < 0):
            labels, _, _, _ = scorer.decode(state)
    if not final and settings.min_dwell <= 1:
        loglik = monitor.history[-1]  # the labels are the Viterbi path of this very state
    elif not final:  # the last pass's fits, labels moved by min_dwell: score them
        loglik = scorer.decode(state, current=labels)[2]
    else:
        loglik = scorer.log_prob(state, labels)
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
        covariance=settings.covariance,
        location_weight=settings.location_weight,
        terms=state.terms,
    )


@dataclass
class _State:
    labels: np.ndarray
    k: int
    stats: list[GramStats]
    fits: list[Any]
    covs: np.ndarray
    log_start: np.ndarray
    log_trans: np.ndarray
    terms: tuple = ()  # further emission terms (location, surface)
    pairs: np.ndarray | None = None  # pair_counts of ``labels``


class _Scorer:
    """Steps (a) to (c) over the rows of a :class:`RowWork`."""

    def __init__(self, work: RowWork, settings: RefineSettings, notes: list[str]) -> None:
        self.work, self.settings, self.notes = work, settings, notes
        self.library = settings.local.library
        self.surface = None  # the last surface term (its classifier starts the next fit)
        self.selected = None  # (model, labels, fits) of the last choice of terms
        self.fresh = False  # the last fits chose their terms on their own labels

    def fit(
        self,
        labels: np.ndarray,
        k: int,
        local: BoundLocalModel,
        previous: tuple[np.ndarray, list[GramStats]] | None = None,
        confident: np.ndarray | None = None,
    ) -> _State:
        """Steps (a) and (b): drop small regimes, fit each regime, the chain.

        ``previous`` (labels and statistics of the last pass) lets the statistics be
        updated from the samples whose label changed; ``confident`` (rows the last pass
        placed with confidence) teaches the surface term.
        """
        s, work = self.settings, self.work
        labels, new_k, dropped = drop_small(labels, k, s.min_samples)
        self.notes += dropped
        if new_k != k:
            confident = None
        if new_k == 0:
            raise FitError(f"no regime has at least {s.min_samples} samples; use fewer regimes")
        stats = _updated_stats(work, self.library, labels, new_k, previous)
        if stats is None:
            stats = work.stats(self.library, labels, new_k)
        k = new_k
        fit_stats = stats
        if local.interior:
            fit_stats = interior_stats(work.Z, work.Y, work.lengths, labels, k, self.library, stats)
        fits = self._fits(local, fit_stats, labels)
        covs = _covariances(stats, fits, s.cov_floor, s.covariance)
        pairs = pair_counts(labels, work.lengths, k)
        log_start, log_trans = transition_model(
            labels, work.lengths, k, s.sticky, s.learn_transitions, counts=pairs
        )
        terms = []
        m = work.Y.shape[1]
        if s.location_weight:
            options = {"weight": s.location_weight, "kind": s.covariance}
            terms.append(LocationTerm.fit(work.Z, m, labels, k, **options))
        if s.surface_weight and k > 1 and confident is not None:
            taught = np.where(confident, labels, -1)
            options = {"weight": s.surface_weight, "previous": self.surface}
            self.surface = SurfaceTerm.fit(work.Z, m, taught, k, **options)
            terms += [self.surface] if self.surface is not None else []
        return _State(labels, k, stats, fits, covs, log_start, log_trans, tuple(terms), pairs)

    def _fits(self, local: BoundLocalModel, stats: list[GramStats], labels: np.ndarray) -> list:
        """Each regime's fit; the terms are chosen again only when the model or the number
        of regimes changed, or more than ``_RESELECT_SHARE`` of the rows changed regime
        since they were last chosen (in between, least squares on those terms)."""
        last = self.selected
        if (
            last is not None
            and last[0] is local
            and len(last[2]) == len(stats)
            and last[1].shape == labels.shape
            and np.count_nonzero(last[1] != labels) <= _RESELECT_SHARE * labels.size
        ):
            self.fresh = np.array_equal(last[1], labels)
            return [local.refit(s, f) for s, f in zip(stats, last[2], strict=True)]
        fits = local.fit_all(stats)
        self.selected, self.fresh = (local, labels, fits), True
        return fits

    def decode(self, state: _State, current: np.ndarray | None = None) -> tuple:
        """Step (c): Viterbi paths under the fits and chain of ``state`` (with the rows the
        dynamics place with confidence, when the surface term needs them)."""
        margin = _CONFIDENT if self.settings.surface_weight and state.k > 1 else 2.0
        return self.work.decode(
            self.library,
            state.fits,
            state.covs,
            (state.log_start, state.log_trans),
            current=current,
            terms=state.terms,
            margin=margin,
        )

    def log_prob(self, state: _State, labels: np.ndarray) -> float:
        """Joint log-probability of ``labels`` under the fits and chain of ``state``."""
        if not state.terms and not np.any(labels < 0):
            return _stats_log_prob(state, labels, self.work.lengths)
        return self.decode(state, current=labels)[2]


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


#: Terms are chosen again when more than this share of the rows changed regime since the
#: last choice (the fits in between keep the chosen terms).
_RESELECT_SHARE = 0.01

#: A row teaches the surface term when the probability of its regime, given the residual
#: likelihoods and the chain alone, exceeds this.
_CONFIDENT = 0.9

#: Update the statistics from the changed samples when fewer than this share changed (each
#: changed sample is accumulated twice, out of its old regime and into its new one).
_UPDATE_SHARE = 0.25


def _updated_stats(
    work: RowWork,
    library: Any,
    labels: np.ndarray,
    k: int,
    previous: tuple[np.ndarray, list[GramStats]] | None,
) -> list[GramStats] | None:
    """Statistics of ``labels`` as the previous ones minus and plus the changed samples.

    None (compute afresh) without a previous pass, when the number of regimes differs (a
    regime was dropped), or when too many samples changed.  The statistics are sums, so the
    update equals a fresh pass up to round-off.
    """
    if previous is None:
        return None
    old_labels, old_stats = previous
    if len(old_stats) != k or old_labels.shape != labels.shape:
        return None
    changed = np.flatnonzero(old_labels != labels)
    if changed.size > _UPDATE_SHARE * labels.size:
        return None
    if changed.size == 0:
        return list(old_stats)
    z, y = work.Z[changed], work.Y[changed]
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
    """Joint log-probability of ``labels`` from the statistics: equals
    :func:`~modemap.regimes.likelihood.path_log_prob` on the Gaussian residual scores
    (without a location term), at O(K) cost.

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
