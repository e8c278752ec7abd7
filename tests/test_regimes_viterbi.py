"""Viterbi decoding checked against hmmlearn's decoder (reference library)."""

from __future__ import annotations

import numpy as np
import pytest
from hmmlearn import hmm

from modemap.regimes.viterbi import viterbi, viterbi_runs


def _random_gaussian_hmm(rng: np.random.Generator, k: int) -> hmm.GaussianHMM:
    model = hmm.GaussianHMM(n_components=k, covariance_type="diag")
    model.startprob_ = rng.dirichlet(np.ones(k))
    model.transmat_ = rng.dirichlet(np.ones(k), size=k)
    model.means_ = rng.normal(size=(k, 2))
    model.covars_ = rng.uniform(0.5, 2.0, size=(k, 2))
    return model


@pytest.mark.parametrize("k", [2, 3, 5])
@pytest.mark.parametrize("seed", range(8))
def test_matches_hmmlearn_gaussian_with_lengths(k: int, seed: int) -> None:
    rng = np.random.default_rng(100 * k + seed)
    model = _random_gaussian_hmm(rng, k)
    lengths = rng.integers(1, 400, size=rng.integers(1, 6))
    x, _ = model.sample(int(lengths.sum()), random_state=seed)
    # reference: hmmlearn's own Viterbi on the same parameters and runs
    ref_logprob, ref_path = model.decode(x, lengths=lengths, algorithm="viterbi")
    log_em = model._compute_log_likelihood(x)
    path, logprob = viterbi_runs(log_em, lengths, np.log(model.startprob_), np.log(model.transmat_))
    np.testing.assert_array_equal(path, ref_path)
    assert logprob == pytest.approx(ref_logprob, rel=1e-10)


@pytest.mark.parametrize("seed", range(5))
def test_matches_hmmlearn_categorical_single_run(seed: int) -> None:
    rng = np.random.default_rng(seed)
    k, n_symbols = 3, 4
    model = hmm.CategoricalHMM(n_components=k, n_features=n_symbols)
    model.startprob_ = rng.dirichlet(np.ones(k))
    model.transmat_ = rng.dirichlet(np.ones(k) * 0.5, size=k)
    model.emissionprob_ = rng.dirichlet(np.ones(n_symbols), size=k)
    x = rng.integers(0, n_symbols, size=(3000, 1))
    ref_logprob, ref_path = model.decode(x, algorithm="viterbi")  # reference: hmmlearn
    log_em = model._compute_log_likelihood(x)
    log_start, log_trans = np.log(model.startprob_), np.log(model.transmat_)
    path, logprob = viterbi(log_em, log_start, log_trans)
    assert logprob == pytest.approx(ref_logprob, rel=1e-10)
    # discrete emissions produce exactly tied paths (equal scores up to round-off), which
    # either decoder may pick: both paths must reach the optimum
    assert _path_score(path, log_em, log_start, log_trans) == pytest.approx(ref_logprob, rel=1e-10)
    assert np.mean(path == ref_path) > 0.8


def _path_score(path, log_em, log_start, log_trans) -> float:
    total = log_start[path[0]] + log_em[np.arange(path.size), path].sum()
    return float(total + log_trans[path[:-1], path[1:]].sum())


def test_structural_zeros_left_to_right() -> None:
    # a left-to-right chain (zero transition probabilities) as in hmmlearn's documentation
    rng = np.random.default_rng(7)
    model = hmm.GaussianHMM(n_components=3, covariance_type="diag")
    model.startprob_ = np.array([1.0, 0.0, 0.0])
    model.transmat_ = np.array([[0.95, 0.05, 0.0], [0.0, 0.95, 0.05], [0.0, 0.0, 1.0]])
    model.means_ = np.array([[0.0], [3.0], [6.0]])
    model.covars_ = np.ones((3, 1))
    x, _ = model.sample(500, random_state=3)
    ref_logprob, ref_path = model.decode(x, algorithm="viterbi")  # reference: hmmlearn
    with np.errstate(divide="ignore"):
        path, logprob = viterbi(
            model._compute_log_likelihood(x), np.log(model.startprob_), np.log(model.transmat_)
        )
    np.testing.assert_array_equal(path, ref_path)
    assert logprob == pytest.approx(ref_logprob, rel=1e-10)
    assert np.all(np.diff(path) >= 0)
    del rng


def test_runs_are_decoded_independently() -> None:
    # decoding two runs stacked equals decoding each alone (definition of independent runs)
    rng = np.random.default_rng(3)
    log_em = rng.normal(size=(300, 3))
    log_start = np.log(np.array([0.2, 0.5, 0.3]))
    log_trans = np.log(rng.dirichlet(np.ones(3), size=3))
    both, lp = viterbi_runs(log_em, [120, 180], log_start, log_trans)
    a, lpa = viterbi(log_em[:120], log_start, log_trans)
    b, lpb = viterbi(log_em[120:], log_start, log_trans)
    np.testing.assert_array_equal(both, np.concatenate([a, b]))
    assert lp == pytest.approx(lpa + lpb, rel=1e-12)


def test_single_regime_and_bad_lengths() -> None:
    log_em = np.full((10, 1), -1.0)
    path, lp = viterbi_runs(log_em, [4, 6], np.zeros(1), np.zeros((1, 1)))
    assert np.all(path == 0)
    assert lp == pytest.approx(-10.0)
    with pytest.raises(ValueError, match="lengths"):
        viterbi_runs(np.zeros((5, 2)), [2, 2], np.zeros(2), np.zeros((2, 2)))


