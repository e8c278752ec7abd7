"""Tests of the invented demo scenarios (modemap.demos).

The generators are checked against independent references: scipy.integrate.solve_ivp
(re-integrating the documented equations), scipy.optimize.fsolve (steady states) and the
volt-second balance of an ideal buck converter.
"""

from __future__ import annotations

import itertools
import json
from pathlib import Path

import numpy as np
import pandas as pd
import pytest
from scipy.integrate import solve_ivp
from scipy.optimize import fsolve

from modemap import DataError
from modemap.demos import DEMOS, make_demo, write_demo

DATASETS = Path(__file__).resolve().parents[1] / "datasets"


@pytest.fixture(scope="module")
def written(tmp_path_factory: pytest.TempPathFactory) -> Path:
    """Every demo written once with the default seed."""
    folder = tmp_path_factory.mktemp("demos")
    for name in DEMOS:
        write_demo(name, folder, seed=0)
    return folder


def _term_value(term: str, values: dict[str, float]) -> float:
    """Value of a canonical monomial such as ``1``, ``T``, ``T*w``, ``x^2*u`` (no eval)."""
    result = 1.0
    if term == "1":
        return result
    for factor in term.split("*"):
        name, _, power = factor.partition("^")
        result *= values[name] ** (int(power) if power else 1)
    return result


def _rhs_from_map(coefficients: dict[str, float], values: dict[str, float]) -> float:
    return sum(c * _term_value(term, values) for term, c in coefficients.items())


# ---------------------------------------------------------------------------- API, files


@pytest.mark.parametrize("name", DEMOS)
def test_same_seed_same_bytes_other_seed_differs(name: str, written: Path, tmp_path: Path) -> None:
    again = write_demo(name, tmp_path / "again", seed=0)
    other = write_demo(name, tmp_path / "other", seed=1)
    for path in again:
        assert path.read_bytes() == (written / path.name).read_bytes()
    assert other[0].read_bytes() != (written / f"{name}.csv").read_bytes()


@pytest.mark.parametrize("name", DEMOS)
def test_committed_files_are_current_and_small(name: str, written: Path) -> None:
    for suffix in (".csv", ".truth.json"):
        committed = DATASETS / f"{name}{suffix}"
        assert committed.read_bytes() == (written / committed.name).read_bytes(), committed
    assert (DATASETS / f"{name}.csv").stat().st_size < 2_000_000


def test_datasets_folder_holds_exactly_the_demos() -> None:
    assert sorted(p.name for p in DATASETS.glob("*.csv")) == sorted(f"{n}.csv" for n in DEMOS)


@pytest.mark.parametrize("name", DEMOS)
def test_table_and_truth_agree(name: str, written: Path) -> None:
    data = pd.read_csv(written / f"{name}.csv")
    truth = json.loads((written / f"{name}.truth.json").read_text())
    columns = [truth["time"]["column"], "run"]
    columns += [v["column"] for v in truth["states"] + truth["inputs"]] + ["true_regime"]
    assert list(data.columns) == columns
    assert truth["invented"] is True and "INVENTED" in truth["note"]
    assert 3 <= data["run"].nunique() <= 5
    assert set(data["true_regime"]) == {r["id"] for r in truth["regimes"]}
    assert np.all(np.diff(data[columns[0]].to_numpy())[np.diff(data["run"]) == 0] > 0)


def test_noise_is_gaussian_with_documented_std() -> None:
    noisy, truth = make_demo("buck", seed=3, n_runs=1)
    clean, _ = make_demo("buck", seed=3, n_runs=1, noise=False)
    for state in truth["states"]:
        residual = noisy[state["column"]] - clean[state["column"]]
        std = truth["noise"]["std"][state["name"]]
        # 4000 draws: sample std within 5 % of the true one (chi-square spread, common practice)
        assert residual.std() == pytest.approx(std, rel=0.05)
        assert abs(residual.mean()) < 4 * std / np.sqrt(residual.size)
    pd.testing.assert_series_equal(noisy["g [-]"], clean["g [-]"])


def test_bad_arguments_raise_our_errors() -> None:
    with pytest.raises(DataError, match="unknown demo 'boiler'"):
        make_demo("boiler")
    with pytest.raises(DataError, match="n_runs"):
        make_demo("buck", n_runs=0)
    data, truth = make_demo("buck", n_runs=5, noise=False)
    assert data["run"].nunique() == 5 and len(truth["runs"]) == 5


# ---------------------------------------------------------------------------- water heaters


@pytest.fixture(scope="module")
def heaters() -> tuple[pd.DataFrame, dict]:
    return make_demo("water_heaters", seed=0, noise=False)


