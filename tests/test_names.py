"""Any column name as a variable: the backtick quoting rule of the term grammar.

Property-based tests (hypothesis) draw arbitrary names; the numbers a term gives are
checked against the same function written directly with numpy (the reference).  Terms
and equations over plain names are compared with those the code gave before the
quoting rule existed (``tests/data/plain_names_golden.json``, written by commit eb85d0f
from the same calls): byte for byte the same.
"""

from __future__ import annotations

import ast
import json
import operator
from pathlib import Path

import numpy as np
import pandas as pd
import pytest
from hypothesis import assume, given, settings
from hypothesis import strategies as st

from modemap.app.cli import main
from modemap.data.intake import MAX_NAME_LENGTH as INTAKE_MAX
from modemap.data.states import not_a_state
from modemap.model.modelfile import load_model
from modemap.terms.equations import format_equations
from modemap.terms.expressions import (
    MAX_NAME_LENGTH,
    Var,
    parse,
    quote_name,
    term_names,
    variable_of,
)
from modemap.terms.library import TermLibrary

NAMES = st.text(min_size=1, max_size=24).filter(lambda s: s.strip() != "")
RNG = np.random.default_rng(11)
Z = RNG.uniform(0.5, 2.0, size=(40, 2))


# --------------------------------------------------------------------- the quoting rule


@pytest.mark.parametrize(
    ("name", "written"),
    [
        ("x", "x"),
        ("T_in", "T_in"),
        ("sin", "sin"),  # a bare function name is a variable unless "(" follows
        ("Tank Level", "`Tank Level`"),
        ("Level (m)", "`Level (m)`"),
        ("LT-101.PV", "`LT-101.PV`"),
        ("2", "`2`"),
        ("a`b", "`a``b`"),
        ("été", "`été`"),
    ],
)
def test_names_are_quoted_only_when_needed(name: str, written: str) -> None:
    assert quote_name(name) == written
    assert variable_of(written) == name
    assert parse(written, [name]) == Var(name, 0)


@settings(max_examples=300, deadline=None)
@given(NAMES)
def test_any_name_round_trips(name: str) -> None:
    # quote -> parse -> canonical string -> parse gives the same variable
    text = quote_name(name)
    expr = parse(text, [name])
    assert expr == Var(name, 0)
    assert str(expr) == text
    assert parse(str(expr), [name]) == expr
    assert term_names(text) == [name]


@settings(max_examples=200, deadline=None)
@given(NAMES, NAMES)
def test_terms_on_any_names_evaluate_like_numpy(a: str, b: str) -> None:
    assume(a != b)
    qa, qb = quote_name(a), quote_name(b)
    names = [a, b]
    expr = parse(f"{qa}^2*{qb} - sin({qb})/{qa} + exp(-{qa}*{qb}/4)", names)
    again = parse(str(expr), names)
    assert again == expr
    x, y = Z.T
    reference = x**2 * y - np.sin(y) / x + np.exp(-x * y / 4)  # numpy, written directly
    np.testing.assert_allclose(again.evaluate(Z), reference, rtol=1e-13)
    # the library's canonical monomials over the same names evaluate like numpy too
    lib = TermLibrary(degree=2, trig=[b]).fit(names)
    assert lib.terms_ == [
        "1",
        qa,
        qb,
        f"{qa}^2",
        f"{qa}*{qb}",
        f"{qb}^2",
        f"sin({qb})",
        f"cos({qb})",
    ]
    again = TermLibrary.from_terms(lib.terms_, names)
    assert again.terms_ == lib.terms_
    want = np.column_stack([np.ones(40), x, y, x**2, x * y, y**2, np.sin(y), np.cos(y)])
    np.testing.assert_allclose(again.transform(Z), want, rtol=1e-13)


def test_name_limits_agree_between_intake_and_terms() -> None:
    assert INTAKE_MAX == MAX_NAME_LENGTH


# --------------------------------------------------------------------------- equations


