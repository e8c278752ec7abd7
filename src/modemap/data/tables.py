"""Open the tables of a source (CSV, Parquet or a DataFrame) and read columns from them.

The first stage of :mod:`modemap.data.intake`: which files a source names, their headers, and the
raw columns a user asked for, with file-level failures (missing, empty, unparseable,
undecodable) translated into one-line :class:`~modemap._exceptions.DataError` messages.
A CSV file's layout (delimiter, decimal mark, a units row under the header) is a
:class:`CsvFormat`.  Before anything is parsed, the first :data:`TEXT_PROBE_BYTES` of a CSV
file must look like text (no NUL bytes, few control characters), so a binary file is refused
without reading it all; every line must then have as many fields as the header
(:mod:`modemap.data.fields`), so an extra field or a decimal comma that splits a number is
refused instead of shifting values silently.
Files larger than :data:`LARGE_FILE_BYTES` are read in pieces: CSV in chunks of
:data:`CSV_CHUNK_ROWS` rows, Parquet by row groups (also from :data:`LARGE_PARQUET_ROWS`).
Validation of the values happens in :mod:`modemap.data.intake`.
"""

from __future__ import annotations

import gzip
import os
import re
import warnings
from collections.abc import Sequence
from dataclasses import dataclass
from pathlib import Path

import numpy as np
import pandas as pd

from modemap._exceptions import DataError
from modemap._params import Options, check_value
from modemap.data.fields import (
    check_fields,
    check_text,
    fields_error,
    open_bytes,
    parse_header,
    with_units,
)

__all__ = [
    "CSV_CHUNK_ROWS",
    "CSV_SUFFIXES",
    "DATAFRAME_LABEL",
    "DECIMAL_MARKS",
    "DELIMITERS",
    "LARGE_FILE_BYTES",
    "LARGE_PARQUET_ROWS",
    "PARQUET_SUFFIXES",
    "TEXT_PROBE_BYTES",
    "CsvFormat",
    "Source",
    "Table",
    "first_rows",
    "load_columns",
    "open_tables",
    "parse_header",
    "read_table",
]

CSV_SUFFIXES = (".csv", ".csv.gz")
PARQUET_SUFFIXES = (".parquet", ".pq")
LARGE_FILE_BYTES = 200 * 1024**2
"""Files larger than this are read in pieces: CSV in chunks, Parquet by row groups."""
LARGE_PARQUET_ROWS = 2_000_000
"""Parquet files with at least this many rows (and several row groups) are read by row group."""
CSV_CHUNK_ROWS = 1_000_000
"""Rows per chunk when a large CSV is read in pieces."""
DATAFRAME_LABEL = "<DataFrame>"
"""How a DataFrame source is named in messages."""
DELIMITERS = (",", ";", "\t", "|")
"""Field delimiters a CSV file may use."""
DECIMAL_MARKS = (".", ",")
"""Decimal marks a CSV file may use."""
TEXT_PROBE_BYTES = 1024**2
"""Bytes read from the start of a CSV file to decide that it is text (and holds a line end)."""
_CONTROL_SHARE = 0.01  # more control characters than this share of the probe: not text


Source = str | os.PathLike | pd.DataFrame | Sequence[str | os.PathLike]


# --------------------------------------------------------------------------- tables


@dataclass(frozen=True)
class CsvFormat:
    """How a CSV file is laid out.

    Parameters
    ----------
    delimiter : {",", ";", "\\t", "|"}, default ","
        Field delimiter.
    decimal : {".", ","}, default "."
        Decimal mark of the numbers (``","`` needs another delimiter than ``","``).
    units_row : bool, default False
        The line under the header holds the unit of each column; a unit found there is
        read as if the header were ``name [unit]``.
    """

    delimiter: str = ","
    decimal: str = "."
    units_row: bool = False

    def __post_init__(self) -> None:
        check_value(self.delimiter, [Options(DELIMITERS)], "delimiter")
        check_value(self.decimal, [Options(DECIMAL_MARKS)], "decimal")
        check_value(self.units_row, [Options((True, False))], "units_row")
        if self.delimiter == self.decimal:
            raise DataError(
                f"the decimal mark {self.decimal!r} cannot also be the field delimiter; "
                "choose another delimiter (e.g. ';')"
            )

    @property
    def header_rows(self) -> int:
        """Lines above the first data row (the header, and the units row if any)."""
        return 2 if self.units_row else 1


