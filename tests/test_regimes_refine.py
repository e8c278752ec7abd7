"""Hard-EM switching regression checked against statsmodels' Markov-switching regression.

Reference: ``statsmodels.tsa.regime_switching.markov_regression.MarkovRegression``, an
implementation of the model of "A new approach to the economic analysis of nonstationary time
series and the business cycle", Econometrica 57(2), 1989, DOI 10.2307/1912559.  With
``exog = y[t-1]`` and switching exog it fits ``y[t] = c_s + phi_s y[t-1] + e`` - the same
parametrisation as our affine discrete-form regime models, so intercepts and slopes compare
directly (``MarkovAutoregression`` instead models ``y[t] - mu_s = phi (y[t-1] - mu_s') + e``,
which would need a mapping).
"""

from __future__ import annotations

import numpy as np
import pytest
from scipy.optimize import linear_sum_assignment
from statsmodels.tsa.regime_switching.markov_regression import MarkovRegression

from modemap.fit.statistics import accumulate_by_label
from modemap.regimes.likelihood import path_log_prob, transition_model
from modemap.regimes.proposal import propose
from modemap.terms.library import TermLibrary
from refine_helpers import bound_model, refine_rows

# invented two-regime switching AR(1): (slope, intercept) per regime, persistent chain
PARAMS = np.array([[0.9, 1.0], [0.3, -1.0]])
P = np.array([[0.98, 0.02], [0.03, 0.97]])


def _simulate(n: int, seed: int) -> tuple[np.ndarray, np.ndarray]:
    rng = np.random.default_rng(seed)
    s = np.zeros(n, dtype=np.int64)
    u = rng.random(n)
    for t in range(1, n):
        s[t] = int(u[t] < P[s[t - 1], 1])
    e = 0.5 * rng.standard_normal(n)
    y = np.zeros(n + 1)
    for t in range(n):
        y[t + 1] = PARAMS[s[t], 0] * y[t] + PARAMS[s[t], 1] + e[t]
    return y, s


def _match(a: np.ndarray, b: np.ndarray, k: int) -> np.ndarray:
    """Permutation of a's ids maximising agreement with b (scipy's assignment solver)."""
    agree = np.array([[np.sum((a == i) & (b == j)) for j in range(k)] for i in range(k)])
    rows, cols = linear_sum_assignment(-agree)
    perm = np.empty(k, dtype=np.int64)
    perm[rows] = cols
    return perm


@pytest.fixture(scope="module")
def switching_fit():
    y, s = _simulate(2500, seed=1)
    z, target = y[:-1, None], y[1:, None]
    library = TermLibrary(degree=1).fit(["y"])
    labels0 = propose(np.hstack([z, target - z]), [z.shape[0]], 2, seed=0)
    ours = refine_rows(z, target, [z.shape[0]], labels0, library, n_regimes=2, model="affine")
    ref = MarkovRegression(
        y[1:], k_regimes=2, exog=y[:-1], switching_exog=True, switching_variance=False
    ).fit(search_reps=0, disp=False)
    return ours, ref, s


def test_labels_agree_with_statsmodels(switching_fit) -> None:
    ours, ref, truth = switching_fit
    ref_labels = np.argmax(ref.smoothed_marginal_probabilities, axis=1)
    perm = _match(ours.labels, ref_labels, 2)
    assert np.mean(perm[ours.labels] == ref_labels) >= 0.98
    perm_truth = _match(ours.labels, truth, 2)
    assert np.mean(perm_truth[ours.labels] == truth) >= 0.97  # simulated truth
    assert ours.monitor.converged


def test_coefficients_inside_statsmodels_confidence_intervals(switching_fit) -> None:
    ours, ref, _ = switching_fit
    names = list(ref.model.param_names)
    ci = np.asarray(ref.conf_int())  # 95 % intervals of the reference fit
    ref_labels = np.argmax(ref.smoothed_marginal_probabilities, axis=1)
    perm = _match(ours.labels, ref_labels, 2)
    for k, fit in enumerate(ours.fits):
        j = perm[k]
        c, phi = fit.coef[:, 0]  # terms ["1", "y"]
        lo, hi = ci[names.index(f"const[{j}]")]
        assert lo <= c <= hi
        lo, hi = ci[names.index(f"x1[{j}]")]
        assert lo <= phi <= hi


def test_transition_probabilities_close_to_statsmodels(switching_fit) -> None:
    ours, ref, _ = switching_fit
    ref_labels = np.argmax(ref.smoothed_marginal_probabilities, axis=1)
    perm = _match(ours.labels, ref_labels, 2)
    ref_trans = np.asarray(ref.regime_transition)[:, :, 0].T  # statsmodels: [to, from]
    ours_trans = np.exp(ours.log_trans)
    for i in range(2):
        for j in range(2):
            assert ours_trans[i, j] == pytest.approx(ref_trans[perm[i], perm[j]], abs=0.01)


