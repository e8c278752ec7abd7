"""Unit tests of the dashboard's drawing and table helpers (no app running)."""

from __future__ import annotations

import collections

import numpy as np
import pandas as pd
import pytest

from conftest import make_dataset, make_labels, make_model, sync
from modemap.app.tui.screens.refit import parse_options
from modemap.app.tui.widgets.canvas import (
    Contour,
    PlotSpec,
    Scatter,
    Series,
    _glyph_cells,
    _line_mask,
    _scatter_cells,
    braille_cells,
    render_plot,
)
from modemap.app.tui.widgets.data import align_labels, band_function, evaluate_guard, nearest_index
from modemap.app.tui.widgets.tables import hysteresis_notes, plain_equations
from modemap.model.hybrid import Guard


def test_braille_code_points():
    # Unicode Braille Patterns block (U+2800-U+28FF): dot k sets bit k-1; dots 1,2,3,7 run down
    # the left column and 4,5,6,8 down the right one (The Unicode Standard, chapter 21.1).
    def cell(*pixels):
        mask = np.zeros((4, 2), dtype=bool)
        for r, c in pixels:
            mask[r, c] = True
        return chr(0x2800 + int(braille_cells(mask)[0, 0]))

    assert cell((0, 0)) == "\u2801"  # dot 1
    assert cell((3, 1)) == "\u2880"  # dot 8
    assert cell((0, 0), (1, 0), (2, 0), (3, 0)) == "⡇"  # dots 1,2,3,7 = U+2847
    assert cell(*[(r, c) for r in range(4) for c in range(2)]) == "\u28ff"


def test_constant_line_fills_exactly_one_pixel_row():
    s = Series(np.linspace(0, 10, 101), np.full(101, 0.5), "#ffffff")
    mask = _line_mask(s, (0.0, 10.0), (0.0, 1.0), (8, 40))
    # y = 0.5 of [0, 1] on 8 pixel rows lands in row floor((1 - 0.5) * 8) = 4 (arithmetic)
    assert mask[4].all() and mask.sum() == 40


def test_line_envelope_matches_a_per_column_loop():
    # min/max envelope per pixel column joined through edge values (common practice for
    # drawing long records): compare with a plain loop over columns
    rng = np.random.default_rng(3)
    x = np.sort(rng.uniform(0, 1, 5000))
    y = np.cumsum(rng.normal(size=5000))
    rows, cols = 40, 60
    ylim = (y.min() - 1, y.max() + 1)
    mask = _line_mask(Series(x, y, "#ffffff"), (0.0, 1.0), ylim, (rows, cols))
    edges = np.linspace(0, 1, cols + 1)
    ye = np.interp(edges, x, y)
    for c in range(cols):
        inside = y[(x >= edges[c]) & (x < edges[c + 1])]
        vals = np.concatenate([inside, ye[c : c + 2]])
        top = int(np.floor((ylim[1] - vals.max()) * rows / (ylim[1] - ylim[0])))
        bottom = int(np.floor((ylim[1] - vals.min()) * rows / (ylim[1] - ylim[0])))
        assert np.flatnonzero(mask[:, c]).tolist() == list(range(top, bottom + 1))


def test_glyph_line_marks_every_other_column_at_its_value():
    # a line y = x drawn as glyphs in a 10 x 5 cell box over [0, 1] x [0, 1]: column c
    # (centre (c + 0.5) / 10) lies in row floor((1 - y) * 5), by hand
    s = Series(np.linspace(0, 1, 50), np.linspace(0, 1, 50), "#ffffff", glyph="•")
    rows, cols = _glyph_cells(s, (0.0, 1.0), (0.0, 1.0), 10, 5)
    assert cols.tolist() == [0, 2, 4, 6, 8]
    assert rows.tolist() == [int(np.floor((1 - (c + 0.5) / 10) * 5)) for c in cols]
    lines = render_plot(PlotSpec((0.0, 1.0), (0.0, 1.0), series=[s], show_xaxis=False), 18, 5)
    text = ["".join(seg.text for seg in line)[8:] for line in lines]
    assert sum(row.count("•") for row in text) == 5


