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
from modemap._version import __version__
from modemap.dataset import Dataset, Gap, Run
from modemap.guards import SwitchingSurfaces
from modemap.hybrid import Equilibrium, Guard, HybridModel, RegimeModel
from modemap.identify import HybridIdentifier
from modemap.intake import read_data, summarize
from modemap.local import LocalDynamics
from modemap.modelfile import load_model, save_model
from modemap.regimes import RegimeFinder
from modemap.simulate import SimulationResult, simulate
from modemap.terms import TermLibrary
from modemap.validation import split_holdout, validate

__all__ = [
    "DataError",
    "Dataset",
    "Equilibrium",
    "ExpressionError",
    "FitCancelled",
    "FitError",
    "Gap",
    "Guard",
    "HybridIdentifier",
    "HybridModel",
    "LocalDynamics",
    "ModelFileError",
    "ModemapError",
    "RegimeFinder",
    "RegimeModel",
    "Run",
    "SimulationError",
    "SimulationResult",
    "SwitchingSurfaces",
    "TermLibrary",
    "__version__",
    "load_model",
    "read_data",
    "save_model",
    "simulate",
    "split_holdout",
    "summarize",
    "validate",
]
