"""Tests of modemap.data.intake: reading, validation, runs, gaps, sampling, summary.

Expected values come from the data written in each test, from pandas/pyarrow (Parquet
round trip) and from numpy.interp (reference for linear interpolation).  The validation
rules themselves are common practice for logged time series (strictly increasing time,
finite numbers, enough samples to difference).
"""

from __future__ import annotations

import json

import numpy as np
import pandas as pd
import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from modemap._exceptions import DataError, ModemapError
from modemap.data.intake import parse_header, peek_columns, read_data, summarize

RNG_SEED = 20261201


def _frame(n: int = 12, step: float = 0.5) -> pd.DataFrame:
    rng = np.random.default_rng(RNG_SEED)
    t = np.arange(n) * step
    return pd.DataFrame({"t [s]": t, "x [m]": rng.normal(size=n), "u": rng.normal(size=n)})


# --------------------------------------------------------------------------- headers, basics


@pytest.mark.parametrize(
    ("header", "expected"),
    [
        ("T [degC]", ("T", "degC")),
        ("  flow rate [m3/h] ", ("flow rate", "m3/h")),
        ("x", ("x", "")),
        ("x []", ("x", "")),
        ("T (degC)", ("T (degC)", "")),  # only the bracket syntax carries units
        ("[K]", ("[K]", "")),  # no name: not a unit header
    ],
)
def test_parse_header(header, expected):
    # The documented header syntax `name [unit]` (common practice in logged-data exports).
    assert parse_header(header) == expected


def test_csv_values_names_units_index(write_file, ramp_csv):
    path = write_file("log.csv", ramp_csv(n=10, step=0.1))
    ds = read_data(path, time="t", states=["x [m]"], inputs=["u"])
    expected = pd.read_csv(path)  # reference: pandas' own reading of the same file
    run = ds.runs[0]
    np.testing.assert_array_equal(run.time, expected["t [s]"].to_numpy())
    np.testing.assert_array_equal(run.states[:, 0], expected["x [m]"].to_numpy())
    np.testing.assert_array_equal(run.inputs[:, 0], expected["u"].to_numpy())
    np.testing.assert_array_equal(run.index, np.arange(10))
    assert (ds.time_name, ds.state_names, ds.input_names) == ("t", ("x",), ("u",))
    assert ds.units == {"t": "s", "x": "m", "u": ""}
    assert ds.step == pytest.approx(0.1)
    assert ds.n_rows == 10 and run.name == "0" and run.origin == "0"
    assert ds.warnings == () and ds.gaps == () and not ds.resampled


def test_full_header_and_bare_name_are_the_same_column(write_file, ramp_csv):
    path = write_file("log.csv", ramp_csv())
    a = read_data(path, time="t [s]", states=["x"])
    b = read_data(path, time="t", states=["x [m]"])
    np.testing.assert_array_equal(a.runs[0].states, b.runs[0].states)
    assert a.state_names == b.state_names == ("x",)


def test_name_with_a_different_unit_is_missing(write_file, ramp_csv):
    path = write_file("log.csv", ramp_csv())
    with pytest.raises(DataError, match=r"column 'x \[km\]'.*no such column"):
        read_data(path, time="t", states=["x [km]"])


def test_parquet_round_trip(tmp_path):
    frame = _frame()
    path = tmp_path / "log.parquet"
    frame.to_parquet(path, engine="pyarrow", index=False)  # reference writer: pyarrow
    ds = read_data(path, time="t", states=["x"], inputs=["u"])
    np.testing.assert_array_equal(ds.runs[0].time, frame["t [s]"].to_numpy())
    np.testing.assert_array_equal(ds.runs[0].states[:, 0], frame["x [m]"].to_numpy())
    np.testing.assert_array_equal(ds.runs[0].inputs[:, 0], frame["u"].to_numpy())
    assert ds.units["x"] == "m"


