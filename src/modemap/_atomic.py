"""Atomic file writing.

One file: a temp file in the target folder, then ``os.replace``
(:func:`atomic_write`); a crash or error while writing leaves the previous file (if
any) untouched and no partial file behind.

A set of files that belong together (a fit's results): :func:`write_file_set` stages
them beside the earlier set and swaps them in under a journal, so the folder holds the
whole earlier set or the whole new one; :func:`recover_file_set` finishes or undoes a
swap cut short by a kill.
"""

from __future__ import annotations

import contextlib
import json
import os
import shutil
import tempfile
import time
from collections.abc import Iterator, Mapping, Sequence
from pathlib import Path
from typing import IO

from modemap._exceptions import ModemapError

__all__ = [
    "WORK_FOLDER",
    "atomic_write",
    "current_umask",
    "recover_file_set",
    "write_file_set",
    "write_text_atomic",
]


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


# --------------------------------------------------------------------------- file sets

#: Hidden folder inside an output folder that holds a write in progress.
WORK_FOLDER = ".modemap-write"
_JOURNAL = "journal.json"


def write_file_set(
    directory: str | os.PathLike[str], texts: Mapping[str, str], *, wait: float = 10.0
) -> list[Path]:
    """Write several files into ``directory`` as one unit.

    Afterwards the folder holds either every file of the earlier set (as it was) or every
    file of the new set, never a mix, even when a rename fails midway or the process is
    killed between two files.  How:

    1. any interrupted earlier write is finished or undone (:func:`recover_file_set`);
    2. the new files are written and flushed in ``DIR/.modemap-write/new/``;
    3. a journal (``DIR/.modemap-write/journal.json``, phase ``"swap"``) is written
       atomically: from here on the set is being swapped;
    4. file by file, the earlier file (if any) is moved to ``DIR/.modemap-write/old/``
       and the new one is renamed into place;
    5. the journal is rewritten with phase ``"done"`` (the commit point), then the work
       folder is removed.

    A failure in step 4 moves the earlier files back and removes the new ones before the
    error is raised.  A kill leaves the work folder behind: the next call, or a reader
    calling :func:`recover_file_set`, undoes a swap whose journal says ``"swap"`` and only
    cleans up after one that says ``"done"``.  Writers are serialised by an advisory lock
    on the folder (``fcntl.flock``, where the platform has it).

    Parameters
    ----------
    directory : path-like
        Destination folder (created if missing).
    texts : mapping of str to str
        File name (no folders) -> text, written as UTF-8.
    wait : float
        Seconds to wait for another writer's lock before giving up.

    Returns
    -------
    list of Path
        The files written, in the order of ``texts``.

    Raises
    ------
    ModemapError
        When the set cannot be written (the folder is left with its earlier files).
    """
    out = Path(directory)
    names = list(texts)
    for name in names:
        if not name or Path(name).name != name or name.startswith("."):
            raise ValueError(f"not a plain file name: {name!r}")
    out.mkdir(parents=True, exist_ok=True)
    with _folder_lock(out, wait):
        _recover(out)
        for name in names:
            if (out / name).is_dir() and not (out / name).is_symlink():
                raise ModemapError(
                    f"{out / name}: is a folder where a result file goes; move it or choose "
                    f"another output folder (nothing was written)"
                )
        work = out / WORK_FOLDER
        try:
            _stage(work, texts)
            _write_journal(work, "swap", names)
        except BaseException as exc:
            _remove_tree(work)
            if isinstance(exc, OSError):
                raise ModemapError(
                    f"{out}: results not written ({_os_reason(exc)}); the folder is unchanged"
                ) from exc
            raise
        try:
            _swap(out, work, names)
            _write_journal(work, "done", names)  # the commit point
        except BaseException as exc:  # KeyboardInterrupt and SystemExit: undo as well
            _undo_swap(out, work, names, exc)
            raise
        _fsync_folder(out)
        _remove_tree(work)
    return [out / name for name in names]


def _undo_swap(out: Path, work: Path, names: Sequence[str], exc: BaseException) -> None:
    """Roll back after ``exc`` broke a swap; raise the error to report (if not ``exc``)."""
    try:
        _roll_back(out, work, names)
    except OSError as again:
        raise ModemapError(
            f"{out}: results not written ({_os_reason(again)}); the earlier files are kept "
            f"in {work / 'old'} and are put back by the next run on this folder"
        ) from exc
    if isinstance(exc, OSError):
        raise ModemapError(
            f"{out}: results not written ({_os_reason(exc)}); the earlier files are back"
        ) from exc


def recover_file_set(directory: str | os.PathLike[str], *, wait: float = 10.0) -> str:
    """Finish or undo a write of :func:`write_file_set` that was interrupted (a kill).

    Returns what was found: ``"none"`` (no write in progress), ``"cleaned"`` (the
    temporaries of a write that had not started swapping, or that had finished, were
    removed) or ``"rolled back"`` (a swap cut short: the earlier files are back).
    """
    out = Path(directory)
    if not (out / WORK_FOLDER).exists() and not (out / WORK_FOLDER).is_symlink():
        return "none"
    with _folder_lock(out, wait):
        return _recover(out)


