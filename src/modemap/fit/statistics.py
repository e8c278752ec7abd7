"""Additive normal-equation statistics: the currency between fitting stages.

A linear regression ``Y ~ Theta @ C`` only needs the cross products of the
term matrix ``Theta (n, p)`` and the targets ``Y (n, m)``:

* ``gram  = Theta' Theta``   (p, p)
* ``cross = Theta' Y``       (p, m)
* ``yy    = Y' Y``           (m, m)

plus the number of samples and the column sums.  These add up over chunks,
runs, regimes and workers, so a fit on 10^7 samples never needs the term
matrix in memory: :func:`accumulate` builds it chunk by chunk into one
preallocated buffer and adds ``buf.T @ buf`` (a BLAS call) to the totals.
Everything downstream (thresholded least squares, the affine operator,
standard errors, residual covariances, bootstrap replicates) is computed from
these statistics alone.
"""

from __future__ import annotations

import itertools
from collections.abc import Sequence
from dataclasses import dataclass
from typing import Any, Protocol

import numpy as np

from modemap._exceptions import DataError

__all__ = ["GramStats", "accumulate", "accumulate_by_label"]


class _Transformer(Protocol):
    """What :func:`accumulate` needs from a fitted term library."""

    n_terms_: int

    def transform(self, Z: np.ndarray, out: np.ndarray | None = None) -> np.ndarray: ...