def test_parquet_error_says_row_index(tmp_path):
    frame = _frame()
    frame.loc[4, "x [m]"] = np.nan
    path = tmp_path / "bad.pq"
    frame.to_parquet(path, index=False)
    with pytest.raises(
        DataError, match=r"bad\.pq, column 'x \[m\]': empty or NaN cell at row index 4"
    ):
        read_data(path, time="t", states=["x"])


def test_corrupt_parquet_is_a_data_error(write_file):
    path = write_file("junk.parquet", b"PAR1 not really parquet")
    with pytest.raises(DataError, match=r"junk\.parquet: not a readable Parquet file"):
        read_data(path, time="t", states=["x"])


# --------------------------------------------------------------------------- runs


def test_several_files_are_several_runs(write_file, ramp_csv):
    a = write_file("first.csv", ramp_csv(n=9))
    b = write_file("second.csv", ramp_csv(n=11))
    ds = read_data([a, b], time="t", states=["x"])
    assert [r.name for r in ds.runs] == ["first", "second"]
    assert ds.lengths.tolist() == [9, 11]
    # index counts data rows across files in the order given (dataset.py contract)
    np.testing.assert_array_equal(ds.runs[1].index, np.arange(9, 20))
    assert ds.n_rows == 20 and ds.source.endswith("second.csv")


def test_run_column_groups_interleaved_rows(write_file):
    rows = []
    for k in range(8):
        rows += [f"{k},{k},A", f"{k},{10 + k},B"]
    path = write_file("mix.csv", "time,x,id\n" + "\n".join(rows) + "\n")
    ds = read_data(path, time="time", states=["x"], run="id")
    assert [r.name for r in ds.runs] == ["A", "B"]
    np.testing.assert_array_equal(ds.runs[1].states[:, 0], 10 + np.arange(8))
    np.testing.assert_array_equal(ds.runs[1].index, 2 * np.arange(8) + 1)


def test_run_column_with_several_files(write_file):
    text = "t,x,run\n" + "\n".join(f"{k % 8},{k},{1 + k // 8}" for k in range(16)) + "\n"
    a, b = write_file("a.csv", text), write_file("b.csv", text)
    ds = read_data([a, b], time="t", states=["x"], run="run")
    assert [r.name for r in ds.runs] == ["a/1", "a/2", "b/1", "b/2"]


def test_same_stem_in_two_folders_gets_unique_names(tmp_path, ramp_csv):
    (tmp_path / "p").mkdir()
    (tmp_path / "q").mkdir()
    (tmp_path / "p" / "log.csv").write_text(ramp_csv())
    (tmp_path / "q" / "log.csv").write_text(ramp_csv())
    ds = read_data([tmp_path / "p" / "log.csv", tmp_path / "q" / "log.csv"], time="t", states=["x"])
    assert [r.name for r in ds.runs] == ["log", "log-2"]


def test_units_must_agree_between_files(write_file, ramp_csv):
    a = write_file("a.csv", ramp_csv())
    b = write_file("b.csv", ramp_csv().replace("x [m]", "x [mm]"))
    with pytest.raises(DataError, match=r"b\.csv, column 'x': unit 'mm' differs from 'm'"):
        read_data([a, b], time="t", states=["x"])


# --------------------------------------------------------------------------- gaps and sampling


def _gap_frame() -> pd.DataFrame:
    t = np.concatenate([np.arange(10) * 0.1, 5.0 + np.arange(12) * 0.1])
    return pd.DataFrame({"t": t, "x": np.arange(t.size, dtype=float)})


def test_gap_splits_run_and_is_reported():
    ds = read_data(_gap_frame(), time="t", states=["x"])
    assert [r.name for r in ds.runs] == ["0#1", "0#2"]
    assert ds.lengths.tolist() == [10, 12]
    (gap,) = ds.gaps
    assert (gap.start, gap.end) == (pytest.approx(0.9), pytest.approx(5.0))
    assert gap.steps == pytest.approx(41.0)  # (5.0 - 0.9) / 0.1
    assert any("gap from t=0.9 to t=5" in w for w in ds.warnings)
    np.testing.assert_array_equal(ds.runs[1].index, np.arange(10, 22))


