"""The local model: one validated specification of how a regime's dynamics are modelled.

A :class:`LocalModel` holds the rules that make one regime's model: which candidate terms
(the library), how the active terms are chosen (sparse selection or none), and how the
coefficients are estimated once the regimes are settled (``final_fit``).  It is given to
the regime stage once, and every place that fits a regime goes through it.

A subclass is one kind of local model, as each emission model is one class in an HMM
package.  It must

1. take its settings as keyword arguments of ``__init__`` and only store them (the
   scikit-learn estimator contract, so ``get_params``/``set_params``/``clone`` work and
   the settings are reachable as ``local_model__<name>`` from the estimators above it);
2. implement :meth:`LocalModel._candidate_library` ``(variables) -> TermLibrary``
   (unfitted is not allowed: return a fitted library);
3. implement :meth:`LocalModel._estimate` ``(stats, terms, variables) -> LocalFit``: the
   fit of one regime from its normal-equation statistics
   (:class:`~modemap.fit.statistics.GramStats`), never from samples;
4. say whether it chooses terms (:attr:`LocalModel.selects_terms`) and give, if it has
   one, the variant that keeps every term while the labels are still moving
   (:meth:`LocalModel.unpruned`).

Binding a model to the variables of a data set and a form (:meth:`LocalModel.bind`)
gives a :class:`BoundLocalModel`: the library built once, and ``fit(stats) -> LocalFit``
with the form's rules applied (discrete form: terms are selected on the increments
``x[k+1] - x[k]``, :mod:`modemap.fit.increments`).

Two kinds exist:

* :class:`SparseLocalModel`: sequentially thresholded least squares on a polynomial (plus
  trigonometric and custom) library, selection on centred variables
  (:mod:`modemap.fit.sparse`, :mod:`modemap.fit.centring`);
* :class:`AffineLocalModel`: the affine operator ``A x + B u + c`` by plain least squares
  (:mod:`modemap.fit.affine`).
"""

from __future__ import annotations

from collections.abc import Sequence
from dataclasses import dataclass
from typing import Any, ClassVar

from sklearn.base import BaseEstimator, clone

from modemap._exceptions import ParameterError
from modemap._params import Interval, Options, check_params
from modemap.fit.affine import fit_affine
from modemap.fit.centring import fit_sparse_centred
from modemap.fit.increments import fit_on_increments
from modemap.fit.sparse import CRITERIA, LocalFit, fit_sparse, refit_support
from modemap.fit.statistics import GramStats
from modemap.terms.expressions import term_names
from modemap.terms.library import TermLibrary

__all__ = [
    "FINAL_FITS",
    "FORMS",
    "AffineLocalModel",
    "BoundLocalModel",
    "LocalModel",
    "SparseLocalModel",
]

FORMS = ("continuous", "discrete")
FINAL_FITS = ("integral", "derivative")


