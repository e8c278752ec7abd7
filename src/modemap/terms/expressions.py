"""The candidate-term grammar: parse, evaluate with numpy, differentiate.

Custom candidate terms are written in a small grammar of our own::

    expr    := product (("+" | "-") product)*
    product := unary (("*" | "/") unary)*
    unary   := "-" unary | power
    power   := atom ("^" unary)?          # right-associative: x^2^3 = x^(2^3)
    atom    := NUMBER | NAME | QUOTED | FUNC "(" expr ")" | "(" expr ")"

``NUMBER`` is a decimal literal such as ``2``, ``0.5``, ``.5`` or ``1e-3``;
``NAME`` is one of the given variables written bare, which works for names made
of letters, digits and ``_`` not starting with a digit; ``QUOTED`` is any
variable name between backticks, a backtick inside written twice:
`` `Tank Level` ``, `` `LT-101.PV` ``, `` `Level (m)` ``, `` `2` ``, `` `a``b` `` (the
name ``a`b``).  A quoted name is always a variable, never a function or a number.
``FUNC`` is one of ``sin cos exp log sqrt abs tanh sign``; a bare function name
is a function only when ``(`` follows it, so a variable may be called ``sin``.
``-x^2`` means ``-(x^2)``.  Python's ``**`` is rejected
with a hint to write ``^``.  Nothing else is accepted: no attribute access,
indexing, strings, keywords, commas or statements.  The text is never handed
to Python's ``eval``/``exec``/``compile``: a hand-written tokenizer and a
recursive-descent parser build a small immutable tree, evaluated with numpy.

The tree is simplified lightly while it is built (constant folding of the
arithmetic operators, ``0*x -> 0``, ``1*x -> x``, ``x+0 -> x``, ``x^1 -> x``,
``x^0 -> 1``), and ``str(expr)`` prints a canonical normal form with the
fewest parentheses that keep the tree: ``parse(str(e), vars) == e``.  Names are
printed bare when they can be (:func:`quote_name`), so terms over plain names
read as they always did.

Variable names may be any non-empty text of at most :data:`MAX_NAME_LENGTH`
characters; they must be distinct.
"""

from __future__ import annotations

import itertools
import math
import re
from collections.abc import Callable, Sequence
from dataclasses import dataclass

import numpy as np

from modemap._exceptions import ExpressionError

__all__ = [
    "FUNCTIONS",
    "MAX_NAME_LENGTH",
    "BinOp",
    "Call",
    "Const",
    "Expr",
    "Neg",
    "Var",
    "check_variable_names",
    "parse",
    "quote_name",
    "term_names",
    "variable_of",
]

FUNCTIONS: dict[str, Callable[[np.ndarray], np.ndarray]] = {
    "sin": np.sin,
    "cos": np.cos,
    "exp": np.exp,
    "log": np.log,
    "sqrt": np.sqrt,
    "abs": np.abs,
    "tanh": np.tanh,
    "sign": np.sign,
}

_IDENT = re.compile(r"[A-Za-z_][A-Za-z0-9_]*")
_NUMBER = re.compile(r"(?:\d+\.?\d*|\.\d+)(?:[eE][+-]?\d+)?")
MAX_NAME_LENGTH = 1000
"""Longest variable name (characters): canonical terms over such names stay parseable."""
_MAX_LENGTH = 100_000  # characters of one term: 10 quoted names of the longest length fit
_MAX_DEPTH = 50
_MAX_TOKENS = 201  # symbols in one term, plus the end marker
_MAX_TREE_DEPTH = 40  # keeps printing and differentiation far from Python's recursion limit

# Binding strength used by the printer: a child is parenthesised when its own
# precedence is below what its position requires.
_PREC_ADD, _PREC_MUL, _PREC_NEG, _PREC_POW, _PREC_ATOM = 1, 2, 3, 4, 5


# --------------------------------------------------------------------- tree


