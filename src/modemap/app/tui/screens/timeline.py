"""Timeline panel: state and input traces over time on regime bands, with a reading cursor."""

from __future__ import annotations

from typing import ClassVar

import numpy as np
from rich.text import Text
from textual.binding import Binding, BindingType
from textual.containers import VerticalScroll
from textual.widgets import Static

from modemap.app.tui.screens.base import Panel
from modemap.app.tui.widgets.canvas import PlotSpec, Series
from modemap.app.tui.widgets.data import (
    band_function,
    level_function,
    nearest_index,
    pack_parts,
    padded_limits,
    run_title,
    stamp_labeller,
    stamp_text,
)
from modemap.app.tui.widgets.palette import regime_name, trace_color
from modemap.app.tui.widgets.plot import CertaintyStrip, Plot, RegimeStrip
from modemap.app.tui.widgets.tables import regime_legend

__all__ = ["TimelinePanel"]


class TimelinePanel(Panel):
    """Traces of every state and input of the current run, regime bands and letters, a cursor."""

    TITLE = "Timeline"
    BINDINGS: ClassVar[list[BindingType]] = [
        Binding("left", "move(-1)", "cursor", key_display="←→"),
        Binding("right", "move(1)", "cursor", show=False),
        Binding("shift+left", "move(-10)", "jump", show=False),
        Binding("shift+right", "move(10)", "jump", show=False),
        Binding("plus,equals_sign", "zoom(0.5)", "zoom", key_display="+-"),
        Binding("minus", "zoom(2)", "zoom out", show=False),
        Binding("left_square_bracket", "pan(-0.25)", "pan", key_display="[]"),
        Binding("right_square_bracket", "pan(0.25)", "pan", show=False),
        Binding("z", "reset", "full", show=False),
        Binding("n", "run(1)", "next run"),
        Binding("p", "run(-1)", "prev run", show=False),
    ]

    def __init__(self, **kwargs) -> None:
        super().__init__(**kwargs)
        self.view: tuple[float, float] = (0.0, 1.0)
        self.cursor: float = 0.0
        self._n_plots = -1
        self._plots: list[Plot] = []

    def compose(self):
        yield Static(id="tl-head", classes="panel-head")
        yield RegimeStrip(id="tl-strip")
        yield CertaintyStrip(id="tl-certainty")
        yield VerticalScroll(id="tl-plots", can_focus=False)
        yield Static(id="tl-readout", classes="readout")

    def on_mount(self) -> None:
        self.reload()

    def reload(self) -> None:
        run = self.state.current_run
        if run is not None and run.n_samples:
            self.view = (float(run.time[0]), float(run.time[-1]))
            self.cursor = float(run.time[0])
        self._rebuild_plots()
        self.redraw()

    def _rebuild_plots(self) -> None:
        ds = self.state.dataset
        n = ds.n_states + ds.n_inputs if ds is not None else 0  # states, then the inputs
        box = self.query_one("#tl-plots", VerticalScroll)
        if n == self._n_plots:
            return
        self._n_plots = n
        box.remove_children()
        self._plots = [Plot(classes="trace") for _ in range(n)]
        box.mount_all(self._plots)

    def _canvas_width(self) -> int:
        plots = self._plots
        width = plots[0].canvas_width() if plots else 0
        return width if width > 0 else 72

    def redraw(self) -> None:
        st = self.state
        run = st.current_run
        head = self.query_one("#tl-head", Static)
        strip = self.query_one("#tl-strip", RegimeStrip)
        readout = self.query_one("#tl-readout", Static)
        if run is None or run.n_samples == 0:
            head.update(Text("No data loaded. Press o to open a data file."))
            strip.show([], self.view)
            self.query_one("#tl-certainty", CertaintyStrip).show(None, self.view)
            readout.update("")
            return
        regimes = st.regimes[st.run]
        bands = band_function(run.time, regimes)
        legend = regime_legend(st.regime_ids)
        span = f"t {self.view[0]:.4g}…{self.view[1]:.4g} {st.time_unit}"
        if run.stamps is not None:
            span = f"{stamp_text(run, self.view[0])} … {stamp_text(run, self.view[1])}"
        head.update(Text(f"{run_title(run, st.run, st.n_runs)}  {span}  ") + legend)
        strip.show([("regime", bands if st.labels is not None else None)], self.view, self.cursor)
        sure = st.certainty[st.run] if st.certainty else None
        self.query_one("#tl-certainty", CertaintyStrip).show(
            level_function(run.time, sure) if sure is not None else None, self.view
        )
        a = max(int(np.searchsorted(run.time, self.view[0])) - 1, 0)
        b = int(np.searchsorted(run.time, self.view[1])) + 1
        plots = self._plots
        n_states = st.dataset.n_states
        names = list(st.dataset.state_names) + list(st.dataset.input_names)
        for j, plot in enumerate(plots):
            y = run.states[:, j] if j < n_states else run.inputs[:, j - n_states]
            title = st.label(names[j]) + (" (input)" if j >= n_states else "")
            spec = PlotSpec(
                xlim=self.view,
                ylim=padded_limits(y[a:b]),
                series=[Series(run.time, y, trace_color(j))],
                bands=bands,
                cursor=self.cursor,
                title=title,
                show_xaxis=j == len(plots) - 1,
                x_label=stamp_labeller(run),
            )
            plot.show(spec)
        width = readout.size.width or self.app.size.width
        readout.update(Text(pack_parts(self._readout(run, regimes), width)))

    def _readout(self, run, regimes: np.ndarray) -> list[str]:
        st = self.state
        i = int(nearest_index(run.time, self.cursor)[0])
        tu = st.time_unit
        parts = [f"t = {run.time[i]:.6g}{' ' + tu if tu else ''}"]
        if run.stamps is not None:
            parts[0] += f" ({stamp_text(run, float(run.time[i]))})"
        names = list(st.dataset.state_names) + list(st.dataset.input_names)
        values = (
            np.concatenate([run.states[i], run.inputs[i]]) if run.inputs.size else run.states[i]
        )
        for name, v in zip(names, values, strict=False):
            u = st.unit(name)
            parts.append(f"{name} = {v:.5g}{' ' + u if u else ''}")
        k = int(regimes[i])
        parts.append(f"regime {regime_name(k)}" if k >= 0 else "regime ·")
        return parts

    # actions -------------------------------------------------------------
    def _limits(self) -> tuple[float, float]:
        run = self.state.current_run
        return (
            (float(run.time[0]), float(run.time[-1]))
            if run is not None and run.n_samples
            else (0.0, 1.0)
        )

    def action_move(self, columns: int) -> None:
        t0, t1 = self.view
        step = (t1 - t0) / self._canvas_width()
        self.cursor = float(np.clip(self.cursor + columns * step, t0, t1 - 1e-12 * abs(t1 - t0)))
        self.redraw()

    def action_zoom(self, factor: float) -> None:
        lo, hi = self._limits()
        run = self.state.current_run
        min_span = 8 * (
            self.state.dataset.step
            if run is not None and np.isfinite(self.state.dataset.step)
            else 0.0
        )
        half = max(0.5 * (self.view[1] - self.view[0]) * factor, 0.5 * min_span, 1e-12)
        half = min(half, 0.5 * (hi - lo))
        centre = float(np.clip(self.cursor, lo + half, hi - half))
        self.view = (centre - half, centre + half)
        self.redraw()

    def action_pan(self, fraction: float) -> None:
        lo, hi = self._limits()
        span = self.view[1] - self.view[0]
        start = float(np.clip(self.view[0] + fraction * span, lo, hi - span))
        self.view = (start, start + span)
        self.cursor = float(np.clip(self.cursor, start, start + span))
        self.redraw()

    def action_reset(self) -> None:
        self.view = self._limits()
        self.redraw()

    def action_run(self, delta: int) -> None:
        self.state.step_run(delta)
        self.reload()
        self.app.refresh_tabs()  # type: ignore[attr-defined]

    def on_resize(self) -> None:
        self.redraw()
