"""Malformed-input corpus: damaged model files and out-of-range or mistyped options.

Each case is one parameter, held by the harness (:mod:`tests.hostile`) to the README's promise:
exit code 2, one line on stderr, no traceback, the watched folders unchanged; each also
checks the fragments that name the file, the JSON position or the option as typed.

Limits the cases rely on: JSON nests arbitrarily deep by its grammar but Python's parser
recurses once per level (RFC 8259 section 9 lets a parser "set limits on the maximum depth
of nesting"); an IEEE 754 double holds at most about 1.8e308 (IEEE 754-2019, binary64), so
an integer of 309 or more digits cannot be a number of the model file.
"""

from __future__ import annotations

import json
from pathlib import Path

import pytest

from hostile import refused, refused_in_process
from modemap.model.modelfile import MAX_DEPTH, MAX_FILE_BYTES, model_to_dict, save_model
from test_modelfile import small_model

# --------------------------------------------------------------------------- fixtures


def _model_text() -> str:
    return json.dumps(model_to_dict(small_model()), indent=2)


def _grid_csv() -> str:
    """A time grid with the small model's states T, P and input q (invented numbers)."""
    rows = [f"{k * 0.1:.1f},{3.0 + 0.01 * k:.3f},0.0,0.5" for k in range(30)]
    return "\n".join(["t,T,P,q", *rows]) + "\n"


def _ramp_csv() -> str:
    """Two runs of a first-order decay (invented), for options refused before any fit."""
    rows = []
    for run in range(2):
        x = 1.0 + run
        for k in range(40):
            rows.append(f"{run},{k * 0.1:.1f},{x:.6f}")
            x += 0.1 * (-x + 0.5)
    return "\n".join(["run,t,x", *rows]) + "\n"


def _sparse_file(path: Path, size: int) -> None:
    """A file of ``size`` bytes that takes no disk space (a hole), starting with '{'."""
    with open(path, "wb") as fh:
        fh.write(b"{")
        fh.truncate(size)


_NEST = "[" * 5000 + "]" * 5000

