"""Progress reporting and cooperative cancellation for long computations.

Long-running library functions accept ``progress``: a callable
``progress(fraction, message)`` with ``fraction`` in [0, 1].  It is called
between units of work (never per sample).  To cancel, the callable raises
:class:`modemap.FitCancelled`; the library lets it propagate after leaving
nothing half-written.  The callback is passed to ``fit``, never stored as a
constructor parameter.
"""

from __future__ import annotations

import time
from collections.abc import Callable
from dataclasses import dataclass, field

__all__ = ["ProgressCallback", "ProgressClock", "format_duration", "null_progress", "scaled"]

ProgressCallback = Callable[[float, str], None]


def null_progress(fraction: float, message: str) -> None:
    """A progress callback that does nothing."""


def scaled(progress: ProgressCallback | None, start: float, stop: float) -> ProgressCallback:
    """Map a sub-task's [0, 1] progress onto [start, stop] of ``progress``."""
    outer = progress or null_progress

    def inner(fraction: float, message: str) -> None:
        outer(start + (stop - start) * min(max(fraction, 0.0), 1.0), message)

    return inner


def format_duration(seconds: float) -> str:
    """``42 s``, ``3 min 05 s``, ``1 h 02 min``."""
    seconds = max(0.0, float(seconds))
    if seconds < 60:
        return f"{seconds:.0f} s"
    minutes, sec = divmod(round(seconds), 60)
    if minutes < 60:
        return f"{minutes} min {sec:02d} s"
    hours, minutes = divmod(minutes, 60)
    return f"{hours} h {minutes:02d} min"


@dataclass
class ProgressClock:
    """What a progress display shows: a share done that never goes back, the time
    elapsed, and an estimate of the time left.

    A fit's stages report their own fractions, and a stage run twice (a second library, the
    refit on all data) starts again from its beginning; displays pass every report
    through :meth:`update` so that the bar only moves forward.  The estimate assumes the
    remaining share goes at the average pace so far, and is given only after 5 % and 3 s.

    Examples
    --------
    >>> clock = ProgressClock(clock=iter([0.0, 10.0, 20.0]).__next__)
    >>> clock.update(0.5)
    (0.5, 10.0, 10.0)
    >>> clock.update(0.4)  # a stage starting again: the share stays
    (0.5, 20.0, 20.0)
    """

    clock: Callable[[], float] = time.monotonic
    done: float = 0.0
    start: float = field(init=False)

    def __post_init__(self) -> None:
        self.start = self.clock()

    def update(self, fraction: float) -> tuple[float, float, float | None]:
        """``(share done, seconds elapsed, seconds left or None)`` after a report."""
        now = self.clock()
        self.done = max(self.done, min(max(float(fraction), 0.0), 1.0))
        elapsed = now - self.start
        left = None
        if self.done >= 0.05 and elapsed >= 3.0:
            left = elapsed * (1.0 - self.done) / self.done
        return self.done, elapsed, left
