"""Widgets that show a :class:`~modemap.app.tui.widgets.canvas.PlotSpec` and regime strips."""

from __future__ import annotations

from collections.abc import Callable, Sequence

import numpy as np
from rich.segment import Segment
from rich.style import Style
from textual.strip import Strip
from textual.widget import Widget

from modemap.app.tui.widgets.canvas import MARGIN, PlotSpec, band_row, cursor_column, render_plot
from modemap.app.tui.widgets.palette import band_style, regime_color, regime_glyph

__all__ = ["Plot", "RegimeStrip"]


class Plot(Widget):
    """A braille plot; give it a spec with :meth:`show` and it redraws on resize."""

    DEFAULT_CSS = """
    Plot { height: 1fr; min-height: 3; }
    """

    def __init__(self, spec: PlotSpec | None = None, **kwargs) -> None:
        super().__init__(**kwargs)
        self._spec = spec
        self._cache: tuple[tuple[int, int], list[list[Segment]]] | None = None

    @property
    def spec(self) -> PlotSpec | None:
        return self._spec

    def show(self, spec: PlotSpec | None) -> None:
        """Replace what the plot draws."""
        self._spec = spec
        self._cache = None
        self.refresh()

    def canvas_width(self) -> int:
        """Number of cell columns of the drawing area at the current size."""
        return max(self.size.width - MARGIN, 0)

    def _lines(self) -> list[list[Segment]]:
        size = (self.size.width, self.size.height)
        if self._cache is None or self._cache[0] != size:
            lines = render_plot(self._spec, *size) if self._spec is not None else []
            self._cache = (size, lines)
        return self._cache[1]

    def render_line(self, y: int) -> Strip:
        lines = self._lines()
        width = self.size.width
        if y >= len(lines):
            return Strip.blank(width)
        return Strip(lines[y]).adjust_cell_length(width)


class RegimeStrip(Widget):
    """One row per labelling: each cell column shows the regime letter on its band colour."""

    DEFAULT_CSS = """
    RegimeStrip { height: auto; }
    """

    def __init__(self, **kwargs) -> None:
        super().__init__(**kwargs)
        self._rows: list[tuple[str, Callable[[np.ndarray], np.ndarray] | None]] = []
        self._xlim: tuple[float, float] = (0.0, 1.0)
        self._cursor: float | None = None

    def show(
        self,
        rows: Sequence[tuple[str, Callable[[np.ndarray], np.ndarray] | None]],
        xlim: tuple[float, float],
        cursor: float | None = None,
    ) -> None:
        """Set the labellings (``(name, band function)`` pairs), the view and the cursor."""
        self._rows = list(rows)
        self._xlim = xlim
        self._cursor = cursor
        self.styles.height = max(len(self._rows), 1)
        self.refresh()

    def render_line(self, y: int) -> Strip:
        width = self.size.width
        if y >= len(self._rows) or width <= MARGIN:
            return Strip.blank(width)
        name, fn = self._rows[y]
        w = width - MARGIN
        classes = band_row(self._xlim, w, fn)
        cur = cursor_column(self._xlim, w, self._cursor)
        segs = [Segment(name[: MARGIN - 1].rjust(MARGIN - 1) + "│", Style(dim=True))]
        for c, k in enumerate(classes):
            style = band_style(int(k)) + Style(color=regime_color(int(k)), bold=True)
            if c == cur:
                style += Style(reverse=True)
            segs.append(Segment(regime_glyph(int(k)), style))
        return Strip(Segment.simplify(segs)).adjust_cell_length(width)


#: Eighth blocks for a level in [0, 1] (a space below 1/16).
LEVELS = " ▁▂▃▄▅▆▇█"


class CertaintyStrip(Widget):
    """One row: how sure the fit is of the regime shown above each cell column (the
    probability of that regime given the whole run, as a block from empty to full), so that
    a reader sees where the labels can be trusted without colour."""

    DEFAULT_CSS = """
    CertaintyStrip { height: 1; }
    """

    def __init__(self, **kwargs) -> None:
        super().__init__(**kwargs)
        self._fn: Callable[[np.ndarray], np.ndarray] | None = None
        self._xlim: tuple[float, float] = (0.0, 1.0)

    def show(
        self, fn: Callable[[np.ndarray], np.ndarray] | None, xlim: tuple[float, float]
    ) -> None:
        """Set the level function (None hides the row) and the view."""
        self._fn, self._xlim = fn, xlim
        self.display = fn is not None
        self.refresh()

    def render_line(self, y: int) -> Strip:
        width = self.size.width
        if y > 0 or self._fn is None or width <= MARGIN:
            return Strip.blank(width)
        w = width - MARGIN
        centres = self._xlim[0] + (self._xlim[1] - self._xlim[0]) * (np.arange(w) + 0.5) / w
        values = np.asarray(self._fn(centres), dtype=float)
        cells = "".join(
            " " if not np.isfinite(v) else LEVELS[int(np.rint(np.clip(v, 0.0, 1.0) * 8))]
            for v in values
        )
        segs = [Segment("certain"[: MARGIN - 1].rjust(MARGIN - 1) + "│", Style(dim=True))]
        segs.append(Segment(cells, Style(bold=True)))
        return Strip(segs).adjust_cell_length(width)