def _thermostat_reference(truth: dict, run: pd.DataFrame, t_end: float) -> tuple[np.ndarray, list]:
    """Re-integrate with solve_ivp + threshold events from the documented coefficient maps.

    The documented rule: the heater is on when the thermostat relay is closed and no shed is
    in force; the relay closes when T falls to T_low (also during a shed) and opens when T
    rises to T_high.
    """
    maps = [r["coefficients"]["T"] for r in truth["regimes"]]
    low, high = truth["switching"]["T_low"], truth["switching"]["T_high"]
    t = run["t [s]"].to_numpy()
    w, shed = run["w [L/min]"].to_numpy(), run["shed"].to_numpy()
    keep = t <= t_end
    t, w, shed = t[keep], w[keep], shed[keep]
    out, switches = np.empty(t.size), []
    temp, on, now = run["T [degC]"].iloc[0], int(run["true_regime"].iloc[0]), 0.0
    assert shed[0] == 0  # no shed at the start of a run in this demo
    relay = bool(on)
    edges = [*np.flatnonzero((np.diff(w) != 0) | (np.diff(shed) != 0)) + 1, t.size]
    lo = 0
    for hi in edges:
        end = t[hi] if hi < t.size else t[-1]
        locked = bool(shed[lo])
        heater = int(relay and not locked)
        if heater != on:
            switches.append((now, on, "shed start" if locked else "shed end"))
            on = heater
        while True:

            def f(_s: float, y: np.ndarray, on: int = on, level: float = w[lo]) -> list[float]:
                return [_rhs_from_map(maps[on], {"T": y[0], "w": level})]

            def hit(_s: float, y: np.ndarray, on: int = on) -> float:
                return y[0] - (high if on else low)

            hit.terminal, hit.direction = True, (1 if on else -1)
            sel = (t >= now) & (t <= end) & (np.arange(t.size) >= lo) & (np.arange(t.size) < hi)
            events = None if locked else hit
            sol = solve_ivp(
                f, (now, end), [temp], rtol=1e-10, atol=1e-10, events=events, dense_output=True
            )
            stop = sol.t[-1]
            inside = sel & (t < stop) if sol.status == 1 else sel
            out[inside] = sol.sol(t[inside])[0]
            temp, now = sol.y[0, -1], stop
            if sol.status != 1:
                break
            switches.append((stop, on, "thermostat"))
            on = 1 - on
            relay = bool(on)
        if locked and temp <= low:
            relay = True
        lo = hi
    return out, switches


def test_heaters_match_solve_ivp_with_events(heaters: tuple[pd.DataFrame, dict]) -> None:
    data, truth = heaters
    run = data[data["run"] == 1]
    t_end = 12 * 3600.0  # through the morning shed
    reference, switches = _thermostat_reference(truth, run, t_end)
    generated = run["T [degC]"].to_numpy()[: reference.size]
    # solve_ivp reference at rtol 1e-10 (scipy): agreement to well under the 0.001 degC print step
    np.testing.assert_allclose(generated, reference, atol=2e-6)
    documented = [s for s in truth["runs"][0]["switches"] if s[0] < t_end]
    assert len(switches) == len(documented) >= 10
    assert any(d[4] == "shed end" for d in documented)
    np.testing.assert_allclose([s[0] for s in switches], [d[0] for d in documented], atol=1e-3)
    assert [s[1] for s in switches] == [d[1] for d in documented]
    assert [s[2] for s in switches] == [d[4] for d in documented]


def test_heaters_switch_at_thresholds_with_hysteresis(heaters: tuple[pd.DataFrame, dict]) -> None:
    data, truth = heaters
    low, high = truth["switching"]["T_low"], truth["switching"]["T_high"]
    for run_id, run in data.groupby("run"):
        temp, label = run["T [degC]"].to_numpy(), run["true_regime"].to_numpy()
        shed = run["shed"].to_numpy()
        step = np.abs(np.diff(temp)).max()
        # hysteresis thermostat (common practice): off never below T_low unless shed, on
        # never above T_high, never on during a shed
        assert temp[(label == 0) & (shed == 0)].min() >= low - 1e-9
        assert temp[label == 1].max() <= high + 1e-9
        assert not np.any(label[shed == 1])
        assert temp[shed == 1].min() < low - 20.0, run_id  # the sheds cool the tank well down
        changes = np.flatnonzero(np.diff(label)) + 1
        assert changes.size >= 40, run_id  # >= 20 on/off cycles per run
        by_thermostat = changes[shed[changes] == shed[changes - 1]]
        turned_on = by_thermostat[label[by_thermostat] == 1]
        turned_off = by_thermostat[label[by_thermostat] == 0]
        assert np.all(np.abs(temp[turned_on - 1] - low) <= step)
        assert np.all(np.abs(temp[turned_off - 1] - high) <= step)
        # documented switches alternate, in time order; thermostat ones at the thresholds,
        # shed ones at the documented shed edges
        switches = truth["runs"][run_id - 1]["switches"]
        times = np.array([s[0] for s in switches])
        assert np.all(np.diff(times) > 0)
        assert all(b[1] == a[2] for a, b in itertools.pairwise(switches))
        edges = {e for pair in truth["runs"][run_id - 1]["sheds"] for e in pair}
        for when, _, to, at, cause in switches:
            if cause == "thermostat":
                assert at == pytest.approx(low if to == 1 else high)
            else:
                assert when in edges and to == (1 if cause == "shed end" else 0)


