"""Candidate terms: the library of functions the local models are built from.

A :class:`TermLibrary` turns variables ``z = (states, inputs)`` into a term
matrix ``theta(z)`` with one column per candidate term, and gives the partial
derivatives of every term (for Jacobians).  Terms are named by canonical
strings:

* monomials up to ``degree``, graded by total degree, then lexicographic in
  the order of the variable list: for ``(x, y)`` and degree 2,
  ``1, x, y, x^2, x*y, y^2``; variables inside a product appear in the order of
  the variable list (``x^2*u``);
* ``sin(v)``, ``cos(v)`` for each variable named in ``trig``;
* names that are not plain identifiers written between backticks
  (``"`Tank Level`^2*u"``, see :func:`modemap.terms.expressions.quote_name`);
* custom expressions in the grammar of :mod:`modemap.terms.expressions`, printed in
  its normal form (a custom term equal to an existing one is dropped; a
  custom product of variables is recognised as a monomial, so ``"y*x"`` is the
  term ``x*y``).

The term matrix is the hot path of every fit: monomials are built
incrementally from lower-degree columns (``x^2*y = (x*y)*x`` style) into a
preallocated float64 array, row block by row block, without temporaries the
size of the data.
"""

from __future__ import annotations

from collections.abc import Sequence
from functools import lru_cache
from itertools import combinations_with_replacement

import numpy as np
from sklearn.base import BaseEstimator
from sklearn.exceptions import NotFittedError

from modemap._exceptions import DataError, ExpressionError
from modemap.terms.expressions import (
    BinOp,
    Call,
    Const,
    Expr,
    Var,
    check_variable_names,
    parse,
    quote_name,
)

__all__ = [
    "TermLibrary",
    "canonical_term",
    "evaluate_terms",
    "monomial_exponents",
    "monomial_name",
]

_CHUNK = 8192
Monomial = tuple[int, ...]  # sorted variable indices with repetition: x^2*y -> (0, 0, 1)


def monomial_name(monomial: Monomial, variables: Sequence[str]) -> str:
    """Canonical name of a monomial given as sorted variable indices.

    ``()`` is ``"1"``; ``(0, 0, 2)`` over ``("x", "y", "u")`` is ``"x^2*u"``.  Names
    that are not plain identifiers are quoted (``"`Tank Level`^2"``).
    """
    if not monomial:
        return "1"
    parts = []
    for index in sorted(set(monomial)):
        power = monomial.count(index)
        name = quote_name(variables[index])
        parts.append(name if power == 1 else f"{name}^{power}")
    return "*".join(parts)


def _as_monomial(expr: Expr) -> Monomial | None:
    """The monomial an expression is (coefficient exactly 1), or None."""
    if isinstance(expr, Const):
        return () if expr.value == 1.0 else None
    if isinstance(expr, Var):
        return (expr.index,)
    if isinstance(expr, BinOp) and expr.op == "*":
        left, right = _as_monomial(expr.left), _as_monomial(expr.right)
        if left is None or right is None:
            return None
        return tuple(sorted(left + right))
    if isinstance(expr, BinOp) and expr.op == "^" and isinstance(expr.right, Const):
        base, power = _as_monomial(expr.left), expr.right.value
        if base is None or power != int(power) or not 1 <= power <= 64:
            return None
        return tuple(sorted(base * int(power)))
    return None


@lru_cache(maxsize=4096)
def _exponents(term: str, variables: tuple[str, ...]) -> tuple[int, ...] | None:
    if term == "1":
        return (0,) * len(variables)
    try:
        monomial = _as_monomial(parse(term, variables))
    except ExpressionError:
        return None
    if monomial is None:
        return None
    return tuple(monomial.count(i) for i in range(len(variables)))


def monomial_exponents(term: str, variables: Sequence[str]) -> tuple[int, ...] | None:
    """Exponent of each variable in a monomial term (``1``, ``x``, ``x^2*`Tank Level```),
    or None for a term that is not a monomial of the variables (``sin(x)``, ``2*x``)."""
    return _exponents(term, tuple(variables))


def _as_trig(expr: Expr) -> tuple[str, int] | None:
    if isinstance(expr, Call) and expr.func in ("sin", "cos") and isinstance(expr.arg, Var):
        return expr.func, expr.arg.index
    return None


