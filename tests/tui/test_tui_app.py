"""Pilot tests of the dashboard: every panel, the cursor, refit, cancel, save, open data.

All data are the invented, fixed scenario of ``conftest.py``; the fit, the
simulator and the reader are fakes injected through the app's constructor.
"""

from __future__ import annotations

import io
import re
from types import SimpleNamespace

import numpy as np
import pytest
from rich.console import Console
from textual.widgets import ContentSwitcher, Input, Static

from conftest import demo_app, endless_refit, make_dataset, make_labels, make_model, refit_to, sync
from modemap.app.tui.app import DashboardApp
from modemap.app.tui.screens.refit import RefitScreen
from modemap.app.tui.screens.save import SaveScreen
from modemap.app.tui.widgets.tables import plain_equations
from modemap.model.hybrid import Guard

SIZE = (80, 24)


def plain(renderable) -> str:
    """Text of a Rich renderable, as a wide console prints it."""
    console = Console(width=200, record=True, file=io.StringIO(), color_system=None)
    console.print(renderable)
    return console.export_text()


def text_of(app, selector: str) -> str:
    return plain(app.screen.query_one(selector, Static).content)


async def visit_all_panels(app, pilot) -> None:
    for key, name in zip(
        "12345", ("timeline", "regimes", "switching", "replay", "phase"), strict=True
    ):
        await pilot.press(key)
        assert app.query_one(ContentSwitcher).current == name
    await app.workers.wait_for_complete()
    await pilot.pause()


async def _open_data(app, pilot, path: str) -> None:
    """``o``, the file and its columns typed in, read in the background."""
    await pilot.press("o")
    for key, value in (("path", path), ("time", "t"), ("states", "x, v")):
        app.screen.query_one(f"#open-{key}", Input).value = value
    app.screen.query_one("#open-path", Input).focus()
    await pilot.press("enter")
    await app.workers.wait_for_complete()
    await pilot.pause()


async def _refit_and_keep(app, pilot) -> None:
    """``r`` with the settings shown, fitted in the background, then ``k`` keeps it."""
    await pilot.press("r")
    app.screen.query_one("#opt-k", Input).focus()
    await pilot.press("enter")
    await app.workers.wait_for_complete()
    await pilot.pause()
    await pilot.press("k")


@sync
async def test_each_panel_opens_and_shows_the_model():
    app = demo_app(3)
    async with app.run_test(size=SIZE) as pilot:
        await visit_all_panels(app, pilot)
        await pilot.press("2")
        body = text_of(app, "#rg-body")
        # the hand-built model has three regimes with the equation "dx/dt = (1 ± 0.01)·v"
        assert "[A] regime 0" in body and "[C] regime 2" in body
        assert "dx/dt = (1 ± 0.01)·v" in body
        assert "stable focus" in body and "virtual" in body and "τ = 40 s" in body
        await pilot.press("3")
        sw = text_of(app, "#sw-body")
        assert "x > -0.767 m" in sw and "x + 2 v > 1" in sw
        # guards A->B at x > -0.7667 and B->A at x < -0.8667: a band of 0.1 m (arithmetic)
        assert "hysteresis band of 0.1 m in x" in sw
        await pilot.press("question_mark")
        assert type(app.screen).__name__ == "HelpScreen"
        await pilot.press("escape")
        assert len(app.screen_stack) == 1


@sync
async def test_timeline_cursor_zoom_pan_and_runs():
    app = demo_app(3)
    async with app.run_test(size=SIZE) as pilot:
        panel = app.query_one("#timeline")
        for _ in range(7):
            await pilot.press("right")
        await pilot.press("shift+right")
        run = app.state.current_run
        i = int(np.argmin(np.abs(run.time - panel.cursor)))
        assert panel.cursor > run.time[0]
        readout = text_of(app, "#tl-readout")
        # the readout shows the sample nearest to the cursor, with units, and its label
        assert f"t = {run.time[i]:.6g} s" in readout
        assert f"x = {run.states[i, 0]:.5g} m" in readout
        assert f"v = {run.states[i, 1]:.5g} m/s" in readout
        expected = int(make_labels(make_dataset(), 3)["regime"].iloc[i])
        assert f"(regime {expected})" in readout
        await pilot.press("left")
        assert panel.cursor < run.time[i] + 1e-9
        full = panel.view
        await pilot.press("plus")
        assert panel.view[1] - panel.view[0] == pytest.approx(0.5 * (full[1] - full[0]))
        before = panel.view
        await pilot.press("right_square_bracket")
        assert panel.view[0] > before[0]
        await pilot.press("z")
        assert panel.view == full
        await pilot.press("n")
        assert app.state.run == 1
        assert "run 'r2' (2/2)" in text_of(app, "#tl-head")
        await pilot.press("p")
        assert app.state.run == 0


