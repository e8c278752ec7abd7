"""Save screen: the folder the results go to, and a question before replacing results."""

from __future__ import annotations

from collections.abc import Callable
from pathlib import Path
from typing import ClassVar

from rich.text import Text
from textual import on
from textual.binding import Binding, BindingType
from textual.containers import Vertical
from textual.screen import ModalScreen
from textual.widgets import Footer, Input, Static

__all__ = ["SaveScreen"]

_HINT = "enter saves, escape keeps everything as it is"


class SaveScreen(ModalScreen[Path | None]):
    """Ask where to save; ask again before replacing results already in that folder.

    Parameters
    ----------
    folder : str
        The folder proposed (the session's results folder, or a new name).
    why : str
        One sentence at the top saying why this folder is proposed.
    holds_results : callable
        ``holds_results(path) -> bool``: whether saving there would replace results.

    Dismisses with the chosen folder, or None when the user gives up (escape).
    """

    BINDINGS: ClassVar[list[BindingType]] = [Binding("escape", "dismiss", "keep as is")]

    def __init__(self, folder: str, why: str, holds_results: Callable[[Path], bool]) -> None:
        super().__init__()
        self.folder = folder
        self.why = why
        self.holds_results = holds_results
        self._confirm: Path | None = None  # the folder whose replacement was asked about

    def compose(self):
        with Vertical(id="save-box"):
            yield Static("Save the model, labels and report", classes="box-title")
            yield Static(Text(self.why), id="save-why")
            yield Input(value=self.folder, placeholder="folder", id="save-folder")
            yield Static(_HINT, id="save-status")
        yield Footer(compact=True)

    def on_mount(self) -> None:
        self.query_one("#save-folder", Input).focus()

    @on(Input.Changed)
    def _changed(self) -> None:
        self._confirm = None
        self.query_one("#save-status", Static).update(_HINT)

    @on(Input.Submitted)
    def submit(self) -> None:
        text = self.query_one("#save-folder", Input).value.strip()
        status = self.query_one("#save-status", Static)
        if not text:
            status.update(Text("✗ a folder name is needed"))
            return
        folder = Path(text)
        if folder.exists() and not folder.is_dir():
            status.update(Text(f"✗ {folder} exists and is not a folder"))
            return
        if self.holds_results(folder) and self._confirm != folder:
            self._confirm = folder
            status.update(
                Text(
                    f"{folder} holds results: enter again replaces all of them, escape keeps them",
                    style="bold",
                )
            )
            return
        self.dismiss(folder)
