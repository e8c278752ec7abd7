"""RegimeFinder: the regime-discovery stage as one scikit-learn style estimator.

Pipeline inside :meth:`RegimeFinder.fit`:

1. regression rows from the dataset (:func:`modemap.data.regression.prepare_regression`):
   variables ``Z = [states, inputs]`` and targets ``Y`` (derivatives, or next states in
   discrete form);
2. the local model bound to the data's variables and form
   (:class:`~modemap.fit.local_model.LocalModel`): its candidate terms, without the inputs
   that select the regime;
3. for each number of regimes tried: sticky Gaussian HMM proposals (:mod:`.proposal`) on
   standardised features ``[states, increments or derivatives, inputs]`` and on the residuals
   of a single model fitted to all rows, each refined by the hard-EM switching regression
   (:mod:`.refine`); the refined labelling with the higher likelihood is kept;
4. ``n_regimes="auto"``: K by BIC on the first 80 % of each run (:mod:`.selection`), then the
   chosen labelling is extended to all rows (held-out tails decoded by Viterbi) and refined
   there, so the model returned is the one the selection table scored;
5. continuous form: each regime's terms chosen and estimated again on the integral form over
   windows inside its stretches, with the measurement noise in the terms compensated
   (:mod:`.integral`; a local model with ``final_fit="derivative"`` keeps the fit on the
   derivatives);
6. hygiene and a stable order of ids (:mod:`.hygiene`), statistics (:mod:`.summary`).

What one fit knows once the data are read (the bound local model, the refinement settings,
the executor, the derivative settings) is a :class:`FitContext` handed to every step; the
rows a step works on are a :class:`~modemap.regimes.rows.Rows`.

Labels of samples that have no regression row (in discrete form, the last sample of each run,
which has no successor) are copied from the preceding sample of the same run (from the
following one if no sample precedes), so every sample carries a regime.
"""

from __future__ import annotations

import dataclasses
from collections.abc import Sequence
from dataclasses import dataclass, field
from typing import Any, ClassVar

import numpy as np
import pandas as pd
from sklearn.base import BaseEstimator

from modemap._exceptions import FitError
from modemap._params import BOOLEAN, SEQUENCE_OF_STR, Interval, Options, check_params
from modemap._progress import ProgressCallback, null_progress, scaled
from modemap.data.dataset import Dataset
from modemap.data.regression import FORMS, prepare_regression
from modemap.engine import ENGINES, Engine, get_engine
from modemap.fit.local_model import BoundLocalModel, LocalModel, SparseLocalModel
from modemap.fit.statistics import accumulate
from modemap.regimes.hygiene import default_min_samples, order_regimes
from modemap.regimes.likelihood import regime_log_likelihood, residuals
from modemap.regimes.proposal import propose
from modemap.regimes.refine import RefineResult, RefineSettings, refine
from modemap.regimes.rows import Rows, RowWork
from modemap.regimes.segments import segment_derivatives
from modemap.regimes.selection import (
    count_parameters,
    holdout_split,
    information_criterion,
    select_regimes,
)
from modemap.regimes.summary import statistics
from modemap.regimes.viterbi import viterbi_runs
from modemap.regimes.windows import window_coefficients, window_lengths

__all__ = ["FitContext", "RegimeFinder"]

_WINDOWS_PER_REGIME = 5  # the window proposal needs at least this many windows per regime
_WINDOW = 5_000  # typical window length (rows) when K is chosen on part of a long record
#: Sample intervals per window of the integral-form refit (measured on the reactor demo:
#: 8 to 23 give the same spread of the high-branch coefficients, 40 a larger one).
INTEGRAL_WINDOW = 16


@dataclass
class FitContext:
    """What one :meth:`RegimeFinder.fit` knows once the data are read.

    Attributes
    ----------
    local : BoundLocalModel
        The local model with its library for these variables and this form.
    settings : RefineSettings
        How the refinement fits, scores and relabels.
    engine : Engine
        Where per-block work runs.
    state_names : list of str
    derivative : dict
        Derivative settings actually used (continuous form).
    notes : list of str
        Notes gathered on the way (for ``notes_``).
    """

    local: BoundLocalModel
    settings: RefineSettings
    engine: Engine
    state_names: list[str]
    derivative: dict[str, Any]
    notes: list[str] = field(default_factory=list)
    _work: tuple[Any, Any, RowWork] | None = None

    @property
    def library(self) -> Any:
        return self.local.library

    def work(self, rows: Rows) -> RowWork:
        """``rows`` bound to the engine, placed there once per set of rows."""
        cached = self._work
        if cached is None or cached[0] is not rows.Z or cached[1] is not rows.Y:
            self._work = cached = (rows.Z, rows.Y, RowWork(rows, self.engine))
        return cached[2]