@sync
async def test_refit_with_other_k_then_keep_and_save():
    saved = []
    app = demo_app(
        3,
        refit=refit_to(4),
        out="results",
        save=lambda folder, m, lab, ds: saved.append((m, lab)) or "model.json",
    )
    async with app.run_test(size=SIZE) as pilot:
        await pilot.press("r")
        screen = app.screen
        assert isinstance(screen, RefitScreen)
        field = screen.query_one("#opt-k", Input)
        field.value = "4"
        field.focus()
        await pilot.press("enter")
        await app.workers.wait_for_complete()
        await pilot.pause()
        compare = plain(screen.query_one("#refit-compare", Static).content)
        assert re.search(r"regimes K\s+3\s+4", compare)
        assert re.search(r"criterion\s+910\s+880", compare)  # hand-built rows: 1000 - 30 K
        assert plain(screen.query_one("#refit-status", Static).content).startswith("done")
        await pilot.press("k")
        await pilot.pause()
        assert app.state.model.n_regimes == 4
        assert app.unsaved
        assert "(unsaved)" in text_of(app, "#tabs")
        await pilot.press("q")  # unsaved: the first q only warns
        assert app.is_running
        await pilot.press("s")  # the session's folder is proposed; enter saves
        await pilot.pause()
        assert isinstance(app.screen, SaveScreen)
        assert app.screen.query_one("#save-folder", Input).value == "results"
        await pilot.press("enter")
        await pilot.pause()
        assert len(saved) == 1 and saved[0][0].n_regimes == 4
        assert not app.unsaved


@sync
async def test_refit_rejects_bad_settings_then_discard_keeps_the_old_model():
    calls = []
    fit = refit_to(2)
    app = demo_app(3, refit=lambda *a: calls.append(a) or fit(*a))
    async with app.run_test(size=SIZE) as pilot:
        old = app.state.model
        await pilot.press("r")
        field = app.screen.query_one("#opt-degree", Input)
        field.value = "two"
        field.focus()
        await pilot.press("enter")
        await pilot.pause()
        assert "degree" in plain(app.screen.query_one("#refit-status", Static).content)
        assert calls == []
        field.value = "3"
        await pilot.press("enter")
        await app.workers.wait_for_complete()
        await pilot.pause()
        assert calls[0][1] == {
            "n_regimes": 3,
            "threshold": "auto",
            "degree": 3,
            "form": "continuous",
        }
        await pilot.press("d")
        assert app.state.model is old


@sync
async def test_cancel_a_running_refit():
    app = demo_app(3, refit=endless_refit)
    async with app.run_test(size=SIZE) as pilot:
        old = app.state.model
        await pilot.press("r")
        screen = app.screen
        screen.query_one("#opt-k", Input).focus()
        await pilot.press("enter")
        await pilot.pause(0.1)
        assert screen.running
        assert "working" in plain(screen.query_one("#refit-status", Static).content)
        await pilot.press("escape")
        await app.workers.wait_for_complete()
        await pilot.pause()
        assert not screen.running
        assert "cancelled" in plain(screen.query_one("#refit-status", Static).content)
        await pilot.press("escape")
        assert app.state.model is old
        assert not app.unsaved


@pytest.mark.parametrize("k", [0, 1, 6])
@sync
async def test_starts_on_empty_single_and_six_regime_models(k):
    app = demo_app(k)
    async with app.run_test(size=SIZE) as pilot:
        await visit_all_panels(app, pilot)
        if k == 0:
            assert "empty" in text_of(app, "#rg-body")
        if k == 1:
            assert "nothing to switch to" in text_of(app, "#sw-body")
        if k == 6:
            await pilot.press("1")
            strip = app.query_one("#tl-strip").render_line(0).text
            # six position bands: the run visits the outer ones, A and F
            assert "A" in strip and "F" in strip
            await pilot.resize_terminal(160, 48)  # survives resizing, large and tiny
            await pilot.resize_terminal(40, 12)
            await visit_all_panels(app, pilot)


