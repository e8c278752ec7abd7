"""The dashboard application and the entry points the command line calls.

The app is a thin layer over the library: it receives a fitted
:class:`~modemap.model.hybrid.HybridModel`, a :class:`~modemap.data.dataset.Dataset` and
the labels table, and calls the library only through callables handed to its
constructor (fit, save, simulate, read, format equations), so tests can give
it tiny hand-built objects and fakes.
"""

from __future__ import annotations

import os
from collections.abc import Callable, Sequence
from pathlib import Path
from typing import Any, ClassVar

import numpy as np
import pandas as pd
from rich.text import Text
from textual.app import App, ComposeResult
from textual.binding import Binding, BindingType
from textual.widgets import ContentSwitcher, Footer, Static

from modemap.app.tui.screens.base import Panel
from modemap.app.tui.screens.help import HelpScreen
from modemap.app.tui.screens.open_data import OpenDataScreen
from modemap.app.tui.screens.phase import PhasePanel
from modemap.app.tui.screens.refit import RefitResult, RefitScreen
from modemap.app.tui.screens.regimes import RegimesPanel
from modemap.app.tui.screens.replay import ReplayPanel
from modemap.app.tui.screens.save import SaveScreen
from modemap.app.tui.screens.switching import SwitchingPanel
from modemap.app.tui.screens.timeline import TimelinePanel
from modemap.app.tui.widgets.data import DashboardState
from modemap.app.tui.widgets.tables import plain_equations
from modemap.data.dataset import Dataset
from modemap.model.hybrid import HybridModel

__all__ = [
    "DashboardApp",
    "default_format_equations",
    "default_load",
    "default_refit",
    "default_save",
    "default_simulate",
    "load_view_inputs",
    "run_view",
    "run_view_data",
]

PANELS: tuple[tuple[str, type[Panel]], ...] = (
    ("timeline", TimelinePanel),
    ("regimes", RegimesPanel),
    ("switching", SwitchingPanel),
    ("replay", ReplayPanel),
    ("phase", PhasePanel),
)


# Default bindings to the library, imported lazily so the dashboard starts even
# while a module is missing, and so the library never imports the dashboard.
def default_refit(
    dataset: Dataset, options: dict[str, Any], progress: Callable[[float, str], None]
) -> RefitResult:
    """Fit with :class:`modemap.identify.HybridIdentifier` built from the dialog's flat
    options (:meth:`~modemap.identify.HybridIdentifier.from_options`); returns
    ``(model_, labels_)``."""
    from modemap.identify import HybridIdentifier

    est = HybridIdentifier.from_options(**options).fit(dataset, progress=progress)
    return est.model_, est.labels_


def default_simulate(model: HybridModel, time, x0, inputs, regime0: int | None):
    """Re-simulate one run with :func:`modemap.simulation.simulator.simulate`."""
    from modemap.simulation.simulator import simulate

    return simulate(model, time, x0, inputs, regime0)


def default_save(
    folder: Path, model: HybridModel, labels: pd.DataFrame, dataset: Dataset | None
) -> str:
    """Write ``model.json``, ``labels.csv`` and ``report.md`` into ``folder`` as ``modemap fit``
    does (:func:`modemap.report.output.write_fit_outputs`: as one set, never over a file the
    data were read from); returns the files written, in words."""
    from modemap.report.output import write_fit_outputs

    read = _dataset_files(dataset)
    paths = write_fit_outputs(folder, model, labels, dataset=dataset, read=read)
    return ", ".join(str(p) for p in paths)


def holds_results(folder: Path) -> bool:
    """Whether ``folder`` holds results that a save would replace."""
    from modemap.report.output import RESULT_FILES

    return any((Path(folder) / name).exists() for name in RESULT_FILES)


def _dataset_files(dataset: Dataset | None) -> list[str]:
    """The files a dataset was read from (its ``source``, names joined by ", ")."""
    if dataset is None or not dataset.source or dataset.source.startswith("<"):
        return []
    return [p for p in dataset.source.split(", ") if Path(p).exists()]


