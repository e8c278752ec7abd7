"""Readable equations for a fitted right-hand side: text, LaTeX and Python.

``format_equations(terms, coef, ["T"])`` gives ``["dT/dt = -0.0123 T + 0.713 + 4.02 u"]``.

Coefficient digits follow the uncertainty when standard errors are given: the
coefficient is rounded at the decimal place of the first significant digit of
its standard error, keeping at least 2 and at most 6 significant digits (a
common practice for reporting measured values); without standard errors 4
significant digits are shown, or ``digits`` when given.

Term strings are parsed with :mod:`modemap.terms.expressions` and re-rendered, so the
LaTeX form has ``T^{2}`` and ``\\sin\\left(x\\right)`` and the Python form has
``x**2`` and ``np.sin(x)``; the Python form is an expression of the variables
(and ``np``) only, for export: modemap itself never evaluates it as code.  When a
variable name is not a plain identifier (or is a Python keyword or ``np``), every
variable of the Python form is written ``z['name']``, ``z`` a mapping from names to
values.  The text form writes such names between backticks, as the term grammar
does (`` d`Tank Level`/dt = -0.5 `Tank Level` + 2 u ``); LaTeX sets them upright.
"""

from __future__ import annotations

import keyword
import math
import re
from collections.abc import Callable, Mapping, Sequence

import numpy as np

from modemap._exceptions import ParameterError
from modemap.terms.expressions import (
    BinOp,
    Call,
    Const,
    Expr,
    Neg,
    Var,
    parse,
    quote_name,
    term_names,
)

__all__ = ["STYLES", "format_coefficient", "format_equations", "format_term"]

STYLES = ("text", "latex", "python")
_DEFAULT_SIG = 4
_IDENT = re.compile(r"[A-Za-z_][A-Za-z0-9_]*")
_SCI = re.compile(r"(\d(?:\.\d*)?)e([+-]?\d+)")
_LATEX_FUNCS = {"sin", "cos", "exp", "log", "tanh"}


# ---------------------------------------------------------------------------
# numbers
# ---------------------------------------------------------------------------
def _significant(value: float, stderr: float | None, digits: int | None) -> int:
    if digits is not None:
        return max(1, int(digits))
    if stderr is None or not np.isfinite(stderr) or stderr <= 0 or value == 0:
        return _DEFAULT_SIG
    sig = math.floor(math.log10(abs(value))) - math.floor(math.log10(stderr)) + 1
    return int(min(max(sig, 2), 6))


def _fixed_decimals(value: float, sig: int) -> int | None:
    """Decimals for fixed notation, or None when scientific notation reads better."""
    if value == 0:
        return max(sig - 1, 0)
    mag = math.floor(math.log10(abs(value)))
    if mag < -4 or mag >= 6:
        return None
    return sig - 1 - mag


def _fmt(value: float, sig: int) -> tuple[str, int | None]:
    dec = _fixed_decimals(value, sig)
    if dec is None:
        text = f"{value:.{sig - 1}e}"
    elif dec > 0:
        text = f"{value:.{dec}f}"
    else:
        text = f"{round(value, dec):.0f}"
    if float(text) == 0:
        text = text.lstrip("-")
    return text, dec


def format_coefficient(
    value: float,
    stderr: float | None = None,
    *,
    digits: int | None = None,
    show_stderr: bool = False,
) -> str:
    """One coefficient rounded to what its standard error supports.

    Parameters
    ----------
    value : float
    stderr : float, optional
        Standard error; sets the number of significant digits (2 to 6).
    digits : int, optional
        Significant digits to use instead.
    show_stderr : bool, default False
        Return ``"(-0.0123 ± 0.0004)"``.

    Returns
    -------
    str
    """
    sig = _significant(value, stderr, digits)
    text, dec = _fmt(float(value), sig)
    known = stderr is not None and np.isfinite(stderr) and stderr > 0
    if digits is None and not known:
        text = _strip_zeros(text)
    if not show_stderr or stderr is None or not np.isfinite(stderr):
        return text
    if dec is None:
        err = f"{stderr:.1e}"
    else:
        err = f"{stderr:.{max(dec, 0)}f}" if dec > 0 else f"{round(stderr, dec):.0f}"
    return f"({text} ± {err})"


def _strip_zeros(text: str) -> str:
    """``0.5000`` -> ``0.5``, ``2.000e-06`` -> ``2e-06`` (digits not backed by an error)."""
    mant, sep, exp = text.partition("e")
    if "." in mant:
        mant = mant.rstrip("0").rstrip(".")
    return mant + sep + exp


# ---------------------------------------------------------------------------
# terms
# ---------------------------------------------------------------------------
def _prec(e: Expr) -> int:
    if isinstance(e, BinOp):
        return {"+": 1, "-": 1, "*": 2, "/": 2, "^": 4}[e.op]
    if isinstance(e, Neg) or (isinstance(e, Const) and e.value < 0):
        return 3
    return 5