def test_short_piece_between_gaps_is_dropped_with_warning():
    frame = _gap_frame()
    ds = read_data(frame, time="t", states=["x"], min_samples=11)
    assert [r.name for r in ds.runs] == ["0#2"]
    assert any("'0#1': only 10 samples between gaps" in w and "dropped" in w for w in ds.warnings)


def test_gap_threshold_follows_max_gap():
    ds = read_data(_gap_frame(), time="t", states=["x"], max_gap=50.0)
    assert len(ds.runs) == 1 and ds.gaps == ()


def _irregular() -> pd.DataFrame:
    rng = np.random.default_rng(RNG_SEED)
    t = np.cumsum(rng.uniform(0.08, 0.12, size=40))
    return pd.DataFrame({"t": t, "x": np.sin(t), "u": np.cos(3 * t)})


def test_irregular_sampling_warns_and_keeps_samples():
    frame = _irregular()
    ds = read_data(frame, time="t", states=["x"], inputs=["u"])
    dt = np.diff(frame["t"].to_numpy())
    spread = (dt.max() - dt.min()) / np.median(dt)
    (note,) = ds.warnings
    assert "irregular sampling" in note and f"{spread:.1%}" in note and "not requested" in note
    np.testing.assert_array_equal(ds.runs[0].time, frame["t"].to_numpy())
    assert not ds.resampled


def test_resampling_matches_numpy_interp():
    frame = _irregular()
    ds = read_data(frame, time="t", states=["x"], inputs=["u"], resample=True)
    t = frame["t"].to_numpy()
    step = np.median(np.diff(t))
    run = ds.runs[0]
    assert ds.resampled and ds.step == pytest.approx(step)
    np.testing.assert_allclose(np.diff(run.time), step, rtol=1e-9)
    # reference: numpy.interp (piecewise-linear interpolation)
    np.testing.assert_allclose(run.states[:, 0], np.interp(run.time, t, frame["x"]), rtol=1e-12)
    np.testing.assert_allclose(run.inputs[:, 0], np.interp(run.time, t, frame["u"]), rtol=1e-12)
    assert run.index[0] == 0 and (run.index[1:] == -1).all()
    assert any("resampled by linear interpolation" in w for w in ds.warnings)


def test_regular_data_is_not_resampled_even_when_asked(write_file, ramp_csv):
    ds = read_data(write_file("r.csv", ramp_csv()), time="t", states=["x"], resample=True)
    np.testing.assert_array_equal(ds.runs[0].index, np.arange(10))
    assert ds.warnings == ()


def test_runs_at_another_rate_are_reported(write_file, ramp_csv):
    a = write_file("fast.csv", ramp_csv(n=20, step=0.1))
    b = write_file("slow.csv", ramp_csv(n=10, step=0.2))
    ds = read_data([a, b], time="t", states=["x"])
    assert any("'slow'" in w and "differs from the dataset step" in w for w in ds.warnings)


# --------------------------------------------------------------------------- time stamps


def test_iso_datetime_time_column_becomes_seconds(write_file):
    stamps = pd.date_range("2024-03-01T12:00:00", periods=10, freq="250ms")
    lines = [f"{s.isoformat()},{k}" for k, s in enumerate(stamps)]
    path = write_file("clock.csv", "stamp,x\n" + "\n".join(lines) + "\n")
    ds = read_data(path, time="stamp", states=["x"])
    np.testing.assert_allclose(ds.runs[0].time, 0.25 * np.arange(10))
    assert ds.units["stamp"] == "s"


