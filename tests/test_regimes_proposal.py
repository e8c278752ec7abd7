"""HMM proposal: recovers a simulated Markov chain; density checked against scipy."""

from __future__ import annotations

import numpy as np
import pytest
from scipy.optimize import linear_sum_assignment
from scipy.stats import multivariate_normal

from modemap.regimes.proposal import gaussian_log_density, propose


def _chain(n: int, k: int, seed: int, stay: float = 0.99) -> np.ndarray:
    rng = np.random.default_rng(seed)
    s = np.zeros(n, dtype=np.int64)
    u = rng.random(n)
    jump = rng.integers(1, k, n)
    for t in range(1, n):
        s[t] = (s[t - 1] + jump[t]) % k if u[t] > stay else s[t - 1]
    return s


def _agreement(a: np.ndarray, b: np.ndarray, k: int) -> float:
    """Best agreement over id permutations (scipy's assignment solver)."""
    c = np.array([[np.sum((a == i) & (b == j)) for j in range(k)] for i in range(k)])
    r, cidx = linear_sum_assignment(-c)
    return c[r, cidx].sum() / a.size


@pytest.fixture(scope="module")
def blobs() -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    s = _chain(6000, 3, seed=4)
    rng = np.random.default_rng(5)
    centres = np.array([[0.0, 0.0], [3.0, 1.0], [0.0, 4.0]])
    x = centres[s] + rng.standard_normal((s.size, 2))
    return x, s, np.array([2500, 3500])


def test_recovers_simulated_chain(blobs) -> None:
    x, s, lengths = blobs
    labels = propose(x, lengths, 3, seed=0)
    assert _agreement(labels, s, 3) >= 0.97  # simulated truth


def test_subsampled_fit_and_determinism(blobs) -> None:
    x, s, lengths = blobs
    full = propose(x, lengths, 3, seed=0)
    sub = propose(x, lengths, 3, seed=0, max_samples=3000)  # windows of the data only
    assert _agreement(sub, s, 3) >= 0.97
    np.testing.assert_array_equal(full, propose(x, lengths, 3, seed=0))


def test_single_regime_is_trivial(blobs) -> None:
    x, _, lengths = blobs
    assert np.all(propose(x, lengths, 1) == 0)


def test_gaussian_log_density_matches_scipy() -> None:
    rng = np.random.default_rng(0)
    x = rng.standard_normal((50, 3))
    means = rng.standard_normal((2, 3))
    a = rng.standard_normal((2, 3, 3))
    covs = a @ a.transpose(0, 2, 1) + np.eye(3)
    ours = gaussian_log_density(x, means, covs)
    for k in range(2):  # reference: scipy.stats.multivariate_normal
        ref = multivariate_normal(means[k], covs[k]).logpdf(x)
        np.testing.assert_allclose(ours[:, k], ref, rtol=1e-7)
