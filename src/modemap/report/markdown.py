"""A Markdown report of a fitted hybrid model, for readers who will not open the code.

:func:`render_report` reads only the :class:`~modemap.model.hybrid.HybridModel` (and,
optionally, the data summary of :func:`modemap.data.intake.summarize`), so a report
can be rebuilt from a model file.  The text is deterministic: the same model
gives the same bytes (no clock, no random numbers).  Sections that have nothing
to show (one regime: no switching; no held-out data: no validation) say so in a
sentence instead of disappearing silently.
"""

from __future__ import annotations

import math
from collections.abc import Iterable, Sequence
from typing import Any

import numpy as np

from modemap.model.guard_rules import threshold_of
from modemap.model.hybrid import Equilibrium, Guard, HybridModel, RegimeModel
from modemap.model.summary import regime_equations
from modemap.terms.expressions import quote_name, variable_of

__all__ = ["CAUTION", "render_report"]

CAUTION = (
    "**Caution.** This is an identified model: a fit to logged data, valid at best in the "
    "range the data cover. It is not a safety analysis. Do not use a fitted model to run or "
    "protect equipment without independent verification, and defer to local codes, "
    "standards and licensed engineering practice."
)

_FORM_TEXT = {
    "continuous": "continuous time: each equation gives the rate of change d state/dt",
    "discrete": "discrete time: each equation gives the next sample state[k+1]",
}
_KIND_TEXT = {
    "per-source": (
        "per-source: each regime has its own switching surfaces, so the way back from a "
        "regime can lie elsewhere than the way in (hysteresis can be represented)"
    ),
    "memoryless": (
        "memoryless: the regime is predicted from where the system is, whatever regime it "
        "was in before (no hysteresis can be represented)"
    ),
}


#: Metadata the switching section shows, not repeated in the run details.
_SHOWN_IN_SWITCHING = ("guard_evidence", "guard_significance", "guard_stderr")


def render_report(model: HybridModel, *, dataset_summary: dict | None = None) -> str:
    """Render a readable Markdown report of a hybrid model.

    Parameters
    ----------
    model : HybridModel
    dataset_summary : dict, optional
        The summary of the training data as returned by
        :func:`modemap.data.intake.summarize` (keys ``source``, ``rows``, ``runs``,
        ``ranges``...); unknown keys are listed as they are.

    Returns
    -------
    str
        Markdown text ending with a newline.
    """
    parts = [
        _title(model),
        CAUTION,
        _data_section(dataset_summary) if dataset_summary else "",
        _overview(model),
        _selection_section(model),
        *(_regime_section(model, r) for r in model.regimes),
        _switching_section(model),
        _validation_section(model),
        _derivative_section(model),
        _metadata_section(model),
    ]
    return "\n\n".join(p.strip("\n") for p in parts if p) + "\n"


# --------------------------------------------------------------------------- formatting


def _num(value: Any, digits: int = 4) -> str:
    """Compact text for a number; '–' for missing or not-a-number."""
    if value is None:
        return "–"
    if isinstance(value, bool | np.bool_):
        return "yes" if value else "no"
    if isinstance(value, int | np.integer):
        return str(int(value))
    if isinstance(value, float | np.floating):
        x = float(value)
        if math.isnan(x):
            return "–"
        if math.isinf(x):
            return "∞" if x > 0 else "-∞"
        return f"{x:.{digits}g}" if x != 0 else "0"
    return _cell(value)


def _cell(value: Any) -> str:
    """Any value as one Markdown table cell (pipes escaped, one line)."""
    if isinstance(value, float | int | np.number) or value is None:
        return _num(value)
    if isinstance(value, dict):
        return ", ".join(f"{k}: {_cell(v)}" for k, v in value.items())
    if isinstance(value, list | tuple):
        return ", ".join(_cell(v) for v in value)
    return str(value).replace("|", "\\|").replace("\n", " ")


