"""Where per-run work runs: in this process, or on the workers of a Dask cluster.

Fitting a fleet of runs is a map over runs followed by a reduction on the caller's side:

* **statistics** (:func:`stats_by_label`): each run's
  :class:`~modemap.fit.statistics.GramStats` per regime label
  (:func:`modemap.fit.statistics.accumulate_by_label` on that run's rows), then summed on the
  client in run order.  Both engines add the same per-run terms in the same order, so their
  sums are identical;
* **decoding** (:func:`decode_runs`): each run's emission log-likelihood under every regime and
  its Viterbi path (:func:`modemap.regimes.viterbi.viterbi`); runs are independent, so the
  paths and log-probabilities do not depend on where they were computed.

An engine only needs ``scatter(items)`` (place the data where the work will run),
``map(fn, items, **kwargs)`` (results in the order of ``items``) and ``close()``:

* :class:`LocalEngine` is a plain loop in this process (no server, no extra dependency);
* :class:`DaskEngine` sends each call to the workers of a ``distributed`` cluster: an existing
  one (``scheduler="tcp://host:8786"``) or, by default, a cluster of worker threads started
  inside this process (Dask's in-process transport, no dashboard).  Dask is an
  optional extra (``pip install 'modemap[dask]'``).

Functions sent to workers are module-level, so Dask's own serialisation (cloudpickle) can ship
them; modemap never writes pickles to disk.
"""

from __future__ import annotations

import functools
import os
from collections.abc import Callable, Iterable, Sequence
from typing import Any, NamedTuple, Protocol, runtime_checkable

import numpy as np

from modemap._exceptions import FitError
from modemap.fit.statistics import GramStats, accumulate_by_label

__all__ = [
    "ENGINES",
    "DaskEngine",
    "Engine",
    "LocalEngine",
    "RunBlock",
    "decode_runs",
    "get_engine",
    "split_runs",
    "stats_by_label",
]

ENGINES = ("local", "dask")


@runtime_checkable
class Engine(Protocol):
    """What the fitting code needs from an execution engine."""

    name: str

    def scatter(self, items: Sequence[Any]) -> list[Any]:
        """Place ``items`` where tasks run; returns handles accepted by :meth:`map`."""
        ...

    def map(self, fn: Callable[..., Any], items: Iterable[Any], **kwargs: Any) -> list[Any]:
        """``[fn(item, **kwargs) for item in items]``, results in the order of ``items``."""
        ...

    def close(self) -> None:
        """Release what the engine started (never a cluster it merely connected to)."""
        ...


class LocalEngine:
    """Run every task in this process, one after the other."""

    name = "local"

    def scatter(self, items: Sequence[Any]) -> list[Any]:
        """The items themselves (they are already here)."""
        return list(items)

    def map(self, fn: Callable[..., Any], items: Iterable[Any], **kwargs: Any) -> list[Any]:
        """Apply ``fn`` to every item in order."""
        return [fn(item, **kwargs) for item in items]

    def close(self) -> None:
        """Nothing to release."""

    def __enter__(self) -> LocalEngine:
        return self

    def __exit__(self, *exc: object) -> None:
        self.close()

    def __repr__(self) -> str:
        return "LocalEngine()"