class Expr:
    """Base class of the expression tree (immutable, comparable, hashable)."""

    precedence: int = _PREC_ATOM

    def evaluate(self, Z: np.ndarray) -> np.ndarray:
        """Evaluate on the rows of ``Z``.

        Parameters
        ----------
        Z : ndarray of shape (n, n_vars)
            Variables in columns, in the order given to :func:`parse`.

        Returns
        -------
        ndarray of shape (n,)
            Values (float64).  Invalid operations (``log`` of a negative
            number, division by zero) give ``nan``/``inf`` without warnings.
        """
        Z = np.asarray(Z, dtype=np.float64)
        if Z.ndim != 2:
            raise ExpressionError(f"expression input must be 2-D (n, n_vars), got shape {Z.shape}")
        with np.errstate(all="ignore"):
            out = self._eval(Z)
        return np.broadcast_to(out, (Z.shape[0],)).astype(np.float64, copy=True)

    def diff(self, var: str) -> Expr:
        """Symbolic partial derivative with respect to ``var`` (lightly simplified)."""
        raise NotImplementedError

    @property
    def variables_used(self) -> tuple[str, ...]:
        """Names of the variables appearing, in the order of the variable list."""
        found: dict[str, int] = {}
        self._collect(found)
        return tuple(sorted(found, key=found.__getitem__))

    def _eval(self, Z: np.ndarray) -> np.ndarray | float:
        raise NotImplementedError

    def _collect(self, found: dict[str, int]) -> None:
        for child in self._children():
            child._collect(found)

    def _children(self) -> tuple[Expr, ...]:
        return ()

    def _wrap(self, minimum: int) -> str:
        text = str(self)
        return f"({text})" if self.precedence < minimum else text


@dataclass(frozen=True)
class Const(Expr):
    """A numeric constant."""

    value: float

    @property
    def precedence(self) -> int:  # type: ignore[override]
        return _PREC_NEG if self.value < 0 else _PREC_ATOM

    def _eval(self, Z: np.ndarray) -> float:
        return self.value

    def diff(self, var: str) -> Expr:
        return ZERO

    def __str__(self) -> str:
        return _format_number(self.value)


@dataclass(frozen=True)
class Var(Expr):
    """A variable: column ``index`` of the evaluation matrix."""

    name: str
    index: int

    def _eval(self, Z: np.ndarray) -> np.ndarray:
        if self.index >= Z.shape[1]:
            raise ExpressionError(
                f"variable '{self.name}' is column {self.index + 1} but the input has "
                f"{Z.shape[1]} columns"
            )
        return Z[:, self.index]

    def diff(self, var: str) -> Expr:
        return ONE if var == self.name else ZERO

    def _collect(self, found: dict[str, int]) -> None:
        found[self.name] = self.index

    def __str__(self) -> str:
        return quote_name(self.name)


@dataclass(frozen=True)
class Neg(Expr):
    """Unary minus."""

    arg: Expr
    precedence = _PREC_NEG

    def _eval(self, Z: np.ndarray) -> np.ndarray | float:
        return -self.arg._eval(Z)

    def diff(self, var: str) -> Expr:
        return neg(self.arg.diff(var))

    def _children(self) -> tuple[Expr, ...]:
        return (self.arg,)

    def __str__(self) -> str:
        return "-" + self.arg._wrap(_PREC_NEG)


_BINARY = {
    "+": (np.add, _PREC_ADD, _PREC_ADD, _PREC_MUL),
    "-": (np.subtract, _PREC_ADD, _PREC_ADD, _PREC_MUL),
    "*": (np.multiply, _PREC_MUL, _PREC_MUL, _PREC_NEG),
    "/": (np.divide, _PREC_MUL, _PREC_MUL, _PREC_NEG),
    "^": (np.power, _PREC_POW, _PREC_ATOM, _PREC_NEG),
}