def _table(header: Sequence[str], rows: Iterable[Sequence[Any]]) -> str:
    lines = ["| " + " | ".join(_cell(h) for h in header) + " |"]
    lines.append("|" + "|".join("---" for _ in header) + "|")
    lines += ["| " + " | ".join(_cell(c) for c in row) + " |" for row in rows]
    return "\n".join(lines)


def _unit(model: HybridModel, name: str) -> str:
    unit = model.units.get(name, "")
    return f" {unit}" if unit else ""


def _with_unit(model: HybridModel, name: str) -> str:
    unit = model.units.get(name, "")
    return f"{name} [{unit}]" if unit else name


def _bracket(unit: str) -> str:
    return f" [{unit.strip()}]" if unit else ""


def _pct(value: Any) -> str:
    if value is None or (isinstance(value, float) and math.isnan(value)):
        return "–"
    return f"{100.0 * float(value):.1f} %"


# --------------------------------------------------------------------------- sections


def _title(model: HybridModel) -> str:
    k = model.n_regimes
    inputs = f", driven by {', '.join(model.inputs)}" if model.inputs else ""
    return (
        f"# Hybrid model report\n\n"
        f"A model of {', '.join(model.states)}{inputs} with {k} regime{'s' if k != 1 else ''} "
        f"({model.form} form)."
    )


def _data_section(summary: dict[str, Any]) -> str:
    out = ["## Training data"]
    known = ("source", "rows", "samples", "duration", "step", "resampled")
    time = summary.get("time")
    unit = (time.get("unit") or "") if isinstance(time, dict) else ""
    timed = ("duration", "step")
    rows = [
        (key.capitalize() + (f" [{unit}]" if key in timed and unit else ""), summary[key])
        for key in known
        if key in summary
    ]
    if isinstance(time, dict):
        rows.append(("Time column", f"{time.get('name', '')} [{time.get('unit') or '–'}]"))
    rows += [
        (str(k), v)
        for k, v in summary.items()
        if k not in (*known, "time", "runs", "ranges", "gaps", "warnings", "states", "inputs")
        and k != "missing"
    ]
    rows += _missing_rows(summary.get("missing"))
    out.append(_table(["Item", "Value"], rows))
    runs = summary.get("runs") or []
    if runs:
        cols = ["name", "samples", "start", "end", "duration", "step"]
        header = ["Run", "samples", *(f"{c}{_bracket(unit)}" for c in cols[2:])]
        out.append(_table(header, [[r.get(c) for c in cols] for r in runs]))
    ranges = summary.get("ranges") or {}
    if ranges:
        cols = ["role", "unit", "min", "max", "mean"]
        rows = [[name, *(r.get(c) for c in cols)] for name, r in ranges.items()]
        out.append(_table(["Column", *cols], rows))
    for key, title in (("gaps", "Gaps (runs were split there)"), ("warnings", "Warnings")):
        items = summary.get(key) or []
        if items:
            out.append(f"{title}:\n\n" + "\n".join(f"- {_cell(i)}" for i in items))
    return "\n\n".join(out)


def _missing_rows(missing: Any) -> list[tuple[str, Any]]:
    """Rows of the training-data table on empty cells: the policy, then the counts."""
    if not isinstance(missing, dict):
        return []
    policy = missing.get("policy", "refuse")
    rows: list[tuple[str, Any]] = [("Missing values", policy)]
    if missing.get("rows"):
        what = "Rows dropped" if policy == "drop" else "Rows with interpolated values"
        rows.append((what, missing["rows"]))
        counts = ", ".join(f"{k}: {v}" for k, v in (missing.get("values") or {}).items())
        rows.append(("Empty cells per column", counts))
    return rows


def _overview(model: HybridModel) -> str:
    step = model.step
    step_text = "unknown" if math.isnan(step) else f"{_num(step)}{_unit(model, model.time_name)}"
    rows = [
        ("Form", _FORM_TEXT.get(model.form, model.form)),
        ("States", [_with_unit(model, s) for s in model.states]),
        ("Inputs", [_with_unit(model, u) for u in model.inputs] or "none"),
        ("Time", f"{_with_unit(model, model.time_name)}, sampling step {step_text}"),
        ("Regimes", model.n_regimes),
    ]
    for name, (lo, hi) in model.data_range.items():
        rows.append((f"Range of {name}", f"{_num(lo)} to {_num(hi)}{_unit(model, name)}"))
    return "## Overview\n\n" + _table(["Item", "Value"], rows)


