"""The whole pipeline as one estimator: data in, :class:`HybridModel` out.

``HybridIdentifier.fit`` runs, in order:

1. hold out whole runs (or run tails) for validation (:func:`validation.split_holdout`);
2. find the regimes on the rest (:class:`regimes.RegimeFinder`: HMM proposal,
   dynamics-aware refinement, choice of the number of regimes);
3. learn the switching surfaces (:class:`guards.SwitchingSurfaces`);
4. compute each regime's equilibria and whether each is reachable or virtual;
5. re-simulate the held-out runs (:func:`validation.validate`).

The saved model is the one fitted on the training part, so the validation
figures describe exactly the model in the file.
"""

from __future__ import annotations

from typing import Any

import numpy as np
import pandas as pd
from sklearn.base import BaseEstimator

from modemap._exceptions import FitError
from modemap._progress import ProgressCallback, null_progress, scaled
from modemap._version import __version__
from modemap.data.dataset import Dataset
from modemap.data.regression import prepare_regression
from modemap.model.equilibria import equilibrium_stderr, find_equilibria
from modemap.model.guards import SwitchingSurfaces, place_equilibria
from modemap.model.hybrid import HybridModel, RegimeModel
from modemap.regimes import RegimeFinder
from modemap.simulation.validation import one_step_quality, split_holdout, validate
from modemap.terms.library import TermLibrary

__all__ = ["HybridIdentifier", "labels_frame"]


