"""Regression rows of a dataset: what every later stage fits.

:func:`prepare_regression` turns a :class:`~modemap.data.dataset.Dataset` into
regression rows: variables ``Z = [states, inputs]`` and targets ``Y``, which
are the time derivatives of the states (continuous form, estimated per run by
:func:`modemap.data.derivatives.differentiate`) or the next states (discrete form,
``Z = z[:-1]``, ``Y = x[1:]`` per run, so each run loses its last sample).
"""

from __future__ import annotations

from collections.abc import Mapping
from dataclasses import dataclass, field
from typing import Any

import numpy as np

from modemap._exceptions import DataError, ParameterError
from modemap.data.batches import batched
from modemap.data.dataset import Dataset
from modemap.data.derivatives import differentiate, differentiate_runs

__all__ = ["FORMS", "RegressionData", "prepare_regression"]

FORMS = ("continuous", "discrete")


@dataclass
class RegressionData:
    """Regression rows built from a dataset.

    Attributes
    ----------
    Z : ndarray of shape (n, n_vars)
        Variables, states then inputs.
    Y : ndarray of shape (n, n_states)
        Derivatives (continuous) or next states (discrete).
    lengths : ndarray of int
        Rows per run (runs left with no row are omitted).
    sample_index : ndarray of shape (n,) of int
        Position of each row's sample in ``ds.concat()`` order.
    time : ndarray of shape (n,)
        Time stamp of each row.
    run_ids : ndarray of int
        Index in ``ds.runs`` of each entry of ``lengths``.
    form : str
    derivative : dict
        Derivative settings actually used (empty in discrete form).
    """

    Z: np.ndarray
    Y: np.ndarray
    lengths: np.ndarray
    sample_index: np.ndarray
    time: np.ndarray
    run_ids: np.ndarray
    form: str = "continuous"
    derivative: dict[str, Any] = field(default_factory=dict)

    @property
    def n_samples(self) -> int:
        return int(self.Z.shape[0])


def _derivative_request(derivative: str | Mapping[str, Any]) -> tuple[str, dict[str, Any]]:
    if isinstance(derivative, str):
        return derivative, {}
    options = dict(derivative)
    return str(options.pop("method", "auto")), options


def _merge_settings(settings: list[dict[str, Any]]) -> dict[str, Any]:
    """One settings dict for the model file; per-run details when runs differ."""
    if not settings:
        return {}
    first = dict(settings[0])
    if any(s != settings[0] for s in settings[1:]):
        first["per_run"] = [dict(s) for s in settings]
    return first


def _short_runs_together(
    ds: Dataset, method: str, options: dict[str, Any]
) -> dict[int, tuple[np.ndarray, dict[str, Any]]]:
    """Derivatives of many short runs computed side by side (:mod:`.batches`), by run."""
    sizes = np.array([run.n_samples for run in ds.runs], dtype=np.int64)
    short = np.flatnonzero(batched(sizes))
    if short.size == 0:
        return {}
    time = np.concatenate([ds.runs[i].time for i in short])
    states = np.concatenate([ds.runs[i].states for i in short], axis=0)
    dx, used = differentiate_runs(time, states, sizes[short], method, **options)
    bounds = np.concatenate([[0], np.cumsum(sizes[short])])
    return {
        int(i): (dx[a:b], u)
        for i, a, b, u in zip(short, bounds[:-1], bounds[1:], used, strict=True)
    }


def prepare_regression(
    ds: Dataset, *, form: str = "continuous", derivative: str | Mapping[str, Any] = "auto"
) -> RegressionData:
    """Regression rows of a dataset.

    Parameters
    ----------
    ds : Dataset
    form : {"continuous", "discrete"}, default "continuous"
    derivative : str or mapping, default "auto"
        Method for :func:`modemap.data.derivatives.differentiate`, or a settings
        mapping such as ``{"method": "savgol", "window": 15}`` (as recorded in
        a model file).  Ignored in discrete form.

    Returns
    -------
    RegressionData
    """
    if form not in FORMS:
        raise ParameterError(f"form must be one of {', '.join(FORMS)}, got {form!r}")
    method, options = _derivative_request(derivative)
    done = _short_runs_together(ds, method, options) if form == "continuous" else {}
    Zs, Ys, times, index, lengths, run_ids, settings = [], [], [], [], [], [], []
    offset = 0
    for i, run in enumerate(ds.runs):
        z = np.hstack([run.states, run.inputs]).astype(np.float64, copy=False)
        if form == "continuous":
            dx, used = done.get(i) or differentiate(run.time, run.states, method, **options)
            settings.append(used)
            rows = np.arange(run.n_samples)
            Zs.append(z), Ys.append(np.asarray(dx).reshape(run.n_samples, -1))
        else:
            rows = np.arange(run.n_samples - 1)
            Zs.append(z[:-1]), Ys.append(run.states[1:])
        if rows.size:
            times.append(run.time[rows]), index.append(offset + rows)
            lengths.append(rows.size), run_ids.append(i)
        offset += run.n_samples
    if not lengths:
        raise DataError("no regression rows: every run is too short", source=ds.source)
    return RegressionData(
        Z=np.concatenate(Zs, axis=0),
        Y=np.concatenate(Ys, axis=0).astype(np.float64, copy=False),
        lengths=np.asarray(lengths, dtype=np.int64),
        sample_index=np.concatenate(index).astype(np.int64),
        time=np.concatenate(times),
        run_ids=np.asarray(run_ids, dtype=np.int64),
        form=form,
        derivative=_merge_settings(settings),
    )
