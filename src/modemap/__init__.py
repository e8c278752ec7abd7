"""modemap: identify hybrid (multi-regime) dynamical models from logged trajectories."""

from __future__ import annotations

from modemap._exceptions import (
    DataError,
    ExpressionError,
    FitCancelled,
    FitError,
    ModelFileError,
    ModemapError,
    ParameterError,
    SimulationError,
)
from modemap._version import __version__
from modemap.data.dataset import Dataset, Gap, Run
from modemap.data.intake import read_data, summarize
from modemap.model.hybrid import Equilibrium, Guard, HybridModel, RegimeModel

# The estimators pull in scikit-learn, SciPy and hmmlearn: load them on first use so that
# `modemap check` and `import modemap` stay quick (PEP 562 module __getattr__).
_LAZY = {
    "AffineLocalModel": "modemap.fit.local_model",
    "HybridIdentifier": "modemap.identify",
    "LocalModel": "modemap.fit.local_model",
    "SparseLocalModel": "modemap.fit.local_model",
    "LocalDynamics": "modemap.identify.local_dynamics",
    "RegimeFinder": "modemap.regimes",
    "SimulationResult": "modemap.simulation.simulator",
    "SwitchingSurfaces": "modemap.model.guards",
    "TermLibrary": "modemap.terms.library",
    "load_model": "modemap.model.modelfile",
    "save_model": "modemap.model.modelfile",
    "simulate": "modemap.simulation.simulator",
    "split_holdout": "modemap.data.split",
    "validate": "modemap.simulation.validation",
}


def __getattr__(name: str):
    module = _LAZY.get(name)
    if module is None:
        raise AttributeError(f"module 'modemap' has no attribute {name!r}")
    import importlib

    value = getattr(importlib.import_module(module), name)
    globals()[name] = value
    return value


def __dir__() -> list[str]:
    return sorted(set(globals()) | set(_LAZY))


__all__ = [
    "AffineLocalModel",
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
    "LocalModel",
    "ModelFileError",
    "ModemapError",
    "ParameterError",
    "RegimeFinder",
    "RegimeModel",
    "Run",
    "SimulationError",
    "SimulationResult",
    "SparseLocalModel",
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
