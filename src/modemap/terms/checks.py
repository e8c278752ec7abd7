"""Candidate terms checked on the data before a fit: finite, within range, not collinear.

A fit forms sums of products of the term columns (normal-equation statistics, and
from the residuals, statistics of their squares), so every term must be a finite
number at every sample, and small enough that its fourth power stays finite in double
precision: values beyond :data:`LARGEST` (1e75; the largest double is about 1.8e308,
IEEE 754) are refused.  Measured: a one-regime fit at degree 1 of ``x`` at 1e75 recovers the
coefficients of the same data at 1, at 1e100 it loses its standard errors to overflow.
The checks run on all samples before any fitting, so a term that fails is named with
the first row where it fails, instead of surfacing later as a numerical breakdown.

What is refused, and how it is named:

* a **custom term** that is not defined (``nan``: ``sqrt(x - 5)`` where ``x < 5``,
  ``log(0*x)``), infinite (``1/0``, ``exp(exp(exp(x)))``) or beyond :data:`LARGEST`
  (``x^99999``) at some sample: :class:`~modemap.ExpressionError` naming the term, the
  first such row and the values of its variables there;
* a **built-in candidate term** (a monomial such as ``x^3``) beyond :data:`LARGEST`
  because a column is too large (state magnitudes of 1e200):
  :class:`~modemap.DataError` naming the column, its value and the row, with the
  advice to rescale it (other units) or use a lower degree.  modemap does not rescale
  columns itself: every coefficient, equilibrium and guard is reported in the units
  of the data, and a column of such magnitude is almost always a unit or logging error
  worth seeing;
* a **custom term collinear with another term**: proportional to it at every sample
  (``2*x`` and ``x``; ``x*u`` and ``x`` where ``u`` is 1 throughout), constant
  (proportional to ``1``) or zero on the data.  Its coefficient could not be told
  apart from the other's, so the term is refused (:class:`~modemap.ExpressionError`
  naming both) rather than dropped: it is a term the user asked for, and a refusal
  says so where a silent drop would not.  Proportional means: the least-squares
  multiple of the other column matches the term to within 1e-9 of the term's largest
  absolute value at every row.  Near-collinearity (``x`` and ``x^2`` over a narrow
  range) is not refused; the fit's centring handles it.
"""

from __future__ import annotations

from collections.abc import Callable, Sequence

import numpy as np

from modemap._exceptions import DataError, ExpressionError, ModemapError
from modemap.terms.expressions import parse, quote_name
from modemap.terms.library import TermLibrary, canonical_term

__all__ = ["LARGEST", "check_terms"]

LARGEST = 1e75
"""Largest absolute term value a fit accepts (its fourth power stays finite)."""

_CHUNK = 65_536
_PROPORTIONAL = 1e-9  # largest residual, relative to the term's largest absolute value
_PREFILTER = 1e-10  # 1 - cos^2 below which a pair is checked row by row


def check_terms(
    library: TermLibrary,
    Z: np.ndarray,
    where: Callable[[int], str],
    *,
    custom: Sequence[str] = (),
    source: str | None = None,
) -> None:
    """Refuse terms that fail on the data (see the module notes).

    Parameters
    ----------
    library : TermLibrary
        Fitted.
    Z : ndarray of shape (n, n_vars)
        Every sample, in the order rows should be searched (the first failing row is
        the first in this order).
    custom : sequence of str, default ()
        The terms the user wrote (any spelling): they are named as terms, checked for
        collinearity, and never blamed on a column.
    where : callable
        ``where(i)`` describes row ``i`` of ``Z`` for messages (run, time, data row).
    source : str, optional
        The data's file name(s), for :class:`~modemap.DataError`.

    Raises
    ------
    ExpressionError
        A custom term not finite, too large or collinear with another term.
    DataError
        A column so large that a built-in candidate term is beyond :data:`LARGEST`.
    """
    names = list(library.variables_)
    custom = {canonical_term(t, names) for t in _texts(custom)}
    custom &= set(library.terms_)
    mine = [j for j, t in enumerate(library.terms_) if t in custom]
    cross = np.zeros((len(mine), library.n_terms_))  # products of the custom terms with all
    squares = np.zeros(library.n_terms_)
    for start in range(0, Z.shape[0], _CHUNK):
        block = Z[start : start + _CHUNK]
        with np.errstate(all="ignore"):
            T = library.transform(block)
        bad = ~(np.abs(T) <= LARGEST)  # nan, inf and too large
        if bad.any():
            row, j = np.unravel_index(int(np.argmax(bad)), bad.shape)
            raise _failure(library, custom, T[row, j], j, block[row], where(start + row), source)
        if mine:
            cross += T[:, mine].T @ T
            squares += np.einsum("ij,ij->j", T, T)
    prefix = f"{source}: " if source else ""
    for i, j in enumerate(mine):
        _check_collinear(library, Z, cross[i], squares, j, custom, prefix)


