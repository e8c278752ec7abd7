"""Time derivatives of logged states, one run at a time.

The continuous form regresses ``dx/dt`` on candidate terms, so the derivative
estimate sets the noise floor of every fitted coefficient.  Four estimators
are offered (:data:`DERIVATIVE_METHODS`); ``"auto"`` chooses between the first
two from an estimate of the noise:

``central``
    Second-order central differences, second-order one-sided differences at
    the two ends, non-uniform time stamps allowed (``numpy.gradient`` with
    ``edge_order=2``).
``savgol``
    Savitzky-Golay smoothing derivative ("Smoothing and differentiation of data
    by simplified least squares procedures", Analytical Chemistry, 1964,
    DOI 10.1021/ac60214a047) through ``scipy.signal.savgol_filter``; needs a
    uniform step.  Options ``window`` (odd, in samples) and ``order``.
``spline``
    Derivative of a smoothing spline (``scipy.interpolate.UnivariateSpline``)
    whose smoothing ``s = n * sigma^2`` comes from the noise estimate
    ``sigma``.  Options ``smoothing`` (``s``) and ``degree`` (spline degree).
``tv``
    Total-variation regularised differentiation on the integral formulation
    ("Numerical differentiation of noisy, nonsmooth data", ISRN Applied
    Mathematics, 2011, DOI 10.5402/2011/164564), solved by lagged-diffusivity
    iterations, each one a banded (pentadiagonal) linear solve: O(n) per
    iteration.  Options ``alpha`` and ``iterations``.

Callers loop over runs: a derivative never crosses a run boundary.
"""

from __future__ import annotations

import warnings
from typing import Any

import numpy as np
from scipy.interpolate import UnivariateSpline
from scipy.linalg import solveh_banded
from scipy.signal import savgol_coeffs, savgol_filter

from modemap._exceptions import DataError

__all__ = [
    "DERIVATIVE_METHODS",
    "differentiate",
    "differentiate_runs",
    "estimate_noise",
    "gradient_rows",
]

DERIVATIVE_METHODS = ("central", "savgol", "spline", "tv")

# "auto" rule (see _auto_settings): central differences when the noise they let
# through is below CLEAN_FRACTION of the derivative's RMS, else Savitzky-Golay.
CLEAN_FRACTION = 0.01
TARGET_FRACTION = 0.1
MAX_AUTO_WINDOW = 101
UNIFORM_TOLERANCE = 1e-3
# Keys of a settings dict that describe what happened but are not options: a recorded
# settings dict can be passed back as ``differentiate(t, X, **settings)`` to replay it.
AUTO_ORDER = 3
RECORD_ONLY = frozenset({"auto", "noise", "step", "edge_order", "per_run"})
_MAD_SCALE = 0.6744897501960817  # median(|N(0,1)|)


def differentiate(
    t: np.ndarray, X: np.ndarray, method: str = "auto", **options: Any
) -> tuple[np.ndarray, dict[str, Any]]:
    """Estimate ``dX/dt`` for one run.

    Parameters
    ----------
    t : ndarray of shape (n,)
        Strictly increasing time stamps.
    X : ndarray of shape (n, m) or (n,)
        Signals in columns.
    method : {"auto", "central", "savgol", "spline", "tv"}
    **options
        ``savgol``: ``window`` (odd int), ``order`` (int, default 2);
        ``spline``: ``smoothing`` (float or one per column), ``degree`` (int,
        default 4); ``tv``: ``alpha`` (float or one per column), ``iterations``
        (int, default 30).  Keys in :data:`RECORD_ONLY` are ignored, so a
        returned ``settings`` dict (minus ``method``) replays the same estimate.

    Returns
    -------
    dX : ndarray of shape (n, m)
        (shape ``(n,)`` if ``X`` was 1-D).
    settings : dict
        ``{"method": ..., <parameters actually used>}``, JSON-friendly.

    Raises
    ------
    DataError
        On bad shapes, non-finite values, non-increasing time, an unknown
        method or option, or ``savgol`` on a non-uniform step.
    """
    t, X2, squeeze = _check_inputs(t, X)
    options = {k: v for k, v in options.items() if k not in RECORD_ONLY}
    if method not in ("auto", *DERIVATIVE_METHODS):
        raise DataError(
            f"unknown derivative method '{method}'; choose auto, {', '.join(DERIVATIVE_METHODS)}"
        )
    if t.shape[0] < 3:
        dX, settings = _short(t, X2)
    elif method == "auto":
        if options:
            raise DataError(f"derivative method 'auto' takes no options, got {sorted(options)}")
        sigma = estimate_noise(X2)
        name, chosen = _auto_method(t, X2, sigma)
        dX, settings = _METHODS[name](t, X2, **chosen)
        settings["auto"] = True
        settings["noise"] = [float(v) for v in sigma]
    else:
        _check_options(method, options)
        dX, settings = _METHODS[method](t, X2, **options)
    return (dX[:, 0] if squeeze else dX), settings


