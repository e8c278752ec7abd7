"""Malformed-input corpus: column names, default states, custom terms and magnitudes.

Each case is one command that must be refused cleanly (``tests/hostile.py``: exit 2, one
line on stderr, no traceback, the data and output folders unchanged) with a message that
names the term, the column and the row.  Data are small and invented; rows are counted
as "data row N", the N-th data row of the file (header not counted).  That a division by
zero is infinite, a square root or logarithm of a negative number undefined and
``exp(exp(exp(2)))`` beyond the largest double is IEEE 754 arithmetic (common practice).
"""

from __future__ import annotations

from pathlib import Path

import numpy as np
import pandas as pd
import pytest

from hostile import refused

N = 40
T = np.round(np.arange(N) * 0.1, 10)
X = 1.0 + 0.5 * np.sin(T)  # between 0.5 and 1.5: sqrt(x - 5) is undefined everywhere
U = np.cos(0.7 * T)


def _frame(**columns) -> pd.DataFrame:
    return pd.DataFrame({"t": T, "x": X, "u": U, **columns})


FIT = ["--time", "t", "--regimes", "1", "--quiet"]


# name -> (table, argv after the file, fragments of the message)
CASES: dict[str, tuple[pd.DataFrame, list[str], list[str]]] = {
    # custom terms undefined or not finite on the data: term, kind and first row named
    "1/0": (
        _frame(), ["fit", *FIT, "--states", "x", "--term", "1/0"],
        ["term '1/0'", "infinite", "data row 1 (t=0)"],
    ),
    "sqrt below its domain": (
        _frame(), ["fit", *FIT, "--states", "x", "--term", "sqrt(x - 5)"],
        ["term 'sqrt(x - 5)'", "not defined (nan)", "data row 1", "x = 1"],
    ),
    "log of zero": (
        _frame(), ["fit", *FIT, "--states", "x", "--term", "log(0*x)"],
        ["term 'log(0)'", "infinite", "data row 1"],
    ),
    "exp of exp of exp": (
        _frame(x=X + 1), ["fit", *FIT, "--states", "x", "--term", "exp(exp(exp(x)))"],
        ["term 'exp(exp(exp(x)))'", "infinite", "data row 1", "x = 2"],
    ),
    "power 99999": (
        _frame(), ["fit", *FIT, "--states", "x", "--term", "x^99999"],
        ["term 'x^99999'", "infinite", "data row"],
    ),
    "1/x at the first zero": (
        # x = t - 0.5 is exactly 0 at the 6th data row (t = 0.5)
        pd.DataFrame({"t": T, "x": np.round(T - 0.5, 10), "u": U}),
        ["fit", *FIT, "--states", "x", "--inputs", "u", "--term", "x^-1"],
        ["term 'x^-1'", "infinite", "data row 6 (t=0.5)", "x = 0"],
    ),
    "undefined in the second run": (
        pd.DataFrame({"t": np.r_[T, T], "run": ["a"] * N + ["b"] * N,
                      "x": np.r_[X, -X], "u": np.r_[U, U]}),
        ["fit", *FIT, "--states", "x", "--inputs", "u", "--run", "run", "--term", "log(x)"],
        ["term 'log(x)'", "not defined", f"data row {N + 1} (run 'b', t=0)"],
    ),
    "quoted name outside its domain": (
        _frame(**{"Tank Level": X - 1.2}),
        ["fit", *FIT, "--states", "Tank Level", "--term", "sqrt(`Tank Level`)"],
        ["term 'sqrt(`Tank Level`)'", "not defined", "data row 1", "`Tank Level` = -0.2"],
    ),
    # custom terms collinear with another term: both named
    "2*x": (
        _frame(), ["fit", *FIT, "--states", "x", "--term", "2*x"],
        ["term '2*x'", "2 times the candidate term 'x'", "collinear"],
    ),
    "x + x": (
        _frame(), ["fit", *FIT, "--states", "x", "--term", "x + x"],
        ["term 'x + x'", "the candidate term 'x'", "collinear"],
    ),
    "constant term": (
        _frame(), ["fit", *FIT, "--states", "x", "--term", "exp(0*x)"],
        ["term 'exp(0)'", "constant on the data", "constant term '1'"],
    ),
    "zero term": (
        _frame(), ["fit", *FIT, "--states", "x", "--term", "0*x"],
        ["term '0'", "0 at every sample"],
    ),
    "two custom terms collinear": (
        _frame(), ["fit", *FIT, "--states", "x", "--inputs", "u", "--degree", "1",
                   "--term", "x*sin(u)", "--term", "3*x*sin(u)"],
        ["term '3*x*sin(u)'", "3 times the term 'x*sin(u)'", "collinear"],
    ),
    "collinear through the data": (
        # u is 1 at every sample, so x*u is x: the data make the two terms one
        _frame(u=np.ones(N)), ["fit", *FIT, "--states", "x", "--inputs", "u",
                               "--degree", "1", "--term", "x*u^3"],
        ["term 'x*u^3'", "1 times the candidate term 'x'"],
    ),
    # magnitudes a fit cannot square: column, value and row named
    "states of 1e200": (
        _frame(x=X * 1e200), ["fit", *FIT, "--states", "x"],
        ["column 'x'", "value 1e+200 at data row 1", "rescale the column"],
    ),
    "cube beyond range": (
        _frame(x=X * 1e30), ["fit", *FIT, "--states", "x", "--degree", "3"],
        ["column 'x'", "candidate term 'x^3'", "data row", "lower degree"],
    ),
    # the quoting rule itself
    "unclosed quote": (
        _frame(**{"Tank Level": X}), ["fit", *FIT, "--states", "Tank Level",
                                      "--term", "`Tank Level*x"],
        ["term '`Tank Level*x'", "column 1", "not closed"],
    ),
    "quoted name that is not a column": (
        _frame(**{"Tank Level": X}), ["fit", *FIT, "--states", "Tank Level",
                                      "--term", "`Tank level`^2"],
        ["unknown name `Tank level`", "variables are `Tank Level`"],
    ),
    "quoted name is never a function": (
        _frame(sin=X), ["fit", *FIT, "--states", "sin", "--term", "`sin`(x)"],
        ["column 6", "expected an operator"],
    ),
    "left-out flag used in a term": (
        # no states named: the 0/1 column is left out, so a term cannot use it
        _frame(flag=(X > 1).astype(int)), ["fit", *FIT, "--inputs", "u", "--term", "flag*x"],
        ["unknown name 'flag'", "variables are x, u"],
    ),
    # names check and fit refuse alike
    "two columns of one name": (
        # two headers that differ only in blanks: one name, one unit
        pd.DataFrame({"t": T, "x [m]": X, "x  [m]": 2 * X}),
        ["check", "--time", "t", "--states", "x [m],x  [m]"],
        ["log.csv, column 'x", "its name 'x' is also the name of column 2"],
    ),
    "name of 1001 characters": (
        _frame(**{"q" * 1001: X}), ["check", "--time", "t", "--states", "q" * 1001],
        ["1001 characters", "at most 1000"],
    ),
    "no column can be a state": (
        pd.DataFrame({"t": T, "flag": (X > 1).astype(int), "const": 3.0,
                      "true_regime": np.arange(N) % 3}),
        ["check", "--time", "t"],
        ["no column can be a state", "'flag': two values only", "'const': constant",
         "'true_regime': whole numbers 0 to 2"],
    ),
}  # fmt: skip


@pytest.mark.parametrize("case", list(CASES))
def test_refused_with_term_column_and_row(case: str, tmp_path: Path, capsys) -> None:
    table, argv, fragments = CASES[case]
    data = tmp_path / "data"
    data.mkdir()
    path = data / "log.csv"
    table.to_csv(path, index=False)
    out = tmp_path / "out"
    args = [argv[0], str(path), *argv[1:]]
    if argv[0] == "fit":
        args += ["--out", str(out)]
    err = refused(capsys, args, watch=[data, out])
    for fragment in fragments:
        assert fragment in err, (fragment, err)
    if "data row" in err or "every sample" in err:  # a failure on the data names the file
        assert str(path) in err, err
