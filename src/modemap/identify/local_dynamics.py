"""One model of a system's dynamics fitted to all samples: the :class:`LocalDynamics` estimator.

Regression rows come from :func:`modemap.data.regression.prepare_regression`.
:class:`LocalDynamics` fits one model to all rows: candidate terms from
:class:`~modemap.terms.library.TermLibrary`, statistics accumulated chunk by chunk
(:func:`modemap.fit.statistics.accumulate`), then sequentially thresholded least squares
(:func:`modemap.fit.sparse.fit_sparse`) or the affine operator
(:func:`modemap.fit.affine.fit_affine`), the equilibria with the inputs held at
their medians, and readable equations.
"""

from __future__ import annotations

from collections.abc import Mapping
from typing import Any

import numpy as np
import pandas as pd
from sklearn.base import BaseEstimator
from sklearn.utils.validation import check_is_fitted

from modemap._exceptions import DataError, FitError
from modemap.data.dataset import Dataset
from modemap.data.regression import FORMS, RegressionData, prepare_regression
from modemap.fit.affine import fit_affine
from modemap.fit.centring import fit_sparse_centred
from modemap.fit.increments import fit_on_increments
from modemap.fit.sparse import CRITERIA, fit_sparse
from modemap.fit.statistics import accumulate, accumulate_by_label
from modemap.fit.uncertainty import block_bootstrap
from modemap.model.equilibria import find_equilibria
from modemap.model.hybrid import RegimeModel
from modemap.terms.equations import format_equations
from modemap.terms.library import TermLibrary

__all__ = ["MODELS", "LocalDynamics"]

MODELS = ("sparse", "affine")
_CV_BLOCKS = 5


