"""Benchmark of the regime refinement (marker ``perf``; run with ``pytest tests/perf -m perf -s``).

K = 3 regimes, 3 states, 10^6 samples; affine local models, and sparse models on the degree-2
polynomial terms (the default); affine models again with the discrete form's fits on stretch
interiors (discrete form: the last row of each stretch left out of the fits).  Reported as
ratios against floors measured in the same run, each time the shortest of three calls (the
machine is shared):

* time of the full refinement / time of one ``accumulate`` pass over the same data and terms
  (target <= 10);
* peak traced memory during a second, untimed refinement (tracemalloc) / size of the input
  array Z (target <= 3).
"""

from __future__ import annotations

import time
import tracemalloc

import numpy as np
import pytest

from modemap.fit.local_model import AffineLocalModel, BoundLocalModel, SparseLocalModel
from modemap.fit.statistics import accumulate
from modemap.regimes.refine import RefineSettings, refine
from modemap.regimes.rows import Rows, RowWork
from modemap.regimes.viterbi import viterbi
from modemap.terms.library import TermLibrary

pytestmark = pytest.mark.perf

N, K, M = 1_000_000, 3, 3


def _data(seed: int = 0) -> tuple[np.ndarray, np.ndarray, np.ndarray, np.ndarray]:
    rng = np.random.default_rng(seed)
    # persistent regime sequence: blocks of random length
    lengths = rng.integers(200, 2000, size=N // 200)
    labels = np.repeat(np.arange(lengths.size) % K, lengths)[:N]
    z = rng.standard_normal((N, M))
    a = rng.uniform(-0.9, 0.9, size=(K, M, M))
    c = rng.uniform(-2.0, 2.0, size=(K, M))
    y = np.einsum("nj,njm->nm", z, a[labels]) + c[labels] + 0.1 * rng.standard_normal((N, M))
    start = labels.copy()
    flip = rng.random(N) < 0.1  # a proposal with 10 % of the labels wrong
    start[flip] = rng.integers(0, K, int(flip.sum()))
    return z, y, labels, start


def _best_of(repeat: int, func) -> tuple[float, object]:
    """Shortest wall time of ``repeat`` calls (the machine is shared) and the last result."""
    best, out = np.inf, None
    for _ in range(repeat):
        t0 = time.perf_counter()
        out = func()
        best = min(best, time.perf_counter() - t0)
    return best, out


@pytest.mark.parametrize(
    ("model", "degree", "interior"),
    [("affine", 1, False), ("sparse", 2, False), ("affine", 1, True)],
)
def test_refinement_speed_and_memory(model: str, degree: int, interior: bool) -> None:
    z, y, truth, start = _data()
    library = TermLibrary(degree=degree).fit(["a", "b", "c"])
    lengths = np.array([N // 4] * 4)
    floor, _ = _best_of(3, lambda: accumulate(library, z, y))
    emissions = np.zeros((N, K)) - np.arange(K)
    chain = np.zeros(K) - np.log(K), np.log(np.full((K, K), 1 / K))
    t_viterbi, _ = _best_of(3, lambda: viterbi(emissions, *chain))

    spec = AffineLocalModel() if model == "affine" else SparseLocalModel()
    form = "discrete" if interior else "continuous"  # discrete: fits on stretch interiors
    local = BoundLocalModel(spec, library, ("a", "b", "c"), form)
    work = RowWork(Rows.of(z, y, lengths))

    def run():
        settings = RefineSettings(local=local, max_iter=30)
        return refine(work, start, settings, n_regimes=K)

    elapsed, result = _best_of(3, run)
    # memory in a separate, traced run: tracemalloc slows every allocation, so it is not timed
    tracemalloc.start()
    run()
    _, peak = tracemalloc.get_traced_memory()
    tracemalloc.stop()
    accuracy = np.mean(result.labels == truth)
    per_iteration = elapsed / result.monitor.iterations / floor
    print(
        f"\n{model}{', interior' if interior else ''}, {library.n_terms_} terms: accumulate "
        f"pass {floor:.3f} s; viterbi "
        f"{t_viterbi:.3f} s; refinement {elapsed:.3f} s ({result.monitor.iterations} iterations, "
        f"ratio {elapsed / floor:.1f}, per iteration {per_iteration:.1f}); peak memory "
        f"{peak / 1e6:.0f} MB = {peak / z.nbytes:.2f} x input ({z.nbytes / 1e6:.0f} MB); "
        f"label accuracy {accuracy:.4f}"
    )
    assert accuracy > 0.99


def test_integral_refit_speed_and_memory() -> None:
    """The continuous form's final refit (modemap.regimes.integral): windows of 16 intervals,
    noise compensation and re-selection of the degree-2 terms, on the true labels; reported
    against one ``accumulate`` pass, like the refinement (no target: measured figures are in
    docs/performance.md)."""
    from modemap.fit.statistics import accumulate_by_label
    from modemap.regimes.integral import integral_refit

    z, y, truth, _ = _data()
    library = TermLibrary(degree=2).fit(["a", "b", "c"])
    lengths = np.array([N // 4] * 4)
    time_ = 0.01 * np.arange(N)
    floor, _ = _best_of(3, lambda: accumulate(library, z, y))
    stats = accumulate_by_label(library, z, y, truth, K)
    local = BoundLocalModel(SparseLocalModel(), library, ("a", "b", "c"), "continuous")
    fits = local.fit_all(stats)

    def run():
        rows = Rows.of(z, y, lengths, time_)
        return integral_refit(library, rows, truth, fits, stats, select=local.fit)

    elapsed, result = _best_of(3, run)
    tracemalloc.start()
    run()
    _, peak = tracemalloc.get_traced_memory()
    tracemalloc.stop()
    print(
        f"\nintegral refit, {library.n_terms_} terms, {int(result.n_windows.sum())} windows: "
        f"accumulate pass {floor:.3f} s; refit {elapsed:.3f} s (ratio {elapsed / floor:.1f}); "
        f"peak memory {peak / 1e6:.0f} MB = {peak / z.nbytes:.2f} x input"
    )
    assert np.all(np.isfinite(np.concatenate([f.coef.ravel() for f in result.fits])))
