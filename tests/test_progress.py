"""Progress shown to a user: it only moves forward, with elapsed time and an estimate
(common practice for progress displays: a bar never goes back)."""

from __future__ import annotations

import io
import sys

import pytest

from modemap._progress import ProgressClock, format_duration
from modemap.app.cli import _ProgressLine


def _ticks(*values: float):
    return iter(values).__next__


def test_share_never_goes_back_and_the_estimate_follows_the_pace() -> None:
    clock = ProgressClock(clock=_ticks(0.0, 1.0, 10.0, 20.0, 40.0))
    assert clock.update(0.5) == (0.5, 1.0, None)  # under 3 s: no estimate yet
    assert clock.update(0.25) == (0.5, 10.0, 10.0)  # a stage restarting: the share stays
    done, elapsed, left = clock.update(0.8)  # 20 s for 80 %: 5 s for the rest
    assert (done, elapsed) == (0.8, 20.0) and left == pytest.approx(5.0)
    assert clock.update(1.5) == (1.0, 40.0, 0.0)


def test_durations_read_as_time() -> None:
    assert format_duration(42.4) == "42 s"
    assert format_duration(185) == "3 min 05 s"
    assert format_duration(3720) == "1 h 02 min"


def test_batch_progress_is_a_plain_line_every_few_seconds(monkeypatch) -> None:
    err = io.StringIO()
    monkeypatch.setattr(sys, "stderr", err)
    line = _ProgressLine(enabled=True, terminal=False, every=5.0)
    line._clock = ProgressClock(clock=_ticks(0.0, 0.0, 1.0, 6.0, 7.0, 12.0))
    for fraction, message in [(0.1, "a"), (0.05, "b"), (0.4, "c"), (0.5, "d"), (0.6, "e")]:
        line(fraction, message)
    lines = err.getvalue().splitlines()
    assert len(lines) == 2  # at 6 s and at 12 s; quiet before, nothing redrawn in place
    assert lines[0].startswith(" 40.0 %  6 s elapsed, about 9 s left  c")
    assert lines[1].startswith(" 60.0 %  12 s elapsed, about 8 s left  e")
    assert "\r" not in err.getvalue()
