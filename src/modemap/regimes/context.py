"""The state one :meth:`RegimeFinder.fit <modemap.regimes.finder.RegimeFinder.fit>` carries
between its steps once the data are read: the bound local model, the refinement settings,
the executor and what the steps gather on the way."""

from __future__ import annotations

import dataclasses
from dataclasses import dataclass, field
from typing import Any

from modemap.engine import Engine
from modemap.fit.local_model import BoundLocalModel
from modemap.regimes.refine import RefineSettings
from modemap.regimes.rows import Rows, RowWork
from modemap.regimes.selection import Windows

__all__ = ["FitContext"]


@dataclass
class FitContext:
    """What one :meth:`RegimeFinder.fit` knows once the data are read.

    Attributes
    ----------
    local : BoundLocalModel
        The local model with its library for these variables and this form (at the
        library order the regimes are searched with, or the one chosen).
    settings : RefineSettings
        How the refinement fits, scores and relabels.
    engine : Engine
        Where per-block work runs.
    state_names : list of str
    variables : list of str
        States then inputs.
    exclude : list of str
        Inputs no term may use (they select the regime).
    derivative : dict
        Derivative settings actually used (continuous form).
    notes : list of str
        Notes gathered on the way (for ``notes_``).
    """

    local: BoundLocalModel
    settings: RefineSettings
    engine: Engine
    state_names: list[str]
    variables: list[str]
    exclude: list[str]
    derivative: dict[str, Any]
    notes: list[str] = field(default_factory=list)
    _work: tuple[Any, Any, RowWork] | None = None
    windows: tuple[Any, Windows] | None = None  # the common targets of a set of rows

    @property
    def library(self) -> Any:
        return self.local.library

    def at_degree(self, degree: int | None) -> FitContext:
        """The same context with the local model at another library order."""
        if degree == self.local.degree:
            return self
        local = self.local.spec.bind(
            self.variables,
            n_states=len(self.state_names),
            form=self.local.form,
            exclude=self.exclude,
            degree=degree,
        )
        settings = dataclasses.replace(self.settings, local=local)
        return dataclasses.replace(self, local=local, settings=settings)

    def work(self, rows: Rows) -> RowWork:
        """``rows`` bound to the engine, placed there once per set of rows."""
        cached = self._work
        if cached is None or cached[0] is not rows.Z or cached[1] is not rows.Y:
            self._work = cached = (rows.Z, rows.Y, RowWork(rows, self.engine))
        return cached[2]
