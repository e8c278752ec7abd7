"""Progress reporting and cooperative cancellation for long computations.

Long-running library functions accept ``progress``: a callable
``progress(fraction, message)`` with ``fraction`` in [0, 1].  It is called
between units of work (never per sample).  To cancel, the callable raises
:class:`modemap.FitCancelled`; the library lets it propagate after leaving
nothing half-written.  The callback is passed to ``fit``, never stored as a
constructor parameter.
"""

from __future__ import annotations

from collections.abc import Callable

__all__ = ["ProgressCallback", "null_progress", "scaled"]

ProgressCallback = Callable[[float, str], None]


def null_progress(fraction: float, message: str) -> None:
    """A progress callback that does nothing."""


def scaled(progress: ProgressCallback | None, start: float, stop: float) -> ProgressCallback:
    """Map a sub-task's [0, 1] progress onto [start, stop] of ``progress``."""
    outer = progress or null_progress

    def inner(fraction: float, message: str) -> None:
        outer(start + (stop - start) * min(max(fraction, 0.0), 1.0), message)

    return inner
