"""Reading real logs: delimiter and decimal mark, a units row, empty cells (refuse, drop,
interpolate) and date-time stamps kept in the results.

References: pandas.read_csv reads the plain comma/point file the other layouts must equal;
pandas' ``dropna``/``isna`` give the rows and counts of the drop policy; numpy.interp is
the linear interpolation the interpolate policy must match; Python's ``datetime.isoformat``
(standard library, ISO 8601) is the text the stamps must equal.
"""

from __future__ import annotations

import datetime as dt
import json

import numpy as np
import pandas as pd
import pytest

from modemap._exceptions import DataError
from modemap.app.cli import main
from modemap.data import fields, tables
from modemap.data.intake import read_data, summarize
from modemap.data.stamps import format_stamps, row_stamps
from modemap.identify.identifier import labels_frame
from modemap.model.hybrid import HybridModel, RegimeModel
from modemap.model.modelfile import save_model
from modemap.report.markdown import render_report
from modemap.report.output import write_fit_outputs

SEED = 20261205


def _frame(n: int = 40) -> pd.DataFrame:
    rng = np.random.default_rng(SEED)
    return pd.DataFrame(
        {
            "t": np.round(np.arange(n) * 0.25, 2),
            "level": np.round(rng.normal(2.0, 0.5, n), 4),
            "flow": np.round(rng.normal(-1.0, 3.0, n), 4),
        }
    )


def _european(frame: pd.DataFrame, units: list[str]) -> str:
    """The frame as a semicolon file with decimal commas and a units row."""
    text = frame.to_csv(index=False, sep=";", decimal=",")
    header, rest = text.split("\n", 1)
    return header + "\n" + ";".join(units) + "\n" + rest


def test_semicolon_decimal_comma_units_row_reads_like_the_plain_file(tmp_path) -> None:
    frame = _frame()
    plain, euro = tmp_path / "plain.csv", tmp_path / "euro.csv"
    frame.to_csv(plain, index=False)
    euro.write_text(_european(frame, ["s", "[m]", "m3/h"]), encoding="utf-8")
    reference = pd.read_csv(plain)  # reference reader: pandas on the plain file
    ds = read_data(
        euro, time="t", states=["level", "flow"], delimiter=";", decimal=",", units_row=True
    )
    run = ds.runs[0]
    np.testing.assert_array_equal(run.time, reference["t"].to_numpy())
    np.testing.assert_array_equal(run.states, reference[["level", "flow"]].to_numpy())
    assert ds.units == {"t": "s", "level": "m", "flow": "m3/h"}
    assert ds.label("flow") == "flow [m3/h]"  # the header convention name [unit]


def test_tab_delimiter_in_a_gzip_file_from_the_command_line(tmp_path, capsys) -> None:
    frame = _frame()
    path = tmp_path / "log.csv.gz"
    frame.to_csv(path, index=False, sep="\t", compression="gzip")
    assert main(["check", str(path), "--delimiter", "tab", "--json"]) == 0
    summary = json.loads(capsys.readouterr().out)
    ranges = summary["ranges"]
    assert ranges["level"]["max"] == frame["level"].max()  # reference: pandas
    assert ranges["flow"]["min"] == frame["flow"].min()


def test_units_row_in_a_file_read_in_chunks_keeps_row_numbers(tmp_path, monkeypatch) -> None:
    frame = _frame()
    frame = frame.astype({"level": object})
    frame.loc[17, "level"] = "bad"
    path = tmp_path / "euro.csv"
    path.write_text(_european(frame, ["s", "m", "m3/h"]), encoding="utf-8")
    monkeypatch.setattr(tables, "LARGE_FILE_BYTES", 0)
    monkeypatch.setattr(tables, "CSV_CHUNK_ROWS", 5)
    with pytest.raises(DataError) as info:
        read_data(path, time="t", states=["level"], delimiter=";", decimal=",", units_row=True)
    # data row 17 (0-based) is file line 17 + 3: header and units row above the first one
    lines = path.read_text().splitlines()
    assert lines[info.value.row - 1].split(";")[1] == "bad"


@pytest.mark.parametrize("block", [5, 7, 64, 1 << 20])
def test_field_count_found_on_the_right_line_across_blocks(tmp_path, monkeypatch, block) -> None:
    rows = [f"{k},{k * 2},{k % 3}" for k in range(60)]
    rows[41] = "41,8,2,5"
    text = "t,x,y\r\n" + "\r\n".join(rows) + "\r\n\r\n"
    path = tmp_path / "crlf.csv"
    path.write_bytes(text.encode())
    monkeypatch.setattr(fields, "_BLOCK_BYTES", block)
    with pytest.raises(DataError, match="4 fields where the header has 3") as info:
        read_data(path, time="t", states=["x"])
    # reference: Python's own line splitting
    expected = next(i for i, line in enumerate(text.splitlines(), 1) if line.count(",") == 3)
    assert info.value.row == expected == 43