class HybridIdentifier(BaseEstimator):
    """Identify a hybrid model from trajectories.

    Parameters
    ----------
    n_regimes : "auto" or int, default="auto"
        Number of regimes, or ``"auto"`` to choose it by BIC among 1..``max_regimes``.
    max_regimes : int, default=6
    form : {"continuous", "discrete"}, default="continuous"
        Continuous form fits ``dx/dt``; discrete form fits ``x[k+1]``.
    model : {"sparse", "affine"}, default="sparse"
        Sparse regression on candidate terms, or an affine operator per regime.
    degree : int, default=2
        Polynomial degree of the candidate terms (sparse model).
    custom_terms : sequence of str, default=()
        Extra candidate terms in the term grammar, e.g. an Arrhenius factor
        ``"C_A*exp(-8750/T)"`` (see :mod:`modemap.terms.expressions`).
    threshold : "auto" or float, default="auto"
        Sparsity threshold on normalised coefficients.
    derivative : str, default="auto"
        Derivative estimator (continuous form).
    final_fit : {"integral", "derivative"}, default="integral"
        Continuous form: re-choose and re-estimate each regime's terms on the integral
        form once the regimes are found (:mod:`modemap.regimes.integral`), or keep the fit on
        the derivative estimates.
    guard_kind : {"auto", "per-source", "memoryless"}, default="auto"
    guard_degree : int, default=1
    holdout : float, default=0.25
        Share of runs (or of each run's tail when there is one run) kept out of the
        fit and used to validate by re-simulation; 0 disables validation.
    tolerance : float, default=0.1
        Normalised error that ends the prediction horizon.
    min_dwell : int, default=1
    seed : int, default=0
    engine : {"local", "dask"}, default="local"
        Where per-run work runs (see :mod:`modemap.engine`).
    scheduler : str, optional
        Dask scheduler address; ``None`` starts a local in-process cluster.

    Attributes
    ----------
    model_ : HybridModel
    labels_ : pandas.DataFrame
        ``run, time, regime`` for every sample of the data, in input order.
    finder_ : RegimeFinder
    surfaces_ : SwitchingSurfaces
    train_, test_ : Dataset
    """

    def __init__(
        self,
        *,
        n_regimes: str | int = "auto",
        max_regimes: int = 6,
        form: str = "continuous",
        model: str = "sparse",
        degree: int = 2,
        custom_terms: tuple[str, ...] | list[str] = (),
        threshold: str | float = "auto",
        derivative: str = "auto",
        final_fit: str = "integral",
        guard_kind: str = "auto",
        guard_degree: int = 1,
        holdout: float = 0.25,
        tolerance: float = 0.1,
        min_dwell: int = 1,
        seed: int = 0,
        engine: str = "local",
        scheduler: str | None = None,
    ) -> None:
        self.n_regimes = n_regimes
        self.max_regimes = max_regimes
        self.form = form
        self.model = model
        self.degree = degree
        self.custom_terms = custom_terms
        self.threshold = threshold
        self.derivative = derivative
        self.final_fit = final_fit
        self.guard_kind = guard_kind
        self.guard_degree = guard_degree
        self.holdout = holdout
        self.tolerance = tolerance
        self.min_dwell = min_dwell
        self.seed = seed
        self.engine = engine
        self.scheduler = scheduler

    # ------------------------------------------------------------------ fit
    def fit(self, ds: Dataset, progress: ProgressCallback | None = None) -> HybridIdentifier:
        """Identify the hybrid model of ``ds``; returns ``self``."""
        self._check_params(ds)
        progress = progress or null_progress
        progress(0.0, "splitting off validation data")
        if self.holdout > 0:
            train, test = split_holdout(ds, self.holdout)
        else:
            train, test = ds, None
        finder = RegimeFinder(
            n_regimes=self.n_regimes,
            max_regimes=self.max_regimes,
            form=self.form,
            model=self.model,
            degree=self.degree,
            custom=tuple(self.custom_terms),
            threshold=self.threshold,
            derivative=self.derivative,
            final_fit=self.final_fit,
            min_dwell=self.min_dwell,
            seed=self.seed,
            engine=self.engine,
            scheduler=self.scheduler,
        ).fit(train, progress=scaled(progress, 0.02, 0.75))
        progress(0.75, "learning switching surfaces")
        _, x, u, lengths = train.concat()
        z = np.hstack([x, u])
        labels = np.concatenate(finder.labels_)
        surfaces = SwitchingSurfaces(
            kind=self.guard_kind, degree=self.guard_degree, seed=self.seed
        ).fit(z, labels, lengths, list(train.variable_names), units=dict(train.units))
        progress(0.82, "equilibria and stability")
        model, typical_inputs = self._assemble(train, finder, surfaces, z, labels)
        for regime, u_typ in zip(model.regimes, typical_inputs, strict=True):
            place_equilibria(model.guards, [regime], model.variables, u_typ)
        progress(0.88, "validating on held-out data")
        if test is not None:
            test_labels = finder.predict(test)
            model.validation = validate(model, test, labels=test_labels, tolerance=self.tolerance)
            model.validation["holdout"] = "runs" if len(ds.runs) >= 2 else "tails"
            model.validation["one_step"] = self._one_step(model, finder, test, test_labels)
            all_labels = _merge_labels(ds, train, finder.labels_, test, test_labels)
        else:
            all_labels = _merge_labels(ds, train, finder.labels_, None, None)
        self.model_ = model
        self.labels_ = labels_frame(ds, all_labels)
        self.finder_ = finder
        self.surfaces_ = surfaces
        self.train_ = train
        self.test_ = test
        progress(1.0, "done")
        return self

    # ------------------------------------------------------------ helpers
    def _check_params(self, ds: Dataset) -> None:
        if not isinstance(ds, Dataset):
            raise TypeError(
                "HybridIdentifier.fit expects a modemap Dataset (see modemap.read_data)"
            )
        if self.form not in ("continuous", "discrete"):
            raise FitError(f"form must be 'continuous' or 'discrete', got {self.form!r}")
        if self.model not in ("sparse", "affine"):
            raise FitError(f"model must be 'sparse' or 'affine', got {self.model!r}")
        if not (
            self.n_regimes == "auto" or (isinstance(self.n_regimes, int) and self.n_regimes >= 1)
        ):
            raise FitError(f"regimes must be 'auto' or a positive integer, got {self.n_regimes!r}")
        if not 0 <= self.holdout < 1:
            raise FitError(f"holdout must be in [0, 1), got {self.holdout!r}")

    def _equilibrium_errors(self, equilibria, library, fit, stats, u_typ, ds) -> None:
        """Standard errors of each equilibrium's coordinates (delta method), in place."""
        for e in equilibria:
            z = np.concatenate([[e.point[s] for s in ds.state_names], np.asarray(u_typ)])
            se = equilibrium_stderr(
                library, fit.coef, stats, fit.support, z, ds.n_states, form=self.form
            )
            e.stderr = {s: float(v) for s, v in zip(ds.state_names, se, strict=True)}

    def _one_step(self, model, finder, test: Dataset, test_labels) -> dict:
        """One-step quality on the held-out samples, each under its decoded regime.

        The targets are built as in training: the next sample (discrete form) or
        derivatives with the recorded settings, re-estimated within regime stretches.
        """
        reg = prepare_regression(test, form=self.form, derivative=finder.regression_.derivative)
        rows = np.concatenate(test_labels)[np.asarray(reg.sample_index)]
        return one_step_quality(model, np.asarray(reg.Z), finder.segment_targets(reg, rows), rows)

    def _assemble(self, ds, finder, surfaces, z, labels) -> tuple[HybridModel, list]:
        n_states = ds.n_states
        ranges = ds.ranges()
        bounds = np.array([ranges[n] for n in ds.state_names], dtype=float)
        regimes, typical_inputs, centroids = [], [], {}
        for k, fit in enumerate(finder.local_fits_):
            library = TermLibrary.from_terms(fit.terms, ds.variable_names)
            mask = labels == k
            u_typ = _typical_inputs(z[mask, n_states:] if mask.any() else z[:, n_states:])
            typical_inputs.append(u_typ)
            if mask.any():
                centroids[str(k)] = [float(v) for v in z[mask, :n_states].mean(axis=0)]
            eq = find_equilibria(
                library,
                fit.coef,
                n_states=n_states,
                input_values=u_typ,
                bounds=bounds,
                form=self.form,
                step=ds.step,
                seed=self.seed,
                state_names=list(ds.state_names),
            )
            self._equilibrium_errors(eq, library, fit, finder.regime_stats_[k], u_typ, ds)
            regimes.append(
                RegimeModel(
                    id=k,
                    samples=int(mask.sum()),
                    terms=list(fit.terms),
                    coefficients=np.asarray(fit.coef, dtype=float),
                    stderr=np.asarray(fit.stderr, dtype=float),
                    noise_cov=np.asarray(fit.noise_cov, dtype=float),
                    equilibria=eq,
                )
            )
        metadata: dict[str, Any] = {
            "modemap_version": __version__,
            "seed": self.seed,
            "options": {
                k: list(v) if isinstance(v, tuple) else v for k, v in self.get_params().items()
            },
            "source": ds.source,
            "notes": list(getattr(finder, "notes_", [])),
            "switching_inputs": list(getattr(finder, "switching_inputs_", [])),
            "regime_centroids": centroids,
        }
        model = HybridModel(
            states=list(ds.state_names),
            inputs=list(ds.input_names),
            form=self.form,
            regimes=regimes,
            guards=list(surfaces.guards_),
            time_name=ds.time_name,
            units=dict(ds.units),
            step=float(ds.step),
            guard_kind=surfaces.kind_,
            data_range={k: (float(a), float(b)) for k, (a, b) in ranges.items()},
            derivative=dict(finder.regression_.derivative) if self.form == "continuous" else {},
            selection=finder.selection_.to_dict(orient="records"),
            statistics=finder.statistics_,
            metadata=metadata,
        )
        return model, typical_inputs