@dataclass
class Table:
    """One source of rows (a file or a DataFrame) while it is being read."""

    label: str
    stem: str
    kind: str  # "csv", "parquet" or "frame"
    headers: list[str]
    path: Path | None = None
    frame: pd.DataFrame | None = None
    encoding: str = "utf-8-sig"
    fmt: CsvFormat = CsvFormat()

    @property
    def positional(self) -> bool:
        return self.kind != "csv"

    @property
    def first_row(self) -> int:
        """File row (1-based, as a text editor numbers lines) of the first data row."""
        return self.fmt.header_rows + 1

    def at(self, pos: int) -> str:
        """Where data row ``pos`` (0-based) is, in the words a user understands."""
        return f"row index {pos}" if self.positional else f"row {pos + self.first_row}"

    def error(self, message: str, column: str | None = None, pos: int | None = None) -> DataError:
        """A :class:`DataError` naming this source, ``column`` and data row ``pos``."""
        if column is not None:  # keep messages on one line even for odd quoted headers
            column = column.replace("\r", "\\r").replace("\n", "\\n")
        if pos is None:
            return DataError(message, source=self.label, column=column)
        if self.positional:
            return DataError(f"{message} at {self.at(pos)}", source=self.label, column=column)
        return DataError(message, source=self.label, column=column, row=int(pos) + self.first_row)


def _suffix_kind(path: Path) -> str | None:
    name = path.name.lower()
    if name.endswith(CSV_SUFFIXES):
        return "csv"
    if name.endswith(PARQUET_SUFFIXES):
        return "parquet"
    return None


def _stem(path: Path) -> str:
    name = path.name
    for suffix in CSV_SUFFIXES + PARQUET_SUFFIXES:
        if name.lower().endswith(suffix):
            return name[: -len(suffix)] or name
    return path.stem


def _open_file(item: str | os.PathLike, fmt: CsvFormat) -> Table:
    path = Path(item)
    label = str(item)
    kind = _suffix_kind(path)
    if kind is None:
        allowed = ", ".join(CSV_SUFFIXES + PARQUET_SUFFIXES)
        raise DataError(f"unknown file type (expected one of {allowed})", source=label)
    if not path.exists():
        raise DataError("file not found", source=label)
    if not path.is_file():
        raise DataError("not a regular file", source=label)
    table = Table(label=label, stem=_stem(path), kind=kind, headers=[], path=path, fmt=fmt)
    if kind == "csv":
        _check_text(table)
        table.headers = _csv_headers(table)
    else:
        table.headers = _parquet_headers(table)
    return table


def _open_frame(frame: pd.DataFrame, time: str | None) -> Table:
    if _index_is_time(frame, time):
        frame = frame.reset_index()
    headers = [str(c) for c in frame.columns]
    return Table(label=DATAFRAME_LABEL, stem="0", kind="frame", headers=headers, frame=frame)


def _index_is_time(frame: pd.DataFrame, time: str | None) -> bool:
    """True when the index holds the time column (named like it and not a column)."""
    name = frame.index.name
    if name is None or time is None:
        return False
    wanted = {time.strip(), parse_header(time)[0]}
    columns = {parse_header(str(c))[0] for c in frame.columns} | {str(c) for c in frame.columns}
    named = str(name) in wanted or parse_header(str(name))[0] in wanted
    return named and not (columns & wanted)


def open_tables(
    source: Source, time: str | None, fmt: CsvFormat | None = None
) -> tuple[list[Table], bool]:
    """Open every source; the flag tells whether run names come from file stems.

    ``fmt`` is the layout of CSV files (default: :class:`CsvFormat`); Parquet files and
    DataFrames ignore it.
    """
    fmt = fmt if fmt is not None else CsvFormat()
    if isinstance(source, pd.DataFrame):
        return [_open_frame(source, time)], False
    if isinstance(source, str | os.PathLike):
        return [_open_file(source, fmt)], False
    if isinstance(source, Sequence) and not isinstance(source, bytes):
        if len(source) == 0:
            raise DataError("no data files given")
        tables = [_open_file(item, fmt) for item in source]
        _unique_stems(tables)
        return tables, True
    raise DataError(
        f"cannot read data from a {type(source).__name__}; give a file path or DataFrame"
    )


def _unique_stems(tables: list[Table]) -> None:
    seen: dict[str, int] = {}
    for table in tables:
        count = seen.get(table.stem, 0) + 1
        seen[table.stem] = count
        if count > 1:
            table.stem = f"{table.stem}-{count}"