def _selection_section(model: HybridModel) -> str:
    out = ["## How many regimes, and why"]
    table = model.selection
    if not table:
        out.append(
            f"No model-selection table was recorded; the model has {model.n_regimes} "
            "regime(s) as fitted."
        )
        return "\n\n".join(out)
    options = (model.metadata or {}).get("options") or {}
    asked = options.get("n_regimes", "auto")
    chosen = next((row for row in table if row.get("chosen")), None)
    text = (
        "Number of regimes asked for: "
        + ("chosen from the data" if asked == "auto" else f"{_num(asked)}")
        + "."
    )
    if "criterion" in table[0]:
        text += (
            " Each candidate (a number of regimes K and a library of candidate terms: "
            "polynomial degree, or the terms given) was scored on the same targets by the "
            "marginal log-likelihood of a Markov-switching model; the criterion is BIC on "
            "the effective number of windows (the log-likelihood divided by the residuals' "
            "autocorrelation time). Lower is better."
        )
    if chosen is not None:
        text += f" Chosen: K = {_num(chosen.get('K'))}"
        if "degree" in chosen:
            degree = chosen.get("degree")
            text += (
                ", the terms given"
                if degree == "terms"
                else f", polynomial terms up to degree {_num(degree)}"
            )
        text += f"; the model has {model.n_regimes} regime(s)."
    collapsed = sorted({row.get("K") for row in table if row.get("collapsed")})
    if collapsed:
        text += (
            " Candidates marked collapsed kept fewer distinct regimes than asked for (K = "
            + ", ".join(_num(k) for k in collapsed)
            + "; a regime lost while refining, or two regimes whose equations a Wald test "
            "cannot tell apart) and were not eligible."
        )
    out.append(text)
    header = list(dict.fromkeys(key for row in table for key in row))
    out.append(_table(header, [[row.get(k) for k in header] for row in table]))
    chain = _chain_text(model)
    if chain:
        out.append(chain)
    return "\n\n".join(out)


def _chain_text(model: HybridModel) -> str:
    """The Markov chain of the regimes: transition probabilities per sample and expected
    durations, with standard errors (``statistics`` of the model file)."""
    stats = model.statistics or {}
    matrix = stats.get("transition_matrix")
    if not matrix or len(matrix) < 2:
        return ""
    se = stats.get("transition_stderr") or [[None] * len(matrix)] * len(matrix)
    ids = [str(r.id) for r in model.regimes][: len(matrix)]

    def cell(p: Any, e: Any) -> str:
        return _num(p) + (f" ± {_num(e)}" if e is not None else "")

    rows = [
        [f"from {i}", *(cell(p, e) for p, e in zip(row, err, strict=False))]
        for i, row, err in zip(ids, matrix, se, strict=False)
    ]
    unit = _unit(model, model.time_name)
    durations = stats.get("expected_duration") or {}
    dse = stats.get("expected_duration_stderr") or {}
    parts = [
        f"regime {i}: {cell(durations.get(i), dse.get(i))}{unit}"
        for i in ids
        if durations.get(i) is not None
    ]
    text = (
        "Regime chain: probability of each switch from one sample to the next (± standard "
        "error, from the switch counts):\n\n" + _table(["", *(f"to {i}" for i in ids)], rows)
    )
    if parts:
        text += "\n\nExpected time in a regime once entered: " + "; ".join(parts) + "."
    return text


