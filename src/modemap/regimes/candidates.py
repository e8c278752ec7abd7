"""The regime stage's search: proposals and splits refined for each number of regimes and
library order, every candidate scored on the common targets, and the choice (the methods
:class:`~modemap.regimes.finder.RegimeFinder` inherits from :class:`CandidateSearch`).

:meth:`CandidateSearch._choose` walks K = 1, 2, ... (``n_regimes="auto"``, nested: K + 1
starts from the best K-regime fit with its worst regime split, :mod:`.search`) or builds the
K asked for; :meth:`CandidateSearch._fit_k` refines every start of one K with the affine and
the search library; :meth:`CandidateSearch._candidates` scores each kept labelling at every
library order (:mod:`.selection`).  The methods read the estimator's parameters
(``self.sticky``, ``self.seed`` ...) and take the fit's state as a
:class:`~modemap.regimes.context.FitContext`.
"""

from __future__ import annotations

import dataclasses
from typing import Any

import numpy as np
import pandas as pd

from modemap._exceptions import FitCancelled, FitError
from modemap._progress import ProgressCallback, null_progress, scaled
from modemap.data.dataset import Dataset
from modemap.fit.local_model import BoundLocalModel
from modemap.fit.statistics import accumulate
from modemap.regimes.context import FitContext
from modemap.regimes.likelihood import regime_log_likelihood, residuals
from modemap.regimes.partition import partition_start
from modemap.regimes.proposal import propose
from modemap.regimes.refine import RefineResult, refine
from modemap.regimes.rows import Rows
from modemap.regimes.search import split_starts
from modemap.regimes.segments import segment_derivatives
from modemap.regimes.selection import Candidate, Windows, choose, score
from modemap.regimes.viterbi import viterbi_runs
from modemap.regimes.windows import window_coefficients, window_lengths

__all__ = ["CandidateSearch", "restretched_targets"]

_WINDOWS_PER_REGIME = 5  # the window proposal needs at least this many windows per regime
_WINDOW = 5_000  # typical window length (rows) when K is chosen on part of a long record


