"""modemap: identify hybrid (multi-regime) dynamical models from logged trajectories."""

from __future__ import annotations

from modemap._exceptions import (
    DataError,
    ExpressionError,
    FitCancelled,
    FitError,
    ModelFileError,
    ModemapError,
    SimulationError,
)
from modemap.dataset import Dataset, Gap, Run
from modemap.hybrid import Equilibrium, Guard, HybridModel, RegimeModel
from modemap.intake import read_data, summarize

__version__ = "0.1.0"

__all__ = [
    "DataError",
    "Dataset",
    "Equilibrium",
    "ExpressionError",
    "FitCancelled",
    "FitError",
    "Gap",
    "Guard",
    "HybridModel",
    "ModelFileError",
    "ModemapError",
    "RegimeModel",
    "Run",
    "SimulationError",
    "__version__",
    "read_data",
    "summarize",
]
