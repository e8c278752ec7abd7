"""Tests of the ``modemap`` command line (``check`` and the shared error handling).

Exit codes follow common practice for Unix tools: 0 success, 2 usage or input error (also
argparse's own code), 130 = 128 + SIGINT for an interrupt.  Expected numbers come from the
data each test writes.
"""

from __future__ import annotations

import json
import subprocess
import sys

import numpy as np
import pandas as pd
import pytest

import modemap
from modemap.app import cli, cli_data
from modemap.app.cli import main


def _lines(n: int, row) -> list[str]:
    return [row(k) for k in range(n)]


def _csv(header: str, rows: list[str]) -> str:
    return "\n".join([header, *rows]) + "\n"


GOOD = _csv("t [s],x [m],u", _lines(10, lambda k: f"{k / 10:g},{k * k},{k % 2}"))


def _fail(capsys, argv: list[str]) -> str:
    """Run ``main(argv)``, assert a one-line user error with exit 2; return the message."""
    code = main(argv)
    out, err = capsys.readouterr()
    assert code == 2
    assert "Traceback" not in err and out == ""
    assert err.startswith("modemap: error: ") and err.count("\n") == 1
    return err


def _with_row(k: int, text: str, base: str = GOOD) -> str:
    """``base`` with file row ``k`` (header = row 1) replaced by ``text``."""
    lines = base.splitlines()
    lines[k - 1] = text
    return "\n".join(lines) + "\n"


# Each case: file name, content, extra arguments, fragments the message must contain.
# The rules are common practice for logged time series; the row numbers are those a text
# editor shows (header = row 1).
CASES = {
    "missing column": (
        "a.csv", GOOD, ["--states", "y"], ["a.csv", "column 'y'", "no such column", "'x [m]'"],
    ),
    "duplicated header": (
        "dup.csv", _csv("t,x,x", _lines(9, lambda k: f"{k},{k},{k}")), ["--states", "x"],
        ["dup.csv", "column 'x'", "not unique"],
    ),
    "named twice": (
        "a.csv", GOOD, ["--states", "x", "--inputs", "x [m]"], ["a.csv", "named twice"],
    ),
    "non-numeric": (
        "a.csv", _with_row(5, "0.3,abc,1"), ["--states", "x"],
        ["a.csv", "column 'x [m]'", "row 5", "non-numeric value 'abc'"],
    ),
    "empty cell": (
        "a.csv", _with_row(7, "0.5,,1"), ["--states", "x"],
        ["a.csv", "column 'x [m]'", "row 7", "empty or NaN cell"],
    ),
    "nan": (
        "a.csv", _with_row(3, "0.1,NaN,1"), ["--states", "x"], ["column 'x [m]'", "row 3", "NaN"],
    ),
    "inf": (
        "a.csv", _with_row(4, "0.2,inf,1"), ["--states", "x"],
        ["column 'x [m]'", "row 4", "non-finite value 'inf'"],
    ),
    "time backwards": (
        "a.csv", _with_row(6, "0.1,16,0"), ["--states", "x"],
        ["column 't [s]'", "row 6", "not strictly increasing", "(row 5)"],
    ),
    "duplicated stamp": (
        "a.csv", _with_row(6, "0.3,16,0"), ["--states", "x"],
        ["column 't [s]'", "row 6", "duplicated time stamp 0.3", "same as row 5"],
    ),
    "too short": (
        "a.csv", _csv("t,x", _lines(4, lambda k: f"{k},{k}")), [],
        ["a.csv", "has 4 samples (row 2 to row 5)", "at least 8"],
    ),
    "empty file": ("e.csv", "", [], ["e.csv", "the file is empty"]),
    "header only": ("h.csv", "t,x\n", [], ["h.csv", "no data rows"]),
    "unknown extension": ("a.xlsx", GOOD, [], ["a.xlsx", "unknown file type"]),
    "semicolons": (
        "s.csv", _csv("t;x", _lines(9, lambda k: f"{k};{k}")), ["--time", "t"],
        ["s.csv", "no numeric column left"],
    ),
    "no time column": (
        "n.csv", _csv("a,b", _lines(9, lambda k: f"{k},{k}")), [],
        ["n.csv", "no column named 'time' or 't'", "'a', 'b'"],
    ),
}  # fmt: skip


@pytest.mark.parametrize("case", CASES)
def test_invalid_files_give_one_line_errors(case, write_file, capsys):
    name, content, extra, fragments = CASES[case]
    path = write_file(name, content)
    err = _fail(capsys, ["check", str(path), *extra])
    for fragment in fragments:
        assert fragment in err, (fragment, err)


