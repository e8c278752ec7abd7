"""Equilibria of a regime's model, their Jacobians, eigenvalues and stability.

A regime's right-hand side is ``f(x, u) = coef.T @ theta(x, u)`` with the
states first among the library's variables.  In the continuous form an
equilibrium solves ``f(x, u) = 0``; in the discrete form a fixed point solves
``x = f(x, u)``.  Inputs are held at given values.

* A model affine in the states (every term with a non-zero coefficient has
  degree 0 or 1 in the states) is solved in closed form.
* Otherwise roots are sought by ``scipy.optimize.root`` (method ``hybr`` with
  the analytic Jacobian) from a seeded Latin-hypercube set of starts in the
  data box widened by 25% of its width on each side; converged roots with a
  small residual inside that search box are kept, merged when closer than
  ``1e-5`` of the box size, and sorted by their coordinates.

Each regime's equilibria are computed with its inputs at typical values
(:func:`typical_inputs`), given standard errors by the delta method
(:func:`equilibrium_stderr`, :func:`regime_equilibria`), and marked reachable or virtual
once the guards are known (:func:`place_equilibria`).

Stability follows the linearisation ("Nonlinear Dynamics and Chaos",
Westview/CRC Press, 2nd ed., 2015, chapters 5-6 for flows; chapter 10 for maps);
see :func:`classify` for the exact rule.
"""

from __future__ import annotations

from collections.abc import Sequence
from typing import Any

import numpy as np
from scipy.optimize import root
from scipy.stats import qmc

from modemap._exceptions import FitError
from modemap.model.guard_rules import guard_values
from modemap.model.hybrid import FORMS, Equilibrium, Guard, HybridModel, RegimeModel

__all__ = [
    "affine_equilibrium",
    "classify",
    "equilibrium_stderr",
    "find_equilibria",
    "jacobian",
    "place_equilibria",
    "regime_equilibria",
    "typical_inputs",
]

SEARCH_MARGIN = 0.25  # search box = data box widened by this fraction of its width, each side
MERGE_TOLERANCE = 1e-5
RESIDUAL_TOLERANCE = 1e-8


def jacobian(library: Any, coef: np.ndarray, z: np.ndarray, n_states: int) -> np.ndarray:
    """Jacobian ``d f_i / d x_k`` of the model at one point.

    Parameters
    ----------
    library : TermLibrary
        Fitted library; its first ``n_states`` variables are the states.
    coef : ndarray of shape (n_terms, n_states)
    z : ndarray of shape (n_vars,)
        States then inputs.
    n_states : int

    Returns
    -------
    ndarray of shape (n_states, n_states)
    """
    coef = np.asarray(coef, dtype=np.float64)
    used = np.any(coef != 0, axis=1)  # a term left out adds nothing, even where it is inf
    with np.errstate(all="ignore"):
        partials = library.partials(np.asarray(z, dtype=np.float64)[None, :])[0]
    return coef[used].T @ partials[used, :n_states]


def equilibrium_stderr(
    library: Any,
    coef: np.ndarray,
    stats: Any,
    support: np.ndarray,
    z: np.ndarray,
    n_states: int,
    form: str = "continuous",
) -> np.ndarray:
    """Standard errors of an equilibrium's coordinates, by the delta method.

    The equilibrium solves ``h(x) = 0`` with ``h = f`` (continuous) or ``h = g - x``
    (discrete).  A change ``dh`` of the fitted right-hand side at the point moves it by
    ``dx = -J^-1 dh`` (``J = dh/dx``), so ``Cov(x) = J^-1 Cov(h) J^-T`` with ``Cov(h)`` the
    covariance of the fitted right-hand sides there
    (:func:`modemap.fit.uncertainty.fitted_value_covariance`).  The delta method: "Asymptotic
    Statistics", Cambridge University Press, 1998, chapter 3.

    Parameters
    ----------
    library : fitted TermLibrary
    coef : ndarray of shape (p, n_states)
    stats : GramStats
        The regime's normal-equation statistics (what ``coef`` was fitted from).
    support : ndarray of bool, shape (p, n_states)
    z : ndarray of shape (n_vars,)
        The equilibrium's states, then the inputs held there.
    n_states : int
    form : {"continuous", "discrete"}

    Returns
    -------
    ndarray of shape (n_states,)
        ``inf`` where the data do not bound the point: a singular Jacobian (the point moves
        freely along a direction, a fold of the fitted model) or unknown variances.
    """
    from modemap.fit.uncertainty import fitted_value_covariance

    _check_form(form)
    z = np.asarray(z, dtype=np.float64)
    jac = jacobian(library, coef, z, n_states)
    if form == "discrete":
        jac = jac - np.eye(n_states)
    values = library.transform(z[None, :])[0]
    cov_h = fitted_value_covariance(stats, coef, support, values)
    if not np.all(np.isfinite(cov_h)) or np.linalg.cond(jac) > 1e12:
        return np.full(n_states, np.inf)
    inv = np.linalg.inv(jac)
    return np.sqrt(np.clip(np.diag(inv @ cov_h @ inv.T), 0.0, None))


