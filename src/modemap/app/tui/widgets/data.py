"""Small adapters from library objects to what the plots draw.

Nothing here fits or estimates anything: it aligns the stored regime labels
with the samples of each run, picks what falls inside a view, and evaluates a
guard's terms so that its zero line can be drawn.
"""

from __future__ import annotations

from collections.abc import Callable, Sequence

import numpy as np
import pandas as pd

from modemap.data.dataset import Dataset, Run
from modemap.model.hybrid import Guard

__all__ = [
    "DashboardState",
    "align_certainty",
    "align_labels",
    "band_function",
    "evaluate_guard",
    "level_function",
    "nearest_index",
    "pack_parts",
    "padded_limits",
    "stamp_labeller",
    "stamp_text",
]


def align_labels(dataset: Dataset | None, labels: pd.DataFrame | None) -> list[np.ndarray]:
    """Regime of every sample of every run (``-1`` where the table has none).

    ``labels`` has the columns ``run, time, regime`` (the identifier's
    ``labels_``).  A sample takes the label stored at its own time stamp (the
    nearest stored time within half a sampling step).
    """
    if dataset is None:
        return []
    if labels is None or labels.empty or not {"run", "time", "regime"} <= set(labels.columns):
        return [np.full(r.n_samples, -1, dtype=np.int64) for r in dataset.runs]
    values = labels["regime"].to_numpy(dtype=np.int64)
    return _align(dataset, labels, values, np.int64(-1))


def _align(dataset: Dataset, labels: pd.DataFrame, values: np.ndarray, missing) -> list:
    """``values`` (one per row of ``labels``) on every sample of every run: the value
    stored at the sample's own time stamp (nearest within half a step), else ``missing``."""
    out = [np.full(r.n_samples, missing, dtype=np.asarray(missing).dtype) for r in dataset.runs]
    frame = pd.DataFrame({"run": labels["run"].astype(str), "time": labels["time"], "v": values})
    groups = {k: g for k, g in frame.groupby("run", sort=False)}
    half = 0.5 * dataset.step if np.isfinite(dataset.step) and dataset.step > 0 else np.inf
    for i, run in enumerate(dataset.runs):
        g = groups.get(run.name, groups.get(run.origin))
        if g is None or run.n_samples == 0:
            continue
        g = g[g["time"].notna()].sort_values("time")
        t = g["time"].to_numpy(dtype=float)
        j = nearest_index(t, run.time)
        ok = np.abs(t[j] - run.time) <= half
        out[i][ok] = g["v"].to_numpy()[j[ok]]
    return out


def align_certainty(dataset: Dataset | None, labels: pd.DataFrame | None) -> list[np.ndarray]:
    """Probability of its own regime for every sample of every run (NaN where unknown).

    Read from the ``prob_<id>`` columns of ``labels`` (written by the fit: each row's
    probability of each regime given its whole run) at the stored regime, aligned as
    :func:`align_labels` aligns the regimes; empty when the table has no such columns.
    """
    if dataset is None or labels is None or labels.empty:
        return []
    if not {"run", "time", "regime"} <= set(labels.columns):
        return []
    columns = {c: int(c[5:]) for c in labels.columns if c.startswith("prob_") and c[5:].isdigit()}
    if not columns:
        return []
    k = max(columns.values()) + 1
    probs = np.full((len(labels), k), np.nan)
    for c, j in columns.items():
        probs[:, j] = pd.to_numeric(labels[c], errors="coerce").to_numpy(dtype=float)
    reg = pd.to_numeric(labels["regime"], errors="coerce").fillna(-1).to_numpy(dtype=np.int64)
    rows = np.arange(len(labels))
    own = np.where((reg >= 0) & (reg < k), probs[rows, np.clip(reg, 0, k - 1)], np.nan)
    return _align(dataset, labels, own, np.float64(np.nan))