def test_dataframe_time_index_is_accepted():
    frame = _frame().rename(columns={"t [s]": "t"}).set_index("t")
    ds = read_data(frame, time="t", states=["x"])
    np.testing.assert_array_equal(ds.runs[0].time, frame.index.to_numpy())


# --------------------------------------------------------------------------- validation


def _bad(frame: pd.DataFrame, **kwargs) -> DataError:
    options = {"time": "t", "states": ["x"], **kwargs}
    with pytest.raises(DataError) as info:
        read_data(frame, **options)
    assert "\n" not in str(info.value)
    return info.value


def test_dataframe_missing_column_lists_columns():
    err = _bad(_frame(), states=["y"])
    assert err.column == "y" and "'t [s]', 'x [m]', 'u'" in str(err)


def test_column_list_is_abbreviated():
    frame = pd.DataFrame({f"c{k}": np.arange(10.0) for k in range(30)})
    err = _bad(frame, time="c0", states=["nope"])
    assert "... (18 more)" in str(err)


def test_column_named_twice():
    err = _bad(_frame(), states=["x"], inputs=["x [m]"])
    assert "named twice" in str(err) and "state 'x'" in str(err) and "input 'x [m]'" in str(err)


def test_duplicated_headers_are_ambiguous(write_file):
    path = write_file("dup.csv", "t,x,x\n" + "\n".join(f"{k},{k},{k}" for k in range(9)) + "\n")
    with pytest.raises(DataError, match=r"dup\.csv, column 'x': column name is not unique"):
        read_data(path, time="t", states=["x"])


@pytest.mark.parametrize(
    ("cell", "message"),
    [
        ("abc", "non-numeric value 'abc' at row index 3"),
        (True, "non-numeric value 'True' at row index 3"),
        (np.nan, "empty or NaN cell at row index 3"),
        (np.inf, "non-finite value 'inf' at row index 3"),
    ],
)
def test_dataframe_bad_cells(cell, message):
    frame = _frame().astype({"x [m]": object})
    frame.loc[3, "x [m]"] = cell
    err = _bad(frame)
    assert err.column == "x [m]" and message in str(err) and err.source == "<DataFrame>"


def test_dataframe_time_not_increasing():
    frame = _frame()
    frame.loc[5, "t [s]"] = 0.1
    err = _bad(frame)
    assert "not strictly increasing" in str(err) and "at row index 5" in str(err)


def test_dataframe_duplicated_time_names_both_rows():
    frame = _frame()
    frame.loc[6, "t [s]"] = frame.loc[5, "t [s]"]
    err = _bad(frame)
    assert "duplicated time stamp 2.5 (same as row index 5) at row index 6" in str(err)


def test_dataframe_run_too_short():
    err = _bad(_frame(n=5))
    assert "has 5 samples" in str(err) and "at least 8" in str(err)


def test_empty_run_id_is_an_error():
    frame = _frame().assign(run=["a"] * 6 + [None] + ["b"] * 5)
    err = _bad(frame, run="run")
    assert "empty run id at row index 6" in str(err)


@pytest.mark.parametrize(
    "options",
    [
        {"states": []},
        {"max_gap": 0.5},
        {"min_samples": 1},
        {"states": ["x", ""]},
        {"time": ["t", "x"]},
        {"run": ["u"]},
    ],
)
def test_bad_options(options):
    _bad(_frame(), **options)


def test_error_attributes_name_file_column_and_row(write_file, ramp_csv):
    text = ramp_csv().splitlines()
    text[4] = "0.3,oops,1"  # file row 5 (header is row 1)
    path = write_file("log.csv", "\n".join(text) + "\n")
    with pytest.raises(DataError) as info:
        read_data(path, time="t", states=["x"])
    assert (info.value.source, info.value.column, info.value.row) == (str(path), "x [m]", 5)


