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
4. ``n_regimes="auto"``: K and the library order by one criterion on common targets
   (:mod:`.selection`, :mod:`.candidates`), on all rows or, above ``selection_samples``, on
   contiguous windows spread over every run, whose chosen labelling is then decoded on all
   rows and refined there;
5. continuous form: each regime's terms chosen and estimated again on the integral form over
   windows inside its stretches, with the measurement noise in the terms compensated
   (:mod:`.integral`; a local model with ``final_fit="derivative"`` keeps the fit on the
   derivatives);
6. hygiene and a stable order of ids (:mod:`.hygiene`), statistics (:mod:`.summary`);
7. each sample's regime probabilities under the final model (forward-backward), and its
   label: its most probable regime, as :meth:`RegimeFinder.predict` labels new data.

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
from modemap.fit.local_model import LocalModel, SparseLocalModel
from modemap.regimes.candidates import CandidateSearch, restretched_targets
from modemap.regimes.context import FitContext
from modemap.regimes.hygiene import default_min_samples, order_regimes
from modemap.regimes.likelihood import regime_log_likelihood
from modemap.regimes.refine import RefineResult, RefineSettings
from modemap.regimes.rows import Rows
from modemap.regimes.summary import chain_statistics, statistics
from modemap.regimes.term_checks import check_library_on_data
from modemap.regimes.viterbi import forward_backward

__all__ = ["FitContext", "RegimeFinder"]

#: Sample intervals per window of the integral-form refit (measured on the reactor demo:
#: 8 to 23 give the same spread of the high-branch coefficients, 40 a larger one).
INTEGRAL_WINDOW = 16