def level_function(time: np.ndarray, values: np.ndarray) -> Callable[[np.ndarray], np.ndarray]:
    """Map times to the value of the sample in force there (NaN outside)."""
    t = np.asarray(time, dtype=float)
    v = np.asarray(values, dtype=float)

    def levels(centres: np.ndarray) -> np.ndarray:
        if t.size == 0:
            return np.full(centres.shape, np.nan)
        idx = np.clip(np.searchsorted(t, centres, "right") - 1, 0, t.size - 1)
        out = v[idx].copy()
        out[(centres < t[0]) | (centres > t[-1])] = np.nan
        return out

    return levels


def nearest_index(sorted_values: np.ndarray, queries: np.ndarray | float) -> np.ndarray:
    """Index of the nearest element of ``sorted_values`` for each query."""
    v = np.asarray(sorted_values, dtype=float)
    q = np.atleast_1d(np.asarray(queries, dtype=float))
    right = np.clip(np.searchsorted(v, q), 1, max(v.size - 1, 1))
    left = right - 1
    if v.size == 1:
        return np.zeros(q.shape, dtype=np.int64)
    pick_right = np.abs(v[right] - q) < np.abs(q - v[left])
    return np.where(pick_right, right, left).astype(np.int64)


def band_function(time: np.ndarray, regimes: np.ndarray) -> Callable[[np.ndarray], np.ndarray]:
    """Map times to the regime of the sample in force there (``-1`` outside)."""
    t = np.asarray(time, dtype=float)
    reg = np.asarray(regimes, dtype=np.int64)

    def bands(centres: np.ndarray) -> np.ndarray:
        if t.size == 0:
            return np.full(centres.shape, -1, dtype=np.int64)
        idx = np.clip(np.searchsorted(t, centres, "right") - 1, 0, t.size - 1)
        out = reg[idx].copy()
        out[(centres < t[0]) | (centres > t[-1])] = -1
        return out

    return bands


def padded_limits(values: np.ndarray | Sequence[float], pad: float = 0.05) -> tuple[float, float]:
    """Finite ``(min, max)`` of ``values`` widened by ``pad`` of the span."""
    v = np.asarray(values, dtype=float)
    v = v[np.isfinite(v)]
    if v.size == 0:
        return 0.0, 1.0
    lo, hi = float(v.min()), float(v.max())
    span = hi - lo or (abs(lo) or 1.0)
    return lo - pad * span, hi + pad * span


def _monomial(term: str, Z: np.ndarray, index: dict[str, int]) -> np.ndarray:
    """Tiny evaluator for ``1``, ``x``, ``x^2``, ``x*y``, ``x^2*u`` (no other grammar)."""
    out = np.ones(Z.shape[0])
    if term.strip() == "1":
        return out
    for factor in term.split("*"):
        name, _, power = factor.strip().partition("^")
        if name not in index:
            raise ValueError(f"term '{term}' is not a monomial of known variables")
        out = out * Z[:, index[name]] ** (int(power) if power else 1)
    return out


def evaluate_guard(guard: Guard, Z: np.ndarray, variables: Sequence[str]) -> np.ndarray:
    """Value ``weights @ terms(z) + offset`` of a guard at each row of ``Z``.

    Uses the library's ``TermLibrary.from_terms`` when it is available and
    otherwise a tiny monomial evaluator; this is the only place the dashboard
    evaluates terms, so either can be swapped in one spot.

    Raises
    ------
    ValueError
        When a term cannot be evaluated.
    """
    Z = np.atleast_2d(np.asarray(Z, dtype=float))
    weights = np.asarray(guard.weights, dtype=float).reshape(-1)
    try:
        from modemap.terms.library import TermLibrary
    except ImportError:
        TermLibrary = None
    if TermLibrary is not None:
        try:
            theta = TermLibrary.from_terms(list(guard.terms), list(variables)).transform(Z)
            return theta @ weights + float(guard.offset)
        except Exception as exc:  # library errors become "cannot draw", never a crash
            raise ValueError(str(exc)) from exc
    index = {name: i for i, name in enumerate(variables)}
    theta = (
        np.column_stack([_monomial(t, Z, index) for t in guard.terms])
        if guard.terms
        else np.zeros((Z.shape[0], 0))
    )
    return theta @ weights + float(guard.offset)


