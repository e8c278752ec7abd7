"""RegimeFinder: the regime-discovery stage as one scikit-learn style estimator.

Pipeline inside :meth:`RegimeFinder.fit`:

1. regression rows from the dataset (:func:`modemap.data.regression.prepare_regression`): variables
   ``Z = [states, inputs]`` and targets ``Y`` (derivatives, or next states in discrete form);
2. a term library (degree-1 for the affine model, ``degree`` otherwise, or the given ``terms``);
3. for each number of regimes tried: sticky Gaussian HMM proposals (:mod:`.proposal`) on
   standardised features ``[states, increments or derivatives, inputs]`` and on the residuals
   of a single model fitted to all rows, each refined by the hard-EM switching regression
   (:mod:`.refine`); the refined labelling with the higher likelihood is kept;
4. ``n_regimes="auto"``: K by BIC on the first 80 % of each run (:mod:`.selection`), then the
   chosen labelling is extended to all rows (held-out tails decoded by Viterbi) and refined
   there, so the model returned is the one the selection table scored;
5. continuous form: each regime's terms chosen and estimated again on the integral form over
   windows inside its stretches, with the measurement noise in the terms compensated
   (:mod:`modemap.regimes.integral`; ``final_fit="derivative"`` keeps the fit on the derivatives);
6. hygiene and a stable order of ids (:mod:`.hygiene`), statistics (:mod:`.summary`).

Labels of samples that have no regression row (in discrete form, the last sample of each run,
which has no successor) are copied from the preceding sample of the same run (from the
following one if no sample precedes), so every sample carries a regime.
"""

from __future__ import annotations

import dataclasses
from collections.abc import Sequence
from typing import Any

import numpy as np
import pandas as pd
from sklearn.base import BaseEstimator

from modemap._exceptions import FitError
from modemap._progress import ProgressCallback, null_progress, scaled
from modemap.data.dataset import Dataset
from modemap.fit.statistics import accumulate
from modemap.regimes.hygiene import default_min_samples, order_regimes
from modemap.regimes.proposal import propose
from modemap.regimes.refine import (
    RefineResult,
    fit_regimes,
    refine,
    regime_log_likelihood,
    residuals,
)
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

__all__ = ["RegimeFinder"]

_FORMS = ("continuous", "discrete")
_WINDOWS_PER_REGIME = 5  # the window proposal needs at least this many windows per regime
_WINDOW = 5_000  # typical window length (rows) when K is chosen on part of a long record
_MODELS = ("sparse", "affine")
_FINAL_FITS = ("integral", "derivative")
#: Sample intervals per window of the integral-form refit (measured on the reactor demo:
#: 8 to 23 give the same spread of the high-branch coefficients, 40 a larger one).
INTEGRAL_WINDOW = 16