@dataclass(frozen=True, eq=False)
class GramStats:
    """Sufficient statistics of a multi-target linear least-squares problem.

    Attributes
    ----------
    gram : ndarray of shape (p, p)
        ``Theta' W Theta``.
    cross : ndarray of shape (p, m)
        ``Theta' W Y``.
    yy : ndarray of shape (m, m)
        ``Y' W Y``.
    n : int or float
        Number of samples (sum of the weights when weights were given).
    term_sum : ndarray of shape (p,)
        Column sums of ``W Theta``.
    target_sum : ndarray of shape (m,)
        Column sums of ``W Y``.

    Notes
    -----
    Instances add (``a + b``), subtract (``a - b``, for leave-one-block-out
    folds) and scale by a number (``2 * a``); ``sum(list_of_stats)`` works
    because ``0 + a`` returns ``a``.  The arrays are not copied, treat them as
    read-only.
    """

    gram: np.ndarray
    cross: np.ndarray
    yy: np.ndarray
    n: float
    term_sum: np.ndarray
    target_sum: np.ndarray

    # -- construction ---------------------------------------------------------
    @classmethod
    def zeros(cls, n_terms: int, n_targets: int) -> GramStats:
        """Empty statistics (the additive identity) for ``p`` terms, ``m`` targets."""
        return cls(
            gram=np.zeros((n_terms, n_terms)),
            cross=np.zeros((n_terms, n_targets)),
            yy=np.zeros((n_targets, n_targets)),
            n=0,
            term_sum=np.zeros(n_terms),
            target_sum=np.zeros(n_targets),
        )

    @classmethod
    def from_arrays(
        cls, theta: np.ndarray, y: np.ndarray, weight: np.ndarray | None = None
    ) -> GramStats:
        """Statistics of an in-memory term matrix and targets.

        Parameters
        ----------
        theta : ndarray of shape (n, p)
            Term matrix (samples in rows).
        y : ndarray of shape (n, m) or (n,)
            Targets.
        weight : ndarray of shape (n,), optional
            Frequency weights (non-negative); ``n`` becomes their sum.

        Returns
        -------
        GramStats
        """
        theta = np.asarray(theta, dtype=np.float64)
        y = np.asarray(y, dtype=np.float64)
        if y.ndim == 1:
            y = y[:, None]
        if theta.ndim != 2 or y.ndim != 2 or theta.shape[0] != y.shape[0]:
            raise DataError(
                f"theta {theta.shape} and y {y.shape} must be 2-D with the same number of rows"
            )
        if weight is None:
            return cls(
                gram=theta.T @ theta,
                cross=theta.T @ y,
                yy=y.T @ y,
                n=int(theta.shape[0]),
                term_sum=theta.sum(axis=0),
                target_sum=y.sum(axis=0),
            )
        w = np.asarray(weight, dtype=np.float64)
        if w.shape != (theta.shape[0],) or np.any(w < 0):
            raise DataError(f"weight must be non-negative of shape ({theta.shape[0]},)")
        tw = theta * w[:, None]
        total = float(w.sum())
        return cls(
            gram=tw.T @ theta,
            cross=tw.T @ y,
            yy=(y * w[:, None]).T @ y,
            n=_as_count(total),
            term_sum=tw.sum(axis=0),
            target_sum=w @ y,
        )

    # -- arithmetic -------------------------------------------------------------
    def _combine(self, other: GramStats, sign: float) -> GramStats:
        if self.gram.shape != other.gram.shape or self.cross.shape != other.cross.shape:
            raise ValueError(
                f"cannot combine statistics of shapes {self.cross.shape} and {other.cross.shape}"
            )
        return GramStats(
            gram=self.gram + sign * other.gram,
            cross=self.cross + sign * other.cross,
            yy=self.yy + sign * other.yy,
            n=_as_count(self.n + sign * other.n),
            term_sum=self.term_sum + sign * other.term_sum,
            target_sum=self.target_sum + sign * other.target_sum,
        )

    def __add__(self, other: Any) -> GramStats:
        if isinstance(other, (int, float)) and other == 0:
            return self
        if not isinstance(other, GramStats):
            return NotImplemented
        return self._combine(other, 1.0)

    __radd__ = __add__

    def __sub__(self, other: Any) -> GramStats:
        if not isinstance(other, GramStats):
            return NotImplemented
        return self._combine(other, -1.0)

    def __mul__(self, factor: Any) -> GramStats:
        if not isinstance(factor, (int, float, np.integer, np.floating)):
            return NotImplemented
        f = float(factor)
        return GramStats(
            gram=self.gram * f,
            cross=self.cross * f,
            yy=self.yy * f,
            n=_as_count(self.n * f),
            term_sum=self.term_sum * f,
            target_sum=self.target_sum * f,
        )

    __rmul__ = __mul__

    # -- shapes and derived quantities -------------------------------------------
    @property
    def n_terms(self) -> int:
        return int(self.gram.shape[0])

    @property
    def n_targets(self) -> int:
        return int(self.cross.shape[1])

    def select(
        self,
        terms: Sequence[int] | np.ndarray | None = None,
        targets: Sequence[int] | np.ndarray | None = None,
    ) -> GramStats:
        """Statistics restricted to a subset of terms and/or targets."""
        ti = np.arange(self.n_terms) if terms is None else np.asarray(terms)
        yi = np.arange(self.n_targets) if targets is None else np.asarray(targets)
        return GramStats(
            gram=self.gram[np.ix_(ti, ti)],
            cross=self.cross[np.ix_(ti, yi)],
            yy=self.yy[np.ix_(yi, yi)],
            n=self.n,
            term_sum=self.term_sum[ti],
            target_sum=self.target_sum[yi],
        )

    def column_scale(self) -> np.ndarray:
        """Root mean square of every term column (1 where a column is all zero).

        Dividing the columns by this scale gives the normalised terms on which
        thresholds are applied.
        """
        n = max(float(self.n), 1.0)
        scale = np.sqrt(np.clip(np.diag(self.gram), 0.0, None) / n)
        scale[~(scale > 0)] = 1.0
        return scale

    def target_scale(self) -> np.ndarray:
        """Root mean square of every target column (1 where a target is all zero)."""
        n = max(float(self.n), 1.0)
        scale = np.sqrt(np.clip(np.diag(self.yy), 0.0, None) / n)
        scale[~(scale > 0)] = 1.0
        return scale

    def residual_products(self, coef: np.ndarray) -> np.ndarray:
        """``(Y - Theta C)' (Y - Theta C)`` computed from the statistics alone.

        Parameters
        ----------
        coef : ndarray of shape (p, m)

        Returns
        -------
        ndarray of shape (m, m)
        """
        c = np.asarray(coef, dtype=np.float64).reshape(self.n_terms, -1)
        ctc = c.T @ self.cross
        out = self.yy - ctc - ctc.T + c.T @ (self.gram @ c)
        out = 0.5 * (out + out.T)
        np.fill_diagonal(out, np.clip(np.diag(out), 0.0, None))  # round-off of a perfect fit
        # sums lose their last digits when terms are large and the fit close (cubes of a
        # temperature near 350 K): a product matrix that comes out slightly indefinite is
        # replaced by its positive part (negative eigenvalues set to zero)
        if out.shape[0] > 1:
            lam, vec = np.linalg.eigh(out)
            if lam.min() < 0.0:
                out = (vec * np.clip(lam, 0.0, None)) @ vec.T
        return out

    def rss(self, coef: np.ndarray) -> np.ndarray:
        """Residual sum of squares per target: ``yy - 2 c' cross + c' gram c``.

        Parameters
        ----------
        coef : ndarray of shape (p, m)

        Returns
        -------
        ndarray of shape (m,)
            Clipped below at 0 (round-off can make a perfect fit slightly negative).
        """
        c = np.asarray(coef, dtype=np.float64).reshape(self.n_terms, -1)
        yy = np.diag(self.yy)
        out = (
            yy
            - 2.0 * np.einsum("pm,pm->m", c, self.cross)
            + np.einsum("pm,pm->m", c, self.gram @ c)
        )
        return np.clip(out, 0.0, None)


