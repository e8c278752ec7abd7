"""Choice of model: the marginal likelihood, regime probabilities and the criterion, checked
against hmmlearn, statsmodels and textbook results."""

from __future__ import annotations

import numpy as np
import pytest
import statsmodels.api as sm

from modemap.regimes.likelihood import regime_log_likelihood
from modemap.regimes.selection import (
    _wald_pairs,
    autocorrelation_time,
    count_parameters,
    distinct_regimes,
    information_criterion,
)
from modemap.regimes.viterbi import forward_backward
from modemap.terms.library import TermLibrary
from refine_helpers import refine_rows


@pytest.fixture(scope="module")
def one_regime():
    rng = np.random.default_rng(0)
    z = rng.standard_normal((1500, 2))
    y = 0.5 + z @ np.array([1.5, -0.7]) + 0.3 * rng.standard_normal(1500)
    library = TermLibrary(degree=1).fit(["a", "b"])
    result = refine_rows(
        z,
        y[:, None],
        [1500],
        np.zeros(1500, int),
        library,
        n_regimes=1,
        model="affine",
        cov_floor=0.0,
    )
    return result, sm.OLS(y, sm.add_constant(z)).fit()


def test_single_regime_loglik_equals_ols(one_regime) -> None:
    result, ols = one_regime
    # reference: statsmodels OLS log-likelihood (Gaussian, maximum-likelihood variance)
    assert result.loglik == pytest.approx(ols.llf, rel=1e-9)


def test_bic_counts_the_variance_too(one_regime) -> None:
    result, ols = one_regime
    n_params = count_parameters(result, 1)
    assert n_params == 3 + 1  # three coefficients and the residual variance; K = 1: no chain
    # statsmodels' OLS BIC counts the coefficients only: ours adds ln(n) for the variance
    bic = information_criterion(result.loglik, n_params, 1500)
    assert bic == pytest.approx(ols.bic + np.log(1500), rel=1e-9)
    # on an effective sample of n / tau rows, the log-likelihood counts 1 / tau as much
    assert information_criterion(result.loglik, n_params, 1500, 3.0) == pytest.approx(
        -2 * result.loglik / 3 + n_params * np.log(500), rel=1e-12
    )


def _switching_means(n: int, seed: int) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """A seeded two-regime switching mean (invented): y = mu_s + e, e ~ N(0, 0.6^2)."""
    rng = np.random.default_rng(seed)
    trans = np.array([[0.97, 0.03], [0.05, 0.95]])
    s = np.zeros(n, dtype=np.int64)
    for t in range(1, n):
        s[t] = rng.random() < trans[s[t - 1], 1]
    y = np.array([-1.0, 1.5])[s] + 0.6 * rng.standard_normal(n)
    return y, s, trans


def test_marginal_likelihood_equals_hmmlearn_gaussian_hmm() -> None:
    # Every regime model a constant (the term "1"): the switching model is a Gaussian HMM,
    # and its marginal log-likelihood is hmmlearn's GaussianHMM.score (forward algorithm;
    # reference library), run by run; the regime probabilities its predict_proba.
    from hmmlearn import hmm

    y, _, trans = _switching_means(900, seed=1)
    lengths = np.array([400, 500])
    means, var = np.array([[-0.9], [1.4]]), 0.38
    ref = hmm.GaussianHMM(n_components=2, covariance_type="tied", init_params="", params="")
    ref.startprob_ = np.array([0.5, 0.5])
    ref.transmat_ = trans
    ref.means_ = means
    ref.covars_ = np.array([[var]])
    library = TermLibrary.from_terms(["1"], ["z"])
    log_em = regime_log_likelihood(
        library, np.zeros((y.size, 1)), y[:, None], list(means[:, None, :]), np.full((2, 1, 1), var)
    )
    loglik, post = forward_backward(log_em, lengths, np.log(ref.startprob_), np.log(trans))
    assert loglik == pytest.approx(ref.score(y[:, None], lengths), rel=1e-10)
    np.testing.assert_allclose(post, ref.predict_proba(y[:, None], lengths), atol=1e-10)