class RegimeFinder(BaseEstimator):
    """Find the regimes of logged trajectories and a local model in each.

    Parameters
    ----------
    n_regimes : "auto" or int, default "auto"
        Number of regimes; "auto" chooses 1..max_regimes by BIC.
    max_regimes : int, default 6
    form : {"continuous", "discrete"}, default "continuous"
    model : {"sparse", "affine"}, default "sparse"
    degree : int, default 2
        Degree of the candidate monomials (sparse model).
    threshold : "auto" or float, default "auto"
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
    terms : sequence of str or None, default None
        Explicit candidate terms (overrides ``degree`` and ``model``'s library).
    custom : sequence of str, default ()
        Extra candidate terms written in the term grammar (e.g. ``"C_A*exp(-8750/T)"``),
        added to the polynomial library of the sparse model.
    location_weight : float, default 0.0
        Weight of the Gaussian term on where the state sits in the relabelling.
    selection_samples : int, default 200_000
        With ``n_regimes="auto"`` on longer data, K is chosen on about this many rows taken
        as contiguous windows spread over every run; the chosen models are then refined on
        all rows (a note says so).
    covariance : {"tied", "full"}, default "tied"
        Residual covariance shared by all regimes, or one per regime.
    final_fit : {"integral", "derivative"}, default "integral"
        Continuous form: once the labels are settled, choose each regime's terms (sparse
        model) and estimate its coefficients again from the integral of the model over
        windows of ``INTEGRAL_WINDOW`` sample intervals (:mod:`modemap.regimes.integral`), or keep
        the fit on the derivative estimates.  Ignored in discrete form.

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
    regression_ : RegressionData
    notes_ : list of str
    convergence_ : ConvergenceRecord of the final refinement
    covariances_ : ndarray of shape (K, m, m)
    regime_stats_ : list of GramStats
        Each regime's normal-equation statistics (what its local fit was computed from;
        with the integral final fit, the window statistics scaled to the effective number
        of windows, see :mod:`modemap.regimes.integral`).
    """

    def __init__(
        self,
        *,
        n_regimes: str | int = "auto",
        max_regimes: int = 6,
        form: str = "continuous",
        model: str = "sparse",
        degree: int = 2,
        threshold: str | float = "auto",
        derivative: str = "auto",
        sticky: float = 0.99,
        n_restarts: int = 3,
        max_iter: int = 30,
        min_samples: int | None = None,
        min_dwell: int = 1,
        seed: int = 0,
        terms: Sequence[str] | None = None,
        custom: Sequence[str] = (),
        location_weight: float = 0.0,
        covariance: str = "tied",
        switching_inputs: str | Sequence[str] | None = "auto",
        resegment: bool = True,
        final_fit: str = "integral",
        engine: Any = "local",
        scheduler: str | None = None,
        selection_samples: int = 200_000,
    ) -> None:
        self.engine = engine
        self.scheduler = scheduler
        self.selection_samples = selection_samples
        self.n_regimes = n_regimes
        self.max_regimes = max_regimes
        self.form = form
        self.model = model
        self.degree = degree
        self.threshold = threshold
        self.derivative = derivative
        self.sticky = sticky
        self.n_restarts = n_restarts
        self.max_iter = max_iter
        self.min_samples = min_samples
        self.min_dwell = min_dwell
        self.seed = seed
        self.terms = terms
        self.custom = custom
        self.location_weight = location_weight
        self.covariance = covariance
        self.switching_inputs = switching_inputs
        self.resegment = resegment
        self.final_fit = final_fit

    # ------------------------------------------------------------------ checks
    def _check_params(self) -> None:
        if self.form not in _FORMS:
            raise FitError(f"form must be one of {', '.join(_FORMS)}, got {self.form!r}")
        if self.model not in _MODELS:
            raise FitError(f"model must be one of {', '.join(_MODELS)}, got {self.model!r}")
        k = self.n_regimes
        if not (k == "auto" or (isinstance(k, int | np.integer) and not isinstance(k, bool))):
            raise FitError(f"n_regimes must be 'auto' or an integer, got {k!r}")
        if k != "auto" and k < 1:
            raise FitError(f"n_regimes must be >= 1, got {k}")
        if int(self.max_regimes) < 1:
            raise FitError(f"max_regimes must be >= 1, got {self.max_regimes}")
        if not 0.0 < float(self.sticky) < 1.0:
            raise FitError(f"sticky must be between 0 and 1 (exclusive), got {self.sticky}")
        if self.covariance not in ("tied", "full"):
            raise FitError(f"covariance must be 'tied' or 'full', got {self.covariance!r}")
        if int(self.min_dwell) < 1:
            raise FitError(f"min_dwell must be >= 1, got {self.min_dwell}")
        if self.final_fit not in _FINAL_FITS:
            choices = ", ".join(_FINAL_FITS)
            raise FitError(f"final_fit must be one of {choices}, got {self.final_fit!r}")

    def _library(self, variables: Sequence[str], excluded: Sequence[str] = ()) -> Any:
        from modemap.terms.library import TermLibrary

        if self.terms is not None:
            return TermLibrary.from_terms(list(self.terms), variables)
        degree = 1 if self.model == "affine" else int(self.degree)
        custom = () if self.model == "affine" else tuple(self.custom)
        library = TermLibrary(degree=degree, custom=custom).fit(variables)
        if not excluded:
            return library
        keep = [t for t in library.terms_ if not _uses(t, excluded)]
        return TermLibrary.from_terms(keep, variables)

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
        from modemap.engine import get_engine

        self._check_params()
        engine = get_engine(self.engine, self.scheduler)  # FitError on a bad name / no Dask
        try:
            return self._fit(ds, progress, engine)
        finally:
            if isinstance(self.engine, str):  # close only what this fit started or joined
                engine.close()
            self._engine, self._scattered = None, None

    def _fit(self, ds: Dataset, progress: ProgressCallback | None, engine: Any) -> RegimeFinder:
        from modemap.data.regression import prepare_regression

        # the default local engine keeps the fast path: all rows at once, no map over runs
        self._engine = None if engine.name == "local" else engine
        self._scattered = None
        progress = progress or null_progress
        reg = prepare_regression(ds, form=self.form, derivative=self.derivative)
        self.switching_inputs_ = self._switching_inputs(ds)
        library = self._library(ds.variable_names, self.switching_inputs_)
        Z, Y = np.asarray(reg.Z, dtype=np.float64), np.asarray(reg.Y, dtype=np.float64)
        lengths = np.asarray(reg.lengths, dtype=np.int64)
        if Z.shape[0] < 2:
            raise FitError(f"{ds.source}: too few samples to find regimes ({Z.shape[0]})")
        self._min_samples = (
            default_min_samples(library.n_terms_, ds.n_states)
            if self.min_samples is None
            else int(self.min_samples)
        )
        self._library_fitted = library
        self._selection_note = None
        self._reg_time = reg.time
        self._state_names = list(ds.state_names)
        self._reg_lengths = lengths
        self._derivative_settings = dict(reg.derivative or {})
        integral = self.form == "continuous" and self.final_fit == "integral"
        overall, progress = progress, scaled(progress, 0.0, 0.95) if integral else progress
        if self.n_regimes == "auto":
            kmax = max(1, min(int(self.max_regimes), Z.shape[0] // self._min_samples))
            sub = self._selection_rows(lengths)
            if sub is None:
                table, results = select_regimes(
                    self._fit_k, library, Z, Y, lengths, kmax, progress=scaled(progress, 0.0, 0.8)
                )
            else:
                table, results = self._select_on_windows(
                    library, Z, Y, reg.time, lengths, sub, kmax, scaled(progress, 0.0, 0.8)
                )
            k = int(table.loc[table["chosen"], "K"].iloc[0])
            result = self._extend(
                Z, Y, lengths, results[k], scaled(progress, 0.8, 0.9), all_rows=sub is not None
            )
            if result.n_regimes != results[k].n_regimes:  # lost a regime on all rows
                fresh = self._fit_k(Z, Y, lengths, k, scaled(progress, 0.9, 1.0))
                if fresh.n_regimes > result.n_regimes:
                    result = fresh
        else:
            result = self._fit_k(Z, Y, lengths, int(self.n_regimes), scaled(progress, 0.0, 1.0))
            table = self._single_row(result, Y.shape[1], Z.shape[0])
        if integral and result.labels.size == len(Z):
            overall(0.95, "estimating the coefficients again on the integral form")
            result = self._integral_refit(Z, reg, library, result)
        self._set_results(ds, reg, library, result, table)
        overall(1.0, f"{self.n_regimes_} regime(s) found")
        return self

    def _integral_refit(
        self, Z: np.ndarray, reg: Any, library: Any, result: RefineResult
    ) -> RefineResult:
        """The final fits and statistics re-estimated on the integral form (module notes)."""
        from modemap.regimes.integral import integral_refit

        select = None
        if self.model == "sparse":

            def select(stats):
                return fit_regimes(
                    [stats], library.terms_, threshold=self.threshold, variables=library.variables_
                )[0]

        done = integral_refit(
            library,
            Z,
            np.asarray(reg.Y).shape[1],
            np.asarray(reg.time),
            np.asarray(reg.lengths),
            result.labels,
            result.fits,
            result.stats,
            window=INTEGRAL_WINDOW,
            select=select,
        )
        notes = list(result.notes)
        if not done.compensated.all():  # ids as reported: ordered like _set_results does
            _, order = order_regimes(result.labels, Z[:, 0], result.n_regimes)
            states = list(self._state_names)
            for new, old in enumerate(order):
                if not done.compensated[old].all():
                    names = ", ".join(states[j] for j in np.flatnonzero(~done.compensated[old]))
                    notes.append(
                        f"regime {new}: measurement noise too large against the signal to "
                        f"compensate in the integral-form fit of {names}; the plain integral "
                        "estimate was kept"
                    )
        return dataclasses.replace(result, fits=done.fits, stats=done.stats, notes=notes)

    def _fit_k(
        self,
        Z: np.ndarray,
        Y: np.ndarray,
        lengths: np.ndarray,
        k: int,
        progress: ProgressCallback,
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
        starts = [(self._features(Z, Y), lengths, None)]
        if k > 1:
            starts.append((self._global_residuals(Z, Y), lengths, None))
            per_run, sizes = window_lengths(lengths, self._window())
            if sizes.size >= _WINDOWS_PER_REGIME * k:  # enough windows to tell K groups apart
                coef = window_coefficients(self._library_fitted, Z, Y, sizes)
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
            result = self._refine(Z, Y, lengths, labels, k, step)
            if best is None or result.loglik > best.loglik:
                best = result
        if self.form == "continuous" and self.resegment and best.n_regimes > 1:
            best = self._resegment(Z, Y, lengths, best, progress)
        return best

    def _extend(
        self,
        Z: np.ndarray,
        Y: np.ndarray,
        lengths: np.ndarray,
        chosen: RefineResult,
        progress: ProgressCallback,
        *,
        all_rows: bool = False,
    ) -> RefineResult:
        """Refit the chosen labelling of the training part on all rows.

        With ``all_rows`` (K was chosen on windows of the data, see
        :meth:`_select_on_windows`) every row is decoded with the chosen models first.

        The held-out tails are decoded by Viterbi with the chosen models and chain, and
        the refinement on all rows starts from those labels.  A fresh proposal with the
        chosen K could land on another labelling, or lose regimes to hygiene, so that the
        model returned would not be the one the selection table describes.  When
        this refit still loses a regime (hygiene on all rows), :meth:`fit` also tries
        a fresh fit of the chosen K and keeps the one with more regimes.
        """
        if all_rows:  # K was chosen on windows: decode every row with the chosen models
            log_em = regime_log_likelihood(
                self._library_fitted,
                Z,
                Y,
                [np.asarray(f.coef) for f in chosen.fits],
                chosen.covariances,
            )
            labels, _ = viterbi_runs(log_em, lengths, chosen.log_start, chosen.log_trans)
            held = np.zeros(Z.shape[0], dtype=bool)
        else:
            held = holdout_split(lengths)
            labels = np.empty(Z.shape[0], dtype=np.int64)
            labels[~held] = chosen.labels
        if held.any():
            runs = np.repeat(np.arange(lengths.size), lengths)[held]
            tail_len = np.bincount(runs, minlength=lengths.size)
            log_em = regime_log_likelihood(
                self._library_fitted,
                Z[held],
                Y[held],
                [np.asarray(f.coef) for f in chosen.fits],
                chosen.covariances,
            )
            tails, _ = viterbi_runs(
                log_em, tail_len[tail_len > 0], chosen.log_start, chosen.log_trans
            )
            labels[held] = tails
        k = chosen.n_regimes
        # labels decoded on every row come from settled models: no dense settling phase
        result = self._refine(Z, Y, lengths, labels, k, progress, settle_dense=not all_rows)
        if self.form == "continuous" and self.resegment and result.n_regimes > 1:
            result = self._resegment(Z, Y, lengths, result, progress)
        return result

    def _selection_rows(self, lengths: np.ndarray) -> tuple[np.ndarray, np.ndarray] | None:
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
        width = max(cap // n_windows, 2 * self._min_samples)
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

    def _select_on_windows(self, library, Z, Y, time, lengths, sub, kmax, progress):
        """:func:`select_regimes` on the selection windows (see :meth:`_selection_rows`)."""
        mask, sizes = sub
        self._reg_time, self._reg_lengths = time[mask], sizes
        try:
            out = select_regimes(
                self._fit_k, library, Z[mask], Y[mask], sizes, kmax, progress=progress
            )
        finally:
            self._reg_time, self._reg_lengths = time, lengths
        self._selection_note = (
            f"number of regimes chosen on {int(mask.sum())} of {mask.size} samples "
            f"({sizes.size} contiguous windows); the chosen models were then refined on all"
        )
        return out

    def _resegment(
        self,
        Z: np.ndarray,
        Y: np.ndarray,
        lengths: np.ndarray,
        result: RefineResult,
        progress: ProgressCallback,
    ) -> RefineResult:
        """Re-estimate derivatives within regime stretches and refine again (twice at most).

        See :mod:`modemap.regimes.segments`.  The targets used by the final refinement are
        kept in ``result.targets`` so that the fitted models and the likelihood agree.
        """
        time = self._row_time(Z.shape[0])
        for _ in range(2):
            y2 = self._segment(time, Z, Y, lengths, result.labels, self._derivative_settings)
            new = self._refine(Z, y2, lengths, result.labels, result.n_regimes, progress)
            new.targets = y2
            unchanged = np.array_equal(new.labels, result.labels)
            result = new
            if unchanged:
                break
        return result

    def _segment(self, time, Z, Y, lengths, labels, settings) -> np.ndarray:
        """Derivatives re-estimated within stretches of constant label and stepped inputs."""
        m = Y.shape[1]
        # every stepped input cuts, those that select the regime too: the labels cut there
        # only once they are right, and a sample left on the wrong side of a step keeps a
        # derivative that agrees with its wrong label
        stepped = Z[:, m:] if Z.shape[1] > m else None
        return segment_derivatives(time, Z[:, :m], Y, lengths, labels, settings, stepped)

    def segment_targets(self, reg: Any, labels: np.ndarray) -> np.ndarray:
        """Derivative targets of ``reg`` re-estimated within the stretches of ``labels``.

        Continuous form: what the fit does once labels exist (see
        :mod:`modemap.regimes.segments`), with ``reg``'s own recorded derivative settings;
        in discrete form the targets are returned unchanged.

        Parameters
        ----------
        reg : RegressionData
            Rows from :func:`modemap.data.regression.prepare_regression` with this finder's form.
        labels : ndarray of shape (n_rows,)
            Regime of each row.

        Returns
        -------
        ndarray of shape (n_rows, n_states)
        """
        Y = np.asarray(reg.Y, dtype=np.float64)
        if self.form != "continuous":
            return Y
        return self._segment(
            np.asarray(reg.time),
            np.asarray(reg.Z, dtype=np.float64),
            Y,
            np.asarray(reg.lengths),
            np.asarray(labels),
            dict(reg.derivative or {}),
        )

    def _row_time(self, n: int) -> np.ndarray:
        """Time stamps of the rows given to ``_fit_k`` (all rows, or the selection's part)."""
        time = np.asarray(self._reg_time)
        if n == time.size:
            return time
        held = holdout_split(self._reg_lengths)
        if n == int((~held).sum()):
            return time[~held]
        raise FitError("internal: rows given to the regime fit do not match the data")

    def _refine(self, Z, Y, lengths, labels, k, progress, settle_dense=True) -> RefineResult:
        return refine(
            Z,
            Y,
            lengths,
            labels,
            self._library_fitted,
            n_regimes=k,
            model=self.model,
            threshold=self.threshold,
            sticky=float(self.sticky),
            location_weight=float(self.location_weight),
            covariance=self.covariance,
            min_samples=self._min_samples,
            min_dwell=int(self.min_dwell),
            max_iter=int(self.max_iter),
            settle_dense=settle_dense,
            increments=self.form == "discrete",
            interior=self.form == "discrete",
            progress=progress,
            engine=self._engine,
            runs=self._runs(Z, Y, lengths),
        )

    def _runs(self, Z: np.ndarray, Y: np.ndarray, lengths: np.ndarray) -> Any:
        """Runs placed on the engine's workers once per set of rows (None on the local path)."""
        if self._engine is None:
            return None
        from modemap.engine import split_runs

        cached = self._scattered
        if cached is None or cached[0] is not Z or cached[1] is not Y:
            self._scattered = cached = (Z, Y, self._engine.scatter(split_runs(Z, Y, lengths)))
        return cached[2]

    def _window(self) -> int:
        """Rows per window of the local-model proposal: four per term, at least 12."""
        return max(12, 4 * int(self._library_fitted.n_terms_))

    def _global_residuals(self, Z: np.ndarray, Y: np.ndarray) -> np.ndarray:
        """Residuals of a single model fitted to all rows (a dynamics-aware feature)."""
        stats = accumulate(self._library_fitted, Z, Y)
        fit = fit_regimes(
            [stats],
            self._library_fitted.terms_,
            model=self.model,
            threshold=self.threshold,
            variables=self._library_fitted.variables_,
            increments=self.form == "discrete",
        )[0]
        return residuals(self._library_fitted, Z, Y, np.asarray(fit.coef))

    def _features(self, Z: np.ndarray, Y: np.ndarray) -> np.ndarray:
        """``[states, increments (discrete) or derivatives (continuous), inputs]``."""
        m = Y.shape[1]
        x, u = Z[:, :m], Z[:, m:]
        motion = Y - x if self.form == "discrete" else Y
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

        from modemap.data.regression import prepare_regression

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
        self, ds: Dataset, reg: Any, library: Any, result: RefineResult, table: pd.DataFrame
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
        self.library_ = library
        if result.targets is not None and result.targets.shape == np.shape(reg.Y):
            reg = dataclasses.replace(reg, Y=result.targets)
        self.regression_ = reg
        self.convergence_ = result.monitor
        self.notes_ = list(result.notes)
        if getattr(self, "_selection_note", None):
            self.notes_.append(self._selection_note)
        if not result.monitor.converged:
            self.notes_.append(
                f"refinement stopped after {result.monitor.iterations} iterations "
                f"with {result.monitor.changes[-1]} labels still changing"
            )


def _uses(term: str, names: Sequence[str]) -> bool:
    """True when the canonical term string mentions one of ``names``."""
    import re

    tokens = set(re.findall(r"[A-Za-z_][A-Za-z0-9_]*", term))
    return any(n in tokens for n in names)


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
