"""Read logged trajectories (CSV, Parquet or a DataFrame) into a validated :class:`Dataset`.

Conventions
-----------
Column headers
    A header may carry a unit in one syntax only: ``name [unit]`` (``"T [degC]"``).
    Users refer to a column by its bare name (``"T"``) or its full header; a name
    given with a unit must match the header exactly.  ``Dataset`` keeps bare
    names; units go to ``Dataset.units``.
Rows in messages
    CSV: 1-based line numbers as a text editor shows them (header = row 1, first
    data row = row 2; blank lines count).  DataFrame and Parquet: the 0-based
    positional ``row index``.
Runs
    One source without a run column is one run named ``"0"``.  With ``run=...``
    each distinct value is a run (in order of first appearance).  A list of
    files gives runs named by file stem, or ``"<stem>/<value>"`` with a run
    column.  The rows of one run keep their order in the source.
Sampling
    The step of a run is the median time increment.  A step larger than
    ``max_gap`` times that median is a gap: the run is split there (pieces
    ``"<origin>#1"``, ``"<origin>#2"``...), and a :class:`Gap` plus a warning are
    recorded.  A piece with fewer than ``min_samples`` samples is dropped with a
    warning (an error if nothing is left).  A run whose increments spread by more
    than ``IRREGULAR_TOLERANCE`` (relative to the median) or whose step differs
    from the dataset step by more than that is reported in ``Dataset.warnings``;
    with ``resample=True`` it is instead interpolated linearly onto a uniform
    grid at the dataset step (new samples get ``index = -1``) and that is
    reported as a warning too.  Nothing is changed silently.
Time stamps
    A time column of ISO 8601 date-time text (or a datetime column in a
    DataFrame / Parquet file) is converted to seconds since the first stamp of
    each file, with unit ``"s"``; the stamps are kept in ``Run.stamps``
    (:mod:`modemap.data.stamps`).  Time values must stay within ``TIME_LIMIT`` in
    magnitude and every increment must be resolvable (at least ``MIN_STEP`` and
    ``STEP_ULPS`` units in the last place of the time value), so that steps, their
    reciprocals and squares stay finite and meaningful in double precision.
Empty cells
    Refused by default; ``missing="drop"`` or ``"interpolate"`` reads them
    (:mod:`modemap.data.missing`), with the counts in ``Dataset.missing``.

CSV files (``.csv`` or ``.csv.gz``) are comma-separated with a decimal point unless told
otherwise (``delimiter``, ``decimal``, ``units_row``: :class:`~modemap.data.tables.CsvFormat`);
Parquet files end in ``.parquet`` or ``.pq``.  Duplicated headers are an error when the user
asks for one of them (another column of the same name would make the choice ambiguous).
"""

from __future__ import annotations

import itertools
import warnings
from collections.abc import Sequence
from dataclasses import dataclass

import numpy as np
import pandas as pd

from modemap._exceptions import DataError
from modemap.data.dataset import Dataset, Gap, Run
from modemap.data.missing import Tally, check_policy, interpolate_gaps, kept_rows
from modemap.data.stamps import Stamps, from_datetimes, parse_stamps, shifted
from modemap.data.tables import (
    CsvFormat,
    Source,
    Table,
    first_rows,
    load_columns,
    open_tables,
    parse_header,
)

__all__ = [
    "IRREGULAR_TOLERANCE",
    "parse_header",
    "peek_columns",
    "read_data",
    "summarize",
]

IRREGULAR_TOLERANCE = 0.01
"""Relative spread of the time step ((max - min) / median) above which sampling is irregular."""
TIME_LIMIT = 1e150
"""Largest magnitude of a time value: its square (used by derivative fits) stays finite."""
MIN_STEP = 1e-150
"""Smallest time increment: the reciprocal of its square stays finite."""
STEP_ULPS = 64
"""Fewest units in the last place of the time value a time increment must span."""