def default_load(
    path: str,
    *,
    time: str,
    states: Sequence[str],
    inputs: Sequence[str] = (),
    run: str | None = None,
) -> Dataset:
    """Read a data file with :func:`modemap.data.intake.read_data`."""
    from modemap.data.intake import read_data

    return read_data(path, time=time, states=states, inputs=inputs, run=run)


def default_format_equations(
    terms, coef, state_names, *, stderr=None, units=None, form="continuous", time_unit=""
) -> list[str]:
    """:func:`modemap.terms.equations.format_equations` with standard errors shown.

    Falls back to a plain listing while the module is missing.
    """
    try:
        from modemap.terms.equations import format_equations
    except ImportError:
        return plain_equations(terms, coef, state_names, stderr=stderr, units=units, form=form)
    return format_equations(
        terms,
        coef,
        state_names,
        stderr=stderr,
        units=units,
        time_unit=time_unit,
        form=form,
        show_stderr=stderr is not None,
    )


class DashboardApp(App[None]):
    """Terminal dashboard over a hybrid model and its data.

    Parameters
    ----------
    model : HybridModel or None
        The model to show; None opens the data alone (fit with ``r``).
    dataset : Dataset or None
        The trajectories; None shows the model alone.
    labels : DataFrame or None
        Columns ``run, time, regime``: the regime of each sample.
    refit : callable, optional
        ``refit(dataset, options, progress) -> (model, labels)``; ``options`` holds
        ``n_regimes``, ``threshold``, ``degree``, ``form``.  ``progress`` raises
        :class:`modemap.FitCancelled` once the user cancels.
    save : callable, optional
        ``save(folder, model, labels, dataset) -> str`` writes the result set and returns
        what it wrote (default :func:`default_save`).
    out : path-like, optional
        The session's results folder (``modemap view DIR``, or ``--out``).  Saving asks
        before replacing results there, and proposes a new folder once other data were
        opened or when there is no results folder.
    read_record : dict, optional
        How ``dataset`` was read (``files, time, states, inputs, run``), kept in a saved
        model file so that ``modemap view`` can reopen the data.
    simulate : callable, optional
        ``simulate(model, time, x0, inputs, regime0)`` returning an object with
        ``time, states, regimes, status, message``.
    load : callable, optional
        ``load(path, time=, states=, inputs=, run=) -> Dataset``.
    formatter : callable, optional
        ``formatter(terms, coef, state_names, stderr=, units=, form=) -> list[str]``.
    notes : sequence of str
        Warnings to show once the dashboard is up (missing labels or data...).
    """

    CSS_PATH = "app.tcss"
    ENABLE_COMMAND_PALETTE = False
    TITLE = "modemap"
    BINDINGS: ClassVar[list[BindingType]] = [
        *[
            Binding(str(i + 1), f"panel('{name}')", cls.TITLE, show=False)
            for i, (name, cls) in enumerate(PANELS)
        ],
        Binding("r", "refit", "refit"),
        Binding("o", "open", "open data"),
        Binding("s", "save", "save"),
        Binding("question_mark", "help", "help", key_display="?"),
        Binding("q", "quit", "quit"),
    ]

    def __init__(
        self,
        model: HybridModel | None,
        dataset: Dataset | None,
        labels: pd.DataFrame | None,
        *,
        refit: Callable[..., RefitResult] | None = None,
        save: Callable[..., str] | None = None,
        out: str | os.PathLike[str] | None = None,
        read_record: dict | None = None,
        simulate: Callable[..., Any] | None = None,
        load: Callable[..., Dataset] | None = None,
        formatter: Callable[..., list[str]] | None = None,
        notes: Sequence[str] = (),
    ) -> None:
        super().__init__()
        self.notes = list(notes)
        self.state = DashboardState(model, dataset, labels)
        self.refit = refit or default_refit
        self.save = save or default_save
        self.out = Path(out) if out is not None else None
        self.read_record = read_record
        self.simulate = simulate or default_simulate
        self.load = load or default_load
        self.formatter = formatter or default_format_equations
        self.current = "timeline"
        self.unsaved = False
        self._quit_asked = False
        # the results folder holds results of the data the session started with; once other
        # data are opened, saving proposes a new folder
        self._other_data = False
        # the data the model on show was fitted on: a model is only saved with them
        self._fitted_on = dataset if model is not None else None

    def _save_hint(self) -> str:
        """How the kept model can be saved in this session, in words."""
        return "s saves it"

    def compose(self) -> ComposeResult:
        yield Static(id="tabs")
        with ContentSwitcher(initial="timeline", id="panels"):
            for name, cls in PANELS:
                yield cls(id=name)
        yield Footer(compact=True)

    def on_mount(self) -> None:
        self.refresh_tabs()
        self.set_focus(self.query_one("#timeline", Panel))
        warnings = list(self.notes)
        if self.state.dataset is not None:
            warnings += list(self.state.dataset.warnings[:3])
        for warning in warnings:
            self.notify(warning, severity="warning", markup=False)

    def refresh_tabs(self) -> None:
        """Redraw the panel names and the status at the top."""
        text = Text()
        for i, (name, cls) in enumerate(PANELS):
            style = "bold reverse" if name == self.current else "dim"
            text.append(f" {i + 1} {cls.TITLE} ", style=style)
        st = self.state
        status = f"  K={st.model.n_regimes}" if st.model is not None else "  no model"
        if st.n_runs:
            status += f" run {st.run + 1}/{st.n_runs}"
        if self.unsaved:
            status += " (unsaved)"
        text.append(status)
        self.query_one("#tabs", Static).update(text)

    def reload_all(self) -> None:
        """Redraw every panel after the model or the data changed."""
        for name, _ in PANELS:
            self.query_one(f"#{name}", Panel).reload()
        self.refresh_tabs()

    # actions -------------------------------------------------------------
    def _on_base_screen(self) -> bool:
        return len(self.screen_stack) == 1

    async def action_quit(self) -> None:
        if self.unsaved and not self._quit_asked:
            self._quit_asked = True
            self.notify(
                f"The kept model is not saved: {self._save_hint()}; q again quits.",
                severity="warning",
            )
            return
        self.exit()

    def action_panel(self, name: str) -> None:
        if not self._on_base_screen():
            return
        self.current = name
        self.query_one(ContentSwitcher).current = name
        panel = self.query_one(f"#{name}", Panel)
        panel.reload()
        self.set_focus(panel)
        self.refresh_tabs()

    def action_help(self) -> None:
        if self._on_base_screen():
            self.push_screen(HelpScreen())

    def action_refit(self) -> None:
        if not self._on_base_screen():
            return
        if self.state.dataset is None:
            self.notify("No data to fit: press o to open a data file.", severity="warning")
            return
        self.push_screen(
            RefitScreen(self.state.model, self.state.dataset, self.refit), self._keep_refit
        )

    def _keep_refit(self, result: RefitResult | None) -> None:
        if result is None:
            return
        model, labels = result
        self.state.set(model, self.state.dataset, labels)
        self._fitted_on = self.state.dataset
        self.unsaved = True
        self.reload_all()
        hint = self._save_hint()
        self.notify(f"New model kept: K={model.n_regimes}; {hint}.")

    def action_open(self) -> None:
        if self._on_base_screen():
            self.push_screen(OpenDataScreen(self.load), self._opened)

    def _opened(self, opened: tuple[Dataset, dict] | None) -> None:
        if opened is None:
            return
        dataset, self.read_record = opened
        model = self.state.model
        if model is not None and list(model.states) != list(dataset.state_names):
            model = None
        self.state.run = 0
        self.state.set(model, dataset, None)
        self._other_data = True
        self.reload_all()
        self.notify(
            f"Read {dataset.n_samples} samples in {len(dataset.runs)} run(s). Press r to fit."
        )

    def action_save(self) -> None:
        if not self._on_base_screen():
            return
        st = self.state
        if st.model is None:
            self.notify("Nothing to save: no model yet.", severity="warning")
            return
        if not self.unsaved:
            where = f" in {self.out}" if self.out is not None else ""
            self.notify(f"Nothing new to save: the model shown is the one saved{where}.")
            return
        if st.dataset is None or st.labels is None or st.dataset is not self._fitted_on:
            self.notify(
                "Not saved: the model shown was not fitted on the data shown; press r to fit "
                "these data first.",
                severity="warning",
            )
            return
        self.push_screen(SaveScreen(*self._proposed_folder(), holds_results), self._save_to)

    def _proposed_folder(self) -> tuple[str, str]:
        """The folder offered for saving, and why that one."""
        if self.out is not None and not self._other_data:
            return str(self.out), f"The results folder of this session: {self.out}"
        files = (self.read_record or {}).get("files") or _dataset_files(self.state.dataset)
        stem = Path(files[0]).stem if files else "model"
        if self.out is None:
            return f"{stem}-results", "This session has no results folder yet: choose one."
        why = (
            f"Other data were opened since this session started: {self.out} holds the "
            "results of the earlier data, so a new folder is proposed."
        )
        return str(self.out.parent / f"{self.out.name}-{stem}"), why

    def _save_to(self, folder: Path | None) -> None:
        if folder is None:
            self.notify("Not saved.")
            return
        st = self.state
        if self.read_record is not None:
            st.model.metadata["data"] = dict(self.read_record)
        try:
            written = self.save(folder, st.model, st.labels, st.dataset)
        except Exception as exc:  # report and keep the session alive
            self.notify(f"Save failed: {exc}", severity="error", markup=False)
            return
        self.out, self._other_data = Path(folder), False
        self.unsaved = False
        self._quit_asked = False
        self.refresh_tabs()
        self.notify(f"Saved {written}", markup=False)


