"""The hybrid model: regimes, their equations and equilibria, and the guards.

These plain dataclasses are what the fit produces, what the simulator runs,
what the report and the dashboard read and what :mod:`modemap.model.modelfile`
writes as JSON.  They hold numbers only (no fitted scikit-learn objects), so a
model file round-trips exactly.

Conventions
-----------
* ``coefficients`` has shape ``(n_terms, n_states)``: column ``j`` is the
  right-hand side of ``d state_j/dt`` (continuous form) or of ``state_j[k+1]``
  (discrete form) as ``sum_i coefficients[i, j] * term_i(state, input)``.
* Terms are canonical strings (see :mod:`modemap.terms.library`): ``1``, ``x``,
  ``x^2``, ``x*y``, ``x^2*u``, ``sin(x)``, evaluated on raw, unscaled values.
* A guard ``source -> target`` fires where
  ``sum(weights * terms) + offset > 0``; when several guards of the current
  regime fire at once, the one with the largest value wins.
"""

from __future__ import annotations

from dataclasses import dataclass, field
from typing import Any

import numpy as np

__all__ = ["Equilibrium", "Guard", "HybridModel", "RegimeModel"]

FORMS = ("continuous", "discrete")


@dataclass
class Equilibrium:
    """A fixed point of one regime's model.

    Attributes
    ----------
    point : dict
        State name -> value.
    eigenvalues : ndarray of complex
        Eigenvalues of the Jacobian there.
    stability : str
        Classification in the trade's words, e.g. ``"stable node"``, ``"saddle"``.
    inside : bool
        True when the point lies inside the region where the regime is active
        (reachable); False when the system leaves the regime first (virtual).
    time_constants : list of float
        ``-1/Re(lambda)`` for the stable modes (continuous), or the analogue
        ``-dt/ln|mu|`` in discrete form.
    period : float or None
        Oscillation period ``2*pi/|Im(lambda)|`` of the slowest oscillatory mode.
    note : str
    stderr : dict or None
        State name -> standard error of that coordinate (delta method from the
        coefficients' covariance, :func:`modemap.model.equilibria.equilibrium_stderr`);
        ``inf`` at a fold of the fitted model; None when not computed.
    inputs : dict
        Input name -> the value held while the point was computed (the regime's typical
        inputs, :func:`modemap.model.equilibria.typical_inputs`); empty without inputs or
        when not recorded.
    """

    point: dict[str, float]
    eigenvalues: np.ndarray
    stability: str
    inside: bool = True
    time_constants: list[float] = field(default_factory=list)
    period: float | None = None
    note: str = ""
    stderr: dict[str, float] | None = None
    inputs: dict[str, float] = field(default_factory=dict)


@dataclass
class RegimeModel:
    """One regime's local model.

    Attributes
    ----------
    id : int
    samples : int
        Number of samples labelled with this regime.
    terms : list of str
        Canonical term strings.
    coefficients : ndarray of shape (n_terms, n_states)
    stderr : ndarray of shape (n_terms, n_states)
        Standard errors (0 for terms not in the support).
    noise_cov : ndarray of shape (n_states, n_states)
        Covariance of the one-step residuals.
    equilibria : list of Equilibrium
    inclusion : ndarray of shape (n_terms, n_states) or None
        Bootstrap inclusion frequencies, when computed.
    """

    id: int
    samples: int
    terms: list[str]
    coefficients: np.ndarray
    stderr: np.ndarray
    noise_cov: np.ndarray
    equilibria: list[Equilibrium] = field(default_factory=list)
    inclusion: np.ndarray | None = None


@dataclass
class Guard:
    """A learnt switching surface ``source -> target``.

    The switch is predicted where ``weights @ terms(z) + offset > 0``.
    """

    source: int
    target: int
    terms: list[str]
    weights: np.ndarray
    offset: float
    text: str = ""


@dataclass
class HybridModel:
    """A fitted hybrid model.

    Attributes
    ----------
    states, inputs : list of str
    form : {"continuous", "discrete"}
    time_name : str
    units : dict
        Variable name -> unit text.
    step : float
        Sampling step of the training data (the map step in discrete form).
    regimes : list of RegimeModel
    guards : list of Guard
    guard_kind : {"per-source", "memoryless"}
        Which switching-surface family was chosen.
    data_range : dict
        Variable name -> (min, max) over the training data.
    derivative : dict
        How derivatives were estimated (method and parameters); empty in
        discrete form.
    selection : list of dict
        Model-selection table, one row per number of regimes tried.
    statistics : dict
        Shares, dwell times and transition counts.
    validation : dict
        Re-simulation and one-step figures on held-out data.
    metadata : dict
        Seed, options, source file names, modemap version.
    """

    states: list[str]
    inputs: list[str]
    form: str
    regimes: list[RegimeModel]
    guards: list[Guard] = field(default_factory=list)
    time_name: str = "time"
    units: dict[str, str] = field(default_factory=dict)
    step: float = float("nan")
    guard_kind: str = "per-source"
    data_range: dict[str, tuple[float, float]] = field(default_factory=dict)
    derivative: dict[str, Any] = field(default_factory=dict)
    selection: list[dict[str, Any]] = field(default_factory=list)
    statistics: dict[str, Any] = field(default_factory=dict)
    validation: dict[str, Any] = field(default_factory=dict)
    metadata: dict[str, Any] = field(default_factory=dict)

    @property
    def n_regimes(self) -> int:
        return len(self.regimes)

    @property
    def variables(self) -> list[str]:
        return list(self.states) + list(self.inputs)

    def regime(self, regime_id: int) -> RegimeModel:
        for r in self.regimes:
            if r.id == regime_id:
                return r
        raise KeyError(regime_id)

    def guards_from(self, regime_id: int) -> list[Guard]:
        return [g for g in self.guards if g.source == regime_id]

    def summary(self, width: int = 80) -> str:
        """The model in a few lines per regime (equations with standard errors, equilibria,
        guards, held-out figures), wrapped to ``width`` columns; the report is the long form.

        Examples
        --------
        >>> print(model.summary())  # doctest: +SKIP
        """
        from modemap.model.summary import model_summary

        return model_summary(self, width=width)

    def __repr__(self) -> str:
        from modemap.model.summary import short_repr

        return short_repr(self)

    def _repr_markdown_(self) -> str:
        """Notebooks: the summary as a preformatted block."""
        return "```text\n" + self.summary() + "\n```"