class RegimeFinder(CandidateSearch, BaseEstimator):
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
    surface_weight : float, default 1.0
        Weight of the term on which side of the switching surfaces the variables are, in
        the relabelling (a memoryless classifier of the rows the dynamics place with
        confidence, :class:`~modemap.regimes.likelihood.SurfaceTerm`; it places the switches
        where the dynamics of two regimes agree).  0 leaves it out.  New data are decoded
        with it too.  It is not part of the likelihood that compares candidates.
    covariance : {"auto", "tied", "full"}, default "auto"
        Residual covariance shared by all regimes, or one per regime; "auto": shared in
        continuous form (the residuals of the targets are mostly the sensors' noise, the same
        in every regime), one per regime in discrete form (the residual is the process's
        own noise, which switches with the regime as in the usual Markov-switching model).
    switching_inputs : "auto", str, sequence of str or None, default "auto"
        Inputs that select the regime rather than enter its equations; "auto": every
        input with exactly two distinct values.
    resegment : bool, default True
        Continuous form: re-estimate derivatives within regime stretches and refine again.
    engine : {"local", "dask"} or Engine, default "local"
        Where per-run work runs (:mod:`modemap.engine`).
    scheduler : str or None, default None
        Dask scheduler address.
    warm_start : bool, default False
        When fitted already with the same number of regimes (and variables), start from
        that fit: every row decoded with its models, then refined, without a new search
        (scikit-learn's meaning of the word).
    selection_samples : int, default 50_000
        On longer data, the number of regimes and the library are chosen on about this many
        rows taken as contiguous windows spread over every run; the chosen models are then
        refined on all rows (a note says so).  The search scores every candidate of every
        K (docs/performance.md: its cost grows with the rows it runs on).

    Attributes
    ----------
    labels_ : list of ndarray of int
        Regime id of every sample, one array per run of the dataset.
    n_regimes_ : int
    local_fits_ : list of LocalFit
    selection_ : DataFrame
        One row per candidate: ``K, degree, n_regimes, loglik, n_params, criterion,
        effective_windows, collapsed, chosen`` (:mod:`modemap.regimes.selection`).
    statistics_ : dict
        Shares, dwell times, switch counts (:func:`modemap.regimes.summary.statistics`),
        and the chain's ``transition_matrix``, ``transition_stderr``, ``expected_duration``
        and ``expected_duration_stderr`` (:func:`modemap.regimes.summary.chain_statistics`).
    transmat_ : ndarray of shape (K, K)
    library_ : fitted TermLibrary
    local_model_ : BoundLocalModel
    regression_ : RegressionData
    posteriors_ : list of ndarray of shape (n_samples, K)
        Each sample's regime probabilities given all the data of its run (forward-backward
        under the final model, on the common targets), one array per run.
    degree_ : int or None
        The library order chosen.
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
        "surface_weight": [Interval(float, 0, None)],
        "covariance": [Options(("auto", "tied", "full"))],
        "switching_inputs": [str, SEQUENCE_OF_STR, None],
        "resegment": [BOOLEAN],
        "engine": [Options(ENGINES), Engine],
        "scheduler": [str, None],
        "selection_samples": [Interval(int, 1, None)],
        "warm_start": [BOOLEAN],
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
        surface_weight: float = 1.0,
        covariance: str = "auto",
        switching_inputs: str | Sequence[str] | None = "auto",
        resegment: bool = True,
        engine: Any = "local",
        scheduler: str | None = None,
        selection_samples: int = 50_000,
        warm_start: bool = False,
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
        self.surface_weight = surface_weight
        self.covariance = covariance
        self.switching_inputs = switching_inputs
        self.resegment = resegment
        self.engine = engine
        self.scheduler = scheduler
        self.selection_samples = selection_samples
        self.warm_start = warm_start

    def _covariance(self) -> str:
        if self.covariance != "auto":
            return self.covariance
        return "full" if self.form == "discrete" else "tied"

    def check_terms(self, ds: Dataset) -> None:
        """Refuse candidate terms that are not finite, too large or collinear on ``ds``.

        The largest library the fit would use is evaluated on every sample; see
        :mod:`modemap.terms.checks` for what is refused and how it is named.

        Raises
        ------
        ExpressionError, DataError
        """
        exclude = self._switching_inputs(ds)
        check_library_on_data(self._local_spec(), ds, form=self.form, exclude=exclude)

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
            min_samples = default_min_samples(len(local.terms), self.n_regimes != "auto")
        settings = RefineSettings(
            local=local,
            sticky=float(self.sticky),
            location_weight=float(self.location_weight),
            surface_weight=float(self.surface_weight),
            covariance=self._covariance(),
            min_samples=int(min_samples),
            min_dwell=int(self.min_dwell),
            max_iter=int(self.max_iter),
        )
        return FitContext(
            local,
            settings,
            engine,
            list(ds.state_names),
            list(ds.variable_names),
            list(self.switching_inputs_),
            dict(reg.derivative or {}),
        )

    def _fit(self, ds: Dataset, progress: ProgressCallback, engine: Engine) -> RegimeFinder:
        self.check_terms(ds)
        reg = prepare_regression(ds, form=self.form, derivative=self.derivative)
        ctx = self._context(ds, reg, engine)
        # the common targets: no regime information (continuous form: derivatives never
        # taken across a step of a stepped input, as for new data in predict)
        rows = Rows.of(reg.Z, self._common_targets(reg), reg.lengths, reg.time)
        if rows.n_rows < 2:
            raise FitError(f"{ds.source}: too few samples to find regimes ({rows.n_rows})")
        wanted = self.n_regimes
        if wanted != "auto" and wanted * ctx.settings.min_samples > rows.n_rows:
            raise FitError(
                f"{wanted} regimes were asked for, but the {rows.n_rows} samples hold at most "
                f"{rows.n_rows // ctx.settings.min_samples} regime(s) of "
                f"{ctx.settings.min_samples} samples (the smallest regime kept)"
            )
        integral = ctx.local.integral_final_fit
        overall, progress = progress, scaled(progress, 0.0, 0.95) if integral else progress
        if self._warm(ds):
            chosen, table = self._from_fitted(ctx, rows, ds, progress)
        else:
            chosen, table = self._choose(ctx, rows, progress)
        ctx = ctx.at_degree(chosen.degree)
        result = chosen.result
        if integral and result.labels.size == rows.n_rows:
            overall(0.95, "estimating the coefficients again on the integral form")
            result = self._integral_refit(ctx, rows, result)
        self._set_results(ds, reg, ctx, result, table)
        self._soft_pass(ds, rows, ctx.settings.min_samples)
        overall(1.0, f"{self.n_regimes_} regime(s) found")
        return self

    def _warm(self, ds: Dataset) -> bool:
        """Start from the regimes of the last fit (``warm_start``)?"""
        return (
            bool(self.warm_start)
            and hasattr(self, "local_fits_")
            and self.n_regimes == self.n_regimes_
            and tuple(ds.variable_names) == tuple(self.variables_)
        )

    def _common_targets(self, reg: Any) -> np.ndarray:
        Y = np.asarray(reg.Y, dtype=np.float64)
        if self.form == "continuous" and self.resegment:
            return self.segment_targets(reg, np.zeros(Y.shape[0], dtype=np.int64))
        return Y

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
        return restretched_targets(rows, np.asarray(labels), dict(reg.derivative or {}))

    def predict(self, ds: Dataset) -> list[np.ndarray]:
        """Regime of every sample of ``ds`` under the fitted regimes.

        The regression rows of ``ds`` are built with the same form and derivative
        settings as in :meth:`fit` (continuous form: derivatives never taken across a
        step of a stepped input, see :mod:`modemap.regimes.segments`); each sample gets
        its most probable regime given all of its run (:meth:`predict_proba`: the fitted
        residual likelihoods, the further emission terms of the final fit (location,
        surface) and the transition matrix), as the fit labels its own samples.

        Returns
        -------
        list of ndarray
            One label array per run of ``ds``.
        """
        return [np.argmax(p, axis=1) for p in self.predict_proba(ds)]

    def predict_proba(self, ds: Dataset) -> list[np.ndarray]:
        """Each sample's probability of each regime given all of its run (forward-backward
        with the emissions and chain of :meth:`predict`).

        Returns
        -------
        list of ndarray of shape (n_samples, n_regimes)
            One per run of ``ds``; a sample without a regression row (discrete form: a
            run's last sample) takes that of the sample before it.
        """
        log_em, reg = self._emissions(ds)
        k = self.n_regimes_
        with np.errstate(divide="ignore"):
            log_trans = np.log(self.transmat_)
        _, post = forward_backward(
            log_em, np.asarray(reg.lengths), np.full(k, -np.log(k)), log_trans
        )
        labels = _labels_per_sample(np.argmax(post, axis=1), np.asarray(reg.sample_index), ds)
        return _rows_per_sample(post, np.asarray(reg.sample_index), labels)

    def _emissions(self, ds: Dataset) -> tuple[np.ndarray, Any]:
        """Emission log-likelihoods (n_rows, K) of ``ds``'s regression rows, and the rows."""
        from sklearn.utils.validation import check_is_fitted

        check_is_fitted(self, "local_fits_")
        fitted = tuple(self.variables_)
        if tuple(ds.variable_names) != fitted:
            raise FitError(
                f"{ds.source}: variables {', '.join(ds.variable_names)} differ from the fitted "
                f"ones ({', '.join(fitted)})"
            )
        reg = prepare_regression(ds, form=self.form, derivative=self.regression_.derivative)
        Y = np.asarray(reg.Y, dtype=np.float64)
        if self.form == "continuous" and self.resegment:
            # no labels yet, but the steps of the inputs are known: no derivative across them
            Y = self.segment_targets(reg, np.zeros(Y.shape[0], dtype=np.int64))
        Z = np.asarray(reg.Z, dtype=np.float64)
        coefs = [np.asarray(f.coef) for f in self.local_fits_]
        log_em = regime_log_likelihood(self.library_, Z, Y, coefs, self.covariances_)
        for term in self.emission_terms_:
            log_em += term.log_prob(Z, Y.shape[1])
        return log_em, reg

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
        self.order_ = order
        self.local_fits_ = [result.fits[i] for i in order]
        self.regime_stats_ = [result.stats[i] for i in order]
        self.covariances_ = result.covariances[order]
        self.emission_terms_ = tuple(term.reordered(order) for term in result.terms)
        self.selection_ = table
        self.transmat_ = trans / trans.sum(axis=1, keepdims=True)
        self._set_statistics(ds)
        self.library_ = ctx.library
        self.variables_ = list(ctx.variables)
        self.local_model_ = ctx.local
        self.degree_ = ctx.local.degree
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

    def _set_statistics(self, ds: Dataset) -> None:
        """Shares, dwell times and switches of ``labels_``, and the chain's figures."""
        step = float(ds.step) if np.isfinite(ds.step) else 1.0
        self.statistics_ = statistics(self.labels_, self.n_regimes_, step)
        self.statistics_.update(chain_statistics(self.transmat_, self.labels_, step))

    def _soft_pass(self, ds: Dataset, rows: Rows, min_samples: int) -> None:
        """Each sample's regime probabilities under the final model, and its regime.

        The probabilities: forward-backward with the final model's emissions on the common
        targets and its chain, in the reported order of ids, one array per run.  Each
        sample's regime is then its most probable one (posterior decoding, which makes the
        expected number of wrongly labelled samples smallest: "A tutorial on hidden Markov
        models and selected applications in speech recognition", Proceedings of the IEEE
        77(2), 1989, DOI 10.1109/5.18626), as :meth:`predict` gives on new data.  The
        refinement's labels are kept when that would leave a regime with fewer than
        ``min_samples`` samples it had before, and samples the refinement left unassigned
        stay so.
        """
        coefs = [np.asarray(f.coef) for f in self.local_fits_]
        log_em = regime_log_likelihood(self.library_, rows.Z, rows.Y, coefs, self.covariances_)
        for term in self.emission_terms_:
            log_em += term.log_prob(rows.Z, rows.n_states)
        k = self.n_regimes_
        with np.errstate(divide="ignore"):
            log_trans = np.log(self.transmat_)
        _, post = forward_backward(log_em, rows.lengths, np.full(k, -np.log(k)), log_trans)
        index = np.asarray(self.regression_.sample_index)
        old = np.asarray(self.regression_labels_)
        # samples the refinement left unassigned (a regime too small to keep) stay so
        decoded = np.where(old >= 0, np.argmax(post, axis=1), old)
        before = np.bincount(old[old >= 0], minlength=k)[:k]
        after = np.bincount(decoded[decoded >= 0], minlength=k)[:k]
        if np.any((after < min_samples) & (before >= min_samples)):
            self.notes_.append(
                "each sample's most probable regime would leave a regime with fewer than "
                f"{min_samples} samples; the labels are the refinement's"
            )
        else:
            self.regression_labels_ = decoded
            self.labels_ = _labels_per_sample(decoded, index, ds)
            self._set_statistics(ds)
        self.posteriors_ = _rows_per_sample(post, index, self.labels_)


def _rows_per_sample(values: np.ndarray, sample_index: np.ndarray, labels: list) -> list:
    """Row values (n_rows, K) spread onto every sample of each run; a sample without a row
    (discrete form: a run's last sample) takes the one-hot of its label."""
    k = values.shape[1]
    total = sum(lab.size for lab in labels)
    full = np.full((total, k), np.nan)
    full[sample_index] = values
    out, offset = [], 0
    for lab in labels:
        part = full[offset : offset + lab.size]
        missing = np.isnan(part[:, 0])
        if missing.any():
            part[missing] = np.eye(k)[np.clip(lab[missing], 0, k - 1)]
        out.append(part)
        offset += lab.size
    return out


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
