"""Invented demo scenarios: seeded generators with known ground truth.

Every scenario is made up (no real plant, building or board); the data are
simulated from equations we chose, so the true regimes, equations, switching
rules and equilibria are known exactly and stored next to the data.

==================  =====================================================  ==============
name                system                                                 regimes
==================  =====================================================  ==============
``water_heaters``   thermostat bank of storage water heaters (hysteresis)  heater off / on
``reactor``         bistable exothermic CSTR (Arrhenius, not polynomial)   low / high conversion
``buck``            DC-DC buck converter, ideal switch, 25 kHz PWM         switch off / on
==================  =====================================================  ==============

Examples
--------
>>> from modemap.demos import make_demo
>>> data, truth = make_demo("buck", seed=0)
>>> truth["regimes"][1]["coefficients"]["i_L"]
{'1': 240.0, 'v_C': -10.0}
"""

from __future__ import annotations

import os
from collections.abc import Callable
from pathlib import Path
from typing import Any

import pandas as pd

from modemap._atomic import write_text_atomic
from modemap._exceptions import DataError
from modemap.demos import buck, reactor, water_heaters
from modemap.demos._common import format_csv, truth_to_json

__all__ = ["DEMOS", "make_demo", "write_demo"]

DEMOS: tuple[str, ...] = ("water_heaters", "reactor", "buck")

_Generator = Callable[..., tuple[pd.DataFrame, dict[str, Any]]]
_REGISTRY: dict[str, tuple[_Generator, dict[str, str]]] = {
    "water_heaters": (water_heaters.simulate, water_heaters.FORMATS),
    "reactor": (reactor.simulate, reactor.FORMATS),
    "buck": (buck.simulate, buck.FORMATS),
}


def _lookup(name: str) -> tuple[_Generator, dict[str, str]]:
    if name not in _REGISTRY:
        raise DataError(f"unknown demo '{name}'; choose one of: {', '.join(DEMOS)}")
    return _REGISTRY[name]


def make_demo(
    name: str, *, seed: int = 0, noise: bool = True, n_runs: int | None = None
) -> tuple[pd.DataFrame, dict[str, Any]]:
    """Simulate one invented demo scenario.

    Parameters
    ----------
    name : {"water_heaters", "reactor", "buck"}
        Scenario name (see :data:`DEMOS`).
    seed : int, default 0
        Seed of the input profiles, starting states and measurement noise.
    noise : bool, default True
        Add seeded Gaussian measurement noise to the state columns (inputs are
        always logged exactly).  ``False`` gives the exact trajectories.
    n_runs : int, optional
        Number of runs; default is the scenario's own (4).

    Returns
    -------
    data : pandas.DataFrame
        Columns: time (``"t [unit]"``), ``run`` (1, 2, ...), states and inputs
        (``"name [unit]"``), and ``true_regime`` (ground-truth label; not for fitting).
    truth : dict
        JSON-serialisable ground truth: description, states, inputs, units,
        regimes (ids, names, equations as text and as canonical term ->
        coefficient maps per state), switching rules, parameters, per-run facts.

    Raises
    ------
    DataError
        Unknown ``name`` or ``n_runs`` below 1.
    """
    generator, _ = _lookup(name)
    if n_runs is not None and (isinstance(n_runs, bool) or int(n_runs) != n_runs or n_runs < 1):
        raise DataError(f"n_runs must be a positive integer, got {n_runs!r}")
    return generator(seed=int(seed), noise=bool(noise), n_runs=n_runs)


def write_demo(name: str, directory: str | os.PathLike[str], seed: int = 0) -> tuple[Path, Path]:
    """Write ``<name>.csv`` and ``<name>.truth.json`` into ``directory`` (byte-deterministic).

    Parameters
    ----------
    name : {"water_heaters", "reactor", "buck"}
    directory : path-like
        Created if missing; files are written atomically.
    seed : int, default 0

    Returns
    -------
    csv_path, truth_path : pathlib.Path
    """
    _, formats = _lookup(name)
    data, truth = make_demo(name, seed=seed)
    truth = {**truth, "seed": int(seed), "csv": f"{name}.csv"}
    folder = Path(directory)
    csv_path, truth_path = folder / f"{name}.csv", folder / f"{name}.truth.json"
    write_text_atomic(csv_path, format_csv(data, formats))
    write_text_atomic(truth_path, truth_to_json(truth))
    return csv_path, truth_path