@dataclass(frozen=True)
class BinOp(Expr):
    """A binary operation ``left op right`` with ``op`` in ``+ - * / ^``."""

    op: str
    left: Expr
    right: Expr

    @property
    def precedence(self) -> int:  # type: ignore[override]
        return _BINARY[self.op][1]

    def _eval(self, Z: np.ndarray) -> np.ndarray | float:
        left = self.left._eval(Z)
        if self.op == "^" and isinstance(self.right, Const):
            return _int_power(left, self.right.value)
        return _BINARY[self.op][0](left, self.right._eval(Z))

    def diff(self, var: str) -> Expr:
        return _diff_binary(self, var)

    def _children(self) -> tuple[Expr, ...]:
        return (self.left, self.right)

    def __str__(self) -> str:
        _, _, left_min, right_min = _BINARY[self.op]
        sep = f" {self.op} " if self.op in "+-" else self.op
        return self.left._wrap(left_min) + sep + self.right._wrap(right_min)


@dataclass(frozen=True)
class Call(Expr):
    """A function of one argument (one of :data:`FUNCTIONS`)."""

    func: str
    arg: Expr

    def _eval(self, Z: np.ndarray) -> np.ndarray | float:
        return FUNCTIONS[self.func](self.arg._eval(Z))

    def diff(self, var: str) -> Expr:
        inner = self.arg.diff(var)
        if inner == ZERO:
            return ZERO
        return mul(_outer_derivative(self.func, self.arg), inner)

    def _children(self) -> tuple[Expr, ...]:
        return (self.arg,)

    def __str__(self) -> str:
        return f"{self.func}({self.arg})"


ZERO = Const(0.0)
ONE = Const(1.0)


def _format_number(value: float) -> str:
    if value == int(value) and abs(value) < 1e15:
        return str(int(value))
    return repr(float(value))


def _int_power(base: np.ndarray | float, exponent: float) -> np.ndarray | float:
    if exponent == 2.0:
        return base * base
    if exponent == 3.0:
        return base * base * base
    return np.power(base, exponent)


# ------------------------------------------------------------ simplification


def _fold(op: Callable[..., object], *values: float) -> Const | None:
    with np.errstate(all="ignore"):
        result = float(op(*(np.float64(v) for v in values)))
    return Const(result) if math.isfinite(result) else None


def neg(a: Expr) -> Expr:
    """``-a``, simplified."""
    if isinstance(a, Const):
        return Const(-a.value) if a.value != 0 else ZERO
    if isinstance(a, Neg):
        return a.arg
    return Neg(a)


def add(a: Expr, b: Expr) -> Expr:
    """``a + b``, simplified."""
    if isinstance(a, Const) and isinstance(b, Const):
        return _fold(np.add, a.value, b.value) or BinOp("+", a, b)
    if a == ZERO:
        return b
    if b == ZERO:
        return a
    if isinstance(b, Neg):
        return BinOp("-", a, b.arg)
    return BinOp("+", a, b)


def sub(a: Expr, b: Expr) -> Expr:
    """``a - b``, simplified."""
    if isinstance(a, Const) and isinstance(b, Const):
        return _fold(np.subtract, a.value, b.value) or BinOp("-", a, b)
    if b == ZERO:
        return a
    if a == ZERO:
        return neg(b)
    return BinOp("-", a, b)


def mul(a: Expr, b: Expr) -> Expr:
    """``a * b``, simplified."""
    if isinstance(a, Const) and isinstance(b, Const):
        return _fold(np.multiply, a.value, b.value) or BinOp("*", a, b)
    if ZERO in (a, b):
        return ZERO
    if a == ONE:
        return b
    if b == ONE:
        return a
    if a == Const(-1.0):
        return neg(b)
    if b == Const(-1.0):
        return neg(a)
    return BinOp("*", a, b)


def div(a: Expr, b: Expr) -> Expr:
    """``a / b``, simplified (no folding of a division by zero)."""
    if isinstance(a, Const) and isinstance(b, Const):
        return _fold(np.divide, a.value, b.value) or BinOp("/", a, b)
    if a == ZERO and b != ZERO:
        return ZERO
    if b == ONE:
        return a
    return BinOp("/", a, b)


def power(a: Expr, b: Expr) -> Expr:
    """``a ^ b``, simplified."""
    if isinstance(a, Const) and isinstance(b, Const):
        return _fold(np.power, a.value, b.value) or BinOp("^", a, b)
    if b == ONE:
        return a
    if b == ZERO:
        return ONE
    return BinOp("^", a, b)


