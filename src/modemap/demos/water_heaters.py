"""Invented demo: a thermostat-controlled bank of storage water heaters.

A fictional office building has three 100 L electric storage water heaters
plumbed in parallel; the log holds one aggregate (mixed) tank temperature ``T``
and the measured hot-water draw ``w``.  A single thermostat with hysteresis
switches all elements together: on when ``T`` falls to ``T_low``, off when it
rises to ``T_high``.  Energy balance of the mixed tank (common practice)::

    dT/dt = -a (T - T_amb) - b w (T - T_cold) + h * heater

with ``a`` the loss rate (standby plus recirculation loop), ``b = 1 / (60 V)``
the replacement rate per L/min of draw, and ``h = P / (m c)`` the heating rate.

Between draw changes (which happen on the sample grid) each regime is a scalar
affine ODE with constant coefficients, so the generator uses its closed-form
solution and the exact threshold-crossing times (no step-size error).
"""

from __future__ import annotations

import itertools
from dataclasses import dataclass
from typing import Any

import numpy as np
import pandas as pd

from modemap.demos._common import INVENTED_NOTE, column, make_rngs, noisy

__all__ = ["FORMATS", "PARAMS", "coefficients", "simulate"]

_SALT = 101
_VOLUME_L = 300.0
_POWER_W = 18_000.0
_HEAT_CAPACITY = 4186.0  # J/(kg K), water; 1 L ~ 1 kg (common practice)

PARAMS: dict[str, float] = {
    "T_amb": 20.0,  # degC, plant room
    "T_cold": 10.0,  # degC, mains water
    "a": 1.0 / (6.0 * 3600.0),  # 1/s, standby + recirculation losses (6 h time constant)
    "b": 1.0 / (60.0 * _VOLUME_L),  # 1/(s L/min): (L/min -> L/s) / tank volume
    "h": _POWER_W / (_VOLUME_L * _HEAT_CAPACITY),  # K/s at full power
    "T_low": 55.0,  # degC, heater switches on when T falls to this
    "T_high": 60.0,  # degC, heater switches off when T rises to this
    "volume_L": _VOLUME_L,
    "power_W": _POWER_W,
}
_STEP_S = 30.0
_DURATION_S = 24.0 * 3600.0
_DEFAULT_RUNS = 4
_NOISE_STD = {"T": 0.05}
TIME, STATE, INPUT = column("t", "s"), column("T", "degC"), column("w", "L/min")
FORMATS = {TIME: "%.0f", "run": "%d", STATE: "%.3f", INPUT: "%.2f", "true_regime": "%d"}
REGIME_NAMES = ("heater off", "heater on")


def coefficients(on: bool, p: dict[str, float] = PARAMS) -> dict[str, float]:
    """Canonical term -> coefficient map of dT/dt in one regime (terms ``1, T, w, T*w``)."""
    return {
        "1": p["a"] * p["T_amb"] + (p["h"] if on else 0.0),
        "T": -p["a"],
        "w": p["b"] * p["T_cold"],
        "T*w": -p["b"],
    }


def _draw_profile(rng: np.random.Generator, n: int) -> np.ndarray:
    """Piecewise-constant draw per sample: holds ~6 min on average, 35 % of holds at zero."""
    w = np.empty(n)
    i = 0
    while i < n:
        hold = max(1, round(rng.exponential(360.0) / _STEP_S))
        level = 0.0 if rng.random() < 0.35 else round(rng.uniform(0.5, 6.0), 1)
        w[i : i + hold] = level
        i += hold
    return w


@dataclass
class _Thermostat:
    """Closed-form piecewise solution of the hysteresis thermostat."""

    temp: float
    on: bool
    p: dict[str, float]

    def rates(self, w: float) -> tuple[float, float]:
        """Decay rate k and fixed point T* of dT/dt = -k (T - T*) for the current regime."""
        c = coefficients(self.on, self.p)
        k = -(c["T"] + c["T*w"] * w)
        return k, (c["1"] + c["w"] * w) / k

    def time_to_switch(self, w: float) -> float:
        """Time until the active threshold is reached at constant draw (inf if never)."""
        k, fixed = self.rates(w)
        target = self.p["T_high"] if self.on else self.p["T_low"]
        heading_past = fixed > target if self.on else fixed < target
        if not heading_past:
            return np.inf
        return max(0.0, float(np.log((self.temp - fixed) / (target - fixed)) / k))

    def advance(self, w: float, dt: np.ndarray | float) -> np.ndarray:
        """Temperatures after ``dt`` (array allowed) in the current regime at draw ``w``."""
        k, fixed = self.rates(w)
        return fixed + (self.temp - fixed) * np.exp(-k * np.asarray(dt, dtype=float))