def test_guard_stays_visible_over_the_samples():
    # samples of regime 0 fill every cell; the guard x = 0.5 crosses them: its cells show
    # braille dots, the others the regime letter
    g = np.linspace(0, 1, 60)
    X, Y = np.meshgrid(g, g)
    spec = PlotSpec(
        (0.0, 1.0),
        (0.0, 1.0),
        scatter=Scatter(X.ravel(), Y.ravel(), np.zeros(X.size, dtype=np.int64)),
        contours=[Contour(lambda x, y: x - 0.5, "#ffffff")],
        show_xaxis=False,
    )
    for line in render_plot(spec, 18, 5):
        row = "".join(seg.text for seg in line)[8:]
        assert row.count("A") == 9 and sum(0x2800 <= ord(c) <= 0x28FF for c in row) == 1


def test_scatter_cell_holds_most_frequent_class():
    rng = np.random.default_rng(7)
    x, y = rng.uniform(0, 1, 400), rng.uniform(0, 1, 400)
    cls = rng.integers(0, 3, 400)
    cells = _scatter_cells(Scatter(x, y, cls), (0.0, 1.0), (0.0, 1.0), 4, 2)
    for cy in range(2):
        for cx in range(4):
            sel = (np.floor(x * 4) == cx) & (np.floor((1 - y) * 2) == cy)
            counts = collections.Counter(cls[sel].tolist())  # reference: Python's Counter
            best = max(counts.values())
            assert counts[int(cells[cy, cx])] == best


def test_contour_of_a_one_variable_guard_is_a_vertical_line():
    spec = PlotSpec(
        xlim=(0.0, 1.0), ylim=(0.0, 1.0), contours=[Contour(lambda gx, gy: gx - 0.3, "#ffffff")]
    )
    lines = render_plot(spec, 8 + 10, 5)
    text = ["".join(seg.text for seg in line)[8:] for line in lines[:4]]  # 4 rows + x axis
    # x = 0.3 on 10 cells (20 pixel columns) lies in cell column 3 (arithmetic)
    assert all(row[3] != " " and row[:3].strip() == "" and row[4:].strip() == "" for row in text)


def test_render_survives_degenerate_input():
    spec = PlotSpec(
        xlim=(1.0, 1.0),
        ylim=(np.nan, np.nan),
        series=[Series(np.array([1.0]), np.array([2.0]), "#ffffff")],
    )
    for size in ((3, 2), (9, 1), (40, 6)):
        lines = render_plot(spec, *size)
        assert len(lines) == size[1]


def test_align_labels_nearest_within_half_a_step():
    ds = make_dataset()
    labels = make_labels(ds, 3)
    aligned = align_labels(ds, labels)
    assert np.array_equal(aligned[0], labels.loc[labels.run == "r1", "regime"].to_numpy())
    # labels one 0.1 s step late: each sample takes its predecessor's label; the first
    # sample has no stored time within half a step and stays unassigned
    late = align_labels(ds, labels.assign(time=labels.time + 0.1))[0]
    assert late[0] == -1 and np.array_equal(late[1:], aligned[0][:-1])
    assert (align_labels(ds, pd.DataFrame({"run": [], "time": [], "regime": []}))[1] == -1).all()


def test_band_function_and_nearest_index():
    t = np.array([0.0, 1.0, 2.0, 3.0])
    bands = band_function(t, np.array([0, 0, 1, 2]))
    assert bands(np.array([-0.5, 0.5, 2.5, 3.0, 3.5])).tolist() == [-1, 0, 1, 2, -1]
    assert nearest_index(t, np.array([0.4, 0.6, 9.0])).tolist() == [0, 1, 3]


def test_evaluate_guard_on_monomials():
    Z = np.array([[1.0, 2.0, 3.0], [-1.0, 0.5, 2.0]])
    g = Guard(0, 1, ["1", "x", "x*v", "x^2*u"], np.array([0.5, 1.0, -2.0, 3.0]), -1.0)
    expected = 0.5 + Z[:, 0] - 2 * Z[:, 0] * Z[:, 1] + 3 * Z[:, 0] ** 2 * Z[:, 2] - 1.0  # by hand
    assert np.allclose(evaluate_guard(g, Z, ["x", "v", "u"]), expected)
    with pytest.raises(ValueError):
        evaluate_guard(Guard(0, 1, ["w"], np.array([1.0]), 0.0), Z, ["x", "v", "u"])