def differentiate_runs(
    time: np.ndarray, X: np.ndarray, lengths: np.ndarray, method: str = "auto", **options: Any
) -> tuple[np.ndarray, list[dict[str, Any]]]:
    """:func:`differentiate` of each run ``rows[starts[r] : starts[r] + lengths[r]]``, with runs
    of the same length computed together where the method allows it.

    With ``method="auto"`` and no options, runs of 5 to 34 samples (whose Savitzky-Golay
    window is always 5) are laid side by side: the noise, the step, the derivative's RMS and
    the choice between central differences and Savitzky-Golay are computed per run with the
    same formulas as :func:`differentiate`, central differences with NumPy's formulas term by
    term (:func:`gradient_rows`: the same numbers) and Savitzky-Golay with SciPy's filter
    along the stacked axis (the same to round-off: its end-point fits are one least-squares
    solve for all runs).  Explicit Savitzky-Golay settings (a recorded ``window`` and
    ``order``, as a refit replays them) are batched for runs of any length from 3 samples.
    Every other run, and any run that would be refused, goes through :func:`differentiate`
    alone.

    Returns
    -------
    dX : ndarray of shape (n, m)
    settings : list of dict
        One per run, as :func:`differentiate` returns them.
    """
    time = np.asarray(time, dtype=np.float64)
    X = np.asarray(X, dtype=np.float64).reshape(time.shape[0], -1)
    lengths = np.asarray(lengths, dtype=np.int64)
    starts = np.concatenate([[0], np.cumsum(lengths)[:-1]]).astype(np.int64)
    out = np.empty_like(X)
    settings: list[dict[str, Any] | None] = [None] * lengths.size
    given = {k: v for k, v in options.items() if k not in RECORD_ONLY}
    for n in np.unique(lengths):
        runs = np.flatnonzero(lengths == n)
        done = np.zeros(runs.size, dtype=bool)
        rows = starts[runs][:, None] + np.arange(n)
        if method == "auto" and not given and 5 <= n < 35:
            done = _auto_together(time[rows], X[rows], rows, out, settings, runs)
        elif method == "savgol" and n >= 3 and _savgol_options(given) is not None:
            window, order = _savgol_options(given)  # type: ignore[misc]
            window = min(window, n if n % 2 else n - 1)
            done = _savgol_together(
                time[rows], X[rows], rows, out, settings, runs, window, min(order, window - 1)
            )
        for r in runs[~done]:
            a, b = starts[r], starts[r] + lengths[r]
            out[a:b], settings[r] = differentiate(time[a:b], X[a:b], method, **options)
    return out, settings  # type: ignore[return-value]


def _savgol_options(given: dict[str, Any]) -> tuple[int, int] | None:
    """``(window, order)`` of explicit Savitzky-Golay options that are valid, else None
    (the one-run path then says what is wrong)."""
    if set(given) - {"window", "order"} or given.get("window") is None:
        return None
    window, order = int(given["window"]), int(given.get("order", 2))
    if window % 2 == 0 or window < 3 or not 1 <= order < window:
        return None
    return window, order