def _simulate_run(
    t: np.ndarray, w: np.ndarray, temp0: float, on0: bool, p: dict[str, float]
) -> tuple[np.ndarray, np.ndarray, list[list[float]]]:
    """Temperatures and heater states at the samples, plus the exact switch events."""
    n = t.size
    temp, label = np.empty(n), np.empty(n, dtype=np.int64)
    state = _Thermostat(temp0, on0, p)
    switches: list[list[float]] = []
    edges = np.flatnonzero(np.diff(w)) + 1  # draw changes on the sample grid
    bounds = np.concatenate([[0], edges, [n]])
    for lo, hi in itertools.pairwise(bounds):
        now, level = t[lo], w[lo]
        end = t[hi] if hi < n else t[-1] + _STEP_S
        first = lo
        while True:
            tau = state.time_to_switch(level)
            stop = now + tau
            last = hi if stop >= end else int(np.searchsorted(t, stop, side="left"))
            temp[first:last] = state.advance(level, t[first:last] - now)
            label[first:last] = int(state.on)
            if stop >= end:
                state.temp = float(state.advance(level, end - now))
                break
            state.temp = p["T_high"] if state.on else p["T_low"]
            switches.append([float(stop), int(state.on), int(not state.on), state.temp])
            state.on = not state.on
            now, first = stop, last
    return temp, label, switches


def simulate(
    *, seed: int = 0, noise: bool = True, n_runs: int | None = None
) -> tuple[pd.DataFrame, dict[str, Any]]:
    """Data table and ground truth of the water-heater bank (see module docstring)."""
    rng, noise_rng = make_rngs(seed, _SALT)
    runs = _DEFAULT_RUNS if n_runs is None else n_runs
    t = np.arange(0.0, _DURATION_S, _STEP_S)
    frames, run_truth = [], []
    for r in range(1, runs + 1):
        w = _draw_profile(rng, t.size)
        temp0, on0 = float(rng.uniform(55.5, 59.5)), bool(rng.random() < 0.5)
        temp, label, switches = _simulate_run(t, w, temp0, on0, PARAMS)
        frames.append(
            pd.DataFrame(
                {
                    TIME: t,
                    "run": np.full(t.size, r),
                    STATE: noisy(temp, _NOISE_STD["T"], noise_rng, noise),
                    INPUT: w,
                    "true_regime": label,
                }
            )
        )
        run_truth.append(
            {
                "run": r,
                "T0": temp0,
                "heater0": int(on0),
                "n_switches": len(switches),
                "switches": switches,
            }
        )
    return pd.concat(frames, ignore_index=True), _truth(run_truth, noise)


def _truth(run_truth: list[dict[str, Any]], noise: bool) -> dict[str, Any]:
    p = PARAMS
    regimes = []
    for rid, name in enumerate(REGIME_NAMES):
        heat = f" + {p['h']:.6g}" if rid else ""
        regimes.append(
            {
                "id": rid,
                "name": name,
                "equations": {
                    "T": f"dT/dt = -{p['a']:.6g}*(T - {p['T_amb']:g}) - {p['b']:.6g}*w*(T - "
                    f"{p['T_cold']:g}){heat}"
                },
                "coefficients": {"T": coefficients(bool(rid))},
            }
        )
    return {
        "name": "water_heaters",
        "invented": True,
        "note": INVENTED_NOTE,
        "description": (
            "Fictional office building: three 100 L electric storage water heaters (3 x 6 kW) in "
            "parallel, one aggregate mixed-tank temperature T, measured hot-water draw w, one "
            "hysteresis thermostat switching all elements together."
        ),
        "form": "continuous",
        "time": {"column": TIME, "name": "t", "unit": "s", "step": _STEP_S},
        "run_column": "run",
        "label_column": "true_regime",
        "states": [{"name": "T", "unit": "degC", "column": STATE}],
        "inputs": [{"name": "w", "unit": "L/min", "column": INPUT}],
        "variables": ["T", "w"],
        "model": "dT/dt = -a (T - T_amb) - b w (T - T_cold) + h * heater, heater in {0, 1}",
        "regimes": regimes,
        "switching": {
            "kind": "hysteresis thermostat",
            "guards": [
                {"from": 0, "to": 1, "condition": f"T <= {p['T_low']:g} (falling)"},
                {"from": 1, "to": 0, "condition": f"T >= {p['T_high']:g} (rising)"},
            ],
            "T_low": p["T_low"],
            "T_high": p["T_high"],
            "note": "With a heavy draw the tank can cool below T_low while the heater is on.",
        },
        "label_rule": "true_regime = heater state at the sample time (right-continuous: a switch "
        "between samples k-1 and k shows from sample k).",
        "parameters": dict(p),
        "parameter_units": {
            "T_amb": "degC",
            "T_cold": "degC",
            "a": "1/s",
            "b": "1/(s*L/min)",
            "h": "K/s",
            "T_low": "degC",
            "T_high": "degC",
            "volume_L": "L",
            "power_W": "W",
        },
        "inputs_profile": "w piecewise constant on the sample grid; hold times exponential "
        "(mean 360 s, at least one sample); 35 % of holds at 0, else uniform 0.5-6.0 L/min "
        "rounded to 0.1 L/min.",
        "simulation": "Closed-form solution of the scalar affine ODE on each constant-draw "
        "interval; exact threshold-crossing times (logarithm formula); 24 h per run.",
        "noise": {"enabled": noise, "std": dict(_NOISE_STD), "inputs": "noise-free"},
        "switches_format": "[time s, from regime, to regime, T at the switch degC] (exact)",
        "runs": run_truth,
    }