def test_regime_probabilities_equal_statsmodels_markov_regression() -> None:
    # statsmodels' MarkovRegression (the switching model of Econometrica 57(2), 1989,
    # DOI 10.2307/1912559; the smoother of "Dynamic linear models with Markov-switching",
    # Journal of Econometrics 60, 1994) evaluated at given parameters: switching mean,
    # one variance; its smoothed probabilities are ours with the same chain and start (its
    # default start: the chain's stationary distribution).
    from statsmodels.tsa.regime_switching.markov_regression import MarkovRegression

    y, _, trans = _switching_means(600, seed=2)
    model = MarkovRegression(y, k_regimes=2)
    # statsmodels' order: p[0->0], p[1->0], const[0], const[1], sigma2
    params = np.array([trans[0, 0], trans[1, 0], -0.9, 1.4, 0.38])
    ref = model.smooth(params)
    stationary = np.array([trans[1, 0], trans[0, 1]]) / (trans[1, 0] + trans[0, 1])
    library = TermLibrary.from_terms(["1"], ["z"])
    coefs = [np.array([[-0.9]]), np.array([[1.4]])]
    log_em = regime_log_likelihood(
        library, np.zeros((y.size, 1)), y[:, None], coefs, np.full((2, 1, 1), 0.38)
    )
    loglik, post = forward_backward(log_em, [y.size], np.log(stationary), np.log(trans))
    np.testing.assert_allclose(post, ref.smoothed_marginal_probabilities, atol=1e-10)
    assert loglik == pytest.approx(ref.llf, rel=1e-10)


@pytest.mark.parametrize("phi", [0.0, 0.5, 0.8])
def test_autocorrelation_time_of_an_ar1_series(phi) -> None:
    # The integrated autocorrelation time of an AR(1) process with coefficient phi is
    # 1 + 2 sum_k phi^k = (1 + phi) / (1 - phi) (textbook; common practice): 1, 3 and 9.
    rng = np.random.default_rng(3)
    runs = []
    for _ in range(4):
        e = rng.standard_normal(20_000)
        x = np.empty_like(e)
        x[0] = e[0]
        for t in range(1, e.size):
            x[t] = phi * x[t - 1] + e[t]
        runs.append(x)
    tau = autocorrelation_time(np.concatenate(runs)[:, None], np.array([20_000] * 4))
    assert tau == pytest.approx((1 + phi) / (1 - phi), rel=0.12, abs=0.05)


def test_autocorrelation_time_sees_past_the_telescoping_noise() -> None:
    # Increments of consecutive windows share an end sample: measurement noise e gives the
    # residual e[t+1] - e[t] (rho_1 = -1/2, long-run variance 0), model error adds an AR(1)
    # series a (coefficient phi, innovations s).  The integrated autocorrelation time is
    # the long-run variance over the variance (textbook, common practice):
    # (s^2 / (1 - phi)^2) / (2 + s^2 / (1 - phi^2)) = 3.64 for s = 0.3, phi = 0.9.  A sum
    # stopped at the first negative autocorrelation gives 1 here; Geyer's pairs do not.
    rng = np.random.default_rng(5)
    phi, s = 0.9, 0.3
    runs = []
    for _ in range(4):
        e = rng.standard_normal(20_001)
        a = np.empty(20_000)
        a[0] = rng.standard_normal() * s / np.sqrt(1 - phi**2)
        for t in range(1, a.size):
            a[t] = phi * a[t - 1] + s * rng.standard_normal()
        runs.append(np.diff(e) + a)
    tau = autocorrelation_time(np.concatenate(runs)[:, None], np.array([20_000] * 4))
    expected = (s**2 / (1 - phi) ** 2) / (2 + s**2 / (1 - phi**2))
    assert tau == pytest.approx(expected, rel=0.12)


def test_wald_statistic_of_two_constant_regimes_is_welchs_t_squared() -> None:
    # Two regimes with a constant only: the Wald statistic of the difference of their
    # coefficients, each with its own least-squares variance, is the square of Welch's t
    # (scipy.stats.ttest_ind with equal_var=False).
    from scipy import stats

    rng = np.random.default_rng(11)
    y = np.concatenate([1.0 + rng.standard_normal(300), 1.2 + 2.0 * rng.standard_normal(500)])
    labels = np.repeat([0, 1], [300, 500])
    G = np.ones((y.size, 1))
    coefs = [np.array([[y[labels == j].mean()]]) for j in (0, 1)]
    [(a, b, W, dof)] = _wald_pairs(coefs, G, y[:, None], labels)
    t = stats.ttest_ind(y[labels == 0], y[labels == 1], equal_var=False).statistic
    assert (a, b, dof) == (0, 1, 1)
    assert W == pytest.approx(t**2, rel=1e-10)


