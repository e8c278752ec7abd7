"""Malformed-input corpus: the output folder, re-simulation that would not end, and the
dashboard without a terminal (harness: tests/hostile.py).

Each case is one hostile situation.  The harness asserts exit code 2, one line on
stderr, no traceback and the watched folders unchanged byte for byte; each case adds
the fragments its message must contain (the file, run, option or reason).  Cases that
hung before these checks existed, or that need a real stdin/stdout, run as a child
process with a time limit (``refused_in_process``).
"""

from __future__ import annotations

import os
from collections.abc import Callable
from dataclasses import dataclass
from pathlib import Path

import numpy as np
import pytest

from hostile import refused, refused_in_process
from modemap._atomic import WORK_FOLDER
from modemap.model.hybrid import Guard, HybridModel, RegimeModel
from modemap.model.modelfile import save_model

# A small valid data file for `fit`: the refusals below happen before any fitting.
DATA = "t,x\n" + "".join(f"{0.1 * k:.1f},{np.sin(0.1 * k):.6f}\n" for k in range(40))
RESULTS = {
    "model.json": '{"earlier": true}\n',
    "labels.csv": "run,time,regime\n",
    "report.md": "#\n",
}


def regime(rid: int, terms: list[str], coef) -> RegimeModel:
    c = np.asarray(coef, dtype=float).reshape(len(terms), -1)
    return RegimeModel(
        id=rid, samples=0, terms=terms, coefficients=c, stderr=0 * c, noise_cov=np.eye(c.shape[1])
    )


def model_file(folder: Path, model: HybridModel, name: str = "model.json") -> Path:
    folder.mkdir(exist_ok=True)
    save_model(model, folder / name)
    return folder / name


def grid_file(folder: Path, time: np.ndarray, states: dict[str, float]) -> Path:
    names = list(states)
    lines = ["t," + ",".join(names)]
    lines += [f"{float(v)!r}," + ",".join(str(states[s]) for s in names) for v in time]
    path = folder / "grid.csv"
    path.write_text("\n".join(lines) + "\n")
    return path


def results_folder(tmp_path: Path) -> Path:
    out = tmp_path / "results"
    out.mkdir()
    for name, text in RESULTS.items():
        (out / name).write_text(text)
    return out


@dataclass
class Case:
    """``build(tmp_path) -> (argv, watched folders)``; ``fragments`` must be in the message."""

    build: Callable[[Path], tuple[list[str], list[Path]]]
    fragments: tuple[str, ...]
    child: bool = False  # run as a child process (could hang, or needs real stdin/stdout)


# -------------------------------------------------------------------- the output folder


def _fit(tmp_path: Path, out: str | Path) -> list[str]:
    data = tmp_path / "data" / "log.csv"
    data.parent.mkdir(exist_ok=True)
    data.write_text(DATA)
    return ["fit", str(data), "--time", "t", "--states", "x", "--out", str(out)]


def folder_at_report_md(tmp_path):
    out = results_folder(tmp_path)
    (out / "report.md").unlink()
    (out / "report.md").mkdir()
    (out / "report.md" / "mine.txt").write_text("keep me")
    return _fit(tmp_path, out), [out, tmp_path / "data"]


def input_named_labels_csv(tmp_path):
    folder = tmp_path / "logs"
    folder.mkdir()
    (folder / "labels.csv").write_text(DATA)
    argv = ["fit", str(folder / "labels.csv"), "--time", "t", "--states", "x", "--out", str(folder)]
    return argv, [folder]


def input_hard_linked_as_model_json(tmp_path):
    argv = _fit(tmp_path, tmp_path / "out")
    (tmp_path / "out").mkdir()
    os.link(tmp_path / "data" / "log.csv", tmp_path / "out" / "model.json")
    return argv, [tmp_path / "out", tmp_path / "data"]


def empty_out(tmp_path):
    return _fit(tmp_path, ""), [tmp_path / "data"]


def blank_out(tmp_path):
    return _fit(tmp_path, "   "), [tmp_path / "data"]


def out_is_a_file(tmp_path):
    (tmp_path / "taken").write_text("a file, not a folder")
    return _fit(tmp_path, tmp_path / "taken"), [tmp_path]


def fit_view_without_terminal(tmp_path):
    out = results_folder(tmp_path)
    return [*_fit(tmp_path, out), "--view"], [out, tmp_path / "data"]


# ---------------------------------------------------------------------- re-simulation


def _simulate(tmp_path: Path, model: HybridModel, time, states, *extra) -> tuple[list, list]:
    folder = tmp_path / "model"
    path = model_file(folder, model)
    grid = grid_file(tmp_path, np.asarray(time, float), states)
    out = tmp_path / "sims"
    out.mkdir()
    (out / "keep.csv").write_text("earlier simulation\n")
    argv = ["simulate", str(path), str(grid), "--out", str(out / "keep.csv"), *extra]
    return argv, [out, folder]