def _steps_together(t: np.ndarray, X: np.ndarray) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Steps ``(R, n - 1)``, which runs are finite and increasing, and each run's median step."""
    dt = np.diff(t, axis=1)
    valid = np.isfinite(t).all(axis=1) & np.isfinite(X).all(axis=(1, 2)) & (dt > 0).all(axis=1)
    return dt, valid, np.median(dt, axis=1)


def _savgol_together(
    t: np.ndarray,
    X: np.ndarray,
    rows: np.ndarray,
    out: np.ndarray,
    settings: list[dict[str, Any] | None],
    runs: np.ndarray,
    window: int,
    order: int,
) -> np.ndarray:
    """``differentiate(..., "savgol", window=..., order=...)`` for runs of one length (t:
    (R, n), X: (R, n, m)); writes ``out`` and ``settings``; returns which runs were done."""
    dt, valid, step = _steps_together(t, X)
    uniform = np.max(np.abs(dt - step[:, None]), axis=1) <= UNIFORM_TOLERANCE * step
    done = valid & uniform
    for h in np.unique(step[done]):
        pick = np.flatnonzero(done & (step == h))
        dx = savgol_filter(X[pick], window, order, deriv=1, delta=h, axis=1, mode="interp")
        for i, d in zip(pick, dx, strict=True):
            out[rows[i]] = d
            settings[runs[i]] = {
                "method": "savgol",
                "window": window,
                "order": order,
                "step": float(h),
            }
    return done


def _auto_together(
    t: np.ndarray,
    X: np.ndarray,
    rows: np.ndarray,
    out: np.ndarray,
    settings: list[dict[str, Any] | None],
    runs: np.ndarray,
) -> np.ndarray:
    """``differentiate(..., "auto")`` for runs of one length ``n`` in [5, 35) (t: (R, n),
    X: (R, n, m)); writes ``out`` and ``settings``; returns which runs were done."""
    dt, valid, step = _steps_together(t, X)
    d4 = np.diff(X, n=4, axis=1)
    mad = np.median(np.abs(d4 - np.median(d4, axis=1, keepdims=True)), axis=1)
    sigma = mad / _MAD_SCALE / np.sqrt(70.0)  # estimate_noise, run by run
    exact = (dt == dt[:, :1]).all(axis=1)
    grad = np.empty_like(X)
    for flag in (True, False):
        pick = exact == flag
        if pick.any():
            grad[pick] = gradient_rows(X[pick], t[pick], uniform=flag, edge_order=2)
    with np.errstate(divide="ignore", invalid="ignore"):
        raw = np.mean(grad**2, axis=1)
        rms = np.sqrt(np.maximum(raw - sigma**2 / (2.0 * step[:, None] ** 2), 0.0))
        clean = np.all(sigma / (np.sqrt(2.0) * step[:, None]) <= CLEAN_FRACTION * rms, axis=1)
    uniform = np.max(np.abs(dt - step[:, None]), axis=1) <= UNIFORM_TOLERANCE * step
    central = valid & clean
    smooth = valid & ~clean & uniform
    for i in np.flatnonzero(central):
        out[rows[i]] = grad[i]
    for h in np.unique(step[smooth]):
        pick = np.flatnonzero(smooth & (step == h))
        dx = savgol_filter(X[pick], 5, AUTO_ORDER, deriv=1, delta=h, axis=1, mode="interp")
        for i, d in zip(pick, dx, strict=True):
            out[rows[i]] = d
    for i in np.flatnonzero(central | smooth):
        chosen: dict[str, Any] = (
            {"method": "central"}
            if central[i]
            else {"method": "savgol", "window": 5, "order": AUTO_ORDER, "step": float(step[i])}
        )
        chosen["auto"] = True
        chosen["noise"] = [float(v) for v in sigma[i]]
        settings[runs[i]] = chosen
    return central | smooth


