"""Benchmark: one pass of statistics accumulation against building the term matrix.

Not part of CI (marker ``perf``; the file name keeps it out of default
collection).  Run with ``pytest tests/perf/bench_stats.py -m perf -s`` or
``python tests/perf/bench_stats.py``.

Target (DEVELOPERS.md "Speed targets"): ``accumulate()`` over 10^6 samples of
3 variables with the degree-3 library (20 terms) costs at most 1.5x the floor,
which is building the full term matrix once with numpy; refitting from the
statistics costs the same for any number of samples.
"""

from __future__ import annotations

import time

import numpy as np
import pytest

from modemap.fit.sparse import fit_sparse
from modemap.fit.statistics import accumulate
from modemap.terms.library import TermLibrary

N_SAMPLES = 1_000_000
TARGET_RATIO = 1.5


def _best_of(fns: dict[str, object], repeat: int = 7) -> dict[str, float]:
    """Best wall time of each function, runs interleaved so that load spikes hit all alike."""
    best = dict.fromkeys(fns, np.inf)
    for _ in range(repeat):
        for name, fn in fns.items():
            start = time.perf_counter()
            fn()
            best[name] = min(best[name], time.perf_counter() - start)
    return best


def measure(n: int = N_SAMPLES) -> dict[str, float]:
    rng = np.random.default_rng(0)
    Z = rng.normal(size=(n, 3))
    Y = rng.normal(size=(n, 3))
    lib = TermLibrary(degree=3).fit(["x", "y", "z"])
    assert lib.n_terms_ == 20
    stats = accumulate(lib, Z, Y)
    best = _best_of(
        {
            "floor": lambda: lib.transform(Z),
            "accumulate": lambda: accumulate(lib, Z, Y),
            "refit": lambda: fit_sparse(stats, lib.terms_),
        }
    )
    return {
        "n": n,
        "floor_s": best["floor"],
        "accumulate_s": best["accumulate"],
        "ratio": best["accumulate"] / best["floor"],
        "refit_s": best["refit"],
    }


@pytest.mark.perf
def test_accumulate_against_term_matrix_floor() -> None:
    out = measure()
    print(
        f"\nN={out['n']:,}: term matrix {out['floor_s'] * 1e3:.1f} ms, "
        f"accumulate {out['accumulate_s'] * 1e3:.1f} ms, ratio {out['ratio']:.2f} "
        f"(target <= {TARGET_RATIO}); refit from stats {out['refit_s'] * 1e3:.2f} ms"
    )
    assert out["ratio"] <= TARGET_RATIO


if __name__ == "__main__":
    for n in (100_000, N_SAMPLES):
        print(measure(n))