def blowup_without_data_range(tmp_path):
    # x' = x^2 from 1 blows up at t = 1; the model file has no data range
    model = HybridModel(
        states=["x"], inputs=[], form="continuous", regimes=[regime(0, ["x^2"], [1.0])]
    )
    return _simulate(tmp_path, model, np.linspace(0, 2, 41), {"x": 1.0})


def linear_blowup_without_data_range(tmp_path):
    # x' = x (exact steps) from 1 leaves the default box 1 +- 1e6 at t = ln(1e6 + 1) ~ 13.8,
    # seen at the next sample of the grid (t = 14)
    model = HybridModel(states=["x"], inputs=[], form="continuous", regimes=[regime(0, ["x"], [1])])
    return _simulate(tmp_path, model, np.linspace(0, 100, 201), {"x": 1.0})


def _oscillator(omega: float, step: float = float("nan")) -> HybridModel:
    reg = regime(0, ["x", "y", "x^2"], [[0, omega], [-omega, 0], [0, 0]])
    return HybridModel(
        states=["x", "y"], inputs=[], form="continuous", regimes=[reg], step=step,
        data_range={"x": (-1.0, 1.0), "y": (-1.0, 1.0)},
    )  # fmt: skip


def fast_oscillator_long_horizon(tmp_path):
    return _simulate(tmp_path, _oscillator(1e6), np.linspace(0, 1000, 11), {"x": 1.0, "y": 0.0})


def tiny_steps_with_model_step(tmp_path):
    return _simulate(
        tmp_path, _oscillator(1.0, step=0.1), np.arange(50) * 1e-300, {"x": 1.0, "y": 0.0}
    )


def _cycle(form: str, n_regimes: int) -> HybridModel:
    # k -> k + 1 (mod K), all on the same condition x > -1: every guard fires at once
    regs = [regime(k, ["1", "x^2"], [1.0, 0.0]) for k in range(n_regimes)]
    guards = [Guard(k, (k + 1) % n_regimes, ["x"], np.array([1.0]), 1.0) for k in range(n_regimes)]
    return HybridModel(
        states=["x"], inputs=[], form=form, regimes=regs, guards=guards, step=1.0,
        data_range={"x": (-1.0, 1.0)},
    )  # fmt: skip


def guard_cycle_continuous(tmp_path):
    return _simulate(tmp_path, _cycle("continuous", 2), np.arange(10.0), {"x": 0.0})


def guard_cycle_of_three_discrete(tmp_path):
    return _simulate(tmp_path, _cycle("discrete", 3), np.arange(10.0), {"x": 0.0})


def chattering_thermostat(tmp_path):
    heat, cool = regime(0, ["1", "T"], [8.0, -0.1]), regime(1, ["1", "T"], [2.0, -0.1])
    guards = [
        Guard(0, 1, ["T"], np.array([1.0]), -60.01),
        Guard(1, 0, ["T"], np.array([-1.0]), 59.99),
    ]
    model = HybridModel(
        states=["T"], inputs=[], form="continuous", regimes=[heat, cool], guards=guards,
        data_range={"T": (20.0, 80.0)},
    )  # fmt: skip
    return _simulate(tmp_path, model, np.linspace(0, 10, 101), {"T": 59.0})


def damaged_journal_beside_the_model(tmp_path):
    model = HybridModel(
        states=["x"], inputs=[], form="continuous", regimes=[regime(0, ["x"], [-1])]
    )
    argv, watch = _simulate(tmp_path, model, np.arange(10.0), {"x": 1.0})
    (tmp_path / "model" / WORK_FOLDER).mkdir()
    (tmp_path / "model" / WORK_FOLDER / "journal.json").write_text("{cut sh")
    return argv, watch


# ------------------------------------------------------------------------ the dashboard


def view_folder_through_pipes(tmp_path):
    out = results_folder(tmp_path)
    return ["view", str(out)], [out]


def view_data_through_pipes(tmp_path):
    argv = _fit(tmp_path, tmp_path / "unused")
    return ["view", argv[1], "--time", "t", "--states", "x"], [tmp_path / "data"]


def view_with_an_interrupted_write_and_no_terminal(tmp_path):
    # refused before anything is read or repaired: the folder stays as the kill left it
    out = results_folder(tmp_path)
    (out / WORK_FOLDER / "new").mkdir(parents=True)
    (out / WORK_FOLDER / "new" / "model.json").write_text("{}")
    return ["view", str(out)], [out]