class DaskEngine:
    """Run tasks on the workers of a Dask ``distributed`` cluster.

    Parameters
    ----------
    scheduler : str or None, default None
        Address of a running scheduler (``"tcp://host:8786"``).  ``None`` starts a cluster
        of worker threads inside this process, talking over Dask's in-process transport, with no
        dashboard (the scheduler's small HTTP status server listens on 127.0.0.1 only).
    n_workers : int or None, default None
        Workers of the in-process cluster (default: the number of CPU cores); ignored with
        ``scheduler``.
    timeout : float, default 10
        Seconds to wait for the scheduler before giving up.

    Raises
    ------
    FitError
        When dask/distributed are not installed or the scheduler cannot be reached.
    """

    name = "dask"

    def __init__(
        self, scheduler: str | None = None, *, n_workers: int | None = None, timeout: float = 10.0
    ) -> None:
        distributed = _import_distributed()
        self.scheduler = scheduler
        self._cluster = None
        if scheduler is None:
            self._cluster = distributed.LocalCluster(
                n_workers=n_workers or os.cpu_count() or 1,
                threads_per_worker=1,
                processes=False,
                dashboard_address=None,
                # the scheduler always serves a few HTTP routes: keep them on loopback
                scheduler_kwargs={"dashboard": False, "dashboard_address": "127.0.0.1:0"},
            )
            self._client = distributed.Client(self._cluster, set_as_default=False)
            return
        try:
            self._client = distributed.Client(
                scheduler, timeout=f"{float(timeout)}s", set_as_default=False
            )
        except (OSError, TimeoutError, ValueError) as exc:
            reason = " ".join(str(exc).split()) or type(exc).__name__
            raise FitError(f"cannot reach the Dask scheduler at {scheduler}: {reason}") from None

    @property
    def client(self) -> Any:
        """The ``distributed.Client`` in use."""
        return self._client

    def scatter(self, items: Sequence[Any]) -> list[Any]:
        """Send the items to the workers once; returns futures to pass to :meth:`map`."""
        items = list(items)
        if not items:
            return []
        return list(self._client.scatter(items, hash=False))

    def map(self, fn: Callable[..., Any], items: Iterable[Any], **kwargs: Any) -> list[Any]:
        """One task per item on the workers; results gathered in the order of ``items``."""
        items = list(items)
        if not items:
            return []
        task = functools.partial(fn, **kwargs) if kwargs else fn
        futures = self._client.map(task, items, pure=False)
        return list(self._client.gather(futures))

    def close(self) -> None:
        """Close the client, and the cluster if this engine started it."""
        self._client.close()
        if self._cluster is not None:
            self._cluster.close()
            self._cluster = None

    def __enter__(self) -> DaskEngine:
        return self

    def __exit__(self, *exc: object) -> None:
        self.close()

    def __repr__(self) -> str:
        where = self.scheduler or "in-process cluster"
        return f"DaskEngine({where!r})"


def _import_distributed() -> Any:
    try:
        import distributed
    except ImportError:
        raise FitError(
            "the Dask engine needs dask and distributed: pip install 'modemap[dask]'"
        ) from None
    return distributed


def get_engine(name: str | Engine = "local", scheduler: str | None = None) -> Engine:
    """The engine called ``name`` (``"local"`` or ``"dask"``), or ``name`` itself if an engine.

    Parameters
    ----------
    name : {"local", "dask"} or Engine
    scheduler : str or None
        Dask scheduler address; only meaningful with ``"dask"``.

    Raises
    ------
    FitError
        Unknown name, a scheduler given with the local engine, or Dask unavailable.
    """
    if not isinstance(name, str):
        if isinstance(name, Engine):
            return name
        raise FitError(f"engine must be one of {', '.join(ENGINES)}, got {name!r}")
    if name == "local":
        if scheduler:
            raise FitError("a scheduler address needs the Dask engine (engine='dask')")
        return LocalEngine()
    if name == "dask":
        return DaskEngine(scheduler)
    raise FitError(f"engine must be one of {', '.join(ENGINES)}, got {name!r}")


# ---------------------------------------------------------------------- per-run work


class RunBlock(NamedTuple):
    """The regression rows of one run: variables ``Z (n, n_vars)`` and targets ``Y (n, m)``."""

    Z: np.ndarray
    Y: np.ndarray


def split_runs(Z: np.ndarray, Y: np.ndarray, lengths: Sequence[int] | np.ndarray) -> list[RunBlock]:
    """Cut stacked rows into one :class:`RunBlock` per run (views, no copy)."""
    bounds = np.cumsum(np.asarray(lengths, dtype=np.int64))[:-1]
    return [RunBlock(z, y) for z, y in zip(np.split(Z, bounds), np.split(Y, bounds), strict=True)]


def _compact(labels: np.ndarray) -> np.ndarray:
    """Labels in the smallest integer type that holds them (-1 included)."""
    labels = np.asarray(labels)
    top = int(labels.max(initial=0))
    return labels.astype(np.int8 if top < 127 else np.int16 if top < 32767 else np.int64)


def _run_stats(
    item: tuple[RunBlock, np.ndarray], *, library: Any, n_labels: int
) -> list[GramStats]:
    """Task: one run's statistics per label."""
    block, labels = item
    return accumulate_by_label(library, block.Z, block.Y, labels, n_labels)


