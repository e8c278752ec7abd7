"""Invented demo: a jacketed exothermic CSTR with a bistable operating window.

A fictional 100 L pilot-plant reactor runs the first-order reaction A -> B with
Arrhenius kinetics.  Mass and energy balances of a continuous stirred tank
(common practice; time in minutes)::

    dC_A/dt = q/V (C_Af - C_A) - k0 exp(-E_R / T) C_A
    dT/dt   = q/V (T_f - T) + (-dH)/(rho c_p) k0 exp(-E_R / T) C_A - UA/(V rho c_p) (T - Tc)

For coolant temperatures Tc between about 292 K and 307 K there are three steady
states: a low-conversion one and a high-conversion one (both stable) and an
unstable saddle between them; below the window only the low-conversion state
exists, above it only the high-conversion one.  The plant log is dominated by
steady operation inside the window (long holds, mostly at the nominal 300 K),
with brief coolant excursions below or above it that extinguish or ignite the
reactor.  The adiabatic temperature rise -dH C_Af / (rho c_p) is a moderate
80 K and the jacket removes heat slowly (UA/(V rho c_p) = 0.21 1/min), so the
ignition overshoots the high branch by a few kelvin only (to about 383 K).  The
true model is not polynomial (it contains exp(-E_R/T)); the truth sidecar also
gives each regime's linearisation at its stable steady state (affine terms).
"""

from __future__ import annotations

import functools
import itertools
from typing import Any

import numpy as np
import pandas as pd
from scipy.integrate import solve_ivp
from scipy.optimize import fsolve

from modemap.demos._common import INVENTED_NOTE, column, make_rngs, noisy

__all__ = ["FORMATS", "PARAMS", "TC_LEVELS", "jacobian", "rhs", "simulate", "steady_states"]

_SALT = 202
PARAMS: dict[str, float] = {
    "q": 100.0,  # L/min feed
    "V": 100.0,  # L
    "C_Af": 1.0,  # mol/L feed concentration
    "T_f": 321.0,  # K feed temperature
    "k0": 7.2e10,  # 1/min
    "E_R": 8750.0,  # K (activation energy / gas constant)
    "dH": -1.912e4,  # J/mol (exothermic; adiabatic rise -dH C_Af / rho_cp = 80 K)
    "rho_cp": 239.0,  # J/(L K)
    "UA": 5.0e3,  # J/(min K)
}
TC_NOMINAL = 300.0
TC_LEVELS = (276.0, 296.0, 300.0, 304.0, 320.0)  # K; 276 and 320 lie outside the bistable window
X_SPLIT = 0.5  # conversion separating the two regimes
_STEP_MIN = 0.05
_DURATION_MIN = 200.0
_FIRST_HOLD_MIN = (15.0, 20.0)  # start-up hold at the nominal level
_HOLD_MIN = (25.0, 35.0)  # steady operation at the nominal level
_SIDE_HOLD_MIN = (14.0, 20.0)  # steady operation at a neighbouring level inside the window
_EXCURSION_MIN = (6.5, 7.9)  # brief excursion outside it: ignites or extinguishes
_DEFAULT_RUNS = 4
_NOISE_STD = {"C_A": 0.003, "T": 0.2}
TIME = column("t", "min")
CONC, TEMP, COOLANT = column("C_A", "mol/L"), column("T", "K"), column("Tc", "K")
FORMATS = {
    TIME: "%.2f",
    "run": "%d",
    CONC: "%.5f",
    TEMP: "%.3f",
    COOLANT: "%.1f",
    "true_regime": "%d",
}
REGIME_NAMES = ("low conversion", "high conversion")


def rhs(x: np.ndarray, tc: float, p: dict[str, float] = PARAMS) -> np.ndarray:
    """Right-hand side (dC_A/dt, dT/dt) in per-minute units; ``x = (C_A, T)``."""
    conc, temp = x[0], x[1]
    rate = p["k0"] * np.exp(-p["E_R"] / temp) * conc
    dilution = p["q"] / p["V"]
    d_conc = dilution * (p["C_Af"] - conc) - rate
    d_temp = (
        dilution * (p["T_f"] - temp)
        - p["dH"] / p["rho_cp"] * rate
        - p["UA"] / (p["V"] * p["rho_cp"]) * (temp - tc)
    )
    return np.array([d_conc, d_temp])


