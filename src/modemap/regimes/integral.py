"""Continuous form: choose and estimate each regime's terms again on the integral of its model.

The continuous form finds the regimes on estimated derivatives (see
:mod:`modemap.data.derivatives`).  A smoothing derivative trades noise for bias: on
a regime whose time constants span only a few samples, a Savitzky-Golay window
of twenty samples flattens the transients that carry the information, and the
coefficients come out biased by tens of percent.  Once the labels are settled,
each regime's coefficients are estimated again from the integral form, which
needs no derivative::

    x(t_e) - x(t_s) = integral from t_s to t_e of Theta(x(t), u(t)) dt . c

over short windows ``[t_s, t_e]`` inside one regime stretch (common practice in
system identification; for sparse models see "Sparse model selection via
integral terms", Physical Review E 96, 023302, 2017, DOI
10.1103/PhysRevE.96.023302).  The integral is the trapezoidal rule over the
sample intervals, with a stepped input (see :mod:`modemap.regimes.segments`)
held at its value from the start of each interval, which is how such an input
acts; a window end where the sampling is even and the integrand smooth gets the
rule's end correction (:func:`_end_correction`).  Noise in the target enters
only through the window's two end points, and is not amplified by a division by
the step.

**Windows.**  Every stretch of one label within a run has a window of
``window`` sample intervals starting at each of its samples (shorter stretches:
one window over all of it).  Windows that overlap have correlated residuals, so
the standard errors are a sandwich whose middle is the Newey-West long-run
variance of the windows' scores within each stretch, with two window lengths of
lags (:class:`LongRunVariance`), never below the variance that the targets'
measurement noise alone makes (:class:`EndpointNoise`): on a short record the
long-run variance comes out too low, because a regime's scores sum to zero at
its least-squares solution.

**Noise in the regressors.**  The integrated terms are computed from noisy
states, which biases least squares towards zero on every term that carries
the noise (errors in variables).  For a term linear in the states, the
trapezoidal weights make the regressor's noise uncorrelated with the
target's, but its variance still attenuates the estimate.  The expected noise
contribution to the normal equations follows from each term's partial
derivatives and the noise variance of each state (estimated per run from
fourth differences, :func:`modemap.data.derivatives.estimate_noise`); it is
subtracted before solving (bias-compensated least squares: "Bias correction in
least-squares identification", International Journal of Control 35(3), 1982,
from memory).  Where subtracting it would leave the normal matrix not
positive definite (noise comparable with the signal), the plain integral
estimate is kept for that state and a note says so.

**Selection.**  Given a selection function, the terms are chosen again on the
window statistics scaled to an effective number of independent windows (the
largest ratio of a sandwich variance to the plain least-squares one); those
scaled statistics are also what is handed on for the equilibria's standard
errors.  The ratio may be below 1: the targets' noise telescopes over
overlapping windows, which then carry more information than as many
independent ones.  The ratio comes from the residuals of the
support being chosen among, so selection and ratio are iterated until the
supports settle (at most ``_SELECTION_ROUNDS`` selections).  The residual
covariance of each fit stays that of the derivative targets, which the decoding
of new data and the reports use.
"""

from __future__ import annotations

import dataclasses
from collections.abc import Callable, Sequence
from dataclasses import dataclass
from typing import Any

import numpy as np
import scipy.linalg as sla

from modemap.data.derivatives import estimate_noise
from modemap.fit.sparse import LocalFit
from modemap.fit.statistics import GramStats
from modemap.fit.uncertainty import standard_errors
from modemap.regimes.rows import Rows
from modemap.regimes.segments import stepped_columns

__all__ = [
    "EndpointNoise",
    "IntegralRefit",
    "LongRunVariance",
    "integral_refit",
    "right_ends",
    "window_bounds",
]

_CHUNK_ROWS = 65536
#: Lags of the long-run variance of the scores, in window lengths (:class:`LongRunVariance`).
_LAG_WINDOWS = 2
#: Scores handled at once by :class:`LongRunVariance` (each group start adds ``lags`` rows).
_SCORE_ROWS = 4096
#: Most rounds of selection and effective number of windows (see :func:`integral_refit`).
_SELECTION_ROUNDS = 3
#: Windows shorter than this many intervals keep the plain trapezoidal rule.
_MIN_CORRECTED = 3


