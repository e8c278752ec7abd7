"""Shared helpers of the demo generators: seeding, noise, fixed-format CSV text, JSON text.

Every demo writes its files byte-deterministically: each column has a fixed
``printf``-style format, the JSON sidecar has sorted keys and floats rounded to
a fixed number of significant digits, and nothing depends on the clock.
"""

from __future__ import annotations

import json
import math
from collections.abc import Mapping, Sequence
from typing import Any

import numpy as np
import pandas as pd

__all__ = [
    "INVENTED_NOTE",
    "column",
    "format_csv",
    "make_rngs",
    "noisy",
    "round_floats",
    "truth_to_json",
]

INVENTED_NOTE = (
    "INVENTED scenario: simulated data from a made-up system; not measurements of any real plant."
)


def column(name: str, unit: str) -> str:
    """Header of a data column, ``"name [unit]"``."""
    return f"{name} [{unit}]"


def make_rngs(seed: int, salt: int) -> tuple[np.random.Generator, np.random.Generator]:
    """Two independent generators: one for the scenario (inputs, starts), one for noise.

    Keeping noise on its own stream means ``noise=False`` gives exactly the
    trajectories that ``noise=True`` perturbs.
    """
    scenario, noise = np.random.SeedSequence([int(seed), int(salt)]).spawn(2)
    return np.random.default_rng(scenario), np.random.default_rng(noise)


def noisy(values: np.ndarray, std: float, rng: np.random.Generator, enabled: bool) -> np.ndarray:
    """Add seeded zero-mean Gaussian noise of standard deviation ``std`` when ``enabled``."""
    draws = rng.standard_normal(values.shape)  # always drawn: same stream whatever `enabled` is
    return values + std * draws if enabled else values.copy()


def format_csv(frame: pd.DataFrame, formats: Mapping[str, str]) -> str:
    """CSV text with one fixed ``%``-format per column (``\\n`` line ends, trailing newline)."""
    cells = [np.char.mod(formats[name], frame[name].to_numpy()) for name in frame.columns]
    lines = [",".join(frame.columns)]
    lines.extend(",".join(row) for row in zip(*cells, strict=True))
    return "\n".join(lines) + "\n"


def round_floats(obj: Any, digits: int = 10) -> Any:
    """Copy of a JSON-like object with every float rounded to ``digits`` significant digits."""
    if isinstance(obj, float | np.floating):
        value = float(obj)
        if value == 0.0 or not math.isfinite(value):
            return value
        return float(f"{value:.{digits}g}")
    if isinstance(obj, bool | np.bool_):
        return bool(obj)
    if isinstance(obj, int | np.integer):
        return int(obj)
    if isinstance(obj, Mapping):
        return {str(k): round_floats(v, digits) for k, v in obj.items()}
    if isinstance(obj, Sequence | np.ndarray) and not isinstance(obj, str):
        return [round_floats(v, digits) for v in obj]
    return obj


def truth_to_json(truth: Mapping[str, Any]) -> str:
    """Deterministic JSON text of a ground-truth dictionary (sorted keys, 2-space indent)."""
    return json.dumps(round_floats(truth), indent=2, sort_keys=True, allow_nan=False) + "\n"