def estimate_noise(X: np.ndarray) -> np.ndarray:
    """Noise standard deviation per column from fourth differences.

    For white noise of variance ``sigma^2`` the fourth difference has variance
    ``70 sigma^2`` (binomial coefficients of order 4, squared and summed), while
    a smooth signal contributes ``O(h^4)``; the median absolute deviation makes
    the estimate robust to a few steps or spikes (common practice).

    Parameters
    ----------
    X : ndarray of shape (n, m)

    Returns
    -------
    ndarray of shape (m,)
        Zero when fewer than 5 samples.
    """
    X = np.asarray(X, dtype=np.float64).reshape(X.shape[0], -1)
    if X.shape[0] < 5:
        return np.zeros(X.shape[1])
    d4 = np.diff(X, n=4, axis=0)
    mad = np.median(np.abs(d4 - np.median(d4, axis=0)), axis=0)
    return mad / _MAD_SCALE / np.sqrt(70.0)


# ------------------------------------------------------------------ methods


def _central(t: np.ndarray, X: np.ndarray) -> tuple[np.ndarray, dict[str, Any]]:
    return np.gradient(X, t, axis=0, edge_order=2), {"method": "central"}


def _savgol(
    t: np.ndarray, X: np.ndarray, window: int | None = None, order: int = 2
) -> tuple[np.ndarray, dict[str, Any]]:
    step = _uniform_step(t, "savgol")
    n = X.shape[0]
    if window is None:
        window = _noise_window(t, X, step)
    window, order = int(window), int(order)
    if window % 2 == 0 or window < 3:
        raise DataError(f"savgol window must be an odd number of samples >= 3, got {window}")
    if not 1 <= order < window:
        raise DataError(f"savgol order must be between 1 and window-1 ({window - 1}), got {order}")
    window = min(window, n if n % 2 else n - 1)
    order = min(order, window - 1)
    dX = savgol_filter(X, window, order, deriv=1, delta=step, axis=0, mode="interp")
    return dX, {"method": "savgol", "window": window, "order": order, "step": step}


def _spline(
    t: np.ndarray, X: np.ndarray, smoothing: float | None = None, degree: int = 4
) -> tuple[np.ndarray, dict[str, Any]]:
    n = X.shape[0]
    degree = int(degree)
    if not 1 <= degree <= 5:
        raise DataError(f"spline degree must be between 1 and 5, got {degree}")
    degree = min(degree, n - 1)
    if smoothing is None:
        levels = [float(n * s**2) for s in estimate_noise(X)]
    else:
        levels = _per_column(smoothing, X.shape[1], "smoothing")
    dX = np.empty_like(X)
    for j in range(X.shape[1]):
        spline, levels[j] = _fit_spline(t, X[:, j], degree, levels[j])
        dX[:, j] = spline.derivative()(t)
    return dX, {"method": "spline", "degree": degree, "smoothing": levels}


def _fit_spline(t: np.ndarray, x: np.ndarray, degree: int, s: float) -> tuple[Any, float]:
    """Smoothing spline with ``s``; if the knot search fails, retry with 1.5x ``s``.

    A smoothing level below round-off of the data is treated as 0 (interpolation).
    """
    if s <= x.shape[0] * (1e-12 * max(float(np.std(x)), 1e-300)) ** 2:
        s = 0.0
    for _ in range(6):
        with warnings.catch_warnings(record=True) as caught:
            warnings.simplefilter("always")
            spline = UnivariateSpline(t, x, k=degree, s=s)
        if not caught or s == 0.0:
            break
        s *= 1.5
    return spline, float(s)


