"""Results written as a unit (modemap._atomic.write_file_set, modemap.report.output).

Fault injection: a rename that fails at each step of the swap, a folder that takes a
result file's name, and a real kill (SIGKILL of a child process) at each step.  After
each, the output folder must hold the complete earlier set or the complete new set
(once the interrupted write is recovered), and the next write cleans up.  The
all-or-nothing rule for a group of renames is common practice for journalled updates.
"""

from __future__ import annotations

import os
import signal
import subprocess
import sys
import textwrap
from pathlib import Path

import numpy as np
import pandas as pd
import pytest

from modemap import ModemapError
from modemap._atomic import WORK_FOLDER, recover_file_set, write_file_set
from modemap.model.hybrid import HybridModel, RegimeModel
from modemap.report.output import RESULT_FILES, recover_output_folder, write_fit_outputs

OLD = {name: f"earlier {name}\n" for name in RESULT_FILES}
NEW = {name: f"new {name}\n" for name in RESULT_FILES}

# os.replace calls of one write into a folder holding a complete earlier set:
# journal "swap", then (earlier aside, new in) per file, then journal "done"
N_REPLACE = 1 + 2 * len(RESULT_FILES) + 1


def contents(folder: Path) -> dict[str, str]:
    """Every entry of ``folder`` (hidden ones too) -> its text, or '<folder>'."""
    return {p.name: "<folder>" if p.is_dir() else p.read_text() for p in sorted(folder.iterdir())}


def earlier_set(tmp_path: Path) -> Path:
    out = tmp_path / "out"
    out.mkdir()
    for name, text in OLD.items():
        (out / name).write_text(text)
    return out


def fail_on_call(monkeypatch, n: int, action=None) -> list:
    """Make the n-th ``os.replace`` call fail (after ``action(src, dst)`` if given)."""
    calls = []
    real = os.replace

    def replace(src, dst, *args, **kwargs):
        calls.append((str(src), str(dst)))
        if len(calls) == n:
            if action is not None:
                action(src, dst)
            raise OSError(28, "No space left on device", str(dst))
        return real(src, dst, *args, **kwargs)

    monkeypatch.setattr(os, "replace", replace)
    return calls


def test_a_write_replaces_the_whole_set_and_leaves_no_temporaries(tmp_path):
    out = earlier_set(tmp_path)
    paths = write_file_set(out, NEW)
    assert [p.name for p in paths] == list(RESULT_FILES)
    assert contents(out) == NEW


@pytest.mark.parametrize("n", range(1, N_REPLACE + 1))
def test_a_rename_failing_at_any_step_leaves_the_earlier_set(tmp_path, monkeypatch, n):
    out = earlier_set(tmp_path)
    calls = fail_on_call(monkeypatch, n)
    with pytest.raises(ModemapError, match=r"results not written.*No space left"):
        write_file_set(out, NEW)
    assert len(calls) >= n
    assert contents(out) == OLD  # nothing mixed, no work folder left


def test_second_and_third_file_failing_in_a_fresh_folder_leave_it_empty(tmp_path, monkeypatch):
    # no earlier set: the swap is journal, model in, labels in, report in, journal
    for n in (3, 4):
        out = tmp_path / f"fresh{n}"
        fail_on_call(monkeypatch, n)
        with pytest.raises(ModemapError):
            write_file_set(out, NEW)
        monkeypatch.undo()
        assert contents(out) == {}


def test_a_folder_where_report_md_goes_is_refused_before_anything_moves(tmp_path):
    out = earlier_set(tmp_path)
    (out / "report.md").unlink()
    (out / "report.md").mkdir()
    (out / "report.md" / "notes.txt").write_text("mine")
    before = contents(out)
    with pytest.raises(ModemapError, match=r"report\.md: is a folder where a result file goes"):
        write_file_set(out, NEW)
    assert contents(out) == before and (out / "report.md" / "notes.txt").read_text() == "mine"


def test_a_folder_appearing_at_report_md_during_the_swap_rolls_back(tmp_path, monkeypatch):
    # the earlier set has no report.md; a folder takes that name just as the new report
    # is renamed: the earlier model.json and labels.csv come back, the folder is untouched
    out = tmp_path / "out"
    out.mkdir()
    for name in ("model.json", "labels.csv"):
        (out / name).write_text(OLD[name])

    def intrude(src, dst):
        Path(dst).mkdir()

    # journal, model aside, model in, labels aside, labels in, report in (6th)
    fail_on_call(monkeypatch, 6, intrude)
    with pytest.raises(ModemapError, match="results not written"):
        write_file_set(out, NEW)
    assert contents(out) == {
        "labels.csv": OLD["labels.csv"],
        "model.json": OLD["model.json"],
        "report.md": "<folder>",
    }