_BUILD = {"+": add, "-": sub, "*": mul, "/": div, "^": power}


# ---------------------------------------------------------- differentiation


def _diff_binary(e: BinOp, var: str) -> Expr:
    a, b = e.left, e.right
    da, db = a.diff(var), b.diff(var)
    if e.op == "+":
        return add(da, db)
    if e.op == "-":
        return sub(da, db)
    if e.op == "*":
        return add(mul(da, b), mul(a, db))
    if e.op == "/":
        if db == ZERO:
            return div(da, b)
        return div(sub(mul(da, b), mul(a, db)), power(b, Const(2.0)))
    if isinstance(b, Const):  # d(a^c) = c a^(c-1) da
        return mul(mul(b, power(a, Const(b.value - 1.0))), da)
    # d(a^b) = a^b (db log a + b da / a)
    return mul(e, add(mul(db, Call("log", a)), div(mul(b, da), a)))


def _outer_derivative(func: str, u: Expr) -> Expr:
    if func == "sin":
        return Call("cos", u)
    if func == "cos":
        return neg(Call("sin", u))
    if func == "exp":
        return Call("exp", u)
    if func == "log":
        return div(ONE, u)
    if func == "sqrt":
        return div(ONE, mul(Const(2.0), Call("sqrt", u)))
    if func == "abs":
        return Call("sign", u)
    if func == "tanh":
        return sub(ONE, power(Call("tanh", u), Const(2.0)))
    return ZERO  # sign: zero almost everywhere


# ------------------------------------------------------------------ parsing


@dataclass(frozen=True)
class _Token:
    kind: str  # "num", "name", "op", "end"
    text: str
    column: int  # 1-based


def quote_name(name: str) -> str:
    """A variable name as terms write it: bare when it can be, else between backticks.

    A name of letters, digits and ``_`` not starting with a digit is written as it
    is (``x``, ``T_in``, ``sin``); any other is put between backticks with each
    backtick inside doubled: ``Tank Level`` -> `` `Tank Level` ``.

    Examples
    --------
    >>> quote_name("T_in"), quote_name("LT-101.PV"), quote_name("a`b")
    ('T_in', '`LT-101.PV`', '`a``b`')
    """
    if _IDENT.fullmatch(name):
        return name
    return "`" + name.replace("`", "``") + "`"


def _shown(name: str) -> str:
    """A name for messages: ``'x'`` or `` `Tank Level` ``."""
    quoted = quote_name(name)
    return f"'{name}'" if quoted == name else quoted


def check_variable_names(variables: Sequence[str]) -> tuple[str, ...]:
    """Validate variable names (non-empty text, unique) and return them as a tuple.

    Raises
    ------
    ExpressionError
        If a name is not a string, is empty or blank, is longer than
        :data:`MAX_NAME_LENGTH` characters, or repeats.
    """
    names = tuple(variables)
    for name in names:
        if not isinstance(name, str) or not name.strip():
            raise ExpressionError(f"variable name {name!r} is empty; name the column")
        if len(name) > MAX_NAME_LENGTH:
            raise ExpressionError(
                f"variable name {name[:40]!r}... has {len(name)} characters; at most "
                f"{MAX_NAME_LENGTH} are allowed"
            )
    seen: set[str] = set()
    for name in names:
        if name in seen:
            raise ExpressionError(f"variable name {_shown(name)} appears twice")
        seen.add(name)
    return names


def _tokenize(text: str) -> list[_Token]:
    tokens: list[_Token] = []
    pos = 0
    while pos < len(text):
        ch = text[pos]
        if ch in " \t\r\n":
            pos += 1
            continue
        column = pos + 1
        if text.startswith("**", pos):
            raise _error(text, column, "'**' is not an operator here; use '^' for powers")
        if ch in "+-*/^()":
            tokens.append(_Token("op", ch, column))
            pos += 1
            continue
        if ch == "`":
            name, pos = _quoted(text, pos)
            tokens.append(_Token("quoted", name, column))
            continue
        match = _NUMBER.match(text, pos) or _IDENT.match(text, pos)
        if match is None:
            raise _error(text, column, f"unexpected character {ch!r}")
        kind = "name" if _IDENT.fullmatch(match.group()) else "num"
        tokens.append(_Token(kind, match.group(), column))
        pos = match.end()
    tokens.append(_Token("end", "", len(text) + 1))
    return tokens