def test_equations_quote_only_where_needed() -> None:
    names = ["Tank Level", "u"]
    coef = np.array([[0.5], [-1.25], [2.0]])
    (text,) = format_equations(["1", "`Tank Level`", "u"], coef, names[:1])
    assert text == "d`Tank Level`/dt = 0.5 - 1.25 `Tank Level` + 2 u"
    (latex,) = format_equations(["1", "`Tank Level`", "u"], coef, names[:1], style="latex")
    assert r"\mathrm{Tank\ Level}" in latex
    (factored,) = format_equations(
        ["1", "`Tank Level`"], np.array([[1.0], [-2.0]]), ["Tank Level"], factored=True
    )
    assert factored == "d`Tank Level`/dt = -2 (`Tank Level` - 0.5)"


_OPS = {ast.Add: operator.add, ast.Sub: operator.sub, ast.Mult: operator.mul,
        ast.Div: operator.truediv, ast.Pow: operator.pow, ast.USub: operator.neg}  # fmt: skip


def _evaluate(node: ast.AST, z: dict[str, np.ndarray]) -> np.ndarray | float:
    """Walk the Python form with numpy, ``z['name']`` looked up in ``z`` (no eval)."""
    if isinstance(node, ast.Expression):
        return _evaluate(node.body, z)
    if isinstance(node, ast.Constant):
        return float(node.value)
    if isinstance(node, ast.Subscript):
        assert isinstance(node.value, ast.Name) and node.value.id == "z"
        return z[node.slice.value]
    if isinstance(node, ast.BinOp):
        return _OPS[type(node.op)](_evaluate(node.left, z), _evaluate(node.right, z))
    if isinstance(node, ast.UnaryOp):
        return _OPS[type(node.op)](_evaluate(node.operand, z))
    if isinstance(node, ast.Call):
        assert node.func.value.id == "np"
        return getattr(np, node.func.attr)(_evaluate(node.args[0], z))
    raise AssertionError(f"unexpected node {ast.dump(node)}")


def test_python_form_with_quoted_names_evaluates_like_numpy() -> None:
    names = ["Level (m)", "sin"]  # a name Python cannot read, and one that is a function
    terms = ["1", "`Level (m)`", "sin", "`Level (m)`^2*sin", "sin(sin)", "exp(-`Level (m)`)"]
    coef = np.array([[0.5], [-1.25], [2.0], [0.75], [0.125], [1.5]])
    (text,) = format_equations(terms, coef, names[:1], style="python", digits=8)
    assert "z['Level (m)']" in text and "np.sin(z['sin'])" in text
    x, s = Z.T
    got = _evaluate(ast.parse(text, mode="eval"), {"Level (m)": x, "sin": s})
    ref = 0.5 - 1.25 * x + 2.0 * s + 0.75 * x**2 * s + 0.125 * np.sin(s) + 1.5 * np.exp(-x)
    np.testing.assert_allclose(got, ref, rtol=1e-12)


def test_plain_names_print_as_before() -> None:
    # the same calls as tests/data/plain_names_golden.json, recorded before quoting existed
    golden = json.loads((Path(__file__).parent / "data" / "plain_names_golden.json").read_text())
    cases = [
        (["i_L", "v_C", "g"], dict(degree=3)),
        (["C_A", "T", "Tc"], dict(degree=2, trig=["T"],
                                  custom=["C_A*exp(-8750/T)", "T^-1*Tc", "sqrt(abs(C_A - T))/2"])),
        (["T", "w", "shed"], dict(degree=3, custom=["w*(T - 15)", "-w^2/(1 + T)"])),
    ]  # fmt: skip
    for names, kw in cases:
        lib = TermLibrary(**kw).fit(names)
        coef = np.linspace(-2.5, 3.25, lib.n_terms_ * 2).reshape(lib.n_terms_, 2) * 1.37
        coef[::3] = 0
        want = golden[",".join(names)]
        assert lib.terms_ == want["terms"]
        for style in ("text", "latex", "python"):
            got = format_equations(lib.terms_, coef, names[:2], style=style)
            assert got == want["equations"][style]
        factored = format_equations(
            ["1", names[0]], np.array([[1.5], [-0.25]]), names[:1], factored=True
        )
        assert factored == want["equations"]["factored"]
        discrete = format_equations(
            lib.terms_, coef, names[:2], form="discrete", units={names[0]: "A"}, time_unit="s"
        )
        assert discrete == want["equations"]["discrete"]