DAMAGED = {
    # name: (how the text is damaged, message fragment)
    "deep_arrays": (lambda t: "[" * 200_000 + "]" * 200_000, f"nested more than {MAX_DEPTH}"),
    "deep_in_metadata": (
        lambda t: t.replace(
            '"metadata": {', '"metadata": {"x": ' + "[" * 5000 + "]" * 5000 + ",", 1
        ),
        f"nested more than {MAX_DEPTH} deep (from line",
    ),
    "deep_objects": (
        lambda t: '{"a": ' * 100_000 + "1" + "}" * 100_000,
        f"nested more than {MAX_DEPTH}",
    ),
    "integer_400_digits": (
        lambda t: t.replace("1.5", "1" + "0" * 400, 1),
        "integer 10000000... (401 digits) is too large for a number",
    ),
    "integer_5000_digits": (
        lambda t: t.replace("1.5", "9" * 5000, 1),
        "(5000 digits) is too large",
    ),
    "integer_samples": (
        lambda t: t.replace('"samples": 120', '"samples": 1' + "0" * 320, 1),
        "too large for a number",
    ),
    "integer_id_beyond_2_63": (
        lambda t: t.replace('"id": 0', '"id": 18446744073709551616', 1),
        "regimes[0].id: expected a non-negative integer below 2^63",
    ),
    "float_overflow": (
        lambda t: t.replace("1.5", "1e999", 1),
        "regimes[0].coefficients.T[0]: number out of range",
    ),
    "infinity_literal": (
        lambda t: t.replace("1.5", "-Infinity", 1),
        "-Infinity is not a JSON number",
    ),
    "nan_step": (lambda t: t.replace('"step": 0.1', '"step": NaN', 1), "NaN is not a JSON number"),
    "truncated": (lambda t: t[: len(t) // 2], "invalid JSON at line"),
    "nul_bytes": (lambda t: "\0" * 4096, "invalid JSON at line 1, column 1"),
}


@pytest.fixture
def folders(tmp_path: Path) -> dict[str, Path]:
    model_dir, data_dir, out_dir = tmp_path / "model", tmp_path / "data", tmp_path / "out"
    for folder in (model_dir, data_dir, out_dir):
        folder.mkdir()
    (data_dir / "grid.csv").write_text(_grid_csv(), encoding="utf-8")
    (data_dir / "ramp.csv").write_text(_ramp_csv(), encoding="utf-8")
    (out_dir / "keep.txt").write_text("an earlier result\n", encoding="utf-8")
    return {"model": model_dir, "data": data_dir, "out": out_dir}


# --------------------------------------------------------------------------- damaged model files


@pytest.mark.parametrize("name", sorted(DAMAGED))
def test_simulate_refuses_a_damaged_model_file(name, folders, capsys):
    damage, fragment = DAMAGED[name]
    model = folders["model"] / "model.json"
    model.write_text(damage(_model_text()), encoding="utf-8")
    argv = ["simulate", str(model), str(folders["data"] / "grid.csv"), "--time", "t"]
    err = refused(capsys, [*argv, "--out", str(folders["out"] / "sim.csv")], watch=folders.values())
    assert f"{model}: " in err and fragment in err


@pytest.mark.parametrize("name", ["deep_arrays", "integer_400_digits", "float_overflow"])
def test_view_refuses_a_folder_with_a_damaged_model_file(name, folders, capsys, monkeypatch):
    monkeypatch.setattr("modemap.app.cli._tty", lambda stream: True)  # as if in a terminal
    damage, fragment = DAMAGED[name]
    model = folders["model"] / "model.json"
    model.write_text(damage(_model_text()), encoding="utf-8")
    err = refused(capsys, ["view", str(folders["model"])], watch=folders.values())
    assert f"{model}: " in err and fragment in err


def test_simulate_refuses_a_1_gb_model_file_without_reading_it(folders, capsys):
    model = folders["model"] / "model.json"
    _sparse_file(model, 2**30)
    argv = ["simulate", str(model), str(folders["data"] / "grid.csv"), "--time", "t"]
    err = refused(capsys, [*argv, "--out", str(folders["out"] / "sim.csv")], watch=[folders["out"]])
    assert f"{model}: {2**30} bytes is too large for a model file" in err
    assert f"the limit is {MAX_FILE_BYTES} bytes" in err


def test_view_refuses_a_1_gb_model_file_without_reading_it(folders, capsys, monkeypatch):
    monkeypatch.setattr("modemap.app.cli._tty", lambda stream: True)  # as if in a terminal
    model = folders["model"] / "model.json"
    _sparse_file(model, 2**30)
    err = refused(capsys, ["view", str(folders["model"])], watch=[folders["out"]])
    assert "is too large for a model file" in err


# --------------------------------------------------------------------------- options

FIT_OPTIONS = [
    # (options, fragment naming the option as typed)
    (["--seed", "-1"], "--seed must be an integer in [0, 4294967295], got -1"),
    (["--seed", "4294967296"], "--seed must be an integer in [0, 4294967295], got 4294967296"),
    (["--threshold", "inf"], "--threshold: expected 'auto' or a finite number >= 0, got 'inf'"),
    (["--threshold", "nan"], "--threshold: expected 'auto' or a finite number >= 0, got 'nan'"),
    (["--threshold", "-0.5"], "--threshold: expected 'auto' or a finite number >= 0, got '-0.5'"),
    (["--max-regimes", "0"], "--max-regimes must be an integer >= 1, got 0"),
    (["--regimes", "0"], "--regimes: expected 'auto' or a positive whole number, got '0'"),
    (["--regimes", "1e3"], "--regimes: expected 'auto' or a positive whole number, got '1e3'"),
    (
        ["--regimes", "9" * 30],
        "asked for, but the 40 samples hold at most 4 regime(s)",
    ),
    (["--min-dwell", "0"], "--min-dwell must be an integer >= 1, got 0"),
    (["--min-regime-samples", "-3"], "--min-regime-samples must be an integer >= 1, got -3"),
    (["--max-degree", "99"], "--max-degree must be an integer in [1, 10], got 99"),
    (["--degree", "11"], "--degree must be one of 'auto' or an integer in [0, 10], got 11"),
    (["--min-samples", "0"], "--min-samples must be a whole number >= 2, got 0"),
]


@pytest.mark.parametrize(("options", "fragment"), FIT_OPTIONS, ids=lambda v: " ".join(v)[:30])
def test_fit_refuses_an_out_of_range_option(options, fragment, folders, capsys):
    data = folders["data"] / "ramp.csv"
    argv = ["fit", str(data), "--time", "t", "--run", "run", "--states", "x", "--quiet"]
    err = refused(capsys, [*argv, *options, "--out", str(folders["out"])], watch=folders.values())
    assert fragment in err


# argparse's own refusals end the process (SystemExit), so these run as a child process
PARSER_OPTIONS = [
    (["--seed", "abc"], "argument --seed: expected a whole number, got 'abc'"),
    (["--seed", "1.5"], "argument --seed: expected a whole number, got '1.5'"),
    (["--holdout", "-0.1"], "argument --holdout: expected a number in [0, 1), got -0.1"),
    (["--holdout", "1"], "argument --holdout: expected a number in [0, 1), got 1"),
    (["--holdout", "nan"], "argument --holdout: expected a number in [0, 1), got nan"),
    (
        ["--holdout", "a quarter"],
        "argument --holdout: expected a number in [0, 1), got 'a quarter'",
    ),
    (["--max-regimes", "six"], "argument --max-regimes: expected a whole number, got 'six'"),
    (["--degree", "-1"], "argument --degree: expected 'auto' or a whole number >= 0, got -1"),
    (["--max-gap", "inf"], "argument --max-gap: must be larger than 1 and finite, got inf"),
    (["--max-gap", "nan"], "argument --max-gap: must be larger than 1 and finite, got nan"),
    (["--min-samples", "8.5"], "argument --min-samples: expected a whole number, got '8.5'"),
    (["--form", "hybrid"], "argument --form: invalid choice: 'hybrid'"),
]


@pytest.mark.parametrize(("options", "fragment"), PARSER_OPTIONS, ids=lambda v: " ".join(v)[:30])
def test_fit_refuses_a_mistyped_option_in_one_line(options, fragment, folders):
    data = folders["data"] / "ramp.csv"
    argv = ["fit", str(data), "--time", "t", "--run", "run", "--states", "x", "--quiet"]
    err = refused_in_process(
        [*argv, *options, "--out", str(folders["out"])], watch=folders.values(), timeout=120
    )
    assert fragment in err and err.rstrip().endswith("(see 'modemap fit --help')")


@pytest.mark.parametrize(
    ("regime", "fragment"),
    [("7", "--regime 7: "), ("-1", "--regime -1: ")],
    ids=["unknown", "negative"],
)
def test_simulate_refuses_an_initial_regime_the_model_lacks(regime, fragment, folders, capsys):
    model = folders["model"] / "model.json"
    save_model(small_model(), model)
    argv = ["simulate", str(model), str(folders["data"] / "grid.csv"), "--time", "t"]
    argv += ["--regime", regime, "--out", str(folders["out"] / "sim.csv")]
    err = refused(capsys, argv, watch=folders.values())
    assert fragment in err and "has no such regime (its regimes: 0, 1)" in err
