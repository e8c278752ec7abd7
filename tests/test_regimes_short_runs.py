"""Many short runs side by side (modemap.regimes.short_runs) against hmmlearn run by run.

The reference is hmmlearn's own compiled recursions (forward-backward, Viterbi, the Gaussian
HMM's expectation step), called one run at a time as before; the batched code must give the
same paths exactly and the same probabilities and statistics to round-off.
"""

from __future__ import annotations

import importlib

import numpy as np
import pytest
from hmmlearn import hmm

from modemap.regimes.proposal import _ShortRunsHMM, propose
from modemap.regimes.short_runs import MIN_BATCH, SHORT_RUN, batched

chain = importlib.import_module("modemap.regimes.viterbi")


def _chain(rng: np.random.Generator, k: int) -> tuple[np.ndarray, np.ndarray]:
    return np.log(rng.dirichlet(np.ones(k))), np.log(rng.dirichlet(np.ones(k), size=k))


@pytest.mark.parametrize("seed", range(6))
def test_viterbi_and_forward_backward_match_hmmlearn_run_by_run(seed) -> None:
    rng = np.random.default_rng(seed)
    k = int(rng.integers(2, 5))
    # short runs of every length, and (odd seeds) long runs mixed in
    lengths = rng.integers(1, SHORT_RUN + 1, size=40)
    if seed % 2:
        lengths = np.concatenate([lengths, [300, SHORT_RUN + 1]])
        rng.shuffle(lengths)
    e = rng.normal(size=(int(lengths.sum()), k)) * 3
    e[rng.random(e.shape) < 0.05] = -np.inf  # impossible regimes at some rows
    e[np.isinf(e).all(axis=1), 0] = 0.0
    log_start, log_trans = _chain(rng, k)
    assert batched(lengths).any()

    path, log_prob = chain.viterbi_runs(e, lengths, log_start, log_trans)
    ref = chain._checked(e, lengths, log_start, log_trans)[0]
    ref_path, ref_prob = chain._viterbi_hmmlearn(ref, lengths, log_start, log_trans)
    np.testing.assert_array_equal(path, ref_path)
    assert log_prob == pytest.approx(ref_prob, rel=1e-12, abs=1e-9)

    total, post = chain.forward_backward(e, lengths, log_start, log_trans)
    ref_total, ref_post = chain._forward_backward_hmmlearn(ref, lengths, log_start, log_trans)
    assert total == pytest.approx(ref_total, rel=1e-12, abs=1e-9)
    np.testing.assert_allclose(post, ref_post, atol=1e-10)


def test_few_short_runs_take_hmmlearn_unchanged() -> None:
    # fewer than MIN_BATCH short runs: exactly the earlier code path (bit for bit)
    rng = np.random.default_rng(7)
    lengths = np.array([5] * (MIN_BATCH - 1) + [500])
    e = rng.normal(size=(int(lengths.sum()), 3))
    log_start, log_trans = _chain(rng, 3)
    assert not batched(lengths).any()
    total, post = chain.forward_backward(e, lengths, log_start, log_trans)
    ref_total, ref_post = chain._forward_backward_hmmlearn(e, lengths, log_start, log_trans)
    assert total == ref_total and np.array_equal(post, ref_post)


@pytest.mark.parametrize("covariance", ["full", "diag"])
def test_expectation_step_matches_hmmlearn(covariance) -> None:
    rng = np.random.default_rng(3)
    lengths = np.concatenate([rng.integers(2, 30, size=200), [400]])
    n = int(lengths.sum())
    x = rng.normal(size=(n, 2)) + rng.integers(0, 2, n)[:, None]
    models = []
    for cls in (hmm.GaussianHMM, _ShortRunsHMM):
        m = cls(n_components=3, covariance_type=covariance, random_state=0, init_params="mc")
        m.startprob_ = np.full(3, 1 / 3)
        m.transmat_ = np.full((3, 3), 0.05) + np.eye(3) * 0.85
        m._init(x, lengths)
        models.append(m)
    models[1].means_, models[1].covars_ = models[0].means_, models[0]._covars_
    (ref, ref_lp), (got, got_lp) = (m._do_estep(x, lengths) for m in models)
    assert got_lp == pytest.approx(ref_lp, rel=1e-12)
    assert set(got) == set(ref)
    for key in ref:
        np.testing.assert_allclose(got[key], ref[key], rtol=1e-9, atol=1e-9, err_msg=key)
    assert models[1].score(x, lengths) == pytest.approx(models[0].score(x, lengths), rel=1e-12)


def test_proposal_on_many_short_runs_matches_the_run_by_run_fit(monkeypatch) -> None:
    # two well-separated operating points, 300 runs of 10 samples (invented)
    rng = np.random.default_rng(0)
    lengths = np.full(300, 10)
    truth = np.repeat(rng.integers(0, 2, 300), 10)
    features = np.column_stack([truth * 3.0, truth * -2.0]) + rng.normal(size=(3000, 2)) * 0.3
    labels = propose(features, lengths, 2, seed=0)
    monkeypatch.setattr("modemap.regimes.short_runs.MIN_BATCH", 10**9)  # hmmlearn only
    reference = propose(features, lengths, 2, seed=0)
    np.testing.assert_array_equal(labels, reference)


@pytest.mark.parametrize("name", ["buck", "reactor", "water_heaters"])
def test_the_bundled_demos_take_the_run_by_run_path(name) -> None:
    # their runs are long: nothing is batched, so their fits are what they were before the
    # batching (model files compared byte for byte when it was added)
    from pathlib import Path

    from modemap.data.intake import read_data

    root = Path(__file__).resolve().parents[1] / "datasets"
    states = {"buck": ["i_L", "v_C"], "reactor": ["C_A", "T"], "water_heaters": ["T"]}[name]
    ds = read_data(root / f"{name}.csv", time="t", states=states, run="run")
    lengths = np.array([r.n_samples for r in ds.runs])
    assert not batched(lengths).any()
    assert not batched(lengths - 1).any()  # discrete form: one row fewer per run
