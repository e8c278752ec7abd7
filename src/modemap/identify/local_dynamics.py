"""One model of a system's dynamics fitted to all samples: the :class:`LocalDynamics` estimator.

Regression rows come from :func:`modemap.data.regression.prepare_regression`.
:class:`LocalDynamics` fits one model to all rows: candidate terms from
:class:`~modemap.terms.library.TermLibrary`, statistics accumulated chunk by chunk
(:func:`modemap.fit.statistics.accumulate`), then the local model
(:mod:`modemap.fit.local_model`: sequentially thresholded least squares or the affine
operator), the equilibria with the inputs held at their medians, and readable equations.
"""

from __future__ import annotations

from collections.abc import Mapping
from typing import Any, ClassVar

import numpy as np
import pandas as pd
from sklearn.base import BaseEstimator
from sklearn.utils.validation import check_is_fitted

from modemap._exceptions import DataError, FitError, ParameterError
from modemap._params import Interval, Options, check_params
from modemap.data.dataset import Dataset
from modemap.data.regression import FORMS, RegressionData, prepare_regression
from modemap.fit.local_model import BoundLocalModel, LocalModel, SparseLocalModel
from modemap.fit.statistics import GramStats, accumulate, accumulate_by_label
from modemap.fit.uncertainty import block_bootstrap
from modemap.model.equilibria import find_equilibria
from modemap.model.hybrid import RegimeModel
from modemap.regimes.rows import Rows
from modemap.regimes.selection import Windows, library_criteria
from modemap.regimes.term_checks import check_library_on_data
from modemap.terms.equations import format_equations
from modemap.terms.library import TermLibrary

__all__ = ["LocalDynamics"]

_CV_BLOCKS = 5


class LocalDynamics(BaseEstimator):
    """One local model of a system's dynamics, from all samples of a dataset.

    Parameters
    ----------
    form : {"continuous", "discrete"}, default "continuous"
        Fit ``dx/dt = f(x, u)`` or ``x[k+1] = f(x[k], u[k])``.
    local_model : LocalModel or None, default None
        The model (:mod:`modemap.fit.local_model`): sparse regression on candidate terms
        (:class:`~modemap.fit.local_model.SparseLocalModel`, the default) or the affine
        operator ``A x + B u + c`` (:class:`~modemap.fit.local_model.AffineLocalModel`).
        A sparse model with ``criterion="cv"`` chooses its threshold on 5 contiguous
        blocks of rows.
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

    _parameter_constraints: ClassVar[dict[str, list]] = {
        "form": [Options(FORMS)],
        "local_model": [LocalModel, None],
        "derivative": [str, Mapping],
        "n_bootstrap": [Interval(int, 0, None)],
        "seed": [Interval(int, 0, 2**32 - 1)],
    }

    def __init__(
        self,
        *,
        form: str = "continuous",
        local_model: LocalModel | None = None,
        derivative: str | Mapping[str, Any] = "auto",
        n_bootstrap: int = 0,
        seed: int = 0,
    ) -> None:
        self.form = form
        self.local_model = local_model
        self.derivative = derivative
        self.n_bootstrap = n_bootstrap
        self.seed = seed

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
        check_params(self)
        if not isinstance(ds, Dataset):
            raise DataError(f"LocalDynamics.fit expects a Dataset, got {type(ds).__name__}")
        spec = SparseLocalModel() if self.local_model is None else self.local_model
        check_library_on_data(spec, ds, form=self.form)
        reg = prepare_regression(ds, form=self.form, derivative=self.derivative)
        local, fit = self._best_library(spec, ds, reg)
        library = local.library
        spec = local.spec
        self._set_results(ds, reg, library, fit)
        if self.n_bootstrap and isinstance(spec, SparseLocalModel):
            boot = block_bootstrap(
                library,
                reg.Z,
                reg.Y,
                reg.lengths,
                n_boot=int(self.n_bootstrap),
                threshold=spec.threshold,
                criterion="bic" if spec.criterion == "cv" else spec.criterion,
                ridge=spec.ridge,
                seed=self.seed,
                states=ds.state_names if self.form == "discrete" else None,
            )
            self.inclusion_ = boot["inclusion"]
        return self

    def _best_library(self, spec: LocalModel, ds: Dataset, reg: RegressionData) -> tuple:
        """The local model at the library order (among those the rows can support) that the
        regime stage's criterion prefers (:func:`modemap.regimes.selection.library_criteria`),
        and its fit."""
        n = reg.n_samples
        locals_ = [
            spec.bind(ds.variable_names, n_states=ds.n_states, form=self.form, degree=d)
            for d in spec.candidate_degrees()
        ]
        locals_ = [local for local in locals_ if n > local.library.n_terms_]
        if not locals_:
            raise FitError(
                f"{ds.source}: {n} samples are too few for the candidate terms; "
                "lower the degree or give more data"
            )
        local = locals_[0]
        if len(locals_) > 1:
            rows = Rows.of(reg.Z, reg.Y, reg.lengths, reg.time)
            windows = Windows.common(rows, self.form, reg.derivative)
            local = locals_[int(np.argmin(library_criteria(locals_, windows)))]
        return local, local.fit(self._statistics(local, reg))

    @staticmethod
    def _statistics(local: BoundLocalModel, reg: RegressionData) -> GramStats | list[GramStats]:
        """All rows' statistics, or per block of rows for a cross-validated threshold."""
        spec = local.spec
        if getattr(spec, "criterion", None) == "cv" and getattr(spec, "threshold", 0) == "auto":
            blocks = np.minimum(
                np.arange(reg.n_samples) * _CV_BLOCKS // reg.n_samples, _CV_BLOCKS - 1
            )
            return accumulate_by_label(local.library, reg.Z, reg.Y, blocks, _CV_BLOCKS)
        return accumulate(local.library, reg.Z, reg.Y)

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
            raise ParameterError(f"no {values!r} table (choose coef, stderr, support, inclusion)")
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