def stats_by_label(
    engine: Engine,
    runs: Sequence[Any],
    labels: Sequence[np.ndarray],
    library: Any,
    n_labels: int,
) -> list[GramStats]:
    """Per-label statistics of all runs: a map over runs, summed in run order on the client.

    Parameters
    ----------
    engine : Engine
    runs : sequence of RunBlock (or what ``engine.scatter`` returned for them)
    labels : sequence of ndarray of int
        Labels of each run's rows (``-1`` rows are skipped).
    library : fitted TermLibrary
    n_labels : int

    Returns
    -------
    list of GramStats, length ``n_labels``
    """
    per_run = engine.map(
        _run_stats,
        list(zip(runs, [_compact(x) for x in labels], strict=True)),
        library=library,
        n_labels=n_labels,
    )
    totals = list(per_run[0])
    for stats in per_run[1:]:
        totals = [a + b for a, b in zip(totals, stats, strict=True)]
    return totals


class Decoded(NamedTuple):
    """What :func:`decode_runs` returns for one run."""

    path: np.ndarray
    log_prob: float
    current_log_prob: float


def _run_decode(
    item: tuple[RunBlock, np.ndarray | None],
    *,
    library: Any,
    coefs: Sequence[np.ndarray],
    covariances: np.ndarray,
    log_start: np.ndarray,
    log_trans: np.ndarray,
    location: tuple[float, np.ndarray, np.ndarray] | None,
) -> Decoded:
    """Task: emission log-likelihood of one run, its Viterbi path, and the current path's score."""
    from modemap.regimes.refine import location_density, path_log_prob, regime_log_likelihood
    from modemap.regimes.viterbi import viterbi

    block, current = item
    log_em = regime_log_likelihood(library, block.Z, block.Y, coefs, covariances)
    if location is not None:
        weight, means, chols = location
        log_em += weight * location_density(block.Z[:, : block.Y.shape[1]], means, chols)
    path, log_prob = viterbi(log_em, log_start, log_trans)
    score = float("nan")
    if current is not None and current.size and current.min() >= 0:
        lengths = np.array([current.size])
        score = path_log_prob(log_em, current.astype(np.int64), lengths, log_start, log_trans)
    return Decoded(_compact(path), float(log_prob), score)


def decode_runs(
    engine: Engine,
    runs: Sequence[Any],
    library: Any,
    coefs: Sequence[np.ndarray],
    covariances: np.ndarray,
    log_start: np.ndarray,
    log_trans: np.ndarray,
    *,
    current: Sequence[np.ndarray] | None = None,
    location: tuple[float, np.ndarray, np.ndarray] | None = None,
) -> tuple[list[np.ndarray], float, float]:
    """Viterbi decoding of every run under per-regime residual models, a map over runs.

    Parameters
    ----------
    engine : Engine
    runs : sequence of RunBlock (or scattered handles)
    library : fitted TermLibrary
    coefs : sequence of ndarray of shape (p, m)
        Coefficients of each regime.
    covariances : ndarray of shape (K, m, m)
        Residual covariance of each regime.
    log_start, log_trans : ndarray
        Markov chain of the regimes (see :func:`modemap.regimes.viterbi.viterbi`).
    current : sequence of ndarray, optional
        Current labels of each run; their joint log-probability is returned as well.
    location : (weight, means (K, d), Cholesky factors (K, d, d)), optional
        Adds ``weight`` times a Gaussian log-density of where the states sit.

    Returns
    -------
    paths : list of ndarray of int64
        Most probable regime sequence of each run.
    log_prob : float
        Sum over runs of the best joint log-probabilities.
    current_log_prob : float
        Sum over runs of the joint log-probability of ``current`` (NaN without it).
    """
    cur = [None] * len(runs) if current is None else [_compact(c) for c in current]
    out = engine.map(
        _run_decode,
        list(zip(runs, cur, strict=True)),
        library=library,
        coefs=[np.asarray(c, dtype=np.float64) for c in coefs],
        covariances=np.asarray(covariances, dtype=np.float64),
        log_start=np.asarray(log_start, dtype=np.float64),
        log_trans=np.asarray(log_trans, dtype=np.float64),
        location=location,
    )
    paths = [d.path.astype(np.int64) for d in out]
    log_prob = float(sum(d.log_prob for d in out))
    current_log_prob = float(sum(d.current_log_prob for d in out))
    return paths, log_prob, current_log_prob
