"""Date-time stamps: read from a time column, kept beside the numeric time, written back.

A time column of ISO 8601 date-times becomes seconds since the first stamp of each file
(the numeric time every stage uses); the stamps themselves are kept per sample
(:attr:`modemap.data.dataset.Run.stamps`) so results can be written with the original
date-time beside the numeric time.

Conventions
-----------
Zones
    Stamps without a zone (``2024-03-01 12:00:00``) are wall-clock times and are written
    back without one.  Stamps with a zone (``Z``, ``+01:00``) are kept as UTC instants and
    written back in their zone; stamps with different offsets (a change to summer time)
    are written in UTC.  A column mixing stamps with and without a zone is refused.
Resolution
    Stamps are written to the coarsest of seconds, milliseconds, microseconds or
    nanoseconds that shows every stamp of the column exactly (nanoseconds only when the
    stamps were read with them; they reach the years 1678 to 2262).
"""

from __future__ import annotations

import datetime as _dt
import re
import warnings
from collections.abc import Callable
from dataclasses import dataclass
from typing import Any

import numpy as np
import pandas as pd

from modemap._exceptions import DataError

__all__ = [
    "Stamps",
    "format_stamps",
    "from_datetimes",
    "parse_stamps",
    "row_stamps",
    "shifted",
    "stamps_at",
]

_ZONED = re.compile(r"\d:\d{2}(?::\d{2})?(?:[.,]\d+)?\s*(?:Z|[+-]\d{2}(?::?\d{2})?)$")
_UNITS = ("s", "ms", "us", "ns")


@dataclass(frozen=True)
class Stamps:
    """The stamps of one column.

    Attributes
    ----------
    values : ndarray of datetime64
        One per row; UTC instants when ``zone`` is set, wall-clock times otherwise; NaT
        where the cell is empty.
    zone : tzinfo or None
        The zone to write the stamps in (None: no zone).
    """

    values: np.ndarray
    zone: Any = None

    def seconds(self) -> np.ndarray:
        """Seconds since the first stamp (NaN where empty)."""
        valid = self.values[~np.isnat(self.values)]
        if valid.size == 0:
            return np.full(self.values.shape, np.nan)
        out = (self.values - valid[0]) / np.timedelta64(1, "ns") / 1e9
        return np.where(np.isnat(self.values), np.nan, out)


def from_datetimes(series: pd.Series) -> Stamps:
    """Stamps of a datetime column (a DataFrame or Parquet column, zoned or not)."""
    stamps = pd.to_datetime(series)
    zone = getattr(stamps.dt, "tz", None)
    if zone is not None:
        stamps = stamps.dt.tz_convert("UTC").dt.tz_localize(None)
    return Stamps(stamps.to_numpy(), zone)


def parse_stamps(raw: pd.Series, error: Callable[[str, int], DataError]) -> Stamps | None:
    """Stamps of a text column, or None when its first filled cell is no ISO 8601 date-time.

    ``error(message, pos)`` builds the error for data row ``pos``.

    Raises
    ------
    DataError
        A cell that does not parse like the first one, or a mix of stamps with and
        without a time zone.
    """
    present = raw.notna().to_numpy()
    if not present.any():
        return None
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        try:
            parsed = pd.to_datetime(raw, format="ISO8601", utc=True, errors="coerce")
        except (ValueError, TypeError, OverflowError):
            return None
    ok = parsed.notna().to_numpy()
    first = int(np.argmax(present))
    if not ok[first]:
        return None
    bad = present & ~ok
    if bad.any():
        pos = int(np.argmax(bad))
        raise error(
            f"time stamp {_shown(raw.iloc[pos])} is not an ISO 8601 date-time like the first "
            f"one ({_shown(raw.iloc[first])})",
            pos,
        )
    text = raw.astype(object).where(present, "").astype(str).str.strip()
    zoned = text.str.contains(_ZONED).to_numpy() & present
    if zoned.any() and not zoned[present].all():
        pos = int(np.argmax(present & (zoned != zoned[first])))
        has = "has a" if zoned[pos] else "has no"
        raise error(
            f"time stamp {_shown(raw.iloc[pos])} {has} time zone, unlike the first one "
            f"({_shown(raw.iloc[first])}); give every stamp a zone or none",
            pos,
        )
    values = parsed.dt.tz_localize(None).to_numpy()
    zone = _common_zone(raw[present]) if zoned.any() else None
    return Stamps(values, zone)


