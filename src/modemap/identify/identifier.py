"""The whole pipeline as one estimator: data in, :class:`HybridModel` out.

``HybridIdentifier.fit`` goes down the stages once, each stage's result handed to the next:

1. **data**: hold out whole runs (or run tails) for validation
   (:func:`modemap.data.split.split_holdout`);
2. **regimes and local models**: the regime finder on the rest
   (:class:`~modemap.regimes.RegimeFinder`: HMM proposal, dynamics-aware refinement, choice
   of the number of regimes, each regime's local model);
3. **equilibria**: each regime's equilibria with their standard errors, at its typical
   inputs (:func:`modemap.model.equilibria.regime_equilibria`);
4. **guards**: the switching surfaces (:class:`~modemap.model.guards.SwitchingSurfaces`), then
   each equilibrium marked reachable or virtual (:func:`modemap.model.equilibria.place_equilibria`);
5. **model**: the :class:`~modemap.model.hybrid.HybridModel`;
6. **validation**: the held-out runs re-simulated (:func:`modemap.simulation.validation.validate`).

The stages are parameters (``regimes``, ``guards``), so every setting is reachable as
``regimes__sticky``, ``regimes__local_model__degree`` or ``guards__kind``.  The number of
regimes and the library are chosen, and the validation figures measured, on the training
part; the model written is then fitted again on all data with that number of regimes and
that library (``refit=False`` keeps the model of the training part).
"""

from __future__ import annotations

import copy
from typing import Any, ClassVar

import numpy as np
import pandas as pd
from sklearn.base import BaseEstimator, clone

from modemap._exceptions import FitError
from modemap._params import BOOLEAN, Interval, check_params
from modemap._progress import ProgressCallback, null_progress, scaled
from modemap._version import __version__
from modemap.data.dataset import Dataset
from modemap.data.regression import prepare_regression
from modemap.data.split import split_holdout
from modemap.identify.options import options_record, stage_parameters
from modemap.model.equilibria import place_equilibria, regime_equilibria, typical_inputs
from modemap.model.guards import SwitchingSurfaces
from modemap.model.hybrid import HybridModel, RegimeModel
from modemap.regimes import RegimeFinder
from modemap.simulation.validation import one_step_quality, validate
from modemap.terms.library import TermLibrary

__all__ = ["HybridIdentifier", "labels_frame"]