def classify(eigenvalues: np.ndarray, form: str = "continuous", tol: float = 1e-7) -> str:
    """Stability class of an equilibrium from its Jacobian's eigenvalues.

    Continuous form (``z = tol * max|lambda|`` is "zero"):

    * some ``|lambda| <= z``: ``"degenerate"``;
    * real parts of both signs (beyond ``z``): ``"saddle"`` (saddle-foci too);
    * some real part within ``z`` of 0: ``"centre-like"``;
    * all real parts negative: ``"stable focus"`` if some ``|Im| > z``, else
      ``"stable node"``; all positive: ``"unstable focus"`` / ``"unstable node"``.

    Discrete form (moduli compared with 1 within ``tol``):

    * an eigenvalue within ``tol`` of ``+1``: ``"degenerate"``;
    * moduli on both sides of 1: ``"saddle"``;
    * some modulus within ``tol`` of 1: ``"centre-like"``;
    * all moduli below 1: ``"stable focus"`` if some eigenvalue has a non-zero
      angle (complex, or negative real: the state alternates sign each step),
      else ``"stable node"``; all above 1: ``"unstable focus"`` / ``"unstable node"``.

    Parameters
    ----------
    eigenvalues : array of complex
    form : {"continuous", "discrete"}
    tol : float

    Returns
    -------
    str
    """
    lam = np.atleast_1d(np.asarray(eigenvalues, dtype=complex))
    _check_form(form)
    if lam.size == 0 or not np.all(np.isfinite(lam)):
        return "degenerate"
    if form == "discrete":
        return _classify_map(lam, tol)
    zero = tol * float(np.max(np.abs(lam)))
    re, im = lam.real, lam.imag
    if np.any(np.abs(lam) <= zero):
        return "degenerate"
    if np.any(re > zero) and np.any(re < -zero):
        return "saddle"
    if np.any(np.abs(re) <= zero):
        return "centre-like"
    kind = "focus" if np.any(np.abs(im) > zero) else "node"
    return f"stable {kind}" if np.all(re < 0) else f"unstable {kind}"


def _classify_map(mu: np.ndarray, tol: float) -> str:
    modulus = np.abs(mu)
    if np.any(np.abs(mu - 1.0) <= tol):
        return "degenerate"
    if np.any(modulus > 1 + tol) and np.any(modulus < 1 - tol):
        return "saddle"
    if np.any(np.abs(modulus - 1.0) <= tol):
        return "centre-like"
    rotating = np.any((np.abs(mu.imag) > tol * np.maximum(modulus, 1e-300)) | (mu.real < 0))
    kind = "focus" if rotating else "node"
    return f"stable {kind}" if np.all(modulus < 1) else f"unstable {kind}"


def timescales(
    eigenvalues: np.ndarray, form: str = "continuous", step: float = 1.0
) -> tuple[list[float], float | None]:
    """Time constants of the stable modes (slowest first) and the oscillation period.

    Continuous: ``-1/Re(lambda)`` for ``Re(lambda) < 0``; period ``2 pi/|Im|`` of
    the oscillatory mode with the smallest ``|Re|``.  Discrete: ``-step/ln|mu|``
    for ``|mu| < 1``; period ``2 pi step/|angle|`` of the oscillatory mode with
    the largest ``|mu|``.  Each complex-conjugate pair counts once.
    """
    lam = np.atleast_1d(np.asarray(eigenvalues, dtype=complex))
    lam = lam[lam.imag >= 0]  # one of each conjugate pair
    if form == "discrete":
        modulus = np.abs(lam)
        stable = (modulus < 1) & (modulus > 0)
        constants = sorted((-step / np.log(modulus[stable])).tolist(), reverse=True)
        angle = np.abs(np.angle(lam))
        oscillating = angle > 1e-12
        if not np.any(oscillating):
            return constants, None
        slowest = np.argmax(np.where(oscillating, modulus, -np.inf))
        return constants, float(2 * np.pi * step / angle[slowest])
    constants = sorted((-1.0 / lam.real[lam.real < 0]).tolist(), reverse=True)
    oscillating = np.abs(lam.imag) > 1e-12 * max(float(np.max(np.abs(lam), initial=0.0)), 1e-300)
    if not np.any(oscillating):
        return constants, None
    slowest = np.argmin(np.where(oscillating, np.abs(lam.real), np.inf))
    return constants, float(2 * np.pi / abs(lam.imag[slowest]))


