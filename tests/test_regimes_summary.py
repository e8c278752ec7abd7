"""Regime statistics and label hygiene, checked against independent pandas/itertools counts."""

from __future__ import annotations

import itertools

import numpy as np
import pandas as pd
import pytest

from modemap.regimes.hygiene import drop_small, enforce_min_dwell, order_regimes
from modemap.regimes.summary import segments, statistics, switch_counts


def _reference_runs(labels: np.ndarray) -> list[tuple[int, int]]:
    """(label, length) of each stretch, with itertools.groupby (standard library)."""
    return [(int(k), len(list(g))) for k, g in itertools.groupby(labels.tolist())]


def test_segments_match_groupby() -> None:
    rng = np.random.default_rng(0)
    lab = np.repeat(rng.integers(0, 3, 50), rng.integers(1, 9, 50))
    start, length, seg = segments(lab)
    assert list(zip(seg.tolist(), length.tolist(), strict=True)) == _reference_runs(lab)
    assert start[0] == 0 and start[-1] + length[-1] == lab.size


def test_statistics_against_pandas() -> None:
    runs = [np.array([0, 0, 1, 1, 1, 0, 0, 0, 2, 2]), np.array([1, 1, 0, 0, 1, 1, 1])]
    stats = statistics(runs, 3, step=0.5)
    allp = pd.Series(np.concatenate(runs))
    # shares: pandas value_counts (normalised) as the reference
    for k, v in allp.value_counts(normalize=True).items():
        assert stats["share"][str(k)] == pytest.approx(v)
    # complete dwells (not touching a run end): run 0 -> (1: 3), (0: 3); run 1 -> (0: 2)
    assert stats["dwell"]["1"] == {
        "count": 1,
        "mean": 1.5,
        "median": 1.5,
        "min": 1.5,
        "max": 1.5,
        "censored": 2,
        "lower_bound": False,
    }
    assert stats["dwell"]["0"]["count"] == 2
    assert stats["dwell"]["0"]["mean"] == pytest.approx((3 + 2) / 2 * 0.5)
    # regime 2 only touches a run end: figures over censored dwells, flagged as lower bounds
    assert stats["dwell"]["2"]["lower_bound"] is True
    assert stats["dwell"]["2"]["max"] == pytest.approx(1.0)
    # switches inside runs only: run 0: 0->1, 1->0, 0->2; run 1: 1->0, 0->1 (never 2 -> 1)
    assert stats["transitions"] == [[0, 2, 1], [2, 0, 0], [0, 0, 0]]


def test_switch_counts_match_pandas_crosstab() -> None:
    rng = np.random.default_rng(1)
    runs = [rng.integers(0, 3, 200) for _ in range(3)]
    frm = np.concatenate([r[:-1] for r in runs])
    to = np.concatenate([r[1:] for r in runs])
    ref = pd.crosstab(frm, to).reindex(index=range(3), columns=range(3), fill_value=0)
    ref = ref.to_numpy().copy()
    np.fill_diagonal(ref, 0)
    np.testing.assert_array_equal(switch_counts(runs, 3), ref)


def test_drop_small_compacts_ids() -> None:
    lab = np.array([0] * 40 + [1] * 5 + [2] * 35)
    new, k, notes = drop_small(lab, 3, 30)
    assert k == 2
    np.testing.assert_array_equal(new, [0] * 40 + [-1] * 5 + [1] * 35)
    assert len(notes) == 1 and "regime 1" in notes[0]


def test_min_dwell_relabels_short_stretches() -> None:
    lab = np.array([0, 0, 0, 0, 1, 0, 0, 0, 2, 2, 2, 2, 1, 1])
    out = enforce_min_dwell(lab, np.array([8, 6]), 3)
    np.testing.assert_array_equal(out, [0, 0, 0, 0, 0, 0, 0, 0, 2, 2, 2, 2, 2, 2])
    # a short stretch at the start of a run takes the following regime
    out = enforce_min_dwell(np.array([1, 0, 0, 0]), np.array([4]), 2)
    np.testing.assert_array_equal(out, [0, 0, 0, 0])
    np.testing.assert_array_equal(enforce_min_dwell(lab, np.array([14]), 1), lab)


def test_order_by_first_state_mean_then_first_appearance() -> None:
    lab = np.array([2, 2, 0, 0, 1, 1, -1])
    x = np.array([1.0, 1.0, 5.0, 5.0, 1.0, 1.0, 9.0])
    new, order = order_regimes(lab, x, 3)
    # regimes 2 and 1 tie on the mean (1.0): 2 appears first -> id 0; regime 0 (mean 5) -> id 2
    np.testing.assert_array_equal(order, [2, 1, 0])
    np.testing.assert_array_equal(new, [0, 0, 2, 2, 1, 1, -1])