def _quoted(text: str, start: int) -> tuple[str, int]:
    """The name quoted at ``text[start] == '`'`` and the position after its closing quote."""
    parts: list[str] = []
    pos = start + 1
    while True:
        end = text.find("`", pos)
        if end < 0:
            raise _error(text, start + 1, "quoted name is not closed (no matching '`')")
        parts.append(text[pos:end])
        if text.startswith("``", end):  # a doubled backtick is one backtick of the name
            parts.append("`")
            pos = end + 2
            continue
        return "".join(parts), end + 1


def _error(text: str, column: int, message: str) -> ExpressionError:
    return ExpressionError(f"term {text!r}, column {column}: {message}")


class _Parser:
    """Recursive-descent parser over the token list."""

    def __init__(self, text: str, variables: tuple[str, ...]) -> None:
        self.text = text
        self.variables = {name: i for i, name in enumerate(variables)}
        self.tokens = _tokenize(text)
        if len(self.tokens) > _MAX_TOKENS:
            raise ExpressionError(
                f"term is too long ({len(self.tokens) - 1} symbols; limit {_MAX_TOKENS - 1})"
            )
        self.pos = 0
        self.depth = 0

    def peek(self) -> _Token:
        return self.tokens[self.pos]

    def take(self) -> _Token:
        token = self.tokens[self.pos]
        self.pos += 1
        return token

    def fail(self, token: _Token, expected: str) -> ExpressionError:
        if token.kind == "end":
            found = "end of input"
        elif token.kind == "quoted":
            found = repr(quote_name(token.text))
        else:
            found = repr(token.text)
        return _error(self.text, token.column, f"expected {expected}, found {found}")

    def parse(self) -> Expr:
        if self.peek().kind == "end":
            raise ExpressionError("term is empty; expected an expression such as 'x*y' or 'sin(x)'")
        expr = self.expr()
        token = self.peek()
        if token.kind != "end":
            raise self.fail(token, "an operator (+ - * / ^) or the end of the term")
        return expr

    def expr(self) -> Expr:
        self.depth += 1
        if self.depth > _MAX_DEPTH:
            raise _error(self.text, self.peek().column, "expression nested too deeply")
        left = self.product()
        while self.peek().text in ("+", "-") and self.peek().kind == "op":
            op = self.take().text
            left = _BUILD[op](left, self.product())
        self.depth -= 1
        return left

    def product(self) -> Expr:
        left = self.unary()
        while self.peek().text in ("*", "/") and self.peek().kind == "op":
            op = self.take().text
            left = _BUILD[op](left, self.unary())
        return left

    def unary(self) -> Expr:
        token = self.peek()
        if token.kind == "op" and token.text == "-":
            self.take()
            self.depth += 1
            if self.depth > _MAX_DEPTH:
                raise _error(self.text, token.column, "expression nested too deeply")
            result = neg(self.unary())
            self.depth -= 1
            return result
        return self.power()

    def power(self) -> Expr:
        base = self.atom()
        if self.peek().kind == "op" and self.peek().text == "^":
            self.take()
            self.depth += 1
            if self.depth > _MAX_DEPTH:
                raise _error(self.text, self.peek().column, "expression nested too deeply")
            result = power(base, self.unary())
            self.depth -= 1
            return result
        return base

    def atom(self) -> Expr:
        token = self.take()
        if token.kind == "num":
            value = float(token.text)
            if not math.isfinite(value):
                raise _error(self.text, token.column, f"number {token.text} is out of range")
            return Const(value)
        if token.kind == "name":
            return self.name(token)
        if token.kind == "quoted":
            if token.text in self.variables:
                return Var(token.text, self.variables[token.text])
            raise _error(self.text, token.column, self.unknown(token.text))
        if token.kind == "op" and token.text == "(":
            inner = self.expr()
            self.expect(")")
            return inner
        raise self.fail(token, "a number, a variable, a function or '('")

    def name(self, token: _Token) -> Expr:
        is_call = self.peek().kind == "op" and self.peek().text == "("
        if is_call:
            if token.text not in FUNCTIONS:
                what = "a variable, not a function" if token.text in self.variables else "unknown"
                raise _error(
                    self.text,
                    token.column,
                    f"function '{token.text}' is {what}; functions are {', '.join(FUNCTIONS)}",
                )
            self.take()
            arg = self.expr()
            self.expect(")")
            return Call(token.text, arg)
        if token.text in self.variables:
            return Var(token.text, self.variables[token.text])
        if token.text in FUNCTIONS:
            raise _error(self.text, token.column, f"expected '(' after function '{token.text}'")
        raise _error(self.text, token.column, self.unknown(token.text))

    def unknown(self, name: str) -> str:
        allowed = ", ".join(quote_name(v) for v in self.variables) or "(none)"
        return f"unknown name {_shown(name)}; variables are {allowed}"

    def expect(self, symbol: str) -> None:
        token = self.peek()
        if token.kind != "op" or token.text != symbol:
            raise self.fail(token, f"'{symbol}'")
        self.take()


