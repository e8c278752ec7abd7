"""Open-data screen: a file name and the columns to read."""

from __future__ import annotations

from collections.abc import Callable
from typing import ClassVar

from rich.text import Text
from textual import on, work
from textual.binding import Binding, BindingType
from textual.containers import Horizontal, Vertical
from textual.screen import ModalScreen
from textual.widgets import Footer, Input, Label, Static

from modemap.data.dataset import Dataset

__all__ = ["OpenDataScreen"]

FIELDS = (
    ("path", "data file", "runs.csv"),
    ("time", "time column", "t"),
    ("states", "states", "x, v   (comma separated)"),
    ("inputs", "inputs", "optional"),
    ("run", "run column", "optional"),
)


def _names(text: str) -> list[str]:
    return [n.strip() for n in text.split(",") if n.strip()]


class OpenDataScreen(ModalScreen[tuple[Dataset, dict] | None]):
    """Read a CSV/Parquet file through the library's reader.

    Dismisses with the dataset and how it was read (``files, time, states, inputs, run``,
    the record ``modemap fit`` keeps in the model file), or None.
    """

    BINDINGS: ClassVar[list[BindingType]] = [Binding("escape", "dismiss", "close")]

    def __init__(self, load: Callable[..., Dataset]) -> None:
        super().__init__()
        self.load = load

    def compose(self):
        with Vertical(id="open-box"):
            yield Static("Open data: fill in, enter in any field loads", classes="box-title")
            for key, label, hint in FIELDS:
                with Horizontal(classes="field"):
                    yield Label(label)
                    yield Input(placeholder=hint, id=f"open-{key}")
            yield Static("", id="open-status")
        yield Footer(compact=True)

    def _value(self, key: str) -> str:
        return self.query_one(f"#open-{key}", Input).value.strip()

    @on(Input.Submitted)
    def submit(self) -> None:
        path, time, states = self._value("path"), self._value("time"), _names(self._value("states"))
        if not path or not time or not states:
            self.query_one("#open-status", Static).update(
                Text("✗ a file, a time column and at least one state are needed")
            )
            return
        self.query_one("#open-status", Static).update(Text(f"reading {path}…"))
        self._read(path, time, states, _names(self._value("inputs")), self._value("run") or None)

    @work(thread=True, exclusive=True, group="open")
    def _read(
        self, path: str, time: str, states: list[str], inputs: list[str], run: str | None
    ) -> None:
        try:
            ds = self.load(path, time=time, states=states, inputs=inputs, run=run)
        except Exception as exc:  # the reader's one-line message is shown in place
            self.app.call_from_thread(
                self.query_one("#open-status", Static).update, Text(f"✗ {exc}")
            )
            return
        record = {"files": [path], "time": time, "states": states, "inputs": inputs, "run": run}
        self.app.call_from_thread(self.dismiss, (ds, record))
