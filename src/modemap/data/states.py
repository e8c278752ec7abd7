"""The default states: which numeric columns can be states when none are named.

When no state columns are named, every numeric column that is not the time, the run
column or an input is a candidate; :func:`default_states` leaves out those that cannot
be the state of a dynamical system, judged on every sample:

* **constant** columns (one value throughout): nothing to model, and the column would
  duplicate the constant term;
* **two-valued** columns (0/1 flags, on/off, open/closed at two readings): a switch or
  a command, not a quantity that moves continuously;
* **label-like** columns: whole numbers from 0 to at most 19 (at most 20 distinct
  values) in a column whose name has a word that names a label (``regime``, ``mode``,
  ``label``, ``run``, ``class``, ``cluster``, ``phase``, ``stage``, ``segment``,
  ``id``, ``batch``, ``cycle``, ``trial``, ``status``, ``flag``, ``index``,
  ``category``; words split at ``_``, blanks, punctuation and lower-to-upper case
  changes), e.g. ``true_regime``, ``runID``, ``Mode``.  Whole numbers alone are not
  enough: a level read in whole centimetres is a state.

Nothing is left out silently: the dataset gets a warning naming each column left out
and why, and a named state (``states=...``) is never left out.
"""

from __future__ import annotations

import dataclasses
import re

import numpy as np

from modemap._exceptions import DataError
from modemap.data.dataset import Dataset

__all__ = ["LABEL_WORDS", "MAX_LABEL_VALUES", "default_states", "not_a_state"]

LABEL_WORDS = frozenset(
    "regime mode label run class cluster phase stage segment id batch cycle trial status "
    "flag index category".split()
)
"""Words that make a column of small whole numbers a label."""

MAX_LABEL_VALUES = 20
"""Most distinct values (0 to 19) a label-like column has."""


def _words(name: str) -> list[str]:
    spaced = re.sub(r"(?<=[a-z0-9])(?=[A-Z])", " ", name)
    return [w.lower() for w in re.split(r"[^A-Za-z0-9]+", spaced) if w]


def not_a_state(name: str, values: np.ndarray) -> str | None:
    """Why a column cannot be a default state, or None when it can.

    Parameters
    ----------
    name : str
        Column name (without unit).
    values : ndarray of shape (n,)
        Every sample of the column (finite).

    Returns
    -------
    str or None
        ``"constant (3 at every sample)"``, ``"two values only (0 and 1): a flag ..."``,
        ``"whole numbers 0 to 2 in a column named like a label"`` or None.
    """
    levels = np.unique(values)
    if levels.size == 1:
        return f"constant ({levels[0]:.6g} at every sample)"
    if levels.size == 2:
        return (
            f"two values only ({levels[0]:.6g} and {levels[1]:.6g}): a flag or switch, not a state"
        )
    whole = bool(np.all(levels == np.round(levels)))
    labelled = any(w in LABEL_WORDS for w in _words(name))
    if whole and labelled and levels[0] >= 0 and levels.size <= MAX_LABEL_VALUES:
        return f"whole numbers {levels[0]:.0f} to {levels[-1]:.0f} in a column named like a label"
    return None


def default_states(ds: Dataset) -> Dataset:
    """``ds`` without the state columns that cannot be states (see the module notes).

    Parameters
    ----------
    ds : Dataset
        Read with every candidate column as a state.

    Returns
    -------
    Dataset
        The same dataset with those columns left out and a warning naming them (``ds``
        itself when every column can be a state).

    Raises
    ------
    DataError
        When no column is left.
    """
    _, x, _, _ = ds.concat()
    reasons = {n: not_a_state(n, x[:, j]) for j, n in enumerate(ds.state_names)}
    out = {n: r for n, r in reasons.items() if r is not None}
    if not out:
        return ds
    listed = "; ".join(f"'{n}': {r}" for n, r in out.items())
    keep = [j for j, n in enumerate(ds.state_names) if n not in out]
    if not keep:
        raise DataError(
            f"no column can be a state: {listed}; name the state columns explicitly",
            source=ds.source,
        )
    runs = tuple(
        dataclasses.replace(r, states=np.ascontiguousarray(r.states[:, keep])) for r in ds.runs
    )
    note = f"left out of the default states (name them as states to use them): {listed}"
    return dataclasses.replace(
        ds,
        runs=runs,
        state_names=tuple(ds.state_names[j] for j in keep),
        units={k: v for k, v in ds.units.items() if k not in out},
        warnings=(*ds.warnings, note),
    )
