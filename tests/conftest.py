"""Shared pytest fixtures (keep small; ask the lead before adding)."""

from __future__ import annotations

from collections.abc import Callable
from pathlib import Path

import pytest


@pytest.fixture
def write_file(tmp_path: Path) -> Callable[[str, str | bytes], Path]:
    """Factory writing ``content`` (text or bytes) to ``tmp_path / name``; returns the path."""

    def write(name: str, content: str | bytes) -> Path:
        path = tmp_path / name
        if isinstance(content, bytes):
            path.write_bytes(content)
        else:
            path.write_text(content, encoding="utf-8")
        return path

    return write


def csv_text(header: str, rows: list[str]) -> str:
    """CSV text from a header line and data lines."""
    return "\n".join([header, *rows]) + "\n"


@pytest.fixture
def ramp_csv() -> Callable[..., str]:
    """Factory for a regular CSV: ``t [s]``, ``x [m]``, ``u`` with ``n`` rows at step ``step``."""

    def make(n: int = 10, step: float = 0.1, start: float = 0.0) -> str:
        rows = [f"{start + k * step:.6g},{k * k},{k % 2}" for k in range(n)]
        return csv_text("t [s],x [m],u", rows)

    return make