class HybridIdentifier(BaseEstimator):
    """Identify a hybrid model from trajectories.

    Parameters
    ----------
    regimes : RegimeFinder or None, default None
        The regime stage, with its local model (``regimes__local_model``); None: a
        :class:`~modemap.regimes.RegimeFinder` with its defaults.
    guards : SwitchingSurfaces or None, default None
        The guard stage; None: a :class:`~modemap.model.guards.SwitchingSurfaces` with its
        defaults.
    holdout : float, default 0.25
        Share of runs (or of each run's tail when there is one run) kept out of the
        fit and used to validate by re-simulation; 0 disables validation.
    refit : bool, default True
        After validation, fit the model again on all data with the number of regimes and
        the library the training part chose; that is the model written (the validation
        figures are those of the model fitted on the training part).  False keeps the
        model fitted on the training part.
    tolerance : float, default 0.1
        Normalised error that ends the prediction horizon.

    Attributes
    ----------
    model_ : HybridModel
    labels_ : pandas.DataFrame
        ``run, time, regime`` for every sample of the data, in input order, then
        ``prob_0 .. prob_{K-1}``: each sample's regime probabilities given all the data of
        its run.
    finder_ : RegimeFinder
        The fitted regime stage.
    surfaces_ : SwitchingSurfaces
        The fitted guard stage.
    train_, test_ : Dataset

    Examples
    --------
    >>> from modemap.regimes import RegimeFinder
    >>> ident = HybridIdentifier(regimes=RegimeFinder(n_regimes=2))
    >>> ident.set_params(regimes__sticky=0.995).get_params()["regimes__sticky"]
    0.995
    """

    _parameter_constraints: ClassVar[dict[str, list]] = {
        "regimes": [RegimeFinder, None],
        "guards": [SwitchingSurfaces, None],
        "holdout": [Interval(float, 0, 1, closed="left")],
        "refit": [BOOLEAN],
        "tolerance": [Interval(float, 0, None, closed="neither")],
    }

    def __init__(
        self,
        *,
        regimes: RegimeFinder | None = None,
        guards: SwitchingSurfaces | None = None,
        holdout: float = 0.25,
        refit: bool = True,
        tolerance: float = 0.1,
    ) -> None:
        self.regimes = regimes
        self.guards = guards
        self.holdout = holdout
        self.refit = refit
        self.tolerance = tolerance

    @classmethod
    def from_options(cls, **options: Any) -> HybridIdentifier:
        """An identifier from the flat option names the command line, the dashboard and the
        model file's ``metadata.options`` use (:data:`modemap.identify.OPTION_DEFAULTS`).

        Examples
        --------
        >>> HybridIdentifier.from_options(n_regimes=2, degree=3).regimes.local_model.degree
        3
        """
        return cls(**stage_parameters(**options))

    # ------------------------------------------------------------------ fit
    def fit(self, ds: Dataset, progress: ProgressCallback | None = None) -> HybridIdentifier:
        """Identify the hybrid model of ``ds``; returns ``self``."""
        if not isinstance(ds, Dataset):
            raise TypeError(
                "HybridIdentifier.fit expects a modemap Dataset (see modemap.read_data)"
            )
        check_params(self)
        for stage in (self.regimes, self.guards):  # every setting checked before any work
            if stage is not None:
                check_params(stage)
        if self.regimes is not None and self.regimes.local_model is not None:
            check_params(self.regimes.local_model)
        progress = progress or null_progress
        stage = clone(self.regimes) if self.regimes else RegimeFinder()
        stage.check_terms(ds)  # on every sample, held-out ones too, before any work
        progress(0.0, "splitting off validation data")
        train, test = split_holdout(ds, self.holdout) if self.holdout > 0 else (ds, None)
        last = 1.0 if test is None or not self.refit else 0.55
        # the guards' standard errors only for the model that is written: the refit's
        # when there is one (the block bootstrap costs about 30 s on a million rows)
        errors = test is None or not self.refit
        finder, surfaces, model = self._identify(
            train, stage, scaled(progress, 0.02, last), guard_errors=errors
        )
        model.metadata["options"] = options_record(
            finder, surfaces, self.holdout, self.tolerance, self.refit
        )
        self.train_, self.test_ = train, test
        if test is None:
            self._keep(ds, finder, surfaces, model, {})
            progress(1.0, "done")
            return self
        progress(last, "validating on held-out data")
        test_labels = finder.predict(test)
        validation = validate(model, test, labels=test_labels, tolerance=self.tolerance)
        validation["holdout"] = "runs" if len(ds.runs) >= 2 else "tails"
        validation["one_step"] = _one_step(model, finder, test, test_labels)
        model.validation = validation
        if self.refit:
            done = self._refit(ds, finder, model, scaled(progress, 0.65, 1.0))
            if done is not None:
                self._keep(ds, *done, {})
                progress(1.0, "done")
                return self
        labels = {r.name: lab for r, lab in zip(train.runs, finder.labels_, strict=True)}
        _merge_labels(labels, test, test_labels)
        self._keep(ds, finder, surfaces, model, labels)
        progress(1.0, "done")
        return self

    def _identify(
        self,
        ds: Dataset,
        stage: RegimeFinder,
        progress: ProgressCallback,
        guard_errors: bool = True,
    ) -> tuple[RegimeFinder, SwitchingSurfaces, HybridModel]:
        """Regimes -> equilibria -> guards -> model, on ``ds`` (``guard_errors``: with the
        guards' bootstrap standard errors)."""
        finder = stage.fit(ds, progress=scaled(progress, 0.0, 0.85))
        _, x, u, lengths = ds.concat()
        z = np.hstack([x, u])
        labels = np.concatenate(finder.labels_)
        progress(0.85, "equilibria and stability")
        regimes, inputs = self._regimes(ds, finder, z, labels)
        progress(0.93, "learning switching surfaces")
        surfaces = clone(self.guards) if self.guards else SwitchingSurfaces()
        if not guard_errors:
            surfaces.set_params(n_boot=0)
        surfaces.fit(z, labels, lengths, list(ds.variable_names), units=dict(ds.units))
        for regime, u_typ in zip(regimes, inputs, strict=True):
            place_equilibria(surfaces.guards_, [regime], ds.variable_names, u_typ)
        return finder, surfaces, self._model(ds, finder, surfaces, regimes, z, labels)

    def _refit(
        self, ds: Dataset, finder: RegimeFinder, validated: HybridModel, progress: ProgressCallback
    ) -> tuple[RegimeFinder, SwitchingSurfaces, HybridModel] | None:
        """The model refitted on all data with the number of regimes and the library the
        training part chose; None (keep the validated model) when that fit fails."""
        # the training part's regimes, decoded on every row and refined there
        fixed = copy.deepcopy(finder).set_params(n_regimes=finder.n_regimes_, warm_start=True)
        try:
            done = self._identify(ds, fixed, progress)
        except FitError as exc:
            validated.metadata["notes"].append(
                f"the model fitted on the training part is kept: refitting it on all data "
                f"failed ({exc})"
            )
            return None
        _, _, model = done
        model.validation = validated.validation
        model.selection = validated.selection
        model.metadata["options"] = validated.metadata["options"]
        n_test = len(self.test_.runs) if len(ds.runs) >= 2 else 0
        model.metadata["notes"].append(
            f"number of regimes and library chosen, and validation figures measured, on the "
            f"training part ({len(ds.runs) - n_test} of {len(ds.runs)} runs"
            f"{'' if n_test else ', the head of the run'}); the model written was then fitted "
            f"on all data with {finder.n_regimes_} regime(s)"
        )
        return done

    def _keep(self, ds, finder, surfaces, model, labels: dict[str, np.ndarray]) -> None:
        """Set the learnt attributes (``labels``: per run name, or empty to take the
        finder's labels of ``ds``)."""
        fitted = [r.name for r in ds.runs] if not labels else [r.name for r in self.train_.runs]
        probabilities = dict(zip(fitted, finder.posteriors_, strict=True))
        if not labels:
            labels = {r.name: lab for r, lab in zip(ds.runs, finder.labels_, strict=True)}
        else:  # the held-out part of the data, decoded
            names = [r.name for r in self.test_.runs]
            for name, post in zip(names, finder.predict_proba(self.test_), strict=True):
                probabilities[name] = (
                    np.vstack([probabilities[name], post]) if name in probabilities else post
                )
        self.model_ = model
        self.labels_ = labels_frame(ds, labels, probabilities)
        self.finder_ = finder
        self.surfaces_ = surfaces

    # ------------------------------------------------------------ stages
    @staticmethod
    def _regimes(
        ds: Dataset, finder: RegimeFinder, z: np.ndarray, labels: np.ndarray
    ) -> tuple[list[RegimeModel], list[np.ndarray]]:
        """Each regime's model with its equilibria, and the inputs they were computed at."""
        n_states = ds.n_states
        ranges = ds.ranges()
        bounds = np.array([ranges[n] for n in ds.state_names], dtype=float)
        regimes, inputs = [], []
        for k, fit in enumerate(finder.local_fits_):
            library = TermLibrary.from_terms(fit.terms, ds.variable_names)
            mask = labels == k
            u_typ = typical_inputs(z[mask, n_states:] if mask.any() else z[:, n_states:])
            equilibria = regime_equilibria(
                library,
                fit,
                finder.regime_stats_[k],
                u_typ,
                bounds,
                form=finder.form,
                step=ds.step,
                seed=finder.seed,
                state_names=list(ds.state_names),
            )
            for q in equilibria:  # the inputs held while the points were computed
                q.inputs = {name: float(v) for name, v in zip(ds.input_names, u_typ, strict=True)}
            regimes.append(
                RegimeModel(
                    id=k,
                    samples=int(mask.sum()),
                    terms=list(fit.terms),
                    coefficients=np.asarray(fit.coef, dtype=float),
                    stderr=np.asarray(fit.stderr, dtype=float),
                    noise_cov=np.asarray(fit.noise_cov, dtype=float),
                    equilibria=equilibria,
                )
            )
            inputs.append(u_typ)
        return regimes, inputs

    def _model(
        self,
        ds: Dataset,
        finder: RegimeFinder,
        surfaces: SwitchingSurfaces,
        regimes: list[RegimeModel],
        z: np.ndarray,
        labels: np.ndarray,
    ) -> HybridModel:
        n_states = ds.n_states
        centroids = {
            str(k): [float(v) for v in z[labels == k, :n_states].mean(axis=0)]
            for k in range(len(regimes))
            if np.any(labels == k)
        }
        metadata: dict[str, Any] = {
            "modemap_version": __version__,
            "seed": finder.seed,
            "options": {},
            "source": ds.source,
            "notes": list(finder.notes_),
            "switching_inputs": list(finder.switching_inputs_),
            "regime_centroids": centroids,
            # which evidence chose the guard family, and the guard terms dropped as not
            # significant (read by the report's switching section)
            "guard_evidence": dict(surfaces.family_evidence_),
            "guard_significance": dict(surfaces.significance_),
            "guard_stderr": dict(surfaces.stderr_),
        }
        ranges = ds.ranges()
        return HybridModel(
            states=list(ds.state_names),
            inputs=list(ds.input_names),
            form=finder.form,
            regimes=regimes,
            guards=list(surfaces.guards_),
            time_name=ds.time_name,
            units=dict(ds.units),
            step=float(ds.step),
            guard_kind=surfaces.kind_,
            data_range={k: (float(a), float(b)) for k, (a, b) in ranges.items()},
            derivative=dict(finder.regression_.derivative) if finder.form == "continuous" else {},
            selection=finder.selection_.to_dict(orient="records"),
            statistics=finder.statistics_,
            metadata=metadata,
        )