_LIST_AT_MOST = 12
MAX_NAME_LENGTH = 1000
"""Longest state or input name: the term grammar's limit (``terms.expressions``)."""

# --------------------------------------------------------------------------- columns


def _abbreviate(names: Sequence[str]) -> str:
    shown = ", ".join(repr(n) for n in names[:_LIST_AT_MOST])
    more = len(names) - _LIST_AT_MOST
    return f"{shown}, ... ({more} more)" if more > 0 else (shown or "(none)")


@dataclass(frozen=True)
class _Spec:
    """The columns a user asked for, with roles."""

    time: str
    states: tuple[str, ...]
    inputs: tuple[str, ...]
    run: str | None

    @property
    def numeric(self) -> list[tuple[str, str]]:
        """``(role, requested name)`` of the numeric columns, in the order stored."""
        roles = [("time", self.time)]
        roles += [("state", s) for s in self.states] + [("input", u) for u in self.inputs]
        return roles

    @property
    def all(self) -> list[tuple[str, str]]:
        return self.numeric + ([("run", self.run)] if self.run is not None else [])


def _make_spec(time, states, inputs, run) -> _Spec:
    def names(value, what: str) -> tuple[str, ...]:
        if isinstance(value, str):
            value = (value,)
        out = tuple(value)
        for name in out:
            if not isinstance(name, str) or not name.strip():
                raise DataError(f"{what} names must be non-empty strings, got {name!r}")
        return out

    for what, value in (("time", time), ("run", run)):
        if value is not None and not isinstance(value, str):
            raise DataError(f"the {what} column must be given as one name, got {value!r}")
    (time_name,) = names(time, "time column")
    run_name = names(run, "run column")[0] if run is not None else None
    spec = _Spec(time_name, names(states, "state"), names(inputs, "input"), run_name)
    if not spec.states:
        raise DataError("at least one state column is needed")
    return spec


def _resolve(table: Table, requested: str) -> int:
    """Position of the header the user means by ``requested`` (bare name or full header)."""
    want = requested.strip()
    hits = [i for i, h in enumerate(table.headers) if h.strip() == want]
    if not hits and not parse_header(want)[1]:
        hits = [i for i, h in enumerate(table.headers) if parse_header(h)[0] == want]
    if not hits:
        hint = _separator_hint(table.headers)
        raise table.error(
            f"no such column; the columns are {_abbreviate(table.headers)}{hint}", column=want
        )
    if len(hits) > 1:
        found = ", ".join(f"{table.headers[i]!r} (column {i + 1})" for i in hits)
        raise table.error(f"column name is not unique in this source: {found}", column=want)
    return hits[0]


def _separator_hint(headers: list[str]) -> str:
    if len(headers) == 1:
        for sep, word in ((";", "';'"), ("\t", "tabs"), ("|", "'|'"), (",", "','")):
            if sep in headers[0]:
                return f" (the file seems to use {word} as separator; see the delimiter option)"
    return ""


def _positions(table: Table, spec: _Spec) -> list[int]:
    positions: list[int] = []
    roles: dict[int, tuple[str, str]] = {}
    for role, name in spec.all:
        pos = _resolve(table, name)
        if pos in roles:
            first_role, first_name = roles[pos]
            raise table.error(
                f"named twice (as {first_role} '{first_name}' and as {role} '{name}')",
                column=table.headers[pos],
            )
        roles[pos] = (role, name)
        positions.append(pos)
    return positions


# --------------------------------------------------------------------------- values


def _first(mask: np.ndarray) -> int:
    return int(np.argmax(mask))


