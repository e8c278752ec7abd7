"""Rich renderables for the text panels: regimes, switching, validation, comparison.

They only lay out what :class:`~modemap.model.hybrid.HybridModel` already holds
(statistics, validation, selection, guard texts); the equation text comes from
the formatter the app was given (the library's ``equations.format_equations``).
"""

from __future__ import annotations

from collections.abc import Callable, Sequence
from typing import Any

import numpy as np
from rich import box
from rich.console import Group, RenderableType
from rich.table import Table
from rich.text import Text

from modemap.app.tui.widgets.palette import (
    EQUILIBRIUM_LEGEND,
    equilibrium_mark,
    regime_color,
    regime_glyph,
)
from modemap.model.hybrid import Equilibrium, Guard, HybridModel, RegimeModel

__all__ = [
    "comparison_table",
    "hysteresis_notes",
    "plain_equations",
    "regime_details",
    "regime_legend",
    "selected_row",
    "switching_details",
    "validation_details",
]

Formatter = Callable[..., list[str]]


def _num(value: Any, digits: int = 3) -> str:
    if value is None:
        return "–"
    if isinstance(value, dict):  # per-state figures, e.g. {"T": 0.02, "w": 0.1}
        return ", ".join(f"{k} {_num(v, digits)}" for k, v in value.items())
    if isinstance(value, bool):
        return "yes" if value else "no"
    if isinstance(value, int | np.integer):
        return str(int(value))
    if isinstance(value, float | np.floating):
        return "–" if not np.isfinite(value) else f"{float(value):.{digits}g}"
    return str(value)


def _with_unit(value: Any, unit: str) -> str:
    text = _num(value)
    return f"{text} {unit}" if unit and text != "–" else text


def _regime_label(k: int) -> Text:
    return (
        Text(f"[{regime_glyph(k)}]", style=f"bold {regime_color(k)}") if k >= 0 else Text("[any]")
    )


def _coordinate(name: str, value: float, eq: Equilibrium, model: HybridModel) -> str:
    """``name=value ± error unit`` (the error when the model carries one)."""
    unit = model.units.get(name, "")
    error = (eq.stderr or {}).get(name)
    if error is None:
        return f"{name}={_with_unit(value, unit)}"
    spread = _num(error) if np.isfinite(error) else "∞"
    return f"{name}={_num(value)} ± {_with_unit(spread, unit) if spread != '∞' else spread}"


def _equilibrium_line(eq: Equilibrium, model: HybridModel, tunit: str) -> Text:
    point = ", ".join(_coordinate(n, v, eq, model) for n, v in eq.point.items())
    where = "reachable" if eq.inside else "virtual"
    line = Text(f"    {equilibrium_mark(eq.stability, eq.inside)} {point}  ")
    line.append(eq.stability, style="bold")
    line.append(f"  {where}")
    if eq.time_constants:
        line.append("  τ = " + ", ".join(_with_unit(t, tunit) for t in eq.time_constants))
    if eq.period:
        line.append(f"  period {_with_unit(eq.period, tunit)}")
    if eq.note:
        line.append(f"  ({eq.note})", style="italic")
    return line


def _dwell_line(stats: dict, k: int, tunit: str) -> str:
    dwell = stats.get("dwell", {}).get(str(k))
    if not dwell:
        return "    dwell: –"
    parts = [f"{dwell.get('count', '–')} visits"]
    parts += [
        f"{key} {_with_unit(dwell.get(key), tunit)}" for key in ("mean", "median", "min", "max")
    ]
    return "    dwell: " + ", ".join(parts)


def _equations(model: HybridModel, reg: RegimeModel, formatter: Formatter | None) -> list[str]:
    if formatter is None:
        return ["(equation formatter unavailable)"]
    try:
        return list(
            formatter(
                reg.terms,
                np.asarray(reg.coefficients),
                model.states,
                stderr=np.asarray(reg.stderr),
                units=model.units,
                form=model.form,
                time_unit=model.units.get(model.time_name, ""),
            )
        )
    except Exception as exc:  # a formatting problem must not take the dashboard down
        return [f"(equations could not be formatted: {exc})"]