def _tv(
    t: np.ndarray, X: np.ndarray, alpha: float | None = None, iterations: int = 30
) -> tuple[np.ndarray, dict[str, Any]]:
    iterations = int(iterations)
    if iterations < 1:
        raise DataError(f"tv iterations must be >= 1, got {iterations}")
    sigma = estimate_noise(X)
    if alpha is None:
        # Heuristic scale: a jump of the derivative costs about what the noise costs
        # over the data (common practice for choosing TV weights; tune with alpha=).
        alphas = [float(s * np.sqrt(X.shape[0]) * np.median(np.diff(t))) for s in sigma]
    else:
        alphas = _per_column(alpha, X.shape[1], "alpha")
    dX = np.empty_like(X)
    for j, a in enumerate(alphas):
        dX[:, j] = _tv_column(t, X[:, j], a, iterations)
    return dX, {"method": "tv", "alpha": alphas, "iterations": iterations}


def _tv_column(t: np.ndarray, x: np.ndarray, alpha: float, iterations: int) -> np.ndarray:
    """Minimise ``0.5*||y - x||^2 + alpha * sum |u[k+1] - u[k]|`` with ``u = dy/dt``.

    ``y`` is the integral of the piecewise-constant derivative ``u`` (plus a
    constant), so this is the integral formulation of TV differentiation written
    in the variable ``y``.  With ``G`` the operator ``y -> u[k+1] - u[k]``,
    lagged diffusivity solves ``(I + alpha G^T W G) y = x`` with
    ``W = diag(1/sqrt((G y)^2 + eps))`` frozen at the previous iterate.
    """
    n = x.shape[0]
    if alpha <= 0 or n < 4:
        return np.gradient(x, t, edge_order=2)
    dt = np.diff(t)
    # G y = (y[k+2]-y[k+1])/dt[k+1] - (y[k+1]-y[k])/dt[k]: three diagonals.
    g0, g2 = 1.0 / dt[:-1], 1.0 / dt[1:]
    g1 = -(g0 + g2)
    scale = max(float(np.max(np.abs(_second_slope(x, g0, g1, g2)))), 1e-300)
    eps = (1e-6 * scale) ** 2
    y = x.copy()
    for _ in range(iterations):
        w = alpha / np.sqrt(_second_slope(y, g0, g1, g2) ** 2 + eps)
        y = solveh_banded(_banded_normal(w, g0, g1, g2, n), x, lower=True, check_finite=False)
    return np.gradient(y, t, edge_order=1)


def _second_slope(y: np.ndarray, g0: np.ndarray, g1: np.ndarray, g2: np.ndarray) -> np.ndarray:
    return g0 * y[:-2] + g1 * y[1:-1] + g2 * y[2:]


def _banded_normal(
    w: np.ndarray, g0: np.ndarray, g1: np.ndarray, g2: np.ndarray, n: int
) -> np.ndarray:
    """Lower banded storage of ``I + G^T diag(w) G`` (bandwidth 2)."""
    ab = np.zeros((3, n))
    ab[0] = 1.0
    coeffs = (g0, g1, g2)
    for a in range(3):
        for b in range(a, 3):
            ab[b - a, a : a + n - 2] += w * coeffs[a] * coeffs[b]
    return ab


def _short(t: np.ndarray, X: np.ndarray) -> tuple[np.ndarray, dict[str, Any]]:
    if t.shape[0] < 2:
        raise DataError("a derivative needs at least 2 samples in a run")
    return np.gradient(X, t, axis=0, edge_order=1), {"method": "central", "edge_order": 1}


_METHODS = {"central": _central, "savgol": _savgol, "spline": _spline, "tv": _tv}
_OPTIONS = {
    "central": set(),
    "savgol": {"window", "order"},
    "spline": {"smoothing", "degree"},
    "tv": {"alpha", "iterations"},
}


# --------------------------------------------------------------------- auto


