"""Tests of the term grammar (modemap.terms.expressions)."""

from __future__ import annotations

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from modemap._exceptions import ExpressionError
from modemap.terms.expressions import parse

VARS = ("x", "y", "u")
RNG = np.random.default_rng(7)
Z = RNG.uniform(0.5, 2.0, size=(50, 3))
X, Y, U = Z.T

# Each expression next to the same function written directly with numpy (reference).
CASES = [
    ("x^2*u", X**2 * U),
    ("-x^2", -(X**2)),
    ("x - (y - u)", X - (Y - U)),
    ("x - y - u", X - Y - U),
    ("x/y/u", X / Y / U),
    ("x/(y/u)", X / (Y / U)),
    ("2^3^0.5*x", 2 ** (3**0.5) * X),  # right-associative power (common practice)
    ("x^-1", 1 / X),
    ("sin(x - 0.5)*cos(y)", np.sin(X - 0.5) * np.cos(Y)),
    ("exp(-y/2) + log(u)", np.exp(-Y / 2) + np.log(U)),
    ("sqrt(abs(x - y))", np.sqrt(np.abs(X - Y))),
    ("tanh(1e-3*x*u)", np.tanh(1e-3 * X * U)),
    ("x^y", X**Y),
    ("((x))", X),
    ("3", np.full(50, 3.0)),
    ("- -x", X),
    ("x*-2.5", -2.5 * X),
]


@pytest.mark.parametrize(("text", "expected"), CASES)
def test_evaluation_matches_numpy(text: str, expected: np.ndarray) -> None:
    # Reference: the same formula written directly with numpy.
    np.testing.assert_allclose(parse(text, VARS).evaluate(Z), expected, rtol=1e-12)


@pytest.mark.parametrize("text", [case[0] for case in CASES])
def test_print_parse_round_trip(text: str) -> None:
    expr = parse(text, VARS)
    again = parse(str(expr), VARS)
    assert again == expr
    assert str(again) == str(expr)


def test_normal_form_examples() -> None:
    assert str(parse("  x ^ 2 * u ", VARS)) == "x^2*u"
    assert str(parse("x + -y", VARS)) == "x - y"
    assert str(parse("1*x^1 + 0*y", VARS)) == "x"
    assert str(parse("2*3*x", VARS)) == "6*x"  # constant folding
    assert str(parse("(x^2)^3", VARS)) == "(x^2)^3"
    assert str(parse("sin(x)", VARS)) == "sin(x)"
    assert parse("u*sin(x) + y", VARS).variables_used == ("x", "y", "u")


@pytest.mark.parametrize(
    "text",
    ["x^2*u", "sin(x)*y^2/u + exp(-x*y)", "x^y", "sqrt(x*u)", "log(y)/x", "tanh(x - u)", "abs(x)"],
)
@pytest.mark.parametrize("var", VARS)
def test_symbolic_derivative_matches_finite_differences(text: str, var: str) -> None:
    # Reference: central finite differences, error O(h^2) (common practice).
    expr = parse(text, VARS)
    k = VARS.index(var)
    h = 1e-6
    zp, zm = Z.copy(), Z.copy()
    zp[:, k] += h
    zm[:, k] -= h
    numeric = (expr.evaluate(zp) - expr.evaluate(zm)) / (2 * h)
    np.testing.assert_allclose(expr.diff(var).evaluate(Z), numeric, rtol=1e-6, atol=1e-6)


def test_derivative_simplifies() -> None:
    assert str(parse("x^2", VARS).diff("x")) == "2*x"
    assert str(parse("x*y", VARS).diff("y")) == "x"
    assert str(parse("x^3", VARS).diff("y")) == "0"
    assert str(parse("sin(x)", VARS).diff("x")) == "cos(x)"


@pytest.mark.parametrize(
    ("text", "fragment"),
    [
        ("__import__('os')", "column 12: unexpected character"),
        ("x.__class__", "column 2: unexpected character '.'"),
        ("lambda: 1", "column 7: unexpected character ':'"),
        ("[1]", "column 1: unexpected character '['"),
        ("'x'", "unexpected character"),
        ("x; y", "column 2: unexpected character ';'"),
        ("x**2", "use '^' for powers"),
        ("import", "unknown name 'import'; variables are x, y, u"),
        ("z + 1", "column 1: unknown name 'z'; variables are x, y, u"),
        ("foo(x)", "function 'foo' is unknown; functions are sin"),
        ("x(2)", "'x' is a variable, not a function"),
        ("sin", "expected '(' after function 'sin'"),
        ("sin(x, y)", "column 6: unexpected character ','"),
        ("2x", "column 2: expected an operator"),
        ("(x + y", "column 7: expected ')', found end of input"),
        ("x +", "column 4: expected a number, a variable, a function or '('"),
        ("x)", "column 2: expected an operator (+ - * / ^) or the end of the term, found ')'"),
        ("", "term is empty"),
        ("   ", "term is empty"),
        ("1e999*x", "out of range"),
        ("(" * 500 + "x" + ")" * 500, "too long"),
        ("(" * 60 + "x" + ")" * 60, "nested too deeply"),
        ("x^" * 45 + "x", "too deeply nested"),
    ],
)
def test_rejections_have_clear_messages(text: str, fragment: str) -> None:
    with pytest.raises(ExpressionError) as info:
        parse(text, VARS)
    message = str(info.value)
    assert fragment in message
    assert "\n" not in message


def test_invalid_variable_names() -> None:
    with pytest.raises(ExpressionError, match="is empty"):
        parse("x", ["x", ""])
    with pytest.raises(ExpressionError, match="at most 1000"):
        parse("x", ["x", "a" * 1001])
    with pytest.raises(ExpressionError, match="appears twice"):
        parse("x", ["x", "x"])


def test_evaluate_rejects_wrong_shape() -> None:
    with pytest.raises(ExpressionError, match="2-D"):
        parse("x", VARS).evaluate(np.ones(3))


ALPHABET = "xyu0123456789.eE+-*/^() sincoexplgqrtabh_[]'\";:,=lambd``"


@settings(max_examples=300, deadline=None)
@given(st.text(alphabet=ALPHABET, max_size=25))
def test_random_text_raises_only_expression_error(text: str) -> None:
    # Property (common practice for parsers): any input either parses, prints
    # to text that parses to the same tree and evaluates without error, or
    # fails with ExpressionError and nothing else.
    try:
        expr = parse(text, VARS)
    except ExpressionError:
        return
    assert parse(str(expr), VARS) == expr
    assert expr.evaluate(Z).shape == (50,)
