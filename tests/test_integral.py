"""Integral-form refit of the regimes' coefficients (modemap.regimes.integral).

References:

* the exact discretisation of a first-order linear system under a zero-order hold
  (tests/lag_data.py; textbook: the matrix-exponential solution of a linear ODE with
  piecewise-constant input);
* statsmodels' Newey-West long-run variance within groups
  (``statsmodels.stats.sandwich_covariance.S_nw_panel`` with ``weights_bartlett``) and
  ordinary least squares with that sandwich (``OLS.fit(cov_type="hac-panel")``), which is
  what the standard errors over the windows of each stretch are ("A simple, positive
  semi-definite, heteroskedasticity and autocorrelation consistent covariance matrix",
  Econometrica 55(3), 1987, DOI 10.2307/1913610);
* the reactor demo's truth (mass and energy balances of a CSTR, integrated by
  scipy.integrate.solve_ivp, DOP853) for the compensation of noise in the terms.
"""

from __future__ import annotations

import numpy as np
import pytest
import statsmodels.api as sm
from statsmodels.stats.sandwich_covariance import S_nw_panel, weights_bartlett

from lag_data import held_lag
from modemap.data.derivatives import estimate_noise
from modemap.demos import make_demo
from modemap.fit.centring import fit_sparse_centred
from modemap.fit.sparse import LocalFit
from modemap.fit.statistics import GramStats
from modemap.regimes.integral import (
    EndpointNoise,
    LongRunVariance,
    integral_refit,
    right_ends,
    window_bounds,
)
from modemap.regimes.rows import Rows
from modemap.regimes.segments import stepped_columns
from modemap.terms.library import TermLibrary


