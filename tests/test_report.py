"""Tests for the Markdown report (modemap.report.markdown).

References:
* Markdown tables: GitHub Flavored Markdown Spec, section "Tables (extension)" (GitHub,
  2019): a header row, a delimiter row, and body rows with the same number of cells.
* Time constant of a stable real mode: tau = -1/Re(lambda) (textbook linear systems; common
  practice).  A one-variable linear guard w*x + c > 0 switches at x = -c/w (common practice).
"""

from __future__ import annotations

import re

import numpy as np
import pytest

from modemap.model.hybrid import Equilibrium, Guard, HybridModel, RegimeModel
from modemap.model.modelfile import dumps_model, loads_model
from modemap.report.markdown import CAUTION, render_report

TERMS = ["1", "T", "q", "T*q"]


def two_regime_model() -> HybridModel:
    """Hand-built two-regime model (invented numbers): a heater with hysteresis on T."""
    coef0 = np.array([[2.0, 0.0], [-0.5, 0.25], [1.0, 0.0], [0.0, -0.25]])
    coef1 = np.array([[-1.0, 0.5], [-0.25, 0.0], [0.0, 3.0], [0.0, 0.0]])
    eq0 = Equilibrium(
        point={"T": 4.0, "P": -1.25},
        eigenvalues=np.array([-0.5, -2.0], dtype=complex),
        stability="stable node",
        inside=True,
        time_constants=[2.0, 0.5],  # -1/(-0.5), -1/(-2.0)
        inputs={"q": 0.5},
    )
    eq1 = Equilibrium(
        point={"T": -4.0, "P": 7.5},
        eigenvalues=np.array([-0.25 + 1.5j, -0.25 - 1.5j]),
        stability="stable focus",
        inside=False,
        time_constants=[4.0],
        period=2 * np.pi / 1.5,
        note="outside the data",
    )
    regimes = [
        RegimeModel(0, 300, TERMS, coef0, np.full((4, 2), 0.01), np.diag([0.04, 0.09]), [eq0]),
        RegimeModel(1, 100, TERMS, coef1, np.full((4, 2), 0.02), np.diag([0.01, 0.01]), [eq1]),
    ]
    guards = [
        Guard(0, 1, ["T"], np.array([2.0]), -11.0, "T > 5.5 degC"),
        Guard(1, 0, ["1", "T"], np.array([4.0, -1.0]), 0.5, "T < 4.5 degC"),
    ]
    return HybridModel(
        states=["T", "P"],
        inputs=["q"],
        form="continuous",
        regimes=regimes,
        guards=guards,
        units={"T": "degC", "P": "bar", "q": "kW", "time": "s"},
        step=0.5,
        guard_kind="per-source",
        data_range={"T": (-1.0, 9.0), "P": (-3.0, 3.0), "q": (0.0, 2.0)},
        derivative={"method": "savgol", "window": 9, "polyorder": 3},
        selection=[
            {
                "K": 1,
                "degree": 2,
                "n_regimes": 1,
                "loglik": -900.0,
                "n_params": 8,
                "criterion": 1850.0,
                "effective_windows": 400.0,
                "collapsed": False,
                "chosen": False,
            },
            {
                "K": 2,
                "degree": 2,
                "n_regimes": 2,
                "loglik": -400.0,
                "n_params": 18,
                "criterion": 907.5,
                "effective_windows": 400.0,
                "collapsed": False,
                "chosen": True,
            },
            {
                "K": 3,
                "degree": 2,
                "n_regimes": 2,
                "loglik": -398.0,
                "n_params": 30,
                "criterion": 975.25,
                "effective_windows": 400.0,
                "collapsed": True,
                "chosen": False,
            },
        ],
        statistics={
            "share": {"0": 0.75, "1": 0.25},
            "dwell": {
                "0": {
                    "count": 6,
                    "mean": 22.5,
                    "median": 20.0,
                    "min": 11.0,
                    "max": 40.0,
                    "censored": 2,
                    "lower_bound": False,
                },
                "1": {
                    "count": 0,
                    "mean": None,
                    "median": None,
                    "min": None,
                    "max": None,
                    "censored": 1,
                    "lower_bound": False,
                },
            },
            "transitions": [[0, 7], [6, 0]],
            "transition_matrix": [[0.98, 0.02], [0.05, 0.95]],
            "transition_stderr": [[0.004, 0.004], [0.01, 0.01]],
            "expected_duration": {"0": 25.0, "1": 10.0},
            "expected_duration_stderr": {"0": 5.0, "1": 2.0},
        },
        validation={
            "tolerance": 0.15,
            "holdout": "runs",
            "runs": [
                {
                    "run": "day3",
                    "nrmse": {"T": 0.0625, "P": 0.1875},
                    "regime_agreement": 0.9125,
                    "switches_measured": 4,
                    "switches_simulated": 5,
                    "switches_matched": 4,
                    "switches_missed": 0,
                    "switches_spurious": 1,
                    "switch_timing_error": 1.75,
                    "horizon": 120.0,
                    "status": 0,
                    "message": "finished",
                },
            ],
            "summary": {"median_nrmse": 0.125},
            "one_step": {"0": {"r2": {"T": 0.987, "P": 0.954}, "rmse": {"T": 0.2, "P": 0.3}}},
        },
        metadata={
            "modemap_version": "0.1.0",
            "seed": 7,
            "options": {"degree": 2},
            "notes": ["regime 2 merged into regime 1"],
        },
    )