def affine_equilibrium(
    A: np.ndarray, B: np.ndarray, c: np.ndarray, u: np.ndarray
) -> np.ndarray | None:
    """Solve ``A x + B u + c = 0``.

    Parameters
    ----------
    A : ndarray of shape (n, n)
    B : ndarray of shape (n, n_inputs)
    c : ndarray of shape (n,)
    u : ndarray of shape (n_inputs,)

    Returns
    -------
    ndarray of shape (n,) or None
        None when ``A`` is singular (no isolated equilibrium).  For a map
        ``x[k+1] = A x + B u + c`` pass ``A - I``.
    """
    A = np.atleast_2d(np.asarray(A, dtype=np.float64))
    rhs = -(np.asarray(B, dtype=np.float64).reshape(A.shape[0], -1) @ np.atleast_1d(u))
    rhs = rhs - np.asarray(c, dtype=np.float64)
    if _is_singular(A):
        return None
    return np.linalg.solve(A, rhs)


def _is_singular(A: np.ndarray) -> bool:
    if not np.all(np.isfinite(A)):
        return True
    singular = np.linalg.svd(A, compute_uv=False)
    return bool(singular[-1] <= 1e-12 * max(float(singular[0]), 1e-300))


# ------------------------------------------------------------ the search


def find_equilibria(
    library: Any,
    coef: np.ndarray,
    *,
    n_states: int,
    input_values: Sequence[float] | np.ndarray = (),
    bounds: np.ndarray,
    form: str = "continuous",
    step: float = 1.0,
    n_starts: int = 24,
    seed: int = 0,
    state_names: Sequence[str] | None = None,
) -> list[Equilibrium]:
    """Equilibria (continuous) or fixed points (discrete) of one regime's model.

    Parameters
    ----------
    library : TermLibrary
        Fitted; variables are the states then the inputs.
    coef : ndarray of shape (n_terms, n_states)
    n_states : int
    input_values : array of shape (n_inputs,)
        Inputs held constant.
    bounds : ndarray of shape (n_states, 2)
        Data box ``[min, max]`` per state; equilibria outside it get
        ``inside=False``.
    form : {"continuous", "discrete"}
    step : float
        Map step (discrete form), for time constants and periods.
    n_starts : int
        Starts of the root search (nonlinear models).
    seed : int
    state_names : sequence of str, optional
        Defaults to the library's first ``n_states`` variables.

    Returns
    -------
    list of Equilibrium
        Sorted by coordinates.  A singular affine model with a consistent
        continuum of equilibria gives one ``"degenerate"`` point (minimum norm)
        with a ``note``; an inconsistent one gives an empty list.
    """
    problem = _Problem.build(library, coef, n_states, input_values, bounds, form, state_names)
    if problem.is_affine():
        points, note = problem.affine_points()
    else:
        points, note = problem.search(n_starts, seed), ""
    return [problem.describe(x, step, note) for x in points]


