"""Which runs are processed side by side: many short runs.

Work done run by run from a Python loop (derivatives, the regime chain's recursions) costs a
loop iteration per run: negligible for a few long runs, the whole cost for thousands of runs
of ten samples.  Runs of at most :data:`SHORT_RUN` samples are then laid side by side and
each step is one numpy operation over all of them, when there are at least
:data:`MIN_BATCH` of them; data of a few long runs (the bundled demos, most plant logs) keep
the run-by-run code, and so exactly the results they had.
"""

from __future__ import annotations

import numpy as np

__all__ = ["MIN_BATCH", "SHORT_RUN", "batched", "run_starts"]

SHORT_RUN = 64
"""Runs of at most this many samples are batched."""
MIN_BATCH = 16
"""Fewest short runs for which the batch is used."""


def batched(lengths: np.ndarray) -> np.ndarray:
    """Which runs go to the batch: short ones, when there are enough of them.

    Parameters
    ----------
    lengths : array-like of int
        Samples (or rows) per run.

    Returns
    -------
    ndarray of bool, one per run
    """
    lengths = np.asarray(lengths, dtype=np.int64)
    short = (lengths > 0) & (lengths <= SHORT_RUN)
    if short.sum() < MIN_BATCH:
        short[:] = False
    return short


def run_starts(lengths: np.ndarray) -> np.ndarray:
    """First row of each run."""
    lengths = np.asarray(lengths, dtype=np.int64)
    return np.concatenate([[0], np.cumsum(lengths)[:-1]]).astype(np.int64)
