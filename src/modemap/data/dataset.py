"""The typed object every stage after intake consumes.

A :class:`Dataset` holds one or more :class:`Run` objects (contiguous,
uniformly or nearly uniformly sampled stretches of one experiment) plus the
names, units and nominal step shared by all of them.  It is produced by
:mod:`modemap.data.intake` and never modified afterwards.
"""

from __future__ import annotations

from dataclasses import dataclass, field
from typing import Any

import numpy as np
import pandas as pd

__all__ = ["Dataset", "Gap", "Missing", "Run"]


@dataclass(frozen=True)
class Run:
    """One contiguous stretch of samples.

    Attributes
    ----------
    name : str
        Unique name of this run inside the dataset.  When a run is split at a
        gap the pieces are named ``"<origin>#1"``, ``"<origin>#2"``...
    origin : str
        The run id as found in the data (value of the run column, or the file
        name when several files are given, or ``"0"``).
    time : ndarray of shape (n,)
        Strictly increasing time stamps (float64).
    states : ndarray of shape (n, n_states)
    inputs : ndarray of shape (n, n_inputs)
        ``n_inputs`` may be 0.
    index : ndarray of shape (n,) of int64
        Position of each sample among all data rows of the source, in input
        order (0-based, header excluded, counting across files in the order
        given).  ``-1`` for samples created by resampling.
    stamps : ndarray of shape (n,) of datetime64, optional
        The date-time stamp of each sample when the time column held date-times
        (see :mod:`modemap.data.stamps`), else None.
    """

    name: str
    origin: str
    time: np.ndarray
    states: np.ndarray
    inputs: np.ndarray
    index: np.ndarray
    stamps: np.ndarray | None = None

    @property
    def n_samples(self) -> int:
        return int(self.time.shape[0])

    @property
    def duration(self) -> float:
        return float(self.time[-1] - self.time[0]) if self.n_samples else 0.0


@dataclass(frozen=True)
class Gap:
    """A gap at which a run was split (reported, never silent)."""

    origin: str
    start: float
    end: float
    steps: float

    def __str__(self) -> str:
        return (
            f"run '{self.origin}': gap from t={self.start:g} to t={self.end:g} "
            f"({self.steps:.1f} steps); run split there"
        )


@dataclass(frozen=True)
class Missing:
    """What was done with empty cells (the missing-value policy and its counts).

    Attributes
    ----------
    policy : {"refuse", "drop", "interpolate"}
    values : dict
        Column name -> number of empty cells dropped or interpolated (columns with none
        are left out).
    rows : int
        Rows dropped (``"drop"``) or rows with at least one interpolated value.
    """

    policy: str = "refuse"
    values: dict[str, int] = field(default_factory=dict)
    rows: int = 0

    def __str__(self) -> str:
        if not self.rows:
            return f"none (policy {self.policy})"
        what = "dropped" if self.policy == "drop" else "with values interpolated"
        counts = ", ".join(f"{name}: {n}" for name, n in self.values.items())
        return f"{self.rows} row(s) {what} (empty cells: {counts})"


@dataclass(frozen=True)
class Dataset:
    """Validated trajectories: runs plus names, units and the sampling step.

    Attributes
    ----------
    runs : tuple of Run
    time_name : str
        Name of the time column (without unit).
    state_names, input_names : tuple of str
        Bare column names (a header ``"T [degC]"`` gives the name ``"T"``).
    units : dict
        Name -> unit text (``""`` where none was given); includes the time.
    step : float
        Nominal sampling step: the median time increment over all runs.
    source : str
        File name(s) or ``"<DataFrame>"``, for messages.
    n_rows : int
        Number of data rows read from the source (before any resampling).
    warnings : tuple of str
        Things a user should know (irregular sampling, gaps, ...).
    gaps : tuple of Gap
    resampled : bool
        True when the user asked for resampling to a uniform step.
    missing : Missing
        The missing-value policy used and how many cells it dropped or interpolated.
    stamp_zone : tzinfo or None
        Zone of the runs' date-time stamps (None: no zone, or no stamps).
    """

    runs: tuple[Run, ...]
    time_name: str
    state_names: tuple[str, ...]
    input_names: tuple[str, ...] = ()
    units: dict[str, str] = field(default_factory=dict)
    step: float = float("nan")
    source: str = "<DataFrame>"
    n_rows: int = 0
    warnings: tuple[str, ...] = ()
    gaps: tuple[Gap, ...] = ()
    resampled: bool = False
    missing: Missing = field(default_factory=Missing)
    stamp_zone: Any = None

    @property
    def has_stamps(self) -> bool:
        """True when every run carries date-time stamps."""
        return bool(self.runs) and all(r.stamps is not None for r in self.runs)

    @property
    def n_states(self) -> int:
        return len(self.state_names)

    @property
    def n_inputs(self) -> int:
        return len(self.input_names)

    @property
    def n_samples(self) -> int:
        return sum(r.n_samples for r in self.runs)

    @property
    def variable_names(self) -> tuple[str, ...]:
        """States followed by inputs: the variables candidate terms may use."""
        return self.state_names + self.input_names

    @property
    def lengths(self) -> np.ndarray:
        """Samples per run, in the ``lengths`` convention of hmmlearn."""
        return np.array([r.n_samples for r in self.runs], dtype=np.int64)

    def unit(self, name: str) -> str:
        return self.units.get(name, "")

    def label(self, name: str) -> str:
        """``"T [degC]"`` style label for display."""
        u = self.unit(name)
        return f"{name} [{u}]" if u else name

    def concat(self) -> tuple[np.ndarray, np.ndarray, np.ndarray, np.ndarray]:
        """All runs stacked: ``(time, states, inputs, lengths)``."""
        time = np.concatenate([r.time for r in self.runs])
        states = np.concatenate([r.states for r in self.runs], axis=0)
        inputs = np.concatenate([r.inputs for r in self.runs], axis=0)
        return time, states, inputs, self.lengths

    def ranges(self) -> dict[str, tuple[float, float]]:
        """Minimum and maximum of every state and input over all runs."""
        _, x, u, _ = self.concat()
        out = {
            n: (float(x[:, i].min()), float(x[:, i].max())) for i, n in enumerate(self.state_names)
        }
        out.update(
            {
                n: (float(u[:, i].min()), float(u[:, i].max()))
                for i, n in enumerate(self.input_names)
            }
        )
        return out

    def to_frame(self) -> pd.DataFrame:
        """Long table with columns ``run, <time>, <states...>, <inputs...>``."""
        frames = []
        for r in self.runs:
            data = {"run": r.name, self.time_name: r.time}
            data.update({n: r.states[:, i] for i, n in enumerate(self.state_names)})
            data.update({n: r.inputs[:, i] for i, n in enumerate(self.input_names)})
            frames.append(pd.DataFrame(data))
        return pd.concat(frames, ignore_index=True)