def one_regime_model() -> HybridModel:
    coef = np.array([[0.5], [-1.0]])
    return HybridModel(
        states=["x"],
        inputs=[],
        form="discrete",
        regimes=[RegimeModel(0, 50, ["1", "x"], coef, np.array([[0.05], [0.1]]), np.eye(1))],
    )


def _tables_are_well_formed(text: str) -> None:
    # GitHub Flavored Markdown Spec, "Tables (extension)": every row has the header's cell count.
    blocks = re.findall(r"(?:^\|.*\|$\n?)+", text, flags=re.MULTILINE)
    assert blocks
    for block in blocks:
        rows = [r for r in block.strip().split("\n")]
        cells = [len(re.findall(r"(?<!\\)\|", r)) for r in rows]
        assert len(set(cells)) == 1, block
        assert set(rows[1]) <= {"|", "-"}, block


def test_report_contains_every_section() -> None:
    text = render_report(two_regime_model())
    assert CAUTION in text
    for heading in (
        "## Overview",
        "## How many regimes, and why",
        "## Regime 0",
        "## Regime 1",
        "## Switching",
        "## Validation on held-out data",
        "## Derivatives",
        "## Run details",
    ):
        assert f"\n{heading}\n" in text
    assert "not a safety analysis" in text and "licensed engineering practice" in text
    _tables_are_well_formed(text)


def test_selection_table_and_choice() -> None:
    text = render_report(two_regime_model())
    assert "Number of regimes asked for: chosen from the data." in text
    assert "Chosen: K = 2, polynomial terms up to degree 2; the model has 2 regime(s)." in text
    assert "kept fewer distinct regimes than asked for (K = 3;" in text
    header = "| K | degree | n_regimes | loglik | n_params | criterion | effective_windows |"
    assert header in text
    assert "| 2 | 2 | 2 | -400 | 18 | 907.5 | 400 | no | yes |" in text


def test_chain_with_standard_errors() -> None:
    text = render_report(two_regime_model())
    assert "| from 0 | 0.98 ± 0.004 | 0.02 ± 0.004 |" in text
    assert "regime 0: 25 ± 5 s; regime 1: 10 ± 2 s." in text


def test_equations_equilibria_and_statistics() -> None:
    text = render_report(two_regime_model())
    # digits follow the standard error (modemap.terms.equations; common practice for measured
    # values)
    assert "dT/dt [degC/s] = (2.00 ± 0.01) + (-0.50 ± 0.01) T + (1.00 ± 0.01) q" in text
    assert "dP/dt [bar/s] = (0.25 ± 0.01) T + (-0.25 ± 0.01) T*q" in text
    assert "dP/dt [bar/s] = (0.50 ± 0.02) + (3.00 ± 0.02) q" in text
    # residual standard deviation = sqrt of the noise covariance diagonal
    # in the units of the rates of change, which is what the residuals are (continuous form)
    assert (
        "Residual standard deviation of the rates of change d state/dt: T 0.2 degC/s, P 0.3 bar/s."
        in text
    )
    assert "| 4 | -1.25 | stable node | -0.5, -2 | 2, 0.5 | – | reachable |" in text
    assert "-0.25 + 1.5i, -0.25 - 1.5i" in text
    assert "| 4.189 | virtual (outside the data) |" in text  # period 2*pi/1.5
    assert "Samples: 300 (75.0 % of the labelled samples)" in text
    assert "6 complete; duration mean 22.5 s, median 20 s, shortest 11 s, longest 40 s" in text
    assert "Stays in this regime: 0 complete; 1 cut by the start or end of a run." in text


def test_switching_guards_counts_and_hysteresis() -> None:
    text = render_report(two_regime_model())
    assert "| 0 | 1 | T > 5.5 degC |" in text and "| 1 | 0 | T < 4.5 degC |" in text
    assert "| from 0 | 0 | 7 |" in text and "| from 1 | 6 | 0 |" in text
    # 2*T - 11 > 0 <=> T > 5.5 ; 4 - T + 0.5 > 0 <=> T < 4.5 (common practice)
    assert (
        "switch 0 → 1 happens at T > 5.5 degC, the switch back at T < 4.5 degC; "
        "the band between them is 1 degC wide"
    ) in text
    assert "per-source" in text