CASES = {
    "folder where report.md goes": Case(
        folder_at_report_md, ("report.md: is a folder where a result file goes",)
    ),
    "input named labels.csv in --out": Case(
        input_named_labels_csv, ("labels.csv: is an input of this run",)
    ),
    "input hard-linked as model.json": Case(
        input_hard_linked_as_model_json, ("model.json: is an input of this run",)
    ),
    "empty --out": Case(empty_out, ("--out", "empty name")),
    "blank --out": Case(blank_out, ("--out", "empty name")),
    "--out is a file": Case(out_is_a_file, ("taken: exists and is not a folder",)),
    "fit --view without a terminal": Case(
        fit_view_without_terminal, ("fit --view", "needs a terminal", "stdin"), child=True
    ),
    "blow-up, no data range": Case(
        blowup_without_data_range,
        ("model.json: run '0'", "blow-up", "nothing written"),
        child=True,
    ),
    "linear blow-up, no data range": Case(
        linear_blowup_without_data_range,
        ("run '0'", "stopped at t=14:", "blow-up"),
        child=True,
    ),
    "fast oscillator, long horizon": Case(
        fast_oscillator_long_horizon, ("run '0'", "step budget", "max_nfev"), child=True
    ),
    "steps of 1e-300": Case(  # refused by the reader before the simulator sees the grid
        tiny_steps_with_model_step,
        ("grid.csv, column 't', row 3", "too small to resolve in double precision"),
        child=True,
    ),
    "guard cycle at one instant": Case(
        guard_cycle_continuous, ("switching loop at one instant", "0 -> 1 -> 0"), child=True
    ),
    "guard cycle of three, discrete": Case(
        guard_cycle_of_three_discrete, ("switching loop", "0 -> 1 -> 2 -> 0"), child=True
    ),
    "chattering": Case(chattering_thermostat, ("run '0'", "chattering"), child=True),
    "damaged journal beside the model": Case(
        damaged_journal_beside_the_model, ("journal.json: damaged journal",)
    ),
    "view folder through pipes": Case(
        view_folder_through_pipes,
        ("view: the dashboard needs a terminal", "stdin and stdout"),
        child=True,
    ),
    "view data through pipes": Case(
        view_data_through_pipes, ("view", "needs a terminal"), child=True
    ),
    "view of an interrupted write without terminal": Case(
        view_with_an_interrupted_write_and_no_terminal, ("needs a terminal",), child=True
    ),
}


@pytest.mark.parametrize("name", list(CASES))
def test_refused(name, tmp_path, capsys):
    case = CASES[name]
    argv, watch = case.build(tmp_path)
    if case.child:
        err = refused_in_process(argv, watch=watch, timeout=60)
    else:
        err = refused(capsys, argv, watch=watch)
    for fragment in case.fragments:
        assert fragment in err, (fragment, err)


def test_view_with_stdin_a_terminal_but_stdout_not(tmp_path, capsys, monkeypatch):
    # stdout captured (not a terminal), stdin pretending to be one
    class Keyboard:
        def isatty(self) -> bool:
            return True

    monkeypatch.setattr("sys.stdin", Keyboard())
    out = results_folder(tmp_path)
    err = refused(capsys, ["view", str(out)], watch=[out])
    assert "but stdout is not one" in err


# ------------------------------------------------ what is accepted beside the refusals


def test_partial_writes_the_samples_up_to_the_stop(tmp_path, capsys):
    from modemap.app.cli import main

    argv, _ = blowup_without_data_range(tmp_path)
    assert main([*argv, "--partial"]) == 0
    out, err = capsys.readouterr()
    assert "1 stopped early" in out
    assert err.startswith("modemap: warning: run '0': stopped at t=") and err.count("\n") == 1
    sim = np.genfromtxt(tmp_path / "sims" / "keep.csv", delimiter=",", names=True)
    reached = np.isfinite(sim["x"])
    # 1 / (1 - t) (common practice) until the stop (the solver's relative error grows
    # towards the singularity at t = 1), then NaN states and regime -1
    np.testing.assert_allclose(sim["x"][reached], 1 / (1 - sim["time"][reached]), rtol=1e-3)
    assert not reached[-1] and np.all(sim["regime"][~reached] == -1)


def test_simulate_puts_back_the_earlier_model_after_a_cut_short_write(tmp_path, capsys):
    # a kill after model.json was swapped: the new one in place, the earlier one aside
    from modemap.app.cli import main

    model = HybridModel(
        states=["x"], inputs=[], form="continuous", regimes=[regime(0, ["x"], [-1])]
    )
    folder = tmp_path / "results"
    work = folder / WORK_FOLDER
    (work / "new").mkdir(parents=True)
    (work / "old").mkdir()
    model_file(work / "old", model)
    (folder / "model.json").write_text("{half of a new model")
    (work / "journal.json").write_text(
        '{"format": 1, "phase": "swap", "files": ["model.json", "labels.csv", "report.md"]}'
    )
    grid = grid_file(tmp_path, np.arange(10.0), {"x": 1.0})
    sim_csv = tmp_path / "s.csv"
    code = main(["simulate", str(folder / "model.json"), str(grid), "--out", str(sim_csv)])
    assert code == 0, capsys.readouterr().err
    assert sorted(p.name for p in folder.iterdir()) == ["model.json"]
    sim = np.genfromtxt(sim_csv, delimiter=",", names=True)
    np.testing.assert_allclose(sim["x"], np.exp(-np.arange(10.0)), rtol=1e-5)  # x' = -x