class _Problem:
    """One regime at fixed inputs: residual, Jacobian, boxes."""

    def __init__(
        self,
        library: Any,
        coef: np.ndarray,
        u: np.ndarray,
        bounds: np.ndarray,
        form: str,
        names: list[str],
    ) -> None:
        self.library, self.coef, self.u, self.form, self.names = library, coef, u, form, names
        self.n = coef.shape[1]
        self.bounds = bounds
        width = bounds[:, 1] - bounds[:, 0]
        self.scale = np.maximum(width, 1e-9 * np.maximum(1.0, np.abs(bounds).max(axis=1)))
        self.box = np.column_stack(
            [bounds[:, 0] - SEARCH_MARGIN * self.scale, bounds[:, 1] + SEARCH_MARGIN * self.scale]
        )

    @classmethod
    def build(
        cls,
        library: Any,
        coef: np.ndarray,
        n_states: int,
        input_values: Sequence[float] | np.ndarray,
        bounds: np.ndarray,
        form: str,
        state_names: Sequence[str] | None,
    ) -> _Problem:
        _check_form(form)
        n_vars = len(library.variables_)
        coef = np.asarray(coef, dtype=np.float64)
        if coef.shape != (library.n_terms_, n_states) or not 1 <= n_states <= n_vars:
            raise FitError(
                f"coefficients have shape {coef.shape}; expected ({library.n_terms_}, {n_states})"
            )
        u = np.asarray(input_values, dtype=np.float64).reshape(-1)
        if u.shape[0] != n_vars - n_states:
            raise FitError(f"expected {n_vars - n_states} input values, got {u.shape[0]}")
        bounds = np.asarray(bounds, dtype=np.float64).reshape(n_states, 2)
        if not np.all(np.isfinite(bounds)) or np.any(bounds[:, 1] < bounds[:, 0]):
            raise FitError(
                f"equilibrium search bounds must be finite [min, max] rows, got {bounds.tolist()}"
            )
        names = (
            list(state_names) if state_names is not None else list(library.variables_[:n_states])
        )
        return cls(library, coef, u, bounds, form, names)

    def z(self, x: np.ndarray) -> np.ndarray:
        return np.concatenate([x, self.u])

    def residual(self, x: np.ndarray) -> np.ndarray:
        used = np.any(self.coef != 0, axis=1)  # a term left out adds nothing, even if inf
        with np.errstate(all="ignore"):
            terms = self.library.transform(self.z(x)[None, :])[0]
        f = terms[used] @ self.coef[used]
        return f - x if self.form == "discrete" else f

    def model_jacobian(self, x: np.ndarray) -> np.ndarray:
        return jacobian(self.library, self.coef, self.z(x), self.n)

    def residual_jacobian(self, x: np.ndarray) -> np.ndarray:
        J = self.model_jacobian(x)
        return J - np.eye(self.n) if self.form == "discrete" else J

    def is_affine(self) -> bool:
        used = np.any(self.coef != 0, axis=1)
        degrees = self.library.degree_in(self.library.variables_[: self.n])
        return all(d in (0, 1) for d, keep in zip(degrees, used, strict=True) if keep)

    def affine_points(self) -> tuple[list[np.ndarray], str]:
        origin = np.zeros(self.n)
        offset, A = self.residual(origin), self.residual_jacobian(origin)
        x = affine_equilibrium(A, np.zeros((self.n, 0)), offset, np.zeros(0))
        if x is not None:
            return [x], ""
        x_min, *_ = np.linalg.lstsq(A, -offset, rcond=None)
        if np.linalg.norm(A @ x_min + offset) > 1e-9 * (1.0 + np.linalg.norm(offset)):
            return [], ""
        return [x_min], "linear part singular: not isolated (a continuum of equilibria)"

    def search(self, n_starts: int, seed: int) -> list[np.ndarray]:
        starts = self._starts(n_starts, seed)
        f_scale = float(np.median([np.max(np.abs(self.residual(x))) for x in starts]))
        tolerance = RESIDUAL_TOLERANCE * max(f_scale, 1e-300)
        found: list[np.ndarray] = []
        for x0 in starts:
            with np.errstate(all="ignore"):
                result = root(self.residual, x0, jac=self.residual_jacobian, method="hybr")
            x = result.x
            if (
                not np.all(np.isfinite(x))
                or np.any(x < self.box[:, 0])
                or np.any(x > self.box[:, 1])
            ):
                continue
            if np.max(np.abs(self.residual(x))) > tolerance:
                continue
            if all(np.max(np.abs(x - y) / self.scale) > MERGE_TOLERANCE for y in found):
                found.append(x)
        return sorted(found, key=lambda x: tuple(np.round(x / self.scale, 8)))

    def _starts(self, n_starts: int, seed: int) -> np.ndarray:
        centre = self.box.mean(axis=1)[None, :]
        if n_starts <= 1:
            return centre
        sample = qmc.LatinHypercube(d=self.n, seed=seed).random(n_starts - 1)
        scaled = qmc.scale(sample, self.box[:, 0], self.box[:, 1])
        return np.vstack([centre, scaled])

    def describe(self, x: np.ndarray, step: float, note: str) -> Equilibrium:
        eigenvalues = np.linalg.eigvals(self.model_jacobian(x))
        constants, period = timescales(eigenvalues, self.form, step)
        slack = 1e-9 * self.scale
        inside = bool(
            np.all(x >= self.bounds[:, 0] - slack) and np.all(x <= self.bounds[:, 1] + slack)
        )
        return Equilibrium(
            point={name: float(v) for name, v in zip(self.names, x, strict=True)},
            eigenvalues=eigenvalues,
            stability=classify(eigenvalues, self.form),
            inside=inside,
            time_constants=constants,
            period=period,
            note=note,
        )


