"""The ``modemap`` command line: a thin layer over the library.

Each sub-command has two small functions: ``_add_<name>(subparsers)`` registers
its parser and ``_run_<name>(args) -> int`` carries it out.  To add one, write
both and list the registrar in ``_COMMANDS``.  :func:`main` returns the exit
code: 0 on success, 2 for a user error (one line ``modemap: error: ...`` on
stderr, the traceback only with ``--debug``), 130 when interrupted.
"""

from __future__ import annotations

import argparse
import json
import os
import sys
import traceback
from collections.abc import Callable, Sequence

import modemap
from modemap._exceptions import DataError, ModemapError
from modemap.dataset import Dataset
from modemap.intake import parse_header, peek_columns, read_data, summarize

__all__ = ["main"]

_TIME_NAMES = ("time", "t")
EXIT_USER_ERROR = 2
EXIT_INTERRUPTED = 130


# --------------------------------------------------------------------------- shared options


def _names(text: str) -> list[str]:
    """Split a comma-separated option value into names (blanks around commas ignored)."""
    names = [part.strip() for part in text.split(",")]
    if not all(names):
        raise argparse.ArgumentTypeError(f"empty name in {text!r}")
    return names


def _positive_gap(text: str) -> float:
    try:
        value = float(text)
    except ValueError:
        raise argparse.ArgumentTypeError(f"not a number: {text!r}") from None
    if not value > 1:
        raise argparse.ArgumentTypeError(f"must be larger than 1, got {text}")
    return value


def add_data_options(parser: argparse.ArgumentParser) -> None:
    """Add the options that say which data and columns to read (shared by sub-commands)."""
    parser.add_argument("data", nargs="+", metavar="DATA", help="CSV or Parquet file(s)")
    group = parser.add_argument_group("columns")
    group.add_argument("--time", metavar="NAME", help="time column (default: 'time' or 't')")
    group.add_argument(
        "--states",
        type=_names,
        metavar="A,B",
        help="state columns (default: every numeric column but time, run and inputs)",
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
        "--min-samples", type=int, default=8, metavar="N", help="fewest samples per run (default 8)"
    )


def load_dataset(args: argparse.Namespace) -> Dataset:
    """Read the data named by :func:`add_data_options`, filling in default columns."""
    source = args.data[0] if len(args.data) == 1 else list(args.data)
    time, states = args.time, args.states
    if time is None or states is None:
        columns = peek_columns(source)
        label = str(args.data[0])
        time = time if time is not None else _guess_time(columns, label)
        if states is None:
            states = _default_states(columns, [time, *args.inputs, args.run], label)
    return read_data(
        source,
        time=time,
        states=states,
        inputs=args.inputs,
        run=args.run,
        resample=args.resample,
        max_gap=args.max_gap,
        min_samples=args.min_samples,
    )


def _guess_time(columns: list[tuple[str, bool]], label: str) -> str:
    """A column named ``time`` or ``t``; exact case wins (``T`` is often a temperature)."""
    bare = [parse_header(h)[0] for h, _ in columns]
    for want in _TIME_NAMES:
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


# --------------------------------------------------------------------------- check


def _add_check(subparsers: argparse._SubParsersAction) -> None:
    parser = subparsers.add_parser(
        "check",
        help="read and validate data; print runs, sampling, gaps and column ranges",
        description="Read and validate data files and print what modemap sees in them.",
    )
    add_data_options(parser)
    parser.add_argument("--json", action="store_true", help="print the summary as JSON")
    _add_debug(parser)
    parser.set_defaults(handler=_run_check)


def _run_check(args: argparse.Namespace) -> int:
    summary = summarize(load_dataset(args))
    if args.json:
        print(json.dumps(summary, indent=2))
    else:
        print(format_summary(summary))
    return 0