@dataclass
class IntegralRefit:
    """What :func:`integral_refit` returns.

    Attributes
    ----------
    fits : list of LocalFit
        One per regime, on the same support as the fit it replaces.
    stats : list of GramStats
        Each regime's window statistics (integrated terms against state changes).
    n_windows : ndarray of int, shape (K,)
    noise : ndarray of shape (n_states,)
        Noise standard deviation of each state used for the compensation.
    compensated : ndarray of bool, shape (K, n_states)
        False where subtracting the noise products would have left the normal matrix not
        positive definite (noise comparable with the signal): the plain integral
        estimate was kept for that regime and state.
    """

    fits: list[LocalFit]
    stats: list[GramStats]
    n_windows: np.ndarray
    noise: np.ndarray
    compensated: np.ndarray


def right_ends(Z: np.ndarray, n_states: int, lengths: Sequence[int]) -> np.ndarray:
    """Variables at the right end of every sample interval ``[t_k, t_k+1]``.

    Row ``k`` holds the states and inputs of sample ``k + 1``, except stepped inputs
    (:func:`modemap.regimes.segments.stepped_columns`), which keep sample ``k``'s value over
    the interval.  The last row of each run has no interval and repeats its own values.

    Parameters
    ----------
    Z : ndarray of shape (n, n_vars)
        States, then inputs, runs one after another.
    n_states : int
    lengths : sequence of int
        Samples per run.

    Returns
    -------
    ndarray of shape (n, n_vars)
    """
    Z = np.asarray(Z, dtype=np.float64)
    out = np.empty_like(Z)
    out[:-1] = Z[1:]
    out[-1] = Z[-1]
    if Z.shape[1] > n_states:
        held = n_states + np.flatnonzero(stepped_columns(Z[:, n_states:]))
        out[:, held] = Z[:, held]
    ends = np.cumsum(np.asarray(lengths, dtype=np.int64)) - 1
    out[ends] = Z[ends]
    return out


def window_bounds(
    lengths: Sequence[int], labels: np.ndarray, window: int
) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """First and last sample of every window, and the stretch it lies in.

    A stretch (samples of one label in a row, within one run) from sample ``a`` to ``e``
    has one window starting at every sample from ``a`` to ``e - w`` and ending ``w``
    samples later, with ``w = min(window, e - a)``; a stretch of one sample has none.

    Parameters
    ----------
    lengths : sequence of int
    labels : ndarray of int, shape (n,)
    window : int
        Sample intervals per window (>= 1).

    Returns
    -------
    start, end, stretch : ndarray of int, shape (n_windows,)
        ``stretch`` numbers the stretches in sample order; windows are sorted by start.
    """
    labels = np.asarray(labels)
    n = labels.size
    if n == 0:
        empty = np.zeros(0, dtype=np.int64)
        return empty, empty, empty
    first = np.zeros(n, dtype=bool)
    first[0] = True
    first[1:] = labels[1:] != labels[:-1]
    first[np.cumsum(np.asarray(lengths, dtype=np.int64))[:-1]] = True
    a = np.flatnonzero(first)
    e = np.append(a[1:], n) - 1
    width = np.minimum(window, e - a)
    count = np.where(width > 0, e - a - width + 1, 0)
    stretch = np.repeat(np.arange(a.size), count)
    start = a[stretch] + np.arange(stretch.size) - np.repeat(np.cumsum(count) - count, count)
    return start, start + width[stretch], stretch


def _noise_variance(states: np.ndarray, lengths: Sequence[int]) -> np.ndarray:
    """Noise variance per state, pooled over runs (weights: samples per run)."""
    total, weight = np.zeros(states.shape[1]), 0
    for lo, hi in _run_ranges(lengths):
        if hi - lo >= 5:
            total += (hi - lo) * estimate_noise(states[lo:hi]) ** 2
            weight += hi - lo
    return total / weight if weight else total


def _run_ranges(lengths: Sequence[int]) -> list[tuple[int, int]]:
    ends = np.cumsum(np.asarray(lengths, dtype=np.int64))
    return list(zip((ends - np.asarray(lengths)).tolist(), ends.tolist(), strict=True))


def _chunks(start: np.ndarray) -> list[tuple[int, int]]:
    """Groups of consecutive windows, about ``_CHUNK_ROWS`` samples each."""
    out, i = [], 0
    while i < start.size:
        j = int(np.searchsorted(start, start[i] + _CHUNK_ROWS, side="left"))
        j = max(j, i + 1)
        out.append((i, j))
        i = j
    return out