def test_blank_line_keeps_row_numbers(write_file, ramp_csv):
    text = ramp_csv().splitlines()
    text.insert(3, "")  # becomes file row 4
    path = write_file("log.csv", "\n".join(text) + "\n\n")  # trailing blank lines are ignored
    with pytest.raises(DataError) as info:
        read_data(path, time="t", states=["x"])
    assert info.value.row == 4 and "empty or NaN cell" in str(info.value)


# --------------------------------------------------------------------------- summary, peek


def test_summary_is_json_and_matches_dataset():
    ds = read_data(_gap_frame().assign(u=1.0), time="t", states=["x"], inputs=["u"])
    summary = json.loads(json.dumps(summarize(ds)))
    assert summary["samples"] == 22 and len(summary["runs"]) == 2 and len(summary["gaps"]) == 1
    assert summary["ranges"]["x"] == {
        "role": "state",
        "unit": "",
        "min": 0.0,
        "max": 21.0,
        "mean": 10.5,
    }
    assert summary["runs"][1] == {
        "name": "0#2", "origin": "0", "samples": 12, "start": 5.0,
        "end": pytest.approx(6.1), "duration": pytest.approx(1.1), "step": pytest.approx(0.1),
    }  # fmt: skip
    assert summary["ranges"]["u"]["role"] == "input" and summary["resampled"] is False


def test_peek_columns(write_file):
    path = write_file("p.csv", "time [s],x,label\n0,1,a\n1,2,b\n")
    assert peek_columns(path) == [("time [s]", True), ("x", True), ("label", False)]


# --------------------------------------------------------------------------- robustness


_CELLS = st.one_of(
    st.sampled_from(["", "nan", "inf", "-1e309", "x", "1,5", '"', "True", "2024-01-01", " "]),
    st.floats(allow_nan=True, allow_infinity=True).map(repr),
    st.integers(-5, 5).map(str),
    st.text(max_size=4),
)


@st.composite
def _tables(draw) -> str:
    """Mostly valid small tables (time = row number) with a few junk cells dropped in."""
    header = draw(st.sampled_from(["t,x,u", "t [s],x [m],u,r", "t,t,x,u", "x,u,r", "t,x"]))
    finite = st.floats(-1e6, 1e6, allow_nan=False).map(repr)
    rows = [[str(k), draw(finite), draw(finite)] for k in range(draw(st.integers(0, 12)))]
    for r, c, cell in draw(
        st.lists(st.tuples(st.integers(0, 11), st.integers(0, 3), _CELLS), max_size=3)
    ):
        if r < len(rows):
            rows[r] += [""] * (c + 1 - len(rows[r]))
            rows[r][c] = cell
    return "\n".join([header, *(",".join(r) for r in rows)])


@settings(
    max_examples=150, deadline=None, suppress_health_check=[HealthCheck.function_scoped_fixture]
)
@given(content=st.one_of(st.binary(max_size=200), st.text(max_size=200), _tables()))
def test_random_csv_only_raises_modemap_errors(write_file, content):
    # Robustness property (common practice for parsers): any input either reads or fails with
    # modemap's own exception, never a third-party one.
    path = write_file("fuzz.csv", content)
    try:
        read_data(path, time="t", states=["x"], inputs=["u"], min_samples=2)
    except ModemapError as exc:
        assert isinstance(exc, DataError) and "\n" not in str(exc)


def test_directory_is_not_a_file(tmp_path):
    (tmp_path / "folder.csv").mkdir()
    with pytest.raises(DataError, match=r"folder\.csv: not a regular file"):
        read_data(tmp_path / "folder.csv", time="t", states=["x"])


def test_quoted_header_with_newline_keeps_message_on_one_line(write_file):
    path = write_file("q.csv", '"t",x,"a\nb"\n' + "\n".join(f"{k},{k},z" for k in range(9)))
    with pytest.raises(DataError) as info:
        read_data(path, time="t", states=["x", "a\nb"])
    assert "\n" not in str(info.value) and "column 'a\\nb'" in str(info.value)
