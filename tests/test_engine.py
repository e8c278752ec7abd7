"""Tests of modemap.engine (local and Dask executors), the per-block tasks they run
(modemap.regimes.blocks) and the out-of-core reading paths."""

from __future__ import annotations

import itertools
import sys
from pathlib import Path

import numpy as np
import pandas as pd
import pytest

from modemap._exceptions import DataError, FitError
from modemap.data import tables
from modemap.data.intake import read_data
from modemap.engine import DaskEngine, Engine, LocalEngine, get_engine
from modemap.fit.statistics import accumulate_by_label
from modemap.regimes.blocks import RunBlock, decode_blocks, split_blocks, stats_by_label
from modemap.regimes.viterbi import viterbi_runs
from modemap.terms.library import TermLibrary
from refine_helpers import refine_rows

LENGTHS = [700, 1100, 1200]
K = 3


@pytest.fixture(scope="module")
def problem() -> dict:
    """Three runs of a seeded switching regression with labels and a fitted library."""
    rng = np.random.default_rng(7)
    n = sum(LENGTHS)
    Z = rng.standard_normal((n, 3))
    labels = np.repeat(np.arange(n // 100) % K, 100)[:n]
    coefs = [rng.standard_normal((10, 2)) * 0.5 for _ in range(K)]
    library = TermLibrary(degree=2).fit(["a", "b", "c"])
    theta = library.transform(Z)
    Y = np.stack([theta @ c for c in coefs])[labels, np.arange(n)]
    Y = Y + 0.05 * rng.standard_normal(Y.shape)
    noisy = labels.copy()
    noisy[rng.random(n) < 0.05] = -1  # some unassigned rows
    return {"Z": Z, "Y": Y, "labels": labels, "noisy": noisy, "coefs": coefs, "library": library}


def _per_run(values: np.ndarray) -> list[np.ndarray]:
    return np.split(values, np.cumsum(LENGTHS)[:-1])


def _chain() -> tuple[np.ndarray, np.ndarray]:
    trans = np.full((K, K), 0.01)
    np.fill_diagonal(trans, 0.98)
    return np.full(K, -np.log(K)), np.log(trans)


# ------------------------------------------------------------------------- local engine


def test_local_engine_maps_in_order_and_scatter_is_identity() -> None:
    engine = LocalEngine()
    assert isinstance(engine, Engine)
    items = [3, 1, 2]
    assert engine.scatter(items) == items
    assert engine.map(pow, items, exp=3) == [27, 1, 8]
    assert engine.map(abs, []) == []


def test_split_blocks_gives_views_of_each_run(problem: dict) -> None:
    runs = split_blocks(problem["Z"], problem["Y"], LENGTHS)
    assert [r.Z.shape[0] for r in runs] == LENGTHS
    assert all(np.shares_memory(r.Z, problem["Z"]) for r in runs)
    np.testing.assert_array_equal(np.vstack([r.Y for r in runs]), problem["Y"])


def test_stats_by_label_solves_like_numpy_lstsq(problem: dict) -> None:
    lib, Z, Y, lab = problem["library"], problem["Z"], problem["Y"], problem["noisy"]
    engine = LocalEngine()
    stats = stats_by_label(engine, split_blocks(Z, Y, LENGTHS), _per_run(lab), lib, K)
    theta = lib.transform(Z)
    for k in range(K):
        rows = lab == k
        assert stats[k].n == rows.sum()
        coef = np.linalg.solve(stats[k].gram, stats[k].cross)
        # reference: numpy.linalg.lstsq (LAPACK gelsd) on the rows of regime k
        ref = np.linalg.lstsq(theta[rows], Y[rows], rcond=None)[0]
        np.testing.assert_allclose(coef, ref, rtol=1e-8, atol=1e-10)
        np.testing.assert_allclose(stats[k].yy, Y[rows].T @ Y[rows], rtol=1e-12)


def test_stats_by_label_equals_one_pass_over_all_rows(problem: dict) -> None:
    lib, Z, Y, lab = problem["library"], problem["Z"], problem["Y"], problem["noisy"]
    blocks = split_blocks(Z, Y, LENGTHS)
    per_run = stats_by_label(LocalEngine(), blocks, _per_run(lab), lib, K)
    whole = accumulate_by_label(lib, Z, Y, lab, K)
    for a, b in zip(per_run, whole, strict=True):
        np.testing.assert_allclose(a.gram, b.gram, rtol=1e-12)
        np.testing.assert_allclose(a.cross, b.cross, rtol=1e-12)
        assert a.n == b.n


def _brute_force(log_em: np.ndarray, log_start: np.ndarray, log_trans: np.ndarray) -> tuple:
    """Best path by enumerating all K^n paths (the definition of the Viterbi path)."""
    best, best_path = -np.inf, None
    for path in itertools.product(range(log_em.shape[1]), repeat=log_em.shape[0]):
        score = log_start[path[0]] + log_em[0, path[0]]
        for t in range(1, len(path)):
            score += log_trans[path[t - 1], path[t]] + log_em[t, path[t]]
        if score > best:
            best, best_path = score, path
    return np.array(best_path), best


def test_decode_blocks_finds_the_brute_force_path_on_short_runs() -> None:
    rng = np.random.default_rng(3)
    library = TermLibrary(degree=1).fit(["a"])
    lengths = [6, 5]
    Z = rng.standard_normal((11, 1))
    coefs = [np.array([[0.0], [1.0]]), np.array([[1.0], [-1.0]]), np.array([[-1.0], [0.0]])]
    Y = Z * 1.0 + rng.standard_normal((11, 1)) * 0.8
    covs = np.array([[[0.5]], [[0.7]], [[1.1]]])
    log_start, log_trans = np.log([0.5, 0.3, 0.2]), np.log([[0.8, 0.1, 0.1], [0.2, 0.7, 0.1]] * 1)
    log_trans = np.vstack([log_trans, np.log([[0.3, 0.3, 0.4]])])
    runs = split_blocks(Z, Y, lengths)
    path, log_prob, _, _ = decode_blocks(
        LocalEngine(), runs, library, coefs, covs, (log_start, log_trans)
    )
    paths = np.split(path, np.cumsum(lengths)[:-1])
    total = 0.0
    for run, path in zip(runs, paths, strict=True):
        theta = library.transform(run.Z)
        res = run.Y[:, :, None] - np.stack([theta @ c for c in coefs], axis=2)
        log_em = -0.5 * (res[:, 0, :] ** 2 / covs[:, 0, 0] + np.log(2 * np.pi * covs[:, 0, 0]))
        ref_path, ref_score = _brute_force(log_em, log_start, log_trans)
        np.testing.assert_array_equal(path, ref_path)
        total += ref_score
    assert log_prob == pytest.approx(total, rel=1e-12)


def test_decode_blocks_equals_stacked_viterbi_and_scores_current_labels(problem: dict) -> None:
    from modemap.regimes.likelihood import path_log_prob, regime_log_likelihood

    lib, Z, Y = problem["library"], problem["Z"], problem["Y"]
    covs = np.array([np.eye(2) * 0.01] * K)
    log_start, log_trans = _chain()
    runs = split_blocks(Z, Y, LENGTHS)
    current = _per_run(problem["labels"])
    chain = (log_start, log_trans)
    path, log_prob, cur, _ = decode_blocks(
        LocalEngine(), runs, lib, problem["coefs"], covs, chain, current=current
    )
    log_em = regime_log_likelihood(lib, Z, Y, problem["coefs"], covs)
    ref_path, ref_prob = viterbi_runs(log_em, LENGTHS, log_start, log_trans)
    np.testing.assert_array_equal(path, ref_path)
    assert log_prob == pytest.approx(ref_prob, rel=1e-12)
    ref_cur = path_log_prob(log_em, problem["labels"], np.array(LENGTHS), log_start, log_trans)
    assert cur == pytest.approx(ref_cur, rel=1e-12)
    # the truth is recovered: the data were generated with these regimes
    assert np.mean(ref_path == problem["labels"]) > 0.99


# ------------------------------------------------------------------------- engine choice


def test_get_engine_names_and_errors() -> None:
    assert isinstance(get_engine("local"), LocalEngine)
    engine = LocalEngine()
    assert get_engine(engine) is engine
    with pytest.raises(FitError, match="engine must be one of local, dask"):
        get_engine("spark")
    with pytest.raises(FitError, match="needs the Dask engine"):
        get_engine("local", scheduler="tcp://127.0.0.1:8786")


def test_dask_engine_without_dask_installed_says_how_to_install(monkeypatch) -> None:
    monkeypatch.setitem(sys.modules, "distributed", None)  # import now raises ImportError
    with pytest.raises(FitError, match=r"pip install 'modemap\[dask\]'"):
        DaskEngine()


def test_unreachable_scheduler_is_a_one_line_fit_error() -> None:
    pytest.importorskip("distributed")
    with pytest.raises(FitError, match=r"cannot reach the Dask scheduler at tcp://127\.0\.0\.1:9"):
        DaskEngine("tcp://127.0.0.1:9", timeout=1.0)


# ------------------------------------------------------------------------- Dask cluster


@pytest.fixture(scope="module")
def cluster():
    distributed = pytest.importorskip("distributed")
    with distributed.LocalCluster(
        n_workers=2,
        threads_per_worker=1,
        processes=True,
        host="127.0.0.1",
        dashboard_address=None,
    ) as local_cluster:
        yield local_cluster


def test_dask_engine_gives_the_local_results_exactly(cluster, problem: dict) -> None:
    lib, Z, Y = problem["library"], problem["Z"], problem["Y"]
    runs = split_blocks(Z, Y, LENGTHS)
    labels = _per_run(problem["noisy"])
    covs = np.array([np.eye(2) * 0.01] * K)
    log_start, log_trans = _chain()
    local = LocalEngine()
    expected = stats_by_label(local, runs, labels, lib, K)
    chain = (log_start, log_trans)
    ref = decode_blocks(local, runs, lib, problem["coefs"], covs, chain)
    with DaskEngine(cluster.scheduler_address) as engine:
        handles = engine.scatter([RunBlock(r.Z.copy(), r.Y.copy(), r.lengths) for r in runs])
        got = stats_by_label(engine, handles, labels, lib, K)
        out = decode_blocks(engine, handles, lib, problem["coefs"], covs, chain)
        assert engine.map(abs, [-2, 3]) == [2, 3]
    # same per-run terms summed in the same order on the client: identical sums
    for a, b in zip(expected, got, strict=True):
        np.testing.assert_array_equal(a.gram, b.gram)
        np.testing.assert_array_equal(a.cross, b.cross)
        assert a.n == b.n
    np.testing.assert_array_equal(ref[0], out[0])
    assert out[1] == pytest.approx(ref[1], rel=1e-12)
    assert cluster.scheduler_address.startswith("tcp://127.0.0.1:")


def _refine_start(problem: dict) -> np.ndarray:
    start = problem["labels"].copy()
    rng = np.random.default_rng(11)
    flip = rng.random(start.size) < 0.2  # a proposal with a fifth of the labels wrong
    start[flip] = rng.integers(0, K, int(flip.sum()))
    return start


def _assert_same_refinement(a, b, rtol: float) -> None:
    np.testing.assert_array_equal(a.labels, b.labels)
    assert a.n_regimes == b.n_regimes
    assert a.loglik == pytest.approx(b.loglik, rel=rtol)
    for fa, fb in zip(a.fits, b.fits, strict=True):
        np.testing.assert_allclose(fa.coef, fb.coef, rtol=rtol, atol=1e-12)
    np.testing.assert_allclose(a.covariances, b.covariances, rtol=rtol)
    assert a.monitor.changes == b.monitor.changes


@pytest.mark.parametrize("location_weight", [0.0, 0.5])
def test_refine_over_runs_equals_refine_on_all_rows(problem: dict, location_weight) -> None:
    lib, Z, Y = problem["library"], problem["Z"], problem["Y"]
    options = {"n_regimes": K, "model": "sparse", "location_weight": location_weight}
    start = _refine_start(problem)
    whole = refine_rows(Z, Y, np.array(LENGTHS), start, lib, **options)
    runs = refine_rows(Z, Y, np.array(LENGTHS), start, lib, per_run=True, **options)
    _assert_same_refinement(whole, runs, rtol=1e-9)
    assert np.mean(whole.labels == problem["labels"]) > 0.99  # the simulated regimes


def test_refine_on_dask_workers_equals_local_refine(cluster, problem: dict) -> None:
    lib, Z, Y = problem["library"], problem["Z"], problem["Y"]
    start = _refine_start(problem)
    lengths = np.array(LENGTHS)
    local = refine_rows(Z, Y, lengths, start, lib, n_regimes=K, per_run=True)
    whole = refine_rows(Z, Y, lengths, start, lib, n_regimes=K)
    with DaskEngine(cluster.scheduler_address) as engine:
        remote = refine_rows(Z, Y, lengths, start, lib, n_regimes=K, engine=engine)
    _assert_same_refinement(local, remote, rtol=0.0)  # same sums in the same order: exact
    _assert_same_refinement(whole, remote, rtol=1e-9)


def test_regime_finder_on_dask_equals_local(cluster) -> None:
    from modemap.app.bench import invented_system
    from modemap.fit.local_model import SparseLocalModel
    from modemap.regimes.finder import RegimeFinder

    frame, truth = invented_system(30_000, seed=1)  # invented three-regime benchmark system
    ds = read_data(frame, time="t", states=["x1", "x2", "x3"], inputs=["u"], run="run")
    options = {"n_regimes": 3, "form": "discrete", "local_model": SparseLocalModel(degree=2)}
    local = RegimeFinder(**options).fit(ds)
    remote = RegimeFinder(engine="dask", scheduler=cluster.scheduler_address, **options).fit(ds)
    for a, b in zip(local.labels_, remote.labels_, strict=True):
        np.testing.assert_array_equal(a, b)
    for fa, fb in zip(local.local_fits_, remote.local_fits_, strict=True):
        np.testing.assert_allclose(fa.coef, fb.coef, rtol=1e-9, atol=1e-12)
    from sklearn.metrics import adjusted_rand_score

    # the simulated regimes are found (scikit-learn's adjusted Rand index, id-free)
    assert adjusted_rand_score(truth, np.concatenate(local.labels_)) > 0.99


def test_in_process_dask_engine_runs_tasks() -> None:
    pytest.importorskip("distributed")
    with DaskEngine(n_workers=1) as engine:
        assert engine.map(round, [1.26, 2.71], ndigits=1) == [1.3, 2.7]
        assert engine.scatter([]) == []


# ------------------------------------------------------------------------- out-of-core reading


def _frame(n: int = 90) -> pd.DataFrame:
    rng = np.random.default_rng(1)
    return pd.DataFrame(
        {
            "run": np.repeat(["a", "b", "c"], n // 3),
            "t [s]": np.tile(np.arange(n // 3) * 0.5, 3),
            "x": rng.standard_normal(n),
            "u": rng.integers(0, 4, n),
        }
    )


def _same_dataset(a, b) -> None:
    assert [r.name for r in a.runs] == [r.name for r in b.runs]
    for ra, rb in zip(a.runs, b.runs, strict=True):
        np.testing.assert_array_equal(ra.time, rb.time)
        np.testing.assert_array_equal(ra.states, rb.states)
        np.testing.assert_array_equal(ra.inputs, rb.inputs)
        np.testing.assert_array_equal(ra.index, rb.index)
    assert a.units == b.units and a.step == b.step and a.n_rows == b.n_rows


def test_parquet_read_by_row_groups_equals_whole_file(tmp_path: Path, monkeypatch) -> None:
    import pyarrow.parquet as pq

    path = tmp_path / "runs.parquet"
    _frame().to_parquet(path, row_group_size=16)
    assert pq.ParquetFile(path).metadata.num_row_groups == 6  # 90 rows / 16 (pyarrow)
    options = {"time": "t", "states": ["x"], "inputs": ["u"], "run": "run"}
    whole = read_data(path, **options)
    monkeypatch.setattr(tables, "LARGE_PARQUET_ROWS", 10)
    pieces = read_data(path, **options)
    _same_dataset(whole, pieces)
    assert whole.units["t"] == "s"


def test_parquet_by_row_groups_reports_missing_values_by_row(tmp_path: Path, monkeypatch) -> None:
    frame = _frame()
    frame.loc[40, "x"] = np.nan
    path = tmp_path / "gap.parquet"
    frame.to_parquet(path, row_group_size=16)
    monkeypatch.setattr(tables, "LARGE_PARQUET_ROWS", 10)
    with pytest.raises(DataError, match=r"column 'x': empty or NaN cell at row index 40"):
        read_data(path, time="t", states=["x"], inputs=["u"], run="run")


def test_large_csv_read_in_chunks_equals_one_read(tmp_path: Path, monkeypatch) -> None:
    path = tmp_path / "runs.csv"
    _frame().to_csv(path, index=False)
    options = {"time": "t", "states": ["x"], "inputs": ["u"], "run": "run"}
    whole = read_data(path, **options)
    monkeypatch.setattr(tables, "LARGE_FILE_BYTES", 0)
    monkeypatch.setattr(tables, "CSV_CHUNK_ROWS", 7)
    _same_dataset(whole, read_data(path, **options))


def test_chunked_csv_error_names_the_line_of_the_file(tmp_path: Path, monkeypatch) -> None:
    frame = _frame().astype({"x": object})
    frame.loc[50, "x"] = "oops"
    path = tmp_path / "bad.csv"
    frame.to_csv(path, index=False)
    monkeypatch.setattr(tables, "LARGE_FILE_BYTES", 0)
    monkeypatch.setattr(tables, "CSV_CHUNK_ROWS", 7)
    # data row 50 (0-based) is line 52 of the file: header on line 1 (text-editor numbering)
    with pytest.raises(DataError, match=r"column 'x', row 52: non-numeric value 'oops'"):
        read_data(path, time="t", states=["x"], inputs=["u"], run="run")
