"""Refit screen: new settings, a background fit with progress and cancel, then a comparison."""

from __future__ import annotations

import threading
from collections.abc import Callable
from typing import Any, ClassVar

import pandas as pd
from rich.console import Group
from rich.text import Text
from textual import on, work
from textual.binding import Binding, BindingType
from textual.containers import Horizontal, Vertical
from textual.screen import ModalScreen
from textual.widgets import Footer, Input, Label, ProgressBar, Static

from modemap._exceptions import FitCancelled
from modemap._progress import ProgressClock, format_duration
from modemap.app.tui.widgets.tables import comparison_table
from modemap.data.dataset import Dataset
from modemap.model.hybrid import HybridModel

__all__ = ["RefitScreen", "parse_options"]

RefitResult = tuple[HybridModel, pd.DataFrame]
FORMS = ("continuous", "discrete")


def parse_options(k: str, threshold: str, degree: str, form: str) -> dict[str, Any]:
    """Fit options from the text fields; raises ValueError with a one-line reason."""
    opts: dict[str, Any] = {}
    k = k.strip() or "auto"
    if k != "auto":
        if not k.isdigit() or not 1 <= int(k) <= 12:
            raise ValueError("regimes: 'auto' or a whole number from 1 to 12")
        opts["n_regimes"] = int(k)
    else:
        opts["n_regimes"] = "auto"
    threshold = threshold.strip() or "auto"
    try:
        opts["threshold"] = threshold if threshold == "auto" else float(threshold)
    except ValueError:
        raise ValueError("threshold: 'auto' or a number") from None
    if isinstance(opts["threshold"], float) and opts["threshold"] < 0:
        raise ValueError("threshold: must not be negative")
    degree = degree.strip() or "auto"
    if degree == "auto":
        opts["degree"] = "auto"
    elif not degree.isdigit() or not 1 <= int(degree) <= 5:
        raise ValueError("degree: 'auto' or a whole number from 1 to 5")
    else:
        opts["degree"] = int(degree)
    if form.strip() not in FORMS:
        raise ValueError("form: 'continuous' or 'discrete'")
    opts["form"] = form.strip()
    return opts


def _defaults(model: HybridModel | None) -> dict[str, str]:
    options = (model.metadata.get("options") or {}) if model is not None else {}
    return {
        "k": str(model.n_regimes) if model is not None and model.n_regimes else "auto",
        "threshold": str(options.get("threshold", "auto")),
        "degree": str(options.get("degree", "auto")),
        "form": model.form if model is not None else "continuous",
    }


class RefitScreen(ModalScreen[RefitResult | None]):
    """Fit again in a worker thread; keep the new model only when the user says so."""

    BINDINGS: ClassVar[list[BindingType]] = [
        Binding("escape", "cancel_or_close", "cancel/close"),
        Binding("k", "keep", "keep new"),
        Binding("d", "discard", "discard"),
    ]

    def __init__(
        self,
        model: HybridModel | None,
        dataset: Dataset,
        refit: Callable[..., RefitResult],
    ) -> None:
        super().__init__()
        self.old = model
        self.dataset = dataset
        self.refit = refit
        self.result: RefitResult | None = None
        self.running = False
        self._cancel = threading.Event()
        self._last: tuple[float, str] = (-1.0, "")
        self._clock = ProgressClock()

    def compose(self):
        d = _defaults(self.old)
        with Vertical(id="refit-box"):
            yield Static("Refit: change settings, press enter to fit", classes="box-title")
            for key, label in (
                ("k", "regimes K"),
                ("threshold", "threshold"),
                ("degree", "term degree"),
                ("form", "form"),
            ):
                with Horizontal(classes="field"):
                    yield Label(label)
                    yield Input(d[key], id=f"opt-{key}")
            yield ProgressBar(total=1.0, show_eta=False, id="refit-progress")
            yield Static("", id="refit-status")
            yield Static("", id="refit-compare")
        yield Footer(compact=True)

    def _set_status(self, text: str) -> None:
        self.query_one("#refit-status", Static).update(Text(text))

    @on(Input.Submitted)
    def start(self) -> None:
        if self.running or self.result is not None:
            return
        values = [
            self.query_one(f"#opt-{k}", Input).value for k in ("k", "threshold", "degree", "form")
        ]
        try:
            options = parse_options(*values)
        except ValueError as exc:
            self._set_status(f"✗ {exc}")
            return
        self._cancel.clear()
        self._last = (-1.0, "")
        self._clock = ProgressClock()
        self.running = True
        for field in self.query(Input):
            field.disabled = True
        self.query_one(ProgressBar).update(progress=0.0)
        self._set_status("fitting… (escape cancels)")
        self._fit(options)

    def _tell(self, callback: Callable[..., Any], *args: Any) -> None:
        """Run ``callback`` on the UI thread; quietly skip it once the app has closed."""
        try:
            self.app.call_from_thread(callback, *args)
        except RuntimeError:  # the app stopped while the fit was running
            pass

    def on_unmount(self) -> None:
        self._cancel.set()  # a fit still running stops at its next progress report

    def _progress(self, fraction: float, message: str) -> None:
        if self._cancel.is_set():
            raise FitCancelled("fit cancelled from the dashboard")
        # the share only moves forward (stages restart their own fractions); pass on only
        # visible changes: the fit may report far more often than a screen can show
        done, elapsed, left = self._clock.update(fraction)
        if message != self._last[1] or done - self._last[0] >= 0.01:
            self._last = (done, message)
            timing = format_duration(elapsed)
            if left is not None:
                timing += f", about {format_duration(left)} left"
            self._tell(self._show_progress, done, f"{message} ({timing})")

    def _show_progress(self, fraction: float, message: str) -> None:
        self.query_one(ProgressBar).update(progress=min(max(fraction, 0.0), 1.0))
        self._set_status(f"fitting… {message}  (escape cancels)")

    @work(thread=True, exclusive=True, group="refit")
    def _fit(self, options: dict[str, Any]) -> None:
        try:
            result = self.refit(self.dataset, options, self._progress)
        except FitCancelled:
            self._tell(self._finish, None, "cancelled: the current model is unchanged")
            return
        except Exception as exc:  # any failure is reported here, the app keeps running
            self._tell(self._finish, None, f"✗ fit failed: {exc}")
            return
        self._tell(self._finish, result, "")

    def _finish(self, result: RefitResult | None, message: str) -> None:
        self.running = False
        if result is None:
            for field in self.query(Input):
                field.disabled = False
            self._set_status(message + "  (enter: fit again, escape: close)")
            return
        self.result = result
        self.query_one(ProgressBar).update(progress=1.0)
        self._set_status("done: k keeps the new model, d discards it")
        self.query_one("#refit-compare", Static).update(
            Group(comparison_table(self.old, result[0]), Text("k keep   d discard", style="bold"))
        )
        self.set_focus(None)
        self.refresh_bindings()

    def check_action(self, action: str, parameters: tuple[object, ...]) -> bool | None:
        if action in ("keep", "discard"):
            return self.result is not None
        return True

    def action_cancel_or_close(self) -> None:
        if self.running:
            self._cancel.set()
            self._set_status("cancelling…")
        else:
            self.dismiss(None)

    def action_keep(self) -> None:
        if self.result is not None:
            self.dismiss(self.result)

    def action_discard(self) -> None:
        if self.result is not None:
            self.dismiss(None)