def regime_details(model: HybridModel | None, formatter: Formatter | None) -> RenderableType:
    """Everything known about each regime, one block per regime."""
    if model is None or not model.regimes:
        return Text("No regimes: the model is empty. Press r to fit one.")
    tunit = model.units.get(model.time_name, "")
    stats = model.statistics or {}
    share = stats.get("share", {})
    blocks: list[RenderableType] = []
    for reg in model.regimes:
        head = Text()
        head.append(
            f"[{regime_glyph(reg.id)}] regime {reg.id}", style=f"bold {regime_color(reg.id)}"
        )
        frac = share.get(str(reg.id))
        head.append(f"  {_num(100 * frac, 3)}% of time" if frac is not None else "  share –")
        head.append(f"  {reg.samples} samples")
        lines: list[RenderableType] = [head, Text(_dwell_line(stats, reg.id, tunit))]
        lines.append(Text("  equations:", style="bold"))
        lines += [Text(f"    {eq}") for eq in _equations(model, reg, formatter)]
        lines.append(Text("  equilibria:", style="bold"))
        lines += [_equilibrium_line(eq, model, tunit) for eq in reg.equilibria] or [
            Text("    none found")
        ]
        blocks.append(Group(*lines, Text("")))
    legend = Text(EQUILIBRIUM_LEGEND, style="dim")
    return Group(*blocks, legend)


def _one_variable_threshold(guard: Guard) -> tuple[str, float, bool] | None:
    """``(variable, threshold, fires_above)`` for a guard ``w*x + c > 0``; else None."""
    terms = [t.strip() for t in guard.terms]
    w = np.asarray(guard.weights, dtype=float).reshape(-1)
    live = [(t, wi) for t, wi in zip(terms, w, strict=False) if wi != 0 and t != "1"]
    offset = float(guard.offset) + float(
        sum(wi for t, wi in zip(terms, w, strict=False) if t == "1")
    )
    if len(live) != 1 or any(ch in live[0][0] for ch in "*^("):
        return None
    name, wi = live[0]
    return name, -offset / wi + 0.0, bool(wi > 0)  # + 0.0 turns -0.0 into 0.0


def hysteresis_notes(model: HybridModel) -> list[str]:
    """Plain-language notes where a pair of regimes switches at different places each way."""
    notes = []
    by_pair = {(g.source, g.target): g for g in model.guards}
    for (a, b), g in by_pair.items():
        back = by_pair.get((b, a))
        if back is None or a > b or a < 0:
            continue
        fwd, rev = _one_variable_threshold(g), _one_variable_threshold(back)
        ga, gb = regime_glyph(a), regime_glyph(b)
        if fwd and rev and fwd[0] == rev[0] and fwd[2] != rev[2]:
            width = abs(fwd[1] - rev[1])
            unit = model.units.get(fwd[0], "")
            notes.append(
                f"{ga}→{gb} at {fwd[0]} {'>' if fwd[2] else '<'} {fwd[1]:.4g}, "
                f"{gb}→{ga} at {rev[0]} {'>' if rev[2] else '<'} {rev[1]:.4g}: "
                f"hysteresis band of {width:.4g}{' ' + unit if unit else ''} in {fwd[0]}"
            )
        else:
            notes.append(
                f"{ga}→{gb} and {gb}→{ga} have their own surfaces: "
                "where the switch happens depends on the direction"
            )
    return notes


def _transition_table(model: HybridModel) -> RenderableType:
    counts = (model.statistics or {}).get("transitions")
    k = model.n_regimes
    if not counts or k == 0:
        return Text("No transition counts stored.")
    table = Table(box=box.SIMPLE)
    table.add_column("from\\to")
    for j in range(k):
        table.add_column(_regime_label(j), justify="right")
    for i, row in enumerate(counts[:k]):
        table.add_row(_regime_label(i), *[_num(v) for v in list(row)[:k]])
    return table


def switching_details(model: HybridModel | None) -> RenderableType:
    """Guards as inequalities, the transition counts and hysteresis notes."""
    if model is None or not model.regimes:
        return Text("No model: nothing switches yet.")
    parts: list[RenderableType] = [Text(f"switching surfaces ({model.guard_kind})", style="bold")]
    if model.n_regimes == 1:
        parts.append(Text("  one regime: there is nothing to switch to."))
    for g in model.guards:
        line = Text("  ")
        line.append_text(_regime_label(g.source))
        line.append(" → ")
        line.append_text(_regime_label(g.target))
        line.append(f"  when  {_condition(g.text) or '(no text stored)'}")
        parts.append(line)
    if model.n_regimes > 1 and not model.guards:
        parts.append(Text("  no guards stored"))
    parts += [
        Text(""),
        Text("transitions (row: from, column: to)", style="bold"),
        _transition_table(model),
    ]
    notes = hysteresis_notes(model)
    parts.append(Text("hysteresis", style="bold"))
    parts += [Text("  " + n) for n in notes] or [
        Text("  no pair of regimes switches in both directions")
    ]
    return Group(*parts)