def test_regimes_a_wald_test_cannot_tell_apart_count_as_one() -> None:
    # the same line fitted on three stretches: two share their slope and intercept (their
    # difference is noise), the third does not; the candidate keeps two distinct regimes
    from types import SimpleNamespace

    rng = np.random.default_rng(12)
    z = rng.uniform(-1, 1, 3000)
    labels = np.repeat([0, 1, 2], 1000)
    y = np.where(labels == 2, 3.0 - 2.0 * z, 1.0 + 0.5 * z) + 0.1 * rng.standard_normal(3000)
    G = np.column_stack([np.ones_like(z), z])
    coefs = [
        np.linalg.lstsq(G[labels == j], y[labels == j], rcond=None)[0][:, None] for j in range(3)
    ]
    wald = _wald_pairs(coefs, G, y[:, None], labels)
    candidate = SimpleNamespace(result=SimpleNamespace(n_regimes=3), wald=wald)
    assert distinct_regimes(candidate) == 2
    # a huge autocorrelation time leaves no evidence for any difference
    assert distinct_regimes(candidate, tau=1e9) == 1
    assert distinct_regimes(SimpleNamespace(result=SimpleNamespace(n_regimes=3), wald=[])) == 3


def test_windows_hold_a_regime_only_when_their_samples_agree() -> None:
    # the common targets: increments over windows of h intervals, the regressors their
    # trapezoidal integrals; exact for x' = 2 (a constant slope: the target is 2 whatever
    # the window, textbook quadrature)
    from modemap.regimes.rows import Rows
    from modemap.regimes.selection import Windows

    t = np.arange(10.0) * 0.5
    x = 2.0 * t + 1.0
    rows = Rows.of(x[:, None], np.zeros((10, 1)), [6, 4], t)
    windows = Windows(rows, x[:, None], 2, integral=True)
    np.testing.assert_array_equal(windows.start, [0, 2, 6])  # never across the run boundary
    np.testing.assert_allclose(windows.target[:, 0], 2.0)
    G = windows.regressors(TermLibrary.from_terms(["1", "x"], ["x"]))
    np.testing.assert_allclose(G[:, 0], 1.0)  # the mean of the constant term
    np.testing.assert_allclose(G[:, 1], [2.0, 4.0, 8.0])  # the mean of x over the window
    labels = np.array([0, 0, 0, 1, 1, 1, 0, 0, 1, 1])
    np.testing.assert_array_equal(windows.labels(labels), [0, -1, -1])
    # discrete form: a row holds its regime unless its interval holds a switch
    discrete = Windows(rows, x[:, None], 1, integral=False)
    np.testing.assert_array_equal(discrete.labels(labels), [0, 0, -1, 1, 1, 1, 0, -1, 1, 1])


def _gated_scores(z: np.ndarray, labels: np.ndarray, lengths: list[int]) -> tuple[float, float]:
    """Penalised log-likelihood of a known regime sequence (emissions that all but name the
    regime) under the shared gate and under one gate per source regime, as the score counts
    them: log-likelihood less half the gate's parameters times the log of the windows."""
    from modemap.regimes.likelihood import SurfaceTerm
    from modemap.regimes.selection import _source_gates
    from modemap.regimes.viterbi import forward_gated

    k = 2
    log_em = np.where(np.arange(k)[None, :] == labels[:, None], 0.0, -10.0)
    log_trans = np.log(np.array([[0.95, 0.05], [0.05, 0.95]]))
    penalty = 0.5 * np.log(labels.size)
    shared = SurfaceTerm.fit(z, 1, labels, k, C=1000)
    one = forward_gated(log_em, lengths, log_trans, shared.log_prob(z, 1)) - penalty * 2
    log_gate, extra = _source_gates(z, labels, np.asarray(lengths), k)
    assert extra == 2 * 2  # two sources, one log-odds each, on one variable and a constant
    return one, forward_gated(log_em, lengths, log_trans, log_gate) - penalty * extra


def test_a_relay_is_gated_per_source_and_a_surface_by_one_classifier() -> None:
    # A relay (hysteresis: heating from 2 to 8, cooling from 8 to 2; closed form) switches
    # where the regime it leaves says: one classifier per source regime (the input-output
    # HMM's own form, "Input-output HMMs for sequence processing", IEEE Transactions on
    # Neural Networks 7(5), 1996) explains its switches far better than one classifier of
    # the variable, which sees both regimes over the whole band.  A regime set by the side
    # of a surface (x > 5, whatever came before) is explained as well by one classifier,
    # and the per-source one does not pay for its extra parameters.
    from relay_data import relay_frame

    frame = relay_frame(n_runs=3, duration=20.0, step=0.02, noise=0.05)
    lengths = frame.groupby("run").size().tolist()
    z, labels = frame[["x [m]"]].to_numpy(), frame["true_regime"].to_numpy()
    shared, per_source = _gated_scores(z, labels, lengths)
    assert per_source > shared + 50.0
    t = np.arange(1200) * 0.05
    x = 5.0 + 3.0 * np.sin(t) + 0.05 * np.random.default_rng(2).standard_normal(t.size)
    shared, per_source = _gated_scores(x[:, None], (x > 5.0).astype(np.int64), [400, 400, 400])
    assert shared > per_source
