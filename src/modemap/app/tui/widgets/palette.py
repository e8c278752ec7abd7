"""Colours and glyphs of the dashboard.

Every regime has a colour *and* a letter, so that the information survives a
monochrome terminal (``NO_COLOR``) or a reader who cannot tell the colours
apart.  The palette is our own: eight hues spaced around the colour wheel at
similar lightness, plus a darkened copy of each for background bands.
"""

from __future__ import annotations

from rich.color import Color
from rich.style import Style

__all__ = [
    "SIM_COLOR",
    "TRACE_COLORS",
    "UNASSIGNED_GLYPH",
    "band_style",
    "regime_color",
    "regime_glyph",
    "regime_name",
    "trace_color",
]

REGIME_COLORS = (
    "#3fb6a8",  # teal
    "#e8a33d",  # amber
    "#d9576b",  # brick rose
    "#8f7fd6",  # lavender
    "#7cb85a",  # leaf
    "#4d9de0",  # sky
    "#c97bc0",  # orchid
    "#b0a36a",  # olive
)
TRACE_COLORS = ("#f2f2f2", "#ffd866", "#7fdbff", "#ff9ecd", "#b5f58c", "#ffb07a")
SIM_COLOR = "#ff8f40"
GUARD_COLOR = "#e0e0e0"
UNASSIGNED_GLYPH = "·"
_GLYPHS = "ABCDEFGHJKLMNPQRSTUVWXYZ"
_BACKGROUND = (24, 26, 32)


def regime_glyph(regime: int) -> str:
    """The letter shown for regime ``regime`` (``·`` for unassigned samples)."""
    if regime < 0:
        return UNASSIGNED_GLYPH
    return _GLYPHS[regime % len(_GLYPHS)]


def regime_name(regime: int) -> str:
    """``"A (regime 0)"``: the letter and the id used by the library."""
    return f"{regime_glyph(regime)} (regime {regime})"


def regime_color(regime: int) -> str:
    """Foreground colour of a regime as a hex string."""
    if regime < 0:
        return "#808080"
    return REGIME_COLORS[regime % len(REGIME_COLORS)]


def trace_color(index: int) -> str:
    """Colour of the ``index``-th plotted state."""
    return TRACE_COLORS[index % len(TRACE_COLORS)]


def _darken(hex_color: str, weight: float = 0.3) -> Color:
    rgb = Color.parse(hex_color).get_truecolor()
    mixed = [round(weight * c + (1 - weight) * b) for c, b in zip(rgb, _BACKGROUND, strict=True)]
    return Color.from_rgb(*mixed)


_BANDS = [Style(bgcolor=_darken(c)) for c in REGIME_COLORS]


def band_style(regime: int) -> Style:
    """Background style of a regime band (plain for unassigned samples)."""
    if regime < 0:
        return Style()
    return _BANDS[regime % len(_BANDS)]


#: One meaning per symbol on every panel: the shape says where an equilibrium lies (circle:
#: reachable, inside its regime; diamond: virtual), the fill says its stability.
EQUILIBRIUM_LEGEND = (
    "●/○ stable/unstable equilibrium, ◆/◇ the same but virtual (outside its regime)"
)


def equilibrium_mark(stability: str, inside: bool) -> str:
    """``●``/``○`` stable/unstable reachable, ``◆``/``◇`` stable/unstable virtual."""
    stable = stability.strip().lower().startswith("stable")
    if inside:
        return "●" if stable else "○"
    return "◆" if stable else "◇"