def jacobian(x: np.ndarray, p: dict[str, float] = PARAMS) -> np.ndarray:
    """Analytic Jacobian of :func:`rhs` with respect to ``(C_A, T)``."""
    conc, temp = float(x[0]), float(x[1])
    k = p["k0"] * np.exp(-p["E_R"] / temp)
    dk_dt = k * p["E_R"] / temp**2
    dilution, heat = p["q"] / p["V"], -p["dH"] / p["rho_cp"]
    cool = p["UA"] / (p["V"] * p["rho_cp"])
    return np.array(
        [[-dilution - k, -dk_dt * conc], [heat * k, -dilution + heat * dk_dt * conc - cool]]
    )


def steady_states(tc: float, p: dict[str, float] = PARAMS) -> list[dict[str, Any]]:
    """All steady states at coolant temperature ``tc``, by ``fsolve`` from several starts.

    Sorted by temperature; each entry has ``C_A``, ``T``, ``conversion``,
    ``eigenvalues`` (``[[re, im], ...]``) and ``stability``.
    """
    found: list[np.ndarray] = []
    with np.errstate(over="ignore", invalid="ignore"):
        roots = [_solve_from(t_start, tc, p) for t_start in np.linspace(290.0, 480.0, 39)]
    for root in roots:
        if root is not None and not any(np.allclose(root, f, atol=1e-6) for f in found):
            found.append(root)
    found.sort(key=lambda x: x[1])
    return [_describe(x, p) for x in found]


def _solve_from(t_start: float, tc: float, p: dict[str, float]) -> np.ndarray | None:
    """One ``fsolve`` from temperature ``t_start`` (C_A from the mass balance); None if it fails."""
    conc_start = p["C_Af"] / (1.0 + p["V"] / p["q"] * p["k0"] * np.exp(-p["E_R"] / t_start))
    root, _, ok, _ = fsolve(
        lambda x: rhs(x, tc, p),
        [conc_start, t_start],
        fprime=lambda x: jacobian(x, p),
        full_output=True,
        xtol=1e-13,
    )
    return root if ok == 1 and np.abs(rhs(root, tc, p)).max() < 1e-8 else None


def _describe(x: np.ndarray, p: dict[str, float]) -> dict[str, Any]:
    eig = np.linalg.eigvals(jacobian(x, p))
    eig = eig[np.lexsort((eig.imag, eig.real))]
    unstable = int(np.sum(eig.real > 0))
    stability = "stable" if unstable == 0 else ("saddle" if unstable == 1 else "unstable")
    return {
        "C_A": float(x[0]),
        "T": float(x[1]),
        "conversion": float(1.0 - x[0] / p["C_Af"]),
        "eigenvalues": [[float(e.real), float(e.imag)] for e in eig],
        "stability": stability,
    }


def _tc_schedule(rng: np.random.Generator, t: np.ndarray, high_first: bool) -> np.ndarray:
    """Coolant level per sample: long holds inside the window, brief excursions outside.

    A start-up hold at the nominal level, then cycles of: a brief excursion to the
    coldest or the hottest level (alternating; the first one leaves the starting
    branch, cold from the high branch, hot from the low one, so every excursion
    extinguishes or ignites the reactor), a long hold at the nominal level and a
    shorter one at a neighbouring level inside the window.  Steady operation on
    either branch dominates the log, mostly at the nominal level, and holds at the
    same level on both branches show that the branch depends on history.
    """
    sides = [v for v in TC_LEVELS[1:-1] if v != TC_NOMINAL]
    extreme = 0 if high_first else 1
    tc = np.full(t.size, TC_NOMINAL)
    i = round(rng.uniform(*_FIRST_HOLD_MIN) / _STEP_MIN)
    while i < t.size:
        for level, span in (
            ((TC_LEVELS[0], TC_LEVELS[-1])[extreme], _EXCURSION_MIN),
            (TC_NOMINAL, _HOLD_MIN),
            (float(rng.choice(sides)), _SIDE_HOLD_MIN),
        ):
            hold = round(rng.uniform(*span) / _STEP_MIN)
            tc[i : i + hold] = level
            i += hold
        extreme = 1 - extreme
    return tc


def _integrate(x0: np.ndarray, t: np.ndarray, tc: np.ndarray) -> np.ndarray:
    """Integrate piecewise over constant-Tc intervals (DOP853, rtol 1e-10, atol 1e-12)."""
    out = np.empty((t.size, 2))
    edges = np.concatenate([[0], np.flatnonzero(np.diff(tc)) + 1, [t.size]])
    x = np.asarray(x0, dtype=float)
    for lo, hi in itertools.pairwise(edges):
        end = t[hi] if hi < t.size else t[-1]
        if end <= t[lo]:  # a last hold of one sample: nothing to integrate
            out[lo:hi] = x
            continue
        sol = solve_ivp(
            lambda _s, y, level=tc[lo]: rhs(y, level),
            (t[lo], end),
            x,
            method="DOP853",
            t_eval=t[lo:hi],
            rtol=1e-10,
            atol=1e-12,
            dense_output=True,
        )
        out[lo:hi] = sol.y.T
        x = sol.sol(end)
    return out