def _regime_section(model: HybridModel, regime: RegimeModel) -> str:
    rid = str(regime.id)
    stats = model.statistics or {}
    share = (stats.get("share") or {}).get(rid)
    out = [f"## Regime {rid}"]
    facts = [
        f"- Samples: {regime.samples}"
        + (f" ({_pct(share)} of the labelled samples)" if share is not None else "")
    ]
    dwell = (stats.get("dwell") or {}).get(rid)
    if dwell:
        facts.append("- " + _dwell_text(model, dwell))
    out.append("\n".join(facts))
    out.append("### Equations\n\n" + _equations_block(model, regime))
    out.append(_equilibria_text(model, regime.equilibria))
    return "\n\n".join(out)


def _dwell_text(model: HybridModel, dwell: dict[str, Any]) -> str:
    unit = _unit(model, model.time_name)
    count = dwell.get("count", 0)
    text = f"Stays in this regime: {_num(count)} complete"
    if count:
        text += (
            f"; duration mean {_num(dwell.get('mean'))}{unit}, median "
            f"{_num(dwell.get('median'))}{unit}, shortest {_num(dwell.get('min'))}{unit}, "
            f"longest {_num(dwell.get('max'))}{unit}"
        )
    if dwell.get("censored"):
        text += f"; {_num(dwell['censored'])} cut by the start or end of a run"
    if dwell.get("lower_bound"):
        text += " (figures from cut stays only: lower bounds)"
    return text + "."


def _equations_block(model: HybridModel, regime: RegimeModel) -> str:
    lines = _equation_lines(model, regime)
    note = (
        "Each coefficient is shown with its standard error (±); terms are evaluated on raw, "
        "unscaled values."
    )
    noise = np.sqrt(np.clip(np.diag(np.asarray(regime.noise_cov, dtype=float)), 0, None))
    time_unit = model.units.get(model.time_name, "")
    parts = []
    for name, value in zip(model.states, noise, strict=True):
        unit = model.units.get(name, "")
        if model.form == "continuous":  # a residual of the rate of change
            unit = f"{unit or '1'}/{time_unit}" if time_unit else unit
        parts.append(f"{name} {_num(value)}{' ' + unit if unit else ''}")
    what = (
        "of the rates of change d state/dt"
        if model.form == "continuous"
        else "of the next samples state[k+1]"
    )
    return (
        f"```\n{chr(10).join(lines)}\n```\n\n{note} Residual standard deviation {what}: "
        f"{', '.join(parts)}."
    )


def _equation_lines(model: HybridModel, regime: RegimeModel) -> list[str]:
    return regime_equations(model, regime)


def _equilibria_text(model: HybridModel, equilibria: list[Equilibrium]) -> str:
    title = "### Equilibria"
    if not equilibria:
        return f"{title}\n\nNo equilibrium was found in or near the range of the data."
    unit = _unit(model, model.time_name)
    header = [
        *model.states,
        "stability",
        "eigenvalues",
        f"time constants{_bracket(unit)}",
        f"period{_bracket(unit)}",
        "where",
    ]
    rows = []
    for e in equilibria:
        eig = [_complex(z) for z in np.asarray(e.eigenvalues, dtype=complex)]
        where = "reachable" if e.inside else "virtual"
        rows.append(
            [
                *(_with_error(e.point.get(s), (e.stderr or {}).get(s)) for s in model.states),
                e.stability,
                eig,
                [_num(t) for t in e.time_constants] or "–",
                _num(e.period),
                where + (f" ({e.note})" if e.note else ""),
            ]
        )
    legend = (
        "Reachable: the point lies where this regime is active, so the system can settle "
        "there. Virtual: the system leaves the regime before getting there."
    )
    if any(e.stderr for e in equilibria):
        left_out = (
            "it allows for the serial correlation of the residuals but leaves out the error "
            "of the model's form, so read it as a lower bound where the terms only "
            "approximate the true equations"
            if _integral_final_fit(model)
            else "it leaves out the error of the model's form and the serial correlation of "
            "the residuals, so read it as a lower bound"
        )
        legend += (
            " ± is the standard error of the coordinate from the noise in the fitted "
            f"coefficients (delta method); {left_out}. "
            "Zero: no selected term moves the point (e.g. the origin of a model without a "
            "constant term). Unbounded (∞): the fitted model folds there (a singular "
            "Jacobian)."
        )
    held = _held_inputs(model, equilibria)
    return f"{title}\n\n{held}{_table(header, rows)}\n\n{legend}"