class TermLibrary(BaseEstimator):
    """Candidate terms over named variables (monomials, trig, custom).

    Parameters
    ----------
    degree : int, default=2
        Largest total degree of the monomials (0: no monomial but the constant).
    constant : bool, default=True
        Include the constant term ``1``.
    trig : sequence of str, default=()
        Variables ``v`` for which ``sin(v)`` and ``cos(v)`` are added.
    custom : sequence of str, default=()
        Extra terms written in the grammar of :mod:`modemap.terms.expressions`.

    Attributes
    ----------
    variables_ : tuple of str
        Variable names (column order of ``Z``).
    terms_ : list of str
        Canonical term names (column order of the term matrix).
    n_terms_ : int
        Number of terms.

    Examples
    --------
    >>> lib = TermLibrary(degree=2).fit(["x", "y"])
    >>> lib.terms_
    ['1', 'x', 'y', 'x^2', 'x*y', 'y^2']
    """

    def __init__(
        self,
        *,
        degree: int = 2,
        constant: bool = True,
        trig: Sequence[str] = (),
        custom: Sequence[str] = (),
    ) -> None:
        self.degree = degree
        self.constant = constant
        self.trig = trig
        self.custom = custom

    # ----------------------------------------------------------------- fit

    def fit(self, variables: Sequence[str], y: object = None) -> TermLibrary:
        """Build the term list for the given variables.

        Parameters
        ----------
        variables : sequence of str
            Variable names: states first, then inputs.
        y : ignored

        Returns
        -------
        self
        """
        names = check_variable_names(variables)
        if not names:
            raise ExpressionError("the term library needs at least one variable")
        self._check_params(names)
        terms: list[str] = []
        kinds: list[tuple] = []  # ("mono", monomial) | ("trig", func, index) | ("expr", Expr)
        for monomial in self._monomials(len(names)):
            terms.append(monomial_name(monomial, names))
            kinds.append(("mono", monomial))
        for name in _as_names(self.trig):
            for func in ("sin", "cos"):
                terms.append(f"{func}({quote_name(name)})")
                kinds.append(("trig", func, names.index(name)))
        for text in _as_names(self.custom):
            name, kind = _custom_term(text, names)
            if name not in terms:
                terms.append(name)
                kinds.append(kind)
        if not terms:
            raise ExpressionError("the term library is empty: use degree >= 1, constant or custom")
        self._kinds = kinds
        self._steps, self._n_rows = _plan(kinds)
        self._monomial_partials = _partials_plan(kinds, len(names))
        self._partial_exprs = [
            [k[1].diff(v) for v in names] if k[0] == "expr" else None for k in kinds
        ]
        self.variables_ = names
        self.terms_ = terms
        self.n_terms_ = len(terms)
        return self

    def _check_params(self, names: tuple[str, ...]) -> None:
        if isinstance(self.degree, bool) or not isinstance(self.degree, int | np.integer):
            raise ExpressionError(f"degree must be an integer, got {self.degree!r}")
        if not 0 <= self.degree <= 10:
            raise ExpressionError(f"degree must be between 0 and 10, got {self.degree}")
        for name in _as_names(self.trig):
            if name not in names:
                raise ExpressionError(
                    f"trig variable '{name}' is not one of the variables {', '.join(names)}"
                )

    def _monomials(self, n_vars: int) -> list[Monomial]:
        out: list[Monomial] = [()] if self.constant else []
        for d in range(1, int(self.degree) + 1):
            out.extend(combinations_with_replacement(range(n_vars), d))
        return out

    @classmethod
    def from_terms(cls, terms: Sequence[str], variables: Sequence[str]) -> TermLibrary:
        """A fitted library whose ``terms_`` are the given terms, in that order.

        Parameters
        ----------
        terms : sequence of str
            Canonical names (``1``, ``x``, ``x^2*u``, ``sin(x)``) or any
            expression of the grammar; non-canonical spellings are stored in
            canonical form (``"y*x"`` becomes ``"x*y"``).
        variables : sequence of str

        Raises
        ------
        ExpressionError
            On a term that does not parse or two terms that are the same.
        """
        terms = [terms] if isinstance(terms, str) else list(terms)
        library = cls(degree=0, constant=False, custom=tuple(terms)).fit(variables)
        if library.n_terms_ != len(terms):
            seen: dict[str, str] = {}
            for text in terms:
                name = _custom_term(text, library.variables_)[0]
                if name in seen:
                    raise ExpressionError(f"terms '{seen[name]}' and '{text}' are the same term")
                seen[name] = text
        return library

    def _require_fitted(self) -> None:
        # sklearn's check_is_fitted costs ~0.2 ms; transform runs once per chunk of rows
        if not hasattr(self, "terms_"):
            raise NotFittedError(
                f"This {type(self).__name__} instance is not fitted yet. Call 'fit' with "
                "appropriate arguments before using this estimator."
            )

    # ------------------------------------------------------------ transform

    def transform(self, Z: np.ndarray, out: np.ndarray | None = None) -> np.ndarray:
        """Term matrix ``theta(Z)``.

        Parameters
        ----------
        Z : ndarray of shape (n, n_vars)
            Variables in columns, in the order of ``variables_``.
        out : ndarray of shape (n, n_terms), float64, optional
            Preallocated result (C or Fortran order); filled in place.

        Returns
        -------
        ndarray of shape (n, n_terms)
        """
        self._require_fitted()
        Z = self._check_Z(Z)
        n = Z.shape[0]
        if out is None:
            out = np.empty((n, self.n_terms_), dtype=np.float64)
        elif out.shape != (n, self.n_terms_) or out.dtype != np.float64:
            raise DataError(
                f"out must be a float64 array of shape {(n, self.n_terms_)}, "
                f"got {out.dtype} {out.shape}"
            )
        _execute(self._steps, self._n_rows, Z, out)
        return out

    def fit_transform(self, variables: Sequence[str], Z: np.ndarray) -> np.ndarray:
        """``fit(variables).transform(Z)``."""
        return self.fit(variables).transform(Z)

    def get_feature_names_out(self, input_features: object = None) -> np.ndarray:
        """Term names as an object array (scikit-learn convention)."""
        self._require_fitted()
        return np.asarray(self.terms_, dtype=object)

    # ------------------------------------------------------------- partials

    def partials(self, Z: np.ndarray) -> np.ndarray:
        """Analytic partial derivatives of every term.

        Parameters
        ----------
        Z : ndarray of shape (n, n_vars)

        Returns
        -------
        ndarray of shape (n, n_terms, n_vars)
            ``[i, j, k]`` is ``d term_j / d variable_k`` at row ``i``.
        """
        self._require_fitted()
        Z = self._check_Z(Z)
        n, n_vars = Z.shape
        out = np.zeros((n, self.n_terms_, n_vars))
        flat, coeff, source, steps, n_rows = self._monomial_partials
        if flat.size:
            values = np.empty((n, int(source.max()) + 1))
            _execute(steps, n_rows, Z, values)
            out.reshape(n, -1)[:, flat] = values[:, source] * coeff
        with np.errstate(all="ignore"):
            for j, kind in enumerate(self._kinds):
                if kind[0] == "trig":
                    func, i = kind[1], kind[2]
                    out[:, j, i] = np.cos(Z[:, i]) if func == "sin" else -np.sin(Z[:, i])
                elif kind[0] == "expr":
                    for k, expr in enumerate(self._partial_exprs[j]):
                        if expr != Const(0.0):
                            out[:, j, k] = expr.evaluate(Z)
        return out

    def degree_in(self, names: Sequence[str]) -> list[int | None]:
        """Total degree of each term in the given variables.

        Returns ``None`` for a term that depends on them other than
        polynomially (e.g. ``sin(x)`` in ``x``); 0 for a term free of them.
        """
        self._require_fitted()
        wanted = {self.variables_.index(name) for name in names}
        degrees: list[int | None] = []
        for kind in self._kinds:
            if kind[0] == "mono":
                degrees.append(sum(1 for i in kind[1] if i in wanted))
            elif kind[0] == "trig":
                degrees.append(None if kind[2] in wanted else 0)
            else:
                used = {self.variables_.index(v) for v in kind[1].variables_used}
                degrees.append(None if used & wanted else 0)
        return degrees

    def _check_Z(self, Z: np.ndarray) -> np.ndarray:
        Z = np.asarray(Z, dtype=np.float64)
        if Z.ndim != 2 or Z.shape[1] != len(self.variables_):
            raise DataError(
                f"term input has shape {Z.shape}; expected (n, {len(self.variables_)}) with "
                f"columns {', '.join(self.variables_)}"
            )
        return Z