def _auto_method(t: np.ndarray, X: np.ndarray, sigma: np.ndarray) -> tuple[str, dict[str, Any]]:
    """Pick ``central`` or ``savgol`` (and its options) from the noise level ``sigma``.

    Rule: with ``h`` the median step and ``sigma`` the noise of a column,
    central differences pass noise of standard deviation ``sigma/(sqrt(2) h)``
    into the derivative.  If that is below ``CLEAN_FRACTION`` (1%) of the RMS of
    the derivative in every column, use ``central``.  Otherwise use
    ``savgol`` of order 3 with the window from :func:`_noise_window`; on a
    non-uniform step (or fewer than 5 samples) fall back to ``spline`` (or
    ``central``).  ``tv`` is never chosen automatically (its cost and its
    tuning make it an explicit choice).
    """
    step = float(np.median(np.diff(t)))
    rms = _derivative_rms(t, X, sigma, step)
    if np.all(sigma / (np.sqrt(2.0) * step) <= CLEAN_FRACTION * rms) or X.shape[0] < 5:
        return "central", {}
    if not _is_uniform(t):
        return "spline", {}
    return "savgol", {"window": _noise_window(t, X, step, sigma, rms), "order": AUTO_ORDER}


def _derivative_rms(t: np.ndarray, X: np.ndarray, sigma: np.ndarray, step: float) -> np.ndarray:
    """RMS of the true derivative: central-difference RMS minus the noise share."""
    raw = np.mean(np.gradient(X, t, axis=0, edge_order=2) ** 2, axis=0)
    return np.sqrt(np.maximum(raw - sigma**2 / (2.0 * step**2), 0.0))


