"""Options of the command line that say how to read data, shared by every sub-command.

The column options (``--time``, ``--states``, ``--inputs``, ``--run`` ...), the reading
options (delimiter, decimal mark, units row, missing values) and the checking ``type=``
functions of numeric options (argparse then names the option in its one-line error), and
:func:`load_dataset`, which reads the data as the options say.
"""

from __future__ import annotations

import argparse
import math

from modemap._exceptions import DataError, ModemapError
from modemap.data.dataset import Dataset
from modemap.data.intake import parse_header, peek_columns, read_data
from modemap.data.states import default_states

__all__ = [
    "TIME_NAMES",
    "add_data_options",
    "add_reading_options",
    "csv_format",
    "guess_time",
    "load_dataset",
    "share",
    "whole",
]

TIME_NAMES = ("time", "t")


def _names(text: str) -> list[str]:
    """Split a comma-separated option value into names (blanks around commas ignored).

    A name with a comma in it is written between backticks, as in terms (a backtick
    inside doubled): ``--states '`Flow, total`,x'``.
    """
    names: list[str] = []
    part, pos = "", 0
    while pos <= len(text):
        if text.startswith("`", pos) and not part.strip():
            end = pos + 1
            while True:
                end = text.find("`", end)
                if end < 0:
                    raise argparse.ArgumentTypeError(f"unclosed '`' in {text!r}")
                if not text.startswith("``", end):
                    break
                end += 2
            part = text[pos + 1 : end].replace("``", "`")
            pos = end + 1
            rest = text[pos:].split(",", 1)[0]
            if rest.strip():
                raise argparse.ArgumentTypeError(f"text after a quoted name in {text!r}")
            pos += len(rest)
            names.append(part)
            part, pos = "", pos + 1
            continue
        if pos == len(text) or text[pos] == ",":
            names.append(part.strip())
            part, pos = "", pos + 1
            continue
        part += text[pos]
        pos += 1
    if not all(n.strip() for n in names):
        raise argparse.ArgumentTypeError(f"empty name in {text!r}")
    return names


def _positive_gap(text: str) -> float:
    try:
        value = float(text)
    except ValueError:
        raise argparse.ArgumentTypeError(f"not a number: {text!r}") from None
    if not (value > 1 and math.isfinite(value)):
        raise argparse.ArgumentTypeError(f"must be larger than 1 and finite, got {text}")
    return value


def whole(text: str) -> int:
    """A whole-number option value (argparse names the option in its message)."""
    try:
        return int(text)
    except ValueError:
        raise argparse.ArgumentTypeError(f"expected a whole number, got {text!r}") from None


def share(text: str) -> float:
    """A share in [0, 1) (the hold-out)."""
    try:
        value = float(text)
    except ValueError:
        raise argparse.ArgumentTypeError(f"expected a number in [0, 1), got {text!r}") from None
    if not 0 <= value < 1:
        raise argparse.ArgumentTypeError(f"expected a number in [0, 1), got {text}")
    return value


_DELIMITER_WORDS = {",": ",", ";": ";", "|": "|", "tab": "\t", "\t": "\t", "\\t": "\t"}


def _delimiter(text: str) -> str:
    """``tab`` (or ``\\t``) as a tab; other values are checked by the reader."""
    return _DELIMITER_WORDS.get(text, text)


def add_reading_options(parser: argparse.ArgumentParser, *, missing: bool = True) -> None:
    """Add the options that say how a CSV file is laid out, and what to do with gaps."""
    group = parser.add_argument_group("reading CSV files")
    group.add_argument(
        "--delimiter",
        type=_delimiter,
        default=",",
        metavar="C",
        help="field delimiter: , ; | or tab (default ,)",
    )
    group.add_argument(
        "--decimal",
        default=".",
        metavar="C",
        help="decimal mark: . or , (default .)",
    )
    group.add_argument(
        "--units-row",
        action="store_true",
        help="the line under the header holds the units (read as 'name [unit]')",
    )
    if missing:
        group.add_argument(
            "--missing",
            default="refuse",
            metavar="POLICY",
            help="empty cells: refuse (default), drop (their rows) or interpolate "
            "(linearly in time within a run)",
        )