class CandidateSearch:
    """The search over candidates, a mixin of :class:`~modemap.regimes.finder.RegimeFinder`
    (module notes)."""

    def _from_fitted(
        self, ctx: FitContext, rows: Rows, ds: Dataset, progress: ProgressCallback
    ) -> tuple[Candidate, pd.DataFrame]:
        """``warm_start``: every row decoded with the last fit's models, then refined."""
        log_em, reg = self._emissions(ds)
        k = self.n_regimes_
        with np.errstate(divide="ignore"):
            log_trans = np.log(self.transmat_)
        labels, _ = viterbi_runs(log_em, np.asarray(reg.lengths), np.full(k, -np.log(k)), log_trans)
        ctx = ctx.at_degree(self.degree_)
        result = self._refine(ctx, rows, labels, k, progress, settle_dense=False)
        if self.form == "continuous" and self.resegment and result.n_regimes > 1:
            result = self._resegment(ctx, rows, result, progress)
        candidate = self._score(ctx, rows, Candidate(k, ctx.local.degree, ctx.local, result))
        table, chosen, _ = choose([candidate], self._windows(ctx, rows))
        return chosen, table

    def _windows(self, ctx: FitContext, rows: Rows) -> Windows:
        """The common targets the candidates are scored on (:meth:`.selection.Windows.common`),
        once per set of rows."""
        cached = ctx.windows
        if cached is None or cached[0] is not rows.Z:
            windows = Windows.common(rows, self.form, ctx.derivative)
            ctx.windows = cached = (rows.Z, windows)
        return cached[1]

    def _score(self, ctx: FitContext, rows: Rows, candidate: Candidate) -> Candidate:
        return score(candidate, self._windows(ctx, rows), sticky=float(self.sticky))

    def _choose(
        self, ctx: FitContext, rows: Rows, progress: ProgressCallback
    ) -> tuple[Candidate, pd.DataFrame]:
        """Search the numbers of regimes and library orders; the chosen candidate on all rows.

        ``n_regimes="auto"``: K = 1, 2, ... by the nested search (:mod:`.search`), stopped
        when two numbers in a row score worse than the best so far; a given K: that K only
        (built up through the smaller ones when a direct search loses regimes).  Every K is
        tried at every library order of the local model (:mod:`.selection`).
        """
        min_samples = ctx.settings.min_samples
        sub = self._selection_rows(rows.lengths, min_samples)
        part = rows if sub is None else rows.subset(sub[0], sub[1])
        if sub is not None:
            ctx.notes.append(
                f"number of regimes chosen on {int(sub[0].sum())} of {sub[0].size} samples "
                f"({sub[1].size} contiguous windows); the chosen models were then refined on all"
            )
        if self.n_regimes == "auto":
            kmax = max(1, min(int(self.max_regimes), part.n_rows // min_samples))
            candidates = self._search_auto(ctx, part, kmax, scaled(progress, 0.0, 0.8))
        else:
            candidates = self._search_given(
                ctx, part, int(self.n_regimes), scaled(progress, 0.0, 0.8)
            )
        table, chosen, _ = choose(candidates, self._windows(ctx, part))
        if sub is not None:  # refined on all rows
            step = scaled(progress, 0.8, 1.0)
            chosen = self._extend(ctx.at_degree(chosen.degree), rows, chosen, step)
        return chosen, table

    def _candidates(
        self, ctx: FitContext, rows: Rows, k: int, found: dict[int | None, RefineResult]
    ) -> list[Candidate]:
        """The search's fits of ``k`` regimes at every library order of the local model,
        scored; from each library's labels, the better score at each order."""
        out = []
        for degree in self._local_spec().candidate_degrees():
            best = None
            for source, result in found.items():
                if degree == source:
                    fit, local = result, ctx.at_degree(degree).local
                else:
                    fit, local = self._refit_at(ctx.at_degree(degree), rows, result)
                candidate = self._score(ctx, rows, Candidate(k, degree, local, fit))
                if best is None or (not candidate.collapsed, candidate.loglik) > (
                    not best.collapsed,
                    best.loglik,
                ):
                    best = candidate
            out.append(best)
        return out

    def _refit_at(
        self, ctx: FitContext, rows: Rows, result: RefineResult
    ) -> tuple[RefineResult, BoundLocalModel]:
        """``result``'s labels refined briefly with the local model of ``ctx``."""
        targets = rows if result.targets is None else rows.with_targets(result.targets)
        brief = dataclasses.replace(ctx, settings=dataclasses.replace(ctx.settings, max_iter=2))
        fit = self._refine(brief, targets, result.labels, result.n_regimes, null_progress, False)
        return fit, ctx.local

    def _search_auto(
        self, ctx: FitContext, rows: Rows, kmax: int, progress: ProgressCallback
    ) -> list[Candidate]:
        candidates: list[Candidate] = []
        previous, best, worse = None, np.inf, 0
        for k in range(1, kmax + 1):
            step = scaled(progress, (k - 1) / kmax, k / kmax)
            try:
                found = self._fit_k(ctx, rows, k, step, previous)
            except FitCancelled:
                raise
            except FitError:  # no regime left with enough samples: stop adding regimes
                break
            result = found[ctx.local.degree]
            new = self._candidates(ctx, rows, k, found)
            candidates += new
            table, _, _ = choose(candidates, self._windows(ctx, rows))
            here = table["criterion"].to_numpy()[-len(new) :]
            live = ~table["collapsed"].to_numpy()[-len(new) :]
            current = float(np.min(here[live])) if live.any() else np.inf
            worse = 0 if current < best else worse + 1
            best = min(best, current)
            if result.n_regimes < k or worse >= 2:
                break
            previous = result
        if not candidates:
            raise FitError("no number of regimes could be fitted")
        return candidates

    def _search_given(
        self, ctx: FitContext, rows: Rows, k: int, progress: ProgressCallback
    ) -> list[Candidate]:
        """Exactly ``k`` regimes: a direct search, else built up K = 1, 2, ... by splits."""
        found = self._fit_k(ctx, rows, k, scaled(progress, 0.0, 0.5))
        if max(r.n_regimes for r in found.values()) < k:
            previous = None
            for j in range(1, k + 1):
                step = scaled(progress, 0.5 + 0.5 * (j - 1) / k, 0.5 + 0.5 * j / k)
                built = self._fit_k(ctx, rows, j, step, previous)
                previous = built[ctx.local.degree]
                if previous.n_regimes < j:
                    break
            if previous.n_regimes == k:
                found = built
        found = {d: r for d, r in found.items() if r.n_regimes == k} or found
        result = max(found.values(), key=lambda r: r.n_regimes)
        if result.n_regimes < k:
            why = [n for n in result.notes if "dropped" in n]
            if why:
                reason = f"{why[-1]}; use fewer regimes or a smaller --min-regime-samples"
            else:
                reason = (
                    "the others' models fit every sample of the extra regime better when "
                    "relabelled, so the data show no more distinct dynamics; use fewer regimes"
                )
            raise FitError(
                f"{k} regimes were asked for, but no fit with {k} could be supported: the best "
                f"kept {result.n_regimes} ({reason})"
            )
        return self._candidates(ctx, rows, k, found)

    def _fit_k(
        self,
        ctx: FitContext,
        rows: Rows,
        k: int,
        progress: ProgressCallback,
        previous: RefineResult | None = None,
    ) -> dict[int | None, RefineResult]:
        """Proposals then refinement for one number of regimes; the best likelihood wins.

        The proposals: the HMM on ``[states, motion, inputs]``, the HMM on the residuals of
        one model fitted to all rows (regimes that differ by their dynamics show up there
        even where the states overlap), the HMM over the coefficients of local models fitted
        on short windows of rows (:mod:`.windows`: regimes that differ only in their
        dynamics, where the first two can settle on a split by level) when there are at
        least five windows per regime, the variable space cut into ``k`` regions by straight
        lines, each with its own affine fit (:mod:`.partition`: regimes chosen by where the
        variables sit, whose models differ by too little for the first three), and, given
        the fit of ``k - 1`` regimes, that fit with its worst regime cut in two
        (:mod:`.search`).

        When the local model chooses its library order, every start is refined both with
        the affine terms and with the library the regimes are searched with: a richer
        library lets one regime bend over two affine pieces and hides their boundary, while
        affine regimes cannot follow a field that is nonlinear within a regime.  The best
        of each is returned, by library order, for the choice of model to judge.
        """
        progress(0.0, f"proposing {k} regime(s)")
        starts = [(self._features(rows), rows.lengths, None)]
        if k > 1:
            starts.append((self._global_residuals(ctx, rows), rows.lengths, None))
            per_run, sizes = window_lengths(rows.lengths, self._window(ctx))
            if sizes.size >= _WINDOWS_PER_REGIME * k:  # enough windows to tell K groups apart
                coef = window_coefficients(ctx.library, rows.Z, rows.Y, sizes)
                starts.append((coef, per_run, sizes))
        labelled = []  # starts given as labels, not proposed by an HMM
        if previous is not None and previous.n_regimes == k - 1:
            fitted = rows if previous.targets is None else rows.with_targets(previous.targets)
            labelled = split_starts(ctx.library, fitted, previous, seed=int(self.seed))
        if k > 1:
            cut = partition_start(rows.Z, rows.Y, k, ctx.settings.min_samples, rows.n_states)
            if cut is not None:
                labelled.append(cut)
        n_starts = len(starts) + len(labelled)
        # the starts compete on the dynamics; the surface term then places the best's switches
        stages = [_without_surface(ctx)]
        if (
            k > 1
            and ctx.local.degree not in (None, 1)
            and 1 in self._local_spec().candidate_degrees()
        ):
            stages.insert(0, _without_surface(ctx.at_degree(1)))
        best: dict[int | None, RefineResult] = {}
        for i, start in enumerate(starts + labelled):
            labels = start if isinstance(start, np.ndarray) else self._propose(rows, k, start)
            step = scaled(progress, i / n_starts, (i + 1) / n_starts)
            for stage in stages:
                result = self._refine(stage, rows, labels, k, step)
                degree = stage.local.degree
                if degree not in best or _better(result, best[degree]):
                    best[degree] = result
        for degree, result in best.items():
            best[degree] = self._place(ctx.at_degree(degree), rows, result, progress)
        return best

    def _propose(self, rows: Rows, k: int, start: tuple) -> np.ndarray:
        features, runs, sizes = start
        labels = propose(
            features,
            runs,
            k,
            sticky=float(self.sticky),
            n_restarts=int(self.n_restarts),
            seed=int(self.seed),
        )
        return np.repeat(labels, sizes) if sizes is not None else labels

    def _place(
        self, ctx: FitContext, rows: Rows, result: RefineResult, progress: ProgressCallback
    ) -> RefineResult:
        """The search's best fit with its switches placed by the surface term, and its
        derivatives re-estimated within its stretches (continuous form)."""
        if self.surface_weight and result.n_regimes > 1:
            placed = self._refine(ctx, rows, result.labels, result.n_regimes, progress, False)
            result = placed if placed.n_regimes == result.n_regimes else result
        if self.form == "continuous" and self.resegment and result.n_regimes > 1:
            result = self._resegment(ctx, rows, result, progress)
        return result

    def _extend(
        self,
        ctx: FitContext,
        rows: Rows,
        chosen: Candidate,
        progress: ProgressCallback,
    ) -> Candidate:
        """The chosen candidate (fitted on windows of the rows, see :meth:`_selection_rows`)
        refined on all rows: every row decoded with the chosen models, then refined."""
        result = chosen.result
        coefs = [np.asarray(f.coef) for f in result.fits]
        log_em = regime_log_likelihood(
            chosen.local.library, rows.Z, rows.Y, coefs, result.covariances
        )
        labels, _ = viterbi_runs(log_em, rows.lengths, result.log_start, result.log_trans)
        # labels decoded from settled models: no dense settling phase
        extended = self._refine(ctx, rows, labels, result.n_regimes, progress, settle_dense=False)
        if self.form == "continuous" and self.resegment and extended.n_regimes > 1:
            extended = self._resegment(ctx, rows, extended, progress)
        return dataclasses.replace(chosen, local=ctx.local, result=extended)

    def _selection_rows(
        self, lengths: np.ndarray, min_samples: int
    ) -> tuple[np.ndarray, np.ndarray] | None:
        """Rows on which K is chosen when the data are long: None when all rows are used.

        Above ``selection_samples`` rows, about that many rows are taken as contiguous
        windows of equal length spread evenly over every run (each run gets windows in
        proportion to its length, at least one), so every operating point the runs visit is
        represented and derivatives and transitions stay local.  Returns the row mask and
        the window lengths (each window is a run for the selection).
        """
        n, cap = int(lengths.sum()), int(self.selection_samples)
        if n <= cap:
            return None
        n_windows = max(lengths.size, cap // _WINDOW)
        width = max(cap // n_windows, 2 * min_samples)
        mask = np.zeros(n, dtype=bool)
        sizes = []
        offset = 0
        for length in lengths:
            length = int(length)
            count = max(1, round(n_windows * length / n))
            w = min(width, length)
            starts = np.linspace(0, length - w, count).astype(np.int64) if count > 1 else [0]
            taken = np.zeros(length, dtype=bool)
            for a in starts:
                taken[a : a + w] = True
            mask[offset : offset + length] = taken
            edges = np.flatnonzero(np.diff(np.concatenate([[0], taken.astype(np.int8), [0]])))
            sizes += list(edges[1::2] - edges[::2])
            offset += length
        return mask, np.asarray(sizes, dtype=np.int64)

    def _resegment(
        self, ctx: FitContext, rows: Rows, result: RefineResult, progress: ProgressCallback
    ) -> RefineResult:
        """Re-estimate derivatives within regime stretches and refine again (twice at most).

        See :mod:`modemap.regimes.segments`.  The targets used by the final refinement are
        kept in ``result.targets`` so that the fitted models and the likelihood agree.  A
        pass is kept only when it keeps every regime and scores at least as well on the
        common targets (:mod:`.selection`): with labels cut into many short stretches, the
        derivatives re-estimated within them are noise, and a refinement on them can lose
        the regimes it started from.
        """
        k = result.n_regimes
        base = self._score(ctx, rows, Candidate(k, ctx.local.degree, ctx.local, result)).loglik
        for _ in range(2):
            y2 = restretched_targets(rows, result.labels, ctx.derivative)
            new = self._refine(ctx, rows.with_targets(y2), result.labels, k, progress)
            new.targets = y2
            if new.n_regimes < k:
                break
            score = self._score(ctx, rows, Candidate(k, ctx.local.degree, ctx.local, new)).loglik
            if score < base:
                break
            unchanged = np.array_equal(new.labels, result.labels)
            result, base = new, score
            if unchanged:
                break
        return result

    def _refine(
        self,
        ctx: FitContext,
        rows: Rows,
        labels: np.ndarray,
        k: int,
        progress: ProgressCallback,
        settle_dense: bool = True,
    ) -> RefineResult:
        settings = dataclasses.replace(ctx.settings, settle_dense=settle_dense)
        work = ctx.work(rows)
        return refine(work, labels, settings, n_regimes=k, progress=progress)

    @staticmethod
    def _window(ctx: FitContext) -> int:
        """Rows per window of the local-model proposal: four per term, at least 12."""
        return max(12, 4 * len(ctx.local.terms))

    @staticmethod
    def _global_residuals(ctx: FitContext, rows: Rows) -> np.ndarray:
        """Residuals of a single model fitted to all rows (a dynamics-aware feature)."""
        fit = ctx.local.fit(accumulate(ctx.library, rows.Z, rows.Y))
        return residuals(ctx.library, rows.Z, rows.Y, np.asarray(fit.coef))

    def _features(self, rows: Rows) -> np.ndarray:
        """``[states, increments (discrete) or derivatives (continuous), inputs]``."""
        m = rows.n_states
        x, u = rows.Z[:, :m], rows.Z[:, m:]
        motion = rows.Y - x if self.form == "discrete" else rows.Y
        return np.hstack([x, motion, u])

    # ----------------------------------------------------------------- predict


def _without_surface(ctx: FitContext) -> FitContext:
    """``ctx`` with the surface term left out of the refinement."""
    if not ctx.settings.surface_weight:
        return ctx
    settings = dataclasses.replace(ctx.settings, surface_weight=0.0)
    return dataclasses.replace(ctx, settings=settings)


def _better(a: RefineResult, b: RefineResult) -> bool:
    """``a`` keeps more regimes than ``b``, or as many with a higher likelihood."""
    return (a.n_regimes, a.loglik) > (b.n_regimes, b.loglik)


def restretched_targets(rows: Rows, labels: np.ndarray, settings: dict[str, Any]) -> np.ndarray:
    """Derivatives re-estimated within stretches of constant label and stepped inputs."""
    m = rows.n_states
    # every stepped input cuts, those that select the regime too: the labels cut there
    # only once they are right, and a sample left on the wrong side of a step keeps a
    # derivative that agrees with its wrong label
    stepped = rows.Z[:, m:] if rows.Z.shape[1] > m else None
    return segment_derivatives(
        rows.time, rows.Z[:, :m], rows.Y, rows.lengths, labels, settings, stepped
    )
