"""Exceptions raised by modemap.

Every error a user can cause derives from :class:`ModemapError`; the command
line catches it, prints its one-line message and exits with code 2.  Errors
from third-party libraries are translated into these at the boundary, so a
caller only ever needs to catch modemap's own types.

Hierarchy::

    ModemapError (Exception)
    ├── DataError (ValueError)        bad input data: file, column, row
    ├── ExpressionError (ValueError)  a candidate-term expression that does not parse
    ├── ModelFileError (ValueError)   a model file that is malformed or of an unknown version
    ├── ParameterError (ValueError)   an estimator parameter or option out of its allowed values
    ├── FitError (RuntimeError)       a fit that cannot proceed on valid data
    │   └── FitCancelled              the progress callback asked to stop
    └── SimulationError (RuntimeError)
"""

from __future__ import annotations

__all__ = [
    "DataError",
    "ExpressionError",
    "FitCancelled",
    "FitError",
    "ModelFileError",
    "ModemapError",
    "ParameterError",
    "SimulationError",
]


class ModemapError(Exception):
    """Base class of every error modemap raises on purpose."""


class DataError(ModemapError, ValueError):
    """Input data that cannot be used as given.

    Parameters
    ----------
    message : str
        What is wrong, in one line.
    source : str, optional
        File name (or ``"<DataFrame>"``) the problem was found in.
    column : str, optional
        Column name concerned.
    row : int, optional
        1-based row number in the file, counting the header as row 1, so that it
        matches what a text editor shows.
    """

    def __init__(
        self,
        message: str,
        *,
        source: str | None = None,
        column: str | None = None,
        row: int | None = None,
    ) -> None:
        self.message = message
        self.source = source
        self.column = column
        self.row = row
        super().__init__(self._format())

    def _format(self) -> str:
        where = []
        if self.source is not None:
            where.append(str(self.source))
        if self.column is not None:
            where.append(f"column '{self.column}'")
        if self.row is not None:
            where.append(f"row {self.row}")
        prefix = ", ".join(where)
        return f"{prefix}: {self.message}" if prefix else self.message


class ExpressionError(ModemapError, ValueError):
    """A candidate-term expression that cannot be parsed or evaluated."""


class ModelFileError(ModemapError, ValueError):
    """A model file that is malformed, inconsistent or of an unknown version."""


class ParameterError(ModemapError, ValueError):
    """An estimator parameter or a function option outside its allowed values
    (checked by :func:`modemap._params.check_params`).

    ``param``, ``expected`` and ``value`` (None when not set) let a front end say the
    same in its own words, e.g. with the command-line option's name."""

    param: str | None = None
    expected: str | None = None
    value: object = None


class FitError(ModemapError, RuntimeError):
    """A fit that cannot go on, for a reason the user can act upon."""


class FitCancelled(FitError):
    """Raised by a progress callback to stop a long fit cooperatively."""


class SimulationError(ModemapError, RuntimeError):
    """A simulation request that cannot be carried out."""