_CHILD = textwrap.dedent(
    """
    import os, signal, sys
    from modemap._atomic import write_file_set

    out, kind, n = sys.argv[1], sys.argv[2], int(sys.argv[3])
    real = getattr(os, kind)
    calls = 0

    def hooked(*args, **kwargs):
        global calls
        calls += 1
        if calls == n:
            os.kill(os.getpid(), signal.SIGKILL)  # a real kill, between two files
        return real(*args, **kwargs)

    setattr(os, kind, hooked)
    names = ("model.json", "labels.csv", "report.md")
    write_file_set(out, {name: f"new {name}\\n" for name in names})
    """
)


def _kill_points() -> list[tuple[str, int, str, dict]]:
    """(call hooked, which call, what recovery finds, the folder afterwards).

    ``os.fsync`` calls of one write: 3 staged files and the staging folder (1-4), the
    journal "swap" and its folder (5, 6), the journal "done" and its folder (7, 8),
    the output folder (9).  ``os.replace``: the journal "swap" (1), then per file the
    earlier file aside and the new one in (2-7), then the journal "done" (8)."""
    points = [("fsync", n, "cleaned", OLD) for n in (1, 2, 3, 4, 5)]
    points += [("fsync", n, "rolled back", OLD) for n in (6, 7)]
    points += [("fsync", n, "cleaned", NEW) for n in (8, 9)]
    points += [("replace", 1, "cleaned", OLD)]
    points += [("replace", n, "rolled back", OLD) for n in range(2, N_REPLACE + 1)]
    return points


@pytest.mark.parametrize(("kind", "n", "found", "folder"), _kill_points())
def test_a_kill_between_files_is_undone_or_finished_on_recovery(tmp_path, kind, n, found, folder):
    out = earlier_set(tmp_path)
    script = tmp_path / "child.py"
    script.write_text(_CHILD)
    env = {**os.environ, "PYTHONPATH": os.pathsep.join(sys.path)}
    proc = subprocess.run(
        [sys.executable, str(script), str(out), kind, str(n)], env=env, capture_output=True,
        timeout=60,
    )  # fmt: skip
    assert proc.returncode == -signal.SIGKILL, proc.stderr.decode()
    assert (out / WORK_FOLDER).is_dir()  # the kill left its work behind
    assert recover_file_set(out) == found
    assert contents(out) == folder  # complete earlier set or complete new set
    assert recover_file_set(out) == "none"


def test_the_next_write_after_a_kill_cleans_up(tmp_path):
    out = earlier_set(tmp_path)
    script = tmp_path / "child.py"
    script.write_text(_CHILD)
    env = {**os.environ, "PYTHONPATH": os.pathsep.join(sys.path)}
    proc = subprocess.run(
        [sys.executable, str(script), str(out), "replace", "4"], env=env, timeout=60
    )
    assert proc.returncode == -signal.SIGKILL
    assert (out / "model.json").read_text() == NEW["model.json"]  # mixed until recovered
    third = {name: f"third {name}\n" for name in RESULT_FILES}
    write_file_set(out, third)
    assert contents(out) == third


def test_a_damaged_journal_is_reported_not_guessed(tmp_path):
    out = earlier_set(tmp_path)
    (out / WORK_FOLDER).mkdir()
    (out / WORK_FOLDER / "journal.json").write_text("{not json")
    with pytest.raises(ModemapError, match="damaged journal"):
        write_file_set(out, NEW)
    assert (out / "model.json").read_text() == OLD["model.json"]


def tiny_model() -> HybridModel:
    c = np.array([[-1.0]])
    reg = RegimeModel(
        id=0, samples=10, terms=["x"], coefficients=c, stderr=0 * c, noise_cov=np.eye(1)
    )
    return HybridModel(
        states=["x"], inputs=[], form="continuous", regimes=[reg], data_range={"x": (0.0, 1.0)}
    )


def test_fit_outputs_clean_stale_temporaries_and_recover(tmp_path):
    out = earlier_set(tmp_path)
    (out / ".model.json.abc123.tmp").write_text("left by a killed single-file write")
    (out / WORK_FOLDER).mkdir()  # a kill while staging: no journal
    labels = pd.DataFrame({"run": ["a"] * 3, "time": [0.0, 1.0, 2.0], "regime": [0, 0, 0]})
    assert recover_output_folder(out) == "cleaned"
    write_fit_outputs(out, tiny_model(), labels)
    assert sorted(p.name for p in out.iterdir()) == sorted(RESULT_FILES)
    assert '"format"' in (out / "model.json").read_text()
    assert recover_output_folder(tmp_path / "absent") == "none"
