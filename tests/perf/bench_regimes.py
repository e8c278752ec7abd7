"""Benchmark of the regime refinement (marker ``perf``; run with ``pytest tests/perf -m perf -s``).

K = 3 regimes, 3 states, 10^6 samples, affine local models.  Reported as ratios against floors
measured in the same run:

* time of the full refinement / time of one ``accumulate`` pass over the same data (target <= 10);
* peak traced memory during the refinement (tracemalloc) / size of the input array Z
  (target <= 3).
"""

from __future__ import annotations

import time
import tracemalloc

import numpy as np
import pytest

from modemap.regimes.refine import refine
from modemap.regimes.viterbi import viterbi
from modemap.stats import accumulate
from modemap.terms import TermLibrary

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


def test_refinement_speed_and_memory() -> None:
    z, y, truth, start = _data()
    library = TermLibrary(degree=1).fit(["a", "b", "c"])
    lengths = np.array([N // 4] * 4)
    t0 = time.perf_counter()
    accumulate(library, z, y)
    floor = time.perf_counter() - t0
    t0 = time.perf_counter()
    viterbi(
        np.zeros((N, K)) - np.arange(K), np.zeros(K) - np.log(K), np.log(np.full((K, K), 1 / K))
    )
    t_viterbi = time.perf_counter() - t0
    tracemalloc.start()
    t0 = time.perf_counter()
    result = refine(z, y, lengths, start, library, n_regimes=K, model="affine", max_iter=30)
    elapsed = time.perf_counter() - t0
    _, peak = tracemalloc.get_traced_memory()
    tracemalloc.stop()
    accuracy = np.mean(result.labels == truth)
    print(
        f"\naccumulate pass {floor:.3f} s; viterbi {t_viterbi:.3f} s; refinement {elapsed:.3f} s "
        f"({result.monitor.iterations} iterations, ratio {elapsed / floor:.1f}, per iteration "
        f"{elapsed / result.monitor.iterations / floor:.1f}); peak memory {peak / 1e6:.0f} MB = "
        f"{peak / z.nbytes:.2f} x input ({z.nbytes / 1e6:.0f} MB); label accuracy {accuracy:.4f}"
    )
    assert accuracy > 0.99