def test_loglik_is_the_path_score(switching_fit) -> None:
    ours, _, _ = switching_fit
    # the reported log-likelihood never exceeds the last Viterbi optimum by more than round-off
    assert ours.loglik <= ours.monitor.history[-1] + 1e-6
    assert np.isfinite(ours.loglik)


def test_transition_model_counts_within_runs() -> None:
    # counts of consecutive pairs inside runs only, plus the sticky pseudo-counts (definition)
    labels = np.array([0, 0, 1, 1, 0, 0])
    log_start, log_trans = transition_model(labels, np.array([3, 3]), 2, sticky=0.5)
    counts = np.array([[2, 1], [1, 0]]) + 10 * 0.5  # pairs 00 01 | 10 00
    np.testing.assert_allclose(np.exp(log_trans), counts / counts.sum(axis=1, keepdims=True))
    np.testing.assert_allclose(np.exp(log_start), [0.5, 0.5])
    score = path_log_prob(np.zeros((6, 2)), labels, np.array([3, 3]), log_start, log_trans)
    expected = 2 * np.log(0.5) + 2 * log_trans[0, 0] + log_trans[0, 1] + log_trans[1, 0]
    assert score == pytest.approx(expected)


@pytest.mark.parametrize("seed", range(4))
def test_residual_emissions_and_decoding_match_hmmlearn_gaussian(seed: int) -> None:
    # A regime model with the constant term only predicts y = c_k, so its Gaussian residual
    # log-likelihood is a full-covariance Gaussian emission with mean c_k: hmmlearn's
    # GaussianHMM (reference library) must give the same emissions and the same Viterbi path.
    from hmmlearn import hmm

    from modemap.regimes.likelihood import regime_log_likelihood
    from modemap.regimes.viterbi import viterbi_runs

    rng = np.random.default_rng(seed)
    k, m = 3, 2
    ref = hmm.GaussianHMM(n_components=k, covariance_type="full")
    ref.startprob_ = rng.dirichlet(np.ones(k))
    ref.transmat_ = rng.dirichlet(np.ones(k) * 0.3, size=k) + 5.0 * np.eye(k)
    ref.transmat_ /= ref.transmat_.sum(axis=1, keepdims=True)
    ref.means_ = rng.normal(scale=2.0, size=(k, m))
    a = rng.normal(size=(k, m, m))
    ref.covars_ = a @ a.transpose(0, 2, 1) + 0.5 * np.eye(m)
    lengths = rng.integers(50, 700, size=3)
    y, _ = ref.sample(int(lengths.sum()), random_state=seed)
    library = TermLibrary.from_terms(["1"], ["z"])
    z = np.zeros((y.shape[0], 1))
    log_em = regime_log_likelihood(library, z, y, list(ref.means_[:, None, :]), ref.covars_)
    np.testing.assert_allclose(log_em, ref._compute_log_likelihood(y), rtol=1e-10, atol=1e-10)
    path, logprob = viterbi_runs(log_em, lengths, np.log(ref.startprob_), np.log(ref.transmat_))
    ref_logprob, ref_path = ref.decode(y, lengths=lengths, algorithm="viterbi")
    np.testing.assert_array_equal(path, ref_path)
    assert logprob == pytest.approx(ref_logprob, rel=1e-10)


def test_reported_loglik_equals_per_sample_path_score() -> None:
    # whichever way refine() obtains its log-likelihood (last Viterbi optimum, per-sample scores
    # or the statistics), it must equal the joint log-probability of the returned labels
    # computed sample by sample (definition of the complete-data log-likelihood)
    from modemap.regimes.likelihood import regime_log_likelihood

    y, s = _simulate(3000, seed=4)
    z, target = y[:-1, None], y[1:, None]
    library = TermLibrary(degree=1).fit(["y"])
    lengths = np.array([1000, 2000])
    start = np.where(np.random.default_rng(2).random(s.size) < 0.15, 1 - s, s)
    for tol in (0.0, 5e-2):  # 5e-2: stops with labels still moving, then refits from stats
        res = refine_rows(z, target, lengths, start, library, n_regimes=2, model="affine", tol=tol)
        log_em = regime_log_likelihood(
            library, z, target, [f.coef for f in res.fits], res.covariances
        )
        direct = path_log_prob(log_em, res.labels, lengths, res.log_start, res.log_trans)
        assert res.loglik == pytest.approx(direct, rel=1e-9)
        # statistics updated from the changed samples equal a fresh pass (sums, round-off)
        fresh = accumulate_by_label(library, z, target, res.labels, res.n_regimes)
        for ours, ref in zip(res.stats, fresh, strict=True):
            assert ours.n == ref.n
            np.testing.assert_allclose(ours.gram, ref.gram, rtol=1e-10)
            np.testing.assert_allclose(ours.cross, ref.cross, rtol=1e-10)


