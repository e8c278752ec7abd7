"""Local models on windows of rows, checked against numpy's least squares (reference)."""

from __future__ import annotations

import numpy as np

from modemap.regimes.windows import window_coefficients, window_lengths
from modemap.terms.library import TermLibrary


def test_window_lengths_cover_every_run() -> None:
    per_run, sizes = window_lengths(np.array([50, 7, 36]), 12)
    assert per_run.tolist() == [4, 1, 3]
    # the rows left over join the last window of their run; a short run is one window
    assert sizes.tolist() == [12, 12, 12, 14, 7, 12, 12, 12]


def test_coefficients_are_per_window_least_squares() -> None:
    rng = np.random.default_rng(0)
    z = rng.normal(size=(300, 2))
    y = np.column_stack([1.0 + 2.0 * z[:, 0], -z[:, 1]]) + 0.1 * rng.normal(size=(300, 2))
    library = TermLibrary(degree=1).fit(["a", "b"])
    _, sizes = window_lengths(np.array([300]), 25)
    got = window_coefficients(library, z, y, sizes, prior=1e-9)  # (almost) no shrinkage
    theta = library.transform(z)
    start = 0
    for w, size in enumerate(sizes):
        rows = slice(start, start + size)
        ref = np.linalg.lstsq(theta[rows], y[rows], rcond=None)[0]  # reference: numpy
        np.testing.assert_allclose(got[w], ref.ravel(), rtol=1e-6, atol=1e-8)
        start += size


def test_windows_without_information_stay_near_the_global_fit() -> None:
    # y = 3 x + 1 on all rows; in the last window x is constant, so its slope and intercept
    # cannot be told apart there: the shrinkage keeps them at the global values
    rng = np.random.default_rng(1)
    x = np.concatenate([rng.normal(size=240), np.full(12, 0.5)])
    y = 3.0 * x + 1.0
    library = TermLibrary(degree=1).fit(["x"])
    _, sizes = window_lengths(np.array([252]), 12)
    coef = window_coefficients(library, x[:, None], y[:, None], sizes)
    np.testing.assert_allclose(coef[-1], [1.0, 3.0], rtol=1e-6)
    np.testing.assert_allclose(coef[:-1], np.tile([1.0, 3.0], (sizes.size - 1, 1)), rtol=1e-6)
