"""Invented demo: a DC-DC buck converter stage with an ideal switch and diode.

A fictional 24 V -> 7-16 V converter board (L = 100 uH, C = 100 uF, R = 2 ohm,
25 kHz PWM).  The gate signal ``g`` is logged with the inductor current ``i_L``
and the output (capacitor) voltage ``v_C``.  In continuous conduction the two
regimes are (standard averaged-switch-free circuit equations, common practice)::

    on  (g = 1):  L di_L/dt = V_in - v_C,   C dv_C/dt = i_L - v_C / R
    off (g = 0):  L di_L/dt = -v_C,         C dv_C/dt = i_L - v_C / R

Both regimes share the matrix ``A`` and differ by a constant input, so the
exact sampled solution is ``x[k+1] = Phi x[k] + g[k] psi`` with ``Phi = expm(A dt)``
(zero-order hold of the gate; every PWM edge falls on a sample instant).
Time is in milliseconds, so coefficients are per ms.
"""

from __future__ import annotations

from typing import Any

import numpy as np
import pandas as pd
from scipy.linalg import expm

from modemap.demos._common import INVENTED_NOTE, column, make_rngs, noisy

__all__ = ["FORMATS", "PARAMS", "coefficients", "simulate", "system_matrices"]

_SALT = 303
PARAMS: dict[str, float] = {
    "V_in": 24.0,  # V
    "L": 0.1,  # mH (100 uH)
    "C": 100.0,  # uF; with t in ms, C dv/dt [uF V/ms] = 1e-3 * i [A] -> dv/dt = i / (C * 1e-3)
    "R": 2.0,  # ohm
    "f_sw": 25.0,  # kHz (period 0.04 ms)
}
_SAMPLES_PER_PERIOD = 40
_PERIODS = 100  # 4 ms per run
_STEP_MS = 1.0 / (PARAMS["f_sw"] * _SAMPLES_PER_PERIOD)  # 0.001 ms = 1 us
# (duty before, duty after, step period index or None); run 4's step time is drawn per seed
_RUN_DUTIES = ((0.3, None), (0.5, None), (0.65, None), (0.4, 0.6))
_NOISE_STD = {"i_L": 0.02, "v_C": 0.01}
TIME = column("t", "ms")
I_L, V_C, GATE = column("i_L", "A"), column("v_C", "V"), column("g", "-")
FORMATS = {TIME: "%.3f", "run": "%d", I_L: "%.4f", V_C: "%.4f", GATE: "%d", "true_regime": "%d"}
REGIME_NAMES = ("switch off", "switch on")


def _rates(p: dict[str, float]) -> tuple[float, float, float]:
    """1/L [A/(V ms)], 1/C [V/(A ms)], 1/(R C) [1/ms] with time in ms."""
    inv_l = 1.0 / p["L"]  # L in mH: di/dt [A/ms] = v [V] / L [mH]
    inv_c = 1.0 / (p["C"] * 1e-3)  # C in uF: dv/dt [V/ms] = i [A] / (C [uF] * 1e-3)
    return inv_l, inv_c, inv_c / p["R"]


def coefficients(on: bool, p: dict[str, float] = PARAMS) -> dict[str, dict[str, float]]:
    """Canonical term -> coefficient maps per state in one regime (terms ``1, i_L, v_C``)."""
    inv_l, inv_c, inv_rc = _rates(p)
    current = {"v_C": -inv_l}
    if on:
        current = {"1": p["V_in"] * inv_l, **current}
    return {"i_L": current, "v_C": {"i_L": inv_c, "v_C": -inv_rc}}


def system_matrices(p: dict[str, float] = PARAMS) -> tuple[np.ndarray, np.ndarray]:
    """``A`` (2x2) and the on-regime constant input ``b`` of ``dx/dt = A x + g b``."""
    inv_l, inv_c, inv_rc = _rates(p)
    return np.array([[0.0, -inv_l], [inv_c, -inv_rc]]), np.array([p["V_in"] * inv_l, 0.0])


def _discretise(dt: float, p: dict[str, float]) -> tuple[np.ndarray, np.ndarray]:
    """Exact zero-order-hold map: augmented matrix exponential of [[A, b], [0, 0]] dt."""
    a, b = system_matrices(p)
    aug = np.zeros((3, 3))
    aug[:2, :2], aug[:2, 2] = a, b
    m = expm(aug * dt)
    return m[:2, :2], m[:2, 2]


def _gate(duties: np.ndarray) -> np.ndarray:
    """PWM gate per sample: on for the first round(D * N) samples of each period."""
    n = duties.size
    phase = np.arange(n) % _SAMPLES_PER_PERIOD
    return (phase < np.rint(duties * _SAMPLES_PER_PERIOD)).astype(np.int64)


def _propagate(gate: np.ndarray, phi: np.ndarray, psi: np.ndarray) -> np.ndarray:
    x = np.zeros((gate.size, 2))
    for k in range(1, gate.size):
        x[k] = phi @ x[k - 1] + gate[k - 1] * psi
    return x


