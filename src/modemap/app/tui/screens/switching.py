"""Switching panel: guards as inequalities, transition counts, hysteresis."""

from __future__ import annotations

from textual.containers import VerticalScroll
from textual.widgets import Static

from modemap.app.tui.screens.regimes import RegimesPanel
from modemap.app.tui.widgets.tables import switching_details

__all__ = ["SwitchingPanel"]


class SwitchingPanel(RegimesPanel):
    """Where and how often the system moves between regimes."""

    TITLE = "Switching"

    def compose(self):
        with VerticalScroll(id="sw-scroll", can_focus=False):
            yield Static(id="sw-body")

    def reload(self) -> None:
        self.query_one("#sw-body", Static).update(switching_details(self.state.model))