def test_semicolon_file_gets_a_separator_hint(write_file, capsys):
    path = write_file("s.csv", _csv("t;x", _lines(9, lambda k: f"{k};{k}")))
    err = _fail(capsys, ["check", str(path), "--time", "t", "--states", "x"])
    assert "seems to use ';' as separator" in err


def test_missing_file(tmp_path, capsys):
    err = _fail(capsys, ["check", str(tmp_path / "nowhere.csv")])
    assert "nowhere.csv: file not found" in err


def test_debug_shows_the_traceback(write_file, capsys):
    path = write_file("a.csv", GOOD)
    assert main(["--debug", "check", str(path), "--states", "nope"]) == 2
    assert "Traceback" in capsys.readouterr().err
    assert main(["check", str(path), "--states", "nope", "--debug"]) == 2
    assert "Traceback" in capsys.readouterr().err


def test_check_prints_a_readable_summary(write_file, capsys):
    text = _csv(
        "time [s],T [degC],q [kW]",
        _lines(10, lambda k: f"{k},{20 + k},1") + _lines(12, lambda k: f"{100 + k},{k},2"),
    )
    path = write_file("plant.csv", text)
    assert main(["check", str(path), "--inputs", "q"]) == 0
    out = capsys.readouterr().out
    assert "plant.csv (22 rows)" in out and "time [s], step 1 s" in out
    assert "2, 22 samples" in out  # runs split at the gap
    assert "0#1" in out and "0#2" in out
    cells = {ln.split()[0]: ln.split() for ln in out.splitlines() if ln.startswith("  ")}
    mean_t = (sum(range(20, 30)) + sum(range(12))) / 22
    assert cells["T"] == ["T", "state", "degC", "0", "29", f"{mean_t:.6g}"]
    assert cells["q"] == ["q", "input", "kW", "1", "2", f"{(10 + 24) / 22:.6g}"]
    assert "gaps      1" in out and "run '0': t=9 to 100 (91.0 steps)" in out
    assert "warnings  1" in out


def test_check_json_has_the_fields(write_file, capsys):
    a = write_file("one.csv", GOOD)
    b = write_file("two.csv", GOOD)
    assert main(["check", str(a), str(b), "--states", "x", "--inputs", "u", "--json"]) == 0
    summary = json.loads(capsys.readouterr().out)
    for key in ("runs", "samples", "step", "ranges", "gaps", "warnings", "resampled", "time"):
        assert key in summary
    assert [r["name"] for r in summary["runs"]] == ["one", "two"]
    assert summary["samples"] == 20 and summary["step"] == pytest.approx(0.1)
    x = np.array([k * k for k in range(10)], dtype=float)
    assert summary["ranges"]["x"] == {
        "role": "state", "unit": "m", "min": 0.0, "max": 81.0, "mean": pytest.approx(x.mean()),
    }  # fmt: skip
    assert summary["time"] == {"name": "t", "unit": "s"}


def test_check_defaults_states_to_numeric_columns(write_file, capsys):
    text = _csv("Time [s],a,label,b,u", _lines(9, lambda k: f"{k},{k},L{k},{2 * k},0"))
    path = write_file("d.csv", text)
    assert main(["check", str(path), "--inputs", "u", "--json"]) == 0
    summary = json.loads(capsys.readouterr().out)
    assert summary["states"] == ["a", "b"] and summary["inputs"] == ["u"]
    assert summary["time"]["name"] == "Time"


def test_time_guess_prefers_exact_case(write_file, capsys):
    # `T` is often a temperature; a lower-case `t` column is the time.
    path = write_file("c.csv", _csv("T,t,x", _lines(9, lambda k: f"{9 - k},{k},{k}")))
    assert main(["check", str(path), "--json"]) == 0
    summary = json.loads(capsys.readouterr().out)
    assert summary["time"]["name"] == "t" and summary["states"] == ["T", "x"]


def test_check_run_column_and_resample(tmp_path, capsys):
    rng = np.random.default_rng(7)
    t = np.cumsum(rng.uniform(0.5, 1.5, size=30))
    frame = pd.DataFrame(
        {"t": np.concatenate([t, t]), "x": np.arange(60.0), "id": [1] * 30 + [2] * 30}
    )
    path = tmp_path / "r.parquet"
    frame.to_parquet(path, index=False)
    assert main(["check", str(path), "--run", "id", "--json"]) == 0
    plain = json.loads(capsys.readouterr().out)
    assert [r["name"] for r in plain["runs"]] == ["1", "2"] and plain["resampled"] is False
    assert all("irregular sampling" in w for w in plain["warnings"])
    assert main(["check", str(path), "--run", "id", "--resample", "--json"]) == 0
    done = json.loads(capsys.readouterr().out)
    assert done["resampled"] is True and all("resampled" in w for w in done["warnings"])