class LocalModel(BaseEstimator):
    """Base class of the local models (see the module notes for the contract).

    Parameters
    ----------
    final_fit : {"integral", "derivative"}, default "integral"
        Continuous form: once the labels are settled, choose (when the model selects
        terms) and estimate each regime's coefficients again on the integral form
        (:mod:`modemap.regimes.integral`), or keep the fit on the derivative estimates.
        Ignored in discrete form.
    """

    #: True when the model chooses its active terms (it is then re-run on the integral
    #: form's statistics by the final fit); False when every candidate term stays.
    selects_terms: bool = False

    _parameter_constraints: ClassVar[dict[str, list]] = {"final_fit": [Options(FINAL_FITS)]}

    def __init__(self, *, final_fit: str = "integral") -> None:
        self.final_fit = final_fit

    # -- what a subclass provides ----------------------------------------------------------
    def _candidate_library(self, variables: Sequence[str]) -> TermLibrary:
        raise NotImplementedError

    def _estimate(self, stats: Any, terms: list[str], variables: Sequence[str]) -> LocalFit:
        raise NotImplementedError

    def unpruned(self) -> LocalModel | None:
        """The same model keeping every candidate term, or None when it keeps them anyway."""
        return None

    def candidate_degrees(self) -> list[int | None]:
        """The library orders the choice of model compares (None: one fixed library)."""
        return [None]

    def search_degree(self) -> int | None:
        """The library order the regimes are searched with (None: the fixed library)."""
        return None

    def _at_degree(self, degree: int | None) -> LocalModel:
        """This model with its library at ``degree`` (None: unchanged)."""
        return self

    # -- shared ----------------------------------------------------------------------------
    def library(self, variables: Sequence[str], exclude: Sequence[str] = ()) -> TermLibrary:
        """The candidate terms over ``variables``, without terms that use ``exclude``.

        Parameters
        ----------
        variables : sequence of str
            States then inputs.
        exclude : sequence of str, default ()
            Variables no term may use (inputs that select the regime rather than enter
            its equations).

        Returns
        -------
        TermLibrary
            Fitted.
        """
        check_params(self)
        library = self._candidate_library(list(variables))
        if library.n_terms_ == 0 or not exclude:
            return library
        keep = [t for t in library.terms_ if not uses_names(t, exclude)]
        return TermLibrary.from_terms(keep, list(variables))

    def bind(
        self,
        variables: Sequence[str],
        *,
        n_states: int,
        form: str = "continuous",
        exclude: Sequence[str] = (),
        degree: int | None = None,
    ) -> BoundLocalModel:
        """This model with its library built for ``variables`` and the rules of ``form``.

        Parameters
        ----------
        variables : sequence of str
            States then inputs.
        n_states : int
            The first ``n_states`` variables are the states (the targets' order).
        form : {"continuous", "discrete"}, default "continuous"
        exclude : sequence of str, default ()
            Variables no term may use.
        degree : int or None, default None
            The library order (one of :meth:`candidate_degrees`); None: the order the
            regimes are searched with (:meth:`search_degree`).

        Returns
        -------
        BoundLocalModel
        """
        check_params(self)
        if form not in FORMS:
            raise ParameterError(f"form must be one of {', '.join(FORMS)}, got {form!r}")
        degree = self.search_degree() if degree is None else degree
        spec = self._at_degree(degree)
        library = spec.library(variables, exclude)
        states = tuple(list(variables)[:n_states])
        return BoundLocalModel(spec, library, states, form, degree)


class SparseLocalModel(LocalModel):
    """Sparse regression on candidate terms (sequentially thresholded least squares).

    Parameters
    ----------
    degree : "auto" or int, default "auto"
        Largest total degree of the candidate monomials, or "auto": the library order is
        part of the choice of model, each of 1 to ``max_degree`` being a candidate (the
        regimes are searched with ``min(2, max_degree)``).
    max_degree : int, default 3
        Highest library order "auto" considers.
    trig : sequence of str, default ()
        Variables that get ``sin`` and ``cos`` terms.
    custom : sequence of str, default ()
        Extra candidate terms in the term grammar (e.g. ``"C_A*exp(-8750/T)"``).
    terms : sequence of str or None, default None
        The candidate terms, given explicitly (``degree``, ``trig`` and ``custom`` are
        then not used).
    threshold : "auto" or float, default "auto"
        Normalised threshold (:mod:`modemap.fit.sparse`); "auto" chooses it per state.
    ridge : float, default 0
        Ridge penalty that steers the selection (the estimate is plain least squares).
    criterion : {"bic", "aic", "cv"}, default "bic"
        How "auto" chooses the threshold; "cv" needs per-block statistics.
    final_fit : {"integral", "derivative"}, default "integral"
        See :class:`LocalModel`.
    """

    selects_terms = True

    _parameter_constraints: ClassVar[dict[str, list]] = {
        **LocalModel._parameter_constraints,
        "degree": [Options(("auto",)), Interval(int, 0, 10)],
        "max_degree": [Interval(int, 1, 10)],
        "threshold": [Options(("auto",)), Interval(float, 0, None)],
        "ridge": [Interval(float, 0, None)],
        "criterion": [Options(CRITERIA)],
    }

    def __init__(
        self,
        *,
        degree: str | int = "auto",
        max_degree: int = 3,
        trig: Sequence[str] = (),
        custom: Sequence[str] = (),
        terms: Sequence[str] | None = None,
        threshold: str | float = "auto",
        ridge: float = 0.0,
        criterion: str = "bic",
        final_fit: str = "integral",
    ) -> None:
        super().__init__(final_fit=final_fit)
        self.degree = degree
        self.max_degree = max_degree
        self.trig = trig
        self.custom = custom
        self.terms = terms
        self.threshold = threshold
        self.ridge = ridge
        self.criterion = criterion

    def candidate_degrees(self) -> list[int | None]:
        if self.terms is not None:
            return [None]
        if self.degree == "auto":
            return list(range(1, int(self.max_degree) + 1))
        return [int(self.degree)]

    def search_degree(self) -> int | None:
        if self.terms is not None:
            return None
        return min(2, int(self.max_degree)) if self.degree == "auto" else int(self.degree)

    def _at_degree(self, degree: int | None) -> LocalModel:
        if degree is None or degree == self.degree:
            return self
        return clone(self).set_params(degree=int(degree))

    def _candidate_library(self, variables: Sequence[str]) -> TermLibrary:
        if self.terms is not None:
            return TermLibrary.from_terms(list(self.terms), variables)
        degree = self.search_degree()
        library = TermLibrary(degree=int(degree), trig=tuple(self.trig), custom=self.custom)
        return library.fit(variables)

    def _estimate(self, stats: Any, terms: list[str], variables: Sequence[str]) -> LocalFit:
        if self.criterion == "cv" and self.threshold == "auto":  # per-block statistics
            return fit_sparse(stats, terms, threshold="auto", ridge=self.ridge, criterion="cv")
        return fit_sparse_centred(
            stats,
            terms,
            list(variables),
            threshold=self.threshold,
            ridge=self.ridge,
            criterion=self.criterion,
        )

    def unpruned(self) -> LocalModel | None:
        if self.threshold == 0:
            return None
        return clone(self).set_params(threshold=0.0)


