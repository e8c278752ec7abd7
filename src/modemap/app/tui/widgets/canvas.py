"""A small plotting canvas made of Unicode braille cells.

Each terminal cell holds a 2 x 4 grid of braille dots (code points U+2800 to
U+28FF), so a ``w x h`` cell area is a ``2w x 4h`` pixel raster.  Lines are
drawn as per-pixel-column vertical spans between the lowest and the highest
value met in that column (the min/max envelope, common practice for drawing
long records on few pixels), joined to the neighbouring columns through values
interpolated at the column edges.  Cells can also carry a glyph (regime
letters of a scatter, equilibrium marks) and every cell column can carry a
background band.  Layers, top first: the title, markers, contours (guards), the
scatter letters and glyph lines, the braille lines.

Everything here is pure: :func:`render_plot` turns a :class:`PlotSpec` into
rows of Rich segments, which the :class:`~modemap.app.tui.widgets.plot.Plot`
widget caches and shows.
"""

from __future__ import annotations

from collections.abc import Callable
from dataclasses import dataclass, field

import numpy as np
from rich.segment import Segment
from rich.style import Style

from modemap.app.tui.widgets.palette import band_style, regime_color, regime_glyph

__all__ = [
    "MARGIN",
    "Contour",
    "Marker",
    "PlotSpec",
    "Scatter",
    "Series",
    "band_row",
    "braille_cells",
    "render_plot",
]

MARGIN = 8
"""Columns at the left of every plot for the y-axis labels (7 + axis line)."""

# Bit of each dot in a braille cell, indexed [row, column] (Unicode braille order).
_DOT_BITS = np.array([[0x01, 0x08], [0x02, 0x10], [0x04, 0x20], [0x40, 0x80]], dtype=np.uint16)


@dataclass
class Series:
    """A line through ``(x, y)``; ``x`` sorted ascending.

    With ``glyph`` set, the line is drawn as that character in every other cell column
    (at the cell of the value interpolated at the column centre) instead of braille dots,
    so that it stays apart from a braille line without colour.
    """

    x: np.ndarray
    y: np.ndarray
    color: str
    glyph: str = ""


@dataclass
class Scatter:
    """Points shown as the glyph of the most frequent class in each cell."""

    x: np.ndarray
    y: np.ndarray
    classes: np.ndarray


@dataclass
class Marker:
    """One glyph at a data position (equilibria and the like)."""

    x: float
    y: float
    char: str
    color: str


@dataclass
class Contour:
    """Zero line of ``func(X, Y)`` (arrays of equal shape) drawn in braille dots."""

    func: Callable[[np.ndarray, np.ndarray], np.ndarray]
    color: str


@dataclass
class PlotSpec:
    """What one plot shows; the widget decides nothing else."""

    xlim: tuple[float, float]
    ylim: tuple[float, float]
    series: list[Series] = field(default_factory=list)
    scatter: Scatter | None = None
    markers: list[Marker] = field(default_factory=list)
    contours: list[Contour] = field(default_factory=list)
    bands: Callable[[np.ndarray], np.ndarray] | None = None
    cursor: float | None = None
    title: str = ""
    show_xaxis: bool = True
    x_label: Callable[[float, float], str] | None = None
    """``x_label(value, span) -> text`` of an x-axis tick (default: the number)."""


def _fmt(value: float, span: float, width: int = 7) -> str:
    text = _tick(value, span)
    if len(text) > width:
        text = f"{value:.3g}"
    if len(text) > width:
        text = f"{value:.0e}"
    return text[:width].rjust(width)


def _safe_lim(lim: tuple[float, float]) -> tuple[float, float]:
    lo, hi = float(lim[0]), float(lim[1])
    if not np.isfinite(lo) or not np.isfinite(hi):
        return 0.0, 1.0
    if hi <= lo:
        pad = abs(lo) * 0.05 or 0.5
        return lo - pad, hi + pad
    return lo, hi