def parse(text: str, variables: Sequence[str]) -> Expr:
    """Parse a term expression over the given variables.

    Parameters
    ----------
    text : str
        The expression, e.g. ``"x^2*u"``, ``"sin(x - 0.5)"``, ``"exp(-y/2)"``.
    variables : sequence of str
        Allowed variable names; column ``i`` of the evaluation matrix is
        ``variables[i]``.

    Returns
    -------
    Expr
        The (lightly simplified) expression tree.

    Raises
    ------
    ExpressionError
        On an empty text, an unknown name or function, bad syntax or trailing
        input; the message gives the column and what was expected.
    """
    names = check_variable_names(variables)
    if not isinstance(text, str):
        raise ExpressionError(f"term must be a string, got {type(text).__name__}")
    if len(text) > _MAX_LENGTH:
        raise ExpressionError(f"term is too long ({len(text)} characters; limit {_MAX_LENGTH})")
    expr = _Parser(text, names).parse()
    depth = _tree_depth(expr)
    if depth > _MAX_TREE_DEPTH:
        raise ExpressionError(
            f"term {text[:40]!r}... is too deeply nested ({depth} levels; limit "
            f"{_MAX_TREE_DEPTH}); split it into several terms"
        )
    return expr


def variable_of(term: str) -> str | None:
    """The variable a canonical term is, or None: ``"x"`` -> ``"x"``,
    ``"`Tank Level`"`` -> ``"Tank Level"``, ``"x^2"`` / ``"1"`` / ``"sin(x)"`` -> None."""
    if term.startswith("`"):
        try:
            name, end = _quoted(term, 0)
        except ExpressionError:
            return None
        return name if end == len(term) and quote_name(name) == term else None
    return term if _IDENT.fullmatch(term) else None


def term_names(text: str) -> list[str]:
    """Names of the variables a term text mentions, in order of first appearance.

    Reads the text with the grammar's tokenizer, without a variable list: every quoted
    name, and every bare name not followed by ``(``.  ``"x^2*`Tank Level`"`` gives
    ``["x", "Tank Level"]``; ``"sin(x)"`` gives ``["x"]``.

    Raises
    ------
    ExpressionError
        On text the tokenizer cannot read.
    """
    tokens = _tokenize(text)
    names: list[str] = []
    for token, after in itertools.pairwise(tokens):
        is_call = token.kind == "name" and after.kind == "op" and after.text == "("
        if token.kind in ("name", "quoted") and not is_call and token.text not in names:
            names.append(token.text)
    return names


def _tree_depth(expr: Expr) -> int:
    children = expr._children()
    return 1 + max((_tree_depth(c) for c in children), default=0)