class AffineLocalModel(LocalModel):
    """The affine operator ``A x + B u + c`` per regime, by plain least squares.

    Parameters
    ----------
    final_fit : {"integral", "derivative"}, default "integral"
        See :class:`LocalModel`.
    """

    def _candidate_library(self, variables: Sequence[str]) -> TermLibrary:
        return TermLibrary(degree=1).fit(variables)

    def candidate_degrees(self) -> list[int | None]:
        return [1]

    def search_degree(self) -> int | None:
        return 1

    def _estimate(self, stats: Any, terms: list[str], variables: Sequence[str]) -> LocalFit:
        return fit_affine(sum(stats) if isinstance(stats, list) else stats, terms)


@dataclass(frozen=True)
class BoundLocalModel:
    """A local model bound to the variables of one data set and a form.

    Attributes
    ----------
    spec : LocalModel
        The specification it was made from.
    library : TermLibrary
        The candidate terms (fitted).
    states : tuple of str
        State names, in the order of the targets.
    form : {"continuous", "discrete"}
    degree : int or None
        The library order (None: a library given term by term).
    """

    spec: LocalModel
    library: TermLibrary
    states: tuple[str, ...]
    form: str
    degree: int | None = None

    @property
    def terms(self) -> list[str]:
        """The candidate terms."""
        return list(self.library.terms_)

    @property
    def variables(self) -> list[str]:
        """States then inputs."""
        return list(self.library.variables_)

    @property
    def interior(self) -> bool:
        """Fit each regime without the last row of its stretches (discrete form: that row's
        interval may hold the switch, see :func:`modemap.regimes.refine.interior_stats`)."""
        return self.form == "discrete"

    @property
    def integral_final_fit(self) -> bool:
        """Estimate the coefficients again on the integral form once labels are settled."""
        return self.form == "continuous" and self.spec.final_fit == "integral"

    def fit(self, stats: GramStats | list[GramStats]) -> LocalFit:
        """One regime's model from its statistics (a list of per-block statistics for a
        cross-validated choice).

        In discrete form a model that selects terms selects them on the increments and
        refits on the next states (:func:`modemap.fit.increments.fit_on_increments`).
        """
        variables = self.variables
        if self.form == "discrete" and self.spec.selects_terms:
            return fit_on_increments(
                lambda s: self.spec._estimate(s, self.terms, variables),
                stats,
                self.terms,
                list(self.states),
            )
        return self.spec._estimate(stats, self.terms, variables)

    def fit_all(self, stats: Sequence[GramStats]) -> list[LocalFit]:
        """:meth:`fit` for every regime's statistics."""
        return [self.fit(s) for s in stats]

    def refit(self, stats: GramStats, previous: LocalFit) -> LocalFit:
        """Least squares on ``previous``'s terms (no new choice of terms): what a pass of the
        refinement does while its labels move little, the choice being the costly part."""
        if not self.spec.selects_terms:
            return self.fit(stats)
        return refit_support(stats, self.terms, previous.support, threshold=previous.threshold)

    def unpruned(self) -> BoundLocalModel | None:
        """This bound model keeping every term (see :meth:`LocalModel.unpruned`)."""
        spec = self.spec.unpruned()
        if spec is None:
            return None
        return BoundLocalModel(spec, self.library, self.states, self.form, self.degree)


def uses_names(term: str, names: Sequence[str]) -> bool:
    """True when the canonical term string mentions one of ``names``."""
    used = set(term_names(term))
    return any(n in used for n in names)