@sync
async def test_model_without_data_and_data_without_model():
    app = demo_app(3, with_data=False)
    async with app.run_test(size=SIZE) as pilot:
        await visit_all_panels(app, pilot)
        await pilot.press("1")
        assert "No data loaded" in text_of(app, "#tl-head")
        await pilot.press("r")  # nothing to fit on: a warning, no screen
        assert not isinstance(app.screen, RefitScreen)
    app = DashboardApp(None, make_dataset(), None, formatter=plain_equations)
    async with app.run_test(size=SIZE) as pilot:
        await visit_all_panels(app, pilot)
        await pilot.press("s")  # nothing to save: a warning
        assert "no model" in text_of(app, "#tabs")


@sync
async def test_open_data_then_fit_from_inside():
    ds = make_dataset()
    asked = []

    def load(path, *, time, states, inputs=(), run=None):
        asked.append((path, time, tuple(states), tuple(inputs), run))
        return ds

    app = DashboardApp(None, None, None, load=load, refit=refit_to(3), formatter=plain_equations)
    async with app.run_test(size=SIZE) as pilot:
        await _open_data(app, pilot, "cart.csv")
        assert asked == [("cart.csv", "t", ("x", "v"), (), None)]
        assert app.state.dataset is ds
        await _refit_and_keep(app, pilot)
        assert app.state.model.n_regimes == 3
        assert app.state.regimes[0].max() == 2


@sync
async def test_open_data_shows_the_reader_error():
    from modemap._exceptions import DataError

    def load(path, **kwargs):
        raise DataError("no column 'q'", source=path, column="q")

    app = DashboardApp(None, None, None, load=load)
    async with app.run_test(size=SIZE) as pilot:
        await pilot.press("o")
        for key, value in (("path", "a.csv"), ("time", "t"), ("states", "q")):
            app.screen.query_one(f"#open-{key}", Input).value = value
        app.screen.query_one("#open-time", Input).focus()
        await pilot.press("enter")
        await app.workers.wait_for_complete()
        await pilot.pause()
        assert "a.csv, column 'q': no column 'q'" in plain(
            app.screen.query_one("#open-status", Static).content
        )


@sync
async def test_replay_overlays_simulation_and_reports_failure():
    app = demo_app(3)
    async with app.run_test(size=SIZE) as pilot:
        await pilot.press("4")
        await app.workers.wait_for_complete()
        await pilot.pause()
        assert "status 0: ok" in text_of(app, "#rp-head")
        strip = app.query_one("#rp-strip")
        assert strip.render_line(1).text.strip().startswith("model│")
        plot = app.query_one("#rp-plots").query(".trace").first()
        assert len(plot.spec.series) == 2 and plot.spec.series[1].glyph == "•"
        await pilot.press("v")
        assert app.query_one("#rp-table").display
        assert "0.052" in plain(app.query_one("#rp-figures", Static).content)

    def broken(*args):
        raise RuntimeError("step size too small")

    app = demo_app(3, simulate=broken)
    async with app.run_test(size=SIZE) as pilot:
        await pilot.press("4")
        await app.workers.wait_for_complete()
        await pilot.pause()
        assert "simulation failed: step size too small" in text_of(app, "#rp-head")


@sync
async def test_phase_axes_runs_and_undrawable_guard():
    ds = make_dataset()
    labels = make_labels(ds, 2)
    model = make_model(2, ds, labels)
    model.guards.append(Guard(1, 0, ["w"], np.array([1.0]), 0.0, "w > 0"))  # w: no such variable
    app = DashboardApp(
        model, ds, labels, simulate=lambda *a: SimpleNamespace(), formatter=plain_equations
    )
    async with app.run_test(size=SIZE) as pilot:
        await pilot.press("5")
        panel = app.query_one("#phase")
        assert panel.axes == [0, 1]
        await pilot.press("y")  # only two variables: y stays distinct from x
        assert panel.axes[0] != panel.axes[1]
        await pilot.press("n")
        assert "run 'r1'" in text_of(app, "#ph-head")
        assert "not drawn" in text_of(app, "#ph-legend")
        marks = [m.char for m in app.query_one("#ph-plot").spec.markers]
        assert marks == ["●", "◇"]  # regime 0 stable reachable, regime 1 unstable virtual


def saturation(hex_colour: str) -> int:
    rgb = [int(hex_colour[i : i + 2], 16) for i in (0, 2, 4)]
    return max(rgb) - min(rgb)


