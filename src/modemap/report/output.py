"""Write the results of a fit: ``model.json``, ``labels.csv`` and ``report.md``.

All three are rendered in memory first, then written to temporary files in the
output folder, then renamed into place.  A failure before the renames leaves
the folder exactly as it was (earlier results included); nothing half-written
is ever left under a final name.
"""

from __future__ import annotations

import contextlib
import os
import tempfile
from collections.abc import Sequence
from pathlib import Path

import pandas as pd

from modemap._atomic import current_umask
from modemap._exceptions import ModemapError
from modemap.data.dataset import Dataset
from modemap.model.hybrid import HybridModel

__all__ = ["RESULT_FILES", "check_output_folder", "write_fit_outputs"]

RESULT_FILES = ("model.json", "labels.csv", "report.md")


def check_output_folder(
    directory: str | os.PathLike[str], read: Sequence[str | os.PathLike[str]] = ()
) -> Path:
    """The output folder, refused before any work when writing there could lose data.

    Refused: an empty name (it would mean the current folder by accident), a path that
    exists and is not a folder, and a folder where one of the result files
    (:data:`RESULT_FILES`) would replace a file the run reads (``read``: the data files).

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
    out.mkdir(parents=True, exist_ok=True)
    temps: dict[str, str] = {}
    try:
        for name, text in texts.items():
            fd, tmp = tempfile.mkstemp(prefix=f".{name}.", suffix=".tmp", dir=out)
            temps[name] = tmp
            with os.fdopen(fd, "w", encoding="utf-8", newline="") as fh:
                fh.write(text)
                fh.flush()
                os.fsync(fh.fileno())
            os.chmod(tmp, 0o666 & ~current_umask())
        for name, tmp in temps.items():
            os.replace(tmp, out / name)
    finally:
        for tmp in temps.values():
            with contextlib.suppress(FileNotFoundError):
                os.unlink(tmp)
    return [out / name for name in RESULT_FILES]


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