def _held_inputs(model: HybridModel, equilibria: list[Equilibrium]) -> str:
    """The input values the points were computed at (the regime's typical inputs: the level
    a stepped input holds most often, else the median), as a sentence, or ''."""
    held = next((e.inputs for e in equilibria if e.inputs), None)
    if not held:
        return ""
    values = ", ".join(f"{name} = {_num(v)}{_unit(model, name)}" for name, v in held.items())
    return (
        f"Computed with the inputs held at {values} (the level a stepped input holds most "
        "often in this regime, otherwise its median here).\n\n"
    )


def _with_error(value: Any, error: float | None) -> Any:
    """``value ± error`` as text, or the bare value when there is no error."""
    if error is None or value is None:
        return value
    return f"{_num(value)} ± {_num(error) if np.isfinite(error) else '∞'}"


def _complex(z: complex) -> str:
    if z.imag == 0:
        return _num(z.real)
    return f"{_num(z.real)} {'-' if z.imag < 0 else '+'} {_num(abs(z.imag))}i"


def _guard_text(model: HybridModel, g: Guard) -> str:
    if g.text:
        return g.text
    parts = [
        f"{_num(w)}*{t}" if t != "1" else _num(w) for w, t in zip(g.weights, g.terms, strict=True)
    ]
    return " + ".join([*parts, _num(g.offset)]) + " > 0"


def _guard_stderr_text(model: HybridModel, g: Guard, spread: dict) -> str:
    """The standard errors of a guard's printed numbers, in words; "–" when not computed."""
    rec = spread.get(f"{g.source}->{g.target}")
    if not rec:
        return "–"
    se = [float(v) for v in rec.get("stderr", [])]
    nz = [t for t, w in zip(g.terms, g.weights, strict=True) if w != 0]
    sig = ((model.metadata or {}).get("guard_significance") or {}).get(f"{g.source}->{g.target}")
    one = _threshold(model, g)
    if one is not None and len(nz) == 1 and nz[0] in ((sig or {}).get("override") or {}):
        return "– (a two-valued variable: any threshold between its values)"
    if one is not None and len(se) == 1:
        unit = model.units.get(one[0], "")
        unit = f" {unit}" if unit not in ("", "-", "1") else ""
        return f"threshold ± {_num(se[0])}{unit}"
    if len(se) != len(nz) + 1:
        return "–"
    parts = [f"{t} ± {_num(v)}" for t, v in zip(nz, se[:-1], strict=True)]
    return ", ".join([*parts, f"right-hand side ± {_num(se[-1])}"])


def _switching_section(model: HybridModel) -> str:
    out = ["## Switching"]
    if model.n_regimes < 2:
        out.append("One regime only: there is no switching.")
        return "\n\n".join(out)
    out.append("Guard family: " + _KIND_TEXT.get(model.guard_kind, model.guard_kind) + ".")
    why = _family_evidence_text(model)
    if why:
        out.append(why)
    if model.guards:
        spread = (model.metadata or {}).get("guard_stderr") or {}
        rows = [
            [g.source, g.target, _guard_text(model, g), _guard_stderr_text(model, g, spread)]
            for g in model.guards
        ]
        out.append(
            "The switch happens where the condition holds; when several conditions of "
            "the current regime hold at once, the strongest one wins.\n\n"
            + _table(["from", "to", "condition", "standard error"], rows)
        )
        if spread:
            n = max(int(v.get("replicates", 0)) for v in spread.values())
            out.append(
                "Standard errors of the printed numbers (the threshold; or the coefficients "
                "of the unit normal and the right-hand side) come from refitting the guards "
                f"on {n} block-bootstrap resamples of the labelled runs, with each guard's "
                "terms held fixed: they describe how far the surface moves with other data "
                "of the same kind, not the error of the labels or of the sampling step "
                "(a switch is seen at the first sample after it)."
            )
    else:
        out.append("No switching surface was learnt.")
    out += _guard_terms_text(model)
    counts = (model.statistics or {}).get("transitions")
    if counts:
        ids = [r.id for r in model.regimes]
        rows = [[f"from {ids[i] if i < len(ids) else i}", *row] for i, row in enumerate(counts)]
        out.append(
            "Switches seen in the training data (row: from, column: to):\n\n"
            + _table(["", *(f"to {i}" for i in ids[: len(counts)])], rows)
        )
    out += _hysteresis_notes(model)
    return "\n\n".join(out)


