"""Malformed-input corpus, reading real logs: files that are not text or not tables, rows that
do not fit the header, time that double precision cannot resolve, bad reading options, units
rows and empty cells the chosen policy does not read (issue 15, items 2, 3 and 5).

Each case is held to the promise of the README through ``tests/hostile.py``: exit code 2, one
line on stderr, no traceback, the data folder and the output folder unchanged; each also
names what it is about (file, row, column or option).  The rules (one error line naming
file, row and column; exit status 2 for input errors) are common practice for command-line
tools.
"""

from __future__ import annotations

import gzip
import os
import time
from collections.abc import Callable
from pathlib import Path

import numpy as np
import pytest

from hostile import refused


def _lines(header: str, rows: list[str]) -> str:
    return "\n".join([header, *rows]) + "\n"


def _ramp(n: int = 20, fmt: Callable[[int], str] = lambda k: f"{k * 0.1:.1f},{k},{k % 3}"):
    return [fmt(k) for k in range(n)]


def _with_row(row: int, text: str, n: int = 20) -> str:
    """A good ``t,x,y`` file whose file row ``row`` (header = 1) is replaced by ``text``."""
    rows = _ramp(n)
    rows[row - 2] = text
    return _lines("t,x,y", rows)


def _empty_cell(row: int, column: int, n: int = 20) -> str:
    rows = [r.split(",") for r in _ramp(n)]
    rows[row - 2][column] = ""
    return _lines("t,x,y", [",".join(r) for r in rows])


def _times(values) -> str:
    return _lines("t,x", [f"{float(v)!r},{np.sin(k / 5):.6f}" for k, v in enumerate(values)])


def _stamps(texts: list[str]) -> str:
    return _lines("t,x", [f"{s},{k}" for k, s in enumerate(texts)])


_ISO = [f"2024-03-01T12:00:{k:02d}" for k in range(20)]
_SEMI = _lines("t;x;y", _ramp(fmt=lambda k: f"{k};{k},5;{k % 3}"))

# name -> (file name, content, extra argv, expected fragments)
CASES: dict[str, tuple[str, str | bytes, list[str], list[str]]] = {
    "row with an extra field": (
        "extra.csv", _with_row(6, "0.4,4,1,9"), [],
        ["extra.csv", "row 6", "4 fields", "header has 3"],
    ),
    "decimal comma shifts the fields": (
        "comma.csv", _with_row(9, "0.7,7,5,1"), [], ["row 9", "4 fields", "decimal comma"],
    ),
    "short row": (
        "short.csv", _with_row(5, "0.3,3"), [], ["row 5", "column 'y'", "2 fields"],
    ),
    "short row is not a missing value": (
        "short.csv", _with_row(5, "0.3,3"), ["--missing", "drop"], ["row 5", "column 'y'"],
    ),
    "extra field in a quoted file": (
        "quoted.csv", _lines('"t","x","y"', [*_ramp(5), '"0.5",5,"a,b",1']), [],
        ["row 7", "4 fields"],
    ),
    "binary bytes with NULs": (
        "image.csv", b"\x89PNG\r\n\x1a\n" + bytes(range(256)) * 64, [],
        ["image.csv", "not a text file"],
    ),
    "control characters, no NUL": (
        "ctrl.csv", bytes(range(1, 32)) * 2000, [], ["ctrl.csv", "control characters"],
    ),
    "UTF-16 text": ("wide.csv", _lines("t,x", _ramp(10, str)).encode("utf-16"), [], ["UTF-16"]),
    "NUL byte after a good start": (
        "late.csv", _lines("t,x,y", _ramp(10)) + "0.9,9,\x00\n", [], ["row 12", "NUL byte"],
    ),
    "not gzip inside .csv.gz": ("fake.csv.gz", _lines("t,x", _ramp(10, str)), [], ["fake.csv.gz"]),
    "one line longer than the first block": (
        "long.csv", "a" * (2 * 1024**2), [], ["long.csv", "no line end"],
    ),
    "empty file": ("empty.csv", "", [], ["empty.csv", "empty"]),
    "header only": ("head.csv", "t,x,y\n", ["--time", "t"], ["head.csv", "no data rows"]),
    "time steps of 1e-300": (
        "tiny.csv", _times(np.arange(20) * 1e-300), [],
        ["column 't'", "row 3", "too small to resolve"],
    ),
    "time stamps near 1e300": (
        "huge.csv", _times(1e300 + np.arange(20) * 1e290), [], ["column 't'", "row 2", "too large"],
    ),
    "steps below the resolution of the time values": (
        "ulp.csv", _times(1e9 + np.arange(20) * 1e-6), [], ["column 't'", "too small to resolve"],
    ),
    "unknown delimiter": ("a.csv", _lines("t,x,y", _ramp()), ["--delimiter", ":"], ["--delimiter"]),
    "bad decimal mark": ("a.csv", _lines("t,x,y", _ramp()), ["--decimal", ";"], ["--decimal"]),
    "decimal mark equal to the delimiter": (
        "a.csv", _lines("t,x,y", _ramp()), ["--decimal", ","], ["decimal mark", "delimiter"],
    ),
    "unknown missing-value policy": (
        "a.csv", _lines("t,x,y", _ramp()), ["--missing", "guess"],
        ["--missing", "'guess'", "interpolate"],
    ),
    "semicolon file read with commas": (
        "semi.csv", _SEMI, ["--time", "t", "--states", "x"], ["semi.csv", "';' as separator"],
    ),
    "decimal comma without --decimal": (
        "semi.csv", _SEMI, ["--delimiter", ";", "--states", "x,y"],
        ["column 'x'", "row 2", "decimal comma"],
    ),
    "units row not declared": (
        "units.csv", _lines("t,x,y", ["s,m,1/s", *_ramp()]), ["--states", "x,y"],
        ["column 't'", "row 2", "units row"],
    ),
    "units row with a field too few": (
        "units.csv", _lines("t,x,y", ["s,m", *_ramp()]), ["--units-row"],
        ["row 2", "units row has 2 fields"],
    ),
    "units row that holds data": (
        "units.csv", _lines("t,x,y", _ramp()), ["--units-row"], ["row 2", "holds numbers"],
    ),
    "units row contradicts the header": (
        "units.csv", _lines("t,x [m],y", ["s,cm,", *_ramp()]), ["--units-row"],
        ["column 'x'", "row 2", "[m]", "'cm'"],
    ),
    "empty cell refused by default": (
        "gap.csv", _empty_cell(7, 1), [], ["gap.csv", "column 'x'", "row 7", "empty"],
    ),
    "first empty cell named row by row": (
        "gap.csv", _empty_cell(9, 1).replace("\n0.4,4,1\n", "\n0.4,4,\n"), [],
        ["column 'y'", "row 6"],
    ),
    "interpolation at the start of a run": (
        "gap.csv", _empty_cell(2, 2), ["--missing", "interpolate"],
        ["column 'y'", "row 2", "start of run"],
    ),
    "interpolation at the end of a run": (
        "gap.csv", _empty_cell(21, 1), ["--missing", "interpolate"],
        ["column 'x'", "row 21", "end of run"],
    ),
    "interpolation without a time": (
        "gap.csv", _empty_cell(8, 0), ["--missing", "interpolate"],
        ["column 't'", "row 8", "empty time cell"],
    ),
    "dropping leaves too few samples": (
        "gap.csv", _lines("t,x", [f"{k},{'' if k % 2 else k}" for k in range(12)]),
        ["--missing", "drop"], ["gap.csv", "6 samples"],
    ),
    "infinite value under drop": (
        "inf.csv", _with_row(4, "0.2,inf,2"), ["--missing", "drop"], ["column 'x'", "row 4", "inf"],
    ),
    "mixed time formats": (
        "mixed.csv", _stamps([*_ISO[:10], "01/03/2024 12:00:10", *_ISO[11:]]), [],
        ["column 't'", "row 12", "ISO 8601"],
    ),
    "stamps with and without a zone": (
        "zones.csv", _stamps([*_ISO[:5], _ISO[5] + "+01:00", *_ISO[6:]]), [],
        ["column 't'", "row 7", "time zone"],
    ),
}  # fmt: skip