def test_forward_gated_sums_every_path() -> None:
    # the marginal likelihood of a chain with gated transitions, checked against its
    # definition: the sum over every regime path of start x transitions x emissions
    # (an input-output HMM, "Input-output HMMs for sequence processing", IEEE Transactions
    # on Neural Networks 7(5), 1996), enumerated on runs short enough to list the paths
    import itertools

    from scipy.special import logsumexp

    from modemap.regimes.viterbi import forward_gated

    rng = np.random.default_rng(3)
    k, lengths = 3, [5, 1, 4]
    n = sum(lengths)
    log_em = 3.0 * rng.normal(size=(n, k))
    gate = rng.dirichlet(np.ones(k), size=n)
    trans = rng.dirichlet(np.ones(k), size=k)
    total, offset = 0.0, 0
    for length in lengths:
        e, g = log_em[offset : offset + length], gate[offset : offset + length]
        offset += length
        paths = []
        for path in itertools.product(range(k), repeat=length):
            lp = np.log(g[0, path[0]]) + e[0, path[0]]
            for t in range(1, length):
                i, j = path[t - 1], path[t]
                step = trans[i] * g[t]
                lp += np.log(step[j] / step.sum()) + e[t, j]
            paths.append(lp)
        total += logsumexp(paths)
    assert forward_gated(log_em, lengths, np.log(trans), np.log(gate)) == pytest.approx(
        total, rel=1e-10
    )


def test_forward_gated_per_source_sums_every_path() -> None:
    # the same definition with one gate per source regime, g_t(j | i) (the input-output
    # HMM's own form: a transition classifier per state); a gate equal for every source
    # gives the shared form's value
    import itertools

    from scipy.special import logsumexp

    from modemap.regimes.viterbi import forward_gated

    rng = np.random.default_rng(4)
    k, lengths = 3, [4, 1, 5]
    n = sum(lengths)
    log_em = 3.0 * rng.normal(size=(n, k))
    gate = rng.dirichlet(np.ones(k), size=(n, k))  # [t, i, j]
    trans = rng.dirichlet(np.ones(k), size=k)
    total, offset = 0.0, 0
    for length in lengths:
        e, g = log_em[offset : offset + length], gate[offset : offset + length]
        offset += length
        first = g[0].mean(axis=0)
        paths = []
        for path in itertools.product(range(k), repeat=length):
            lp = np.log(first[path[0]]) + e[0, path[0]]
            for t in range(1, length):
                i, j = path[t - 1], path[t]
                step = trans[i] * g[t, i]
                lp += np.log(step[j] / step.sum()) + e[t, j]
            paths.append(lp)
        total += logsumexp(paths)
    assert forward_gated(log_em, lengths, np.log(trans), np.log(gate)) == pytest.approx(
        total, rel=1e-10
    )
    shared = rng.dirichlet(np.ones(k), size=n)
    same = np.repeat(shared[:, None, :], k, axis=1)
    assert forward_gated(log_em, lengths, np.log(trans), np.log(same)) == pytest.approx(
        forward_gated(log_em, lengths, np.log(trans), np.log(shared)), rel=1e-12
    )


def _log_space_reference(e, lengths, start, trans):
    from modemap.regimes.viterbi import _GivenEmissions

    ref = _GivenEmissions(n_components=e.shape[1], implementation="log")
    ref.startprob_, ref.transmat_ = start, trans
    return ref.score_samples(e, lengths=lengths)


def test_forward_backward_of_long_runs_equals_hmmlearn_log_space() -> None:
    # runs too long to be laid side by side take hmmlearn's scaled recursions on emissions
    # relative to each row's best regime; reference: hmmlearn's log-space recursions on the
    # raw emissions (reference library)
    from modemap.regimes.viterbi import forward_backward

    rng = np.random.default_rng(7)
    k, lengths = 3, np.array([500, 700])
    e = 40.0 + 25.0 * rng.normal(size=(lengths.sum(), k))  # far from 0: exp() would overflow
    start = np.array([0.2, 0.5, 0.3])
    trans = np.array([[0.9, 0.05, 0.05], [0.1, 0.8, 0.1], [0.02, 0.28, 0.7]])
    loglik, post = forward_backward(e, lengths, np.log(start), np.log(trans))
    ref_loglik, ref_post = _log_space_reference(e, lengths, start, trans)
    assert loglik == pytest.approx(ref_loglik, rel=1e-10)
    np.testing.assert_allclose(post, ref_post, atol=1e-10)


def test_forward_backward_of_a_run_with_no_possible_path() -> None:
    # the chain starts in regime 1 and can never leave it, but the emissions allow regime 0
    # only from the 300th row: the scaled recursions underflow, and the log-space ones
    # (hmmlearn's, the reference) give the log-likelihood of an impossible path
    from modemap.regimes.viterbi import _IMPOSSIBLE, forward_backward

    e = np.zeros((600, 2))
    e[300:, 1] = _IMPOSSIBLE
    start, trans = np.array([0.0, 1.0]), np.array([[0.5, 0.5], [0.0, 1.0]])
    with np.errstate(divide="ignore"):
        loglik, _ = forward_backward(e, [600], np.log(start), np.log(trans))
    ref_loglik, _ = _log_space_reference(np.maximum(e, _IMPOSSIBLE), [600], start, trans)
    assert loglik == pytest.approx(ref_loglik, rel=1e-10)
    assert loglik < -1e200
