"""Tests of modemap.fit.statistics: additive normal-equation statistics."""

from __future__ import annotations

import numpy as np
import pytest

from modemap.fit.statistics import GramStats, accumulate, accumulate_by_label
from modemap.terms.library import TermLibrary


@pytest.fixture
def data() -> tuple[TermLibrary, np.ndarray, np.ndarray]:
    rng = np.random.default_rng(0)
    Z = rng.normal(size=(1000, 3)) * [1.0, 5.0, 0.1] + [0.0, 2.0, 10.0]
    Y = rng.normal(size=(1000, 2))
    return TermLibrary(degree=2).fit(["x", "y", "u"]), Z, Y


def _close(a: GramStats, b: GramStats, rtol: float = 1e-10) -> None:
    for name in ("gram", "cross", "yy", "term_sum", "target_sum"):
        x, y = getattr(a, name), getattr(b, name)
        # relative to the largest entry (common practice for sums of products)
        np.testing.assert_allclose(x, y, rtol=0, atol=rtol * np.abs(y).max(), err_msg=name)
    assert a.n == b.n


def test_from_arrays_matches_numpy_products(data) -> None:
    lib, Z, Y = data
    theta = lib.transform(Z)
    s = GramStats.from_arrays(theta, Y)
    # reference: numpy dot products computed elementwise with einsum
    np.testing.assert_allclose(s.gram, np.einsum("ni,nj->ij", theta, theta), rtol=1e-12)
    np.testing.assert_allclose(s.cross, np.einsum("ni,nj->ij", theta, Y), rtol=1e-12)
    assert s.n == 1000


def test_chunked_accumulate_equals_sum_of_chunks(data) -> None:
    lib, Z, Y = data
    whole = GramStats.from_arrays(lib.transform(Z), Y)
    _close(accumulate(lib, Z, Y, chunk_size=97), whole)
    parts = [
        GramStats.from_arrays(lib.transform(Z[i : i + 250]), Y[i : i + 250])
        for i in range(0, 1000, 250)
    ]
    _close(sum(parts), whole)


def test_by_label_sums_to_whole_and_skips_negative(data) -> None:
    lib, Z, Y = data
    labels = np.random.default_rng(1).integers(-1, 3, size=1000)
    per = accumulate_by_label(lib, Z, Y, labels, 4, chunk_size=128)
    assert per[3].n == 0
    keep = labels >= 0
    _close(sum(per), GramStats.from_arrays(lib.transform(Z[keep]), Y[keep]))
    one = labels == 1
    _close(per[1], GramStats.from_arrays(lib.transform(Z[one]), Y[one]))


def test_rss_and_residual_products_from_stats(data) -> None:
    lib, Z, Y = data
    theta = lib.transform(Z)
    coef = np.linalg.lstsq(theta, Y, rcond=None)[0] + 0.01
    s = GramStats.from_arrays(theta, Y)
    resid = Y - theta @ coef
    np.testing.assert_allclose(s.rss(coef), (resid**2).sum(axis=0), rtol=1e-8)
    np.testing.assert_allclose(s.residual_products(coef), resid.T @ resid, rtol=1e-8)


def test_weights_subtraction_and_scale(data) -> None:
    lib, Z, Y = data
    theta = lib.transform(Z)
    w = np.r_[np.full(500, 2.0), np.ones(500)]
    a = GramStats.from_arrays(theta[:500], Y[:500])
    b = GramStats.from_arrays(theta[500:], Y[500:])
    _close(GramStats.from_arrays(theta, Y, weight=w), 2 * a + b)
    _close((a + b) - b, a)
    # RMS per column (common practice normalisation)
    np.testing.assert_allclose((a + b).column_scale(), np.sqrt((theta**2).mean(axis=0)))


def test_mismatched_rows_raise(data) -> None:
    lib, Z, Y = data
    with pytest.raises(ValueError, match="same number of rows"):
        accumulate(lib, Z, Y[:10])


def test_by_label_contiguous_segments(data) -> None:
    # regime-like labels: long constant stretches (whole blocks take the single-label path)
    lib, Z, Y = data
    labels = np.repeat([0, 1, -1, 0, 2], 200)
    per = accumulate_by_label(lib, Z, Y, labels, 3, chunk_size=64)
    for k in range(3):
        rows = labels == k
        _close(per[k], GramStats.from_arrays(lib.transform(Z[rows]), Y[rows]))