def _with_gaps() -> tuple[pd.DataFrame, list[tuple[int, str]]]:
    frame = _frame(30)
    cells = [(3, "level"), (4, "level"), (10, "flow"), (17, "level"), (17, "flow"), (25, "flow")]
    for row, column in cells:
        frame.loc[row, column] = np.nan
    return frame, cells


def test_drop_policy_drops_the_rows_and_counts_the_cells(tmp_path) -> None:
    frame, _ = _with_gaps()
    path = tmp_path / "gaps.csv"
    frame.to_csv(path, index=False)
    ds = read_data(path, time="t", states=["level", "flow"], missing="drop")
    kept = frame.dropna()  # reference: pandas
    run = ds.runs[0]
    np.testing.assert_array_equal(run.time, kept["t"].to_numpy())
    np.testing.assert_array_equal(run.states, kept[["level", "flow"]].to_numpy())
    np.testing.assert_array_equal(run.index, kept.index.to_numpy())  # original rows kept
    counts = frame.isna().sum()
    assert ds.missing.values == {c: int(counts[c]) for c in ("level", "flow")}
    assert ds.missing.rows == len(frame) - len(kept) == 5
    summary = summarize(ds)
    assert summary["missing"] == {"policy": "drop", "rows": 5, "values": {"level": 3, "flow": 3}}
    report = render_report(_decay(), dataset_summary=summary)
    assert "| Missing values | drop |" in report and "| Rows dropped | 5 |" in report
    assert "level: 3, flow: 3" in report


def test_interpolate_policy_matches_numpy_interp_within_each_run(tmp_path) -> None:
    frame, _ = _with_gaps()
    frame["batch"] = np.where(np.arange(len(frame)) < 15, "a", "b")
    frame.loc[15:, "t"] = frame.loc[15:, "t"] - frame.loc[15, "t"]  # each run from t = 0
    path = tmp_path / "gaps.csv"
    frame.to_csv(path, index=False)
    ds = read_data(path, time="t", states=["level", "flow"], run="batch", missing="interpolate")
    for run, rows in zip(ds.runs, (slice(0, 15), slice(15, 30)), strict=True):
        part = frame.iloc[rows]
        t = part["t"].to_numpy()
        for j, column in enumerate(("level", "flow")):
            values = part[column].to_numpy()
            known = ~np.isnan(values)
            expected = np.interp(t, t[known], values[known])  # reference: numpy.interp
            np.testing.assert_allclose(run.states[:, j], expected, rtol=0, atol=1e-12)
    assert ds.missing.values == {"level": 3, "flow": 3}
    assert ds.missing.rows == 5  # rows 3, 4, 10, 17, 25


def test_check_prints_the_missing_counts(tmp_path, capsys) -> None:
    frame, _ = _with_gaps()
    path = tmp_path / "gaps.csv"
    frame.to_csv(path, index=False)
    assert main(["check", str(path), "--missing", "drop"]) == 0
    out = capsys.readouterr().out
    assert "missing   5 row(s) dropped (empty cells: level: 3, flow: 3)" in out


# --------------------------------------------------------------------------- time stamps


def test_stamps_written_as_python_writes_iso_8601() -> None:
    moments = [dt.datetime(2024, 3, 1, 12, 0, s, 250_000 * (s % 2)) for s in range(6)]
    values = np.array(moments, dtype="datetime64[ns]")
    expected = [m.isoformat(timespec="milliseconds") for m in moments]  # reference: stdlib
    assert list(format_stamps(values)) == expected
    whole = values.astype("datetime64[s]")
    assert list(format_stamps(whole)) == [m.replace(microsecond=0).isoformat() for m in moments]
    zone = dt.timezone(dt.timedelta(hours=1))
    utc = np.array([m - dt.timedelta(hours=1) for m in moments], dtype="datetime64[ns]")
    aware = [m.replace(tzinfo=zone).isoformat(timespec="milliseconds") for m in moments]
    assert list(format_stamps(utc, zone)) == aware