def _texts(value) -> tuple[str, ...]:
    if value is None:
        return ()
    return (value,) if isinstance(value, str) else tuple(value)


def _failure(library, custom, value, j, z, where, source) -> ModemapError:
    names = list(library.variables_)
    term = library.terms_[j]
    used = [n for n in names if n in parse(term, names).variables_used] if term != "1" else []
    values = ", ".join(f"{quote_name(n)} = {z[names.index(n)]:.6g}" for n in used)
    if np.isnan(value):
        what = "not defined (nan)"
    elif np.isinf(value):
        what = "infinite"
    else:
        what = f"{value:.6g}, beyond the largest value a fit accepts ({LARGEST:.0e})"
    if term in custom or not used:
        prefix = f"{source}: " if source else ""
        return ExpressionError(
            f"{prefix}term '{term}' is {what} at {where}{', where ' + values if values else ''}; "
            "a term must be a finite number at every sample"
        )
    column = max(used, key=lambda n: abs(z[names.index(n)]))
    return DataError(
        f"value {z[names.index(column)]:.6g} at {where}: the candidate term '{term}' is "
        f"{what}; rescale the column (for example other units) or use a lower degree",
        source=source,
        column=column,
    )


def _check_collinear(library, Z, cross, squares, j, custom, prefix) -> None:
    """``cross[k]``: sum of term j times term k over the rows; ``squares[k]``: of term k squared."""
    term = library.terms_[j]
    if squares[j] == 0:
        raise ExpressionError(f"{prefix}term '{term}' is 0 at every sample of the data: remove it")
    for k, other in enumerate(library.terms_):
        if k == j or squares[k] == 0 or (other in custom and k > j):
            continue  # of two custom terms, the later one is named
        with np.errstate(all="ignore"):
            cos2 = cross[k] ** 2 / (squares[j] * squares[k])
        if not (np.isfinite(cos2) and 1.0 - cos2 <= _PREFILTER):
            continue
        factor = cross[k] / squares[k]
        if not _proportional(library, Z, j, k, factor):
            continue
        kind = "the term" if other in custom else "the candidate term"
        drop = "one of them" if other in custom else "it"
        if other == "1":
            raise ExpressionError(
                f"{prefix}term '{term}' is constant on the data ({factor:.6g} at every "
                "sample), so it duplicates the constant term '1' and its coefficient cannot "
                "be estimated: remove it"
            )
        raise ExpressionError(
            f"{prefix}term '{term}' is {factor:.6g} times {kind} '{other}' at every sample of the "
            f"data (collinear): their coefficients cannot be told apart; remove {drop}"
        )


def _proportional(library: TermLibrary, Z: np.ndarray, j: int, k: int, factor: float) -> bool:
    largest, residual = 0.0, 0.0
    for start in range(0, Z.shape[0], _CHUNK):
        with np.errstate(all="ignore"):
            T = library.transform(Z[start : start + _CHUNK])
        largest = max(largest, float(np.max(np.abs(T[:, j]))))
        residual = max(residual, float(np.max(np.abs(T[:, j] - factor * T[:, k]))))
    return residual <= _PROPORTIONAL * largest