class _Windows:
    """Integrated terms and state changes of the windows, one chunk at a time.

    The right end of interval ``k`` holds sample ``k + 1``'s variables except where a
    stepped input changes there (or a run ends): only those rows are evaluated apart.
    A window end where the sampling is even and the integrand smooth on both sides
    (``smooth``) gets the trapezoidal rule's end correction (see :func:`_end_correction`).
    """

    def __init__(self, library, Z, n_states, time, lengths, labels, window, n_regimes):
        self.library, self.Z, self.m, self.time = library, Z, n_states, time
        self.right = right_ends(Z, n_states, lengths)
        # own[k]: the right end of interval k - 1 is sample k itself
        self.own = np.ones(Z.shape[0], dtype=bool)
        self.own[1:] = np.all(self.right[:-1] == Z[1:], axis=1)
        self.smooth = _smooth_samples(time, lengths, labels, self.own)
        start, end, stretch = window_bounds(lengths, labels, window)
        keep = (labels[start] >= 0) & (labels[start] < n_regimes)  # unassigned samples: none
        self.start, self.end, self.stretch = start[keep], end[keep], stretch[keep]
        self.regime = labels[self.start].astype(np.int64)
        self.window, self.lags = window, _LAG_WINDOWS * window
        self.chunks = _chunks(self.start)

    def at_right(self, func, values: np.ndarray, lo: int, hi: int) -> np.ndarray:
        """``func`` at the right end of intervals ``lo - 1 .. hi - 2``, by sample ``lo .. hi - 1``.

        ``values`` is ``func(Z[lo:hi])``; row 0 has no interval before it in the chunk.
        """
        out = values.copy()
        other = np.flatnonzero(~self.own[lo + 1 : hi]) + 1
        if other.size:
            out[other] = func(self.right[lo + other - 1])
        return out

    def bounds(self, i: int, j: int) -> tuple[int, int, np.ndarray, np.ndarray]:
        """Sample range ``[lo, hi)`` of windows ``i:j`` (one sample beyond each end, for the
        end corrections) and the windows' first and last samples as offsets from ``lo``."""
        lo = max(int(self.start[i]) - 1, 0)
        hi = min(int(self.end[i:j].max()) + 2, self.Z.shape[0])
        return lo, hi, self.start[i:j] - lo, self.end[i:j] - lo

    def corrected(self, lo: int, s: np.ndarray, e: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
        """Which windows get the end correction at their start, and at their end."""
        long = e - s >= _MIN_CORRECTED
        return long & self.smooth[lo + s], long & self.smooth[lo + e]

    def chunk(self, i: int, j: int) -> tuple[int, int, np.ndarray, np.ndarray]:
        """Sample range ``[lo, hi)`` of windows ``i:j``, their integrated terms and changes."""
        lo, hi, s, e = self.bounds(i, j)
        theta = self.library.transform(self.Z[lo:hi])
        right = self.at_right(self.library.transform, theta, lo, hi)
        dt = np.diff(self.time[lo:hi])
        cum = np.zeros((hi - lo, theta.shape[1]))
        np.cumsum(0.5 * dt[:, None] * (theta[:-1] + right[1:]), axis=0, out=cum[1:])
        X = cum[e] - cum[s]
        at_s, at_e = self.corrected(lo, s, e)
        X[at_s] += _end_correction(theta, dt, s[at_s])
        X[at_e] -= _end_correction(theta, dt, e[at_e])
        x = self.Z[lo:hi, : self.m]
        return lo, hi, X, x[e] - x[s]


def _smooth_samples(
    time: np.ndarray, lengths: Sequence[int], labels: np.ndarray, own: np.ndarray
) -> np.ndarray:
    """Samples with a neighbour on each side in the same run and stretch, no stepped input
    change between them, and even sampling (the two intervals equal within 1e-9)."""
    n = time.size
    smooth = np.zeros(n, dtype=bool)
    if n < 3:
        return smooth
    link = (labels[1:] == labels[:-1]) & own[1:]  # sample k joined to k + 1
    link[np.cumsum(np.asarray(lengths, dtype=np.int64))[:-1] - 1] = False  # run ends
    dt = np.diff(time)
    even = np.abs(dt[1:] - dt[:-1]) <= 1e-9 * np.abs(dt[1:])
    smooth[1:-1] = link[:-1] & link[1:] & even
    return smooth


def _end_correction(theta: np.ndarray, dt: np.ndarray, at: np.ndarray) -> np.ndarray:
    """``h^2/12`` times the terms' slope at samples ``at``, by central differences.

    The trapezoidal rule over a window ``[s, e]`` of even steps ``h`` errs by
    ``-h^2/12 (f'(e) - f'(s))`` to leading order (the Euler-Maclaurin formula, common
    practice); adding ``h/24 (theta[s+1] - theta[s-1])`` and subtracting the same at ``e``
    leaves an error of order ``h^4``.  The result is the four-point rule with weights
    ``(-1, 13, 13, -1) h/24`` applied to every interval of the window.
    """
    if at.size == 0:
        return np.zeros((0, theta.shape[1]))
    return (dt[at] / 24.0)[:, None] * (theta[at + 1] - theta[at - 1])


def integral_refit(
    library: Any,
    rows: Rows,
    labels: np.ndarray,
    fits: Sequence[LocalFit],
    derivative_stats: Sequence[GramStats],
    *,
    window: int = 16,
    compensate: bool = True,
    select: Callable[[GramStats], LocalFit] | None = None,
) -> IntegralRefit:
    """Re-estimate every regime's coefficients (and terms) from the integral form.

    See the module notes for the method.

    Parameters
    ----------
    library : fitted TermLibrary
        The terms of ``fits`` (same order).
    rows : Rows
        Every sample's variables (states then inputs), time and run lengths; the targets
        give the number of states only.
    labels : ndarray of int, shape (n,)
        Regime of every sample (negative: unassigned, left out).
    fits : sequence of LocalFit
        One per regime; their supports are kept unless ``select`` is given.
    derivative_stats : sequence of GramStats
        The statistics ``fits`` came from (derivative targets); they give each new
        fit's residual covariance and residual sums of squares.
    window : int, default 16
        Sample intervals per window.
    compensate : bool, default True
        Subtract the expected contribution of measurement noise in the terms.
    select : callable, optional
        ``select(stats) -> LocalFit``: the sparse selection.  When given, each regime's
        terms are chosen again on its window statistics (scaled to the effective number
        of windows, see :func:`_sandwich`, which is counted again on the chosen support
        until the supports settle) before the final estimate; otherwise the supports of
        ``fits`` are kept.

    Returns
    -------
    IntegralRefit
    """
    Z, n_states, lengths = rows.Z, rows.n_states, rows.lengths
    time = np.asarray(rows.time, dtype=np.float64)
    labels = np.asarray(labels, dtype=np.int64)
    k, p = len(fits), library.n_terms_
    if int(window) < 1:
        raise ValueError(f"window must be >= 1, got {window!r}")
    windows = _Windows(library, Z, n_states, time, lengths, labels, int(window), k)
    bound_var = _noise_variance(Z[:, :n_states], lengths)
    noise_var = bound_var if compensate else np.zeros(n_states)
    stats = [GramStats.zeros(p, n_states) for _ in range(k)]
    bias = np.zeros((k, p, p))
    bias_cross = np.zeros((k, p, n_states))
    for i, j in windows.chunks:
        lo, hi, X, Y = windows.chunk(i, j)
        r = windows.regime[i:j]
        for g in np.unique(r):
            rows = r == g
            stats[g] = stats[g] + GramStats.from_arrays(X[rows], Y[rows])
        if np.any(noise_var > 0):
            _, _, s, e = windows.bounds(i, j)
            acc = (bias, bias_cross)
            _add_noise_bias(windows, (lo, hi), s, e, labels[lo:hi], noise_var, acc)
    fits = list(fits)
    solved = [_solve(stats[g], bias[g], bias_cross[g], fits[g]) for g in range(k)]
    spread, least = _score_spread(windows, [c for c, _, _ in solved], k, p, n_states, bound_var)
    # the effective number of windows comes from the residuals of the support it selects
    # among; a support that misses a term leaves it in the residuals, serially correlated,
    # and counts too few windows, so the two are iterated until the supports settle
    for _ in range(_SELECTION_ROUNDS if select is not None else 0):
        changed = False
        for g, (coef, normal, _) in enumerate(solved):
            _, effective = _sandwich(fits[g], coef, normal, spread[g], least[g], stats[g])
            if effective.n > p:  # enough independent windows to choose among the terms
                chosen = select(effective)
                support = np.asarray(chosen.support, dtype=bool)
                changed |= not np.array_equal(support, fits[g].support)
                fits[g] = dataclasses.replace(
                    fits[g],
                    support=support,
                    n_params=int(chosen.n_params),
                    threshold=np.asarray(chosen.threshold),
                    path=chosen.path,
                )
        if not changed:
            break
        solved = [_solve(stats[g], bias[g], bias_cross[g], fits[g]) for g in range(k)]
        spread, least = _score_spread(windows, [c for c, _, _ in solved], k, p, n_states, bound_var)
    new_fits, new_stats = [], []
    for g, (coef, normal, _) in enumerate(solved):
        stderr, scaled = _sandwich(fits[g], coef, normal, spread[g], least[g], stats[g])
        new_fits.append(_local_fit(fits[g], coef, stderr, derivative_stats[g]))
        new_stats.append(scaled)
    counts = np.bincount(windows.regime, minlength=k)[:k]
    compensated = np.array([kept for _, _, kept in solved], dtype=bool).reshape(k, n_states)
    return IntegralRefit(new_fits, new_stats, counts, np.sqrt(noise_var), compensated)


def _add_noise_bias(
    windows: _Windows,
    span: tuple[int, int],
    s: np.ndarray,
    e: np.ndarray,
    labels: np.ndarray,
    noise_var: np.ndarray,
    acc: tuple[np.ndarray, np.ndarray],
) -> None:
    """Expected noise products of the windows ``s, e`` (offsets from ``lo``), per regime.

    Sample ``i``'s noise ``eps_i`` enters the integral over interval ``i - 1`` (right end:
    ``A_i = dt_(i-1)/2`` times the terms' partials at the right-end variables) and over
    interval ``i`` (left end: ``B_i = dt_i/2`` times the partials at sample ``i``).  A
    window's noise is ``B_s eps_s + sum (A_i + B_i) eps_i + A_e eps_e`` over its interior,
    and its target's noise ``eps_e - eps_s``.  Every window lies in one stretch, so all of
    a sample's roles belong to its own regime.  ``span`` is the rows ``lo, hi`` of the
    chunk; the products are added to ``acc = (bias, bias_cross)``, (K, p, p) and (K, p, m).
    """
    (lo, hi), (bias, bias_cross) = span, acc
    m, n = noise_var.size, hi - lo

    def partials(z: np.ndarray) -> np.ndarray:
        return windows.library.partials(z)[:, :, :m]

    # (m, n, p): one contiguous block of partials per state
    left = np.ascontiguousarray(partials(windows.Z[lo:hi]).transpose(2, 0, 1))
    dt = np.diff(windows.time[lo:hi])
    half_a, half_b = np.zeros(n), np.zeros(n)
    half_a[1:], half_b[:-1] = 0.5 * dt, 0.5 * dt
    starts = np.bincount(s, minlength=n).astype(np.float64)
    ends = np.bincount(e, minlength=n).astype(np.float64)
    inner = np.zeros(n + 1)
    np.add.at(inner, s + 1, 1.0)
    np.add.at(inner, e, -1.0)
    inside = np.cumsum(inner)[:n]
    # where the right-end variables are the sample's own, A_i and B_i share the partials
    # and the three roles add up to one weight per sample; the other rows (a stepped input
    # changes there) take their right-end partials apart
    apart = np.flatnonzero(~windows.own[lo + 1 : hi]) + 1
    p_right = (
        partials(windows.right[lo + apart - 1]).transpose(2, 0, 1)
        if apart.size
        else np.zeros((m, 0, left.shape[2]))
    )
    # end corrections: +h/24 on the sample after a corrected start (and before a corrected
    # end), inside the window; -h/24 on the sample just outside it (left partials)
    at_s, at_e = windows.corrected(lo, s, e)
    extra = np.where(half_b > 0, 2.0 * half_b, 2.0 * half_a) / 24.0
    near = np.bincount(s[at_s] + 1, minlength=n) + np.bincount(e[at_e] - 1, minlength=n)
    beyond = np.bincount(s[at_s] - 1, minlength=n) + np.bincount(e[at_e] + 1, minlength=n)
    interior = half_a + half_b
    weight = half_b**2 * starts + half_a**2 * ends + interior**2 * inside
    weight += near * ((interior + extra) ** 2 - interior**2)
    weight[apart] = 0.0
    weight += beyond * extra**2
    cross_w = half_a * ends - half_b * starts
    for g in np.unique(labels[(labels >= 0) & (labels < bias.shape[0])]):
        rows = labels == g
        root = np.sqrt(np.where(rows, weight, 0.0))[:, None]
        sel = apart[rows[apart]]
        pick = rows[apart]
        a, b, c = half_a[sel, None], half_b[sel, None], extra[sel, None]
        plain, fixed = inside[sel] - near[sel], near[sel]
        for j in range(m):
            mat = left[j] * root
            total = mat.T @ mat
            p_l, p_r = left[j][sel], p_right[j][pick]
            for part in (
                p_l * (b * np.sqrt(starts[sel])[:, None]),
                p_r * (a * np.sqrt(ends[sel])[:, None]),
                (p_r * a + p_l * b) * np.sqrt(plain)[:, None],
                (p_r * a + p_l * (b + c)) * np.sqrt(fixed)[:, None],
            ):
                total += part.T @ part
            bias[g] += noise_var[j] * total
            # target noise eps_e - eps_s against the window's noise: sum of A_e D - B_s D
            cross = left[j].T @ np.where(rows, cross_w, 0.0)
            cross += (p_r - p_l).T @ (half_a[sel] * ends[sel])
            bias_cross[g][:, j] += noise_var[j] * cross


class LongRunVariance:
    """Newey-West long-run variance of a sequence of scores, fed one piece at a time.

    For scores ``s_i`` (rows, in order) in groups of consecutive rows (rows of different
    groups are taken as independent) the estimate is::

        S = sum_i s_i s_i' + sum_(l=1..L) (1 - l / (L + 1)) sum_i (s_i s_(i-l)' + s_(i-l) s_i')

    the inner pairs running over rows ``i, i - l`` of the same group: the Bartlett kernel
    with ``L`` lags ("A simple, positive semi-definite, heteroskedasticity and
    autocorrelation consistent covariance matrix", Econometrica 55(3), 703-708, 1987, DOI
    10.2307/1913610).  It is computed as ``sum_t B_t B_t' / (L + 1)`` over the sums ``B_t``
    of ``L + 1`` consecutive rows of the sequence with ``L`` zero rows between groups and
    at both ends (every pair ``i, j`` lies together in ``L + 1 - |i - j|`` such sums), so
    the cost is that of ``sum_i s_i s_i'`` whatever ``L``.  The last ``L`` rows of a piece
    are kept for the sums that reach into the next one, so cutting the sequence into pieces
    does not change the result.

    Parameters
    ----------
    lags : int
        ``L`` (>= 0).
    shape : tuple of int
        Shape of one score, ``(..., p)``; the result has shape ``(..., p, p)``.
    """

    def __init__(self, lags: int, shape: tuple[int, ...]) -> None:
        self.lags = int(lags)
        if self.lags < 0:
            raise ValueError(f"lags must be >= 0, got {lags!r}")
        self._tail = np.zeros((self.lags, *shape))
        self._group: Any = None
        self.total = np.zeros((*shape, shape[-1]))

    def add(self, scores: np.ndarray, groups: np.ndarray) -> None:
        """Append rows ``scores (n, ..., p)`` with their group labels ``groups (n,)``."""
        scores = np.asarray(scores, dtype=np.float64)
        groups = np.asarray(groups)
        for a in range(0, groups.size, _SCORE_ROWS):  # bounds the zero rows held at once
            self._add(scores[a : a + _SCORE_ROWS], groups[a : a + _SCORE_ROWS])

    def _add(self, scores: np.ndarray, groups: np.ndarray) -> None:
        new = np.ones(groups.size, dtype=bool)
        new[1:] = groups[1:] != groups[:-1]
        new[0] = self._group is None or groups[0] != self._group
        # row i goes after lags zero rows for every group that starts at or before it
        place = np.arange(groups.size) + self.lags * np.cumsum(new)
        piece = np.zeros((int(place[-1]) + 1, *scores.shape[1:]))
        piece[place] = scores
        self._group = groups[-1]
        extra, self._tail = self._sums(piece)
        self.total += extra

    def _sums(self, piece: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
        """``sum B_t B_t' / (L + 1)`` over the sums ending on the rows of ``piece``, and the
        last ``L`` rows."""
        rows = np.concatenate([self._tail, piece])
        cum = np.zeros((rows.shape[0] + 1, *rows.shape[1:]))
        np.cumsum(rows, axis=0, out=cum[1:])
        sums = np.moveaxis(cum[self.lags + 1 :] - cum[: piece.shape[0]], 0, -1)  # (..., p, n)
        extra = (sums @ np.swapaxes(sums, -1, -2)) / (self.lags + 1)
        return extra, rows[rows.shape[0] - self.lags :]

    def result(self) -> np.ndarray:
        """The estimate ``S`` over the rows added so far."""
        closing = np.zeros((self.lags, *self._tail.shape[1:]))  # sums reaching past the end
        return self.total + self._sums(closing)[0]


class EndpointNoise:
    """The part of the windows' score variance that the targets' measurement noise makes.

    A window's target is the change of a state between its two end samples, so white
    measurement noise of variance ``sigma^2`` on the states puts ``n_e - n_s`` in its
    residual.  Over the windows of one stretch the score sum ``sum_w X_w (n_e - n_s)`` is
    ``sum_k n_k d_k`` with ``d_k`` the integrated terms of the window ending at sample ``k``
    less those of the window starting there, so its variance is ``sigma^2 sum_k d_k d_k'``:
    twice ``sum_w X_w X_w'`` less the products of the window pairs that meet at a sample
    (the window ``w`` samples later in the same stretch, ``w`` its width), in both orders.
    The sum telescopes, which is why overlapping windows can carry more information than as
    many independent ones.  Noise in the integrated terms is left out, so this is a lower
    bound: the least variance the measured noise makes.

    Windows are fed in order, one piece at a time; the last ``window`` rows of a piece are
    kept for the pairs that reach into the next one.

    Parameters
    ----------
    window : int
        The widest window, in sample intervals (>= 1).
    p : int
        Terms per window.
    """

    def __init__(self, window: int, p: int) -> None:
        self.window = int(window)
        self._X = np.zeros((0, p))
        self._group = np.zeros(0, dtype=np.int64)
        self.total = np.zeros((p, p))

    def add(self, X: np.ndarray, groups: np.ndarray, widths: np.ndarray) -> None:
        """Append windows ``X (n, p)`` with their stretch ``groups (n,)`` and ``widths (n,)``."""
        X = np.asarray(X, dtype=np.float64)
        if X.shape[0] == 0:
            return
        rows = np.concatenate([self._X, X])
        group = np.concatenate([self._group, np.asarray(groups, dtype=np.int64)])
        new = np.arange(self._X.shape[0], rows.shape[0])
        partner = new - np.asarray(widths, dtype=np.int64)
        ok = partner >= 0
        ok[ok] = group[partner[ok]] == group[new[ok]]
        pairs = rows[partner[ok]].T @ rows[new[ok]]
        self.total += 2.0 * (X.T @ X) - pairs - pairs.T
        self._X, self._group = rows[-self.window :], group[-self.window :]


def _score_spread(
    windows: _Windows,
    coefs: Sequence[np.ndarray],
    k: int,
    p: int,
    m: int,
    noise_var: np.ndarray,
) -> tuple[np.ndarray, np.ndarray]:
    """Long-run variance of each regime's window scores, ``(k, m, p, p)``.

    The score of a window is its integrated terms times its residual.  Overlapping windows
    have correlated residuals (the target's noise is shared by windows that end or start on
    one sample, the terms' noise by windows that overlap), out to about one window length;
    the Newey-West estimate over the windows of each stretch (:class:`LongRunVariance`,
    ``_LAG_WINDOWS`` window lengths of lags) takes that in.  Windows of different stretches
    are taken as independent.  Also returns the part of that variance the targets'
    measurement noise alone makes (:class:`EndpointNoise`, with the noise variance of each
    state ``noise_var``), which :func:`_sandwich` never goes below.
    """
    spreads = [LongRunVariance(windows.lags, (m, p)) for _ in range(k)]
    ends = [EndpointNoise(windows.window, p) for _ in range(k)]
    for i, j in windows.chunks:
        _, _, X, Y = windows.chunk(i, j)
        r, stretch = windows.regime[i:j], windows.stretch[i:j]
        width = windows.end[i:j] - windows.start[i:j]
        for g in np.unique(r):
            rows = r == g
            resid = Y[rows] - X[rows] @ coefs[g]
            spreads[g].add(resid[:, :, None] * X[rows][:, None, :], stretch[rows])
            ends[g].add(X[rows], stretch[rows], width[rows])
    if not k:
        return np.zeros((0, m, p, p)), np.zeros((0, m, p, p))
    noise = np.stack([e.total for e in ends])[:, None] * np.asarray(noise_var)[None, :, None, None]
    return np.stack([s.result() for s in spreads]), noise


def _solve(
    stats: GramStats, bias: np.ndarray, bias_cross: np.ndarray, old: LocalFit
) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Coefficients on the old fit's support from the compensated normal equations.

    Returns the coefficients, the normal matrix solved with (per target, ``(m, p, p)``),
    and per target whether the compensation could be applied (False where the compensated
    matrix is not positive definite).  A target with no more windows than terms keeps
    its old coefficients.
    """
    support = np.asarray(old.support, dtype=bool)
    p, m = support.shape
    coef, kept = np.array(old.coef, dtype=np.float64, copy=True), np.ones(m, dtype=bool)
    normal = np.broadcast_to(stats.gram, (m, p, p)).copy()
    scale = stats.column_scale()
    for j in range(m):
        idx = np.flatnonzero(support[:, j])
        if stats.n <= idx.size:
            continue
        coef[:, j] = 0.0
        if idx.size == 0:
            continue
        sc = np.outer(scale[idx], scale[idx])
        comp = stats.gram[np.ix_(idx, idx)] - bias[np.ix_(idx, idx)]
        rhs = (stats.cross[idx, j] - bias_cross[idx, j]) / scale[idx]
        try:
            factor = sla.cho_factor(comp / sc, check_finite=False)
            d = np.abs(np.diag(factor[0]))
            if d.min() <= 1e-7 * d.max():
                raise np.linalg.LinAlgError("ill-conditioned")
            coef[idx, j] = sla.cho_solve(factor, rhs) / scale[idx]
            normal[j][np.ix_(idx, idx)] = comp
        except (np.linalg.LinAlgError, ValueError):
            kept[j] = not np.any(bias[np.ix_(idx, idx)])
            plain = stats.gram[np.ix_(idx, idx)] / sc
            sol = sla.lstsq(plain, stats.cross[idx, j] / scale[idx], cond=1e-13)[0]
            coef[idx, j] = sol / scale[idx]
    return coef, normal, kept


def _sandwich(
    old: LocalFit,
    coef: np.ndarray,
    normal: np.ndarray,
    spread: np.ndarray,
    noise: np.ndarray,
    stats: GramStats,
) -> tuple[np.ndarray, GramStats]:
    """Sandwich standard errors, and the window statistics scaled to match them.

    Standard errors are ``N^-1 S N^-1`` (``N`` the normal matrix solved with, ``S`` the
    long-run variance of the scores, :func:`_score_spread`), each variance never below the
    one the targets' measurement noise alone makes (``noise``, :class:`EndpointNoise`).
    The window statistics' plain least-squares variances are scaled by the largest ratio of
    a sandwich variance to the plain one (an effective number of independent windows), so
    that what is computed from them (the selection's criterion, the equilibria's standard
    errors) errs on the safe side.  The ratio may be below 1: the targets' noise telescopes
    over overlapping windows.  The bound keeps it from the long-run variance alone where that
    comes out too low (a short record: a regime's scores sum to zero at its least-squares
    solution, and a few stretches hold few independent sums).  Targets with no more windows
    than terms keep ``old``'s errors.
    """
    support = np.asarray(old.support, dtype=bool)
    stderr = np.array(old.stderr, dtype=np.float64, copy=True)
    plain = standard_errors(stats, coef, support) if stats.n else stderr
    ratio = []
    for j in range(support.shape[1]):
        idx = np.flatnonzero(support[:, j])
        if idx.size == 0 or stats.n <= idx.size:
            continue
        sc = np.sqrt(np.clip(np.diag(normal[j])[idx], 0.0, None))
        sc[~(sc > 0)] = 1.0
        inv = sla.pinvh(normal[j][np.ix_(idx, idx)] / np.outer(sc, sc)) / np.outer(sc, sc)
        var = np.einsum("ab,bc,ca->a", inv, spread[j][np.ix_(idx, idx)], inv)
        least = np.einsum("ab,bc,ca->a", inv, noise[j][np.ix_(idx, idx)], inv)
        var = np.maximum(var, least)
        stderr[idx, j] = np.sqrt(np.clip(var, 0.0, None))
        ok = plain[idx, j] > 0
        ratio.extend((var[ok] / plain[idx, j][ok] ** 2).tolist())
    factor = max(ratio) if ratio and max(ratio) > 0 else 1.0
    return stderr, stats * (1.0 / factor)


def _local_fit(
    old: LocalFit, coef: np.ndarray, stderr: np.ndarray, derivative_stats: GramStats
) -> LocalFit:
    """The refitted model; residual covariance and sums of squares of the derivative targets."""
    support = np.asarray(old.support, dtype=bool)
    m = support.shape[1]
    k = support.sum(axis=0)
    n = float(derivative_stats.n)
    dof = n - (int(k.max()) if k.size else 0)
    noise_cov = (
        derivative_stats.residual_products(coef) / dof if dof > 0 else np.full((m, m), np.nan)
    )
    return LocalFit(
        terms=list(old.terms),
        coef=coef,
        support=support,
        stderr=stderr,
        noise_cov=noise_cov,
        n_samples=old.n_samples,
        threshold=np.array(old.threshold, copy=True),
        rss=derivative_stats.rss(coef),
        n_params=old.n_params,
        path=old.path,
    )
