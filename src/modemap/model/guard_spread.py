"""Uncertainty of the guards' printed numbers by a block bootstrap over the labelled runs.

Near a sharp switching surface the logistic fit is close to separation, where the
Wald standard errors from the information matrix are unreliable ("On the existence of
maximum likelihood estimates in logistic regression models", Albert and Anderson,
Biometrika 71, 1984, doi:10.1093/biomet/71.1.1).  The numbers a user reads (a threshold,
or the coefficients and offset of a surface scaled to a unit normal) are ratios that stay
finite there, so their spread is estimated by refitting the guards on resampled data:
runs are cut into contiguous blocks several stays long and the blocks drawn with
replacement, which keeps the serial dependence within a block (the block bootstrap:
"The jackknife and the bootstrap for general stationary observations", Kuensch, Annals
of Statistics 17, 1989, doi:10.1214/aos/1176347265; here with non-overlapping blocks).
The structure of each guard (its terms, a threshold or a surface) is held at the one
fitted on all data, so the spread is that of the coefficients given the structure.
"""

from __future__ import annotations

from collections.abc import Sequence

import numpy as np

from modemap.model.hybrid import Guard
from modemap.model.hysteresis import contiguous_blocks, median_stay

__all__ = ["block_indices", "printed_numbers", "spread"]


def block_indices(labels: np.ndarray, lengths: Sequence[int], min_blocks: int = 10) -> list:
    """Row indices of contiguous blocks of every run, each about four median stays long
    (:func:`~modemap.model.hysteresis.median_stay`; at least 10 samples) and short enough
    that there are ``min_blocks`` of them; blocks of fewer than 2 samples are left out."""
    total = int(np.sum(lengths))
    size = max(10, 4 * int(median_stay(labels, lengths)))
    size = max(2, min(size, total // min_blocks))
    ids = contiguous_blocks(lengths, size)
    blocks = np.split(np.arange(total), np.flatnonzero(np.diff(ids)) + 1)
    return [b for b in blocks if b.size >= 2]


def printed_numbers(final: Guard, guard: Guard, one_variable: bool) -> np.ndarray:
    """The numbers printed for ``final``, computed from ``guard`` (a refit on the same terms).

    A one-variable threshold: ``[threshold]``.  A surface: the weights of ``final``'s
    non-zero terms and the offset, divided by the norm of the weights (a unit normal), as
    :func:`modemap.model.guard_rules.guard_text` prints them.  NaN where ``guard`` lost the term.
    """
    w = np.asarray(guard.weights, dtype=float)
    nz = np.flatnonzero(np.asarray(final.weights, dtype=float) != 0)
    if one_variable:
        lead = w[nz[0]]
        return np.array([-guard.offset / lead if lead != 0 else np.nan])
    norm = float(np.linalg.norm(w))
    if norm == 0:
        return np.full(nz.size + 1, np.nan)
    return np.append(w[nz] / norm, -guard.offset / norm)


def spread(replicates: list[np.ndarray], min_replicates: int = 10) -> list[float] | None:
    """Standard deviation of each printed number over the replicates that have it all;
    None with fewer than ``min_replicates`` of them."""
    rows = [r for r in replicates if np.all(np.isfinite(r))]
    if len(rows) < min_replicates:
        return None
    return np.std(np.vstack(rows), axis=0, ddof=1).tolist()
