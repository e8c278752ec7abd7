"""The rows the regime stage works on, and where their per-block work runs.

:class:`Rows` holds the regression rows of all runs stacked (variables ``Z``, targets
``Y``, time stamps) with the rows per run; :meth:`Rows.subset` takes part of every run (the
training head of each run when the number of regimes is chosen, or windows of a long
record) and keeps the run boundaries right.  :class:`RowWork` binds rows to an executor
(:mod:`modemap.engine`): the statistics and decoding tasks of :mod:`.blocks` are mapped
over blocks of runs there.
"""

from __future__ import annotations

from collections.abc import Sequence
from dataclasses import dataclass, replace
from typing import Any

import numpy as np

from modemap.engine import LocalEngine
from modemap.fit.statistics import GramStats
from modemap.regimes.blocks import block_sizes, decode_blocks, split_blocks, stats_by_label

__all__ = ["RowWork", "Rows"]


@dataclass(frozen=True)
class Rows:
    """Regression rows of all runs, stacked.

    Attributes
    ----------
    Z : ndarray of shape (n, n_vars)
        Variables, states then inputs.
    Y : ndarray of shape (n, m)
        Targets (derivatives, or next states in discrete form).
    lengths : ndarray of int
        Rows per run (every entry positive).
    time : ndarray of shape (n,) or None
        Time stamp of each row (None where no step needs it).
    """

    Z: np.ndarray
    Y: np.ndarray
    lengths: np.ndarray
    time: np.ndarray | None = None

    @classmethod
    def of(cls, Z: Any, Y: Any, lengths: Any, time: Any = None) -> Rows:
        """Rows as float arrays (``Y`` made 2-D)."""
        Y = np.asarray(Y, dtype=np.float64)
        return cls(
            np.asarray(Z, dtype=np.float64),
            Y[:, None] if Y.ndim == 1 else Y,
            np.asarray(lengths, dtype=np.int64),
            None if time is None else np.asarray(time),
        )

    @property
    def n_rows(self) -> int:
        return int(self.Z.shape[0])

    @property
    def n_states(self) -> int:
        return int(self.Y.shape[1])

    def subset(self, mask: np.ndarray, lengths: Sequence[int] | None = None) -> Rows:
        """The rows where ``mask`` holds; each run keeps its selected rows (runs left empty
        are dropped), or, with ``lengths``, the selected rows are cut into those runs."""
        if lengths is None:
            runs = np.repeat(np.arange(self.lengths.size), self.lengths)
            counts = np.bincount(runs[mask], minlength=self.lengths.size)
            lengths = counts[counts > 0]
        time = None if self.time is None else self.time[mask]
        return Rows(self.Z[mask], self.Y[mask], np.asarray(lengths, np.int64), time)

    def with_targets(self, Y: np.ndarray) -> Rows:
        """The same rows with other targets."""
        return replace(self, Y=Y)


class RowWork:
    """Rows bound to the executor their per-block work runs on.

    Parameters
    ----------
    rows : Rows
    engine : Engine, optional
        Executor of the per-block tasks (:mod:`modemap.engine`); default: this process.
    per_run : bool or None, default None
        One block per run, or one block of all rows; None: all rows as one block in this
        process (one pass over all rows), one block per run on any other engine.  Blocks
        are placed on the engine once.
    """

    def __init__(self, rows: Rows, engine: Any = None, per_run: bool | None = None) -> None:
        self.rows = rows
        self.Z, self.Y, self.lengths = rows.Z, rows.Y, rows.lengths
        self.engine = LocalEngine() if engine is None else engine
        if per_run is None:
            per_run = self.engine.name != "local"
        blocks = split_blocks(self.Z, self.Y, self.lengths, per_run=per_run)
        self.bounds = np.cumsum([0, *block_sizes(blocks)])
        self.blocks = self.engine.scatter(blocks)

    @property
    def n_rows(self) -> int:
        return int(self.Z.shape[0])

    def per_block(self, values: np.ndarray) -> list[np.ndarray]:
        """``values`` (one per row) cut at the block boundaries."""
        return [values[a:b] for a, b in zip(self.bounds[:-1], self.bounds[1:], strict=True)]

    def stats(self, library: Any, labels: np.ndarray, k: int) -> list[GramStats]:
        """Per-regime statistics of ``labels``."""
        return stats_by_label(self.engine, self.blocks, self.per_block(labels), library, k)

    def decode(
        self, library: Any, fits: Sequence[Any], covs: np.ndarray, chain: tuple, **options: Any
    ) -> tuple[np.ndarray, float, float]:
        """Viterbi paths of all runs (see :func:`modemap.regimes.blocks.decode_blocks`);
        ``current`` labels per row, when given, are cut into blocks here."""
        current = options.pop("current", None)
        if current is not None:
            current = self.per_block(current)
        coefs = [f.coef for f in fits]
        return decode_blocks(
            self.engine, self.blocks, library, coefs, covs, chain, current=current, **options
        )