def _affine(state: dict[str, Any], tc0: float) -> dict[str, dict[str, float]]:
    """Linearisation at a steady state as canonical maps over ``1, C_A, T, Tc``."""
    x = np.array([state["C_A"], state["T"]])
    jac = jacobian(x)
    b = np.array([0.0, PARAMS["UA"] / (PARAMS["V"] * PARAMS["rho_cp"])])
    const = -jac @ x - b * tc0
    maps = {}
    for j, name in enumerate(("C_A", "T")):
        values = {"1": const[j], "C_A": jac[j, 0], "T": jac[j, 1], "Tc": b[j]}
        maps[name] = {term: float(v) for term, v in values.items() if v != 0.0}
    return maps


def simulate(
    *, seed: int = 0, noise: bool = True, n_runs: int | None = None
) -> tuple[pd.DataFrame, dict[str, Any]]:
    """Data table and ground truth of the bistable reactor (see module docstring)."""
    rng, noise_rng = make_rngs(seed, _SALT)
    runs = _DEFAULT_RUNS if n_runs is None else n_runs
    t = np.arange(0.0, _DURATION_MIN + _STEP_MIN / 2, _STEP_MIN)
    nominal = steady_states(TC_NOMINAL)
    frames, run_truth = [], []
    for r in range(1, runs + 1):
        start = nominal[0] if r % 2 else nominal[-1]  # alternate the starting branch
        tc = _tc_schedule(rng, t, high_first=not r % 2)
        x0 = np.array([start["C_A"], start["T"]]) * (1.0 + 0.01 * rng.standard_normal(2))
        x = _integrate(x0, t, tc)
        label = (1.0 - x[:, 0] / PARAMS["C_Af"] > X_SPLIT).astype(np.int64)
        frames.append(
            pd.DataFrame(
                {
                    TIME: t,
                    "run": np.full(t.size, r),
                    CONC: noisy(x[:, 0], _NOISE_STD["C_A"], noise_rng, noise),
                    TEMP: noisy(x[:, 1], _NOISE_STD["T"], noise_rng, noise),
                    COOLANT: tc,
                    "true_regime": label,
                }
            )
        )
        changes = np.flatnonzero(np.diff(tc)) + 1
        run_truth.append(
            {
                "run": r,
                "x0": [float(v) for v in x0],
                "Tc_steps": [[float(t[i]), float(tc[i])] for i in np.concatenate([[0], changes])],
                "n_regime_changes": int(np.count_nonzero(np.diff(label))),
            }
        )
    return pd.concat(frames, ignore_index=True), _truth(run_truth, nominal, noise)


