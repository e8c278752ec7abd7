"""Tests of modemap.terms.equations: readable text, LaTeX and Python forms."""

from __future__ import annotations

import ast
import operator

import numpy as np
import pytest

from modemap.terms.equations import format_coefficient, format_equations

TERMS = ["1", "T", "u"]
COEF = np.array([[0.713], [-0.0123], [4.02]])
STDERR = np.array([[0.004], [0.0004], [0.05]])


def test_text_with_digits_from_stderr() -> None:
    # rounding at the first significant digit of the standard error (common practice)
    assert format_equations(TERMS, COEF, ["T"], stderr=STDERR) == [
        "dT/dt = 0.713 - 0.0123 T + 4.02 u"
    ]
    assert format_coefficient(123.456, 2.0) == "123"
    assert format_coefficient(0.5, 0.1) == "0.50"  # at least 2 significant digits
    assert format_coefficient(1.23456789, 1e-12) == "1.23457"  # at most 6
    assert format_coefficient(0.5) == "0.5"  # no error known: 4 digits, zeros dropped
    assert format_coefficient(-2e-6) == "-2e-06"


def test_stderr_display_units_and_discrete() -> None:
    out = format_equations(
        TERMS, COEF, ["T"], stderr=STDERR, show_stderr=True, units={"T": "degC"}, time_unit="s"
    )
    assert out == ["dT/dt [degC/s] = (0.713 ± 0.004) + (-0.0123 ± 0.0004) T + (4.02 ± 0.05) u"]
    assert format_equations(TERMS, COEF, ["T"], stderr=STDERR, form="discrete") == [
        "T[k+1] = 0.713 - 0.0123 T + 4.02 u"
    ]


def test_factored_first_order_equation() -> None:
    # a T + c = a (T - T*) with T* = -c/a = 0.713/0.0123 = 57.967... (arithmetic)
    out = format_equations(["1", "T"], np.array([[0.713], [-0.0123]]), ["T"], factored=True)
    assert out == ["dT/dt = -0.0123 (T - 57.97)"]
    # a map x[k+1] = a x + c has its fixed point elsewhere: left unfactored
    out = format_equations(
        ["1", "T"], np.array([[0.713], [0.9]]), ["T"], factored=True, form="discrete"
    )
    assert out == ["T[k+1] = 0.713 + 0.9 T"]


def test_latex() -> None:
    terms = ["1", "x", "x^2", "x*y", "sin(x)"]
    coef = np.array([[0.5, 0.0], [-1.0, 0.0], [0.0, 2.0], [0.0, -3.0], [0.0, 0.25]])
    assert format_equations(terms, coef, ["x", "y"], style="latex") == [
        r"\frac{dx}{dt} = 0.5 - 1 x",
        r"\frac{dy}{dt} = 2 x^{2} - 3 x y + 0.25 \sin\left(x\right)",
    ]


_OPS = {
    ast.Add: operator.add,
    ast.Sub: operator.sub,
    ast.Mult: operator.mul,
    ast.Div: operator.truediv,
    ast.Pow: operator.pow,
    ast.USub: operator.neg,
}


def _evaluate(node: ast.AST, env: dict[str, np.ndarray]) -> np.ndarray | float:
    """Walk a Python expression tree with numpy (no eval): test helper."""
    if isinstance(node, ast.Expression):
        return _evaluate(node.body, env)
    if isinstance(node, ast.Constant):
        return float(node.value)
    if isinstance(node, ast.Name):
        return env[node.id]
    if isinstance(node, ast.BinOp):
        return _OPS[type(node.op)](_evaluate(node.left, env), _evaluate(node.right, env))
    if isinstance(node, ast.UnaryOp):
        return _OPS[type(node.op)](_evaluate(node.operand, env))
    if isinstance(node, ast.Call) and isinstance(node.func, ast.Attribute):
        assert node.func.value.id == "np"
        return getattr(np, node.func.attr)(_evaluate(node.args[0], env))
    raise AssertionError(f"unexpected node {ast.dump(node)}")


def test_python_form_evaluates_like_numpy() -> None:
    terms = ["1", "x", "u", "x^2", "x*u", "sin(x)", "exp(-x)", "x - u"]
    coef = np.array([[0.5], [-1.25], [2.0], [0.75], [-0.5], [0.125], [1.5], [0.25]])
    (text,) = format_equations(terms, coef, ["x"], style="python", digits=8)
    assert text.startswith("0.5 - 1.25*x + 2*u + 0.75*x**2 - 0.5*x*u + 0.125*np.sin(x)")
    rng = np.random.default_rng(0)
    x, u = rng.normal(size=50), rng.normal(size=50)
    got = _evaluate(ast.parse(text, mode="eval"), {"x": x, "u": u})
    # reference: the same right-hand side written directly with numpy
    ref = (
        0.5
        - 1.25 * x
        + 2 * u
        + 0.75 * x**2
        - 0.5 * x * u
        + 0.125 * np.sin(x)
        + 1.5 * np.exp(-x)
        + 0.25 * (x - u)
    )
    np.testing.assert_allclose(got, ref, rtol=1e-12)


def test_empty_equation_and_bad_style() -> None:
    assert format_equations(["1"], np.zeros((1, 1)), ["x"]) == ["dx/dt = 0"]
    with pytest.raises(ValueError, match="style"):
        format_equations(["1"], np.zeros((1, 1)), ["x"], style="html")