def _recover(out: Path) -> str:
    work = out / WORK_FOLDER
    if not work.exists() and not work.is_symlink():
        return "none"
    if work.is_symlink() or not work.is_dir():
        raise ModemapError(
            f"{work}: is not a folder modemap made; remove it by hand to write results here"
        )
    journal = _read_journal(work)
    if journal is None or journal["phase"] == "done":
        _remove_tree(work)
        _fsync_folder(out)
        return "cleaned"
    _roll_back(out, work, journal["files"])
    return "rolled back"


def _stage(work: Path, texts: Mapping[str, str]) -> None:
    """The new files, complete and flushed, in ``work/new`` (a fresh work folder)."""
    work.mkdir()
    new = work / "new"
    new.mkdir()
    (work / "old").mkdir()
    mode = 0o666 & ~current_umask()
    for name, text in texts.items():
        fd = os.open(new / name, os.O_WRONLY | os.O_CREAT | os.O_EXCL, mode)
        with os.fdopen(fd, "w", encoding="utf-8", newline="") as fh:
            fh.write(text)
            fh.flush()
            os.fsync(fh.fileno())
    _fsync_folder(new)


def _swap(out: Path, work: Path, names: Sequence[str]) -> None:
    for name in names:
        target = out / name
        if target.exists() or target.is_symlink():
            os.replace(target, work / "old" / name)
        os.replace(work / "new" / name, target)


def _roll_back(out: Path, work: Path, names: Sequence[str]) -> None:
    """Undo a swap, whatever step it reached (the journal lists ``names``).

    Per file, in steps that each leave a state this function handles again if it is
    itself cut short: a new file in place goes back to ``new/``; then an earlier file
    kept in ``old/`` goes back to its name.  The work folder is removed only when every
    earlier file is back.
    """
    stuck = []
    for name in names:
        target, old, new = out / name, work / "old" / name, work / "new" / name
        if not new.exists() and (target.is_file() or target.is_symlink()):
            os.replace(target, new)  # the new file in place: out again
        if old.exists() or old.is_symlink():
            if target.exists() or target.is_symlink():
                stuck.append(name)  # something else took the name meanwhile
            else:
                os.replace(old, target)
    _fsync_folder(out)
    if stuck:
        raise ModemapError(
            f"{out}: could not put back the earlier {', '.join(stuck)}: the name is taken; "
            f"the earlier file(s) are in {work / 'old'}"
        )
    _remove_tree(work)


def _write_journal(work: Path, phase: str, names: Sequence[str]) -> None:
    data = {"format": 1, "phase": phase, "files": list(names)}
    tmp = work / (_JOURNAL + ".tmp")
    with open(tmp, "w", encoding="utf-8") as fh:
        json.dump(data, fh)
        fh.flush()
        os.fsync(fh.fileno())
    os.replace(tmp, work / _JOURNAL)
    _fsync_folder(work)


def _read_journal(work: Path) -> dict | None:
    """The journal, or None when there is none (the swap never started)."""
    path = work / _JOURNAL
    if not path.exists():
        return None
    try:
        data = json.loads(path.read_text(encoding="utf-8"))
        ok = (
            isinstance(data, dict)
            and data.get("phase") in ("swap", "done")
            and isinstance(data.get("files"), list)
            and all(
                isinstance(n, str) and n and Path(n).name == n and not n.startswith(".")
                for n in data["files"]
            )
        )
    except (ValueError, UnicodeDecodeError):
        ok = False
    if not ok:
        raise ModemapError(
            f"{path}: damaged journal of an interrupted write; compare the files in "
            f"{work / 'old'} with those in {work.parent}, then remove {work}"
        )
    return data


def _remove_tree(path: Path) -> None:
    if path.is_symlink():
        return
    shutil.rmtree(path, ignore_errors=True)


def _fsync_folder(path: Path) -> None:
    """Make renames in ``path`` durable (POSIX); a no-op where folders cannot be opened."""
    try:
        fd = os.open(path, os.O_RDONLY)
    except OSError:
        return
    try:
        os.fsync(fd)
    except OSError:
        pass
    finally:
        os.close(fd)


@contextlib.contextmanager
def _folder_lock(path: Path, wait: float) -> Iterator[None]:
    """An exclusive advisory lock on the folder itself (no lock file is left behind)."""
    try:
        import fcntl
    except ImportError:  # no flock on this platform: writers are not serialised
        yield
        return
    fd = os.open(path, os.O_RDONLY)
    try:
        deadline = time.monotonic() + wait
        while True:
            try:
                fcntl.flock(fd, fcntl.LOCK_EX | fcntl.LOCK_NB)
                break
            except BlockingIOError:
                if time.monotonic() > deadline:
                    raise ModemapError(
                        f"{path}: another modemap process is writing results here; "
                        f"try again when it has finished"
                    ) from None
                time.sleep(0.05)
        yield
    finally:
        os.close(fd)  # closing releases the lock


def _os_reason(exc: OSError) -> str:
    where = f"{exc.filename}: " if exc.filename else ""
    return where + (exc.strerror or str(exc))