# ------------------------------------------------------------------ helpers


def _as_names(value: Sequence[str] | str | None) -> tuple[str, ...]:
    if value is None:
        return ()
    if isinstance(value, str):
        return (value,)
    return tuple(value)


def canonical_term(text: str, variables: Sequence[str]) -> str:
    """The canonical string of a term written in the grammar (``"y*x"`` -> ``"x*y"``)."""
    return _custom_term(text, tuple(variables))[0]


def _custom_term(text: str, names: tuple[str, ...]) -> tuple[str, tuple]:
    """Canonical name and evaluation kind of a custom term."""
    expr = parse(text, names)
    monomial = _as_monomial(expr)
    if monomial is not None:
        return monomial_name(monomial, names), ("mono", monomial)
    trig = _as_trig(expr)
    if trig is not None:
        return str(expr), ("trig", trig[0], trig[1])
    return str(expr), ("expr", expr)


def _plan(kinds: list[tuple]) -> tuple[list[tuple], int]:
    """Evaluation steps writing rows ``0..p-1`` (the terms) and helper rows after.

    A monomial of degree ``d >= 2`` is its prefix monomial (degree ``d-1``)
    times one variable; prefixes missing from the library get helper rows.
    Steps are ordered by degree so prefixes are always computed first.
    """
    row_of: dict[Monomial, int] = {}
    for j, kind in enumerate(kinds):
        if kind[0] == "mono":
            row_of.setdefault(kind[1], j)
    n_rows = len(kinds)
    for monomial in sorted(row_of, key=len):
        for d in range(2, len(monomial)):
            if monomial[:d] not in row_of:
                row_of[monomial[:d]] = n_rows
                n_rows += 1
    steps: list[tuple] = []
    for monomial, row in sorted(row_of.items(), key=lambda item: (len(item[0]), item[1])):
        if len(monomial) == 0:
            steps.append(("one", row))
        elif len(monomial) == 1:
            steps.append(("copy", row, monomial[0]))
        elif len(monomial) == 2:
            steps.append(("mul2", row, monomial[0], monomial[1]))
        else:
            steps.append(("mul", row, row_of[monomial[:-1]], monomial[-1]))
    for j, kind in enumerate(kinds):
        if kind[0] == "mono" and row_of[kind[1]] != j:
            steps.append(("dup", j, row_of[kind[1]]))
        elif kind[0] == "trig":
            steps.append((kind[1], j, kind[2]))
        elif kind[0] == "expr":
            steps.append(("expr", j, kind[1]))
    return steps, n_rows


