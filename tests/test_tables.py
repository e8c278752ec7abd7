"""Opening sources and reading raw columns, checked against pandas (reference library)."""

from __future__ import annotations

from pathlib import Path

import numpy as np
import pandas as pd
import pytest

from modemap._exceptions import DataError
from modemap.data import tables


def _frame() -> pd.DataFrame:
    rng = np.random.default_rng(0)
    return pd.DataFrame(
        {"t [s]": np.arange(50.0), "x [m]": rng.normal(size=50), "u": rng.normal(size=50)}
    )


def test_columns_come_back_in_the_requested_order(tmp_path: Path) -> None:
    frame = _frame()
    path = tmp_path / "log.csv"
    frame.to_csv(path, index=False)
    (table,), stems = tables.open_tables(path, "t")
    assert not stems and table.headers == list(frame.columns) and table.stem == "log"
    got = tables.load_columns(table, [2, 0])  # reader returns file order; we reorder
    expected = pd.read_csv(path)[["u", "t [s]"]]  # reference: pandas
    np.testing.assert_allclose(got.to_numpy(), expected.to_numpy())
    assert list(got.columns) == [0, 1]


def test_large_csv_read_in_chunks_equals_one_read(tmp_path: Path, monkeypatch) -> None:
    path = tmp_path / "log.csv"
    _frame().to_csv(path, index=False)
    monkeypatch.setattr(tables, "LARGE_FILE_BYTES", 0)
    monkeypatch.setattr(tables, "CSV_CHUNK_ROWS", 7)
    (table,), _ = tables.open_tables(path, "t")
    got = tables.load_columns(table, [0, 1, 2])
    np.testing.assert_allclose(got.to_numpy(), pd.read_csv(path).to_numpy())


def test_several_files_get_unique_stems(tmp_path: Path) -> None:
    (tmp_path / "a").mkdir()
    paths = [tmp_path / "log.csv", tmp_path / "a" / "log.csv"]
    for p in paths:
        _frame().to_csv(p, index=False)
    opened, stems = tables.open_tables(paths, "t")
    assert stems and [t.stem for t in opened] == ["log", "log-2"]
    assert tables.first_rows(opened[0], 5).shape == (5, 3)


@pytest.mark.parametrize(
    ("name", "message"),
    [("log.txt", "unknown file type"), ("missing.csv", "file not found")],
)
def test_bad_sources_name_the_file(tmp_path: Path, name: str, message: str) -> None:
    path = tmp_path / name
    if name.endswith(".txt"):
        path.write_text("t,x\n0,1\n")
    with pytest.raises(DataError, match=message) as info:
        tables.open_tables(path, "t")
    assert name in str(info.value)
