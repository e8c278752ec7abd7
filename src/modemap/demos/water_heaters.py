"""Invented demo: a thermostat-controlled bank of storage water heaters.

A fictional office building has three 100 L electric storage water heaters
plumbed in parallel; the log holds one aggregate (mixed) tank temperature ``T``,
the measured hot-water draw ``w`` and the ``shed`` flag of the building's
demand-response contract.  A single thermostat relay with hysteresis drives all
elements together: it closes when ``T`` falls to ``T_low`` and opens when ``T``
rises to ``T_high``.  While the utility sheds load (``shed = 1``, a morning and an
evening peak of a few hours) the elements are off whatever the relay says; the
relay keeps following the temperature, so a tank that cooled below ``T_low``
during a shed heats again the moment the shed ends.  The sheds let the tank
cool well below the thermostat band and the recovery heats it back across the
whole range, which is what makes the loss and draw coefficients of both regimes
identifiable (inside a 5 K band the constant and the ``T`` term are nearly
collinear).  Energy balance of the mixed tank (common practice)::

    dT/dt = -a (T - T_amb) - b w (T - T_cold) + h * heater

with ``a`` the loss rate (standby plus recirculation loop), ``b = 1 / (60 V)``
the replacement rate per L/min of draw, and ``h = P / (m c)`` the heating rate.

Between changes of draw or shed flag (which happen on the sample grid) each
regime is a scalar affine ODE with constant coefficients, so the generator uses
its closed-form solution and the exact threshold-crossing times (no step-size
error).
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
_STEP_S = 10.0
_DURATION_S = 24.0 * 3600.0
_DEFAULT_RUNS = 4
_NOISE_STD = {"T": 0.01}  # a calibrated resistance thermometer, logged to 0.001 K
_DRAW_HOLD_S = 900.0  # mean hold of a draw level
# demand-response sheds per day: (nominal start h, nominal length h); the start moves by up to
# +-1 h and the length by +-20 % from day to day
_SHEDS_H = ((7.0, 2.5), (18.0, 3.0))
TIME, STATE, INPUT = column("t", "s"), column("T", "degC"), column("w", "L/min")
SHED = "shed"  # 1 while the utility sheds the load, else 0 (no unit)
FORMATS = {
    TIME: "%.0f",
    "run": "%d",
    STATE: "%.3f",
    INPUT: "%.2f",
    SHED: "%d",
    "true_regime": "%d",
}
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
    """Piecewise-constant draw per sample: holds ~15 min on average, 35 % of holds at zero."""
    w = np.empty(n)
    i = 0
    while i < n:
        hold = max(1, round(rng.exponential(_DRAW_HOLD_S) / _STEP_S))
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


def _shed_profile(rng: np.random.Generator, t: np.ndarray) -> tuple[np.ndarray, list[list[float]]]:
    """Shed flag per sample (edges on the sample grid) and the ``[start, end]`` times in s."""
    shed, events = np.zeros(t.size), []
    for start_h, length_h in _SHEDS_H:
        start = (start_h + rng.uniform(-1.0, 1.0)) * 3600.0
        length = length_h * 3600.0 * rng.uniform(0.8, 1.2)
        inside = (t >= start) & (t < start + length)
        shed[inside] = 1.0
        events.append([float(t[inside][0]), float(t[inside][-1] + _STEP_S)])
    return shed, events


def _simulate_run(
    t: np.ndarray, w: np.ndarray, shed: np.ndarray, temp0: float, relay0: bool, p: dict[str, float]
) -> tuple[np.ndarray, np.ndarray, list[list[Any]]]:
    """Temperatures and heater states at the samples, plus the exact switch events.

    The heater is on when the thermostat relay is closed and no shed is in force.  Inside a
    stretch of constant draw and shed flag the heater can only switch at a threshold crossing
    (not during a shed); at a stretch boundary it switches when a shed starts or ends.
    """
    n = t.size
    temp, label = np.empty(n), np.empty(n, dtype=np.int64)
    relay = relay0
    state = _Thermostat(temp0, relay0 and not shed[0], p)
    switches: list[list[Any]] = []
    edges = np.flatnonzero((np.diff(w) != 0) | (np.diff(shed) != 0)) + 1  # on the sample grid
    bounds = np.concatenate([[0], edges, [n]])
    for lo, hi in itertools.pairwise(bounds):
        now, level, locked = t[lo], w[lo], bool(shed[lo])
        end = t[hi] if hi < n else t[-1] + _STEP_S
        heater = relay and not locked
        if heater != state.on:
            cause = "shed start" if locked else "shed end"
            switches.append([float(now), int(state.on), int(heater), state.temp, cause])
            state.on = heater
        first = lo
        while True:
            tau = np.inf if locked else state.time_to_switch(level)
            stop = now + tau
            last = hi if stop >= end else int(np.searchsorted(t, stop, side="left"))
            temp[first:last] = state.advance(level, t[first:last] - now)
            label[first:last] = int(state.on)
            if stop >= end:
                state.temp = float(state.advance(level, end - now))
                break
            state.temp = p["T_high"] if state.on else p["T_low"]
            switches.append(
                [float(stop), int(state.on), int(not state.on), state.temp, "thermostat"]
            )
            state.on = relay = not state.on
            now, first = stop, last
        if locked and state.temp <= p["T_low"]:
            relay = True  # heater off: T only falls, so the end of the stretch tells
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
        shed, sheds = _shed_profile(rng, t)
        temp0, on0 = float(rng.uniform(55.5, 59.5)), bool(rng.random() < 0.5)
        temp, label, switches = _simulate_run(t, w, shed, temp0, on0, PARAMS)
        frames.append(
            pd.DataFrame(
                {
                    TIME: t,
                    "run": np.full(t.size, r),
                    STATE: noisy(temp, _NOISE_STD["T"], noise_rng, noise),
                    INPUT: w,
                    SHED: shed,
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
                "sheds": sheds,
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
            "hysteresis thermostat relay switching all elements together, and a demand-response "
            "shed flag that holds the elements off during a morning and an evening peak."
        ),
        "form": "continuous",
        "time": {"column": TIME, "name": "t", "unit": "s", "step": _STEP_S},
        "run_column": "run",
        "label_column": "true_regime",
        "states": [{"name": "T", "unit": "degC", "column": STATE}],
        "inputs": [
            {"name": "w", "unit": "L/min", "column": INPUT},
            {"name": "shed", "unit": "", "column": SHED},
        ],
        "variables": ["T", "w", "shed"],
        "model": "dT/dt = -a (T - T_amb) - b w (T - T_cold) + h * heater, heater in {0, 1}, "
        "heater = relay and not shed",
        "regimes": regimes,
        "switching": {
            "kind": "hysteresis thermostat relay, overridden by the shed flag",
            "guards": [
                {
                    "from": 0,
                    "to": 1,
                    "condition": f"shed = 0 and (T <= {p['T_low']:g} (falling), or the shed "
                    f"ends after T fell to {p['T_low']:g})",
                },
                {"from": 1, "to": 0, "condition": f"T >= {p['T_high']:g} (rising) or shed = 1"},
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
        f"(mean {_DRAW_HOLD_S:g} s, at least one sample); 35 % of holds at 0, else uniform "
        "0.5-6.0 L/min rounded to 0.1 L/min. shed = 1 on two stretches a day on the sample "
        "grid: "
        + ", ".join(f"{a:g} h +- 1 h for {b:g} h +- 20 %" for a, b in _SHEDS_H)
        + " (uniform draws).",
        "simulation": "Closed-form solution of the scalar affine ODE on each constant-draw "
        "interval; exact threshold-crossing times (logarithm formula); 24 h per run.",
        "noise": {"enabled": noise, "std": dict(_NOISE_STD), "inputs": "noise-free"},
        "switches_format": "[time s, from regime, to regime, T at the switch degC, cause] "
        "(exact; cause 'thermostat', 'shed start' or 'shed end')",
        "sheds_format": "[start s, end s] of every shed (the flag is 1 on start <= t < end)",
        "runs": run_truth,
    }