def _numbers(
    table: Table, series: pd.Series, header: str, is_time: bool
) -> tuple[np.ndarray, Stamps | None]:
    """Float values of one column; the date-time stamps as second item when converted
    from date-times."""
    dtype = series.dtype
    if is_time and (
        isinstance(dtype, pd.DatetimeTZDtype) or pd.api.types.is_datetime64_any_dtype(dtype)
    ):
        stamps = from_datetimes(series)
        return stamps.seconds(), stamps
    if pd.api.types.is_timedelta64_dtype(dtype) and is_time:
        return (series / pd.Timedelta(seconds=1)).to_numpy(np.float64, na_value=np.nan), None
    if pd.api.types.is_bool_dtype(dtype) or pd.api.types.is_complex_dtype(dtype):
        raise _non_numeric(table, series, header, 0)
    if pd.api.types.is_numeric_dtype(dtype):
        return series.to_numpy(dtype=np.float64, na_value=np.nan), None
    return _parse_text(table, series, header, is_time)


def _parse_text(table: Table, series: pd.Series, header: str, is_time: bool):
    raw = series.astype(object)
    present = raw.notna().to_numpy()
    text_ok = np.ones(int(present.sum()), dtype=bool)
    if series.dtype == object:  # Python objects (DataFrame input): refuse booleans and complex
        kinds = raw[present].map(lambda v: isinstance(v, bool | complex | np.bool_))
        text_ok = ~kinds.to_numpy(dtype=bool)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        values = pd.to_numeric(raw.where(raw.notna()), errors="coerce")
    bad = present & values.isna().to_numpy()
    if not bad.any() and text_ok.all():
        return values.to_numpy(dtype=np.float64, na_value=np.nan), None
    if is_time:
        stamps = parse_stamps(raw, lambda message, pos: table.error(message, header, pos))
        if stamps is not None:
            return stamps.seconds(), stamps
    if not text_ok.all():
        bad = present.copy()
        bad[present] = ~text_ok
    raise _non_numeric(table, series, header, _first(bad))


def _non_numeric(table: Table, series: pd.Series, header: str, pos: int) -> DataError:
    value = series.iloc[pos]
    shown = repr(value if isinstance(value, str) else str(value))
    if len(shown) > 40:
        shown = shown[:37] + "..."
    hint = ""
    if table.kind == "csv" and table.fmt.decimal == "." and _decimal_comma(value):
        hint = " (a decimal comma? see the decimal and delimiter options)"
    elif pos == 0 and table.kind == "csv" and not table.fmt.units_row:
        hint = " (a units row under the header? see the units-row option)"
    return table.error(f"non-numeric value {shown}{hint}", column=header, pos=pos)


def _decimal_comma(value) -> bool:
    try:
        float(str(value).replace(",", "."))
    except ValueError:
        return False
    return "," in str(value)


def _looks_like_stamps(raw: pd.Series) -> bool:
    present = raw.notna().to_numpy()
    try:
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")
            stamps = pd.to_datetime(raw, format="ISO8601", utc=True, errors="coerce")
    except (ValueError, TypeError, OverflowError):
        return False
    return not (stamps.isna().to_numpy() & present).any()


def _check_finite(
    table: Table, values: np.ndarray, raw: pd.Series, header: str, empty_ok: bool
) -> None:
    """Refuse infinite values, and empty cells unless a missing-value policy reads them."""
    bad = np.isinf(values) if empty_ok else ~np.isfinite(values)
    if bad.any():
        pos = _first(bad)
        cell = raw.iloc[pos]
        hint = (
            ""
            if table.positional
            else " (refused unless missing values are dropped or interpolated)"
        )
        what = "empty or NaN cell" + hint if pd.isna(cell) else f"non-finite value {str(cell)!r}"
        raise table.error(what, column=header, pos=pos)


def _check_empty(table: Table, frame, data: np.ndarray, headers: list[str], policy: str) -> None:
    """Refuse the first empty cell (row by row) the missing-value policy does not read: any
    under ``"refuse"``, a time cell under ``"interpolate"``."""
    empty = np.isnan(data)
    if policy == "interpolate":
        empty[:, 1:] = False
    elif policy == "drop":
        return
    if empty.any():
        pos, j = np.argwhere(empty)[0]
        if policy == "interpolate":
            raise table.error(
                "empty time cell: interpolation needs the time of every row (drop such rows "
                "instead)",
                column=headers[0],
                pos=int(pos),
            )
        _check_finite(table, data[:, j], frame[j], headers[j], empty_ok=False)