def validation_details(model: HybridModel | None) -> RenderableType:
    """The held-out figures stored in ``model.validation``."""
    val = (model.validation if model is not None else None) or {}
    if not val:
        return Text("No validation figures stored in the model.")
    table = Table(box=box.SIMPLE)
    for col in ("run", "NRMSE", "agree", "switches m/s", "timing", "status"):
        table.add_column(col)
    for r in val.get("runs", []):
        nrmse = ", ".join(f"{k} {_num(v)}" for k, v in (r.get("nrmse") or {}).items())
        sw = f"{_num(r.get('switches_measured'))}/{_num(r.get('switches_simulated'))}"
        table.add_row(
            str(r.get("run", "")),
            nrmse,
            _num(r.get("regime_agreement")),
            sw,
            _num(r.get("switch_timing_error")),
            str(r.get("status", "")),
        )
    summary = Text(
        "summary: " + ", ".join(f"{k} {_num(v)}" for k, v in (val.get("summary") or {}).items())
    )
    head = Text(
        f"tolerance {_num(val.get('tolerance'))}, held out: {val.get('holdout', '–')}", style="dim"
    )
    parts: list[RenderableType] = [
        Text("held-out re-simulation", style="bold"),
        head,
        table,
        summary,
    ]
    one_step = val.get("one_step") or {}
    if one_step:
        steps = Table(box=box.SIMPLE)
        for col in ("regime", "R² one step", "RMSE one step"):
            steps.add_column(col)
        for key, fig in one_step.items():
            r2 = ", ".join(f"{k} {_num(v)}" for k, v in (fig.get("r2") or {}).items())
            rmse = ", ".join(f"{k} {_num(v)}" for k, v in (fig.get("rmse") or {}).items())
            steps.add_row(
                _regime_label(int(key)) if str(key).lstrip("-").isdigit() else str(key), r2, rmse
            )
        parts += [Text(""), Text("one-step prediction per regime", style="bold"), steps]
    return Group(*parts)


def selected_row(model: HybridModel | None) -> dict:
    """The model-selection row marked as chosen (empty when none)."""
    rows = (model.selection if model is not None else None) or []
    chosen = [r for r in rows if r.get("chosen")]
    return chosen[0] if chosen else {}


def _criterion(row: dict) -> Any:
    """The chosen row's criterion (``bic`` in files written before the window likelihood)."""
    return row.get("criterion", row.get("bic"))


def comparison_table(old: HybridModel | None, new: HybridModel) -> Table:
    """Side-by-side figures of the current and the refitted model."""
    table = Table(box=box.SIMPLE)
    table.add_column("")
    table.add_column("current", justify="right")
    table.add_column("refit", justify="right")
    so, sn = selected_row(old), selected_row(new)
    rows: list[tuple[str, Any, Any]] = [
        ("regimes K", old.n_regimes if old else None, new.n_regimes),
        ("library degree", so.get("degree"), sn.get("degree")),
        ("criterion", _criterion(so), _criterion(sn)),
        ("parameters", so.get("n_params"), sn.get("n_params")),
        ("form", old.form if old else None, new.form),
    ]
    sum_o = ((old.validation if old else {}) or {}).get("summary") or {}
    sum_n = (new.validation or {}).get("summary") or {}
    keys: Sequence[str] = list(dict.fromkeys([*sum_o, *sum_n]))
    rows += [(f"validation {k}", sum_o.get(k), sum_n.get(k)) for k in keys]
    for name, a, b in rows:
        table.add_row(name, _num(a), _num(b))
    return table


def regime_legend(ids: Sequence[int]) -> Text:
    """``A=0 B=1 ...`` with the regime colours."""
    text = Text()
    for k in ids:
        text.append(f"{regime_glyph(k)}", style=f"bold {regime_color(k)}")
        text.append(f"={k} ")
    return text


def plain_equations(
    terms: Sequence[str],
    coef: np.ndarray,
    state_names: Sequence[str],
    *,
    stderr: np.ndarray | None = None,
    units: dict | None = None,
    form: str = "continuous",
    time_unit: str = "",
) -> list[str]:
    """Stand-in for ``equations.format_equations``: coefficient ± standard error per term."""
    coef = np.asarray(coef, dtype=float)
    err = np.zeros_like(coef) if stderr is None else np.asarray(stderr, dtype=float)
    out = []
    for j, name in enumerate(state_names):
        lhs = f"d{name}/dt" if form == "continuous" else f"{name}[k+1]"
        parts = [
            f"({coef[i, j]:.4g} ± {err[i, j]:.2g})" + ("" if t == "1" else f"·{t}")
            for i, t in enumerate(terms)
            if coef[i, j] != 0
        ]
        out.append(f"{lhs} = " + (" + ".join(parts) or "0"))
    return out


def _condition(text: str) -> str:
    """The condition part of a guard text (``"switch 0 -> 1 when T > 60"`` -> ``"T > 60"``)."""
    head, sep, rest = text.partition(" when ")
    return rest if sep and head.startswith("switch ") else text
