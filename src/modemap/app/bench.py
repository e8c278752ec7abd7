"""Scale benchmark: wall time and peak memory of a fit against a floor measured in the same run.

Run it as ``modemap bench`` (or ``python -m modemap bench``); it is not part of the test suite's
pass/fail.  For every size N (default 10^5, 10^6, 10^7 samples) it

1. generates an invented system (:func:`invented_system`: three regimes of a three-state,
   one-input discrete-time system with one quadratic term, switching at random, recorded as
   runs of 10,000 samples) and writes it to one Parquet file;
2. measures the **floor** in a fresh subprocess: read the file once (pyarrow), build the
   degree-2 term matrix once (preallocated, all rows), one normal-equation pass
   ``G = A'A, b = A'Y`` and the solve;
3. measures the **fit** in another fresh subprocess: ``read_data`` then ``RegimeFinder`` with
   ``n_regimes="auto"`` (K = 1..6), discrete form, degree-2 terms, with the time spent in each
   stage (regression rows, HMM proposal, refinement, held-out scoring, the rest);
4. reports peak memory of each subprocess (``VmHWM`` from ``/proc/self/status``, the peak
   resident set size, read by the subprocess itself at its end), the ratio of each time to
   the floor, and the growth exponent of time in N (slope of log time against log N).

It also fits the same invented two-regime autoregression of 10^4 samples with statsmodels'
``MarkovAutoregression`` (maximum likelihood, "A new approach to the economic analysis of
nonstationary time series and the business cycle", Econometrica 57(2), 1989,
DOI 10.2307/1912559) and with our discrete form (``RegimeFinder``, affine model, two regimes)
and prints both times and the largest parameter error of each.
"""

from __future__ import annotations

import argparse
import contextlib
import json
import os
import platform
import subprocess
import sys
import tempfile
import time
from collections.abc import Callable, Iterator, Sequence
from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd

__all__ = [
    "add_arguments",
    "growth_exponent",
    "invented_switching_ar",
    "invented_system",
    "machine_info",
    "run",
]

SIZES = (100_000, 1_000_000, 10_000_000)
RUN_LENGTH = 10_000
STATES = ("x1", "x2", "x3")
INPUTS = ("u",)
DEGREE = 2
_RESULT = "BENCH-RESULT "

# ----------------------------------------------------------------------------- invented data

# Invented system: equilibria, local matrices (stable), input gains and a quadratic term
# (x1 - e1)^2 acting on x2, one set per regime.
_EQUILIBRIA = np.array([[-2.0, 0.0, 1.0], [0.0, 1.5, -1.0], [2.0, -1.0, 0.0]])
_MATRICES = np.array(
    [
        [[0.90, 0.05, 0.00], [0.00, 0.85, 0.05], [0.05, 0.00, 0.80]],
        [[0.80, -0.10, 0.00], [0.10, 0.90, 0.00], [0.00, 0.05, 0.95]],
        [[0.95, 0.00, 0.05], [0.00, 0.80, -0.05], [-0.05, 0.00, 0.85]],
    ]
)
_INPUT_GAIN = np.array([[0.1, 0.0, 0.0], [0.0, 0.1, 0.0], [0.0, 0.0, 0.1]])
_QUADRATIC = np.array([0.0, 0.02, -0.02])