def _run_ids(table: Table, series: pd.Series, header: str) -> tuple[np.ndarray, list[str]]:
    missing = series.isna().to_numpy()
    if missing.any():
        raise table.error("empty run id", column=header, pos=_first(missing))
    codes, uniques = pd.factorize(series, sort=False)
    return codes, [_run_label(v) for v in uniques]


def _run_label(value) -> str:
    if isinstance(value, float | np.floating) and float(value).is_integer():
        return str(int(value))
    return str(value)


# --------------------------------------------------------------------------- runs


@dataclass
class _Piece:
    """A run (or a piece of one between gaps) under construction."""

    name: str
    origin: str
    time: np.ndarray
    values: np.ndarray  # (n, n_states + n_inputs)
    index: np.ndarray
    table: Table
    pos: np.ndarray  # data-row positions in the table, for messages
    stamps: np.ndarray | None = None  # date-time stamps (datetime64), when the time had them


def _table_pieces(table, frame, spec, headers, offset, stems, min_samples, tally: Tally):
    """Validate a loaded table, apply the missing-value policy and cut it into runs."""
    columns, stamps = [], None
    for j, (role, _) in enumerate(spec.numeric):
        values, found = _numbers(table, frame[j], headers[j], role == "time")
        _check_finite(table, values, frame[j], headers[j], empty_ok=True)
        columns.append(values)
        stamps = found if found is not None else stamps
    data = np.column_stack(columns) if columns else np.empty((frame.shape[0], 0))
    _check_empty(table, frame, data, headers, tally.policy)
    n = data.shape[0]
    if spec.run is not None:
        codes, labels = _run_ids(table, frame[len(spec.numeric)], headers[-1])
    else:
        codes, labels = np.zeros(n, dtype=np.int64), ["0"]
    names = [parse_header(h)[0] for h in headers[: len(spec.numeric)]]
    kept = kept_rows(data, names, tally) if tally.policy == "drop" else np.arange(n)
    pieces = []
    for group, label in zip(_group_rows(codes[kept], len(labels)), labels, strict=True):
        rows = kept[group]
        origin = _origin(table, label, stems, spec.run is not None)
        piece = _Piece(
            origin, origin, data[rows, 0], data[rows, 1:], rows + offset, table, rows,
            stamps.values[rows] if stamps is not None else None,
        )  # fmt: skip
        _check_time(piece, headers[0])
        _check_length(piece, min_samples)
        if tally.policy == "interpolate":
            interpolate_gaps(table, piece.time, piece.values, rows, names[1:], origin, tally)
        pieces.append(piece)
    return pieces, stamps


def _group_rows(codes: np.ndarray, n_groups: int) -> list[np.ndarray]:
    if n_groups == 1:
        return [np.arange(codes.shape[0])]
    order = np.argsort(codes, kind="stable")
    bounds = np.searchsorted(codes[order], np.arange(1, n_groups))
    return np.split(order, bounds)


def _origin(table: Table, label: str, stems: bool, has_run: bool) -> str:
    if stems:
        return f"{table.stem}/{label}" if has_run else table.stem
    return label


def _check_time(piece: _Piece, header: str) -> None:
    t = piece.time
    dt = np.diff(t)
    bad = dt <= 0
    if not bad.any():
        _check_time_scale(piece, header, dt)
        return
    k = _first(bad)
    table, first, second = piece.table, int(piece.pos[k]), int(piece.pos[k + 1])
    run = f" in run '{piece.origin}'" if piece.origin != "0" else ""
    if dt[k] == 0:
        message = f"duplicated time stamp {t[k]:g}{run} (same as {table.at(first)})"
    else:
        message = (
            f"time is not strictly increasing{run}: {t[k + 1]:g} follows {t[k]:g} "
            f"({table.at(first)})"
        )
    raise table.error(message, column=header, pos=second)


