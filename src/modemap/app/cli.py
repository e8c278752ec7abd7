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
import math
import os
import sys
import traceback
from collections.abc import Callable, Sequence
from typing import NoReturn

import modemap
from modemap._exceptions import DataError, ModemapError, ParameterError
from modemap._progress import ProgressClock, format_duration
from modemap.app.cli_data import (
    add_data_options,
    add_reading_options,
    csv_format,
    guess_time,
    load_dataset,
    share,
    whole,
)
from modemap.data.dataset import Dataset
from modemap.data.intake import parse_header, peek_columns, read_data, summarize

__all__ = ["main"]

EXIT_USER_ERROR = 2
EXIT_INTERRUPTED = 130


# --------------------------------------------------------------------------- check


def _add_check(subparsers: argparse._SubParsersAction) -> None:
    parser = subparsers.add_parser(
        "check",
        epilog=_examples("""modemap check datasets/buck.csv --time t --run run
  modemap check day1.csv day2.csv --json"""),
        formatter_class=_Help,
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
    """Readable text for a :func:`modemap.data.intake.summarize` dictionary."""
    time = summary["time"]
    unit = f" {time['unit']}" if time["unit"] else ""
    label = f" [{time['unit']}]" if time["unit"] else ""
    lines = [
        f"source    {summary['source']} ({summary['rows']} rows)",
        f"time      {time['name']}{label}, step {summary['step']:.6g}{unit}",
        f"runs      {len(summary['runs'])}, {summary['samples']} samples, "
        f"total duration {summary['duration']:.6g}{unit}",
        f"resampled {'yes' if summary['resampled'] else 'no'}",
        f"missing   {_missing_text(summary.get('missing'))}",
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


def _missing_text(missing: dict | None) -> str:
    """``none (policy refuse)`` or ``3 row(s) dropped (empty cells: x: 2, u: 1)``."""
    from modemap.data.dataset import Missing

    if not missing:
        return "none"
    return str(Missing(missing["policy"], missing.get("values", {}), missing.get("rows", 0)))


def _table(header: list[str], rows: list[list[str]]) -> list[str]:
    widths = [max(len(r[j]) for r in [header, *rows]) for j in range(len(header))]

    def fmt(row: list[str]) -> str:
        cells = [row[0].ljust(widths[0])] + [
            c.rjust(w) for c, w in zip(row[1:], widths[1:], strict=True)
        ]
        return "  " + "  ".join(cells).rstrip()

    return [fmt(header)] + [fmt(r) for r in rows]


# --------------------------------------------------------------------------- fit


def _add_fit(subparsers: argparse._SubParsersAction) -> None:
    parser = subparsers.add_parser(
        "fit",
        epilog=_examples(
            "modemap fit datasets/buck.csv --time t --states i_L,v_C --inputs g --run run "
            "--out out/buck\n  modemap fit log.csv --time t --states level --regimes 2 "
            "--form discrete --out out/level"
        ),
        formatter_class=_Help,
        help="identify a hybrid model; write model.json, labels.csv and report.md",
        description="Find the regimes, their equations and equilibria and the switching guards; "
        "validate by re-simulating held-out runs; write DIR/model.json, DIR/labels.csv and "
        "DIR/report.md (atomically: a failed fit leaves earlier results untouched).",
    )
    add_data_options(parser)
    add_fit_options(parser)
    parser.add_argument("--out", required=True, metavar="DIR", help="output folder")
    parser.add_argument("--view", action="store_true", help="open the dashboard on the result")
    parser.add_argument("--quiet", action="store_true", help="no progress display")
    parser.add_argument(
        "--json",
        action="store_true",
        help="print a machine-readable summary of the fit on stdout (progress stays on stderr)",
    )
    _add_debug(parser)
    parser.set_defaults(handler=_run_fit)


def add_fit_options(parser: argparse.ArgumentParser) -> None:
    """Options of the identification itself (shared by ``fit`` and the dashboard)."""
    group = parser.add_argument_group("identification")
    group.add_argument(
        "--regimes",
        default="auto",
        metavar="auto|K",
        help="number of regimes, or 'auto' to choose it by BIC (default: auto)",
    )
    group.add_argument(
        "--max-regimes",
        type=whole,
        default=6,
        metavar="K",
        help="largest number of regimes 'auto' tries (default: 6)",
    )
    group.add_argument(
        "--form",
        choices=("continuous", "discrete"),
        default="continuous",
        help="fit d(state)/dt (continuous) or state[k+1] (discrete) (default: continuous)",
    )
    group.add_argument(
        "--model",
        choices=("sparse", "affine"),
        default="sparse",
        help="sparse regression on candidate terms, or an affine operator (default: sparse)",
    )
    group.add_argument(
        "--degree",
        type=_degree,
        default="auto",
        metavar="auto|D",
        help="polynomial degree of the candidate terms, or 'auto' to choose it among 1 to "
        "--max-degree with the number of regimes (default: auto)",
    )
    group.add_argument(
        "--max-degree",
        type=whole,
        default=3,
        metavar="D",
        help="highest degree 'auto' considers (default: 3)",
    )
    group.add_argument(
        "--term",
        action="append",
        default=[],
        metavar="EXPR",
        dest="terms",
        help="extra candidate term in the term grammar, e.g. 'C_A*exp(-8750/T)' (repeatable)",
    )
    group.add_argument(
        "--threshold",
        default="auto",
        metavar="auto|X",
        help="sparsity threshold on normalised coefficients (default: auto, by BIC)",
    )
    group.add_argument(
        "--derivative",
        default="auto",
        choices=("auto", "central", "savgol", "spline", "tv"),
        help="derivative estimator in continuous form (default: auto)",
    )
    group.add_argument(
        "--final-fit",
        default="integral",
        choices=("integral", "derivative"),
        help="continuous form: re-choose and re-estimate each regime's terms on the "
        "integral form once the regimes are found (default: integral)",
    )
    group.add_argument(
        "--guards",
        default="auto",
        choices=("auto", "per-source", "memoryless"),
        help="switching-surface family (default: auto, chosen on held-out switch times)",
    )
    group.add_argument(
        "--holdout",
        type=share,
        default=0.25,
        metavar="F",
        help="share of runs (or of the run's tail) kept out for validation (default: 0.25)",
    )
    group.add_argument(
        "--no-refit",
        dest="refit",
        action="store_false",
        help="write the model fitted on the training part (default: after validation, the "
        "model is refitted on all data with the number of regimes and terms chosen)",
    )
    group.add_argument(
        "--min-dwell",
        type=whole,
        default=1,
        metavar="N",
        help="shortest stay in a regime, in samples (default: 1)",
    )
    group.add_argument(
        "--min-regime-samples",
        type=whole,
        default=None,
        metavar="N",
        help="smallest regime kept, in samples (default: 5 per candidate term and at least "
        "20 when the number of regimes is chosen; 2 per term plus 2 and at least 10 when it "
        "is given)",
    )
    group.add_argument("--seed", type=whole, default=0, help="random seed (default: 0)")
    group.add_argument(
        "--engine",
        choices=("local", "dask"),
        default="local",
        help="where per-run work runs: in this process, or on a Dask cluster (default: local)",
    )
    group.add_argument(
        "--scheduler", metavar="ADDRESS",
        help="Dask scheduler address, e.g. tcp://10.0.0.5:8786 (default: a local cluster)",
    )  # fmt: skip


def _regimes(text: str) -> str | int:
    if text == "auto":
        return "auto"
    try:
        k = int(text)
    except ValueError:
        k = 0
    if k < 1:
        raise ModemapError(f"--regimes: expected 'auto' or a positive whole number, got '{text}'")
    return k


def _degree(text: str) -> str | int:
    if text == "auto":
        return "auto"
    try:
        value = int(text)
    except ValueError:
        raise argparse.ArgumentTypeError(
            f"expected 'auto' or a whole number, got {text!r}"
        ) from None
    if value < 0:
        raise argparse.ArgumentTypeError(f"expected 'auto' or a whole number >= 0, got {text}")
    return value


def _threshold(text: str) -> str | float:
    if text == "auto":
        return "auto"
    try:
        value = float(text)
    except ValueError:
        value = float("nan")
    if not (value >= 0 and math.isfinite(value)):
        raise ModemapError(f"--threshold: expected 'auto' or a finite number >= 0, got '{text}'")
    return value


def identifier_from_args(args: argparse.Namespace):
    """A :class:`modemap.identify.HybridIdentifier` configured from the command line."""
    from modemap.identify import HybridIdentifier

    return HybridIdentifier.from_options(
        n_regimes=_regimes(args.regimes),
        max_regimes=args.max_regimes,
        form=args.form,
        model=args.model,
        degree=args.degree,
        max_degree=args.max_degree,
        custom_terms=tuple(args.terms),
        threshold=_threshold(args.threshold),
        derivative=args.derivative,
        final_fit=args.final_fit,
        guard_kind=args.guards,
        holdout=args.holdout,
        refit=args.refit,
        min_dwell=args.min_dwell,
        min_regime_samples=args.min_regime_samples,
        seed=args.seed,
        engine=args.engine,
        scheduler=args.scheduler,
    )


def _run_fit(args: argparse.Namespace) -> int:
    from modemap.report.output import check_output_folder, write_fit_outputs

    check_output_folder(args.out, args.data)  # before the fit, not after it
    if args.view:
        _need_terminal("fit --view")
    ident = identifier_from_args(args)
    ds = load_dataset(args)
    terminal = sys.stderr.isatty()
    with _ProgressLine(enabled=not args.quiet, terminal=terminal) as progress:
        ident.fit(ds, progress=progress)
    ident.model_.metadata["data"] = _data_record(args)
    paths = write_fit_outputs(args.out, ident.model_, ident.labels_, dataset=ds, read=args.data)
    model = ident.model_
    if args.json:
        print(json.dumps(fit_summary(model, paths), indent=2, allow_nan=False))
    else:
        print(
            f"{model.n_regimes} regime(s), {len(model.guards)} guard(s); wrote "
            + ", ".join(str(p) for p in paths)
        )
    if args.view:
        from modemap.app.tui import run_view

        run_view(args.out)
    return 0


def fit_summary(model, paths: Sequence[str | os.PathLike[str]]) -> dict:
    """The ``fit --json`` summary: the model file's own sections (the same figures, built
    by :func:`modemap.model.modelfile.model_to_dict`), the chosen degree and the files."""
    from modemap.model.modelfile import model_to_dict

    d = model_to_dict(model)
    chosen = next((row for row in d["selection"] if row.get("chosen")), {})
    return {
        "n_regimes": model.n_regimes,
        "form": d["form"],
        "states": d["states"],
        "inputs": d["inputs"],
        "degree": chosen.get("degree"),
        "regimes": d["regimes"],
        "guard_kind": d["guard_kind"],
        "guards": d["guards"],
        "selection": d["selection"],
        "validation": d["validation"],
        "files": [str(p) for p in paths],
    }


def _data_record(args: argparse.Namespace) -> dict:
    """How the data were read, so the dashboard can reopen them."""
    return {
        "files": [os.path.abspath(p) for p in args.data],
        "time": args.time,
        "states": args.states,
        "inputs": list(args.inputs),
        "run": args.run,
        "resample": args.resample,
        "max_gap": args.max_gap,
        "min_samples": args.min_samples,
        "missing": args.missing,
        **csv_format(args),
    }


class _ProgressLine:
    """Progress on stderr: a bar redrawn in place on a terminal, else (batch runs, logs) a
    plain line at most every ``every`` seconds.  The share only moves forward, with the time
    elapsed and an estimate of the time left (:class:`modemap._progress.ProgressClock`)."""

    def __init__(self, enabled: bool, terminal: bool = True, every: float = 5.0) -> None:
        self.enabled, self.terminal, self.every = enabled, terminal, every
        self._last = ""
        self._printed = 0.0  # the first line after ``every`` seconds: quick runs stay quiet
        self._clock = ProgressClock()

    def __enter__(self) -> Callable[[float, str], None]:
        return self

    def __call__(self, fraction: float, message: str) -> None:
        if not self.enabled:
            return
        done, elapsed, left = self._clock.update(fraction)
        timing = format_duration(elapsed) + " elapsed"
        if left is not None:
            timing += f", about {format_duration(left)} left"
        if not self.terminal:
            if elapsed - self._printed >= self.every:
                self._printed = elapsed
                sys.stderr.write(f"{100 * done:5.1f} %  {timing}  {message}\n")
                sys.stderr.flush()
            return
        width = 20
        filled = round(width * done)
        line = f"\r[{'#' * filled}{'.' * (width - filled)}] {100 * done:3.0f} %  {timing}  "
        line += message[: max(0, 78 - len(line))]
        sys.stderr.write(line.ljust(len(self._last)))
        sys.stderr.flush()
        self._last = line

    def __exit__(self, *exc: object) -> None:
        if self.enabled and self.terminal and self._last:
            sys.stderr.write("\r" + " " * len(self._last) + "\r")
            sys.stderr.flush()


# --------------------------------------------------------------------------- simulate


def _add_simulate(subparsers: argparse._SubParsersAction) -> None:
    parser = subparsers.add_parser(
        "simulate",
        epilog=_examples(
            "modemap simulate out/buck/model.json datasets/buck.csv --time t --run run "
            "--out sim.csv\n  modemap simulate model.json inputs.csv --time t "
            "--initial i_L=0,v_C=0 --regime 0 --out sim.csv"
        ),
        formatter_class=_Help,
        help="re-run a saved model from a given state with inputs from a file; write a CSV",
        description="Simulate a saved hybrid model over the time grid of DATA, with the model's "
        "inputs read from DATA. The initial state comes from DATA's first row (when it has the "
        "state columns) or from --initial.",
    )
    parser.add_argument("model", metavar="MODEL", help="model.json written by 'modemap fit'")
    parser.add_argument("data", metavar="DATA", help="CSV or Parquet file with time and inputs")
    parser.add_argument("--time", metavar="NAME", help="time column (default: 'time' or 't')")
    parser.add_argument("--run", metavar="NAME", help="run column: simulate each run")
    parser.add_argument(
        "--initial", metavar="A=1,B=2", help="initial state (default: DATA's first row)"
    )
    parser.add_argument(
        "--regime", type=whole, metavar="ID", help="initial regime (default: classify)"
    )
    parser.add_argument("--out", required=True, metavar="FILE", help="output CSV")
    add_reading_options(parser)
    parser.add_argument(
        "--partial",
        action="store_true",
        help="when a run stops early (blow-up, chattering, budget), still write the CSV "
        "(NaN states and regime -1 after the stop) instead of refusing with exit code 2",
    )
    _add_debug(parser)
    parser.set_defaults(handler=_run_simulate)


def _parse_initial(text: str, states: list[str]) -> dict[str, float]:
    values: dict[str, float] = {}
    for part in text.split(","):
        name, sep, value = part.partition("=")
        name = name.strip()
        if not sep or name not in states:
            raise ModemapError(
                f"--initial: expected NAME=VALUE pairs for the states {', '.join(states)}, "
                f"got '{part}'"
            )
        try:
            values[name] = float(value)
        except ValueError:
            raise ModemapError(f"--initial: '{value}' is not a number (state '{name}')") from None
    missing = [s for s in states if s not in values]
    if missing:
        raise ModemapError(f"--initial: no value for state(s) {', '.join(missing)}")
    return values


def _run_simulate(args: argparse.Namespace) -> int:
    import numpy as np
    import pandas as pd

    from modemap._atomic import atomic_write
    from modemap.data.stamps import format_stamps, stamps_at
    from modemap.model.modelfile import load_model
    from modemap.report.output import recover_output_folder

    recover_output_folder(os.path.dirname(os.path.abspath(args.model)))  # a write cut short
    model = load_model(args.model)
    ids = [r.id for r in model.regimes]
    if args.regime is not None and args.regime not in ids:
        raise ModemapError(
            f"--regime {args.regime}: {args.model} has no such regime "
            f"(its regimes: {', '.join(map(str, ids))})"
        )
    peeked = peek_columns(args.data, **csv_format(args))
    columns = [h for h, _ in peeked]
    bare = {parse_header(h)[0] for h in columns}
    has_states = all(s in bare for s in model.states)
    if args.initial is None and not has_states:
        raise ModemapError(
            f"{args.data}: no columns for the states {', '.join(model.states)}; "
            "give the initial state with --initial"
        )
    time = args.time or guess_time(peeked, str(args.data))
    ds = _read_grid(args.data, time, model, has_states, args)
    initial = _parse_initial(args.initial, model.states) if args.initial else None
    frames, stopped = [], []
    for r in ds.runs:
        x0 = np.array([initial[s] for s in model.states]) if initial is not None else r.states[0]
        result = _simulate_run(args, model, r, x0)
        if result.status != 0:
            if not args.partial:
                raise ModemapError(
                    f"{args.model}: run '{r.name}': {result.message}; nothing written "
                    f"(--partial writes the samples up to the stop)"
                )
            stopped.append(f"modemap: warning: run '{r.name}': {result.message}")
        frame = {"run": r.origin, model.time_name: result.time}
        stamps = stamps_at(r, result.time)
        if stamps is not None:  # the input's date-time stamps beside the numeric time
            frame["stamp"] = format_stamps(stamps, ds.stamp_zone)
        frame.update({s: result.states[:, j] for j, s in enumerate(model.states)})
        frame["regime"] = result.regimes
        frames.append(pd.DataFrame(frame))
    table = pd.concat(frames, ignore_index=True)
    with atomic_write(args.out) as fh:
        table.to_csv(fh, index=False, float_format="%.10g")
    for line in stopped:
        print(line, file=sys.stderr)
    early = f" ({len(stopped)} stopped early: NaN states after the stop)" if stopped else ""
    print(f"simulated {len(ds.runs)} run(s){early}, {len(table)} samples; wrote {args.out}")
    return 0


def _simulate_run(args: argparse.Namespace, model, run, x0):
    """One run through the simulator; a request it refuses names the data file and run."""
    from modemap._exceptions import SimulationError
    from modemap.simulation.simulator import simulate

    try:
        return simulate(model, run.time, x0, run.inputs if model.inputs else None, args.regime)
    except SimulationError as exc:
        raise SimulationError(f"{args.data}: run '{run.name}': {exc}") from None


def _read_grid(path: str, time: str, model, has_states: bool, args) -> Dataset:
    """Time grid, inputs (and states when present) of the file to simulate over."""
    run, missing = args.run, args.missing
    if has_states:
        return read_data(
            path, time=time, states=list(model.states), inputs=list(model.inputs), run=run,
            missing=missing, **csv_format(args),
        )  # fmt: skip
    # Only a time grid and inputs: validate them through intake with a placeholder state.
    from modemap.data.tables import CsvFormat, read_table

    frame = read_table(path, CsvFormat(**csv_format(args)))
    frame["__initial__"] = 0.0
    try:
        return read_data(
            frame, time=time, states=["__initial__"], inputs=list(model.inputs), run=run,
            missing=missing,
        )  # fmt: skip
    except DataError as exc:
        raise DataError(exc.message, source=path, column=exc.column) from None


# --------------------------------------------------------------------------- view


def _add_view(subparsers: argparse._SubParsersAction) -> None:
    parser = subparsers.add_parser(
        "view",
        epilog=_examples("""modemap view out/buck
  modemap view datasets/buck.csv --time t --states i_L,v_C --inputs g --run run"""),
        formatter_class=_Help,
        help="open the terminal dashboard on a fit result folder or on a data file",
        description="Open the dashboard on DIR (written by 'modemap fit'), or on data files "
        "(with the column options) to fit from inside the dashboard.",
    )
    add_data_options(
        parser,
        metavar="DIR|DATA",
        help="a folder written by 'modemap fit', or CSV/Parquet file(s)",
        title="columns (when opening data)",
    )
    parser.add_argument(
        "--out", metavar="DIR", help="where a model fitted from inside is saved (with data)"
    )
    _add_debug(parser)
    parser.set_defaults(handler=_run_view)


def _need_terminal(command: str) -> None:
    """Refuse a full-screen command when stdin or stdout is not a terminal (a pipe, a file,
    a batch job): the dashboard would wait for keys that never come."""
    closed = [name for name, f in (("stdin", sys.stdin), ("stdout", sys.stdout)) if not _tty(f)]
    if closed:
        raise ModemapError(
            f"{command}: the dashboard needs a terminal, but {' and '.join(closed)} "
            f"{'is' if len(closed) == 1 else 'are'} not one; run it in a terminal "
            f"('modemap check', 'fit' and 'simulate' work in scripts)"
        )


def _tty(stream) -> bool:
    try:
        return stream is not None and stream.isatty()
    except (AttributeError, ValueError):  # replaced or closed streams
        return False


def _run_view(args: argparse.Namespace) -> int:
    _need_terminal("view")
    from modemap.app.tui import run_view, run_view_data
    from modemap.report.output import recover_output_folder

    if len(args.data) == 1 and os.path.isdir(args.data[0]):
        recover_output_folder(args.data[0])  # finish or undo a write a kill cut short
        run_view(args.data[0])
        return 0
    missing = [p for p in args.data if not os.path.exists(p)]
    if missing:
        raise ModemapError(
            f"{missing[0]}: not found (give a folder written by 'modemap fit' or data files)"
        )
    run_view_data(load_dataset(args), out=args.out, read_record=_data_record(args))
    return 0


# --------------------------------------------------------------------------- bench


def _add_bench(subparsers: argparse._SubParsersAction) -> None:
    from modemap.app import bench

    parser = subparsers.add_parser(
        "bench",
        epilog=_examples("""modemap bench --sizes 1e5,1e6
  modemap bench --sizes 1e5 --json bench.json"""),
        formatter_class=_Help,
        help="measure time and memory of each stage on invented data of growing size",
        description="Benchmark: per-stage wall time and peak memory against a floor measured in "
        "the same run (read, term matrix, one normal-equation pass).",
    )
    bench.add_arguments(parser)
    _add_debug(parser)
    parser.set_defaults(handler=bench.run)


# --------------------------------------------------------------------------- main

_COMMANDS: tuple[Callable[[argparse._SubParsersAction], None], ...] = (
    _add_check,
    _add_fit,
    _add_simulate,
    _add_view,
    _add_bench,
)


def _add_debug(parser: argparse.ArgumentParser) -> None:
    # Accepted after the sub-command too; SUPPRESS keeps a flag given before it.
    parser.add_argument(
        "--debug", action="store_true", default=argparse.SUPPRESS, help=argparse.SUPPRESS
    )


def _examples(text: str) -> str:
    return "examples:\n  " + text


class _Help(argparse.HelpFormatter):
    """Descriptions wrapped as usual; the examples epilog kept line by line."""

    def _fill_text(self, text: str, width: int, indent: str) -> str:
        if text.startswith("examples:"):
            return "".join(indent + line + "\n" for line in text.splitlines())
        return super()._fill_text(text, width, indent)


class _Parser(argparse.ArgumentParser):
    """argparse with one-line errors: the message, a suggestion for a mistyped option, and
    where the usage is (``--help``); exit code 2 as argparse's."""

    def error(self, message: str) -> NoReturn:
        text = " ".join(message.split())
        self.exit(2, f"modemap: error: {text} (see '{self.prog} --help')\n")

    def parse_args(self, args=None, namespace=None):  # type: ignore[override]
        parsed, extra = self.parse_known_args(args, namespace)
        if extra:
            sub = self._command_parser(getattr(parsed, "command", None)) or self
            unknown = next((a for a in extra if a.startswith("-")), extra[0])
            hint = _suggestion(unknown, sub)
            sub.error(
                f"unrecognized argument {unknown}" + (f"; did you mean {hint}?" if hint else "")
            )
        return parsed

    def _command_parser(self, command: str | None) -> argparse.ArgumentParser | None:
        for action in self._actions:
            if isinstance(action, argparse._SubParsersAction) and command in action.choices:
                return action.choices[command]
        return None


def _suggestion(word: str, parser: argparse.ArgumentParser) -> str | None:
    """The closest option string of ``parser`` to ``word`` (a typo such as ``--sates``)."""
    import difflib

    options = [o for a in parser._actions for o in a.option_strings if o.startswith("--")]
    close = difflib.get_close_matches(word.split("=", 1)[0], options, n=1, cutoff=0.6)
    return close[0] if close else None


def build_parser() -> argparse.ArgumentParser:
    """The argument parser with every sub-command registered."""
    parser = _Parser(
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


#: Estimator parameters and the command-line options that set them.
_OPTION_OF_PARAMETER = {
    "n_regimes": "--regimes",
    "max_regimes": "--max-regimes",
    "min_samples": "--min-regime-samples",
    "min_dwell": "--min-dwell",
    "seed": "--seed",
    "degree": "--degree",
    "max_degree": "--max-degree",
    "threshold": "--threshold",
    "kind": "--guards",
    "holdout": "--holdout",
    "delimiter": "--delimiter",
    "decimal": "--decimal",
    "missing": "--missing",
}


def _one_line(exc: BaseException) -> str:
    flag = _OPTION_OF_PARAMETER.get(getattr(exc, "param", None) or "")
    if isinstance(exc, ParameterError) and flag and exc.expected is not None:
        expected = exc.expected.replace(" or None", "")  # None: the option's default
        return f"{flag} must be {expected}, got {exc.value!r}"
    if isinstance(exc, OSError) and exc.filename is not None:
        return f"{exc.filename}: {exc.strerror or exc}"
    return " ".join(str(exc).split()) or type(exc).__name__


if __name__ == "__main__":
    sys.exit(main())