# ------------------------------------------------------------------- default states


@pytest.mark.parametrize(
    ("name", "values", "reason"),
    [
        ("level", np.full(50, 3.0), "constant"),
        ("valve", np.r_[np.zeros(25), np.ones(25)], "two values only (0 and 1)"),
        ("heater", np.r_[np.full(25, 20.0), np.full(25, 80.0)], "two values only (20 and 80)"),
        ("true_regime", np.arange(50) % 3, "whole numbers 0 to 2"),
        ("runID", np.arange(50) % 5, "whole numbers 0 to 4"),
        ("Operating Mode", np.arange(50) % 4, "named like a label"),
        ("pumps", np.arange(50) % 3, None),  # whole numbers, but not named like a label
        ("regime_signal", np.linspace(0, 1, 50), None),  # named like one, but not whole
        ("level_cm", np.arange(50) % 30, None),  # whole centimetres: a state
        ("mode", np.arange(50) % 25, None),  # more than 20 values
    ],
)
def test_default_state_rule(name: str, values: np.ndarray, reason: str | None) -> None:
    got = not_a_state(name, np.asarray(values, dtype=float))
    assert (got is None) if reason is None else (reason in got)


# ----------------------------------------------------------------- through the CLI


def _log(path: Path, name: str) -> Path:
    """A first-order lag ``d name/dt = -0.5 name + 2 u`` (invented, Euler at step 0.1)."""
    t = np.arange(200) * 0.1
    u = 1.0 + np.sin(0.4 * t)
    x = np.empty(200)
    x[0] = 1.0
    for k in range(199):
        x[k + 1] = x[k] + 0.1 * (-0.5 * x[k] + 2.0 * u[k])
    pd.DataFrame({"t": t, name: x, "u": u, "flag": (u > 1).astype(int)}).to_csv(path, index=False)
    return path


@pytest.mark.parametrize("name", ["Tank Level", "Level (m)", "LT-101.PV", "sin", "exp", "1"])
def test_hostile_names_check_and_fit(name: str, tmp_path: Path, capsys) -> None:
    data = _log(tmp_path / "log.csv", name)
    out = tmp_path / "out"
    # check and fit accept the same names; the 0/1 column is left out of the states
    assert main(["check", str(data), "--inputs", "u"]) == 0
    summary = capsys.readouterr().out
    assert name in summary and "'flag': two values only (0 and 1)" in summary
    quoted = quote_name(name)
    term = f"{quoted}*exp(-{quoted}/10)"
    argv = ["fit", str(data), "--inputs", "u", "--regimes", "1", "--degree", "1",
            "--term", term, "--quiet", "--out", str(out)]  # fmt: skip
    assert main(argv) == 0
    capsys.readouterr()
    model = load_model(out / "model.json")
    assert model.states == [name] and model.inputs == ["u"]
    assert model.regimes[0].terms == ["1", quoted, "u", term]
    report = (out / "report.md").read_text()
    assert f"d{quoted}/dt = " in report
    assert "left out of the default states" in report
    # the written model simulates again with the name as a column
    sim = tmp_path / "sim.csv"
    assert main(["simulate", str(out / "model.json"), str(data), "--out", str(sim)]) == 0
    assert list(pd.read_csv(sim).columns) == ["run", "t", name, "regime"]
    capsys.readouterr()


def test_state_list_takes_a_quoted_name_with_a_comma(tmp_path: Path, capsys) -> None:
    data = _log(tmp_path / "log.csv", "Flow, total")
    assert main(["check", str(data), "--states", "`Flow, total`,u", "--json"]) == 0
    assert json.loads(capsys.readouterr().out)["states"] == ["Flow, total", "u"]