def _check_time_scale(piece: _Piece, header: str, dt: np.ndarray) -> None:
    """Refuse time values too large, or increments too small, for double precision."""
    t, table = piece.time, piece.table
    if t.size and np.abs(t).max() > TIME_LIMIT:
        k = _first(np.abs(t) > TIME_LIMIT)
        raise table.error(
            f"time value {t[k]:g} is too large (at most {TIME_LIMIT:g} in magnitude)",
            column=header,
            pos=int(piece.pos[k]),
        )
    tiny = (dt < MIN_STEP) | (dt < STEP_ULPS * np.spacing(np.abs(t[1:])))
    if tiny.any():
        k = _first(tiny)
        raise table.error(
            f"time step {dt[k]:g} after {t[k]:g} is too small to resolve in double precision "
            f"(a step must be at least {MIN_STEP:g} and {STEP_ULPS} units in the last place "
            "of the time value)",
            column=header,
            pos=int(piece.pos[k + 1]),
        )


def _check_length(piece: _Piece, min_samples: int) -> None:
    n = piece.time.shape[0]
    if n < min_samples:
        table = piece.table
        where = f" ({table.at(int(piece.pos[0]))} to {table.at(int(piece.pos[-1]))})" if n else ""
        raise table.error(
            f"run '{piece.origin}' has {n} samples{where}; at least {min_samples} are needed "
            "to estimate derivatives"
        )


def _split_gaps(piece: _Piece, max_gap: float, min_samples: int, notes: list[str]):
    """Cut ``piece`` where the step exceeds ``max_gap`` times its median step."""
    dt = np.diff(piece.time)
    step = float(np.median(dt))
    cuts = np.flatnonzero(dt > max_gap * step)
    if cuts.size == 0:
        return [piece], []
    gaps = [
        Gap(piece.origin, float(piece.time[k]), float(piece.time[k + 1]), float(dt[k] / step))
        for k in cuts
    ]
    notes.extend(str(g) for g in gaps)
    bounds = np.concatenate(([0], cuts + 1, [piece.time.shape[0]]))
    kept = []
    for i, (a, b) in enumerate(itertools.pairwise(bounds), start=1):
        part = _Piece(
            f"{piece.origin}#{i}", piece.origin, piece.time[a:b], piece.values[a:b],
            piece.index[a:b], piece.table, piece.pos[a:b],
            piece.stamps[a:b] if piece.stamps is not None else None,
        )  # fmt: skip
        if b - a < min_samples:
            notes.append(
                f"run '{part.name}': only {b - a} samples between gaps "
                f"(t={part.time[0]:g} to {part.time[-1]:g}); dropped"
            )
        else:
            kept.append(part)
    return kept, gaps


def _sampling(pieces: list[_Piece], step: float, resample: bool, min_samples: int, notes):
    """Warn about (or, when asked, resample) irregular pieces; returns the pieces to keep."""
    out = []
    for piece in pieces:
        dt = np.diff(piece.time)
        median = float(np.median(dt))
        spread = float((dt.max() - dt.min()) / median)
        off_rate = abs(median - step) / step > IRREGULAR_TOLERANCE
        if spread <= IRREGULAR_TOLERANCE and not off_rate:
            out.append(piece)
            continue
        what = (
            f"irregular sampling: step varies from {dt.min():.6g} to {dt.max():.6g} "
            f"(relative spread {spread:.1%})"
            if spread > IRREGULAR_TOLERANCE
            else f"median step {median:.6g} differs from the dataset step {step:.6g}"
        )
        if not resample:
            notes.append(f"run '{piece.name}': {what}; resampling was not requested")
            out.append(piece)
            continue
        new = _resample(piece, step)
        notes.append(
            f"run '{piece.name}': {what}; resampled by linear interpolation to step {step:.6g} "
            f"({piece.time.shape[0]} -> {new.time.shape[0]} samples)"
        )
        if new.time.shape[0] < min_samples:
            notes.append(
                f"run '{piece.name}': fewer than {min_samples} samples after resampling; dropped"
            )
        else:
            out.append(new)
    return out


