"""A start from where the variables sit: the space cut by hyperplanes into regions, each
with its own affine model of the targets.

Regimes selected by a memoryless switching surface occupy regions of the state and input
space.  When their models differ by little against the noise (a continuous piecewise-affine
field, whose pieces agree on the boundaries), clustering the features or the residuals does
not find those regions; a cut of the space does.  Regions are grown greedily, as in a model
tree: starting from one region holding every row, ``K - 1`` times the cut that lowers the
residual sum of squares of the regions' affine least-squares fits the most is made, over
every current region, a set of directions (each variable's axis and the sum and difference
of every pair of states, on standardised variables) and every position along each direction that
leaves enough rows on both sides (the greedy least-squares split of regression trees:
Breiman, Friedman, Olshen and Stone, "Classification and Regression Trees", Wadsworth,
1984; with an affine model in each leaf, as in Quinlan's model trees, "Learning with
continuous classes", Proc. 5th Australian Joint Conference on Artificial Intelligence,
1992).  A greedy cut can fall between two boundaries (one cut of a field with two kinks is
best between them), so every pair of regions is then joined and cut again, while that
lowers the residual sum of squares.  The cuts are straight and along few directions; the
refinement that follows moves the switches where the dynamics put them.  Above
:data:`MAX_ROWS` rows the cuts are found on that many rows evenly spaced through the data and
then applied to every row (the start only needs to be roughly right; its cost stays bounded).
"""

from __future__ import annotations

import itertools

import numpy as np

__all__ = ["MAX_ROWS", "partition_start"]

MAX_ROWS = 20_000
"""Rows the cuts are searched on at most (as the HMM proposals' fit)."""

#: Positions tried along each direction (evenly spaced ranks; along a direction with at most
#: as many distinct values, every change of value as well).
_POSITIONS = 64

#: Passes over the pairs of regions, each pair joined and cut again (at most).
_PASSES = 3


def partition_start(
    z: np.ndarray, y: np.ndarray, k: int, min_rows: int, paired: int | None = None
) -> np.ndarray | None:
    """Labels of ``k`` regions cut greedily (see the module notes), or None when no cut
    leaves ``min_rows`` rows on each side.

    Parameters
    ----------
    z : ndarray of shape (n, p)
        The variables the regions are cut in (states and inputs).
    y : ndarray of shape (n, m)
        The targets (derivatives or next samples).
    k : int
        Regions wanted.
    min_rows : int
        Fewest rows a region may hold.
    paired : int or None, default None
        The leading columns of ``z`` whose pairs give directions (the states); None: all.

    Returns
    -------
    ndarray of int of shape (n,) or None
    """
    z = np.asarray(z, dtype=np.float64)
    y = np.asarray(y, dtype=np.float64)
    p = z.shape[1]
    scale = z.std(axis=0)
    scale[~(scale > 0)] = 1.0
    zs_all = (z - z.mean(axis=0)) / scale
    take = np.linspace(0, z.shape[0] - 1, min(z.shape[0], MAX_ROWS)).astype(np.int64)
    zs, y = zs_all[take], y[take]
    n = zs.shape[0]
    G = np.hstack([np.ones((n, 1)), zs])
    ok = np.all(np.isfinite(y), axis=1) & np.all(np.isfinite(G), axis=1)
    # every target on the scale of its residual under one affine model of all rows
    coef = np.linalg.lstsq(G[ok], y[ok], rcond=None)[0]
    # (a target the affine model fits to round-off is not blown up to the others' scale)
    spread = np.maximum((y[ok] - G[ok] @ coef).std(axis=0), 1e-3 * y[ok].std(axis=0))
    y = np.where(ok[:, None], y / np.where(spread > 0, spread, 1.0), 0.0)
    G = np.where(ok[:, None], G, 0.0)
    directions = [np.eye(p)[i] for i in range(p)]
    for i, j in itertools.combinations(range(p if paired is None else min(paired, p)), 2):
        for sign in (1.0, -1.0):
            d = np.zeros(p)
            d[i], d[j] = 1.0, sign
            directions.append(d / np.sqrt(2.0))
    labels = np.zeros(n, dtype=np.int64)
    min_rows = max(int(min_rows), G.shape[1] + 1)
    cuts: list[tuple[int, int, np.ndarray, float]] = []  # (lower, upper, direction, at)
    for new in range(1, k):
        best = None
        for region in range(new):
            rows = np.flatnonzero(labels == region)
            base = _rss(G[rows], y[rows])
            for d in directions:
                cut = _best_cut(zs[rows] @ d, G[rows], y[rows], min_rows)
                if cut is not None and (best is None or base - cut[0] > best[0]):
                    best = (base - cut[0], region, d, cut[1])
        if best is None:
            return None
        _, region, d, at = best
        cuts.append((region, new, d, at))
        _apply(labels, zs, cuts[-1])
    for _ in range(_PASSES):  # every pair of regions joined and cut again, while that helps
        moved = False
        for a, b in itertools.combinations(range(k), 2):
            rows = np.flatnonzero((labels == a) | (labels == b))
            now = _rss(G[labels == a], y[labels == a]) + _rss(G[labels == b], y[labels == b])
            found = [(_best_cut(zs[rows] @ d, G[rows], y[rows], min_rows), d) for d in directions]
            found = [(c, d) for c, d in found if c is not None]
            if not found:
                continue
            (rss, at), d = min(found, key=lambda f: f[0][0])
            if rss < (1.0 - 1e-9) * now:
                cuts.append((a, b, d, at))
                _apply(labels, zs, cuts[-1])
                moved = True
        if not moved:
            break
    if n == zs_all.shape[0]:
        return labels
    out = np.zeros(zs_all.shape[0], dtype=np.int64)
    for cut in cuts:  # the same cuts, in order, on every row
        _apply(out, zs_all, cut)
    return out