def braille_cells(mask: np.ndarray) -> np.ndarray:
    """Pack a ``(4h, 2w)`` boolean pixel mask into ``(h, w)`` braille bit codes."""
    h, w = mask.shape[0] // 4, mask.shape[1] // 2
    blocks = mask[: 4 * h, : 2 * w].reshape(h, 4, w, 2)
    return np.einsum("irjc,rc->ij", blocks.astype(np.uint16), _DOT_BITS)


def _line_mask(
    s: Series, xlim: tuple[float, float], ylim: tuple[float, float], shape: tuple[int, int]
) -> np.ndarray:
    rows, cols = shape
    x0, x1 = xlim
    y0, y1 = ylim
    x = np.asarray(s.x, dtype=float)
    y = np.asarray(s.y, dtype=float)
    mask = np.zeros(shape, dtype=bool)
    if x.size == 0:
        return mask
    edges = x0 + (x1 - x0) * np.arange(cols + 1) / cols
    ye = np.interp(edges, x, y)
    ye[(edges < x[0]) | (edges > x[-1])] = np.nan
    a = max(int(np.searchsorted(x, x0, "left")), 0)
    b = int(np.searchsorted(x, x1, "left"))
    xs, ys = x[a:b], y[a:b]
    lo = np.fmin(ye[:-1], ye[1:])
    hi = np.fmax(ye[:-1], ye[1:])
    if xs.size:
        starts = np.searchsorted(xs, edges[:-1], "left")
        stops = np.searchsorted(xs, edges[1:], "left")
        full = np.flatnonzero(stops > starts)
        lo[full] = np.fmin(lo[full], np.minimum.reduceat(ys, starts[full]))
        hi[full] = np.fmax(hi[full], np.maximum.reduceat(ys, starts[full]))
    scale = rows / (y1 - y0)
    with np.errstate(invalid="ignore"):
        top = np.floor((y1 - hi) * scale)
        bottom = np.floor((y1 - lo) * scale)
    valid = np.isfinite(top) & np.isfinite(bottom) & (bottom >= 0) & (top <= rows - 1)
    top = np.clip(np.nan_to_num(top), 0, rows - 1)
    bottom = np.clip(np.nan_to_num(bottom), 0, rows - 1)
    r = np.arange(rows)[:, None]
    mask |= (r >= top[None, :]) & (r <= bottom[None, :]) & valid[None, :]
    return mask


def _contour_mask(
    c: Contour, xlim: tuple[float, float], ylim: tuple[float, float], shape: tuple[int, int]
) -> np.ndarray:
    rows, cols = shape
    xc = xlim[0] + (xlim[1] - xlim[0]) * (np.arange(cols) + 0.5) / cols
    yc = ylim[1] - (ylim[1] - ylim[0]) * (np.arange(rows) + 0.5) / rows
    grid_x, grid_y = np.meshgrid(xc, yc)
    values = np.asarray(c.func(grid_x, grid_y), dtype=float)
    mask = np.zeros(shape, dtype=bool)
    if values.shape != shape:
        return mask
    sign = values > 0
    finite = np.isfinite(values)
    horiz = (sign[:, 1:] != sign[:, :-1]) & finite[:, 1:] & finite[:, :-1]
    vert = (sign[1:, :] != sign[:-1, :]) & finite[1:, :] & finite[:-1, :]
    mask[:, 1:] |= horiz
    mask[1:, :] |= vert
    return mask


def _glyph_cells(s: Series, xlim, ylim, w: int, h: int) -> tuple[np.ndarray, np.ndarray]:
    """Cell rows and columns of a glyph series: every other column, inside the box."""
    x = np.asarray(s.x, dtype=float)
    if x.size == 0:
        return np.zeros(0, dtype=np.int64), np.zeros(0, dtype=np.int64)
    cols = np.arange(0, w, 2)
    centres = xlim[0] + (xlim[1] - xlim[0]) * (cols + 0.5) / w
    y = np.interp(centres, x, np.asarray(s.y, dtype=float), left=np.nan, right=np.nan)
    with np.errstate(invalid="ignore"):
        rows = np.floor((ylim[1] - y) / (ylim[1] - ylim[0]) * h)
    keep = np.isfinite(rows) & (rows >= 0) & (rows < h)
    return rows[keep].astype(np.int64), cols[keep]