def _noise_window(
    t: np.ndarray,
    X: np.ndarray,
    step: float,
    sigma: np.ndarray | None = None,
    rms: np.ndarray | None = None,
) -> int:
    """Savitzky-Golay window from the noise level.

    A cubic (``AUTO_ORDER``) fit is used because its slope at the window
    centre has no bias from the curvature and only a fourth-order bias term,
    where a quadratic fit's slope is as biased as a straight line's.  The noise
    passed into the derivative by a window of ``w`` samples is
    ``sigma * sqrt(sum(c_i^2))``, with ``c`` the filter's derivative
    coefficients (``scipy.signal.savgol_coeffs``).  The window is the smallest
    odd ``w >= 5`` bringing this below ``TARGET_FRACTION`` (10%) of the
    derivative RMS in the noisiest column, capped at ``MAX_AUTO_WINDOW`` (101)
    and at a fifth of the run (odd, at least 5).  The derivative feeds a least
    squares fit, which averages zero-mean noise in the target over many samples
    but not the smoothing bias of a wide window: hence the generous 10%.
    """
    n = X.shape[0]
    sigma = estimate_noise(X) if sigma is None else sigma
    rms = _derivative_rms(t, X, sigma, step) if rms is None else rms
    cap = max(5, min(MAX_AUTO_WINDOW, n // 5))
    cap -= 1 - cap % 2
    cap = min(cap, n if n % 2 else n - 1)
    gains = {}
    window = 5
    for s, r in zip(sigma, rms, strict=True):
        target = TARGET_FRACTION * r
        w = 5
        while w < cap:
            if w not in gains:
                c = savgol_coeffs(w, AUTO_ORDER, deriv=1, delta=step)
                gains[w] = float(np.sqrt(np.sum(c * c)))
            if target > 0 and s * gains[w] <= target:
                break
            w += 2
        window = max(window, w)
    return int(min(window, cap))


# --------------------------------------------------------------- validation


def _check_inputs(t: np.ndarray, X: np.ndarray) -> tuple[np.ndarray, np.ndarray, bool]:
    t = np.asarray(t, dtype=np.float64)
    X = np.asarray(X, dtype=np.float64)
    squeeze = X.ndim == 1
    X2 = X[:, None] if squeeze else X
    if t.ndim != 1 or X2.ndim != 2 or X2.shape[0] != t.shape[0]:
        raise DataError(f"time has shape {t.shape} and signals {X.shape}; expected (n,) and (n, m)")
    if not (np.all(np.isfinite(t)) and np.all(np.isfinite(X2))):
        raise DataError("time or signals contain NaN or infinite values; clean or split the run")
    if t.shape[0] > 1 and np.any(np.diff(t) <= 0):
        row = int(np.argmax(np.diff(t) <= 0)) + 1
        raise DataError("time is not strictly increasing", row=row + 1)
    return t, X2, squeeze


def _check_options(method: str, options: dict[str, Any]) -> None:
    unknown = set(options) - _OPTIONS[method]
    if unknown:
        allowed = ", ".join(sorted(_OPTIONS[method])) or "none"
        raise DataError(
            f"unknown option(s) {', '.join(sorted(unknown))} for derivative method "
            f"'{method}'; allowed: {allowed}"
        )


def _per_column(value: Any, m: int, name: str) -> list[float]:
    """A scalar option, or one value per column (as recorded in settings)."""
    values = np.atleast_1d(np.asarray(value, dtype=np.float64))
    if values.size == 1:
        values = np.repeat(values, m)
    if values.shape != (m,) or not np.all(np.isfinite(values)) or np.any(values < 0):
        raise DataError(f"derivative option {name} must be >= 0, one value or one per column ({m})")
    return [float(v) for v in values]


def _is_uniform(t: np.ndarray) -> bool:
    dt = np.diff(t)
    step = np.median(dt)
    return bool(np.max(np.abs(dt - step)) <= UNIFORM_TOLERANCE * step)


def _uniform_step(t: np.ndarray, method: str) -> float:
    if not _is_uniform(t):
        raise DataError(
            f"derivative method '{method}' needs a uniform time step; resample the data "
            "or use 'central' or 'spline'"
        )
    return float(np.median(np.diff(t)))


def gradient_rows(f: np.ndarray, t: np.ndarray, *, uniform: bool, edge_order: int) -> np.ndarray:
    """``np.gradient(f[s], t[s], axis=0, edge_order=...)`` for every run ``s`` at once.

    ``f`` is (runs, n, m) and ``t`` (runs, n); ``uniform`` says that every run's steps are
    all equal (NumPy's own test, ``dt == dt[0]``, then takes its scalar-spacing formulas).
    NumPy's formulas term by term in the same order, so each run gets the same numbers as
    alone.
    """
    dx = np.diff(t, axis=1)[:, :, None]  # (S, n - 1, 1)
    h = dx[:, :1]  # the spacing of a uniform stretch
    out = np.empty_like(f)
    if uniform:
        out[:, 1:-1] = (f[:, 2:] - f[:, :-2]) / (2.0 * h)
    else:
        dx1, dx2 = dx[:, :-1], dx[:, 1:]
        a = -(dx2) / (dx1 * (dx1 + dx2))
        b = (dx2 - dx1) / (dx1 * dx2)
        c = dx1 / (dx2 * (dx1 + dx2))
        out[:, 1:-1] = a * f[:, :-2] + b * f[:, 1:-1] + c * f[:, 2:]
    if edge_order == 1:
        out[:, :1] = (f[:, 1:2] - f[:, :1]) / (h if uniform else dx[:, :1])
        out[:, -1:] = (f[:, -1:] - f[:, -2:-1]) / (h if uniform else dx[:, -1:])
        return out
    if uniform:
        a, b, c = -1.5 / h, 2.0 / h, -0.5 / h
    else:
        dx1, dx2 = dx[:, :1], dx[:, 1:2]
        a = -(2.0 * dx1 + dx2) / (dx1 * (dx1 + dx2))
        b = (dx1 + dx2) / (dx1 * dx2)
        c = -dx1 / (dx2 * (dx1 + dx2))
    out[:, :1] = a * f[:, :1] + b * f[:, 1:2] + c * f[:, 2:3]
    if uniform:
        a, b, c = 0.5 / h, -2.0 / h, 1.5 / h
    else:
        dx1, dx2 = dx[:, -2:-1], dx[:, -1:]
        a = (dx2) / (dx1 * (dx1 + dx2))
        b = -(dx2 + dx1) / (dx1 * dx2)
        c = (2.0 * dx2 + dx1) / (dx2 * (dx1 + dx2))
    out[:, -1:] = a * f[:, -3:-2] + b * f[:, -2:-1] + c * f[:, -1:]
    return out