def _apply(labels: np.ndarray, zs: np.ndarray, cut: tuple[int, int, np.ndarray, float]) -> None:
    """Rows of regions ``lower`` and ``upper`` at or above ``at`` along the direction go to
    ``upper``, the others to ``lower`` (in place)."""
    lower, upper, d, at = cut
    rows = np.flatnonzero((labels == lower) | (labels == upper))
    above = zs[rows] @ d >= at
    labels[rows] = np.where(above, upper, lower)


def _rss(G: np.ndarray, y: np.ndarray) -> float:
    coef = np.linalg.lstsq(G, y, rcond=None)[0]
    return float(((y - G @ coef) ** 2).sum())


def _best_cut(
    s: np.ndarray, G: np.ndarray, y: np.ndarray, min_rows: int
) -> tuple[float, float] | None:
    """The position along ``s`` whose two sides' affine fits leave the least residual sum of
    squares: ``(rss, the least value of s on the upper side)``, or None when the rows are
    too few to cut."""
    n = s.size
    if n < 2 * min_rows:
        return None
    order = np.argsort(s, kind="stable")
    Gs, ys = G[order], y[order]
    q = G.shape[1]
    gg = np.einsum("ni,nj->nij", Gs, Gs).cumsum(axis=0)
    gy = np.einsum("ni,nj->nij", Gs, ys).cumsum(axis=0)
    yy = (ys * ys).sum(axis=1).cumsum()
    sorted_s = s[order]
    at = np.linspace(min_rows, n - min_rows, _POSITIONS).astype(np.int64)
    steps = np.flatnonzero(np.diff(sorted_s) > 0) + 1
    if steps.size <= _POSITIONS:  # a variable of few values (a command): every step of it
        at = np.concatenate([at, steps[(steps >= min_rows) & (steps <= n - min_rows)]])
    at = np.unique(at)
    at = at[sorted_s[at] > sorted_s[at - 1]]  # never inside a run of equal values
    if not at.size:
        return None

    def side_rss(A: np.ndarray, B: np.ndarray, c: np.ndarray) -> np.ndarray:
        # a ridge relative to each side's scale keeps collinear columns solvable (a
        # variable constant on one side); it moves the sums of squares by ~1e-8 relative
        ridge = 1e-8 * (np.trace(A, axis1=1, axis2=2) / q)[:, None, None] * np.eye(q)
        sol = np.linalg.solve(A + ridge, B)
        return c - np.einsum("kij,kij->k", B, sol)

    lower = side_rss(gg[at - 1], gy[at - 1], yy[at - 1])
    upper = side_rss(gg[-1] - gg[at - 1], gy[-1] - gy[at - 1], yy[-1] - yy[at - 1])
    total = lower + upper
    i = int(np.argmin(total))
    return float(total[i]), float(sorted_s[at[i]])