def _scatter_cells(sc: Scatter, xlim, ylim, w: int, h: int) -> np.ndarray:
    """Most frequent class per cell, ``-2`` where the cell holds no point."""
    x = np.asarray(sc.x, dtype=float)
    y = np.asarray(sc.y, dtype=float)
    cls = np.asarray(sc.classes, dtype=np.int64)
    cx = np.floor((x - xlim[0]) / (xlim[1] - xlim[0]) * w)
    cy = np.floor((ylim[1] - y) / (ylim[1] - ylim[0]) * h)
    keep = (cx >= 0) & (cx < w) & (cy >= 0) & (cy < h)
    out = np.full((h, w), -2, dtype=np.int64)
    if not keep.any():
        return out
    n_cls = int(max(cls.max(), -1)) + 2
    cell = cy[keep].astype(np.int64) * w + cx[keep].astype(np.int64)
    counts = np.bincount(cell * n_cls + (cls[keep] + 1), minlength=w * h * n_cls).reshape(
        h * w, n_cls
    )
    filled = counts.sum(axis=1) > 0
    best = counts.argmax(axis=1) - 1
    out.reshape(-1)[filled] = best[filled]
    return out


def band_row(
    xlim: tuple[float, float],
    width: int,
    bands: Callable[[np.ndarray], np.ndarray] | None,
) -> np.ndarray:
    """Class of each of ``width`` cell columns (``-1`` where none)."""
    if bands is None or width <= 0:
        return np.full(max(width, 0), -1, dtype=np.int64)
    centres = xlim[0] + (xlim[1] - xlim[0]) * (np.arange(width) + 0.5) / width
    return np.asarray(bands(centres), dtype=np.int64)


def cursor_column(xlim: tuple[float, float], width: int, cursor: float | None) -> int:
    """Cell column of the cursor, or -1 when it is outside the view."""
    if cursor is None or width <= 0:
        return -1
    col = int(np.floor((cursor - xlim[0]) / (xlim[1] - xlim[0]) * width))
    return col if 0 <= col < width else -1


def _segments(chars: list[str], styles: list[Style]) -> list[Segment]:
    out: list[Segment] = []
    start = 0
    for i in range(1, len(chars) + 1):
        if i == len(chars) or styles[i] != styles[start]:
            out.append(Segment("".join(chars[start:i]), styles[start]))
            start = i
    return out


def _tick(value: float, span: float) -> str:
    """Short label: ``value`` rounded to a thousandth of ``span``."""
    if span > 0 and np.isfinite(span):
        quantum = 10.0 ** (np.floor(np.log10(span)) - 2)
        value = round(value / quantum) * quantum
    text = f"{value:.4g}"
    return "0" if text in ("-0", "0") else text