def test_heater_truth_equations_are_the_energy_balance(heaters: tuple[pd.DataFrame, dict]) -> None:
    _, truth = heaters
    p = truth["parameters"]
    # mixed-tank energy balance (common practice): heating rate P / (rho V c), 4186 J/(kg K)
    assert p["h"] == pytest.approx(18_000.0 / (300.0 * 4186.0))
    on = truth["regimes"][1]["coefficients"]["T"]
    values = {"T": 57.0, "w": 3.0}
    expected = -p["a"] * (57.0 - p["T_amb"]) - p["b"] * 3.0 * (57.0 - p["T_cold"]) + p["h"]
    assert _rhs_from_map(on, values) == pytest.approx(expected, rel=1e-9)


# ---------------------------------------------------------------------------- buck converter


@pytest.fixture(scope="module")
def buck() -> tuple[pd.DataFrame, dict]:
    return make_demo("buck", seed=0, noise=False)


def test_buck_matches_piecewise_solve_ivp(buck: tuple[pd.DataFrame, dict]) -> None:
    data, truth = buck
    p = truth["parameters"]
    inv_l, inv_c = 1.0 / (p["L"] * 1e-3), 1.0 / (p["C"] * 1e-6)  # SI: H and F

    def circuit(_s: float, x: np.ndarray, gate: int) -> list[float]:
        return [(gate * p["V_in"] - x[1]) * inv_l, (x[0] - x[1] / p["R"]) * inv_c]

    run = data[data["run"] == 1].iloc[:400]  # first 10 switching periods
    t = run["t [ms]"].to_numpy() * 1e-3
    gate = run["g [-]"].to_numpy()
    edges = [0, *np.flatnonzero(np.diff(gate)) + 1, t.size]
    x, reference = np.zeros(2), np.empty((t.size, 2))
    for lo, hi in itertools.pairwise(edges):
        end = t[hi] if hi < t.size else t[-1]
        sol = solve_ivp(
            circuit,
            (t[lo], end),
            x,
            args=(int(gate[lo]),),
            rtol=1e-10,
            atol=1e-12,
            dense_output=True,
            method="DOP853",
        )
        reference[lo:hi] = sol.sol(t[lo:hi]).T
        x = sol.y[:, -1]
    np.testing.assert_allclose(run[["i_L [A]", "v_C [V]"]].to_numpy(), reference, atol=1e-6)
    on = truth["regimes"][1]["coefficients"]
    assert on["i_L"]["1"] == pytest.approx(p["V_in"] * inv_l * 1e-3)  # per ms
    assert on["v_C"]["v_C"] == pytest.approx(-inv_c / p["R"] * 1e-3)


def test_buck_output_follows_volt_second_balance(buck: tuple[pd.DataFrame, dict]) -> None:
    data, truth = buck
    v_in, per = truth["parameters"]["V_in"], truth["switching"]["samples_per_period"]
    for info in truth["runs"]:
        run = data[data["run"] == info["run"]]
        stop = (
            run.shape[0]
            if "duty_step_time" not in info
            else round(info["duty_step_time"] / truth["time"]["step"])
        )
        window = run.iloc[stop - 25 * per : stop]  # last 25 whole periods before any duty step
        # ideal buck in continuous conduction: V_out = D V_in ("Fundamentals of Power
        # Electronics", Springer, 3rd edition, 2020, volt-second balance)
        assert window["v_C [V]"].mean() == pytest.approx(info["duty"] * v_in, rel=0.01)
        assert window["g [-]"].mean() == pytest.approx(info["duty"])
        # continuous conduction: the inductor current never reaches zero after start-up
        assert run["i_L [A]"].iloc[1:].min() > 0.0


