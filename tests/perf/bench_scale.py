"""Scale benchmark (marker ``perf``; run with ``pytest tests/perf/bench_scale.py -m perf -s``).

Runs :mod:`modemap.app.bench` (fresh subprocess per measurement) and prints its tables: wall time
and peak memory per stage against the floor measured in the same run, the growth exponent of
time in N, and the two-regime autoregression against statsmodels.  Sizes come from
``MODEMAP_BENCH_SIZES`` (default ``1e5,1e6``; the full set of docs/performance.md is
``1e5,1e6,1e7``).  The speed targets are printed, not enforced: only the quality of the fit
(the invented system's three regimes are found) decides pass or fail.
"""

from __future__ import annotations

import argparse
import json
import os
from pathlib import Path

import pytest

from modemap.app import bench

pytestmark = pytest.mark.perf


def test_scale_benchmark(tmp_path: Path) -> None:
    sizes = os.environ.get("MODEMAP_BENCH_SIZES", "1e5,1e6")
    parser = argparse.ArgumentParser()
    bench.add_arguments(parser)
    out = tmp_path / "bench.json"
    args = parser.parse_args(["--sizes", sizes, "--workdir", str(tmp_path), "--json", str(out)])
    assert bench.run(args) == 0
    results = json.loads(out.read_text())  # the tables were printed by bench.run
    for entry in results["sizes"]:
        fit = entry["fit"]
        assert "error" not in fit, fit
        assert fit["n_regimes"] == 3  # the invented system has three regimes
        assert fit["agreement"] > 0.95  # adjusted Rand index against the true regimes
    markov = results["markov"]
    # statsmodels' maximum likelihood is the reference: ours must be as accurate
    assert markov["ours_error"] <= markov["statsmodels_error"] + 0.01
