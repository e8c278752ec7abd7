"""The missing-value policy: what :func:`modemap.data.intake.read_data` does with empty cells.

``"refuse"`` (the default) stops at the first empty cell with its file, column and row;
``"drop"`` leaves out every row with an empty cell among the columns read; ``"interpolate"``
fills an empty state or input cell linearly in time between the nearest filled cells of the
same run (the time itself must be present, and a run must start and end with values:
nothing is extrapolated).  Cells holding ``inf`` are never missing values: they are refused
under every policy.  The counts end up in :class:`modemap.data.dataset.Missing`.
"""

from __future__ import annotations

from typing import TYPE_CHECKING

import numpy as np

from modemap._params import Options, check_value
from modemap.data.dataset import Missing

if TYPE_CHECKING:
    from modemap.data.tables import Table

__all__ = ["POLICIES", "Tally", "check_policy", "interpolate_gaps", "kept_rows"]

POLICIES = ("refuse", "drop", "interpolate")
"""The missing-value policies."""


def check_policy(policy: str) -> str:
    """``policy`` if it is one of :data:`POLICIES` (else :class:`ParameterError`)."""
    return check_value(policy, [Options(POLICIES)], "missing")


class Tally:
    """Empty cells handled, per column, over every table of a source."""

    def __init__(self, policy: str) -> None:
        self.policy = policy
        self.values: dict[str, int] = {}
        self.rows = 0

    def add(self, names: list[str], empty: np.ndarray) -> None:
        """Count the empty cells ``empty`` (rows x columns named ``names``)."""
        for name, count in zip(names, empty.sum(axis=0).tolist(), strict=True):
            if count:
                self.values[name] = self.values.get(name, 0) + int(count)
        self.rows += int(empty.any(axis=1).sum())

    def result(self) -> Missing:
        return Missing(self.policy, dict(self.values), self.rows)


def kept_rows(data: np.ndarray, names: list[str], tally: Tally) -> np.ndarray:
    """Positions of the rows of ``data`` without an empty cell (``"drop"``), counted."""
    empty = np.isnan(data)
    tally.add(names, empty)
    return np.flatnonzero(~empty.any(axis=1))


def interpolate_gaps(
    table: Table,
    time: np.ndarray,
    values: np.ndarray,
    pos: np.ndarray,
    names: list[str],
    run: str,
    tally: Tally,
) -> None:
    """Fill the empty cells of one run's ``values`` (in place) linearly in ``time``.

    Raises
    ------
    DataError
        An empty cell at the start or end of the run (nothing to interpolate from), naming
        the column and row.
    """
    empty = np.isnan(values)
    if not empty.any():
        return
    for j in np.flatnonzero(empty.any(axis=0)):
        gap = empty[:, j]
        for k, where in ((0, "start"), (gap.shape[0] - 1, "end")):
            if gap[k]:
                raise table.error(
                    f"empty cell at the {where} of run '{run}': interpolation needs a value "
                    "on both sides (drop such rows instead)",
                    column=names[j],
                    pos=int(pos[k]),
                )
        values[gap, j] = np.interp(time[gap], time[~gap], values[~gap, j])
    tally.add(names, empty)
