"""The start from cuts of the variable space (modemap.regimes.partition).

Worked examples with exact answers: a field made of affine pieces that meet on a line is fitted
with no residual by one affine model on each side of that line, and with a residual by any
other cut, so the least-squares cut (Breiman et al., Classification and Regression Trees, 1984;
affine leaves as in Quinlan's model trees, 1992) is the line, up to the spacing of the positions
tried.
"""

from __future__ import annotations

import numpy as np

from modemap.regimes.partition import partition_start


def _plane(n: int, seed: int) -> np.ndarray:
    return np.random.default_rng(seed).uniform(0.0, 1.0, size=(n, 2))


def test_a_kink_is_cut_where_the_two_affine_pieces_meet() -> None:
    z = _plane(6400, 0)
    y = np.abs(z[:, :1] - 0.37)  # continuous across x1 = 0.37, two slopes
    labels = partition_start(z, y, 2, min_rows=30)
    assert labels is not None
    # positions are 1/64 of the rows apart: 0.016 in x1 here
    left, right = z[:, 0] < 0.37 - 0.02, z[:, 0] > 0.37 + 0.02
    assert np.unique(labels[left]).size == 1 and np.unique(labels[right]).size == 1
    assert labels[left][0] != labels[right][0]


def test_three_bands_along_a_diagonal() -> None:
    # two kinks along x1 + x2 (a direction the cut tries), second state affine throughout
    z = _plane(9000, 1)
    s = z[:, 0] + z[:, 1]
    y = np.column_stack([np.abs(s - 0.7) + 2.0 * np.maximum(s - 1.3, 0.0), 3.0 * z[:, 0] - z[:, 1]])
    labels = partition_start(z, y, 3, min_rows=30)
    assert labels is not None
    truth = (s > 0.7).astype(int) + (s > 1.3)
    agree = max(
        np.mean(labels == np.asarray(p)[truth])
        for p in ([0, 1, 2], [0, 2, 1], [1, 0, 2], [1, 2, 0], [2, 0, 1], [2, 1, 0])
    )
    assert agree > 0.97


def test_no_cut_without_enough_rows_on_both_sides() -> None:
    z = _plane(50, 2)
    assert partition_start(z, z[:, :1] ** 2, 2, min_rows=30) is None


def test_a_command_constant_on_each_side_is_cut_where_it_switches() -> None:
    # a logged 0/1 command that selects the regime is constant on each side of its own cut,
    # so each side's affine fit has a column equal to the constant one (collinear)
    x = np.random.default_rng(3).uniform(0.0, 1.0, size=4000)
    command = (x > 0.6).astype(float)
    z = np.column_stack([x, command])
    y = np.where(command > 0, 3.0 - 2.0 * x, 0.5 * x)[:, None]
    labels = partition_start(z, y, 2, min_rows=30)
    assert labels is not None
    np.testing.assert_array_equal(labels == labels[np.argmax(command)], command > 0)


def test_cuts_found_on_a_subsample_are_applied_to_every_row(monkeypatch) -> None:
    import modemap.regimes.partition as partition

    monkeypatch.setattr(partition, "MAX_ROWS", 800)
    z = _plane(6400, 4)
    y = np.abs(z[:, :1] - 0.37)
    labels = partition.partition_start(z, y, 2, min_rows=30)
    assert labels is not None and labels.size == 6400
    # 800 rows: positions 1/64 of them apart, about 0.016 in x1, as with every row
    left, right = z[:, 0] < 0.37 - 0.03, z[:, 0] > 0.37 + 0.03
    assert np.unique(labels[left]).size == 1 and np.unique(labels[right]).size == 1
    assert labels[left][0] != labels[right][0]