_LATEX_ESCAPES = {
    "\\": r"\backslash{}", "{": r"\{", "}": r"\}", "_": r"\_", "#": r"\#", "$": r"\$",
    "%": r"\%", "&": r"\&", "^": r"\hat{}", "~": r"\sim{}", " ": r"\ ",
}  # fmt: skip


def _latex_name(name: str) -> str:
    if len(name) == 1 and name.isalpha() and name.isascii():
        return name
    m = re.fullmatch(r"([A-Za-z])_?(\d+)", name)
    if m:
        return f"{m.group(1)}_{{{m.group(2)}}}"
    return r"\mathrm{" + "".join(_LATEX_ESCAPES.get(ch, ch) for ch in name) + "}"


def _latex(e: Expr) -> str:
    def wrap(child: Expr, minimum: int) -> str:
        text = _latex(child)
        return rf"\left({text}\right)" if _prec(child) < minimum else text

    if isinstance(e, Const):
        return _latex_number(str(e))
    if isinstance(e, Var):
        return _latex_name(e.name)
    if isinstance(e, Neg):
        return "-" + wrap(e.arg, 3)
    if isinstance(e, Call):
        arg = _latex(e.arg)
        if e.func == "sqrt":
            return rf"\sqrt{{{arg}}}"
        if e.func == "abs":
            return rf"\left|{arg}\right|"
        name = rf"\{e.func}" if e.func in _LATEX_FUNCS else rf"\operatorname{{{e.func}}}"
        return rf"{name}\left({arg}\right)"
    if isinstance(e, BinOp):
        if e.op in "+-":
            return f"{_latex(e.left)} {e.op} {wrap(e.right, 2)}"
        if e.op == "*":
            return f"{wrap(e.left, 2)} {wrap(e.right, 3)}"
        if e.op == "/":
            return rf"\frac{{{_latex(e.left)}}}{{{_latex(e.right)}}}"
        return f"{wrap(e.left, 5)}^{{{_latex(e.right)}}}"
    raise TypeError(f"unknown expression node {e!r}")


def _latex_number(text: str) -> str:
    return _SCI.sub(lambda m: rf"{m.group(1)} \times 10^{{{int(m.group(2))}}}", text)


def _python_namer(variables: Sequence[str]) -> Callable[[str], str]:
    """How the Python form writes a variable: bare, or ``z['name']`` for every variable
    when one of them cannot be a Python name."""
    if all(_IDENT.fullmatch(v) and not keyword.iskeyword(v) and v != "np" for v in variables):
        return str
    return lambda name: f"z[{name!r}]"


def _python(e: Expr, name: Callable[[str], str]) -> str:
    """Python text of a tree: ``^`` -> ``**``, functions -> ``np.<name>``.

    The grammar's precedence of unary minus, products and powers is Python's, so the
    grammar's parenthesising rules carry over.
    """

    def wrap(child: Expr, minimum: int) -> str:
        text = _python(child, name)
        return f"({text})" if _prec(child) < minimum else text

    if isinstance(e, Const):
        return str(e)
    if isinstance(e, Var):
        return name(e.name)
    if isinstance(e, Neg):
        return "-" + wrap(e.arg, 3)
    if isinstance(e, Call):
        return f"np.{e.func}({_python(e.arg, name)})"
    if isinstance(e, BinOp):
        if e.op in "+-":
            return f"{_python(e.left, name)} {e.op} {wrap(e.right, 2)}"
        if e.op in "*/":
            return f"{wrap(e.left, 2)}{e.op}{wrap(e.right, 3)}"
        return f"{wrap(e.left, 5)}**{wrap(e.right, 3)}"
    raise TypeError(f"unknown expression node {e!r}")


def _variables(terms: Sequence[str], state_names: Sequence[str]) -> list[str]:
    names = list(state_names)
    for term in terms:
        names += [n for n in term_names(term) if n not in names]
    return names


def format_term(term: str, variables: Sequence[str], style: str = "text") -> tuple[str, bool]:
    """A term rendered in ``style``; the flag says whether it needs parentheses in a product."""
    if term == "1":
        return "1", False
    expr = parse(term, list(variables))
    needs = _prec(expr) < 2
    if style == "latex":
        return _latex(expr), needs
    if style == "python":
        return _python(expr, _python_namer(variables)), needs
    return str(expr), needs


# ---------------------------------------------------------------------------
# equations
# ---------------------------------------------------------------------------
def _lhs(name: str, form: str, style: str, unit: str, time_unit: str) -> str:
    if style == "latex":
        n = _latex_name(name)
        left = rf"\frac{{d{n}}}{{dt}}" if form == "continuous" else f"{n}_{{k+1}}"
        unit_text = (unit + "/" + (time_unit or "time")) if form == "continuous" else unit
        return left + (rf"\ [\mathrm{{{unit_text}}}]" if unit else "")
    name = quote_name(name)
    left = f"d{name}/dt" if form == "continuous" else f"{name}[k+1]"
    if unit:
        left += f" [{unit}/{time_unit or 'time'}]" if form == "continuous" else f" [{unit}]"
    return left