# ---------------------------------------------------------------------------- reactor


@pytest.fixture(scope="module")
def reactor() -> tuple[pd.DataFrame, dict]:
    return make_demo("reactor", seed=0, noise=False, n_runs=2)


def _cstr(p: dict, tc: float):
    """Right-hand side written from the documented parameters (per minute)."""

    def f(x: np.ndarray) -> np.ndarray:
        rate = p["k0"] * np.exp(-p["E_R"] / x[1]) * x[0]
        return np.array(
            [
                p["q"] / p["V"] * (p["C_Af"] - x[0]) - rate,
                p["q"] / p["V"] * (p["T_f"] - x[1])
                - p["dH"] / p["rho_cp"] * rate
                - p["UA"] / (p["V"] * p["rho_cp"]) * (x[1] - tc),
            ]
        )

    return f


def _numeric_jacobian(f, x: np.ndarray) -> np.ndarray:
    steps = np.array([1e-7, 1e-5])
    return np.column_stack(
        [
            (f(x + np.eye(2)[k] * steps[k]) - f(x - np.eye(2)[k] * steps[k])) / (2 * steps[k])
            for k in range(2)
        ]
    )


def test_reactor_steady_states_match_fsolve(reactor: tuple[pd.DataFrame, dict]) -> None:
    _, truth = reactor
    p = truth["parameters"]
    for level, states in truth["steady_states"].items():
        f = _cstr(p, float(level))
        for state in states:
            x = np.array([state["C_A"], state["T"]])
            root = fsolve(f, x + np.array([0.01, 2.0]), xtol=1e-12)  # scipy reference
            np.testing.assert_allclose(root, x, rtol=1e-6)
            eig = np.linalg.eigvals(_numeric_jacobian(f, root))
            assert (state["stability"] == "saddle") == (np.sum(eig.real > 0) == 1)
            assert (state["stability"] == "stable") == bool(np.all(eig.real < 0))
    nominal = truth["steady_states"]["300"]
    assert [s["stability"] for s in nominal] == ["stable", "saddle", "stable"]
    # a start near neither branch converges (fsolve) to one of the three documented states
    root = fsolve(_cstr(p, 300.0), [0.6, 344.0], xtol=1e-12)
    assert min(abs(root[1] - s["T"]) for s in nominal) < 1e-6


def test_reactor_settles_on_the_labelled_branch(reactor: tuple[pd.DataFrame, dict]) -> None:
    data, truth = reactor
    for info in truth["runs"]:
        run = data[data["run"] == info["run"]]
        ends = [*np.flatnonzero(np.diff(run["Tc [K]"])), run.shape[0] - 1]
        starts = [0, *(e + 1 for e in ends[:-1])]
        settled = [e for s, e in zip(starts, ends, strict=True) if e - s >= 160]  # >= 8 min holds
        assert len(settled) >= 5
        for end in settled:
            row = run.iloc[end]
            branches = truth["steady_states"][f"{row['Tc [K]']:g}"]
            stable = [s for s in branches if s["stability"] == "stable"]
            state = stable[0] if row["true_regime"] == 0 else stable[-1]
            assert row["T [K]"] == pytest.approx(state["T"], abs=0.05)
            assert row["C_A [mol/L]"] == pytest.approx(state["C_A"], abs=5e-4)
        assert info["n_regime_changes"] >= 2  # each run ignites and extinguishes


def test_reactor_matches_solve_ivp_radau(reactor: tuple[pd.DataFrame, dict]) -> None:
    data, truth = reactor
    p = truth["parameters"]
    run = data[data["run"] == 1].iloc[:700]  # first 35 minutes, includes an ignition or quench
    t, tc = run["t [min]"].to_numpy(), run["Tc [K]"].to_numpy()
    x = np.array(truth["runs"][0]["x0"])
    reference = np.empty((t.size, 2))
    edges = [0, *np.flatnonzero(np.diff(tc)) + 1, t.size]
    for lo, hi in itertools.pairwise(edges):
        end = t[hi] if hi < t.size else t[-1]
        f = _cstr(p, tc[lo])
        sol = solve_ivp(
            lambda _s, y, f=f: f(y),
            (t[lo], end),
            x,
            method="Radau",
            rtol=1e-9,
            atol=1e-11,
            dense_output=True,
        )
        reference[lo:hi] = sol.sol(t[lo:hi]).T
        x = sol.y[:, -1]
    assert np.ptp(run["true_regime"]) == 1
    np.testing.assert_allclose(
        run[["C_A [mol/L]", "T [K]"]].to_numpy(), reference, rtol=1e-5, atol=1e-6
    )