def typical_inputs(u: np.ndarray) -> np.ndarray:
    """Inputs at which a regime's equilibria are computed.

    A stepped input (at most 20 distinct levels) takes the level the regime spends
    most samples at; a continuously varying one its median.
    """
    out = np.empty(u.shape[1])
    for j, column in enumerate(u.T):
        levels, counts = np.unique(column, return_counts=True)
        out[j] = levels[np.argmax(counts)] if levels.size <= 20 else np.median(column)
    return out


def regime_equilibria(
    library: Any,
    fit: Any,
    stats: Any,
    input_values: np.ndarray,
    bounds: np.ndarray,
    *,
    form: str = "continuous",
    step: float = 1.0,
    seed: int = 0,
    state_names: Sequence[str],
) -> list[Equilibrium]:
    """One regime's equilibria (:func:`find_equilibria`) with their standard errors.

    Parameters
    ----------
    library : fitted TermLibrary
        The regime's terms.
    fit : LocalFit
        The regime's coefficients and support.
    stats : GramStats
        What ``fit`` was computed from (for the standard errors).
    input_values : ndarray of shape (n_inputs,)
    bounds : ndarray of shape (n_states, 2)
    form, step, seed
        As in :func:`find_equilibria`.
    state_names : sequence of str

    Returns
    -------
    list of Equilibrium
        ``stderr`` filled in per state (:func:`equilibrium_stderr`).
    """
    n_states = len(state_names)
    found = find_equilibria(
        library,
        fit.coef,
        n_states=n_states,
        input_values=input_values,
        bounds=bounds,
        form=form,
        step=step,
        seed=seed,
        state_names=list(state_names),
    )
    for e in found:
        z = np.concatenate([[e.point[s] for s in state_names], np.asarray(input_values)])
        se = equilibrium_stderr(library, fit.coef, stats, fit.support, z, n_states, form=form)
        e.stderr = {s: float(v) for s, v in zip(state_names, se, strict=True)}
    return found


def place_equilibria(
    model_or_guards: HybridModel | Sequence[Guard],
    regimes: Sequence[RegimeModel] | None = None,
    variables: Sequence[str] | None = None,
    input_values: Sequence[float] | dict[str, float] | None = None,
) -> None:
    """Mark every equilibrium as reachable (``inside=True``) or virtual.

    An equilibrium of regime ``i`` is inside when none of the guards leaving
    ``i`` fires at it, with the inputs at ``input_values``.

    Parameters
    ----------
    model_or_guards : HybridModel or sequence of Guard
    regimes : sequence of RegimeModel, optional
        Defaults to the model's regimes.
    variables : sequence of str, optional
        Defaults to the model's variables (states then inputs).
    input_values : sequence or dict, optional
        Inputs at their typical value; defaults to the midpoint of each input's
        ``data_range`` for a model, else 0.
    """
    if isinstance(model_or_guards, HybridModel):
        model = model_or_guards
        guards = list(model.guards)
        regimes = model.regimes if regimes is None else regimes
        variables = model.variables if variables is None else variables
        if input_values is None:
            input_values = {
                u: 0.5 * sum(model.data_range[u]) if u in model.data_range else 0.0
                for u in model.inputs
            }
    else:
        guards = list(model_or_guards)
        if regimes is None or variables is None:
            raise FitError("place_equilibria needs regimes and variables when given guards")
    variables = list(variables)
    for reg in regimes:
        out = [g for g in guards if g.source == reg.id]
        for eq in reg.equilibria:
            z = _point(eq, variables, input_values)
            eq.inside = not any(guard_values(g, variables, z[None])[0] > 0 for g in out)


def _point(eq: Equilibrium, variables: list[str], input_values) -> np.ndarray:
    """Variables at an equilibrium: its state values, inputs from ``input_values``."""
    z = np.zeros(len(variables))
    extra = list(v for v in variables if v not in eq.point)
    for i, v in enumerate(variables):
        if v in eq.point:
            z[i] = eq.point[v]
        elif isinstance(input_values, dict):
            z[i] = float(input_values.get(v, 0.0))
        elif input_values is not None:
            z[i] = float(np.asarray(input_values, dtype=float)[extra.index(v)])
    return z


def _check_form(form: str) -> None:
    if form not in FORMS:
        raise FitError(f"form must be one of {', '.join(FORMS)}, got {form!r}")