def csv_format(args: argparse.Namespace) -> dict:
    """The reading options of ``args`` as keyword arguments of ``read_data``."""
    return {"delimiter": args.delimiter, "decimal": args.decimal, "units_row": args.units_row}


def add_data_options(
    parser: argparse.ArgumentParser,
    *,
    metavar: str = "DATA",
    help: str = "CSV or Parquet file(s)",
    title: str = "columns",
) -> None:
    """Add the options that say which data and columns to read (shared by sub-commands)."""
    parser.add_argument("data", nargs="+", metavar=metavar, help=help)
    group = parser.add_argument_group(title)
    group.add_argument("--time", metavar="NAME", help="time column (default: 'time' or 't')")
    group.add_argument(
        "--states",
        type=_names,
        metavar="A,B",
        help="state columns (default: every numeric column but time, run and inputs, "
        "leaving out constant, two-valued and label-like columns)",
    )
    group.add_argument("--inputs", type=_names, default=[], metavar="U,V", help="input columns")
    group.add_argument("--run", metavar="NAME", help="column identifying runs within a file")
    group.add_argument(
        "--resample", action="store_true", help="interpolate irregular runs onto a uniform step"
    )
    group.add_argument(
        "--max-gap",
        type=_positive_gap,
        default=5.0,
        metavar="N",
        help="split runs where the step exceeds N times the median (default 5)",
    )
    group.add_argument(
        "--min-samples",
        type=whole,
        default=8,
        metavar="N",
        help="fewest samples per run (default 8)",
    )
    add_reading_options(parser)


def load_dataset(args: argparse.Namespace) -> Dataset:
    """Read the data named by :func:`add_data_options`, filling in default columns."""
    source = args.data[0] if len(args.data) == 1 else list(args.data)
    if args.min_samples < 2:
        raise ModemapError(f"--min-samples must be a whole number >= 2, got {args.min_samples}")
    time, states = args.time, args.states
    if time is None or states is None:
        columns = peek_columns(source, **csv_format(args))
        label = str(args.data[0])
        time = time if time is not None else guess_time(columns, label)
        if states is None:
            states = _default_states(columns, [time, *args.inputs, args.run], label)
    ds = read_data(
        source,
        time=time,
        states=states,
        inputs=args.inputs,
        run=args.run,
        resample=args.resample,
        max_gap=args.max_gap,
        min_samples=args.min_samples,
        missing=args.missing,
        **csv_format(args),
    )
    # no states named: constant, two-valued and label-like columns are left out, with a note
    return default_states(ds) if args.states is None else ds


def guess_time(columns: list[tuple[str, bool]], label: str) -> str:
    """A column named ``time`` or ``t``; exact case wins (``T`` is often a temperature)."""
    bare = [parse_header(h)[0] for h, _ in columns]
    for want in TIME_NAMES:
        for same in (str.__eq__, lambda a, b: a.lower() == b):
            hits = [h for (h, _), b in zip(columns, bare, strict=True) if same(b, want)]
            if len(hits) > 1:
                raise DataError(
                    f"several time columns ({', '.join(hits)}); choose one with --time",
                    source=label,
                )
            if hits:
                return hits[0]
    listed = ", ".join(repr(h) for h, _ in columns[:12]) + (", ..." if len(columns) > 12 else "")
    raise DataError(
        f"no column named 'time' or 't'; choose one with --time (columns: {listed})", source=label
    )


def _default_states(
    columns: list[tuple[str, bool]], taken: list[str | None], label: str
) -> list[str]:
    used = set()
    for name in taken:
        if name is not None:
            used |= {name.strip(), parse_header(name)[0]}
    states = [h for h, numeric in columns if numeric and h.strip() not in used]
    states = [h for h in states if parse_header(h)[0] not in used]
    if not states:
        raise DataError(
            "no numeric column left to use as a state; name them with --states", source=label
        )
    return states