def test_zoned_stamps_keep_their_zone_and_mixed_offsets_become_utc(tmp_path) -> None:
    stamps = [f"2024-03-31T00:{m:02d}:00+01:00" for m in range(10)]
    path = tmp_path / "zoned.csv"
    path.write_text("t,x\n" + "".join(f"{s},{k}\n" for k, s in enumerate(stamps)))
    ds = read_data(path, time="t", states=["x"])
    assert list(row_stamps(ds)) == stamps
    start = dt.datetime(2024, 3, 31, 0, 50, tzinfo=dt.UTC)  # summer time from 01:00 UTC
    moments = [start + dt.timedelta(minutes=2 * k) for k in range(10)]
    changed = [
        m.astimezone(dt.timezone(dt.timedelta(hours=1 if m.hour < 1 else 2))).isoformat()
        for m in moments
    ]
    assert changed[4].endswith("+01:00") and changed[5].endswith("+02:00")
    path.write_text("t,x\n" + "".join(f"{s},{k}\n" for k, s in enumerate(changed)))
    ds = read_data(path, time="t", states=["x"])
    expected = [  # reference: the standard library's conversion to UTC
        dt.datetime.fromisoformat(s).astimezone(dt.UTC).isoformat() for s in changed
    ]
    assert list(row_stamps(ds)) == expected


def _stamped_file(tmp_path, n: int = 12):
    start = dt.datetime(2024, 3, 1, 6, 30)
    moments = [start + dt.timedelta(seconds=0.5 * k) for k in range(n)]
    stamps = [m.isoformat(sep=" ") for m in moments]
    x = np.exp(-0.1 * np.arange(n))
    path = tmp_path / "plant.csv"
    rows = [f"{s};{str(round(v, 6)).replace('.', ',')}" for s, v in zip(stamps, x, strict=True)]
    path.write_text("time;x\n;m\n" + "\n".join(rows) + "\n")
    # written back at one resolution, the finest the stamps need (reference: stdlib isoformat)
    return path, [m.isoformat(timespec="milliseconds") for m in moments]


def _decay() -> HybridModel:
    reg = RegimeModel(
        id=0, samples=0, terms=["x"], coefficients=np.array([[-0.1]]),
        stderr=np.zeros((1, 1)), noise_cov=np.eye(1),
    )  # fmt: skip
    return HybridModel(states=["x"], inputs=[], form="continuous", regimes=[reg], time_name="time")


def test_labels_csv_carries_the_original_stamps(tmp_path) -> None:
    path, iso = _stamped_file(tmp_path)
    ds = read_data(path, time="time", states=["x"], delimiter=";", decimal=",", units_row=True)
    labels = labels_frame(ds, {r.name: np.zeros(r.n_samples, dtype=int) for r in ds.runs})
    write_fit_outputs(tmp_path / "out", _decay(), labels, dataset=ds)
    written = pd.read_csv(tmp_path / "out" / "labels.csv", dtype={"stamp": str})
    assert list(written.columns[:4]) == ["run", "time", "stamp", "regime"]
    assert list(written["stamp"]) == iso
    np.testing.assert_allclose(written["time"], 0.5 * np.arange(len(iso)))


def test_labels_csv_without_stamps_is_unchanged(tmp_path) -> None:
    frame = _frame()
    path = tmp_path / "plain.csv"
    frame.to_csv(path, index=False)
    ds = read_data(path, time="t", states=["level"])
    labels = labels_frame(ds, {r.name: np.zeros(r.n_samples, dtype=int) for r in ds.runs})
    write_fit_outputs(tmp_path / "out", _decay(), labels, dataset=ds)
    assert pd.read_csv(tmp_path / "out" / "labels.csv").columns.tolist() == [
        "run", "time", "regime",
    ]  # fmt: skip


def test_simulate_output_carries_the_original_stamps(tmp_path, capsys) -> None:
    path, iso = _stamped_file(tmp_path)
    model = tmp_path / "model.json"
    save_model(_decay(), model)
    out = tmp_path / "sim.csv"
    argv = ["simulate", str(model), str(path), "--out", str(out)]
    assert main([*argv, "--delimiter", ";", "--decimal", ",", "--units-row"]) == 0
    sim = pd.read_csv(out, dtype={"stamp": str})
    assert list(sim["stamp"]) == iso
    np.testing.assert_allclose(sim["time"], 0.5 * np.arange(len(iso)))


@pytest.mark.parametrize("resample", [False, True])
def test_stamps_outside_the_nanosecond_range_are_written_back(tmp_path, resample) -> None:
    moments = [dt.datetime(9999, 12, 31, 23, 59, k, 500_000) for k in range(20)]
    path = tmp_path / "late.csv"
    path.write_text("t,x\n" + "".join(f"{m.isoformat()},{k}\n" for k, m in enumerate(moments)))
    ds = read_data(path, time="t", states=["x"], resample=resample)
    # reference: the standard library's ISO 8601 text of the same moments
    assert list(row_stamps(ds)) == [m.isoformat(timespec="milliseconds") for m in moments]
