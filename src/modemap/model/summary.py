"""A plain-text summary of a hybrid model that fits a terminal or a notebook cell.

:meth:`HybridModel.summary` returns it; the Markdown report (:mod:`modemap.report`) is the
long form.  Every line is wrapped to ``width`` columns (80 by default), continuation lines
indented under their first.
"""

from __future__ import annotations

import textwrap
from typing import Any

import numpy as np

from modemap.terms.equations import format_equations

# The functions read a HybridModel (modemap.model.hybrid), which calls them from its
# methods; annotated as Any so that this module does not import it back.
HybridModel = Equilibrium = Any

__all__ = ["model_summary", "regime_equations", "short_repr"]


def _named(model: HybridModel, name: str) -> str:
    unit = model.units.get(name, "")
    return f"{name} [{unit}]" if unit else name


def _num(value: float) -> str:
    return f"{value:.4g}"


def regime_equations(model: HybridModel, regime: Any) -> list[str]:
    """One readable equation per state of ``regime``, each coefficient with its standard
    error, units on the left-hand side (what the report and the summary print)."""
    return format_equations(
        regime.terms,
        np.asarray(regime.coefficients, dtype=float),
        model.states,
        stderr=np.asarray(regime.stderr, dtype=float),
        units=model.units,
        time_unit=model.units.get(model.time_name, ""),
        form=model.form,
        show_stderr=True,
    )


def short_repr(model: HybridModel) -> str:
    """One line: what the model is (``repr`` of :class:`HybridModel`)."""
    inputs = ", ".join(model.inputs) or "none"
    guards = f"; guards: {model.guard_kind}" if model.n_regimes > 1 else ""
    return (
        f"HybridModel({model.n_regimes} regime(s), {model.form} form, states: "
        f"{', '.join(model.states)}; inputs: {inputs}{guards})"
    )


def _guard(guard: Any) -> str:
    text = guard.text or " + ".join(guard.terms)
    if text.startswith("switch"):
        return text
    return f"switch {guard.source} -> {guard.target} when {text}"


def _equilibrium(model: HybridModel, q: Equilibrium) -> str:
    parts = []
    for name in model.states:
        text = f"{name} {_num(q.point[name])}"
        se = (q.stderr or {}).get(name)
        if se is not None and np.isfinite(se):
            text += f" ± {_num(se)}"
        parts.append(text)
    where = "reachable" if q.inside else "virtual" if q.inside is False else "placement unknown"
    return f"{', '.join(parts)}: {q.stability}, {where}"


def _selection(model: HybridModel) -> str | None:
    chosen = next((row for row in model.selection if row.get("chosen")), None)
    if chosen is None:
        return None
    asked = ((model.metadata or {}).get("options") or {}).get("n_regimes", "auto")
    text = (
        f"regimes: {model.n_regimes} ("
        + ("chosen from the data" if asked == "auto" else f"{asked} asked for")
        + f"; {len(model.selection)} candidates compared"
    )
    degree = chosen.get("degree")
    if degree is not None:
        text += ", the terms given" if degree == "terms" else f", polynomial degree {degree}"
    return text + ")"


def model_summary(model: HybridModel, width: int = 80) -> str:
    """The model in a few lines per regime: equations with standard errors, equilibria with
    their stability, guards, and the held-out figures.

    Parameters
    ----------
    model : HybridModel
    width : int, default 80
        Longest line, in characters.

    Returns
    -------
    str
    """
    lines: list[tuple[int, str]] = [(0, short_repr(model))]
    states = ", ".join(_named(model, s) for s in model.states)
    lines.append((2, f"states: {states}"))
    if model.inputs:
        lines.append((2, "inputs: " + ", ".join(_named(model, u) for u in model.inputs)))
    selection = _selection(model)
    if selection:
        lines.append((2, selection))
    share = (model.statistics or {}).get("share") or {}
    for regime in model.regimes:
        head = f"regime {regime.id}: {regime.samples} samples"
        if str(regime.id) in share:
            head += f" ({100 * float(share[str(regime.id)]):.1f} %)"
        lines.append((0, head))
        lines += [(2, eq) for eq in regime_equations(model, regime)]
        if not regime.equilibria:
            lines.append((2, "no equilibrium in or near the data"))
        held = next((q.inputs for q in regime.equilibria if q.inputs), None)
        if held:
            values = ", ".join(f"{k} = {_num(v)}" for k, v in held.items())
            lines.append((2, f"equilibria with the inputs held at {values}:"))
        for q in regime.equilibria:
            lines.append((2, "equilibrium " + _equilibrium(model, q)))
    if model.n_regimes > 1:
        lines.append((0, f"switching ({model.guard_kind}):"))
        lines += [(2, _guard(g)) for g in model.guards]
        if not model.guards:
            lines.append((2, "no switching surface was learnt"))
    summary = (model.validation or {}).get("summary") or {}
    if summary:
        figures = ", ".join(
            f"{k} {_num(v)}" for k, v in summary.items() if isinstance(v, int | float)
        )
        lines.append((0, f"held-out re-simulation: {figures}"))
    out = []
    for indent, text in lines:
        pad = " " * indent
        out += textwrap.wrap(
            text,
            width=width,
            initial_indent=pad,
            subsequent_indent=pad + "    ",
            break_on_hyphens=False,
        ) or [pad]
    return "\n".join(out)
