"""Regimes panel: equations, equilibria, time constants, shares and dwell times."""

from __future__ import annotations

from typing import ClassVar

from textual.binding import Binding, BindingType
from textual.containers import VerticalScroll
from textual.widgets import Static

from modemap.app.tui.screens.base import Panel
from modemap.app.tui.widgets.tables import regime_details

__all__ = ["RegimesPanel"]


class RegimesPanel(Panel):
    """One block per regime, scrollable."""

    TITLE = "Regimes"
    BINDINGS: ClassVar[list[BindingType]] = [
        Binding("down,j", "scroll(1)", "scroll", key_display="↑↓"),
        Binding("up,k", "scroll(-1)", "scroll", show=False),
        Binding("pagedown,space", "scroll(10)", "page", show=False),
        Binding("pageup", "scroll(-10)", "page up", show=False),
    ]

    def compose(self):
        with VerticalScroll(id="rg-scroll", can_focus=False):
            yield Static(id="rg-body")

    def on_mount(self) -> None:
        self.reload()

    def reload(self) -> None:
        self.query_one("#rg-body", Static).update(
            regime_details(self.state.model, self.app.formatter)
        )  # type: ignore[attr-defined]

    def action_scroll(self, lines: int) -> None:
        scroll = self.query_one(VerticalScroll)
        scroll.scroll_to(y=scroll.scroll_y + lines, animate=False)