def _run_steps(
    steps: list[tuple], rows: list[np.ndarray], columns: list[np.ndarray], Z: np.ndarray
) -> None:
    """Execute the plan: ``rows`` are 1-D output views, ``columns`` the variables."""
    for step in steps:
        kind, row = step[0], rows[step[1]]
        if kind == "mul":
            np.multiply(rows[step[2]], columns[step[3]], out=row)
        elif kind == "mul2":
            np.multiply(columns[step[2]], columns[step[3]], out=row)
        elif kind == "copy":
            row[...] = columns[step[2]]
        elif kind == "one":
            row.fill(1.0)
        elif kind == "sin":
            np.sin(columns[step[2]], out=row)
        elif kind == "cos":
            np.cos(columns[step[2]], out=row)
        elif kind == "dup":
            row[...] = rows[step[2]]
        else:
            row[...] = step[2].evaluate(Z)


def _execute(steps: list[tuple], n_rows: int, Z: np.ndarray, out: np.ndarray) -> None:
    """Fill ``out`` (n, n_out) with the first ``n_out`` rows of a plan.

    Fortran-ordered output is written column by column; otherwise row blocks
    of ``_CHUNK`` samples are computed in a small (n_rows, block) buffer and
    copied in, which keeps every operation on contiguous memory.
    """
    n, n_out = out.shape
    if out.flags.f_contiguous and n > 0:
        columns = [np.ascontiguousarray(Z[:, i]) for i in range(Z.shape[1])]
        rows = list(out.T) + list(np.empty((n_rows - n_out, n)))
        _run_steps(steps, rows, columns, Z)
        return
    buffer = np.empty((n_rows, min(_CHUNK, max(n, 1))))
    for start in range(0, n, _CHUNK):
        stop = min(start + _CHUNK, n)
        block = buffer[:, : stop - start]
        chunk = Z[start:stop]
        _run_steps(steps, list(block), list(chunk.T), chunk)
        out[start:stop] = block[:n_out].T


def _partials_plan(kinds: list[tuple], n_vars: int) -> tuple:
    """Closed-form monomial partials: ``d m / d z_k = e_k * (m without one z_k)``.

    Returns flat indices into ``(n_terms * n_vars)``, the factors ``e_k``, the
    column of each reduced monomial, and the plan computing those monomials.
    """
    flat: list[int] = []
    coeff: list[float] = []
    reduced_index: dict[Monomial, int] = {}
    source: list[int] = []
    for j, kind in enumerate(kinds):
        if kind[0] != "mono":
            continue
        monomial = kind[1]
        for k in sorted(set(monomial)):
            reduced = list(monomial)
            reduced.remove(k)
            key = tuple(reduced)
            flat.append(j * n_vars + k)
            coeff.append(float(monomial.count(k)))
            source.append(reduced_index.setdefault(key, len(reduced_index)))
    steps, n_rows = _plan([("mono", m) for m in reduced_index])
    return (
        np.array(flat, dtype=np.intp),
        np.array(coeff),
        np.array(source, dtype=np.intp),
        steps,
        n_rows,
    )


def evaluate_terms(terms: Sequence[str], variables: Sequence[str], Z: np.ndarray) -> np.ndarray:
    """Evaluate named terms on ``Z`` (n, n_vars): shorthand for a one-off term matrix.

    Returns
    -------
    ndarray of shape (n, len(terms))
    """
    return TermLibrary.from_terms(terms, variables).transform(Z)