def _resample(piece: _Piece, step: float) -> _Piece:
    t = piece.time
    count = int(np.floor((t[-1] - t[0]) / step * (1.0 + 1e-12))) + 1
    grid = t[0] + step * np.arange(count)
    values = np.empty((count, piece.values.shape[1]))
    for j in range(piece.values.shape[1]):
        values[:, j] = np.interp(grid, t, piece.values[:, j])
    hit = np.minimum(np.searchsorted(t, grid), t.shape[0] - 1)
    index = np.where(t[hit] == grid, piece.index[hit], -1).astype(np.int64)
    stamps = shifted(piece.stamps[0], grid - t[0]) if piece.stamps is not None else None
    return _Piece(
        piece.name, piece.origin, grid, values, index, piece.table, piece.pos[hit], stamps
    )


def _to_run(piece: _Piece, n_states: int) -> Run:
    return Run(
        name=piece.name,
        origin=piece.origin,
        time=np.ascontiguousarray(piece.time, dtype=np.float64),
        states=np.ascontiguousarray(piece.values[:, :n_states]),
        inputs=np.ascontiguousarray(piece.values[:, n_states:]),
        index=np.asarray(piece.index, dtype=np.int64),
        stamps=piece.stamps,
    )


# --------------------------------------------------------------------------- public


def read_data(
    source: Source,
    *,
    time: str,
    states: Sequence[str],
    inputs: Sequence[str] = (),
    run: str | None = None,
    resample: bool = False,
    max_gap: float = 5.0,
    min_samples: int = 8,
    delimiter: str = ",",
    decimal: str = ".",
    units_row: bool = False,
    missing: str = "refuse",
) -> Dataset:
    """Read trajectories from files or a DataFrame, validate them and return a :class:`Dataset`.

    Parameters
    ----------
    source : path, DataFrame or sequence of paths
        A CSV file (``.csv``, ``.csv.gz``), a Parquet file (``.parquet``, ``.pq``), a
        pandas DataFrame, or a list of such files (each file one or more runs,
        named by file stem, or ``"<stem>/<run value>"`` with a run column).
    time : str
        Time column, by bare name (``"t"``) or full header (``"t [s]"``).  For a
        DataFrame it may also be the index name.
    states : sequence of str
        State columns (at least one).
    inputs : sequence of str, optional
        Exogenous input columns.
    run : str, optional
        Column whose values identify runs (experiments) within a source.
    resample : bool, default False
        Interpolate irregularly sampled runs onto a uniform grid at the dataset
        step.  Without it irregular sampling is only reported.
    max_gap : float, default 5.0
        A time increment larger than ``max_gap`` times the run's median step
        splits the run.
    min_samples : int, default 8
        Fewest samples a run needs.  A run read from the source with fewer is an
        error; a piece left between gaps with fewer is dropped with a warning.
    delimiter : {",", ";", "\\t", "|"}, default ","
        Field delimiter of CSV files.
    decimal : {".", ","}, default "."
        Decimal mark of CSV files.
    units_row : bool, default False
        CSV files have a row of units under the header (read as ``name [unit]``).
    missing : {"refuse", "drop", "interpolate"}, default "refuse"
        What to do with empty cells in the columns read (:mod:`modemap.data.missing`);
        the counts are in ``Dataset.missing``.

    Returns
    -------
    Dataset

    Raises
    ------
    DataError
        For any problem with the source or the columns; the message names the
        file, column and row (see the module documentation for row numbering).
    """
    spec = _make_spec(time, states, inputs, run)
    _check_options(max_gap, min_samples)
    tally = Tally(check_policy(missing))
    fmt = CsvFormat(delimiter, decimal, units_row)
    tables, stems = open_tables(source, spec.time, fmt)
    pieces, units, notes, gaps, n_rows, zones = [], {}, [], [], 0, []
    for table in tables:
        positions = _positions(table, spec)
        headers = [table.headers[p] for p in positions]
        frame = load_columns(table, positions)
        if frame.shape[0] == 0:
            raise table.error("no data rows (only a header)")
        found, stamps = _table_pieces(
            table, frame, spec, headers, n_rows, stems, min_samples, tally
        )
        _merge_units(units, table, spec, headers, stamps is not None)
        zones.append(_zone(table, stamps, zones, headers[0]))
        n_rows += frame.shape[0]
        for piece in found:
            kept, new_gaps = _split_gaps(piece, max_gap, min_samples, notes)
            pieces.extend(kept)
            gaps.extend(new_gaps)
    if not pieces:
        raise DataError("no run is long enough after splitting at gaps", source=_label(tables))
    step = float(np.median(np.concatenate([np.diff(p.time) for p in pieces])))
    pieces = _sampling(pieces, step, resample, min_samples, notes)
    if not pieces:
        raise DataError("no run is long enough after resampling", source=_label(tables))
    names = [parse_header(tables[0].headers[_resolve(tables[0], n)])[0] for _, n in spec.numeric]
    _check_names(tables[0], spec, names)
    n_states = len(spec.states)
    return Dataset(
        runs=tuple(_to_run(p, n_states) for p in pieces),
        time_name=names[0],
        state_names=tuple(names[1 : 1 + n_states]),
        input_names=tuple(names[1 + n_states :]),
        units=units,
        step=step,
        source=_label(tables),
        n_rows=n_rows,
        warnings=tuple(notes),
        gaps=tuple(gaps),
        resampled=bool(resample),
        missing=tally.result(),
        stamp_zone=next((z for z in zones if z is not None), None),
    )