# Entry points -------------------------------------------------------------
_READ_OPTIONS = (
    *("time", "states", "inputs", "run", "resample", "max_gap", "min_samples"),
    *("missing", "delimiter", "decimal", "units_row"),
)


def _source_spec(model: HybridModel, directory: Path) -> tuple[list[str], dict[str, Any]] | None:
    """File name(s) and read options of the model's training data.

    Looks at ``model.metadata["data"]`` (``files`` plus the read options, as
    ``modemap fit`` records them), then at ``model.metadata["source"]`` (a file
    name, a list of them, or a dict like ``data``).  Relative names are taken
    relative to ``directory`` unless they exist as given.
    """
    opts: dict[str, Any] = {
        "time": model.time_name,
        "states": list(model.states),
        "inputs": list(model.inputs),
    }
    src = model.metadata.get("data") or model.metadata.get("source")
    if isinstance(src, dict):
        files = src.get("files") or src.get("path") or src.get("file")
        opts.update({k: src[k] for k in _READ_OPTIONS if src.get(k) is not None})
        src = files
    if isinstance(src, str):
        src = [src] if Path(src).exists() or ", " not in src else src.split(", ")
    if not src or not all(isinstance(s, str) and not s.startswith("<") for s in src):
        return None
    paths = [p if Path(p).is_absolute() or Path(p).exists() else str(directory / p) for p in src]
    return paths, opts


