"""Harness of the malformed-input corpus (``tests/test_hostile_*.py``).

Every case of the corpus is held to the promise of the README: the command exits with
code 2, prints exactly one line on stderr (``modemap: error: ...``) and no traceback,
and the folders it was pointed at hold byte for byte what they held before.  The rule
is common practice for Unix command-line tools (exit status 2 for usage and input
errors, as argparse and grep use it).

Two ways to run a case:

- :func:`refused` calls ``main(argv)`` in this process (fast; most cases);
- :func:`refused_in_process` runs ``python -m modemap`` as a child with a time limit, for
  cases that could hang or that need a real stdin/stdout (a hang fails the test instead
  of stalling the suite).
"""

from __future__ import annotations

import os
import subprocess
import sys
from collections.abc import Iterable, Sequence
from pathlib import Path

from modemap.app.cli import main

__all__ = ["folder_state", "refused", "refused_in_process"]


def folder_state(folders: Iterable[str | os.PathLike[str]]) -> dict[str, bytes]:
    """Every file under ``folders`` (recursively, hidden ones included) and its bytes."""
    state: dict[str, bytes] = {}
    for folder in folders:
        root = Path(folder)
        if not root.exists():
            state[str(root)] = b"<absent>"
            continue
        for path in sorted(root.rglob("*")):
            if path.is_file():
                state[str(path)] = path.read_bytes()
            elif path.is_dir():
                state[str(path) + "/"] = b"<folder>"
    return state


def _check(code: int, out: str, err: str, before: dict, watch: Sequence) -> str:
    assert code == 2, (code, err)
    assert "Traceback" not in err, err
    assert err.startswith("modemap: error: "), err
    assert err.count("\n") == 1, err
    assert folder_state(watch) == before, "a watched folder changed"
    return err


def refused(capsys, argv: Sequence[str], *, watch: Sequence[str | os.PathLike[str]] = ()) -> str:
    """Run ``main(argv)`` in this process and assert a clean refusal; return stderr.

    ``watch`` lists folders that must be unchanged afterwards (the output folder, the
    folder of the input files).  Standard output must be empty.
    """
    before = folder_state(watch)
    code = main(list(argv))
    out, err = capsys.readouterr()
    assert out == "", out
    return _check(code, out, err, before, watch)


def refused_in_process(
    argv: Sequence[str],
    *,
    watch: Sequence[str | os.PathLike[str]] = (),
    timeout: float = 60.0,
    stdin: bytes | None = None,
    cwd: str | os.PathLike[str] | None = None,
) -> str:
    """Run ``python -m modemap argv`` as a child process with a time limit; assert a
    clean refusal and return stderr.  ``subprocess.TimeoutExpired`` (a hang) fails."""
    before = folder_state(watch)
    proc = subprocess.run(
        [sys.executable, "-m", "modemap", *argv],
        input=stdin if stdin is not None else b"",
        capture_output=True,
        timeout=timeout,
        cwd=cwd,
        env={**os.environ, "NO_COLOR": "1"},
    )
    err = proc.stderr.decode("utf-8", "replace")
    return _check(proc.returncode, proc.stdout.decode(), err, before, watch)