def _typical_inputs(u: np.ndarray) -> np.ndarray:
    """Inputs at which a regime's equilibria are computed.

    A stepped input (at most 20 distinct levels) takes the level the regime spends
    most samples at; a continuously varying one its median.
    """
    out = np.empty(u.shape[1])
    for j, column in enumerate(u.T):
        levels, counts = np.unique(column, return_counts=True)
        out[j] = levels[np.argmax(counts)] if levels.size <= 20 else np.median(column)
    return out


def _merge_labels(ds, train, train_labels, test, test_labels) -> dict[str, np.ndarray]:
    """Labels per run name of ``ds`` (the split keeps run names)."""
    out = {r.name: lab for r, lab in zip(train.runs, train_labels, strict=True)}
    if test is not None:
        for r, lab in zip(test.runs, test_labels, strict=True):
            if r.name in out:  # a tail held out of the same run: append
                out[r.name] = np.concatenate([out[r.name], lab])
            else:
                out[r.name] = lab
    return out


def labels_frame(ds: Dataset, labels: dict[str, np.ndarray]) -> pd.DataFrame:
    """``run, time, regime`` for every input row of ``ds``, in input order.

    ``run`` is the run id as found in the data (before any split at gaps).
    When the data were resampled to a uniform step, the rows are the resampled
    samples (the original rows are no longer samples of the model).  A sample
    without a label gets regime -1.
    """
    if ds.resampled or ds.n_rows == 0:
        parts = []
        for r in ds.runs:
            lab = labels.get(r.name)
            reg = np.asarray(lab, dtype=np.int64) if lab is not None else np.full(r.n_samples, -1)
            parts.append(pd.DataFrame({"run": r.origin, "time": r.time, "regime": reg}))
        return pd.concat(parts, ignore_index=True)
    run = np.full(ds.n_rows, "", dtype=object)
    time = np.full(ds.n_rows, np.nan)
    regime = np.full(ds.n_rows, -1, dtype=np.int64)
    for r in ds.runs:
        lab = labels.get(r.name)
        run[r.index] = r.origin
        time[r.index] = r.time
        if lab is not None and len(lab) == r.n_samples:
            regime[r.index] = np.asarray(lab, dtype=np.int64)
    return pd.DataFrame({"run": run.astype(str), "time": time, "regime": regime})