def _as_count(n: float) -> float:
    """Keep sample counts integral when they are whole numbers."""
    return round(n) if float(n).is_integer() else float(n)


def _check_inputs(Z: np.ndarray, Y: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    Z = np.asarray(Z, dtype=np.float64)
    Y = np.asarray(Y, dtype=np.float64)
    if Y.ndim == 1:
        Y = Y[:, None]
    if Z.ndim != 2 or Z.shape[0] != Y.shape[0]:
        raise DataError(f"Z {Z.shape} and Y {Y.shape} must be 2-D with the same number of rows")
    return Z, Y


def _n_terms(library: _Transformer) -> int:
    n = getattr(library, "n_terms_", None)
    if n is None:
        raise ValueError("the term library must be fitted before accumulating statistics")
    return int(n)


#: Rows per inner block: the block buffer (rows x (p + m + 1) floats) is kept
#: near this many bytes so it stays in cache between filling and the product.
_BLOCK_BYTES = 1 << 20


class _Block:
    """One reusable buffer ``[theta | Y | 1]`` whose Gram matrix holds every statistic.

    With ``B = [Theta, Y, 1]`` the single symmetric product ``B' B`` contains
    ``Theta' Theta``, ``Theta' Y``, ``Y' Y``, the column sums and the count, so a
    chunk costs one term-matrix fill and one BLAS call.
    """

    def __init__(self, library: _Transformer, p: int, m: int, rows: int) -> None:
        self.library, self.p, self.m = library, p, m
        self.buf = np.empty((max(rows, 1), p + m + 1))
        self.buf[:, -1] = 1.0

    def fill(self, Z: np.ndarray, Y: np.ndarray) -> np.ndarray:
        b = self.buf[: Z.shape[0]]
        self.library.transform(Z, out=b[:, : self.p])
        b[:, self.p : self.p + self.m] = Y
        return b

    def split(self, full: np.ndarray) -> GramStats:
        p, m = self.p, self.m
        full = 0.5 * (full + full.T)
        return GramStats(
            gram=full[:p, :p].copy(),
            cross=full[:p, p : p + m].copy(),
            yy=full[p : p + m, p : p + m].copy(),
            n=_as_count(float(full[-1, -1])),
            term_sum=full[-1, :p].copy(),
            target_sum=full[-1, p : p + m].copy(),
        )


#: Below this many label changes in a block, each stretch of equal labels gets its own
#: product; above it the block's rows are grouped by label (one stable sort) first.
_FEW_STRETCHES = 64


def _block_rows(p: int, m: int, chunk_size: int) -> int:
    return int(max(1, min(chunk_size, max(256, _BLOCK_BYTES // (8 * (p + m + 1))))))


def accumulate(
    library: _Transformer, Z: np.ndarray, Y: np.ndarray, *, chunk_size: int = 65536
) -> GramStats:
    """Statistics of ``library.transform(Z)`` against ``Y``, chunk by chunk.

    The term matrix is never materialised: each block of rows is transformed
    into one preallocated buffer ``[theta | Y | 1]`` and its Gram matrix (one
    BLAS call) is added to the total.

    Parameters
    ----------
    library : fitted TermLibrary (anything with ``n_terms_`` and ``transform(Z, out=)``)
    Z : ndarray of shape (n, n_vars)
        Variables (states then inputs).
    Y : ndarray of shape (n, m)
        Targets (derivatives or next states).
    chunk_size : int, default 65536
        Upper bound on the rows per block; blocks are further limited to about
        1 MiB so that they stay in cache (about 5000 rows for 20 terms).

    Returns
    -------
    GramStats
    """
    Z, Y = _check_inputs(Z, Y)
    p, m, n = _n_terms(library), Y.shape[1], Z.shape[0]
    rows = _block_rows(p, m, chunk_size)
    block = _Block(library, p, m, min(rows, n))
    total = np.zeros((p + m + 1, p + m + 1))
    for start in range(0, n, rows):
        b = block.fill(Z[start : start + rows], Y[start : start + rows])
        total += b.T @ b
    return block.split(total)


def accumulate_by_label(
    library: _Transformer,
    Z: np.ndarray,
    Y: np.ndarray,
    labels: np.ndarray,
    n_labels: int,
    *,
    chunk_size: int = 65536,
) -> list[GramStats]:
    """One :class:`GramStats` per label from a single pass over the data.

    Each chunk is transformed once.  Where labels are persistent (fewer than
    64 changes in the chunk) each stretch of equal labels adds its cross
    products to that label's totals; otherwise the chunk's rows are grouped by
    label first (one stable sort).  Rows with a negative label are ignored.

    Parameters
    ----------
    library : fitted TermLibrary
    Z : ndarray of shape (n, n_vars)
    Y : ndarray of shape (n, m)
    labels : ndarray of shape (n,) of int
        Label of each row in ``0..n_labels-1``, or negative to skip the row.
    n_labels : int
        Number of labels (statistics returned for each, empty ones included).
    chunk_size : int, default 65536

    Returns
    -------
    list of GramStats, length ``n_labels``
    """
    Z, Y = _check_inputs(Z, Y)
    labels = np.asarray(labels).astype(np.int64, copy=False).ravel()
    if labels.shape[0] != Z.shape[0]:
        raise DataError(f"labels has {labels.shape[0]} rows, Z has {Z.shape[0]}")
    if labels.size and labels.max(initial=-1) >= n_labels:
        raise DataError(f"label {int(labels.max())} is out of range for n_labels={n_labels}")
    p, m, n = _n_terms(library), Y.shape[1], Z.shape[0]
    rows = _block_rows(p, m, chunk_size)
    block = _Block(library, p, m, min(rows, n))
    totals = np.zeros((n_labels, p + m + 1, p + m + 1))
    for start in range(0, n, rows):
        lab = labels[start : start + rows]
        cuts = np.flatnonzero(lab[1:] != lab[:-1]) + 1
        if cuts.size < _FEW_STRETCHES:
            # persistent labels: one product per stretch of equal labels, no reordering
            if lab.max() < 0:
                continue
            b = block.fill(Z[start : start + rows], Y[start : start + rows])
            edges = np.concatenate([[0], cuts, [lab.size]])
            for lo, hi in itertools.pairwise(edges):
                if lab[lo] >= 0:
                    seg = b[lo:hi]
                    totals[lab[lo]] += seg.T @ seg
            continue
        keep = lab >= 0
        n_keep = int(keep.sum())
        if n_keep == 0:
            continue
        b = block.fill(Z[start : start + rows], Y[start : start + rows])
        order = np.argsort(np.where(keep, lab, n_labels), kind="stable")[:n_keep]
        sorted_b, sorted_lab = b[order], lab[order]
        bounds = np.flatnonzero(np.diff(sorted_lab)) + 1
        for seg, k in zip(np.split(sorted_b, bounds), sorted_lab[np.r_[0, bounds]], strict=True):
            totals[k] += seg.T @ seg
    return [block.split(totals[k]) for k in range(n_labels)]