def _family_evidence_text(model: HybridModel) -> str:
    """Which evidence chose the guard family (``metadata["guard_evidence"]``, written by
    the fit; absent in model files from before it): one paragraph, or "" ."""
    ev = (model.metadata or {}).get("guard_evidence")
    if not isinstance(ev, dict) or not ev.get("reason"):
        return ""
    reason = str(ev["reason"])
    if ev.get("chosen_by") == "kind":
        return f"The family was set by the guard_kind option. What the data show: {reason}."
    rule = (
        "Hysteresis is concluded only when the cross-validated gain is at least "
        f"{_num(ev.get('margin'))} and significant at the {_num(ev.get('alpha'))} level; "
        "otherwise the guards are memoryless."
    )
    return f"Why this family: {reason}. {rule}"


def _guard_terms_text(model: HybridModel) -> list[str]:
    """The guard terms left out as not significant, and the two-valued terms that force or
    block a switch (``metadata["guard_significance"]``, written by the fit)."""
    sig = (model.metadata or {}).get("guard_significance")
    if not isinstance(sig, dict):
        return []
    dropped, forced = [], []
    for key, record in sig.items():
        if not isinstance(record, dict):
            continue
        pair = str(key).replace("->", " → ")
        if record.get("dropped"):
            names = ", ".join(
                f"{t} (|coef|/se {_num(abs(z), 2)})" if isinstance(z, int | float) else str(t)
                for t, z in record["dropped"].items()
            )
            dropped.append(f"{pair}: {names}")
        if record.get("override"):
            forced.append(
                pair + ": " + ", ".join(f"{t} {v}" for t, v in record["override"].items())
            )
    out = []
    if dropped:
        level = ((model.metadata or {}).get("guard_evidence") or {}).get("alpha")
        at = f" at the {_num(level)} level" if level is not None else ""
        out.append(
            f"Terms left out of the guards because the data do not support them{at} (Wald "
            "ratio |coef|/se, confirmed by a likelihood-ratio test): " + "; ".join(dropped) + "."
        )
    if forced:
        out.append(
            "Switches forced or blocked by one value of a two-valued variable (every sample "
            "at that value switched, or none did; the guard holds it across the data's "
            "range): " + "; ".join(forced) + "."
        )
    return out


def _threshold(model: HybridModel, g: Guard) -> tuple[str, float, bool] | None:
    """(variable, threshold, fires_above) when a guard is one variable against a constant."""
    return threshold_of(g, model.variables)


def _hysteresis_notes(model: HybridModel) -> list[str]:
    if model.guard_kind != "per-source":
        return []
    notes = []
    for g in model.guards:
        back = [h for h in model.guards if h.source == g.target and h.target == g.source]
        if g.source > g.target or not back:
            continue
        a, b = _threshold(model, g), _threshold(model, back[0])
        if a and b and a[0] == b[0] and a[2] != b[2]:
            name, unit = quote_name(a[0]), _unit(model, a[0])
            gap = abs(a[1] - b[1])
            notes.append(
                f"Hysteresis between regimes {g.source} and {g.target}: the switch "
                f"{g.source} → {g.target} happens at {name} {'>' if a[2] else '<'} "
                f"{_num(a[1])}{unit}, the switch back at {name} {'>' if b[2] else '<'} "
                f"{_num(b[1])}{unit}; the band between them is {_num(gap)}{unit} wide."
            )
        else:
            band = _oblique_band(model, g, back[0])
            notes.append(
                f"Regimes {g.source} and {g.target} switch both ways through separate surfaces"
                + (
                    f"; they are nearly parallel, and the band between them is {band} (the "
                    "other variables held)."
                    if band
                    else "; compare the two conditions above to see any hysteresis."
                )
            )
    return notes


