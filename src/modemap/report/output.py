"""Write the results of a fit: ``model.json``, ``labels.csv`` and ``report.md``.

All three are rendered in memory first, then written as one unit by
:func:`modemap._atomic.write_file_set`: staged in ``DIR/.modemap-write/`` and swapped
in under a journal, so the folder holds the complete earlier set or the complete new
set, never a mix, even when a rename fails midway or the process is killed between two
files.  A swap cut short by a kill is undone by the next write into the folder, or by
:func:`recover_output_folder` (which ``modemap view`` and ``modemap simulate`` call
before they read a results folder).
"""

from __future__ import annotations

import contextlib
import os
from collections.abc import Sequence
from pathlib import Path

import pandas as pd

from modemap._atomic import WORK_FOLDER, recover_file_set, write_file_set
from modemap._exceptions import ModemapError
from modemap.data.dataset import Dataset
from modemap.model.hybrid import HybridModel

__all__ = [
    "RESULT_FILES",
    "check_output_folder",
    "recover_output_folder",
    "write_fit_outputs",
]

RESULT_FILES = ("model.json", "labels.csv", "report.md")


def check_output_folder(
    directory: str | os.PathLike[str], read: Sequence[str | os.PathLike[str]] = ()
) -> Path:
    """The output folder, refused before any work when writing there could lose data.

    Refused: an empty name (it would mean the current folder by accident), a path that
    exists and is not a folder, a folder where a result file's name
    (:data:`RESULT_FILES`) is taken by a folder, and a folder where one of the result
    files would replace a file the run reads (``read``: the data files).  Nothing is
    changed on disk.

    Raises
    ------
    ModemapError
        With one line naming the path and the reason.
    """
    if not str(directory).strip():
        raise ModemapError("--out: an output folder name is needed (got an empty name)")
    out = Path(directory)
    if out.exists() and not out.is_dir():
        raise ModemapError(f"{out}: exists and is not a folder")
    for name in RESULT_FILES:
        target = out / name
        if target.is_dir():
            raise ModemapError(
                f"{target}: is a folder where a result file goes; move it or choose another "
                f"output folder"
            )
        for source in read:
            source = Path(source)
            if target.exists() and source.exists() and os.path.samefile(target, source):
                raise ModemapError(
                    f"{target}: is an input of this run and would be overwritten by the "
                    f"results; choose another output folder"
                )
    return out


def write_fit_outputs(
    directory: str | os.PathLike[str],
    model: HybridModel,
    labels: pd.DataFrame,
    *,
    dataset: Dataset | None = None,
    read: Sequence[str | os.PathLike[str]] = (),
) -> list[Path]:
    """Write ``model.json``, ``labels.csv`` and ``report.md`` into ``directory``.

    Parameters
    ----------
    directory : path-like
        Output folder (created if missing).
    model : HybridModel
    labels : DataFrame
        Columns ``run, time, regime``, one row per input sample.
    dataset : Dataset, optional
        Used for the data summary at the top of the report.
    read : sequence of path-like, optional
        Files the run read: none of them is ever overwritten (:func:`check_output_folder`).

    Returns
    -------
    list of Path
        The three files written.
    """
    from modemap.data.intake import summarize
    from modemap.model.modelfile import dumps_model
    from modemap.report.markdown import render_report

    out = check_output_folder(directory, read)
    labels = _with_stamps(labels, dataset)
    texts = {
        "model.json": dumps_model(model),
        "labels.csv": labels[_label_columns(labels)].to_csv(index=False, float_format="%.10g"),
        "report.md": render_report(
            model, dataset_summary=summarize(dataset) if dataset is not None else None
        ),
    }
    paths = write_file_set(out, texts)
    _remove_stale_temporaries(out)
    return paths


def recover_output_folder(directory: str | os.PathLike[str]) -> str:
    """Finish or undo a write of the results into ``directory`` that a kill cut short.

    Call before reading a results folder.  Returns ``"none"``, ``"cleaned"`` or
    ``"rolled back"`` (:func:`modemap._atomic.recover_file_set`); a folder that does not
    exist gives ``"none"``.
    """
    out = Path(directory)
    if not (out / WORK_FOLDER).exists():
        return "none"
    return recover_file_set(out)


def _remove_stale_temporaries(out: Path) -> None:
    """Temporaries of a result name left by a killed single-file write (``.model.json.*.tmp``:
    :func:`modemap._atomic.atomic_write`, or this writer before result sets)."""
    for name in RESULT_FILES:
        for tmp in out.glob(f".{name}.*.tmp"):
            with contextlib.suppress(OSError):
                tmp.unlink()


def _label_columns(labels: pd.DataFrame) -> list[str]:
    """``run, time`` (then ``stamp`` when the data had date-times), ``regime``, then the
    regime probabilities (``prob_0`` ...)."""
    probs = sorted((c for c in labels.columns if c.startswith("prob_")), key=lambda c: int(c[5:]))
    return ["run", "time", *(["stamp"] if "stamp" in labels else []), "regime", *probs]


def _with_stamps(labels: pd.DataFrame, dataset: Dataset | None) -> pd.DataFrame:
    """``labels`` with the original date-time stamp of each row (``stamp``, ISO 8601) when the
    data had them and the rows are the dataset's."""
    from modemap.data.stamps import row_stamps

    text = row_stamps(dataset) if dataset is not None else None
    if text is None or len(text) != len(labels):
        return labels
    return labels.assign(stamp=text)