def _common_zone(raw: pd.Series) -> Any:
    """The one zone of zoned stamps, or UTC when their offsets differ."""
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        try:
            zone = pd.to_datetime(raw, format="ISO8601").dt.tz
        except (ValueError, TypeError, AttributeError):
            return _dt.UTC
    return zone if zone is not None else _dt.UTC


def _shown(value: Any) -> str:
    shown = repr(str(value))
    return shown if len(shown) <= 40 else shown[:37] + "..."


def _unit(values: np.ndarray) -> str:
    """The unit of a datetime64 array: its own when nanoseconds, else microseconds (which
    reach every year a stamp can be written with)."""
    return "ns" if np.datetime_data(values.dtype)[0] == "ns" else "us"


def shifted(first: np.datetime64, seconds: np.ndarray) -> np.ndarray:
    """Stamps ``seconds`` after ``first`` (for samples made by resampling), to the stamps'
    resolution (nanoseconds or microseconds)."""
    unit = _unit(np.asarray(first))
    per_second = 1e9 if unit == "ns" else 1e6
    ticks = np.round(np.asarray(seconds, dtype=np.float64) * per_second).astype(np.int64)
    return np.datetime64(first, unit) + ticks.astype(f"timedelta64[{unit}]")


def format_stamps(values: np.ndarray, zone: Any = None) -> np.ndarray:
    """ISO 8601 text of ``values`` (see the module notes for zones and resolution);
    empty text where a value is NaT."""
    unit = _unit(np.asarray(values))
    values = np.asarray(values).astype(f"datetime64[{unit}]")
    missing = np.isnat(values)
    values = np.where(missing, np.datetime64(0, unit), values)
    ticks = values.view(np.int64)[~missing]
    finest = _UNITS[: _UNITS.index(unit) + 1]
    unit = next(u for u in finest if not np.any(ticks % _per(u, unit)))
    if zone is None:
        text = np.datetime_as_string(values, unit=unit)
    else:
        index = pd.DatetimeIndex(values).tz_localize("UTC").tz_convert(zone)
        wall = index.tz_localize(None).to_numpy().astype(values.dtype)
        minutes = ((wall - values) // np.timedelta64(1, "m")).astype(np.int64)
        offsets = np.unique(minutes)
        suffix = (
            _offset(offsets[0]) if offsets.size == 1 else np.array([_offset(m) for m in minutes])
        )
        text = np.char.add(np.datetime_as_string(wall, unit=unit), suffix)
    text = np.asarray(text, dtype=object)
    text[missing] = ""
    return text


def row_stamps(ds: Any) -> np.ndarray | None:
    """ISO 8601 text of the stamp of every row a fit labels (None without stamps).

    The rows are those of ``identify.labels_frame``: one per data row of the source in
    input order (empty text for rows that are no sample, such as dropped ones), or the
    runs' samples in order when the data were resampled.
    """
    if not ds.has_stamps:
        return None
    if ds.resampled or ds.n_rows == 0:
        return format_stamps(np.concatenate([r.stamps for r in ds.runs]), ds.stamp_zone)
    values = np.full(ds.n_rows, np.datetime64("NaT"), dtype=ds.runs[0].stamps.dtype)
    for r in ds.runs:
        values[r.index] = r.stamps
    return format_stamps(values, ds.stamp_zone)


def stamps_at(run: Any, times: np.ndarray) -> np.ndarray | None:
    """Stamps of ``run`` at ``times`` (the run's own where the times are its first ones,
    else counted from its first stamp); None when the run has none."""
    if run.stamps is None:
        return None
    n = len(times)
    if n <= run.n_samples and np.array_equal(times, run.time[:n]):
        return run.stamps[:n]
    return shifted(run.stamps[0], np.asarray(times) - run.time[0])


def _per(coarse: str, fine: str) -> int:
    return int(np.timedelta64(1, coarse) // np.timedelta64(1, fine))


def _offset(minutes: int) -> str:
    sign = "-" if minutes < 0 else "+"
    hours, rest = divmod(abs(int(minutes)), 60)
    return f"{sign}{hours:02d}:{rest:02d}"
