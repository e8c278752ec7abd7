"""Phase panel: two chosen variables against each other, by regime, with equilibria and guards."""

from __future__ import annotations

from typing import ClassVar

import numpy as np
from rich.console import Group
from rich.text import Text
from textual.binding import Binding, BindingType
from textual.widgets import Static

from modemap.app.tui.screens.base import Panel
from modemap.app.tui.widgets.canvas import Contour, Marker, PlotSpec, Scatter
from modemap.app.tui.widgets.data import evaluate_guard, padded_limits
from modemap.app.tui.widgets.palette import (
    EQUILIBRIUM_LEGEND,
    equilibrium_mark,
    regime_color,
    regime_glyph,
)
from modemap.app.tui.widgets.plot import Plot

__all__ = ["PhasePanel", "equilibrium_mark"]


class PhasePanel(Panel):
    """Samples placed by two variables, each cell showing its most frequent regime letter."""

    TITLE = "Phase"
    BINDINGS: ClassVar[list[BindingType]] = [
        Binding("x", "axis(0)", "x-axis"),
        Binding("y", "axis(1)", "y-axis"),
        Binding("n", "run(1)", "runs"),
        Binding("g", "toggle_guards", "guards"),
    ]

    def __init__(self, **kwargs) -> None:
        super().__init__(**kwargs)
        self.axes = [0, 1]
        self.run_choice = -1  # -1: all runs
        self.show_guards = True

    def compose(self):
        yield Static(id="ph-head", classes="panel-head")
        yield Plot(id="ph-plot")
        yield Static(id="ph-legend", classes="legend")

    def on_mount(self) -> None:
        self.reload()

    def reload(self) -> None:
        n = len(self.state.variables)
        self.axes = [min(a, max(n - 1, 0)) for a in self.axes]
        if n > 1 and self.axes[0] == self.axes[1]:
            self.axes = [0, 1]
        if self.run_choice >= self.state.n_runs:
            self.run_choice = -1
        self.redraw()

    def _samples(self) -> tuple[np.ndarray, np.ndarray]:
        """Variables (rows: samples) and regimes of the chosen run(s)."""
        st = self.state
        ds = st.dataset
        if ds is None or not ds.runs:
            return np.zeros((0, len(st.variables))), np.zeros(0, dtype=np.int64)
        pick = range(st.n_runs) if self.run_choice < 0 else [self.run_choice]
        Z = np.concatenate([np.hstack([ds.runs[i].states, ds.runs[i].inputs]) for i in pick])
        reg = np.concatenate([st.regimes[i] for i in pick])
        return Z, reg

    def _limits(self, Z: np.ndarray, j: int, name: str) -> tuple[float, float]:
        if Z.shape[0]:
            return padded_limits(Z[:, j])
        model = self.state.model
        rng = model.data_range.get(name) if model is not None else None
        return padded_limits(rng) if rng is not None else (0.0, 1.0)

    def _guard_contours(
        self, Z: np.ndarray, names: list[str], ix: int, iy: int
    ) -> tuple[list[Contour], list[str]]:
        model = self.state.model
        if model is None or not self.show_guards:
            return [], []
        base = (
            np.median(Z, axis=0)
            if Z.shape[0]
            else np.array([np.mean(model.data_range.get(v, (0.0, 0.0))) for v in names])
        )
        contours, problems = [], []
        for g in model.guards:

            def func(gx: np.ndarray, gy: np.ndarray, g=g) -> np.ndarray:
                grid = np.tile(base, (gx.size, 1))
                grid[:, ix] = gx.ravel()
                grid[:, iy] = gy.ravel()
                return evaluate_guard(g, grid, names).reshape(gx.shape)

            try:
                func(np.zeros((1, 1)), np.zeros((1, 1)))
            except ValueError as exc:
                problems.append(
                    f"{regime_glyph(g.source)}→{regime_glyph(g.target)} not drawn: {exc}"
                )
                continue
            contours.append(Contour(func, regime_color(g.source)))
        return contours, problems

    def _markers(self, xname: str, yname: str) -> list[tuple[Marker, str]]:
        """A marker per equilibrium that has both coordinates, with its description.

        An input axis takes the input value the equilibrium was computed at.
        """
        model = self.state.model
        out = []
        for reg in model.regimes if model is not None else []:
            for eq in reg.equilibria:
                where = {**eq.inputs, **eq.point}
                if xname in where and yname in where:
                    mark = equilibrium_mark(eq.stability, eq.inside)
                    marker = Marker(where[xname], where[yname], mark, regime_color(reg.id))
                    text = (
                        f"{mark} {regime_glyph(reg.id)} at {xname} = {where[xname]:.4g}, "
                        f"{yname} = {where[yname]:.4g}"
                    )
                    out.append((marker, text))
        return out

    @staticmethod
    def _outside(
        markers: list[tuple[Marker, str]], xlim: tuple[float, float], ylim: tuple[float, float]
    ) -> list[str]:
        """Descriptions of the equilibria that fall outside the plotted box."""
        return [
            text
            for m, text in markers
            if not (xlim[0] <= m.x <= xlim[1] and ylim[0] <= m.y <= ylim[1])
        ]

    def redraw(self) -> None:
        st = self.state
        names = st.variables
        head = self.query_one("#ph-head", Static)
        plot = self.query_one("#ph-plot", Plot)
        legend = self.query_one("#ph-legend", Static)
        if len(names) < 2:
            head.update(
                Text(
                    "The phase view needs two variables; "
                    + ("load data or a model." if not names else f"only '{names[0]}' is known.")
                )
            )
            plot.show(None)
            legend.update("")
            return
        ix, iy = self.axes
        Z, reg = self._samples()
        xname, yname = names[ix], names[iy]
        contours, problems = self._guard_contours(Z, names, ix, iy)
        markers = self._markers(xname, yname)
        xlim, ylim = self._limits(Z, ix, xname), self._limits(Z, iy, yname)
        outside = self._outside(markers, xlim, ylim)
        if outside:
            problems.append("outside the view: " + "; ".join(outside))
        spec = PlotSpec(
            xlim=xlim,
            ylim=ylim,
            scatter=Scatter(Z[:, ix], Z[:, iy], reg) if Z.shape[0] else None,
            markers=[m for m, _ in markers],
            contours=contours,
            title=f"{st.label(yname)} against {st.label(xname)}",
        )
        plot.show(spec)
        which = (
            "all runs" if self.run_choice < 0 else f"run '{st.dataset.runs[self.run_choice].name}'"
        )
        head.update(
            Text(
                f"x: {st.label(xname)}   y: {st.label(yname)}   {which}   "
                f"guards {'on' if self.show_guards else 'off'}"
            )
        )
        keys = [
            Text(EQUILIBRIUM_LEGEND, style="dim"),
            Text("⠒ guard (other variables at their median)", style="dim"),
        ]
        legend.update(Group(*keys, *[Text(p, style="italic") for p in problems]))

    def action_axis(self, which: int) -> None:
        n = len(self.state.variables)
        if n < 2:
            return
        other = self.axes[1 - which]
        nxt = (self.axes[which] + 1) % n
        if nxt == other:
            nxt = (nxt + 1) % n
        self.axes[which] = nxt
        self.redraw()

    def action_run(self, delta: int) -> None:
        n = self.state.n_runs
        self.run_choice = (self.run_choice + 1 + delta) % (n + 1) - 1 if n else -1
        self.redraw()

    def action_toggle_guards(self) -> None:
        self.show_guards = not self.show_guards
        self.redraw()