def _zone(table: Table, stamps: Stamps | None, earlier: list, header: str):
    """The zone of this table's stamps, refused when it mixes zoned and plain stamps with
    earlier sources (stamps of different zones are all written in the first one's)."""
    zone = stamps.zone if stamps is not None else None
    if stamps is not None and earlier and any((z is None) != (zone is None) for z in earlier):
        raise table.error(
            "time stamps with and without a time zone across sources; give all or none a zone",
            column=header,
        )
    return zone


def _check_names(table: Table, spec: _Spec, names: list[str]) -> None:
    """State and input names are distinct and not too long (any other text is a valid
    name: terms quote it, see the term grammar)."""
    requested = [n for _, n in spec.numeric]
    seen: dict[str, int] = {}
    for name, given in zip(names[1:], requested[1:], strict=True):
        if len(name) > MAX_NAME_LENGTH:
            raise table.error(
                f"column name has {len(name)} characters; at most {MAX_NAME_LENGTH} are "
                "allowed for a state or input",
                column=given[:40] + "...",
            )
        if name in seen:
            raise table.error(
                f"its name '{name}' is also the name of column {seen[name]} (units are not "
                "part of a name); rename one",
                column=given,
            )
        seen[name] = _resolve(table, given) + 1


def _check_options(max_gap: float, min_samples: int) -> None:
    if not (isinstance(max_gap, int | float) and np.isfinite(max_gap) and max_gap > 1):
        raise DataError(f"max_gap must be a number larger than 1, got {max_gap!r}")
    if not (isinstance(min_samples, int | np.integer) and min_samples >= 2):
        raise DataError(f"min_samples must be an integer of at least 2, got {min_samples!r}")


def _label(tables: list[Table]) -> str:
    return ", ".join(t.label for t in tables)


def _merge_units(units: dict, table: Table, spec: _Spec, headers: list[str], dates: bool) -> None:
    for j, (_, _requested) in enumerate(spec.numeric):
        name, unit = parse_header(headers[j])
        if j == 0 and dates:
            unit = "s"
        if name in units and units[name] != unit:
            raise table.error(
                f"unit {unit!r} differs from {units[name]!r} in an earlier source", column=name
            )
        units[name] = unit