def simulate(
    *, seed: int = 0, noise: bool = True, n_runs: int | None = None
) -> tuple[pd.DataFrame, dict[str, Any]]:
    """Data table and ground truth of the buck converter (see module docstring)."""
    rng, noise_rng = make_rngs(seed, _SALT)
    runs = len(_RUN_DUTIES) if n_runs is None else n_runs
    n = _SAMPLES_PER_PERIOD * _PERIODS
    t = np.arange(n) * _STEP_MS
    phi, psi = _discretise(_STEP_MS, PARAMS)
    frames, run_truth = [], []
    for r in range(1, runs + 1):
        before, after = (
            _RUN_DUTIES[r - 1] if r <= len(_RUN_DUTIES) else (rng.uniform(0.3, 0.7), None)
        )
        before = round(float(before) * _SAMPLES_PER_PERIOD) / _SAMPLES_PER_PERIOD
        duties = np.full(n, before)
        step_period = None
        if after is not None:
            step_period = int(rng.integers(45, 55))
            duties[step_period * _SAMPLES_PER_PERIOD :] = after
        gate = _gate(duties)
        x = _propagate(gate, phi, psi)
        frames.append(
            pd.DataFrame(
                {
                    TIME: t,
                    "run": np.full(n, r),
                    I_L: noisy(x[:, 0], _NOISE_STD["i_L"], noise_rng, noise),
                    V_C: noisy(x[:, 1], _NOISE_STD["v_C"], noise_rng, noise),
                    GATE: gate,
                    "true_regime": gate,
                }
            )
        )
        info: dict[str, Any] = {"run": r, "duty": before, "start": "from rest (i_L = 0, v_C = 0)"}
        if step_period is not None:
            info.update(duty_after=after, duty_step_time=step_period / PARAMS["f_sw"])
        run_truth.append(info)
    return pd.concat(frames, ignore_index=True), _truth(run_truth, noise)


def _equation_text(on: bool) -> dict[str, str]:
    inv_l, inv_c, inv_rc = _rates(PARAMS)
    source = f"{PARAMS['V_in'] * inv_l:.6g} - " if on else "-"
    return {
        "i_L": f"di_L/dt = {source}{inv_l:.6g}*v_C",
        "v_C": f"dv_C/dt = {inv_c:.6g}*i_L - {inv_rc:.6g}*v_C",
    }


def _truth(run_truth: list[dict[str, Any]], noise: bool) -> dict[str, Any]:
    p = PARAMS
    inv_l, inv_c, inv_rc = _rates(p)
    regimes = [
        {
            "id": rid,
            "name": name,
            "gate": rid,
            "equations": _equation_text(bool(rid)),
            "coefficients": coefficients(bool(rid)),
        }
        for rid, name in enumerate(REGIME_NAMES)
    ]
    return {
        "name": "buck",
        "invented": True,
        "note": INVENTED_NOTE,
        "description": (
            "Fictional 24 V buck converter stage, ideal switch and diode, L = 100 uH, "
            "C = 100 uF, R = 2 ohm, 25 kHz PWM, continuous conduction; runs start from rest."
        ),
        "form": "continuous",
        "time": {"column": TIME, "name": "t", "unit": "ms", "step": _STEP_MS},
        "run_column": "run",
        "label_column": "true_regime",
        "states": [
            {"name": "i_L", "unit": "A", "column": I_L},
            {"name": "v_C", "unit": "V", "column": V_C},
        ],
        "inputs": [{"name": "g", "unit": "-", "column": GATE}],
        "variables": ["i_L", "v_C", "g"],
        "model": "L di_L/dt = g V_in - v_C ; C dv_C/dt = i_L - v_C / R",
        "regimes": regimes,
        "global_model": {
            "note": "Single model with the gate as an input (terms over i_L, v_C, g).",
            "coefficients": {
                "i_L": {"v_C": -inv_l, "g": p["V_in"] * inv_l},
                "v_C": {"i_L": inv_c, "v_C": -inv_rc},
            },
        },
        "switching": {
            "kind": "external PWM gate",
            "guards": [
                {"from": 0, "to": 1, "condition": "g = 1 (start of each PWM period)"},
                {"from": 1, "to": 0, "condition": "g = 0 (after D * period)"},
            ],
            "period": 1.0 / p["f_sw"],
            "samples_per_period": _SAMPLES_PER_PERIOD,
        },
        "label_rule": "true_regime = g (gate held over [t_k, t_k+1); PWM edges fall on samples).",
        "steady_state": {
            "rule": "volt-second balance of the ideal converter in continuous conduction: "
            "mean v_C = D * V_in, mean i_L = D * V_in / R",
            "ccm_condition": "i_L stays > 0 after start-up (checked in tests/test_demos.py)",
        },
        "parameters": dict(p),
        "parameter_units": {"V_in": "V", "L": "mH", "C": "uF", "R": "ohm", "f_sw": "kHz"},
        "simulation": "Exact zero-order-hold map x[k+1] = expm(A dt) x[k] + g[k] psi from the "
        "augmented matrix exponential; dt = 1 us = 1/40 of the switching period; 4 ms per run.",
        "noise": {"enabled": noise, "std": dict(_NOISE_STD), "inputs": "noise-free"},
        "runs": run_truth,
    }