async def timeline_svg(app) -> tuple[str, str]:
    async with app.run_test(size=SIZE) as pilot:
        await visit_all_panels(app, pilot)
        await pilot.press("1")
        return app.export_screenshot(), app.query_one("#tl-strip").render_line(0).text


@pytest.mark.parametrize("no_color", [True, False])
@sync
async def test_no_color_keeps_regime_letters(monkeypatch, no_color):
    if no_color:
        monkeypatch.setenv("NO_COLOR", "1")
    else:
        monkeypatch.delenv("NO_COLOR", raising=False)
    app = demo_app(3)
    svg, strip = await timeline_svg(app)
    assert app.no_color is no_color
    # window-button colours of the SVG frame are not terminal output
    colours = set(re.findall(r"#([0-9a-f]{6})", svg)) - {"ff5f57", "febc2e", "28c840"}
    # NO_COLOR (no-color.org, common practice): Textual greys every colour, so the
    # exported screen has no saturated colour; with colour on, the regime bands are saturated
    assert (max(saturation(c) for c in colours) <= 3) is no_color
    # either way the regime is readable from the letters of the strip
    # (filters change styles only, never text)
    assert strip.startswith(" regime│BBCCCC")


@sync
async def test_timeline_shows_how_sure_the_labels_are():
    # labels.csv with prob_<id> columns (written by the fit): the strip under the regime
    # band draws the probability of the labelled regime as a block from empty to full
    from modemap.app.tui.widgets.plot import CertaintyStrip

    ds = make_dataset()
    labels = make_labels(ds, 2)
    sure = np.where(labels["time"] < labels["time"].median(), 1.0, 0.5)
    labels["prob_0"] = np.where(labels["regime"] == 0, sure, 1 - sure)
    labels["prob_1"] = 1 - labels["prob_0"]
    app = DashboardApp(make_model(2, ds, labels), ds, labels)
    async with app.run_test(size=SIZE) as pilot:
        await pilot.pause()
        strip = app.query_one("#tl-certainty", CertaintyStrip)
        assert strip.display
        cells = "".join(seg.text for seg in strip.render_line(0))
        assert "certain│" in cells and "█" in cells and "▄" in cells  # 1.0 and 0.5
    plain_app = demo_app(2)  # labels without probabilities: no strip
    async with plain_app.run_test(size=SIZE) as pilot:
        await pilot.pause()
        assert not plain_app.query_one("#tl-certainty", CertaintyStrip).display


@sync
async def test_timeline_draws_the_inputs_too():
    from dataclasses import replace

    from modemap.app.tui.widgets.plot import Plot

    ds = make_dataset()
    runs = tuple(
        replace(r, inputs=(r.time > 10).astype(float)[:, None]) for r in ds.runs
    )  # a step input, invented
    ds = replace(ds, runs=runs, input_names=("u",), units={**ds.units, "u": "V"})
    labels = make_labels(ds, 2)
    app = DashboardApp(make_model(2, ds, labels), ds, labels)
    async with app.run_test(size=(80, 40)) as pilot:
        await pilot.pause()
        plots = list(app.query("#tl-plots Plot").results(Plot))
        assert len(plots) == 3  # x, v and the input u


@sync
async def test_save_after_opening_other_data_proposes_a_new_folder(tmp_path):
    # a session on folder A that opens other data, refits and keeps: folder A holds the
    # results of the first data, so saving proposes a new folder; A is left as it was
    results = tmp_path / "A"
    results.mkdir()
    (results / "model.json").write_text("{}")
    ds = make_dataset()
    saved = []
    app = demo_app(
        3,
        load=lambda path, **_: ds,
        refit=refit_to(2),
        out=results,
        save=lambda folder, m, lab, data: saved.append((folder, m, data)) or str(folder),
    )
    async with app.run_test(size=SIZE) as pilot:
        await _open_data(app, pilot, "other.csv")
        await _refit_and_keep(app, pilot)
        await pilot.press("s")
        await pilot.pause()
        assert isinstance(app.screen, SaveScreen)
        proposed = app.screen.query_one("#save-folder", Input).value
        assert proposed == str(tmp_path / "A-other")
        assert "Other data were opened" in text_of(app, "#save-why")
        await pilot.press("enter")
        await pilot.pause()
        ((folder, model, data),) = saved
        assert folder == tmp_path / "A-other" and data is ds and model.n_regimes == 2
        assert model.metadata["data"]["files"] == ["other.csv"]  # how to reopen the data
        assert not app.unsaved and app.out == tmp_path / "A-other"
    assert (results / "model.json").read_text() == "{}"