def _truth(
    run_truth: list[dict[str, Any]], nominal: list[dict[str, Any]], noise: bool
) -> dict[str, Any]:
    p = PARAMS
    dil, heat, cool = p["q"] / p["V"], -p["dH"] / p["rho_cp"], p["UA"] / (p["V"] * p["rho_cp"])
    arr = f"{p['k0']:.6g}*exp(-{p['E_R']:g}/T)*C_A"
    equations = {
        "C_A": f"dC_A/dt = {dil:.6g}*({p['C_Af']:g} - C_A) - {arr}",
        "T": f"dT/dt = {dil:.6g}*({p['T_f']:g} - T) + {heat:.6g}*{arr} - {cool:.6g}*(T - Tc)",
    }
    exp_term = f"C_A*exp(-{p['E_R']:g}/T)"
    exact = {
        "C_A": {"1": dil * p["C_Af"], "C_A": -dil, exp_term: -p["k0"]},
        "T": {"1": dil * p["T_f"], "T": -dil - cool, "Tc": cool, exp_term: heat * p["k0"]},
    }
    regimes = []
    for rid, name in enumerate(REGIME_NAMES):
        branch = nominal[0] if rid == 0 else nominal[-1]
        regimes.append(
            {
                "id": rid,
                "name": name,
                "definition": f"conversion 1 - C_A/C_Af {'<=' if rid == 0 else '>'} {X_SPLIT:g}",
                "equations": equations,
                "coefficients": exact,
                "linearization_at_nominal": {
                    "Tc": TC_NOMINAL,
                    "steady_state": {"C_A": branch["C_A"], "T": branch["T"]},
                    "coefficients": _affine(branch, TC_NOMINAL),
                },
            }
        )
    return {
        "name": "reactor",
        "invented": True,
        "note": INVENTED_NOTE,
        "description": (
            "Fictional 100 L jacketed pilot-plant CSTR, first-order exothermic A -> B with "
            "Arrhenius kinetics; long holds of the coolant temperature inside a bistable "
            "window with brief excursions outside it, so the reactor ignites (high "
            "conversion) and extinguishes (low conversion) and steady operation dominates."
        ),
        "form": "continuous",
        "time": {"column": TIME, "name": "t", "unit": "min", "step": _STEP_MIN},
        "run_column": "run",
        "label_column": "true_regime",
        "states": [
            {"name": "C_A", "unit": "mol/L", "column": CONC},
            {"name": "T", "unit": "K", "column": TEMP},
        ],
        "inputs": [{"name": "Tc", "unit": "K", "column": COOLANT}],
        "variables": ["C_A", "T", "Tc"],
        "polynomial": False,
        "model": "Same nonlinear ODE in both regimes (not polynomial: contains exp(-E_R/T)); "
        "the regimes are the two stable branches. The term "
        f"'{exp_term}' in 'coefficients' is outside the polynomial term set; "
        "'linearization_at_nominal' gives the affine model each regime is close to.",
        "regimes": regimes,
        "regime_ids_note": "0 = low conversion (lower T), 1 = high conversion; a fitter may "
        "number them differently.",
        "switching": {
            "kind": "state-dependent (fold bifurcations in Tc)",
            "windows_1K_grid": _windows(),
            "note": "Below the window only the low-conversion state exists, above it only the "
            "high-conversion state; inside it the branch depends on history (hysteresis).",
        },
        "label_rule": f"true_regime = 1 if conversion 1 - C_A/C_Af > {X_SPLIT:g} else 0 "
        "(noise-free trajectory).",
        "steady_states": {f"{tc:g}": steady_states(tc) for tc in TC_LEVELS},
        "steady_state_method": "scipy.optimize.fsolve from 39 starts (T = 290..480 K), "
        "de-duplicated; stability from the eigenvalues of the analytic Jacobian.",
        "parameters": dict(p),
        "parameter_units": {
            "q": "L/min",
            "V": "L",
            "C_Af": "mol/L",
            "T_f": "K",
            "k0": "1/min",
            "E_R": "K",
            "dH": "J/mol",
            "rho_cp": "J/(L*K)",
            "UA": "J/(min*K)",
        },
        "inputs_profile": f"Tc levels {list(TC_LEVELS)} K: a start-up hold at the nominal "
        f"{TC_NOMINAL:g} K ({_span(_FIRST_HOLD_MIN)} min), then cycles of an excursion to "
        f"{TC_LEVELS[0]:g} or {TC_LEVELS[-1]:g} K ({_span(_EXCURSION_MIN)} min; the first one "
        "leaves the starting branch, then they alternate, so each extinguishes or ignites), "
        f"a hold at {TC_NOMINAL:g} K ({_span(_HOLD_MIN)} min) and a hold at "
        f"{TC_LEVELS[1]:g} or {TC_LEVELS[3]:g} K ({_span(_SIDE_HOLD_MIN)} min); "
        "hold lengths uniform.",
        "simulation": "scipy.integrate.solve_ivp (DOP853, rtol 1e-10, atol 1e-12) on each "
        "constant-Tc interval; Tc steps on the sample grid; "
        f"{_DURATION_MIN:g} min per run.",
        "noise": {"enabled": noise, "std": dict(_NOISE_STD), "inputs": "noise-free"},
        "runs": run_truth,
    }


def _span(bounds: tuple[float, float]) -> str:
    return f"{bounds[0]:g}-{bounds[1]:g}"


@functools.cache
def _windows() -> dict[str, list[float]]:
    """Coolant ranges (1 K grid, 270-320 K) with three steady states / with two stable ones."""
    kinds = {tc: [s["stability"] for s in steady_states(tc)] for tc in np.arange(270.0, 321.0)}
    three = [tc for tc, k in kinds.items() if len(k) == 3]
    both = [tc for tc, k in kinds.items() if k == ["stable", "saddle", "stable"]]
    return {
        "three_steady_states_K": [float(min(three)), float(max(three))],
        "two_stable_states_K": [float(min(both)), float(max(both))],
    }
