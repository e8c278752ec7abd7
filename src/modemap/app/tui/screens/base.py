"""Base class of the dashboard's panels (the views switched with keys 1-5)."""

from __future__ import annotations

from textual.containers import Vertical

from modemap.app.tui.widgets.data import DashboardState

__all__ = ["Panel"]


class Panel(Vertical, can_focus=True):
    """A full-size view; :meth:`reload` redraws it from :attr:`state`."""

    TITLE = ""

    @property
    def state(self) -> DashboardState:
        return self.app.state  # type: ignore[attr-defined]

    def reload(self) -> None:
        """Redraw from the current model, data and run."""