def _xaxis(
    xlim: tuple[float, float], w: int, x_label: Callable[[float, float], str] | None = None
) -> str:
    row = [" "] * w
    picks = [0.0, 0.5, 1.0] if w < 60 else [0.0, 0.25, 0.5, 0.75, 1.0]
    name = x_label or _tick
    for frac in picks:
        label = name(xlim[0] + frac * (xlim[1] - xlim[0]), xlim[1] - xlim[0])
        pos = round(frac * (w - 1))
        start = min(max(pos - len(label) // 2, 0), w - len(label))
        if start < 0 or any(c != " " for c in row[max(start - 1, 0) : start + len(label) + 1]):
            continue
        row[start : start + len(label)] = list(label)
    return "".join(row)


def render_plot(spec: PlotSpec, width: int, height: int) -> list[list[Segment]]:
    """Rows of segments drawing ``spec`` in a ``width x height`` cell box."""
    w = width - MARGIN
    h = height - (1 if spec.show_xaxis else 0)
    if w < 2 or h < 1:
        return [[Segment(" " * max(width, 0), Style())] for _ in range(max(height, 0))]
    xlim, ylim = _safe_lim(spec.xlim), _safe_lim(spec.ylim)
    shape = (4 * h, 2 * w)
    code = np.zeros((h, w), dtype=np.uint16)
    owner = np.full((h, w), -1, dtype=np.int64)
    colors: list[str] = []
    lines = [s for s in spec.series if not s.glyph]
    layers = [(_line_mask(s, xlim, ylim, shape), s.color) for s in lines]
    # guards last so that they own the cells they share with a trace
    layers += [(_contour_mask(c, xlim, ylim, shape), c.color) for c in spec.contours]
    guard = np.zeros((h, w), dtype=bool)
    for i, (mask, color) in enumerate(layers):
        bits = braille_cells(mask)
        code |= bits
        owner[bits > 0] = len(colors)
        colors.append(color)
        if i >= len(lines):
            guard |= bits > 0
    glyph = np.full((h, w), "", dtype=object)
    glyph_color = np.full((h, w), "", dtype=object)
    for s in spec.series:
        if s.glyph:
            rows, cols = _glyph_cells(s, xlim, ylim, w, h)
            glyph[rows, cols], glyph_color[rows, cols] = s.glyph, s.color
    if spec.scatter is not None:
        cells = _scatter_cells(spec.scatter, xlim, ylim, w, h)
        cells[guard] = -2  # a guard crossing the samples stays visible
        for k in np.unique(cells[cells > -2]):
            sel = cells == k
            glyph[sel] = regime_glyph(int(k))
            glyph_color[sel] = regime_color(int(k))
    for m in spec.markers:
        cx = int(np.floor((m.x - xlim[0]) / (xlim[1] - xlim[0]) * w))
        cy = int(np.floor((ylim[1] - m.y) / (ylim[1] - ylim[0]) * h))
        if 0 <= cx < w and 0 <= cy < h:
            glyph[cy, cx], glyph_color[cy, cx] = m.char, m.color
    bands = band_row(xlim, w, spec.bands)
    band_styles = [band_style(int(b)) for b in bands]
    cur = cursor_column(xlim, w, spec.cursor)
    title = spec.title[: max(w - 1, 0)]
    tick_rows = {0: ylim[1], h - 1: ylim[0]}
    if h >= 5:
        tick_rows[h // 2] = ylim[1] - (h // 2 + 0.5) / h * (ylim[1] - ylim[0])
    lines: list[list[Segment]] = []
    axis_style = Style(dim=True)
    for r in range(h):
        label = (
            _fmt(tick_rows[r], ylim[1] - ylim[0]) + "┤"
            if r in tick_rows
            else " " * (MARGIN - 1) + "│"
        )
        chars: list[str] = []
        styles: list[Style] = []
        for c in range(w):
            base = band_styles[c]
            if r == 0 and c < len(title):
                ch, st = title[c], base + Style(bold=True)
            elif glyph[r, c]:
                ch, st = glyph[r, c], base + Style(color=glyph_color[r, c], bold=True)
            elif code[r, c]:
                ch, st = chr(0x2800 + int(code[r, c])), base + Style(color=colors[owner[r, c]])
            else:
                ch, st = " ", base
            if c == cur:
                st = st + Style(reverse=True)
            chars.append(ch)
            styles.append(st)
        lines.append([Segment(label, axis_style), *_segments(chars, styles)])
    if spec.show_xaxis:
        lines.append(
            [Segment(" " * MARGIN, Style()), Segment(_xaxis(xlim, w, spec.x_label), axis_style)]
        )
    return lines
