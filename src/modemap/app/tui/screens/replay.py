"""Replay panel: measured runs overlaid with the model's re-simulation, and validation figures."""

from __future__ import annotations

from typing import Any, ClassVar

import numpy as np
from rich.text import Text
from textual import work
from textual.binding import Binding, BindingType
from textual.containers import VerticalScroll
from textual.widgets import Static

from modemap.app.tui.screens.base import Panel
from modemap.app.tui.widgets.canvas import PlotSpec, Series
from modemap.app.tui.widgets.data import (
    band_function,
    padded_limits,
    run_title,
    stamp_labeller,
)
from modemap.app.tui.widgets.palette import SIM_COLOR, trace_color
from modemap.app.tui.widgets.plot import Plot, RegimeStrip
from modemap.app.tui.widgets.tables import validation_details

__all__ = ["ReplayPanel"]


def _check_result(result: Any, n_states: int) -> None:
    """Raise ValueError unless ``result`` has matching ``time``, ``states`` and ``regimes``."""
    try:
        t = np.asarray(result.time, dtype=float)
        x = np.asarray(result.states, dtype=float)
        r = np.asarray(result.regimes)
    except AttributeError as exc:
        raise ValueError(f"the simulator returned no {exc.name}") from None
    if x.ndim != 2 or x.shape != (t.size, n_states) or r.shape != t.shape:
        raise ValueError(f"the simulator returned states of shape {x.shape} for {t.size} times")


class ReplayPanel(Panel):
    """Measured (braille line) against simulated (a dotted line of ``•``) traces of the
    current run: told apart by shape, with or without colour."""

    TITLE = "Replay"
    BINDINGS: ClassVar[list[BindingType]] = [
        Binding("n", "run(1)", "next run"),
        Binding("p", "run(-1)", "prev run", show=False),
        Binding("v", "toggle_table", "figures"),
    ]

    def __init__(self, **kwargs) -> None:
        super().__init__(**kwargs)
        self._results: dict[tuple[int, int], Any] = {}
        self._errors: dict[tuple[int, int], str] = {}
        self._plots: list[Plot] = []
        self._model_id = 0

    def compose(self):
        yield Static(id="rp-head", classes="panel-head")
        yield RegimeStrip(id="rp-strip")
        yield VerticalScroll(id="rp-plots", can_focus=False)
        with VerticalScroll(id="rp-table", can_focus=False):
            yield Static(id="rp-figures")

    def on_mount(self) -> None:
        self.query_one("#rp-table").display = False
        self.reload()

    def _key(self) -> tuple[int, int]:
        return (id(self.state.model), self.state.run)

    def reload(self) -> None:
        if id(self.state.model) != self._model_id:
            self._results.clear()
            self._errors.clear()
            self._model_id = id(self.state.model)
        ds = self.state.dataset
        n = ds.n_states if ds is not None else 0
        if n != len(self._plots):
            box = self.query_one("#rp-plots", VerticalScroll)
            box.remove_children()
            self._plots = [Plot(classes="trace") for _ in range(n)]
            box.mount_all(self._plots)
        self.query_one("#rp-figures", Static).update(validation_details(self.state.model))
        self._request()
        self.redraw()

    def _request(self) -> None:
        st = self.state
        run = st.current_run
        sim = self.app.simulate  # type: ignore[attr-defined]
        if run is None or st.model is None or not st.model.regimes or sim is None:
            return
        if getattr(self.app, "current", "replay") != "replay":
            return
        key = self._key()
        if key not in self._results and key not in self._errors:
            reg0 = int(st.regimes[st.run][0]) if st.regimes and st.regimes[st.run].size else -1
            self._simulate(key, sim, st.model, run, None if reg0 < 0 else reg0)

    @work(thread=True, exclusive=True, group="simulate")
    def _simulate(self, key: tuple[int, int], sim, model, run, regime0: int | None) -> None:
        inputs = run.inputs if run.inputs.size else None
        try:
            result = sim(model, run.time, run.states[0], inputs, regime0)
            _check_result(result, run.states.shape[1])
        except Exception as exc:  # shown in the panel, never a crash
            self.app.call_from_thread(self._store, key, None, f"simulation failed: {exc}")
            return
        self.app.call_from_thread(self._store, key, result, "")

    def _store(self, key: tuple[int, int], result: Any, error: str) -> None:
        if error:
            self._errors[key] = error
        else:
            self._results[key] = result
        self.redraw()

    def redraw(self) -> None:
        st = self.state
        run = st.current_run
        head = self.query_one("#rp-head", Static)
        strip = self.query_one("#rp-strip", RegimeStrip)
        if run is None or run.n_samples == 0:
            head.update(Text("No data loaded: nothing to replay. Press o to open a data file."))
            strip.show([], (0.0, 1.0))
            return
        xlim = (float(run.time[0]), float(run.time[-1]))
        key = self._key()
        result = self._results.get(key)
        status = self._status(key, result)
        head.update(
            Text(f"{run_title(run, st.run, st.n_runs)}  ")
            + Text("── measured  ", style="bold")
            + Text("• • simulated", style=f"bold {SIM_COLOR}")
            + Text(f"   {status}")
        )
        rows = [
            ("data", band_function(run.time, st.regimes[st.run]) if st.labels is not None else None)
        ]
        if result is not None:
            rows.append(
                ("model", band_function(np.asarray(result.time), np.asarray(result.regimes)))
            )
        strip.show(rows, xlim)
        bands = rows[0][1]
        for j, plot in enumerate(self._plots):
            series = [Series(run.time, run.states[:, j], trace_color(j))]
            values = [run.states[:, j]]
            if result is not None:
                sim_y = np.asarray(result.states)[:, j]
                series.append(Series(np.asarray(result.time), sim_y, SIM_COLOR, glyph="•"))
                values.append(sim_y[np.isfinite(sim_y)])
            spec = PlotSpec(
                xlim=xlim,
                ylim=padded_limits(np.concatenate(values)),
                series=series,
                bands=bands,
                title=st.label(st.dataset.state_names[j]),
                show_xaxis=j == len(self._plots) - 1,
                x_label=stamp_labeller(run),
            )
            plot.show(spec)

    def _status(self, key: tuple[int, int], result: Any) -> str:
        if self.state.model is None or not self.state.model.regimes:
            return "no model to simulate"
        if key in self._errors:
            return self._errors[key]
        if result is None:
            return "simulating…" if self.app.simulate is not None else "no simulator"  # type: ignore[attr-defined]
        msg = getattr(result, "message", "")
        return f"status {getattr(result, 'status', '?')}" + (f": {msg}" if msg else "")

    def action_run(self, delta: int) -> None:
        self.state.step_run(delta)
        self._request()
        self.redraw()
        self.app.refresh_tabs()  # type: ignore[attr-defined]

    def action_toggle_table(self) -> None:
        table = self.query_one("#rp-table")
        table.display = not table.display
        self.query_one("#rp-plots").display = not table.display
        self.query_one("#rp-strip").display = not table.display