def _read_labels(path: Path, model: HybridModel, notes: list[str]) -> pd.DataFrame | None:
    """``labels.csv`` when it is a table of ``run, time, regime`` with the model's regime ids;
    otherwise None and a note saying what is wrong (the dashboard shows the model without
    the regimes per sample rather than failing)."""
    if not path.exists():
        notes.append(f"{path}: not found, regimes per sample are not shown")
        return None
    try:
        labels = pd.read_csv(path, dtype={"run": str})
    except (ValueError, OSError, UnicodeDecodeError, pd.errors.ParserError) as exc:
        notes.append(f"{path}: not read ({' '.join(str(exc).split())}); regimes not shown")
        return None
    missing = [c for c in ("run", "time", "regime") if c not in labels.columns]
    problem = f"no column {missing[0]!r}" if missing else ""
    if not problem:
        regime = pd.to_numeric(labels["regime"], errors="coerce")
        time = pd.to_numeric(labels["time"], errors="coerce")
        ids = {r.id for r in model.regimes}
        bad = ~regime.isin(ids) | time.isna()
        if bad.any():
            row = int(np.flatnonzero(bad.to_numpy())[0])
            problem = (
                f"row {row + 2} holds regime '{labels['regime'].iloc[row]}', not a regime "
                "of the model"
                if not time.isna().iloc[row]
                else f"row {row + 2} has no numeric time"
            )
    if problem:
        notes.append(f"{path}: {problem}; regimes per sample are not shown")
        return None
    return labels


