"""Help screen: every key of the dashboard."""

from __future__ import annotations

from typing import ClassVar

from rich.table import Table
from rich.text import Text
from textual.binding import Binding, BindingType
from textual.containers import VerticalScroll
from textual.screen import ModalScreen
from textual.widgets import Footer, Static

__all__ = ["HELP_KEYS", "HelpScreen"]

HELP_KEYS: list[tuple[str, list[tuple[str, str]]]] = [
    (
        "everywhere",
        [
            ("1 … 5", "Timeline, Regimes, Switching, Replay, Phase"),
            ("r", "refit with other settings (K, threshold, degree, form)"),
            ("o", "open a data file"),
            ("s", "save the model, labels and report (asks where; asks before replacing)"),
            ("?", "this help"),
            ("q", "quit"),
        ],
    ),
    (
        "Timeline",
        [
            ("← →  shift+← →", "move the cursor by one / ten columns"),
            ("+ -", "zoom in / out around the cursor"),
            ("[ ]", "pan left / right"),
            ("z", "show the whole run"),
            ("n p", "next / previous run"),
        ],
    ),
    ("Regimes, Switching", [("↑ ↓  PgUp PgDn", "scroll")]),
    ("Replay", [("n p", "next / previous run"), ("v", "traces ⇄ validation figures")]),
    (
        "Phase",
        [
            ("x y", "next variable on the x / y axis"),
            ("n", "all runs → one run → …"),
            ("g", "guards on / off"),
        ],
    ),
    (
        "Refit",
        [
            ("enter", "start the fit"),
            ("escape", "cancel a running fit, or close"),
            ("k d", "keep / discard the new model"),
        ],
    ),
]


def help_table() -> Table:
    table = Table(show_header=False, box=None, padding=(0, 1))
    table.add_column(style="bold", no_wrap=True)
    table.add_column()
    for section, keys in HELP_KEYS:
        table.add_row(Text(section, style="underline"), "")
        for key, what in keys:
            table.add_row(Text(key), Text(what))
    table.add_row("", "")
    table.add_row("letters", "A, B, C … mark regimes 0, 1, 2 … wherever colour is shown")
    return table


class HelpScreen(ModalScreen[None]):
    """Keys, grouped by panel."""

    BINDINGS: ClassVar[list[BindingType]] = [
        Binding("escape,question_mark,q", "dismiss", "close"),
        Binding("down,j", "scroll(1)", "scroll", show=False),
        Binding("up,k", "scroll(-1)", "scroll", show=False),
    ]

    def compose(self):
        with VerticalScroll(id="help-box"):
            yield Static(help_table())
        yield Footer(compact=True)

    def action_scroll(self, lines: int) -> None:
        box = self.query_one(VerticalScroll)
        box.scroll_to(y=box.scroll_y + lines, animate=False)