def test_hysteresis_note_reports_the_band():
    ds = make_dataset()
    model = make_model(2, ds, make_labels(ds, 2))
    # A->B at x > 0 and B->A at x < -0.1 (hand-built guards): a band of 0.1 m
    assert hysteresis_notes(model) == [
        "A→B at x > 0, B→A at x < -0.1: hysteresis band of 0.1 m in x"
    ]


def test_parse_options():
    assert parse_options("4", "0.05", "2", "discrete") == {
        "n_regimes": 4,
        "threshold": 0.05,
        "degree": 2,
        "form": "discrete",
    }
    assert parse_options("", "", "1", "continuous")["n_regimes"] == "auto"
    assert parse_options("2", "auto", "auto", "continuous")["degree"] == "auto"
    assert parse_options("2", "auto", "", "continuous")["degree"] == "auto"
    for bad in (
        ("0", "auto", "2", "continuous"),
        ("2", "-1", "2", "continuous"),
        ("2", "auto", "x", "continuous"),
        ("2", "auto", "2", "hybrid"),
    ):
        with pytest.raises(ValueError):
            parse_options(*bad)


def test_plain_equations():
    lines = plain_equations(
        ["1", "x"],
        np.array([[0.5, 0.0], [-2.0, 1.0]]),
        ["x", "v"],
        stderr=np.array([[0.1, 0.0], [0.2, 0.05]]),
        form="discrete",
    )
    assert lines == ["x[k+1] = (0.5 ± 0.1) + (-2 ± 0.2)·x", "v[k+1] = (1 ± 0.05)·x"]


def test_equilibrium_line_shows_standard_errors():
    from modemap.app.tui.widgets.tables import _equilibrium_line
    from modemap.model.hybrid import Equilibrium

    ds = make_dataset()
    model = make_model(2, ds, make_labels(ds, 2))
    states = list(model.states)
    eq = Equilibrium(
        point={s: 1.5 for s in states},
        eigenvalues=np.array([-1.0] * len(states), dtype=complex),
        stability="stable node",
        stderr={s: (0.02 if i == 0 else np.inf) for i, s in enumerate(states)},
    )
    text = _equilibrium_line(eq, model, "s").plain
    unit = model.units.get(states[0], "")
    assert f"{states[0]}=1.5 ± 0.02{' ' + unit if unit else ''}" in text
    assert f"{states[1]}=1.5 ± ∞" in text


def test_source_spec_reads_the_recorded_data_file(tmp_path):
    from modemap.app.tui.app import _source_spec

    ds = make_dataset()
    model = make_model(2, ds, make_labels(ds, 2))
    assert _source_spec(model, tmp_path) is None
    model.metadata["source"] = "runs.csv"
    paths, opts = _source_spec(model, tmp_path)
    assert paths == [str(tmp_path / "runs.csv")]
    assert opts == {"time": "t", "states": ["x", "v"], "inputs": []}
    model.metadata["source"] = "<DataFrame>"
    assert _source_spec(model, tmp_path) is None
    # the record `modemap fit` writes wins over the plain source label
    model.metadata["data"] = {"files": ["/abs/a.csv", "b.csv"], "run": "batch", "max_gap": 3.0}
    paths, opts = _source_spec(model, tmp_path)
    assert paths == ["/abs/a.csv", str(tmp_path / "b.csv")]
    assert opts["run"] == "batch" and opts["max_gap"] == 3.0


@sync
async def test_startup_notes_are_shown():
    from modemap.app.tui.app import DashboardApp

    app = DashboardApp(None, None, None, notes=["labels.csv: not found [x]"])
    async with app.run_test(size=(80, 24)) as pilot:
        await pilot.pause()
        assert [n.message for n in app._notifications] == ["labels.csv: not found [x]"]