def format_summary(summary: dict) -> str:
    """Readable text for a :func:`modemap.intake.summarize` dictionary."""
    time = summary["time"]
    unit = f" {time['unit']}" if time["unit"] else ""
    label = f" [{time['unit']}]" if time["unit"] else ""
    lines = [
        f"source    {summary['source']} ({summary['rows']} rows)",
        f"time      {time['name']}{label}, step {summary['step']:.6g}{unit}",
        f"runs      {len(summary['runs'])}, {summary['samples']} samples, "
        f"total duration {summary['duration']:.6g}{unit}",
        f"resampled {'yes' if summary['resampled'] else 'no'}",
        "",
    ]
    lines += _table(
        ["run", "samples", "start", "end", "duration", "step"],
        [
            [r["name"], str(r["samples"]), f"{r['start']:.6g}", f"{r['end']:.6g}",
             f"{r['duration']:.6g}", f"{r['step']:.6g}"]
            for r in summary["runs"]
        ],
    )  # fmt: skip
    lines.append("")
    lines += _table(
        ["column", "role", "unit", "min", "max", "mean"],
        [
            [name, c["role"], c["unit"] or "-", f"{c['min']:.6g}", f"{c['max']:.6g}",
             f"{c['mean']:.6g}"]
            for name, c in summary["ranges"].items()
        ],
    )  # fmt: skip
    lines.append("")
    gaps = summary["gaps"]
    lines.append(f"gaps      {len(gaps) if gaps else 'none'}")
    for g in gaps:
        lines.append(
            f"  run '{g['origin']}': t={g['start']:.6g} to {g['end']:.6g} ({g['steps']:.1f} steps)"
        )
    notes = summary["warnings"]
    lines.append(f"warnings  {len(notes) if notes else 'none'}")
    lines += [f"  {w}" for w in notes]
    return "\n".join(lines)


def _table(header: list[str], rows: list[list[str]]) -> list[str]:
    widths = [max(len(r[j]) for r in [header, *rows]) for j in range(len(header))]

    def fmt(row: list[str]) -> str:
        cells = [row[0].ljust(widths[0])] + [
            c.rjust(w) for c, w in zip(row[1:], widths[1:], strict=True)
        ]
        return "  " + "  ".join(cells).rstrip()

    return [fmt(header)] + [fmt(r) for r in rows]


# --------------------------------------------------------------------------- main

_COMMANDS: tuple[Callable[[argparse._SubParsersAction], None], ...] = (_add_check,)


def _add_debug(parser: argparse.ArgumentParser) -> None:
    # Accepted after the sub-command too; SUPPRESS keeps a flag given before it.
    parser.add_argument(
        "--debug", action="store_true", default=argparse.SUPPRESS, help=argparse.SUPPRESS
    )


def build_parser() -> argparse.ArgumentParser:
    """The argument parser with every sub-command registered."""
    parser = argparse.ArgumentParser(
        prog="modemap",
        description="Identify hybrid (multi-regime) dynamical models from logged trajectories.",
    )
    parser.add_argument("--version", action="version", version=f"modemap {modemap.__version__}")
    parser.add_argument("--debug", action="store_true", help="show tracebacks of errors")
    subparsers = parser.add_subparsers(dest="command", metavar="COMMAND", required=True)
    for register in _COMMANDS:
        register(subparsers)
    return parser


def main(argv: Sequence[str] | None = None) -> int:
    """Run the command line; returns the exit code (use as ``sys.exit(main())``)."""
    args = build_parser().parse_args(argv)
    try:
        return args.handler(args)
    except BrokenPipeError:  # output piped into e.g. `head`: stop quietly (Python docs recipe)
        devnull = os.open(os.devnull, os.O_WRONLY)
        os.dup2(devnull, sys.stdout.fileno())
        return 1
    except KeyboardInterrupt:
        print("modemap: interrupted", file=sys.stderr)
        return EXIT_INTERRUPTED
    except (ModemapError, OSError) as exc:
        if args.debug:
            traceback.print_exc()
        print(f"modemap: error: {_one_line(exc)}", file=sys.stderr)
        return EXIT_USER_ERROR


def _one_line(exc: BaseException) -> str:
    if isinstance(exc, OSError) and exc.filename is not None:
        return f"{exc.filename}: {exc.strerror or exc}"
    return " ".join(str(exc).split()) or type(exc).__name__


if __name__ == "__main__":
    sys.exit(main())