@sync
async def test_save_asks_before_replacing_results(tmp_path):
    (tmp_path / "report.md").write_text("old")
    saved = []
    app = demo_app(
        3, refit=refit_to(2), out=tmp_path, save=lambda f, m, lab, d: saved.append(f) or str(f)
    )
    async with app.run_test(size=SIZE) as pilot:
        await _refit_and_keep(app, pilot)
        await pilot.press("s")
        await pilot.pause()
        await pilot.press("enter")  # the folder holds results: asked, not saved yet
        await pilot.pause()
        assert saved == [] and "holds results" in text_of(app, "#save-status")
        await pilot.press("escape")  # keep them
        await pilot.pause()
        assert saved == [] and app.unsaved
        await pilot.press("s")
        await pilot.pause()
        await pilot.press("enter", "enter")  # asked, then confirmed
        await pilot.pause()
        assert saved == [tmp_path] and not app.unsaved


@sync
async def test_a_model_is_saved_only_with_the_data_it_was_fitted_on():
    ds = make_dataset()
    saved = []
    app = demo_app(
        3,
        load=lambda path, **_: ds,
        refit=refit_to(2),
        save=lambda f, m, lab, d: saved.append(f) or str(f),
    )
    async with app.run_test(size=SIZE) as pilot:
        await _refit_and_keep(app, pilot)  # fitted on the first data, then other data opened
        await _open_data(app, pilot, "other.csv")
        await pilot.press("s")
        await pilot.pause()
        assert not isinstance(app.screen, SaveScreen) and saved == []


def test_damaged_labels_file_is_a_note_not_a_crash(tmp_path):
    from modemap.app.tui.app import load_view_inputs
    from modemap.model.modelfile import save_model

    ds = make_dataset()
    save_model(make_model(2, ds, make_labels(ds, 2)), tmp_path / "model.json")
    for content, fragment in (
        (b"", "not read"),
        (b"garbage\x00\x01,\n", "no column 'run'"),
        (b"run,time,regime\nr1,0,7\n", "row 2 holds regime '7'"),
        (b"run,time,regime\nr1,abc,0\n", "row 2 has no numeric time"),
    ):
        (tmp_path / "labels.csv").write_bytes(content)
        model, _, labels, notes = load_view_inputs(tmp_path)
        assert labels is None and model.n_regimes == 2
        assert any(fragment in n for n in notes), notes


@sync
async def test_date_time_logs_get_a_date_time_axis():
    from dataclasses import replace

    from modemap.app.tui.widgets.plot import Plot

    ds = make_dataset()
    start = np.datetime64("2026-03-01T06:00:00", "us")
    runs = tuple(
        replace(r, stamps=start + np.round(r.time * 1e6).astype("timedelta64[us]")) for r in ds.runs
    )  # invented stamps: the numeric time is seconds since the first stamp, as read
    ds = replace(ds, runs=runs)
    labels = make_labels(ds, 2)
    app = DashboardApp(make_model(2, ds, labels), ds, labels, formatter=plain_equations)
    async with app.run_test(size=SIZE) as pilot:
        await pilot.pause()
        head = text_of(app, "#tl-head")
        assert "2026-03-01 06:00:00 … 2026-03-01 06:00:39" in head  # 39.9 s after 06:00
        plots = list(app.query("#tl-plots Plot").results(Plot))
        axis = "".join(seg.text for seg in plots[-1]._lines()[-1])
        assert "06:00:00" in axis and "06:00:20" in axis  # hh:mm:ss (rounded) under 2 min
        assert "t = 0 s (2026-03-01 06:00:00)" in text_of(app, "#tl-readout")


@sync
async def test_keys_work_while_a_simulation_runs():
    # the re-simulation runs in a worker thread: switching panels and runs does not wait for it
    import threading
    import time as _time

    from conftest import fake_simulate

    release = threading.Event()

    def slow(*args):
        release.wait(10.0)  # a long re-simulation (the library bounds it by its budgets)
        return fake_simulate(*args)

    app = demo_app(3, simulate=slow)
    async with app.run_test(size=SIZE) as pilot:
        await pilot.press("4")
        await pilot.pause()
        assert "simulating" in text_of(app, "#rp-head")
        start = _time.monotonic()
        await pilot.press("n", "1", "2")
        assert app.query_one(ContentSwitcher).current == "regimes"
        assert _time.monotonic() - start < 5.0
        release.set()
        await app.workers.wait_for_complete()