def test_switching_says_which_evidence_chose_the_family() -> None:
    # invented evidence and significance records, as the fit writes them into the metadata
    model = two_regime_model()
    model.metadata["guard_evidence"] = {
        "memoryless": 0.6,
        "memory": 0.75,
        "gain": 0.15,
        "stderr": 0.02,
        "critical": 2.43,
        "margin": 0.01,
        "alpha": 0.01,
        "lag": 20,
        "hysteresis": True,
        "reason": "knowing the regime 20 samples earlier moves the balanced accuracy "
        "from 0.600 to 0.750 (hysteresis)",
        "family": "per-source",
        "chosen_by": "evidence",
    }
    model.metadata["guard_significance"] = {
        "0->1": {"kept": {"T": 5.0}, "dropped": {"q": -0.4}, "override": {}},
        "1->0": {"kept": {"T": -4.0, "q": 0.2}, "dropped": {}, "override": {"q": "forces at 1"}},
    }
    text = render_report(model)
    switching = text.split("## Switching")[1].split("\n## ")[0]
    assert "Why this family: knowing the regime 20 samples earlier" in switching
    assert "at least 0.01 and significant at the 0.01 level" in switching
    assert "because the data do not support them at the 0.01 level" in switching
    assert "0 → 1: q (|coef|/se 0.4)." in switching
    assert "1 → 0: q forces at 1." in switching
    # shown once, in the switching section, not again in the run details
    assert "guard_evidence" not in text and "guard_significance" not in text
    _tables_are_well_formed(text)
    assert render_report(loads_model(dumps_model(model))) == text
    # a family set by hand says so, with what the data show
    model.metadata["guard_evidence"]["chosen_by"] = "kind"
    assert "The family was set by the guard_kind option. What the data show: knowing" in (
        render_report(model)
    )
    # a model file from before the evidence was recorded: no such sentences
    plain = render_report(two_regime_model())
    assert "Why this family" not in plain and "do not support them" not in plain


def test_validation_figures() -> None:
    text = render_report(two_regime_model())
    assert "first exceeds the tolerance of 0.15." in text
    assert (
        "| day3 | 0.0625 | 0.1875 | 0.9125 | 4 | 5 | 4 | 0 | 1 | 1.75 | 120 | 0 (finished) |"
        in text
    )
    assert "switch timing error [s] (matched only) | horizon [s] |" in text
    assert "| median_nrmse | 0.125 |" in text
    assert "| 0 | 0.987 | 0.954 | 0.2 | 0.3 |" in text


def test_derivative_and_metadata() -> None:
    text = render_report(two_regime_model())
    assert "method 'savgol'" in text and "| window | 9 |" in text
    assert "| modemap version | 0.1.0 |" in text and "| seed | 7 |" in text
    assert "| degree | 2 |" in text and "- regime 2 merged into regime 1" in text
    assert "integral" not in text  # no final fit recorded (a model file from before the option)
    model = two_regime_model()
    model.metadata["options"]["final_fit"] = "integral"
    assert "estimated again on the integral of its equations" in render_report(model)


def test_equilibrium_error_legend_says_what_the_errors_leave_out() -> None:
    model = two_regime_model()
    model.regimes[0].equilibria[0].stderr = {"T": 0.1, "P": 0.05}
    plain = render_report(model)
    assert "| 4 ± 0.1 |" in plain
    assert "leaves out the error of the model's form and the serial correlation" in plain
    model.metadata["options"]["final_fit"] = "integral"  # sandwich errors over windows
    text = render_report(model)
    assert "allows for the serial correlation of the residuals but leaves out" in text


def test_one_regime_without_guards_or_validation() -> None:
    text = render_report(one_regime_model())
    assert CAUTION in text
    assert "## Regime 0" in text and "## Regime 1" not in text
    assert "x[k+1] = (0.50 ± 0.05) + (-1.0 ± 0.1) x" in text
    assert "One regime only: there is no switching." in text
    assert "No held-out validation was run for this model." in text
    assert "No model-selection table was recorded" in text
    assert "Not needed: in discrete form" in text
    assert "No equilibrium was found" in text
    _tables_are_well_formed(text)