# --------------------------------------------------------------------------- file readers


def _read_csv(table: Table, **options) -> pd.DataFrame:
    """``pandas.read_csv`` (C engine, the table's delimiter and decimal mark) with its
    failures translated into :class:`DataError`."""
    fmt = table.fmt
    options = {"sep": fmt.delimiter, "decimal": fmt.decimal, **options}
    if options.get("header") == 0 and fmt.units_row:
        options["skiprows"] = [1]
    for encoding in dict.fromkeys((table.encoding, "latin-1")):
        try:
            with warnings.catch_warnings():
                warnings.simplefilter("ignore")
                frame = pd.read_csv(table.path, engine="c", encoding=encoding, **options)
            table.encoding = encoding
            return frame
        except UnicodeDecodeError:
            continue
        except pd.errors.EmptyDataError:
            raise table.error("the file is empty") from None
        except (pd.errors.ParserError, ValueError, OverflowError, IndexError) as exc:
            raise _parse_error(table, exc) from None
        except OSError as exc:
            raise table.error(f"cannot read the file: {exc.strerror or exc}") from None
    raise table.error("cannot decode the file as text")  # pragma: no cover - latin-1 decodes all


_FIELDS_MESSAGE = re.compile(r"Expected (\d+) fields in line (\d+), saw (\d+)")


def _parse_error(table: Table, exc: BaseException) -> DataError:
    """The parser's failure in our words; a wrong number of fields names its row."""
    found = _FIELDS_MESSAGE.search(str(exc))
    if found:
        expected, line, seen = (int(g) for g in found.groups())
        return fields_error(table, line, seen, expected)
    return table.error(f"cannot parse as CSV: {_one_line(exc)}")


def _one_line(exc: BaseException) -> str:
    return " ".join(str(exc).split()) or type(exc).__name__


def _csv_headers(table: Table) -> list[str]:
    """The header's names; with a units row, ``name [unit]`` for every unit found there."""
    rows = table.fmt.header_rows
    head = _read_csv(
        table, header=None, nrows=rows, dtype=str, keep_default_na=False, skip_blank_lines=False
    )
    if head.shape[0] == 0:
        raise table.error("the file is empty")
    headers = [str(h) for h in head.iloc[0].tolist()]
    if not table.fmt.units_row:
        return headers
    if head.shape[0] < 2:
        raise DataError("no units row under the header", source=table.label, row=2)
    return with_units(table, headers, [str(u) for u in head.iloc[1].tolist()])


def _check_text(table: Table) -> None:
    """Refuse a CSV file whose first :data:`TEXT_PROBE_BYTES` do not look like text."""
    try:
        with open_bytes(table) as fh:
            probe = fh.read(TEXT_PROBE_BYTES)
            more = bool(fh.read(1))
    except (OSError, EOFError, gzip.BadGzipFile) as exc:
        raise table.error(f"cannot read the file: {_one_line(exc)}") from None
    check_text(table, probe, more, _CONTROL_SHARE)


def _parquet_headers(table: Table) -> list[str]:
    import pyarrow.parquet as pq

    try:
        schema = pq.read_schema(table.path)
    except Exception as exc:  # pyarrow raises several unrelated types for bad files
        raise table.error(f"not a readable Parquet file: {_one_line(exc)}") from None
    return [str(n) for n in schema.names]


def load_columns(table: Table, positions: list[int]) -> pd.DataFrame:
    """The requested columns (by header position), positional row index, raw dtypes."""
    if table.kind == "frame":
        frame = table.frame.iloc[:, positions]
    elif table.kind == "parquet":
        frame = _load_parquet(table, positions)
    else:
        check_fields(table)  # every line as many fields as the header (extra fields refused)
        options = {"header": 0, "usecols": positions, "index_col": False}
        if _is_large(table.path):
            frame = _read_csv_chunked(table, **options)
        else:
            frame = _read_csv(table, skip_blank_lines=False, **options)
        frame = frame.iloc[:, np.argsort(np.argsort(positions))]  # usecols returns file order
        frame = _drop_trailing_blank(frame)
    frame = frame.reset_index(drop=True)
    frame.columns = range(frame.shape[1])
    return frame


def read_table(path: str | os.PathLike, fmt: CsvFormat | None = None) -> pd.DataFrame:
    """Every column of one CSV or Parquet file, checked as :func:`load_columns` checks them,
    under its header (with a units row folded in as ``name [unit]``)."""
    (table,), _ = open_tables(path, None, fmt)
    frame = load_columns(table, list(range(len(table.headers))))
    frame.columns = table.headers
    return frame