def _oblique_band(model: HybridModel, g: Guard, h: Guard) -> str:
    """Width of the band between two linear surfaces that face each other (``g`` fires on
    one side, ``h`` on the other), along each variable they lean on, or ''.

    With ``h``'s weights ``-c`` times ``g``'s, the surfaces are ``w.z = -b_g`` and
    ``w.z = b_h / c``: along variable ``v`` (the others held) they lie
    ``|b_g + b_h / c| / |w_v|`` apart.  Surfaces count as facing each other when the cosine
    of their weights, each variable scaled by its range in the data, is below -0.95."""
    terms = [t for t in g.terms if t != "1"]
    if sorted(terms) != sorted(t for t in h.terms if t != "1") or any(
        variable_of(t) not in model.variables for t in terms
    ):
        return ""

    def linear(guard: Guard) -> tuple[np.ndarray, float]:
        w = dict(zip(guard.terms, np.asarray(guard.weights, dtype=float), strict=True))
        return np.array([w[t] for t in terms]), float(guard.offset) + w.get("1", 0.0)

    wg, bg = linear(g)
    wh, bh = linear(h)
    names = [str(variable_of(t)) for t in terms]
    span = np.array([np.ptp(model.data_range.get(v, (0.0, 1.0))) or 1.0 for v in names])
    sg, sh = wg * span, wh * span
    norm = np.linalg.norm(sg) * np.linalg.norm(sh)
    if norm == 0 or float(sg @ sh) / norm > -0.95:
        return ""
    c = np.linalg.norm(sh) / np.linalg.norm(sg)
    gap = abs(bg + bh / c)
    parts = [
        f"{_num(gap / abs(w))}{_unit(model, v)} wide along {t}"
        for t, v, w in zip(terms, names, wg, strict=True)
        if w != 0
    ]
    return " or ".join(parts)


def _validation_section(model: HybridModel) -> str:
    v = model.validation or {}
    out = ["## Validation on held-out data"]
    if not v:
        out.append("No held-out validation was run for this model.")
        return "\n\n".join(out)
    mode = {"runs": "whole runs", "tails": "the last part of each run"}.get(
        v.get("holdout"), v.get("holdout")
    )
    intro = "The model was re-simulated from the start of held-out data"
    intro += f" ({mode} kept out of the fit)" if mode else ""
    out.append(
        intro + ". NRMSE: root-mean-square error of a simulated state divided by the range of "
        "the measured state over the run. Status 0 means the simulation ran to the end."
    )
    if "tolerance" in v:
        out.append(
            "Horizon: time until the error of some state, as a fraction of its measured range, "
            f"first exceeds the tolerance of {_num(v['tolerance'])}."
        )
    out.append(
        "Switches: each measured switch (a change of the decoded label) is paired with the "
        "nearest simulated switch, each at most once and within half the median time between "
        "measured switches; matched ones are paired, missed ones are measured switches without "
        "a simulated one, spurious ones simulated switches without a measured one. The timing "
        "error averages the matched pairs only: read it with the counts."
    )
    runs = v.get("runs") or []
    if runs:
        unit = _bracket(_unit(model, model.time_name))
        cols = [
            "regime_agreement",
            "switches_measured",
            "switches_simulated",
            "switches_matched",
            "switches_missed",
            "switches_spurious",
            "switch_timing_error",
            "horizon",
            "status",
        ]
        header = [
            "run",
            *(f"NRMSE {s}" for s in model.states),
            "regime agreement",
            "switches measured",
            "switches simulated",
            "matched",
            "missed",
            "spurious",
            f"switch timing error{unit} (matched only)",
            f"horizon{unit}",
            "status",
        ]
        rows = [
            [
                r.get("run"),
                *((r.get("nrmse") or {}).get(s) for s in model.states),
                *(r.get(c) for c in cols[:-1]),
                _status(r),
            ]
            for r in runs
        ]
        out.append(_table(header, rows))
    summary = v.get("summary") or {}
    if summary:
        out.append("Summary:\n\n" + _table(["Figure", "Value"], list(summary.items())))
    one_step = v.get("one_step") or {}
    if one_step:
        header = [
            "regime",
            *(f"R² {s}" for s in model.states),
            *(f"RMSE {s}" for s in model.states),
        ]
        rows = [
            [
                rid,
                *((d.get("r2") or {}).get(s) for s in model.states),
                *((d.get("rmse") or {}).get(s) for s in model.states),
            ]
            for rid, d in one_step.items()
        ]
        out.append(
            "One-step prediction on the held-out samples of each regime:\n\n" + _table(header, rows)
        )
    rest = {
        k: x
        for k, x in v.items()
        if k not in ("tolerance", "holdout", "runs", "summary", "one_step")
    }
    if rest:
        out.append(_table(["Item", "Value"], list(rest.items())))
    return "\n\n".join(out)


