"""The candidate terms of a local model checked on a data set before any fitting.

:func:`check_library_on_data` builds the largest library the fit will use (the
highest candidate degree, with the trigonometric and custom terms, without the
variables excluded from the equations) and runs :func:`modemap.terms.checks.check_terms`
on every sample, searched in the order of the source rows, so a failure names the
first row of the file where it happens: ``data row N (run 'a', t=0.4)``, ``N``
counting data rows from 1 (header not counted; across files in the order given).
"""

from __future__ import annotations

from collections.abc import Sequence

import numpy as np

from modemap.data.dataset import Dataset
from modemap.fit.local_model import LocalModel
from modemap.terms.checks import check_terms

__all__ = ["check_library_on_data"]


def check_library_on_data(
    spec: LocalModel, ds: Dataset, *, form: str = "continuous", exclude: Sequence[str] = ()
) -> None:
    """Refuse candidate terms that are not finite, too large or collinear on ``ds``.

    Raises
    ------
    ExpressionError, DataError
        See :mod:`modemap.terms.checks`.
    """
    degrees = [d for d in spec.candidate_degrees() if d is not None]
    local = spec.bind(
        ds.variable_names,
        n_states=ds.n_states,
        form=form,
        exclude=exclude,
        degree=max(degrees) if degrees else None,
    )
    _, x, u, _ = ds.concat()
    index = np.concatenate([r.index for r in ds.runs])
    runs = np.concatenate([np.full(r.n_samples, i) for i, r in enumerate(ds.runs)])
    time = np.concatenate([r.time for r in ds.runs])
    # source order; samples made by resampling (index -1) after the measured ones
    order = np.lexsort((np.arange(index.size), np.where(index < 0, np.iinfo(np.int64).max, index)))
    Z = np.hstack([x, u])[order]

    def where(i: int) -> str:
        k = int(order[i])
        run = ds.runs[int(runs[k])]
        row = f"data row {int(index[k]) + 1}" if index[k] >= 0 else "a resampled point"
        named = f"run '{run.name}', " if len(ds.runs) > 1 or run.name != "0" else ""
        return f"{row} ({named}{ds.time_name}={time[k]:.6g})"

    custom = tuple(getattr(spec, "custom", None) or ()) + tuple(getattr(spec, "terms", None) or ())
    check_terms(local.library, Z, where, custom=custom, source=ds.source)
