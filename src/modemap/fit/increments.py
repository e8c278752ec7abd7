"""Discrete form: select terms on the increments, estimate on the next states.

In discrete form the targets are the next states ``x[k+1]``.  When the log is
sampled fast compared with the dynamics (a tank whose temperature moves by a
few hundredths of a kelvin per sample), the next state is almost the current
one: ``x[k+1] = x[k] + dt f(x[k], u[k])`` with ``dt f`` a thousandth of
``x``.  Sparse selection thresholds each term's contribution relative to the
size of the target (see :mod:`modemap.fit.sparse`), so against ``x[k+1]`` every
term that carries the dynamics looks negligible and is dropped: the model
collapses to ``x[k+1] = x[k]``.

The cure is to select on the increments ``x[k+1] - x[k]``, the part of the
target the dynamics have to explain.  When every state's own linear term is in
the library, the increment is the target minus one term column, ``Y - Theta
E`` (``E`` picks the state's term for its target), and its normal-equation
statistics follow from those of ``Y`` without touching the samples::

    cross_inc = cross - G E
    yy_inc    = yy - E' cross - cross' E + E' G E
    sum_inc   = target_sum - E' term_sum

The selection (centred or plain, see :mod:`modemap.fit.centring`) runs on these
statistics; the model is then refitted by ordinary least squares on the next
states with each state's own term always in its support (its coefficient, the
persistence, is near 1 and is estimated, not fixed).  Residuals, standard
errors and parameter counts are those of that refit.  When a state's own term
is missing from the library (a user library without it), the plain selection
on ``x[k+1]`` is used.
"""

from __future__ import annotations

from collections.abc import Callable, Sequence

import numpy as np

from modemap.fit.sparse import LocalFit, refit_support
from modemap.fit.statistics import GramStats
from modemap.terms.expressions import quote_name

__all__ = ["fit_on_increments", "increment_stats", "persistence_matrix"]


def persistence_matrix(terms: Sequence[str], states: Sequence[str]) -> np.ndarray | None:
    """``E (p, m)`` with ``E[i, j] = 1`` where term ``i`` is state ``j``; None if one is missing.

    Parameters
    ----------
    terms : sequence of str
        Canonical term names (rows of the statistics).
    states : sequence of str
        State names, one per target, in target order.

    Returns
    -------
    ndarray of shape (len(terms), len(states)) or None
    """
    index = {t: i for i, t in enumerate(terms)}
    E = np.zeros((len(terms), len(states)))
    for j, name in enumerate(states):
        i = index.get(quote_name(name))
        if i is None:
            return None
        E[i, j] = 1.0
    return E


def increment_stats(stats: GramStats, E: np.ndarray) -> GramStats:
    """Statistics of the targets ``Y - Theta E`` from those of ``Y`` (exact, no samples).

    Parameters
    ----------
    stats : GramStats
        Statistics of the term columns ``Theta`` and targets ``Y``.
    E : ndarray of shape (p, m)
        From :func:`persistence_matrix`.

    Returns
    -------
    GramStats
    """
    ge = stats.gram @ E
    ec = E.T @ stats.cross
    return GramStats(
        gram=stats.gram,
        cross=stats.cross - ge,
        yy=stats.yy - ec - ec.T + E.T @ ge,
        n=stats.n,
        term_sum=stats.term_sum,
        target_sum=stats.target_sum - E.T @ stats.term_sum,
    )


def fit_on_increments(
    select: Callable[[GramStats | list[GramStats]], LocalFit],
    stats: GramStats | list[GramStats],
    terms: Sequence[str],
    states: Sequence[str],
) -> LocalFit:
    """Select terms on the increments, refit on the next states with the own terms kept.

    Parameters
    ----------
    select : callable
        A sparse fit taking statistics (one object, or a list of per-block statistics
        when ``stats`` is a list) and returning a :class:`~modemap.fit.sparse.LocalFit`; of
        its result on the increments only ``support``, ``threshold`` and ``path`` are
        used.
    stats : GramStats or list of GramStats
        Statistics of the next states (per block for a cross-validated choice).
    terms : sequence of str
    states : sequence of str
        State names in target order.

    Returns
    -------
    LocalFit
        ``select(stats)`` itself when a state's own linear term is not in ``terms``.
    """
    blocks = isinstance(stats, list)
    first = stats[0] if blocks else stats
    E = persistence_matrix(terms, states)
    if E is None or E.shape[1] != first.n_targets:
        return select(stats)
    moved = [increment_stats(s, E) for s in stats] if blocks else increment_stats(stats, E)
    chosen = select(moved)
    total = sum(stats) if blocks else stats
    support = np.asarray(chosen.support, dtype=bool) | (E > 0)
    return refit_support(total, terms, support, threshold=chosen.threshold, path=chosen.path)