def test_data_summary_section() -> None:
    summary = {
        "source": "plant.csv",
        "rows": 800,
        "duration": 199.5,
        "step": 0.5,
        "time": {"name": "time", "unit": "s"},
        "runs": [
            {
                "name": "day1",
                "samples": 400,
                "start": 0.0,
                "end": 199.5,
                "duration": 199.5,
                "step": 0.5,
            }
        ],
        "ranges": {"T": {"role": "state", "unit": "degC", "min": -1.0, "max": 9.0, "mean": 3.5}},
        "gaps": [],
        "warnings": ["column q: 3 repeated time stamps dropped"],
    }
    text = render_report(two_regime_model(), dataset_summary=summary)
    assert "## Training data" in text and "| Source | plant.csv |" in text
    assert "| day1 | 400 | 0 | 199.5 | 199.5 | 0.5 |" in text
    # every time figure says its unit
    assert "| Run | samples | start [s] | end [s] | duration [s] | step [s] |" in text
    assert "| Duration [s] | 199.5 |" in text and "| Step [s] | 0.5 |" in text
    assert "| T | state | degC | -1 | 9 | 3.5 |" in text
    assert "- column q: 3 repeated time stamps dropped" in text
    assert "## Training data" not in render_report(two_regime_model())


@pytest.mark.parametrize("factory", [two_regime_model, one_regime_model])
def test_report_is_deterministic_and_survives_the_model_file(factory) -> None:
    model = factory()
    text = render_report(model)
    assert render_report(factory()) == text
    assert render_report(loads_model(dumps_model(model))) == text


def test_pipes_in_text_are_escaped() -> None:
    model = two_regime_model()
    model.guards[0].text = "|T| > 5.5"
    text = render_report(model)
    assert "\\|T\\| > 5.5" in text
    _tables_are_well_formed(text)


def test_summary_fits_80_columns_and_says_what_matters() -> None:
    # a notebook reader's short form: every line within 80 columns (a terminal's width,
    # common practice), the equations with their standard errors, the equilibria, the guards
    from modemap.model.summary import model_summary

    model = two_regime_model()
    text = model.summary()
    assert text == model_summary(model, width=80)
    assert all(len(line) <= 80 for line in text.splitlines())
    assert " ".join(text.split()).startswith(repr(model))
    assert repr(model).startswith("HybridModel(2 regime(s), continuous form")
    assert "(2.00 ± 0.01) + (-0.50 ± 0.01) T + (1.00 ± 0.01) q" in " ".join(text.split())
    assert "regime 0: 300 samples (75.0 %)" in text
    assert "stable node" in text and "virtual" in text
    assert "switch 0 -> 1 when T > 5.5 degC" in text
    assert "equilibria with the inputs held at q = 0.5:" in text
    assert "regimes: 2 (chosen from the data; 3 candidates compared, polynomial degree 2)" in text
    assert model._repr_markdown_().startswith("```text\n")
    narrow = model.summary(width=50)
    assert all(len(line) <= 50 for line in narrow.splitlines())
    assert "switching" not in one_regime_model().summary()


def test_equilibria_say_at_which_inputs() -> None:
    text = render_report(two_regime_model())
    assert "Computed with the inputs held at q = 0.5 kW" in text


def test_oblique_hysteresis_band_is_stated() -> None:
    # two facing surfaces x + y = 2 (0 -> 1 above it) and x + y = 1 (1 -> 0 below it): along
    # either variable, the other held, they lie 1 apart (plane geometry, worked by hand)
    model = two_regime_model()
    model.states, model.inputs = ["T", "P"], ["q"]
    model.guards = [
        Guard(0, 1, ["T", "P"], np.array([1.0, 1.0]), -2.0, "T + P > 2"),
        Guard(1, 0, ["T", "P"], np.array([-2.0, -2.0]), 2.0, "T + P < 1"),
    ]
    text = render_report(model)
    assert "the band between them is 1 degC wide along T or 1 bar wide along P (the other" in text
    # surfaces that do not face each other get no width
    model.guards[1] = Guard(1, 0, ["T", "P"], np.array([-1.0, 1.0]), 0.0, "P > T")
    assert "compare the two conditions above" in render_report(model)


def test_guard_numbers_carry_their_standard_errors() -> None:
    model = two_regime_model()
    model.metadata["guard_stderr"] = {
        "0->1": {"numbers": [5.5], "stderr": [0.012], "replicates": 40},
    }
    text = render_report(model)
    assert "| 0 | 1 | T > 5.5 degC | threshold ± 0.012 degC |" in text
    assert "| 1 | 0 | T < 4.5 degC | – |" in text  # not computed: said so
    assert "40 block-bootstrap resamples" in text
    assert "guard_stderr" not in text  # shown in the table, not in the metadata dump


def test_a_gate_threshold_has_no_standard_error() -> None:
    # a two-valued variable (a gate) forces the switch at one value: the printed threshold is
    # the middle of its two values by convention, and any value between them fits the data
    model = two_regime_model()
    model.metadata["guard_stderr"] = {"0->1": {"numbers": [5.5], "stderr": [0.0], "replicates": 40}}
    model.metadata["guard_significance"] = {
        "0->1": {"kept": {"T": 9.0}, "dropped": {}, "override": {"T": "forces at 6"}}
    }
    text = render_report(model)
    assert "| T > 5.5 degC | – (a two-valued variable: any threshold between its values) |" in text
