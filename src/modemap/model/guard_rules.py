"""Reading learnt guards: their values, their text, and the regimes they predict.

A guard ``source -> target`` fires where ``weights @ terms(z) + offset > 0``
(:class:`modemap.model.hybrid.Guard`); :class:`modemap.model.guards.SwitchingSurfaces`
learns them, and this module holds what every later stage needs to use them.
"""

from __future__ import annotations

import math
from collections.abc import Sequence

import numpy as np

from modemap.model.hybrid import Guard
from modemap.terms.expressions import quote_name, variable_of
from modemap.terms.library import TermLibrary

__all__ = ["after_values", "guard_text", "guard_values", "predict_labels", "threshold_of"]


def after_values(
    guard: Guard, variables: list[str], Z: np.ndarray, prev2_ok: np.ndarray
) -> np.ndarray:
    """Guard value "after" each row: the larger of the value at the row and at the
    source trend extrapolated one step, ``2 z[r-1] - z[r-2]`` (where ``prev2_ok``).

    States are continuous, so after a switch the measured sample may already have
    turned back (a thermostat's temperature peaks at the crossing): the
    extrapolation of the source regime shows the crossing.  Inputs jump (a gate),
    and the measured row shows the crossing.  The larger value covers both.
    """
    after = guard_values(guard, variables, Z[1:])
    rows = np.flatnonzero(prev2_ok[1:]) + 1
    if rows.size:
        ext = guard_values(guard, variables, 2.0 * Z[rows - 1] - Z[rows - 2])
        after[rows - 1] = np.maximum(after[rows - 1], ext)
    return np.concatenate([[guard_values(guard, variables, Z[:1])[0]], after])


def guard_values(guard: Guard, variables: Sequence[str], Z: np.ndarray) -> np.ndarray:
    """Values of ``guard`` at the raw variables ``Z (n, n_vars)``; it fires where > 0."""
    lib = TermLibrary.from_terms(guard.terms, list(variables))
    return lib.transform(Z) @ np.asarray(guard.weights, dtype=float) + guard.offset


# -- text --------------------------------------------------------------------------------------
def _decimals(span: float) -> int:
    if not np.isfinite(span) or span <= 0:
        return 3
    return max(0, 2 - math.floor(math.log10(span)))


def threshold_of(guard: Guard, variables: Sequence[str]) -> tuple[str, float, bool] | None:
    """``(variable, threshold, fires_above)`` when ``guard`` compares one of ``variables``
    with a constant (a ``"1"`` term counts as part of the constant), else None."""
    weights = np.asarray(guard.weights, dtype=float)
    offset = float(guard.offset) + float(
        sum(w for w, t in zip(weights, guard.terms, strict=True) if t == "1")
    )
    active = [(w, t) for w, t in zip(weights, guard.terms, strict=True) if t != "1" and w != 0]
    if len(active) != 1 or variable_of(active[0][1]) not in variables:
        return None
    w, term = active[0]
    return str(variable_of(term)), -offset / w, bool(w > 0)


def guard_text(
    guard: Guard, units: dict[str, str] | None = None, spans: dict[str, float] | None = None
) -> str:
    """Readable text of a guard: a threshold for one variable, else a normalised half-plane.

    Terms with a zero weight (dropped as not significant) are not shown.
    """
    spans = spans or {}
    # a dimensionless marker ("-", "1") is not shown after a number
    units = {k: v for k, v in (units or {}).items() if v not in ("-", "1", "")}
    w = np.asarray(guard.weights, dtype=float)
    nz = np.flatnonzero(w != 0)
    head = f"switch {guard.source} -> {guard.target} when "
    if nz.size == 0:
        return head + ("always" if guard.offset > 0 else "never")
    one = threshold_of(guard, list(spans))
    if one is not None:
        name, thr, above = one
        op = ">" if above else "<"
        unit = f" {units[name]}" if units.get(name) else ""
        digits = _decimals(spans[name])
        return head + f"{quote_name(name)} {op} {round(thr, digits) + 0.0:.{digits}f}{unit}"
    nrm = float(np.linalg.norm(w))
    parts = []
    for i in nz:
        c = w[i] / nrm
        t = guard.terms[i]
        unit = units.get(variable_of(t) or "")
        label = f"{t}[{unit}]" if unit else t
        sign = "-" if c < 0 else "+"
        parts.append(f"{sign} {abs(c):.3g} {label}")
    lhs = " ".join(parts)
    lhs = lhs[2:] if lhs.startswith("+ ") else "-" + lhs[2:]
    return head + f"{lhs} > {-guard.offset / nrm:.4g}"


# -- label prediction --------------------------------------------------------------------------
def predict_labels(
    guards: Sequence[Guard], variables: Sequence[str], Z: np.ndarray, start: int
) -> np.ndarray:
    """Re-predict a label sequence by evaluating guards on measured variables.

    Starting from ``start``, the regime switches at the first sample where a
    guard of the current regime fires; a guard's value at sample ``m`` is its
    "after" value (the larger of the value at ``z[m]`` and at the source trend
    ``2 z[m-1] - z[m-2]``, see :func:`after_values`).

    Parameters
    ----------
    guards : sequence of Guard
    variables : sequence of str
    Z : ndarray of shape (n, n_vars)
        Measured variables of one run (or stretch).
    start : int
        Regime at the first sample.

    Returns
    -------
    ndarray of shape (n,) of int
    """
    n = Z.shape[0]
    out = np.full(n, start, dtype=np.int64)
    if not guards or n < 2:
        return out
    ok2 = np.arange(n) >= 2
    G = np.column_stack([after_values(g, list(variables), Z, ok2) for g in guards])
    nxt: dict[int, np.ndarray] = {}
    for src in {g.source for g in guards} | {start}:
        cols = [i for i, g in enumerate(guards) if g.source == src]
        nx = np.full(n, src, dtype=np.int64)
        if cols:
            sub = G[:, cols]
            fire = sub.max(axis=1) > 0
            tg = np.array([guards[i].target for i in cols])[np.argmax(sub, axis=1)]
            nx[fire] = tg[fire]
        nxt[src] = nx
    cur, m = start, 1
    while m < n:
        nx = nxt.get(cur)
        if nx is None:
            break
        hits = np.flatnonzero(nx[m:] != cur)
        if hits.size == 0:
            break
        m_sw = m + int(hits[0])
        out[m:m_sw] = cur
        cur = int(nx[m_sw])
        out[m_sw:] = cur
        m = m_sw + 1
    return out