def _status(run: dict[str, Any]) -> str:
    status, message = run.get("status"), run.get("message")
    return f"{_num(status)} ({message})" if message else _num(status)


def _derivative_section(model: HybridModel) -> str:
    out = ["## Derivatives"]
    if model.form == "discrete":
        out.append("Not needed: in discrete form each equation predicts the next sample.")
    elif model.derivative:
        method = model.derivative.get("method", "–")
        rest = [
            (k, x) for k, x in model.derivative.items() if k not in ("method", "per_run", "noise")
        ]
        out.append(
            f"The rates of change were estimated from the samples with the method "
            f"'{_cell(method)}'."
        )
        if rest:
            out.append(_table(["Setting", "Value"], rest))
        per_run = model.derivative.get("per_run")
        if isinstance(per_run, list) and per_run:
            keys = sorted({k for r in per_run if isinstance(r, dict) for k in r} - {"auto", "step"})
            rows = [
                [i + 1] + [r.get(k, "–") for k in keys]
                for i, r in enumerate(per_run)
                if isinstance(r, dict)
            ]
            out.append(
                "Per training run, in order (noise: the estimated measurement noise of each state):"
            )
            out.append(_table(["training run", *keys], rows))
    else:
        out.append("The derivative method was not recorded.")
    if _integral_final_fit(model):
        out.append(
            "The rates of change served to find the regimes. Each regime's terms and "
            "coefficients were then chosen and estimated again on the integral of its "
            "equations over short windows inside its stretches, which needs no derivative, "
            "with the measurement noise in the terms compensated (docs/method.md, "
            "integral-form refit)."
        )
    return "\n\n".join(out)


def _integral_final_fit(model: HybridModel) -> bool:
    """Whether the coefficients come from the integral-form final fit (recorded option)."""
    options = (model.metadata or {}).get("options")
    return (
        model.form != "discrete"
        and isinstance(options, dict)
        and options.get("final_fit") == "integral"
    )


def _metadata_section(model: HybridModel) -> str:
    meta = dict(model.metadata or {})
    if not meta:
        return "## Run details\n\nNo metadata recorded."
    rows = []
    for key in ("modemap_version", "seed", "source"):
        if key in meta:
            rows.append((key.replace("_", " "), meta.pop(key)))
    options = meta.pop("options", None)
    notes = meta.pop("notes", None)
    for key in _SHOWN_IN_SWITCHING:
        meta.pop(key, None)
    rows += [(k, x) for k, x in meta.items()]
    out = ["## Run details"] + ([_table(["Item", "Value"], rows)] if rows else [])
    if isinstance(options, dict) and options:
        out.append("Options:\n\n" + _table(["Option", "Value"], list(options.items())))
    if notes:
        out.append("Notes from the fit:\n\n" + "\n".join(f"- {_cell(n)}" for n in notes))
    return "\n\n".join(out)