def test_usage_errors_exit_2(capsys):
    with pytest.raises(SystemExit) as info:
        main(["check"])
    assert info.value.code == 2  # argparse's code for usage errors
    with pytest.raises(SystemExit) as info:
        main(["check", "a.csv", "--max-gap", "0.5"])
    assert info.value.code == 2 and "must be larger than 1" in capsys.readouterr().err


def test_version(capsys):
    with pytest.raises(SystemExit) as info:
        main(["--version"])
    assert (
        info.value.code == 0 and capsys.readouterr().out.strip() == f"modemap {modemap.__version__}"
    )


def test_interrupt_exits_130(monkeypatch, write_file, capsys):
    def interrupted(*args, **kwargs):
        raise KeyboardInterrupt

    monkeypatch.setattr(cli_data, "read_data", interrupted)
    assert main(["check", str(write_file("a.csv", GOOD)), "--states", "x"]) == 130
    assert capsys.readouterr().err == "modemap: interrupted\n"


def test_os_error_is_a_user_error(monkeypatch, write_file, capsys):
    def denied(*args, **kwargs):
        raise PermissionError(13, "Permission denied", "a.csv")

    monkeypatch.setattr(cli_data, "read_data", denied)
    err = _fail(capsys, ["check", str(write_file("a.csv", GOOD)), "--states", "x"])
    assert "a.csv: Permission denied" in err


def test_module_entry_point(write_file):
    path = write_file("a.csv", GOOD)
    proc = subprocess.run(
        [sys.executable, "-m", "modemap.app.cli", "check", str(path), "--states", "x", "--json"],
        capture_output=True, text=True, check=False, timeout=60,
    )  # fmt: skip
    assert proc.returncode == 0 and json.loads(proc.stdout)["samples"] == 10


def test_bench_workdir_that_cannot_be_a_folder_is_a_one_line_error(tmp_path, capsys):
    blocker = tmp_path / "afile"
    blocker.write_text("not a folder\n", encoding="utf-8")
    argv = ["bench", "--workdir", str(blocker / "sub"), "--sizes", "2000", "--skip-markov"]
    assert cli.main(argv) == 2
    err = capsys.readouterr().err.strip()
    assert len(err.splitlines()) == 1 and "Not a directory" in err and "Traceback" not in err


def _usage_error(capsys, argv: list[str]) -> str:
    with pytest.raises(SystemExit) as info:
        main(argv)
    assert info.value.code == 2  # argparse's code for usage errors (common practice)
    err = capsys.readouterr().err
    assert err.count("\n") == 1 and "Traceback" not in err
    return err


def test_mistyped_option_gets_a_suggestion_in_one_line(tmp_path, capsys):
    err = _usage_error(capsys, ["fit", "x.csv", "--sates", "a", "--out", str(tmp_path / "o")])
    assert "unrecognized argument --sates; did you mean --states?" in err
    assert "(see 'modemap fit --help')" in err
    err = _usage_error(capsys, ["fit", "x.csv", "--form", "hybrid", "--out", str(tmp_path)])
    assert "invalid choice: 'hybrid'" in err


@pytest.mark.parametrize("command", ["check", "fit", "simulate", "view", "bench"])
def test_every_command_help_has_an_example(command, capsys):
    with pytest.raises(SystemExit):
        main([command, "--help"])
    out = capsys.readouterr().out
    assert "examples:\n  modemap " + command in out


def test_view_of_a_missing_folder_says_not_found(tmp_path, capsys, monkeypatch):
    monkeypatch.setattr("modemap.app.cli._tty", lambda stream: True)  # as if in a terminal
    err = _fail(capsys, ["view", str(tmp_path / "nope_dir")])
    assert "nope_dir: not found" in err


@pytest.mark.parametrize(
    ("extra", "message"),
    [
        (["--seed", "-1"], "--seed must be an integer in [0, 4294967295], got -1"),
        (["--max-degree", "0"], "--max-degree must be an integer in [1, 10], got 0"),
        (["--min-regime-samples", "0"], "--min-regime-samples must be an integer >= 1, got 0"),
    ],
)
def test_out_of_range_options_are_named_as_typed(extra, message, write_file, tmp_path, capsys):
    path = write_file("good.csv", GOOD)
    err = _fail(
        capsys,
        ["fit", str(path), "--time", "t", "--states", "x", *extra, "--out", str(tmp_path / "o")],
    )
    assert message in err