def _one_step(model: HybridModel, finder: RegimeFinder, test: Dataset, test_labels) -> dict:
    """One-step quality on the held-out samples, each under its decoded regime.

    The targets are built as in training: the next sample (discrete form) or
    derivatives with the recorded settings, re-estimated within regime stretches.
    """
    reg = prepare_regression(test, form=finder.form, derivative=finder.regression_.derivative)
    rows = np.concatenate(test_labels)[np.asarray(reg.sample_index)]
    return one_step_quality(model, np.asarray(reg.Z), finder.segment_targets(reg, rows), rows)


def _merge_labels(labels: dict[str, np.ndarray], test: Dataset, test_labels) -> None:
    """Add the test part's labels per run name (the split keeps run names), in place."""
    for r, lab in zip(test.runs, test_labels, strict=True):
        if r.name in labels:  # a tail held out of the same run: append
            labels[r.name] = np.concatenate([labels[r.name], lab])
        else:
            labels[r.name] = lab


def labels_frame(
    ds: Dataset,
    labels: dict[str, np.ndarray],
    probabilities: dict[str, np.ndarray] | None = None,
) -> pd.DataFrame:
    """``run, time, regime`` (then ``prob_0 .. prob_{K-1}``) for every input row of ``ds``,
    in input order.

    ``run`` is the run id as found in the data (before any split at gaps).
    When the data were resampled to a uniform step, the rows are the resampled
    samples (the original rows are no longer samples of the model).  A sample
    without a label gets regime -1 (and empty probabilities).

    Parameters
    ----------
    ds : Dataset
    labels : dict
        Run name -> regime per sample.
    probabilities : dict, optional
        Run name -> (n_samples, K) regime probabilities per sample.
    """
    probabilities = probabilities or {}
    k = max((np.shape(p)[1] for p in probabilities.values()), default=0)
    if ds.resampled or ds.n_rows == 0:
        parts = []
        for r in ds.runs:
            lab = labels.get(r.name)
            reg = np.asarray(lab, dtype=np.int64) if lab is not None else np.full(r.n_samples, -1)
            part = pd.DataFrame({"run": r.origin, "time": r.time, "regime": reg})
            prob = _probabilities(probabilities.get(r.name), r.n_samples, k)
            for j in range(k):
                part[f"prob_{j}"] = prob[:, j]
            parts.append(part)
        return pd.concat(parts, ignore_index=True)
    run = np.full(ds.n_rows, "", dtype=object)
    time = np.full(ds.n_rows, np.nan)
    regime = np.full(ds.n_rows, -1, dtype=np.int64)
    prob = np.full((ds.n_rows, k), np.nan)
    for r in ds.runs:
        lab = labels.get(r.name)
        run[r.index] = r.origin
        time[r.index] = r.time
        if lab is not None and len(lab) == r.n_samples:
            regime[r.index] = np.asarray(lab, dtype=np.int64)
        prob[r.index] = _probabilities(probabilities.get(r.name), r.n_samples, k)
    frame = pd.DataFrame({"run": run.astype(str), "time": time, "regime": regime})
    for j in range(k):
        frame[f"prob_{j}"] = prob[:, j]
    return frame


def _probabilities(values: np.ndarray | None, n: int, k: int) -> np.ndarray:
    if values is None or np.shape(values) != (n, k):
        return np.full((n, k), np.nan)
    return np.asarray(values, dtype=np.float64)