def load_view_inputs(
    directory: str | os.PathLike[str],
) -> tuple[HybridModel, Dataset | None, pd.DataFrame | None, list[str]]:
    """Read ``DIR/model.json``, ``DIR/labels.csv`` and the model's source data.

    Returns the model, the dataset (None when the data cannot be found), the
    labels (None when absent) and notes about what is missing.  A malformed model
    file raises :class:`modemap.ModelFileError`.
    """
    from modemap.data.intake import read_data
    from modemap.model.modelfile import load_model

    folder = Path(directory)
    model = load_model(folder / "model.json")
    notes: list[str] = []
    labels_path = folder / "labels.csv"
    labels = _read_labels(labels_path, model, notes)
    spec = _source_spec(model, folder)
    dataset = None
    if spec is None:
        notes.append(f"{folder / 'model.json'}: no data file recorded in metadata['source']")
    else:
        paths, opts = spec
        try:
            dataset = read_data(paths if len(paths) > 1 else paths[0], **opts)
        except Exception as exc:  # the model is still worth showing without its data
            notes.append(f"data not loaded: {exc}")
    return model, dataset, labels, notes


def run_view(
    directory: str | os.PathLike[str],
    *,
    save: Callable[..., str] | None = None,
) -> int:
    """``modemap view DIR``: show the model saved in ``DIR`` with its labels and data.

    ``save`` defaults to :func:`default_save` (the writer ``modemap fit`` uses); saving
    asks before replacing the results in ``DIR``.  Returns the exit code (0).
    """
    folder = Path(directory)
    model, dataset, labels, notes = load_view_inputs(folder)
    DashboardApp(model, dataset, labels, save=save, out=folder, notes=notes).run()
    return 0


def run_view_data(
    source: Dataset | str | os.PathLike[str] | Sequence[str | os.PathLike[str]],
    *,
    time: str | None = None,
    states: Sequence[str] = (),
    inputs: Sequence[str] = (),
    run: str | None = None,
    out: str | os.PathLike[str] | None = None,
    save: Callable[..., str] | None = None,
    read_record: dict | None = None,
) -> int:
    """``modemap view DATA --time ... --states ...``: open data alone and fit from inside.

    ``source`` is a :class:`Dataset` already read, or file name(s) read here with
    ``time``, ``states``, ``inputs`` and ``run``.  A model kept after fitting is
    saved to ``out`` (``model.json``, ``labels.csv``, ``report.md``), or to a folder the
    dashboard asks for when ``out`` is None.  ``read_record`` says how the data were read
    (as ``modemap fit`` records it), so that a saved folder can be reopened.  Returns the
    exit code (0).
    """
    if isinstance(source, Dataset):
        dataset = source
    else:
        from modemap.data.intake import read_data

        if time is None or not states:
            from modemap._exceptions import DataError

            raise DataError("--time and --states are needed to open data", source=str(source))
        dataset = read_data(source, time=time, states=list(states), inputs=list(inputs), run=run)
        files = [source] if isinstance(source, (str, os.PathLike)) else list(source)
        read_record = read_record or {
            "files": [os.path.abspath(p) for p in files],
            "time": time,
            "states": list(states),
            "inputs": list(inputs),
            "run": run,
        }
    DashboardApp(None, dataset, None, save=save, out=out, read_record=read_record).run()
    return 0