class LocalDynamics(BaseEstimator):
    """One local model of a system's dynamics, from all samples of a dataset.

    Parameters
    ----------
    form : {"continuous", "discrete"}, default "continuous"
        Fit ``dx/dt = f(x, u)`` or ``x[k+1] = f(x[k], u[k])``.
    model : {"sparse", "affine"}, default "sparse"
        Sparse regression on candidate terms, or the affine operator
        ``A x + B u + c`` (degree-1 terms, plain least squares).
    degree : int, default 2
        Polynomial degree of the candidate terms (sparse model).
    trig : sequence of str, default ()
        Variables that get ``sin``/``cos`` terms (see :class:`TermLibrary`).
    custom : sequence of str, default ()
        Extra terms in the expression grammar.
    threshold : "auto" or float, default "auto"
        Normalised threshold (see :mod:`modemap.fit.sparse`).
    ridge : float, default 0
    criterion : {"bic", "aic", "cv"}, default "bic"
        Threshold choice; "cv" uses 5 contiguous blocks of rows.
    derivative : str or mapping, default "auto"
        Derivative method (continuous form).
    n_bootstrap : int, default 0
        Block-bootstrap replicates for ``inclusion_`` (sparse model); 0 skips.
    seed : int, default 0

    Attributes
    ----------
    library_ : TermLibrary
    terms_ : list of str
    coef_, stderr_ : ndarray of shape (n_terms, n_states)
    support_ : ndarray of bool, shape (n_terms, n_states)
    noise_cov_ : ndarray of shape (n_states, n_states)
    threshold_ : ndarray of shape (n_states,)
    local_fit_ : LocalFit
    equilibria_ : list of Equilibrium
        With inputs at their medians; ``inside`` means inside the data box.
    equations_ : list of str
    derivative_settings_ : dict
    inclusion_ : ndarray of shape (n_terms, n_states) or None
    state_names_, input_names_ : list of str
    n_samples_ : int
    """

    def __init__(
        self,
        *,
        form: str = "continuous",
        model: str = "sparse",
        degree: int = 2,
        trig: tuple[str, ...] = (),
        custom: tuple[str, ...] = (),
        threshold: float | str = "auto",
        ridge: float = 0.0,
        criterion: str = "bic",
        derivative: str | Mapping[str, Any] = "auto",
        n_bootstrap: int = 0,
        seed: int = 0,
    ) -> None:
        self.form = form
        self.model = model
        self.degree = degree
        self.trig = trig
        self.custom = custom
        self.threshold = threshold
        self.ridge = ridge
        self.criterion = criterion
        self.derivative = derivative
        self.n_bootstrap = n_bootstrap
        self.seed = seed

    def _check_params(self) -> None:
        if self.form not in FORMS:
            raise ValueError(f"form must be one of {FORMS}, got {self.form!r}")
        if self.model not in MODELS:
            raise ValueError(f"model must be one of {MODELS}, got {self.model!r}")
        if self.criterion not in CRITERIA:
            raise ValueError(f"criterion must be one of {CRITERIA}, got {self.criterion!r}")
        if int(self.n_bootstrap) < 0:
            raise ValueError(f"n_bootstrap must be >= 0, got {self.n_bootstrap!r}")

    def _library(self, variables: tuple[str, ...]) -> TermLibrary:
        if self.model == "affine":
            return TermLibrary(degree=1).fit(variables)
        return TermLibrary(degree=self.degree, trig=self.trig, custom=self.custom).fit(variables)

    def fit(self, ds: Dataset, y: object = None) -> LocalDynamics:
        """Fit the local model to every sample of ``ds``.

        Parameters
        ----------
        ds : Dataset
        y : ignored

        Returns
        -------
        self
        """
        self._check_params()
        if not isinstance(ds, Dataset):
            raise DataError(f"LocalDynamics.fit expects a Dataset, got {type(ds).__name__}")
        reg = prepare_regression(ds, form=self.form, derivative=self.derivative)
        library = self._library(ds.variable_names)
        if reg.n_samples <= library.n_terms_:
            raise FitError(
                f"{ds.source}: {reg.n_samples} samples for {library.n_terms_} candidate terms; "
                "lower the degree or give more data"
            )
        fit = self._fit_stats(library, reg)
        self._set_results(ds, reg, library, fit)
        if self.n_bootstrap and self.model == "sparse":
            boot = block_bootstrap(
                library,
                reg.Z,
                reg.Y,
                reg.lengths,
                n_boot=int(self.n_bootstrap),
                threshold=self.threshold,
                criterion="bic" if self.criterion == "cv" else self.criterion,
                ridge=self.ridge,
                seed=self.seed,
                states=ds.state_names if self.form == "discrete" else None,
            )
            self.inclusion_ = boot["inclusion"]
        return self

    def _fit_stats(self, library: TermLibrary, reg: RegressionData):
        terms = list(library.terms_)
        if self.model == "affine":
            return fit_affine(accumulate(library, reg.Z, reg.Y), terms)
        if self.criterion == "cv" and self.threshold == "auto":
            blocks = np.minimum(
                np.arange(reg.n_samples) * _CV_BLOCKS // reg.n_samples, _CV_BLOCKS - 1
            )
            stats = accumulate_by_label(library, reg.Z, reg.Y, blocks, _CV_BLOCKS)

            def select(s):
                return fit_sparse(s, terms, threshold="auto", ridge=self.ridge, criterion="cv")
        else:
            stats = accumulate(library, reg.Z, reg.Y)

            def select(s):
                return fit_sparse_centred(
                    s,
                    terms,
                    library.variables_,
                    threshold=self.threshold,
                    ridge=self.ridge,
                    criterion=self.criterion,
                )

        if self.form == "discrete":  # select on x[k+1] - x[k] (modemap.fit.increments)
            return fit_on_increments(select, stats, terms, library.variables_[: reg.Y.shape[1]])
        return select(stats)

    def _set_results(self, ds: Dataset, reg: RegressionData, library: TermLibrary, fit) -> None:
        _, states, inputs, _ = ds.concat()
        bounds = np.column_stack([states.min(axis=0), states.max(axis=0)])
        u_med = np.median(inputs, axis=0) if inputs.shape[1] else np.zeros(0)
        self.library_, self.local_fit_ = library, fit
        self.terms_ = list(library.terms_)
        self.coef_, self.stderr_, self.support_ = fit.coef, fit.stderr, fit.support
        self.noise_cov_, self.threshold_ = fit.noise_cov, fit.threshold
        self.state_names_, self.input_names_ = list(ds.state_names), list(ds.input_names)
        self.n_samples_ = reg.n_samples
        self.derivative_settings_ = dict(reg.derivative)
        self.input_values_ = u_med
        self.equilibria_ = find_equilibria(
            library,
            fit.coef,
            n_states=ds.n_states,
            input_values=u_med,
            bounds=bounds,
            form=self.form,
            step=float(ds.step) if np.isfinite(ds.step) else 1.0,
            seed=self.seed,
            state_names=list(ds.state_names),
        )
        self.equations_ = format_equations(
            self.terms_,
            fit.coef,
            ds.state_names,
            stderr=fit.stderr,
            units=ds.units,
            time_unit=ds.unit(ds.time_name),
            form=self.form,
        )
        self.inclusion_ = None

    def predict_derivative(self, Z: np.ndarray) -> np.ndarray:
        """Right-hand side at variables ``Z (n, n_vars)``: ``dx/dt`` or ``x[k+1]``."""
        check_is_fitted(self, "coef_")
        return self.library_.transform(np.asarray(Z, dtype=np.float64)) @ self.coef_

    def to_frame(self, values: str = "coef") -> pd.DataFrame:
        """Table of terms x states: ``values`` in {"coef", "stderr", "support", "inclusion"}."""
        check_is_fitted(self, "coef_")
        data = {
            "coef": self.coef_,
            "stderr": self.stderr_,
            "support": self.support_,
            "inclusion": self.inclusion_,
        }.get(values)
        if data is None:
            raise ValueError(f"no {values!r} table (choose coef, stderr, support, inclusion)")
        frame = pd.DataFrame(
            data, index=pd.Index(self.terms_, name="term"), columns=self.state_names_
        )
        return frame

    def to_regime_model(self, regime_id: int = 0) -> RegimeModel:
        """The fit as a :class:`~modemap.model.hybrid.RegimeModel` (numbers only)."""
        check_is_fitted(self, "coef_")
        return RegimeModel(
            id=regime_id,
            samples=self.n_samples_,
            terms=list(self.terms_),
            coefficients=self.coef_.copy(),
            stderr=self.stderr_.copy(),
            noise_cov=self.noise_cov_.copy(),
            equilibria=list(self.equilibria_),
            inclusion=None if self.inclusion_ is None else self.inclusion_.copy(),
        )
