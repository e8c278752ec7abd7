"""Run the refinement on arrays in one call (the tests' shorthand for its three objects)."""

from __future__ import annotations

from typing import Any

import numpy as np

from modemap.fit.local_model import AffineLocalModel, BoundLocalModel, SparseLocalModel
from modemap.regimes.refine import RefineResult, RefineSettings, refine
from modemap.regimes.rows import Rows, RowWork


def bound_model(library: Any, n_states: int, model: str = "sparse", form: str = "continuous"):
    """A local model ("sparse" or "affine") bound to a given library."""
    spec = AffineLocalModel() if model == "affine" else SparseLocalModel()
    return BoundLocalModel(spec, library, tuple(library.variables_[:n_states]), form)


def refine_rows(
    Z: np.ndarray,
    Y: np.ndarray,
    lengths: Any,
    labels: np.ndarray,
    library: Any,
    *,
    n_regimes: int,
    model: str = "sparse",
    form: str = "continuous",
    engine: Any = None,
    per_run: bool | None = None,
    **settings: Any,
) -> RefineResult:
    """:func:`modemap.regimes.refine.refine` on the rows ``Z, Y`` of runs ``lengths``
    (``per_run``: one block per run even in this process)."""
    Y = np.asarray(Y, dtype=np.float64)
    Y = Y[:, None] if Y.ndim == 1 else Y
    local = bound_model(library, Y.shape[1], model, form)
    work = RowWork(Rows.of(Z, Y, lengths), engine, per_run=per_run)
    return refine(work, labels, RefineSettings(local=local, **settings), n_regimes=n_regimes)