def _join(pieces: list[str]) -> str:
    if not pieces:
        return "0"
    out = pieces[0]
    for piece in pieces[1:]:
        out += " - " + piece[1:] if piece.startswith("-") else " + " + piece
    return out


def _factored(
    a: float,
    c: float,
    se: tuple[float | None, float | None],
    name: str,
    style: str,
    digits: int | None,
    python_name: Callable[[str], str] = str,
) -> str:
    """``a (x - x*)`` for the equation ``a x + c`` (x* = -c/a)."""
    x_star = -c / a
    se_star = None
    if se[0] is not None and se[1] is not None:
        se_star = math.hypot(se[1] / a, c * se[0] / a**2)
    coef = format_coefficient(a, se[0], digits=digits)
    shift = format_coefficient(abs(x_star), se_star, digits=digits)
    op = "-" if x_star >= 0 else "+"
    var = {"latex": _latex_name, "python": python_name}.get(style, quote_name)(name)
    if style == "python":
        return f"{coef}*({var} {op} {shift})"
    if style == "latex":
        return rf"{_latex_number(coef)} \left({var} {op} {_latex_number(shift)}\right)"
    return f"{coef} ({var} {op} {shift})"


def format_equations(
    terms: Sequence[str],
    coef: np.ndarray,
    state_names: Sequence[str],
    *,
    stderr: np.ndarray | None = None,
    units: Mapping[str, str] | None = None,
    time_unit: str = "",
    form: str = "continuous",
    style: str = "text",
    digits: int | None = None,
    show_stderr: bool = False,
    factored: bool = False,
) -> list[str]:
    """One readable equation per state.

    Parameters
    ----------
    terms : sequence of str
        Canonical term strings (rows of ``coef``).
    coef : ndarray of shape (p, n_states)
        Zero coefficients are left out.
    state_names : sequence of str
    stderr : ndarray of shape (p, n_states), optional
        Standard errors; set the digits shown (see module notes).
    units : mapping, optional
        Variable name -> unit, shown on the left side (``dT/dt [degC/s]``).
    time_unit : str, default ""
        Unit of time for derivative units.
    form : {"continuous", "discrete"}, default "continuous"
        ``dT/dt = ...`` or ``T[k+1] = ...``.
    style : {"text", "latex", "python"}, default "text"
        "python" gives the right-hand side only, e.g. ``-0.0123*T + 0.713``.
    digits : int, optional
        Significant digits for every coefficient, overriding the stderr rule.
    show_stderr : bool, default False
        Show ``(-0.0123 ± 0.0004) T`` (text and LaTeX).
    factored : bool, default False
        Continuous form: write an equation made only of a constant and its own
        state as ``a (T - T*)``, ``T*`` the equilibrium.

    Returns
    -------
    list of str
    """
    if style not in STYLES:
        raise ParameterError(f"style must be one of {STYLES}, got {style!r}")
    if form not in ("continuous", "discrete"):
        raise ParameterError(f"form must be 'continuous' or 'discrete', got {form!r}")
    coef = np.asarray(coef, dtype=np.float64).reshape(len(terms), len(state_names))
    variables = _variables(terms, state_names)
    rendered = [format_term(t, variables, style) for t in terms]
    out = []
    for j, name in enumerate(state_names):
        se = None if stderr is None else np.asarray(stderr, dtype=np.float64)[:, j]
        factor = factored and form == "continuous"
        rhs = _rhs(terms, coef[:, j], se, rendered, name, style, digits, show_stderr, factor)
        if style == "python":
            out.append(rhs)
        else:
            unit = (units or {}).get(name, "")
            out.append(f"{_lhs(name, form, style, unit, time_unit)} = {rhs}")
    return out


def _rhs(terms, coef, se, rendered, name, style, digits, show_stderr, factored) -> str:
    active = np.flatnonzero(coef != 0)
    sel = {terms[i] for i in active}
    own = quote_name(name)  # the term that is the state itself
    if factored and sel == {"1", own} and not show_stderr:
        i1, ix = terms.index("1"), terms.index(own)
        errs = (None, None) if se is None else (float(se[ix]), float(se[i1]))
        namer = _python_namer(_variables(terms, [name]))
        return _factored(float(coef[ix]), float(coef[i1]), errs, name, style, digits, namer)
    pieces = []
    for i in active:
        s = None if se is None else float(se[i])
        c = format_coefficient(
            float(coef[i]), s, digits=digits, show_stderr=show_stderr and style != "python"
        )
        if style == "latex":
            c = _latex_number(c).replace("±", r"\pm")
        elif style == "python":
            c = _strip_zeros(c)
        text, needs = rendered[i]
        if terms[i] == "1":
            pieces.append(c)
            continue
        text = (rf"\left({text}\right)" if style == "latex" else f"({text})") if needs else text
        pieces.append(f"{c}*{text}" if style == "python" else f"{c} {text}")
    return _join(pieces)