def peek_columns(
    source: Source,
    nrows: int = 200,
    *,
    delimiter: str = ",",
    decimal: str = ".",
    units_row: bool = False,
) -> list[tuple[str, bool]]:
    """Headers of the (first) source and whether each looks numeric in its first rows.

    Parameters
    ----------
    source : path, DataFrame or sequence of paths
        As for :func:`read_data`; only the first file is looked at.
    nrows : int, default 200
        Data rows inspected (CSV only).
    delimiter, decimal, units_row
        The layout of CSV files, as for :func:`read_data`.

    Returns
    -------
    list of (header, numeric) tuples
        Date-time columns count as numeric (they can serve as time).
    """
    table = open_tables(source, None, CsvFormat(delimiter, decimal, units_row))[0][0]
    frame = first_rows(table, nrows)
    if frame.shape[0] == 0:
        raise table.error("no data rows (only a header)")
    out = []
    for j, header in enumerate(table.headers):
        series = frame.iloc[:, j]
        out.append((header, _looks_numeric(series)))
    return out


def _looks_numeric(series: pd.Series) -> bool:
    dtype = series.dtype
    if pd.api.types.is_bool_dtype(dtype) or pd.api.types.is_complex_dtype(dtype):
        return False
    if pd.api.types.is_numeric_dtype(dtype) or pd.api.types.is_datetime64_any_dtype(dtype):
        return True
    if isinstance(dtype, pd.DatetimeTZDtype):
        return True
    raw = series.dropna().astype(object)
    if raw.empty:
        return False
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        values = pd.to_numeric(raw, errors="coerce")
    return bool(values.notna().all()) or _looks_like_stamps(raw)


def summarize(ds: Dataset) -> dict:
    """A JSON-serialisable summary of a :class:`Dataset` (what ``modemap check`` shows).

    Parameters
    ----------
    ds : Dataset

    Returns
    -------
    dict
        Keys ``source``, ``rows``, ``time`` (name, unit), ``states``, ``inputs``,
        ``runs`` (name, origin, samples, start, end, duration, step), ``samples``,
        ``step``, ``duration``, ``ranges`` (per column: role, unit, min, max, mean),
        ``gaps`` (origin, start, end, steps), ``warnings``, ``resampled`` and ``missing``
        (policy; rows dropped or interpolated; empty cells per column).
    """
    runs = [
        {
            "name": r.name,
            "origin": r.origin,
            "samples": r.n_samples,
            "start": float(r.time[0]),
            "end": float(r.time[-1]),
            "duration": r.duration,
            "step": float(np.median(np.diff(r.time))) if r.n_samples > 1 else None,
        }
        for r in ds.runs
    ]
    return {
        "source": ds.source,
        "rows": int(ds.n_rows),
        "time": {"name": ds.time_name, "unit": ds.unit(ds.time_name)},
        "states": list(ds.state_names),
        "inputs": list(ds.input_names),
        "runs": runs,
        "samples": int(ds.n_samples),
        "step": float(ds.step),
        "duration": float(sum(r.duration for r in ds.runs)),
        "ranges": _ranges(ds),
        "gaps": [
            {"origin": g.origin, "start": g.start, "end": g.end, "steps": g.steps} for g in ds.gaps
        ],
        "warnings": list(ds.warnings),
        "resampled": bool(ds.resampled),
        "missing": {
            "policy": ds.missing.policy,
            "rows": int(ds.missing.rows),
            "values": dict(ds.missing.values),
        },
    }


def _ranges(ds: Dataset) -> dict[str, dict]:
    _, x, u, _ = ds.concat()
    out = {}
    for role, names, block in (("state", ds.state_names, x), ("input", ds.input_names, u)):
        for j, name in enumerate(names):
            col = block[:, j]
            out[name] = {
                "role": role,
                "unit": ds.unit(name),
                "min": float(col.min()),
                "max": float(col.max()),
                "mean": float(col.mean()),
            }
    return out