def run_title(run: Run, position: int, total: int) -> str:
    """``"run 'a' (1/3)"``."""
    return f"run '{run.name}' ({position + 1}/{total})"


class DashboardState:
    """What every panel reads: the model, the data, the aligned labels and the current run."""

    def __init__(self, model, dataset: Dataset | None, labels: pd.DataFrame | None) -> None:
        self.run = 0
        self.set(model, dataset, labels)

    def set(self, model, dataset: Dataset | None, labels: pd.DataFrame | None) -> None:
        """Replace the model, data and labels; the regimes per sample are re-aligned."""
        self.model = model
        self.dataset = dataset
        self.labels = labels
        self.regimes = align_labels(dataset, labels)
        self.certainty = align_certainty(dataset, labels)
        self.run = min(self.run, max(self.n_runs - 1, 0))

    @property
    def n_runs(self) -> int:
        return len(self.dataset.runs) if self.dataset is not None else 0

    @property
    def current_run(self) -> Run | None:
        return self.dataset.runs[self.run] if self.n_runs else None

    def step_run(self, delta: int) -> None:
        """Move to the next (``delta=1``) or previous run, wrapping around."""
        if self.n_runs:
            self.run = (self.run + delta) % self.n_runs

    def unit(self, name: str) -> str:
        if self.dataset is not None and self.dataset.unit(name):
            return self.dataset.unit(name)
        return self.model.units.get(name, "") if self.model is not None else ""

    def label(self, name: str) -> str:
        u = self.unit(name)
        return f"{name} [{u}]" if u else name

    @property
    def variables(self) -> list[str]:
        if self.dataset is not None:
            return list(self.dataset.variable_names)
        return self.model.variables if self.model is not None else []

    @property
    def time_unit(self) -> str:
        if self.dataset is not None:
            return self.dataset.unit(self.dataset.time_name)
        return self.model.units.get(self.model.time_name, "") if self.model is not None else ""

    @property
    def regime_ids(self) -> list[int]:
        return [r.id for r in self.model.regimes] if self.model is not None else []


def pack_parts(parts: list[str], width: int, sep: str = " │ ") -> str:
    """``parts`` joined by ``sep`` on lines of at most ``width`` characters, breaking only
    between parts (a part wider than a line gets a line of its own)."""
    lines: list[str] = []
    for part in parts:
        if lines and len(lines[-1]) + len(sep) + len(part) <= width:
            lines[-1] += sep + part
        else:
            lines.append(part)
    return "\n".join(lines)


def stamp_labeller(run) -> Callable[[float, float], str] | None:
    """Tick labels in the run's date-time stamps (None when it has none): the time of
    day when the view spans less than two days (with seconds under two minutes), else the
    month, day and hour."""
    if getattr(run, "stamps", None) is None or run.n_samples == 0:
        return None
    from modemap.data.stamps import stamps_at

    def label(value: float, span: float) -> str:
        stamp = pd.Timestamp(stamps_at(run, np.array([value], dtype=float))[0])
        if span < 120:
            return stamp.round("s").strftime("%H:%M:%S")
        return stamp.round("min").strftime("%H:%M" if span < 2 * 86400 else "%m-%d %H:%M")

    return label


def stamp_text(run, value: float) -> str:
    """The run's date-time stamp at time ``value`` (ISO 8601, seconds), or empty text."""
    if getattr(run, "stamps", None) is None or run.n_samples == 0:
        return ""
    from modemap.data.stamps import stamps_at

    stamp = pd.Timestamp(stamps_at(run, np.array([value], dtype=float))[0])
    return stamp.isoformat(sep=" ", timespec="seconds")
