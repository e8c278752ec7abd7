"""Snapshot tests of the main screens on the fixed, invented demo model.

Sizes 80x24 (the smallest supported terminal) and 160x48.  Everything shown is
deterministic: hand-built model, closed-form data, a fake simulator, the plain
equation listing, no clocks (the progress bar shows no ETA).
"""

from __future__ import annotations

import pytest
from textual.widgets import Input

from conftest import demo_app

PANELS = {"timeline": "1", "regimes": "2", "switching": "3", "replay": "4", "phase": "5"}


async def _settle(pilot) -> None:
    await pilot.app.workers.wait_for_complete()
    await pilot.pause()


@pytest.mark.parametrize("colour", [True, False], ids=["colour", "no-colour"])
@pytest.mark.parametrize("size", [(80, 24), (160, 48)], ids=["80x24", "160x48"])
@pytest.mark.parametrize("panel", list(PANELS))
def test_panel(snap_compare, monkeypatch, panel, size, colour):
    if not colour:  # NO_COLOR (no-color.org): the dashboard must still tell things apart
        monkeypatch.setenv("NO_COLOR", "1")

    async def before(pilot):
        await pilot.press(PANELS[panel])
        if panel == "timeline":  # zoom once and move the cursor, to show the read-out
            await pilot.press("plus", *["right"] * 6)
        await _settle(pilot)

    assert snap_compare(demo_app(3), terminal_size=size, run_before=before)


@pytest.mark.parametrize("colour", [True, False], ids=["colour", "no-colour"])
@pytest.mark.parametrize("size", [(80, 24), (160, 48)], ids=["80x24", "160x48"])
def test_help(snap_compare, monkeypatch, size, colour):
    if not colour:
        monkeypatch.setenv("NO_COLOR", "1")
    assert snap_compare(demo_app(3), press=["question_mark"], terminal_size=size)


def test_refit_comparison(snap_compare):
    async def before(pilot):
        await pilot.press("r")
        field = pilot.app.screen.query_one("#opt-k", Input)
        field.value = "4"
        field.focus()
        await pilot.press("enter")
        await _settle(pilot)

    assert snap_compare(demo_app(3), terminal_size=(80, 24), run_before=before)


def test_six_regimes_phase(snap_compare):
    assert snap_compare(demo_app(6), press=["5"], terminal_size=(80, 24))


@pytest.mark.parametrize("colour", [True, False], ids=["colour", "no-colour"])
@pytest.mark.parametrize("size", [(80, 24), (160, 48)], ids=["80x24", "160x48"])
def test_save_asks_where(snap_compare, monkeypatch, size, colour):
    if not colour:
        monkeypatch.setenv("NO_COLOR", "1")

    async def before(pilot):
        await pilot.press("r")
        pilot.app.screen.query_one("#opt-k", Input).focus()
        await pilot.press("enter")
        await _settle(pilot)
        await pilot.press("k", "s")
        await _settle(pilot)

    app = demo_app(3, out="results-of-the-cart", save=lambda *a: "")
    assert snap_compare(app, terminal_size=size, run_before=before)
