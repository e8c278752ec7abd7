"""Hold-out split of a dataset for validation.

With two runs or more, whole runs are held out: the last
``ceil(fraction * R)`` runs (in dataset order), keeping at least one run for
training.  With a single run, the last ``ceil(fraction * n)`` samples form
the test run (at least 2 samples stay in each part).  Deterministic, no
randomness, so a fit is reproducible.
"""

from __future__ import annotations

import math
from dataclasses import replace

from modemap._exceptions import DataError
from modemap.data.dataset import Dataset, Run

__all__ = ["split_holdout"]


def split_holdout(ds: Dataset, fraction: float = 0.25) -> tuple[Dataset, Dataset]:
    """Split a dataset into training and test parts (see module notes).

    Parameters
    ----------
    ds : Dataset
    fraction : float
        Share held out, in (0, 1).

    Returns
    -------
    (train, test) : tuple of Dataset
    """
    if not 0 < fraction < 1:
        raise DataError(f"holdout fraction must be in (0, 1), not {fraction!r}", source=ds.source)
    runs = ds.runs
    if len(runs) >= 2:
        n_test = min(max(1, math.ceil(fraction * len(runs))), len(runs) - 1)
        return replace(ds, runs=runs[:-n_test]), replace(ds, runs=runs[-n_test:])
    run = runs[0]
    n = run.n_samples
    if n < 4:
        raise DataError(f"run '{run.name}' has {n} samples: too few to hold out a tail")
    n_test = min(max(2, math.ceil(fraction * n)), n - 2)
    head, tail = _slice(run, 0, n - n_test), _slice(run, n - n_test, n)
    return replace(ds, runs=(head,)), replace(ds, runs=(tail,))


def _slice(run: Run, a: int, b: int) -> Run:
    return Run(
        name=run.name,
        origin=run.origin,
        time=run.time[a:b],
        states=run.states[a:b],
        inputs=run.inputs[a:b],
        index=run.index[a:b],
    )