class RegimeFinder(BaseEstimator):
    """Find the regimes of logged trajectories and a local model in each.

    Parameters
    ----------
    n_regimes : "auto" or int, default "auto"
        Number of regimes; "auto" chooses 1..max_regimes by BIC.
    max_regimes : int, default 6
    form : {"continuous", "discrete"}, default "continuous"
    local_model : LocalModel or None, default None
        Each regime's model (:mod:`modemap.fit.local_model`); None: a
        :class:`~modemap.fit.local_model.SparseLocalModel` with its defaults.
    derivative : str, default "auto"
        Derivative method (continuous form).
    sticky : float, default 0.99
        Self-transition weight of the Markov chain prior.
    n_restarts : int, default 3
        HMM restarts in the proposal.
    max_iter : int, default 30
        Refinement iterations at most.
    min_samples : int or None, default None
        Smallest regime kept; None: ``max(30, 10 x n_terms x n_states)``.
    min_dwell : int, default 1
        Stretches shorter than this (samples) take the neighbouring regime.
    seed : int, default 0
    location_weight : float, default 0.0
        Weight of the Gaussian term on where the state sits in the relabelling.
    covariance : {"tied", "full"}, default "tied"
        Residual covariance shared by all regimes, or one per regime.
    switching_inputs : "auto", str, sequence of str or None, default "auto"
        Inputs that select the regime rather than enter its equations; "auto": every
        input with exactly two distinct values.
    resegment : bool, default True
        Continuous form: re-estimate derivatives within regime stretches and refine again.
    engine : {"local", "dask"} or Engine, default "local"
        Where per-run work runs (:mod:`modemap.engine`).
    scheduler : str or None, default None
        Dask scheduler address.
    selection_samples : int, default 200_000
        With ``n_regimes="auto"`` on longer data, K is chosen on about this many rows taken
        as contiguous windows spread over every run; the chosen models are then refined on
        all rows (a note says so).

    Attributes
    ----------
    labels_ : list of ndarray of int
        Regime id of every sample, one array per run of the dataset.
    n_regimes_ : int
    local_fits_ : list of LocalFit
    selection_ : DataFrame
        ``K, n_regimes, loglik, n_params, bic, holdout_rmse, chosen``.
    statistics_ : dict
        Shares, dwell times, switch counts (:func:`modemap.regimes.summary.statistics`).
    transmat_ : ndarray of shape (K, K)
    library_ : fitted TermLibrary
    local_model_ : BoundLocalModel
    regression_ : RegressionData
    notes_ : list of str
    convergence_ : ConvergenceRecord of the final refinement
    covariances_ : ndarray of shape (K, m, m)
    regime_stats_ : list of GramStats
        Each regime's normal-equation statistics (what its local fit was computed from;
        with the integral final fit, the window statistics scaled to the effective number
        of windows, see :mod:`modemap.regimes.integral`).
    switching_inputs_ : list of str
    """

    _parameter_constraints: ClassVar[dict[str, list]] = {
        "n_regimes": [Options(("auto",)), Interval(int, 1, None)],
        "max_regimes": [Interval(int, 1, None)],
        "form": [Options(FORMS)],
        "local_model": [LocalModel, None],
        "derivative": [str, dict],
        "sticky": [Interval(float, 0, 1, closed="neither")],
        "n_restarts": [Interval(int, 1, None)],
        "max_iter": [Interval(int, 1, None)],
        "min_samples": [Interval(int, 1, None), None],
        "min_dwell": [Interval(int, 1, None)],
        "seed": [Interval(int, 0, 2**32 - 1)],
        "location_weight": [Interval(float, 0, None)],
        "covariance": [Options(("tied", "full"))],
        "switching_inputs": [str, SEQUENCE_OF_STR, None],
        "resegment": [BOOLEAN],
        "engine": [Options(ENGINES), Engine],
        "scheduler": [str, None],
        "selection_samples": [Interval(int, 1, None)],
    }

    def __init__(
        self,
        *,
        n_regimes: str | int = "auto",
        max_regimes: int = 6,
        form: str = "continuous",
        local_model: LocalModel | None = None,
        derivative: str = "auto",
        sticky: float = 0.99,
        n_restarts: int = 3,
        max_iter: int = 30,
        min_samples: int | None = None,
        min_dwell: int = 1,
        seed: int = 0,
        location_weight: float = 0.0,
        covariance: str = "tied",
        switching_inputs: str | Sequence[str] | None = "auto",
        resegment: bool = True,
        engine: Any = "local",
        scheduler: str | None = None,
        selection_samples: int = 200_000,
    ) -> None:
        self.n_regimes = n_regimes
        self.max_regimes = max_regimes
        self.form = form
        self.local_model = local_model
        self.derivative = derivative
        self.sticky = sticky
        self.n_restarts = n_restarts
        self.max_iter = max_iter
        self.min_samples = min_samples
        self.min_dwell = min_dwell
        self.seed = seed
        self.location_weight = location_weight
        self.covariance = covariance
        self.switching_inputs = switching_inputs
        self.resegment = resegment
        self.engine = engine
        self.scheduler = scheduler
        self.selection_samples = selection_samples

    def _local_spec(self) -> LocalModel:
        return SparseLocalModel() if self.local_model is None else self.local_model

    def _switching_inputs(self, ds: Dataset) -> list[str]:
        """Inputs that select the regime rather than enter its equations.

        ``"auto"``: every input that takes exactly two distinct values (an on/off
        command, a gate signal); a list names them; ``None`` or ``()``: none.
        """
        if self.switching_inputs is None:
            return []
        if isinstance(self.switching_inputs, str) and self.switching_inputs != "auto":
            names = [self.switching_inputs]
        elif self.switching_inputs == "auto":
            _, _, u, _ = ds.concat()
            return [
                name
                for j, name in enumerate(ds.input_names)
                if np.unique(u[:, j][:1_000_000]).size == 2
            ]
        else:
            names = list(self.switching_inputs)
        unknown = [n for n in names if n not in ds.input_names]
        if unknown:
            raise FitError(f"switching inputs {', '.join(unknown)} are not among the inputs")
        return names

    # --------------------------------------------------------------------- fit
    def fit(self, ds: Dataset, progress: ProgressCallback | None = None) -> RegimeFinder:
        """Discover regimes in ``ds``.

        Parameters
        ----------
        ds : Dataset
        progress : callable, optional
            ``progress(fraction, message)``; raise ``FitCancelled`` in it to stop.

        Returns
        -------
        self
        """
        check_params(self)
        engine = get_engine(self.engine, self.scheduler)  # FitError on a bad name / no Dask
        try:
            return self._fit(ds, progress or null_progress, engine)
        finally:
            if isinstance(self.engine, str):  # close only what this fit started or joined
                engine.close()

    def _context(self, ds: Dataset, reg: Any, engine: Engine) -> FitContext:
        """The bound local model and the refinement settings for this data set."""
        self.switching_inputs_ = self._switching_inputs(ds)
        local = self._local_spec().bind(
            ds.variable_names,
            n_states=ds.n_states,
            form=self.form,
            exclude=self.switching_inputs_,
        )
        min_samples = self.min_samples
        if min_samples is None:
            min_samples = default_min_samples(len(local.terms), ds.n_states)
        settings = RefineSettings(
            local=local,
            sticky=float(self.sticky),
            location_weight=float(self.location_weight),
            covariance=self.covariance,
            min_samples=int(min_samples),
            min_dwell=int(self.min_dwell),
            max_iter=int(self.max_iter),
        )
        derivative = dict(reg.derivative or {})
        return FitContext(local, settings, engine, list(ds.state_names), derivative)

    def _fit(self, ds: Dataset, progress: ProgressCallback, engine: Engine) -> RegimeFinder:
        reg = prepare_regression(ds, form=self.form, derivative=self.derivative)
        ctx = self._context(ds, reg, engine)
        rows = Rows.of(reg.Z, reg.Y, reg.lengths, reg.time)
        if rows.n_rows < 2:
            raise FitError(f"{ds.source}: too few samples to find regimes ({rows.n_rows})")
        integral = ctx.local.integral_final_fit
        overall, progress = progress, scaled(progress, 0.0, 0.95) if integral else progress
        if self.n_regimes == "auto":
            result, table = self._choose(ctx, rows, progress)
        else:
            result = self._fit_k(ctx, rows, int(self.n_regimes), scaled(progress, 0.0, 1.0))
            table = self._single_row(result, rows.n_states, rows.n_rows)
        if integral and result.labels.size == rows.n_rows:
            overall(0.95, "estimating the coefficients again on the integral form")
            result = self._integral_refit(ctx, rows, result)
        self._set_results(ds, reg, ctx, result, table)
        overall(1.0, f"{self.n_regimes_} regime(s) found")
        return self

    def _choose(
        self, ctx: FitContext, rows: Rows, progress: ProgressCallback
    ) -> tuple[RefineResult, pd.DataFrame]:
        """``n_regimes="auto"``: the selection table and the chosen K's fit on all rows."""
        min_samples = ctx.settings.min_samples
        kmax = max(1, min(int(self.max_regimes), rows.n_rows // min_samples))
        sub = self._selection_rows(rows.lengths, min_samples)

        def fit_k(part: Rows, k: int, step: ProgressCallback) -> RefineResult:
            return self._fit_k(ctx, part, k, step)

        chosen_rows = rows if sub is None else rows.subset(sub[0], sub[1])
        table, results = select_regimes(
            fit_k, ctx.library, chosen_rows, kmax, progress=scaled(progress, 0.0, 0.8)
        )
        if sub is not None:
            ctx.notes.append(
                f"number of regimes chosen on {int(sub[0].sum())} of {sub[0].size} samples "
                f"({sub[1].size} contiguous windows); the chosen models were then refined on all"
            )
        k = int(table.loc[table["chosen"], "K"].iloc[0])
        step = scaled(progress, 0.8, 0.9)
        result = self._extend(ctx, rows, results[k], step, all_rows=sub is not None)
        if result.n_regimes != results[k].n_regimes:  # lost a regime on all rows
            fresh = self._fit_k(ctx, rows, k, scaled(progress, 0.9, 1.0))
            if fresh.n_regimes > result.n_regimes:
                result = fresh
        return result, table

    def _integral_refit(self, ctx: FitContext, rows: Rows, result: RefineResult) -> RefineResult:
        """The final fits and statistics re-estimated on the integral form (module notes)."""
        from modemap.regimes.integral import integral_refit

        local = ctx.local
        done = integral_refit(
            local.library,
            rows,
            result.labels,
            result.fits,
            result.stats,
            window=INTEGRAL_WINDOW,
            select=local.fit if local.spec.selects_terms else None,
        )
        notes = list(result.notes)
        if not done.compensated.all():  # ids as reported: ordered like _set_results does
            _, order = order_regimes(result.labels, rows.Z[:, 0], result.n_regimes)
            for new, old in enumerate(order):
                if not done.compensated[old].all():
                    names = ", ".join(
                        ctx.state_names[j] for j in np.flatnonzero(~done.compensated[old])
                    )
                    notes.append(
                        f"regime {new}: measurement noise too large against the signal to "
                        f"compensate in the integral-form fit of {names}; the plain integral "
                        "estimate was kept"
                    )
        return dataclasses.replace(result, fits=done.fits, stats=done.stats, notes=notes)

    def _fit_k(
        self, ctx: FitContext, rows: Rows, k: int, progress: ProgressCallback
    ) -> RefineResult:
        """Proposals then refinement for one number of regimes; the best likelihood wins.

        Three proposals are refined: the HMM on ``[states, motion, inputs]``, the HMM on the
        residuals of one model fitted to all rows (regimes that differ by their dynamics show
        up there even where the states overlap), and the HMM over the coefficients of local
        models fitted on short windows of rows (:mod:`.windows`: regimes that differ only in
        their dynamics, where the first two can settle on a split by level), when there are
        at least five windows per regime.
        """
        progress(0.0, f"proposing {k} regime(s)")
        starts = [(self._features(rows), rows.lengths, None)]
        if k > 1:
            starts.append((self._global_residuals(ctx, rows), rows.lengths, None))
            per_run, sizes = window_lengths(rows.lengths, self._window(ctx))
            if sizes.size >= _WINDOWS_PER_REGIME * k:  # enough windows to tell K groups apart
                coef = window_coefficients(ctx.library, rows.Z, rows.Y, sizes)
                starts.append((coef, per_run, sizes))
        best = None
        for i, (features, runs, sizes) in enumerate(starts):
            labels = propose(
                features,
                runs,
                k,
                sticky=float(self.sticky),
                n_restarts=int(self.n_restarts),
                seed=int(self.seed),
            )
            if sizes is not None:  # one label per window -> one per row
                labels = np.repeat(labels, sizes)
            step = scaled(progress, i / len(starts), (i + 1) / len(starts))
            result = self._refine(ctx, rows, labels, k, step)
            if best is None or result.loglik > best.loglik:
                best = result
        if self.form == "continuous" and self.resegment and best.n_regimes > 1:
            best = self._resegment(ctx, rows, best, progress)
        return best

    def _extend(
        self,
        ctx: FitContext,
        rows: Rows,
        chosen: RefineResult,
        progress: ProgressCallback,
        *,
        all_rows: bool = False,
    ) -> RefineResult:
        """Refit the chosen labelling of the training part on all rows.

        With ``all_rows`` (K was chosen on windows of the data, see
        :meth:`_selection_rows`) every row is decoded with the chosen models first.

        The held-out tails are decoded by Viterbi with the chosen models and chain, and
        the refinement on all rows starts from those labels.  A fresh proposal with the
        chosen K could land on another labelling, or lose regimes to hygiene, so that the
        model returned would not be the one the selection table describes.  When
        this refit still loses a regime (hygiene on all rows), :meth:`fit` also tries
        a fresh fit of the chosen K and keeps the one with more regimes.
        """
        coefs = [np.asarray(f.coef) for f in chosen.fits]
        if all_rows:  # K was chosen on windows: decode every row with the chosen models
            log_em = regime_log_likelihood(ctx.library, rows.Z, rows.Y, coefs, chosen.covariances)
            labels, _ = viterbi_runs(log_em, rows.lengths, chosen.log_start, chosen.log_trans)
            held = np.zeros(rows.n_rows, dtype=bool)
        else:
            held = holdout_split(rows.lengths)
            labels = np.empty(rows.n_rows, dtype=np.int64)
            labels[~held] = chosen.labels
        if held.any():
            tails = rows.subset(held)
            log_em = regime_log_likelihood(ctx.library, tails.Z, tails.Y, coefs, chosen.covariances)
            path, _ = viterbi_runs(log_em, tails.lengths, chosen.log_start, chosen.log_trans)
            labels[held] = path
        k = chosen.n_regimes
        # labels decoded on every row come from settled models: no dense settling phase
        result = self._refine(ctx, rows, labels, k, progress, settle_dense=not all_rows)
        if self.form == "continuous" and self.resegment and result.n_regimes > 1:
            result = self._resegment(ctx, rows, result, progress)
        return result

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
        kept in ``result.targets`` so that the fitted models and the likelihood agree.
        """
        for _ in range(2):
            y2 = _segment(rows, result.labels, ctx.derivative)
            k = result.n_regimes
            new = self._refine(ctx, rows.with_targets(y2), result.labels, k, progress)
            new.targets = y2
            unchanged = np.array_equal(new.labels, result.labels)
            result = new
            if unchanged:
                break
        return result

    def segment_targets(self, reg: Any, labels: np.ndarray) -> np.ndarray:
        """Derivative targets of ``reg`` re-estimated within the stretches of ``labels``.

        Continuous form: what the fit does once labels exist (see
        :mod:`modemap.regimes.segments`), with ``reg``'s own recorded derivative settings;
        in discrete form the targets are returned unchanged.

        Parameters
        ----------
        reg : RegressionData
            Rows from :func:`modemap.data.regression.prepare_regression` with this
            finder's form.
        labels : ndarray of shape (n_rows,)
            Regime of each row.

        Returns
        -------
        ndarray of shape (n_rows, n_states)
        """
        Y = np.asarray(reg.Y, dtype=np.float64)
        if self.form != "continuous":
            return Y
        rows = Rows.of(reg.Z, Y, reg.lengths, reg.time)
        return _segment(rows, np.asarray(labels), dict(reg.derivative or {}))

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
    def predict(self, ds: Dataset) -> list[np.ndarray]:
        """Regime of every sample of ``ds`` under the fitted regimes.

        The regression rows of ``ds`` are built with the same form and derivative
        settings as in :meth:`fit` (continuous form: derivatives never taken across a
        step of a stepped input, see :mod:`modemap.regimes.segments`); each run is
        decoded by Viterbi with the fitted residual likelihoods and transition matrix
        (the optional location term is not used: it belongs to the training labels).

        Returns
        -------
        list of ndarray
            One label array per run of ``ds``.
        """
        from sklearn.utils.validation import check_is_fitted

        check_is_fitted(self, "local_fits_")
        fitted = tuple(self.library_.variables_)
        if tuple(ds.variable_names) != fitted:
            raise FitError(
                f"{ds.source}: variables {', '.join(ds.variable_names)} differ from the fitted "
                f"ones ({', '.join(fitted)})"
            )
        reg = prepare_regression(ds, form=self.form, derivative=self.regression_.derivative)
        k = self.n_regimes_
        Y = np.asarray(reg.Y, dtype=np.float64)
        if self.form == "continuous" and self.resegment:
            # no labels yet, but the steps of the inputs are known: no derivative across them
            Y = self.segment_targets(reg, np.zeros(Y.shape[0], dtype=np.int64))
        log_em = regime_log_likelihood(
            self.library_,
            np.asarray(reg.Z, dtype=np.float64),
            Y,
            [np.asarray(f.coef) for f in self.local_fits_],
            self.covariances_,
        )
        with np.errstate(divide="ignore"):
            log_trans = np.log(self.transmat_)
        # (decoding again after re-estimating the derivatives within the decoded stretches,
        # as the fit does, changed the held-out labels of the three demos by at most 0.14 %)
        path, _ = viterbi_runs(log_em, np.asarray(reg.lengths), np.full(k, -np.log(k)), log_trans)
        return _labels_per_sample(np.asarray(path), np.asarray(reg.sample_index), ds)

    @staticmethod
    def _single_row(result: RefineResult, m: int, n: int) -> pd.DataFrame:
        n_params = count_parameters(result, m)
        row = {
            "K": result.n_regimes,
            "n_regimes": result.n_regimes,
            "loglik": result.loglik,
            "n_params": n_params,
            "bic": information_criterion(result.loglik, n_params, n),
            "holdout_rmse": float("nan"),
            "chosen": True,
        }
        return pd.DataFrame([row])

    def _set_results(
        self, ds: Dataset, reg: Any, ctx: FitContext, result: RefineResult, table: pd.DataFrame
    ) -> None:
        k = result.n_regimes
        labels, order = order_regimes(result.labels, np.asarray(reg.Z)[:, 0], k)
        full = _labels_per_sample(labels, np.asarray(reg.sample_index), ds)
        trans = np.exp(result.log_trans)[np.ix_(order, order)]
        self.labels_ = full
        self.regression_labels_ = labels
        self.n_regimes_ = k
        self.local_fits_ = [result.fits[i] for i in order]
        self.regime_stats_ = [result.stats[i] for i in order]
        self.covariances_ = result.covariances[order]
        self.selection_ = table
        self.statistics_ = statistics(full, k, float(ds.step) if np.isfinite(ds.step) else 1.0)
        self.transmat_ = trans / trans.sum(axis=1, keepdims=True)
        self.library_ = ctx.library
        self.local_model_ = ctx.local
        if result.targets is not None and result.targets.shape == np.shape(reg.Y):
            reg = dataclasses.replace(reg, Y=result.targets)
        self.regression_ = reg
        self.convergence_ = result.monitor
        self.notes_ = list(result.notes) + list(ctx.notes)
        if not result.monitor.converged:
            self.notes_.append(
                f"refinement stopped after {result.monitor.iterations} iterations "
                f"with {result.monitor.changes[-1]} labels still changing"
            )


def _segment(rows: Rows, labels: np.ndarray, settings: dict[str, Any]) -> np.ndarray:
    """Derivatives re-estimated within stretches of constant label and stepped inputs."""
    m = rows.n_states
    # every stepped input cuts, those that select the regime too: the labels cut there
    # only once they are right, and a sample left on the wrong side of a step keeps a
    # derivative that agrees with its wrong label
    stepped = rows.Z[:, m:] if rows.Z.shape[1] > m else None
    return segment_derivatives(
        rows.time, rows.Z[:, :m], rows.Y, rows.lengths, labels, settings, stepped
    )


def _labels_per_sample(labels: np.ndarray, sample_index: np.ndarray, ds: Dataset) -> list:
    """Spread row labels onto every sample; samples without a row copy a neighbour."""
    full = np.full(ds.n_samples, -1, dtype=np.int64)
    full[sample_index] = labels
    out = []
    offset = 0
    for length in ds.lengths:
        out.append(_fill_gaps(full[offset : offset + length]))
        offset += int(length)
    return out


def _fill_gaps(lab: np.ndarray) -> np.ndarray:
    """Forward fill ``-1`` from the preceding sample, back fill at the start of a run."""
    ok = lab >= 0
    if ok.all() or not ok.any():
        return lab.copy()
    idx = np.where(ok, np.arange(lab.size), -1)
    idx = np.maximum.accumulate(idx)
    idx[idx < 0] = int(np.flatnonzero(ok)[0])
    return lab[idx]
