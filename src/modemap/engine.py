"""Where work runs: in this process, or on the workers of a Dask cluster.

An engine is an executor.  It knows nothing of what it runs: the regime stage hands it
module-level functions and the items to map them over (blocks of runs, see
:mod:`modemap.regimes.blocks`) and reduces the results itself.

An engine only needs ``scatter(items)`` (place the data where the work will run),
``map(fn, items, **kwargs)`` (results in the order of ``items``) and ``close()``:

* :class:`LocalEngine` is a plain loop in this process (no server, no extra dependency);
* :class:`DaskEngine` sends each call to the workers of a ``distributed`` cluster: an existing
  one (``scheduler="tcp://host:8786"``) or, by default, a cluster of worker threads started
  inside this process (Dask's in-process transport, no dashboard).  Dask is an
  optional extra (``pip install 'modemap[dask]'``).

Functions sent to workers are module-level, so Dask's own serialisation (cloudpickle) can ship
them; modemap never writes pickles to disk.  This module imports nothing from the stages.
"""

from __future__ import annotations

import functools
import os
from collections.abc import Callable, Iterable, Sequence
from typing import Any, Protocol, runtime_checkable

from modemap._exceptions import FitError

__all__ = [
    "ENGINES",
    "DaskEngine",
    "Engine",
    "LocalEngine",
    "get_engine",
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