def invented_system(n: int, seed: int = 0) -> tuple[pd.DataFrame, np.ndarray]:
    """Invented three-regime, three-state, one-input discrete-time system (benchmark data).

    Runs of :data:`RUN_LENGTH` samples are simulated side by side (vectorised across runs).
    In regime ``r`` the deviation ``d = x - e_r`` from the regime's equilibrium evolves as
    ``d' = A_r d + b_r u + q_r d_1^2 e_2 + noise`` (noise standard deviation 0.02); the regime
    switches with probability 1/400 per step to one of the other two, and the input jumps to a
    new uniform level in [-1, 1] with probability 1/300 per step.

    Parameters
    ----------
    n : int
        Samples in total (rounded down to whole runs; at least one run).
    seed : int

    Returns
    -------
    frame : DataFrame
        Columns ``run, t, x1, x2, x3, u`` (step 0.1).
    regimes : ndarray of int
        True regime of every row.
    """
    rng = np.random.default_rng(seed)
    n_runs = max(1, n // RUN_LENGTH)
    length = max(n // n_runs, 2)
    k = _EQUILIBRIA.shape[0]
    x = np.empty((length, n_runs, 3))
    u = np.empty((length, n_runs))
    reg = np.empty((length, n_runs), dtype=np.int8)
    r = rng.integers(0, k, n_runs)
    xs = _EQUILIBRIA[r] + 0.1 * rng.standard_normal((n_runs, 3))
    us = rng.uniform(-1.0, 1.0, n_runs)
    onto_x2 = np.array([0.0, 1.0, 0.0])
    for step in range(length):
        x[step], u[step], reg[step] = xs, us, r
        d = xs - _EQUILIBRIA[r]
        xs = (
            _EQUILIBRIA[r]
            + np.einsum("rij,rj->ri", _MATRICES[r], d)
            + _INPUT_GAIN[r] * us[:, None]
            + _QUADRATIC[r][:, None] * onto_x2 * d[:, :1] ** 2
            + 0.02 * rng.standard_normal((n_runs, 3))
        )
        switch = rng.random(n_runs) < 1.0 / 400.0
        r = np.where(switch, (r + rng.integers(1, k, n_runs)) % k, r)
        jump = rng.random(n_runs) < 1.0 / 300.0
        us = np.where(jump, rng.uniform(-1.0, 1.0, n_runs), us)
    states = x.transpose(1, 0, 2).reshape(-1, 3)
    frame = pd.DataFrame(
        {
            "run": np.repeat(np.arange(n_runs), length),
            "t": np.tile(np.arange(length) * 0.1, n_runs),
            "x1": states[:, 0],
            "x2": states[:, 1],
            "x3": states[:, 2],
            "u": u.T.reshape(-1),
        }
    )
    return frame, reg.T.reshape(-1).astype(np.int64)


_AR_TRUTH = {
    "mean": np.array([1.0, 1.0]),
    "ar": np.array([0.2, 0.9]),
    "sigma": np.array([0.2, 0.5]),
    "stay": np.array([0.99, 0.98]),
}


def invented_switching_ar(n: int = 10_000, seed: int = 0) -> tuple[pd.Series, dict[str, Any]]:
    """Invented two-regime autoregression in statsmodels' ``MarkovAutoregression`` form.

    ``y_t - mu_{s_t} = phi_{s_t} (y_{t-1} - mu_{s_{t-1}}) + sigma_{s_t} e_t`` with a two-state
    Markov chain ``s``.  Both regimes share the mean, so this is exactly the model our discrete
    form fits, ``y_t = c_s + a_s y_{t-1} + noise`` with ``c_s = mu (1 - phi_s)``: the regimes
    differ by their dynamics (memory and noise level) only.

    Returns
    -------
    y : Series
        ``n`` samples.
    truth : dict
        ``mean, ar, sigma, stay`` (arrays of two, regime 0 has the smaller AR coefficient).
    """
    rng = np.random.default_rng(seed)
    t = _AR_TRUTH
    s = np.empty(n, dtype=np.int64)
    s[0] = 0
    u = rng.random(n)
    for i in range(1, n):
        s[i] = s[i - 1] if u[i] < t["stay"][s[i - 1]] else 1 - s[i - 1]
    e = rng.standard_normal(n) * t["sigma"][s]
    y = np.empty(n)
    y[0] = t["mean"][0] + e[0]
    for i in range(1, n):
        y[i] = t["mean"][s[i]] + t["ar"][s[i]] * (y[i - 1] - t["mean"][s[i - 1]]) + e[i]
    return pd.Series(y, name="y"), dict(t)


# ----------------------------------------------------------------------------- machine


def machine_info() -> dict[str, Any]:
    """nproc, memory, CPU model, Python, numpy and the BLAS in use (threadpoolctl)."""
    info: dict[str, Any] = {
        "nproc": os.cpu_count(),
        "python": platform.python_version(),
        "numpy": np.__version__,
    }
    with contextlib.suppress(OSError):
        for line in Path("/proc/cpuinfo").read_text().splitlines():
            if line.startswith("model name"):
                info["cpu"] = line.split(":", 1)[1].strip()
                break
    with contextlib.suppress(OSError, ValueError):
        for line in Path("/proc/meminfo").read_text().splitlines():
            if line.startswith("MemTotal"):
                info["memory_gb"] = round(int(line.split()[1]) / 1024**2, 1)
    with contextlib.suppress(ImportError):
        from threadpoolctl import threadpool_info

        info["blas"] = [
            f"{p.get('internal_api')} {p.get('version')} ({p.get('num_threads')} threads)"
            for p in threadpool_info()
            if p.get("user_api") == "blas"
        ]
    return info


def _peak_mb() -> float:
    """Peak resident memory of this process in MB (VmHWM; ru_maxrss as a fallback)."""
    with contextlib.suppress(OSError, ValueError):
        for line in Path("/proc/self/status").read_text().splitlines():
            if line.startswith("VmHWM:"):
                return int(line.split()[1]) / 1024.0
    import resource

    return resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024.0


# ----------------------------------------------------------------------------- child work


def measure_floor(path: str | Path) -> dict[str, Any]:
    """Read once, build the term matrix once, one normal-equation pass and solve (seconds)."""
    import pyarrow.parquet as pq

    from modemap.terms.library import TermLibrary

    t0 = time.perf_counter()
    table = pq.read_table(path, columns=["run", "t", *STATES, *INPUTS])
    cols = {name: table.column(name).to_numpy() for name in table.column_names}
    t1 = time.perf_counter()
    Z = np.column_stack([cols[c] for c in (*STATES, *INPUTS)])
    Y = Z[1:, : len(STATES)]
    library = TermLibrary(degree=DEGREE).fit([*STATES, *INPUTS])
    A = np.empty((Z.shape[0] - 1, library.n_terms_))
    library.transform(Z[:-1], out=A)
    t2 = time.perf_counter()
    G = A.T @ A
    b = A.T @ Y
    np.linalg.solve(G, b)
    t3 = time.perf_counter()
    return {
        "read": t1 - t0,
        "terms": t2 - t1,
        "normal": t3 - t2,
        "total": t3 - t0,
        "n_terms": library.n_terms_,
        "peak_mb": _peak_mb(),
    }


class _Stopwatch:
    """Accumulated time of selected functions, by wrapping module attributes temporarily."""

    def __init__(self) -> None:
        self.times: dict[str, float] = {}
        self.counts: dict[str, int] = {}

    def wrap(self, module: Any, attribute: str, stage: str) -> Callable[[], None]:
        original = getattr(module, attribute, None)
        if original is None:
            return lambda: None

        def timed(*args: Any, **kwargs: Any) -> Any:
            t0 = time.perf_counter()
            try:
                result = original(*args, **kwargs)
            finally:
                self.times[stage] = self.times.get(stage, 0.0) + time.perf_counter() - t0
            self.counts[stage] = self.counts.get(stage, 0) + 1
            monitor = getattr(result, "monitor", None)
            if monitor is not None:  # refinement: count its iterations too
                self.counts["iterations"] = self.counts.get("iterations", 0) + monitor.iterations
            return result

        setattr(module, attribute, timed)
        return lambda: setattr(module, attribute, original)


@contextlib.contextmanager
def _stage_timers(watch: _Stopwatch) -> Iterator[None]:
    import modemap.regimes.finder as finder
    import modemap.regimes.selection as selection

    undo = [
        watch.wrap(finder, "prepare_regression", "regression rows"),
        watch.wrap(finder, "propose", "proposal"),
        watch.wrap(finder, "refine", "refinement"),
        watch.wrap(selection, "holdout_error", "held-out scoring"),
    ]
    try:
        yield
    finally:
        for u in undo:
            u()


def measure_fit(
    path: str | Path,
    *,
    max_regimes: int = 6,
    engine: str = "local",
    scheduler: str | None = None,
) -> dict[str, Any]:
    """``read_data`` + ``RegimeFinder`` (auto K, discrete form, degree 2), time per stage."""
    from modemap.data.intake import read_data
    from modemap.fit.local_model import SparseLocalModel
    from modemap.regimes.finder import RegimeFinder

    watch = _Stopwatch()
    t0 = time.perf_counter()
    ds = read_data(path, time="t", states=list(STATES), inputs=list(INPUTS), run="run")
    t1 = time.perf_counter()
    options: dict[str, Any] = {}
    if engine != "local" or scheduler:
        options = {"engine": engine, "scheduler": scheduler}
    finder = RegimeFinder(
        n_regimes="auto",
        max_regimes=max_regimes,
        form="discrete",
        local_model=SparseLocalModel(degree=DEGREE),
        **options,
    )
    with _stage_timers(watch):
        finder.fit(ds)
    t2 = time.perf_counter()
    stages = {"read": t1 - t0, **watch.times}
    stages["other"] = (t2 - t0) - sum(stages.values())
    return {
        "stages": stages,
        "total": t2 - t0,
        "calls": watch.counts,
        "n_regimes": int(finder.n_regimes_),
        "agreement": _agreement(path, finder.labels_),
        "peak_mb": _peak_mb(),
    }


def _agreement(path: str | Path, labels: list[np.ndarray]) -> float | None:
    """Adjusted Rand index between found and true regimes (truth stored beside the data)."""
    truth_path = Path(str(path) + ".regimes.npy")
    if not truth_path.exists():
        return None
    from sklearn.metrics import adjusted_rand_score

    return float(adjusted_rand_score(np.load(truth_path), np.concatenate(labels)))


def _child(args: argparse.Namespace) -> int:
    if args.child == "floor":
        result = measure_floor(args.data)
    else:
        result = measure_fit(
            args.data,
            max_regimes=args.max_regimes,
            engine=args.engine,
            scheduler=args.scheduler,
        )
    print(_RESULT + json.dumps(result), flush=True)
    return 0


def _in_subprocess(kind: str, data: Path, args: argparse.Namespace) -> dict[str, Any]:
    """Run one measurement in a fresh interpreter so peaks and caches do not mix."""
    cmd = [sys.executable, "-m", "modemap", "bench", "--child", kind, "--data", str(data)]
    cmd += ["--max-regimes", str(args.max_regimes), "--engine", args.engine]
    if args.scheduler:
        cmd += ["--scheduler", args.scheduler]
    try:
        proc = subprocess.run(
            cmd, capture_output=True, text=True, timeout=args.timeout, check=False
        )
    except subprocess.TimeoutExpired:
        return {"error": f"timed out after {args.timeout:g} s"}
    for line in proc.stdout.splitlines():
        if line.startswith(_RESULT):
            return json.loads(line[len(_RESULT) :])
    tail = (proc.stderr.strip().splitlines() or ["no output"])[-1]
    return {"error": f"exit code {proc.returncode}: {tail}"}


# ----------------------------------------------------------------------------- comparison


def compare_markov(n: int = 10_000, seed: int = 0) -> dict[str, Any]:
    """statsmodels ``MarkovAutoregression`` and our discrete form on the same data.

    Errors are the largest absolute error over the regime means, AR coefficients, noise
    standard deviations and stay probabilities (regimes matched by AR coefficient).
    """
    import warnings

    from statsmodels.tsa.regime_switching.markov_autoregression import MarkovAutoregression

    from modemap.data.intake import read_data
    from modemap.fit.local_model import AffineLocalModel
    from modemap.regimes.finder import RegimeFinder

    y, truth = invented_switching_ar(n, seed)
    t0 = time.perf_counter()
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        res = MarkovAutoregression(
            y.to_numpy(), k_regimes=2, order=1, switching_ar=True, switching_variance=True
        ).fit(disp=False)
    t_sm = time.perf_counter() - t0
    p = dict(zip(res.model.param_names, np.asarray(res.params), strict=True))
    sm = {
        "mean": np.array([p["const[0]"], p["const[1]"]]),
        "ar": np.array([p["ar.L1[0]"], p["ar.L1[1]"]]),
        "sigma": np.sqrt([p["sigma2[0]"], p["sigma2[1]"]]),
        "stay": np.array([p["p[0->0]"], 1.0 - p["p[1->0]"]]),
    }
    t0 = time.perf_counter()
    frame = pd.DataFrame({"t": np.arange(n, dtype=np.float64), "y": y.to_numpy()})
    ds = read_data(frame, time="t", states=["y"])
    finder = RegimeFinder(
        n_regimes=2, form="discrete", local_model=AffineLocalModel(), covariance="full"
    ).fit(ds)
    t_ours = time.perf_counter() - t0
    ours = _ar_parameters(finder)
    return {
        "n": n,
        "statsmodels_s": t_sm,
        "ours_s": t_ours,
        "speedup": t_sm / t_ours,
        "statsmodels_error": _max_error(sm, truth),
        "ours_error": _max_error(ours, truth),
        "statsmodels": {k: v.tolist() for k, v in sm.items()},
        "ours": {k: v.tolist() for k, v in ours.items()},
        "truth": {k: v.tolist() for k, v in truth.items()},
    }


def _ar_parameters(finder: Any) -> dict[str, np.ndarray]:
    """Means, AR coefficients, noise std and stay probabilities of a two-regime fit."""
    means, ars = [], []
    for fit in finder.local_fits_:
        coef = dict(zip(fit.terms, np.asarray(fit.coef)[:, 0], strict=True))
        a, c = coef.get("y", 0.0), coef.get("1", 0.0)
        ars.append(a)
        means.append(c / (1.0 - a))
    sigma = np.sqrt(np.asarray(finder.covariances_)[:, 0, 0])
    return {
        "mean": np.array(means),
        "ar": np.array(ars),
        "sigma": sigma,
        "stay": np.diag(finder.transmat_).copy(),
    }


def _max_error(est: dict[str, np.ndarray], truth: dict[str, np.ndarray]) -> float:
    order = np.argsort(est["ar"])
    return float(max(np.max(np.abs(est[k][order] - truth[k])) for k in truth))


# ----------------------------------------------------------------------------- report


def growth_exponent(sizes: Sequence[float], times: Sequence[float]) -> float:
    """Least-squares slope of ``log(time)`` against ``log(N)``."""
    x, y = np.log(np.asarray(sizes, float)), np.log(np.asarray(times, float))
    if x.size < 2:
        return float("nan")
    return float(np.polyfit(x, y, 1)[0])


def _fmt(v: float | None, spec: str = ".2f") -> str:
    return "-" if v is None or not np.isfinite(v) else format(v, spec)


def format_report(results: dict[str, Any]) -> str:
    """Plain-text tables of a benchmark result dictionary."""
    lines = ["machine: " + json.dumps(results["machine"]), ""]
    header = f"{'N':>10}  {'stage':<18}{'time s':>9}{'floor s':>9}{'ratio':>8}{'peak MB':>9}"
    lines.append(header)
    sizes, totals, floors = [], [], []
    for entry in results["sizes"]:
        n, floor, fit = entry["n"], entry["floor"], entry["fit"]
        if "error" in floor or "error" in fit:
            lines.append(f"{n:>10}  error: {floor.get('error') or fit.get('error')}")
            continue
        for name in ("read", "terms", "normal"):
            lines.append(f"{n:>10}  {'floor: ' + name:<18}{'':>9}{_fmt(floor[name], '.3f'):>9}")
        lines.append(
            f"{n:>10}  {'floor total':<18}{'':>9}{_fmt(floor['total'], '.3f'):>9}{'':>8}"
            f"{_fmt(floor['peak_mb'], '.0f'):>9}"
        )
        for name, seconds in fit["stages"].items():
            lines.append(f"{n:>10}  {name:<18}{_fmt(seconds, '.3f'):>9}")
        ratio = fit["total"] / floor["total"]
        lines.append(
            f"{n:>10}  {'fit total':<18}{_fmt(fit['total'], '.2f'):>9}"
            f"{_fmt(floor['total'], '.3f'):>9}{_fmt(ratio, '.1f'):>8}"
            f"{_fmt(fit['peak_mb'], '.0f'):>9}   K={fit['n_regimes']}, "
            f"ARI={_fmt(fit['agreement'], '.3f')}"
        )
        sizes.append(n), totals.append(fit["total"]), floors.append(floor["total"])
    if len(sizes) >= 2:
        lines.append("")
        lines.append(
            f"growth exponent of time in N: fit {growth_exponent(sizes, totals):.2f}, "
            f"floor {growth_exponent(sizes, floors):.2f}"
        )
    markov = results.get("markov")
    if markov:
        lines += [
            "",
            f"two-regime AR(1), n={markov['n']}: statsmodels {markov['statsmodels_s']:.2f} s "
            f"(max parameter error {markov['statsmodels_error']:.4f}); ours "
            f"{markov['ours_s']:.3f} s (max parameter error {markov['ours_error']:.4f}); "
            f"speed-up {markov['speedup']:.1f}x",
        ]
    return "\n".join(lines)


# ----------------------------------------------------------------------------- command line


def _sizes(text: str) -> list[int]:
    try:
        out = [int(float(v)) for v in text.split(",") if v.strip()]
    except ValueError:
        raise argparse.ArgumentTypeError(f"sizes must be numbers like 1e5,1e6: {text!r}") from None
    if not out or min(out) < 2 * RUN_LENGTH // 10:
        raise argparse.ArgumentTypeError(f"sizes must be at least {2 * RUN_LENGTH // 10}")
    return out


def add_arguments(parser: argparse.ArgumentParser) -> None:
    """Options of ``modemap bench``."""
    parser.add_argument(
        "--sizes",
        type=_sizes,
        default=list(SIZES),
        metavar="N,N,...",
        help="samples per case (default: 1e5,1e6,1e7)",
    )
    parser.add_argument(
        "--max-regimes", type=int, default=6, metavar="K", help="largest K tried (default: 6)"
    )
    parser.add_argument(
        "--engine",
        choices=("local", "dask"),
        default="local",
        help="where per-run work runs (default: local)",
    )
    parser.add_argument(
        "--scheduler",
        default=None,
        metavar="ADDRESS",
        help="Dask scheduler address (default: a local cluster)",
    )
    parser.add_argument("--seed", type=int, default=0, metavar="S", help="random seed (default: 0)")
    parser.add_argument(
        "--workdir",
        default=None,
        metavar="DIR",
        help="folder for the generated files (default: a temporary folder)",
    )
    parser.add_argument(
        "--timeout",
        type=float,
        default=3600.0,
        metavar="SECONDS",
        help="limit per measurement (default: 3600)",
    )
    parser.add_argument("--skip-markov", action="store_true", help="skip the AR(1) comparison")
    parser.add_argument(
        "--json", default=None, metavar="FILE", help="also write the results to FILE"
    )
    parser.add_argument("--child", choices=("floor", "fit"), help=argparse.SUPPRESS)
    parser.add_argument("--data", help=argparse.SUPPRESS)


def run(args: argparse.Namespace) -> int:
    """Run the benchmark; print the tables; return 0 (targets are reported, not enforced)."""
    if args.child:
        return _child(args)
    results: dict[str, Any] = {"machine": machine_info(), "sizes": []}
    with contextlib.ExitStack() as stack:
        workdir = args.workdir or stack.enter_context(tempfile.TemporaryDirectory())
        Path(workdir).mkdir(parents=True, exist_ok=True)  # a new folder is made, as for --out
        for n in args.sizes:
            path = Path(workdir) / f"invented-{n}.parquet"
            frame, regimes = invented_system(n, args.seed)
            frame.to_parquet(path, row_group_size=1_000_000)
            np.save(str(path) + ".regimes.npy", regimes)
            del frame, regimes
            entry = {"n": n}
            entry["floor"] = _in_subprocess("floor", path, args)
            entry["fit"] = _in_subprocess("fit", path, args)
            results["sizes"].append(entry)
            print(f"N={n}: floor {entry['floor']}, fit {entry['fit']}", file=sys.stderr)
    if not args.skip_markov:
        results["markov"] = compare_markov(seed=args.seed)
    print(format_report(results))
    if args.json:
        from modemap._atomic import write_text_atomic

        write_text_atomic(args.json, json.dumps(results, indent=2) + "\n")
    return 0