def test_interior_fits_leave_out_the_rows_that_hold_a_switch() -> None:
    # Discrete form of a process that switches between samples: the row whose interval holds
    # the switch follows neither map (here half of each: an invented mixed row).  Noise-free,
    # the fits on stretch interiors recover both generating maps exactly; fits on every row
    # do not.  With noise, each interior fit equals statsmodels' OLS on the regime's rows
    # without the stretch ends.
    import statsmodels.api as sm

    from modemap.regimes.refine import interior_stats, stretch_ends

    rng = np.random.default_rng(3)
    n = 4000
    s = np.repeat(np.arange(40) % 2, 100)
    y = np.zeros(n + 1)
    for t in range(n):
        a, c = PARAMS[s[t]]
        y[t + 1] = a * y[t] + c + rng.normal(0.0, 0.5)  # excitation along the way
    x = y[:-1]
    nxt = PARAMS[s, 0] * x + PARAMS[s, 1]
    ends = stretch_ends(s, np.array([n]))
    assert ends.size == 39
    other = 1 - s[ends]
    nxt[ends] = 0.5 * nxt[ends] + 0.5 * (PARAMS[other, 0] * x[ends] + PARAMS[other, 1])
    library = TermLibrary(degree=1).fit(["y"])
    Z, lengths = x[:, None], np.array([n])
    stats = accumulate_by_label(library, Z, nxt[:, None], s, 2)
    inside = interior_stats(Z, nxt[:, None], lengths, s, 2, library, stats)
    for given, exact in ((inside, True), (stats, False)):
        fits = bound_model(library, 1, "affine").fit_all(given)
        coef = np.array([f.coef[:, 0] for f in fits])
        error = np.abs(coef - PARAMS[:, ::-1]).max()  # rows (c, a)
        assert error < 1e-9 if exact else error > 1e-3

    noisy = nxt + 0.05 * rng.standard_normal(n)
    res = refine_rows(
        Z, noisy[:, None], lengths, s, library, n_regimes=2, model="affine", max_iter=1,
        form="discrete",
    )  # fmt: skip
    keep = np.ones(n, dtype=bool)
    keep[stretch_ends(res.labels, lengths)] = False
    for j in range(2):
        rows = keep & (res.labels == j)
        ols = sm.OLS(noisy[rows], sm.add_constant(x[rows])).fit()
        np.testing.assert_allclose(res.fits[j].coef[:, 0], ols.params, rtol=1e-8)


def test_shared_location_covariance_is_the_pooled_within_regime_scatter() -> None:
    # scikit-learn's LinearDiscriminantAnalysis(store_covariance=True).covariance_ is the
    # within-class scatter divided by n (reference library); ours divides by n - K (the
    # unbiased pooled covariance), so the two differ by that factor only
    from sklearn.discriminant_analysis import LinearDiscriminantAnalysis

    from modemap.regimes.likelihood import location_parameters

    rng = np.random.default_rng(3)
    labels = np.repeat([0, 1, 2], [120, 60, 200])
    x = rng.standard_normal((labels.size, 2)) @ np.array([[1.0, 0.3], [0.0, 0.5]])
    x += np.array([[0.0, 0.0], [4.0, 1.0], [-3.0, 2.0]])[labels]
    means, chols = location_parameters(x, labels, 3, "tied")
    lda = LinearDiscriminantAnalysis(store_covariance=True).fit(x, labels)
    n, k = labels.size, 3
    total_var = np.var(x, axis=0) + 1e-12
    for j in range(k):
        cov = chols[j] @ chols[j].T - np.diag(1e-6 * total_var)
        np.testing.assert_allclose(cov * (n - k) / n, lda.covariance_, rtol=1e-10)
        np.testing.assert_allclose(means[j], lda.means_[j], rtol=1e-12)
    # one per regime: each regime's own sample covariance
    _, full = location_parameters(x, labels, 3, "full")
    for j in range(k):
        cov = full[j] @ full[j].T - np.diag(1e-6 * total_var)
        np.testing.assert_allclose(cov, np.cov(x[labels == j], rowvar=False), rtol=1e-10)