def _lag(a: float, b: float, dt: float, n: int, seed: int = 0, noise: float = 0.0):
    """First-order lag ``x' = -a x + b u`` under a stepped input, exact at the samples."""
    rng = np.random.default_rng(seed)
    u = np.repeat(rng.uniform(0.0, 2.0, n // 40 + 1), 40)[:n]
    x = held_lag(1.0, u[:-1], dt, a, b)
    t = dt * np.arange(n)
    return t, np.column_stack([x + noise * rng.standard_normal(n), u])


def _start_fit(terms: list[str], m: int, n: int) -> LocalFit:
    p = len(terms)
    return LocalFit(
        terms=terms,
        coef=np.zeros((p, m)),
        support=np.ones((p, m), dtype=bool),
        stderr=np.zeros((p, m)),
        noise_cov=np.eye(m),
        n_samples=n,
        threshold=np.zeros(m),
        rss=np.zeros(m),
        n_params=p * m,
    )


def _refit(library, Z, t, lengths, labels, k: int, **options):
    m = 1
    fits = [_start_fit(list(library.terms_), m, int(np.sum(labels == g))) for g in range(k)]
    dstats = [
        GramStats.from_arrays(library.transform(Z[labels == g]), np.zeros((np.sum(labels == g), m)))
        for g in range(k)
    ]
    rows = Rows.of(Z, np.zeros((len(Z), m)), lengths, t)
    return integral_refit(library, rows, labels, fits, dstats, **options)


def _reference_windows(t, Z, labels, window):
    """The windows of one run rebuilt by hand for ``Z = [x, u]`` on an even grid: the
    trapezoidal integral of ``[1, x, u]`` with ``u`` held from the left, plus the end
    correction ``h/24 (theta[i+1] - theta[i-1])`` (Euler-Maclaurin) at each end of a window
    of 3 intervals or more where the neighbours share the label and ``u``.

    Returns the integrated terms ``(n_windows, 3)``, the changes of ``x``, and the windows'
    first samples and stretches."""
    dt = t[1] - t[0]
    start, end, stretch = window_bounds([t.size], labels, window)
    x, u = Z[:, 0], Z[:, 1]
    area = 0.5 * dt * np.column_stack([2.0 * np.ones(t.size - 1), x[:-1] + x[1:], 2.0 * u[:-1]])
    cum = np.vstack([np.zeros(3), np.cumsum(area, axis=0)])
    X, y = cum[end] - cum[start], x[end] - x[start]
    theta = np.column_stack([np.ones(t.size), x, u])
    for w, (i, k) in enumerate(zip(start, end, strict=True)):
        for at, sign in ((i, 1.0), (k, -1.0)):
            near = slice(at - 1, at + 2)
            if k - i >= 3 and 0 < at < t.size - 1 and np.ptp(labels[near]) == np.ptp(u[near]) == 0:
                X[w] += sign * dt / 24.0 * (theta[at + 1] - theta[at - 1])
    return X, y, start, stretch


def _hac_ratio(X, y, stretch, window):
    """Largest variance of the least-squares coefficients by statsmodels' Newey-West within
    stretches (two window lengths of lags) over the plain one."""
    plain = sm.OLS(y, X).fit()
    hac = sm.OLS(y, X).fit(
        cov_type="hac-panel",
        cov_kwds={"groups": stretch, "maxlags": 2 * window, "use_correction": False},
    )
    return float(np.max((hac.bse / plain.bse) ** 2))


def test_window_bounds_stay_inside_stretches_and_runs() -> None:
    # run 1: label 0 on samples 0-3, label 1 on sample 4; run 2: one sample of each label
    labels = np.array([0, 0, 0, 0, 1, 1, 0])
    start, end, stretch = window_bounds([5, 2], labels, window=2)
    assert start.tolist() == [0, 1]
    assert end.tolist() == [2, 3]
    assert stretch.tolist() == [0, 0]
    # a stretch shorter than the window gives one window over all of it
    start, end, _ = window_bounds([7], np.array([0, 0, 1, 1, 1, 1, 1]), window=8)
    assert start.tolist() == [0, 2]
    assert end.tolist() == [1, 6]


def test_right_ends_hold_stepped_inputs_over_the_interval() -> None:
    z = np.array([[1.0, 5.0, 0.1], [2.0, 5.0, 0.2], [3.0, 6.0, 0.3], [4.0, 6.0, 0.4]])
    # column 1 changes at 1 interval in 3: more than a quarter, so not stepped (the rule of
    # modemap.regimes.segments); at 1 in 7 it is; column 2 changes at every sample
    assert stepped_columns(z[:, 1:]).tolist() == [False, False]
    z = np.vstack([z, [[5.0, 6.0, 0.5], [6.0, 6.0, 0.6], [7.0, 6.0, 0.7], [8.0, 6.0, 0.8]]])
    assert stepped_columns(z[:, 1:]).tolist() == [True, False]
    right = right_ends(z, 1, [8])
    assert right[1].tolist() == [3.0, 5.0, 0.3]  # interval 1 -> 2: state and smooth input of
    # sample 2, the stepped input still at sample 1's value
    assert right[-1].tolist() == z[-1].tolist()


def test_fast_lag_is_recovered_where_a_smoothing_derivative_is_not_needed() -> None:
    # a dt = 0.1: ten samples per time constant; the trapezoidal rule's error is
    # (a dt)^2 / 12 ~ 0.08 % of the integral (textbook error of the rule)
    a, b, dt = 2.0, 3.0, 0.05
    t, Z = _lag(a, b, dt, 4000)
    library = TermLibrary.from_terms(["x", "u"], ["x", "u"])
    labels = np.zeros(t.size, dtype=np.int64)
    done = _refit(library, Z, t, [t.size], labels, 1, compensate=False)
    coef = done.fits[0].coef[:, 0]
    assert coef[0] == pytest.approx(-a, rel=2e-3)
    assert coef[1] == pytest.approx(b, rel=2e-3)


def test_plain_estimate_and_errors_equal_statsmodels_newey_west_within_stretches() -> None:
    a, b, dt, window = 2.0, 3.0, 0.05, 8
    t, Z = _lag(a, b, dt, 3000, seed=3, noise=0.01)
    labels = (np.arange(t.size) // 700 % 2).astype(np.int64)  # two labels in long stretches
    library = TermLibrary.from_terms(["1", "x", "u"], ["x", "u"])
    done = _refit(library, Z, t, [t.size], labels, 2, window=window, compensate=False)
    X, y, start, stretch = _reference_windows(t, Z, labels, window)
    # Newey-West within each stretch, two window lengths of lags
    for g in range(2):
        rows = labels[start] == g
        ref = sm.OLS(y[rows], X[rows]).fit(
            cov_type="hac-panel",
            cov_kwds={"groups": stretch[rows], "maxlags": 2 * window, "use_correction": False},
        )
        fit = done.fits[g]
        np.testing.assert_allclose(fit.coef[:, 0], ref.params, rtol=1e-8)
        np.testing.assert_allclose(fit.stderr[:, 0], ref.bse, rtol=1e-6)
        assert done.n_windows[g] == rows.sum()


def test_long_run_variance_equals_statsmodels_newey_west_fed_in_any_pieces() -> None:
    # scores with serial correlation in groups of 1 to 90 rows, several shorter than the
    # lags; every target's slice must equal statsmodels' panel Newey-West whatever the cut
    rng = np.random.default_rng(7)
    sizes = np.array([40, 1, 3, 90, 12, 1, 55, 7])
    n, lags = int(sizes.sum()), 9
    e = rng.standard_normal((n + 2, 2, 3))
    scores = e[2:] + 0.8 * e[1:-1] + 0.5 * e[:-2]
    groups = np.repeat(np.arange(sizes.size) * 10, sizes)
    ends = np.cumsum(sizes)
    spans = list(zip((ends - sizes).tolist(), ends.tolist(), strict=True))
    for cuts in ([n], [1, 2, 44, 45, 170, n], list(range(1, n + 1))):
        acc = LongRunVariance(lags, (2, 3))
        for a, b in zip([0, *cuts[:-1]], cuts, strict=True):
            acc.add(scores[a:b], groups[a:b])
        got = acc.result()
        for t in range(2):
            ref = S_nw_panel(scores[:, t], weights_bartlett(lags), spans)
            np.testing.assert_allclose(got[t], ref, rtol=1e-10, atol=1e-12)
    # no lags: the plain sum of the scores' outer products
    acc = LongRunVariance(0, (3,))
    acc.add(scores[:, 0], groups)
    np.testing.assert_allclose(acc.result(), scores[:, 0].T @ scores[:, 0], rtol=1e-12)


def _endpoint_gram(X, start, end):
    """``sum_k d_k d_k'`` from its definition: ``d_k`` the windows ending at sample ``k``
    less those starting there."""
    d = np.zeros((int(end.max()) + 1, X.shape[1]))
    np.add.at(d, end, X)
    np.subtract.at(d, start, X)
    return d.T @ d


def test_endpoint_noise_is_the_spread_of_the_score_sums_over_noise_draws() -> None:
    # three stretches (one shorter than the window), fed in pieces that cut a stretch;
    # reference: the covariance of sum_w X_w (n_end - n_start) over 40000 draws of white
    # noise (Monte Carlo, common practice), and the sum of d_k d_k' written out
    rng = np.random.default_rng(3)
    labels = np.repeat([0, 1, 0], [70, 9, 50])
    start, end, stretch = window_bounds([labels.size], labels, window=16)
    X = np.column_stack([2.0 + np.sin(start / 20.0), np.cos(start / 15.0)])  # smooth terms
    acc = EndpointNoise(16, 2)
    for piece in np.array_split(np.arange(start.size), [23, 61]):
        acc.add(X[piece], stretch[piece], (end - start)[piece])
    np.testing.assert_allclose(acc.total, _endpoint_gram(X, start, end), rtol=1e-12)
    noise = rng.standard_normal((40000, labels.size))
    sums = (noise[:, end] - noise[:, start]) @ X
    np.testing.assert_allclose(acc.total, sums.T @ sums / len(noise), rtol=0.03)


def test_standard_errors_never_fall_below_what_the_measured_noise_makes() -> None:
    # one stretch of 30 samples against windows of 16 and 32 lags: the Newey-West sum of a
    # regime's scores, which sum to zero at its least-squares solution, comes out near
    # zero; the standard errors stay at least those of the targets' noise alone (noise
    # variance from fourth differences, the estimate the compensation uses)
    a, b, dt, window, n = 2.0, 3.0, 0.05, 16, 30
    t, Z = _lag(a, b, dt, n, seed=2, noise=0.01)
    labels = np.zeros(n, dtype=np.int64)
    library = TermLibrary.from_terms(["x", "u"], ["x", "u"])
    done = _refit(library, Z, t, [n], labels, 1, window=window, compensate=False)
    X, _, start, _ = _reference_windows(t, Z, labels, window)
    X, end = X[:, 1:], start + window
    inv = np.linalg.inv(X.T @ X)
    sigma2 = estimate_noise(Z[:, :1])[0] ** 2
    bound = np.sqrt(np.diag(inv @ (sigma2 * _endpoint_gram(X, start, end)) @ inv))
    stderr = done.fits[0].stderr[:, 0]
    assert np.all(stderr >= bound * (1 - 1e-9))
    assert stderr == pytest.approx(bound, rel=1e-6)  # the bound is what holds here


def test_effective_windows_follow_the_sandwich_both_ways() -> None:
    a, b, dt, window, n = 2.0, 3.0, 0.05, 8, 1500
    t, Z = _lag(a, b, dt, n, seed=6, noise=0.01)
    labels = np.zeros(n, dtype=np.int64)
    X, y, _, stretch = _reference_windows(t, Z, labels, window)

    def ratio(columns):
        return _hac_ratio(X[:, columns], y, stretch, window)

    # a model without u: the residual is b times the integral of u, serially correlated
    # across many windows, so the sandwich variance is well above the plain one and the
    # statistics count n / ratio windows
    library = TermLibrary.from_terms(["1", "x"], ["x", "u"])
    done = _refit(library, Z, t, [n], labels, 1, window=window, compensate=False)
    assert ratio([0, 1]) > 2.0
    assert done.stats[0].n == pytest.approx(done.n_windows[0] / ratio([0, 1]), rel=1e-6)
    # the right model: the residual is the measurement noise, whose part in the targets
    # telescopes over overlapping windows, so the sandwich variance is below the plain one
    # and the statistics count more windows than there are (the variance the noise alone
    # makes, the lower bound, is below the sandwich's here)
    library = TermLibrary.from_terms(["1", "x", "u"], ["x", "u"])
    done = _refit(library, Z, t, [n], labels, 1, window=window, compensate=False)
    assert ratio([0, 1, 2]) < 1.0
    assert done.stats[0].n == pytest.approx(done.n_windows[0] / ratio([0, 1, 2]), rel=1e-6)


def test_selection_and_effective_windows_are_iterated_until_the_support_settles() -> None:
    # the fit handed in lacks u, whose contribution, left in its residuals, is serially
    # correlated over many windows: the first selection sees n / (a large ratio) windows;
    # it finds u, and the second sees the windows counted on the residuals of 1, x, u
    # (ratios by statsmodels' Newey-West against plain least squares; below 1 on the right
    # support, where the targets' noise telescopes); the support then stays and the
    # selection stops
    a, b, dt, window, n = 2.0, 3.0, 0.05, 8, 1500
    t, Z = _lag(a, b, dt, n, seed=6, noise=0.01)
    labels = np.zeros(n, dtype=np.int64)
    X, y, _, stretch = _reference_windows(t, Z, labels, window)

    def ratio(columns):
        return _hac_ratio(X[:, columns], y, stretch, window)

    library = TermLibrary.from_terms(["1", "x", "u"], ["x", "u"])
    terms = list(library.terms_)
    seen = []

    def select(stats):
        seen.append(stats.n)
        return fit_sparse_centred(stats, terms, library.variables_)

    old = _start_fit(terms, 1, n)
    old.support[2] = False  # no u
    dstats = [GramStats.from_arrays(library.transform(Z), np.zeros((n, 1)))]
    rows = Rows.of(Z, np.zeros((n, 1)), [n], t)
    done = integral_refit(
        library, rows, labels, [old], dstats, window=window, compensate=False, select=select
    )
    count = done.n_windows[0]
    assert ratio([0, 1]) > 2.0
    assert seen == [
        pytest.approx(count / ratio([0, 1]), rel=1e-6),
        pytest.approx(count / ratio([1, 2]), rel=1e-6),
    ]
    assert done.fits[0].support[:, 0].tolist() == [False, True, True]
    assert done.fits[0].coef[1:, 0] == pytest.approx([-a, b], rel=0.01)


def test_selection_on_windows_over_a_narrow_range_keeps_the_true_terms() -> None:
    # x' = -0.5 x + 0.1 u + 27 keeps x within about 54-55.2: 1, x and x^2 are nearly
    # collinear and only centring on the regime's own mean separates them (common
    # practice: centre before building polynomial terms).  On window statistics the mean is
    # weighted by the windows' durations (modemap.fit.centring._moments); the plain sum over
    # the number of windows put it 16 times too far out, and x^2 came in with 1 and x off
    # by 12-24 % (measured on this data before the fix)
    rng = np.random.default_rng(0)
    n, dt = 4000, 0.1
    u = np.repeat(rng.uniform(0.0, 6.0, n // 50 + 1), 50)[: n - 1]
    x = held_lag(56.0, u, dt, 0.5, 0.1, 27.0) + 0.01 * rng.standard_normal(n)
    Z = np.column_stack([x, np.append(u, u[-1])])
    library = TermLibrary(degree=2).fit(["x", "u"])
    terms = list(library.terms_)

    def select(stats):
        return fit_sparse_centred(stats, terms, library.variables_)

    done = _refit(library, Z, dt * np.arange(n), [n], np.zeros(n, dtype=np.int64), 1, select=select)
    coef = dict(zip(terms, done.fits[0].coef[:, 0], strict=True))
    assert {t for t, c in coef.items() if c != 0} == {"1", "x", "u"}
    assert coef["x"] == pytest.approx(-0.5, rel=0.01)
    assert coef["u"] == pytest.approx(0.1, rel=0.01)


@pytest.fixture(scope="module")
def reactor_true_labels():
    """The reactor demo with its TRUE labels and the true terms of its balances."""
    frame, truth = make_demo("reactor", seed=0)
    p = truth["parameters"]
    dil, cool = p["q"] / p["V"], p["UA"] / (p["V"] * p["rho_cp"])
    heat = -p["dH"] / p["rho_cp"]
    terms = ["1", "C_A", "T", "Tc", "C_A*exp(-8750/T)"]
    true = np.zeros((5, 2))
    true[[0, 1, 4], 0] = dil * p["C_Af"], -dil, -p["k0"]
    true[[0, 2, 3, 4], 1] = dil * p["T_f"], -dil - cool, cool, heat * p["k0"]
    library = TermLibrary.from_terms(terms, ["C_A", "T", "Tc"])
    Z = frame[["C_A [mol/L]", "T [K]", "Tc [K]"]].to_numpy()
    t = frame["t [min]"].to_numpy()
    lengths = frame.groupby("run").size().to_numpy()
    labels = frame["true_regime"].to_numpy().astype(np.int64)
    support = true != 0
    fits = []
    for _ in range(2):
        fit = _start_fit(terms, 2, 1)
        fit.support, fit.n_params = support, int(support.sum())
        fits.append(fit)
    dstats = [
        GramStats.from_arrays(library.transform(Z[labels == g]), np.zeros((np.sum(labels == g), 2)))
        for g in range(2)
    ]

    def run(compensate: bool):
        rows = Rows.of(Z, np.zeros((len(Z), 2)), lengths, t)
        return integral_refit(library, rows, labels, fits, dstats, window=16, compensate=compensate)

    return run, true, support


def test_reactor_coefficients_within_3_percent_with_the_noise_compensated(
    reactor_true_labels,
) -> None:
    run, true, support = reactor_true_labels
    done = run(compensate=True)
    # the noise estimate from fourth differences recovers the demo's 0.003 mol/L and 0.2 K
    np.testing.assert_allclose(done.noise, [0.003, 0.2], rtol=0.05)
    for fit in done.fits:  # measured: worst 0.18 % low branch, 1.13 % high branch
        rel = fit.coef[support] / true[support] - 1.0
        assert np.abs(rel).max() <= 0.03
        # the truth lies within three standard errors of every estimate (measured: 1.23)
        assert np.all(np.abs(fit.coef[support] - true[support]) <= 3.0 * fit.stderr[support])


def test_reactor_noise_in_the_terms_biases_the_plain_estimate(reactor_true_labels) -> None:
    # without the compensation, 0.003 mol/L of noise in C_A attenuates the Arrhenius term
    # on the high branch and Tc takes up the difference (measured: +4.71 %)
    run, true, _ = reactor_true_labels
    high = run(compensate=False).fits[1]
    assert high.coef[3, 1] / true[3, 1] - 1.0 > 0.03


def test_regime_without_windows_keeps_its_fit_and_short_runs_are_skipped() -> None:
    # regime 1 only ever lasts one sample: no window, so its fit is returned unchanged; a
    # run of one sample has no interval at all; unassigned samples (-1) give no window
    t, Z = _lag(2.0, 3.0, 0.05, 400, seed=5, noise=0.001)
    labels = np.zeros(t.size, dtype=np.int64)
    labels[50::97] = 1
    labels[300:320] = -1  # unassigned samples are left out
    library = TermLibrary.from_terms(["x", "u"], ["x", "u"])
    t = np.append(t, 0.0)
    Z = np.vstack([Z, Z[:1]])
    labels = np.append(labels, 0)
    old = [_start_fit(["x", "u"], 1, 1) for _ in range(2)]
    old[1].coef[:] = [[-7.0], [7.0]]
    dstats = [GramStats.from_arrays(library.transform(Z), np.zeros((t.size, 1)))] * 2
    rows = Rows.of(Z, np.zeros((t.size, 1)), [t.size - 1, 1], t)
    done = integral_refit(library, rows, labels, old, dstats)
    assert done.n_windows[1] == 0
    # the label-0 windows: those of the stretches of zeros alone
    zeros = window_bounds([t.size - 1, 1], np.where(labels == 0, 0, 1), 16)
    assert done.n_windows[0] == np.sum(labels[zeros[0]] == 0)
    np.testing.assert_array_equal(done.fits[1].coef, old[1].coef)
    assert done.fits[0].coef[0, 0] == pytest.approx(-2.0, rel=0.01)
    assert done.fits[0].coef[1, 0] == pytest.approx(3.0, rel=0.01)


def test_uneven_sampling_uses_each_interval_length() -> None:
    # the same lag sampled at uneven instants (exact solution over each interval)
    rng = np.random.default_rng(2)
    a, b = 2.0, 3.0
    dt = rng.uniform(0.02, 0.08, 3000)
    u = np.repeat(rng.uniform(0.0, 2.0, 3000 // 40 + 1), 40)[:3000]
    x = held_lag(1.0, u, dt, a, b)
    t = np.concatenate([[0.0], np.cumsum(dt)])
    Z = np.column_stack([x, np.append(u, u[-1])])
    library = TermLibrary.from_terms(["x", "u"], ["x", "u"])
    done = _refit(library, Z, t, [t.size], np.zeros(t.size, dtype=np.int64), 1)
    assert done.fits[0].coef[0, 0] == pytest.approx(-a, rel=3e-3)
    assert done.fits[0].coef[1, 0] == pytest.approx(b, rel=3e-3)


def test_noise_products_equal_the_exact_covariance_of_the_windows() -> None:
    # the windows' terms (1, x, x*u) are linear in the state's noise, so their noise parts
    # are W eps for a matrix W read off by unit perturbations, with covariance sigma^2 W W'
    # (textbook); the products from the partial derivatives must equal it.  u steps every
    # 40 samples, so held inputs and corrected window ends are both covered
    from modemap.regimes.integral import _add_noise_bias, _Windows

    t, Z = _lag(2.0, 3.0, 0.05, 300, seed=4)
    labels = (np.arange(t.size) // 110 % 2).astype(np.int64)
    library = TermLibrary.from_terms(["1", "x", "x*u"], ["x", "u"])
    windows = _Windows(library, Z, 1, t, [t.size], labels, 8, 2)
    sigma = 0.01
    bias, cross = np.zeros((2, 3, 3)), np.zeros((2, 3, 1))
    ((i, j),) = windows.chunks
    lo, hi, X0, Y0 = windows.chunk(i, j)
    _, _, s, e = windows.bounds(i, j)
    noise = np.array([sigma**2])
    _add_noise_bias(windows, (lo, hi), s, e, labels[lo:hi], noise, (bias, cross))
    dx, dy = np.zeros((t.size, *X0.shape)), np.zeros((t.size, *Y0.shape))
    for q in range(t.size):
        z = Z.copy()
        z[q, 0] += 1.0
        windows.Z, windows.right = z, right_ends(z, 1, [t.size])
        _, _, X, Y = windows.chunk(i, j)
        dx[q], dy[q] = X - X0, Y - Y0
    for g in range(2):
        rows = windows.regime == g
        exact = sigma**2 * np.einsum("qwa,qwb->ab", dx[:, rows], dx[:, rows])
        exact_cross = sigma**2 * np.einsum("qwa,qwb->ab", dx[:, rows], dy[:, rows])
        np.testing.assert_allclose(bias[g], exact, rtol=1e-9, atol=1e-15)
        np.testing.assert_allclose(cross[g], exact_cross, rtol=1e-9, atol=1e-15)


def test_compensation_is_skipped_where_it_would_break_the_normal_matrix() -> None:
    # a state that alternates by +-0.05 from sample to sample: fourth differences read it
    # as noise of about 0.14, but it cancels inside every window, so subtracting that much
    # noise from the normal matrix leaves it indefinite; the plain estimate is kept and
    # the result says so
    n = 2000
    t = 0.1 * np.arange(n)
    x = 5.0 + 0.05 * (-1.0) ** np.arange(n) + 0.01 * np.sin(t / 7.0)
    Z = np.column_stack([x, np.zeros(n)])
    library = TermLibrary.from_terms(["1", "x"], ["x", "u"])
    labels = np.zeros(n, dtype=np.int64)
    done = _refit(library, Z, t, [n], labels, 1)
    plain = _refit(library, Z, t, [n], labels, 1, compensate=False)
    assert done.noise[0] > 0.1
    assert not done.compensated[0, 0]
    np.testing.assert_allclose(done.fits[0].coef, plain.fits[0].coef, rtol=1e-8)
    assert plain.compensated.all()
