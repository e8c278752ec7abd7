"""Atomic file writing: a temp file in the target folder, then ``os.replace``.

A crash or error while writing leaves the previous file (if any) untouched and
no partial file behind.
"""

from __future__ import annotations

import contextlib
import os
import tempfile
from collections.abc import Iterator
from pathlib import Path
from typing import IO

__all__ = ["atomic_write", "current_umask", "write_text_atomic"]


@contextlib.contextmanager
def atomic_write(
    path: str | os.PathLike[str], mode: str = "w", encoding: str | None = "utf-8"
) -> Iterator[IO]:
    """Open a temporary file next to ``path``; rename it over ``path`` on success.

    Parameters
    ----------
    path : path-like
        Final destination.
    mode : {"w", "wb"}
    encoding : str or None
        Text encoding (ignored for binary mode).
    """
    target = Path(path)
    target.parent.mkdir(parents=True, exist_ok=True)
    fd, tmp = tempfile.mkstemp(prefix=f".{target.name}.", suffix=".tmp", dir=target.parent)
    try:
        with os.fdopen(
            fd,
            mode,
            encoding=None if "b" in mode else encoding,
            newline="" if "b" not in mode else None,
        ) as fh:
            yield fh
            fh.flush()
            os.fsync(fh.fileno())
        os.chmod(tmp, 0o666 & ~current_umask())
        os.replace(tmp, target)
    except BaseException:
        with contextlib.suppress(FileNotFoundError):
            os.unlink(tmp)
        raise


def current_umask() -> int:
    mask = os.umask(0)
    os.umask(mask)
    return mask


def write_text_atomic(path: str | os.PathLike[str], text: str) -> None:
    """Write ``text`` to ``path`` atomically."""
    with atomic_write(path, "w") as fh:
        fh.write(text)