def first_rows(table: Table, nrows: int) -> pd.DataFrame:
    """All columns of the first ``nrows`` data rows (a DataFrame source: all its rows)."""
    if table.kind == "frame":
        return table.frame
    if table.kind == "parquet":
        return _load_parquet(table, list(range(len(table.headers)))).head(nrows)
    return _read_csv(table, header=0, nrows=nrows, index_col=False, low_memory=False)


def _is_large(path: Path | None) -> bool:
    """True for files worth reading piece by piece (see :data:`LARGE_FILE_BYTES`)."""
    try:
        return path is not None and path.stat().st_size > LARGE_FILE_BYTES
    except OSError:
        return False


def _read_csv_chunked(table: Table, **options) -> pd.DataFrame:
    """A large CSV read :data:`CSV_CHUNK_ROWS` rows at a time, then joined.

    The parser works on one chunk at a time instead of the whole file; blank lines are kept
    (as empty rows), so row numbers in messages still match the lines of the file.
    """
    for attempt in range(2):
        reader = _read_csv(table, chunksize=CSV_CHUNK_ROWS, skip_blank_lines=False, **options)
        try:
            with reader:
                chunks = list(reader)
            break
        except UnicodeDecodeError:
            if attempt or table.encoding == "latin-1":
                raise table.error("cannot decode the file as text") from None
            table.encoding = "latin-1"
        except (pd.errors.ParserError, ValueError, OverflowError, IndexError) as exc:
            raise _parse_error(table, exc) from None
    if not chunks:
        raise table.error("no data rows (only a header)")
    return pd.concat(chunks, ignore_index=True)


def _load_parquet(table: Table, positions: list[int]) -> pd.DataFrame:
    columns = [table.headers[p] for p in positions]
    try:
        import pyarrow.parquet as pq

        with pq.ParquetFile(table.path) as handle:
            if handle.metadata.num_row_groups > 1 and (
                handle.metadata.num_rows >= LARGE_PARQUET_ROWS or _is_large(table.path)
            ):
                return _parquet_by_row_groups(handle, columns)
        frame = pd.read_parquet(table.path, columns=columns)
    except Exception as exc:  # pyarrow raises several unrelated types for bad files
        raise table.error(f"not a readable Parquet file: {_one_line(exc)}") from None
    return frame


def _parquet_by_row_groups(handle, columns: list[str]) -> pd.DataFrame:
    """Columns read one row group at a time; numeric ones land in preallocated arrays.

    Peak memory is the final columns plus one row group, instead of the whole Arrow table
    next to its pandas copy.  Other columns (text, time stamps) are converted per row group
    and joined.
    """
    import pyarrow as pa

    n = handle.metadata.num_rows
    schema = handle.schema_arrow
    numeric = {
        c: schema.field(c).type.to_pandas_dtype()
        for c in columns
        if pa.types.is_integer(schema.field(c).type) or pa.types.is_floating(schema.field(c).type)
    }
    arrays = {c: np.empty(n, dtype=dtype) for c, dtype in numeric.items()}
    others: dict[str, list[pd.Series]] = {c: [] for c in columns if c not in numeric}
    start = 0
    for i in range(handle.metadata.num_row_groups):
        group = handle.read_row_group(i, columns=columns)
        stop = start + group.num_rows
        for c in columns:
            col = group.column(c)
            if c in arrays and col.null_count == 0:
                arrays[c][start:stop] = col.to_numpy()
            elif c in arrays:  # missing values: keep them as NaN (reported by validation)
                arrays[c] = arrays[c].astype(np.float64, copy=False)
                arrays[c][start:stop] = col.to_pandas().to_numpy(np.float64, na_value=np.nan)
            else:
                others[c].append(col.to_pandas())
        start = stop
    data = {
        c: arrays[c] if c in arrays else pd.concat(others[c], ignore_index=True) for c in columns
    }
    return pd.DataFrame(data, columns=columns, copy=False)


def _drop_trailing_blank(frame: pd.DataFrame) -> pd.DataFrame:
    if frame.shape[0] == 0:
        return frame
    filled = np.flatnonzero(frame.notna().any(axis=1).to_numpy())
    last = filled[-1] + 1 if filled.size else 0
    return frame.iloc[:last]