_FIT_CASES = (
    "row with an extra field",
    "binary bytes with NULs",
    "time steps of 1e-300",
    "time stamps near 1e300",
    "units row with a field too few",
    "interpolation at the start of a run",
    "mixed time formats",
)
_RUNS = [(case, "check") for case in CASES] + [(case, "fit") for case in _FIT_CASES]


@pytest.mark.parametrize(("case", "command"), _RUNS, ids=[f"{c} ({m})" for c, m in _RUNS])
def test_refused(case: str, command: str, tmp_path: Path, capsys) -> None:
    name, content, extra, fragments = CASES[case]
    data, out = tmp_path / "data", tmp_path / "out"
    data.mkdir()
    path = data / name
    if name.endswith(".gz") and case != "not gzip inside .csv.gz":
        path.write_bytes(gzip.compress(content.encode()))
    elif isinstance(content, bytes):
        path.write_bytes(content)
    else:
        path.write_text(content, encoding="utf-8", newline="")
    argv = [command, str(path), *extra] + (["--out", str(out)] if command == "fit" else [])
    err = refused(capsys, argv, watch=[data, out])
    for fragment in fragments:
        assert fragment in err, (fragment, err)


def test_two_gigabytes_of_nul_bytes_refused_at_once(tmp_path: Path, capsys) -> None:
    """A 2 GB file of NUL bytes named .csv (sparse: costs no disk) is refused after its
    first block, in well under a second."""
    data, out = tmp_path / "data", tmp_path / "out"
    data.mkdir()
    path = data / "zeros.csv"
    with open(path, "wb") as fh:
        fh.truncate(2 * 1024**3)
    assert os.path.getsize(path) == 2 * 1024**3
    (data / "warm.csv").write_text("")  # first call: imports, so the timing is the reading
    refused(capsys, ["fit", str(data / "warm.csv"), "--out", str(out)], watch=[out])
    start = time.perf_counter()
    err = refused(capsys, ["fit", str(path), "--out", str(out)], watch=[out])
    elapsed = time.perf_counter() - start
    assert "zeros.csv" in err and "not a text file" in err
    assert elapsed < 1.0, elapsed
