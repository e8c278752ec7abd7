"""`modemap fit` and `modemap simulate` from the command line (the published contract)."""

from __future__ import annotations

import json
from pathlib import Path

import numpy as np
import pandas as pd
import pytest

from modemap.app.cli import main
from relay_data import relay_frame

COLUMNS = ["--time", "t", "--states", "x", "--run", "run"]


@pytest.fixture(scope="module")
def fitted(tmp_path_factory) -> tuple[Path, Path]:
    root = tmp_path_factory.mktemp("fit")
    data = root / "relay.csv"
    relay_frame().to_csv(data, index=False)
    out = root / "result"
    assert main(["fit", str(data), *COLUMNS, "--seed", "1", "--out", str(out)]) == 0
    return data, out


def test_fit_writes_the_three_files(fitted) -> None:
    _, out = fitted
    assert sorted(p.name for p in out.iterdir()) == ["labels.csv", "model.json", "report.md"]


def test_labels_csv_contract(fitted) -> None:
    data, out = fitted
    source = pd.read_csv(data)
    labels = pd.read_csv(out / "labels.csv")
    # run, time, regime first, then one probability column per regime (rows sum to one)
    assert list(labels.columns) == ["run", "time", "regime", "prob_0", "prob_1"]
    probs = labels[["prob_0", "prob_1"]].to_numpy()
    np.testing.assert_allclose(probs.sum(axis=1), 1.0, atol=1e-9)
    assert np.mean(probs.argmax(axis=1) == labels["regime"]) > 0.99
    assert len(labels) == len(source)
    assert labels["time"].tolist() == pytest.approx(source["t [s]"].tolist())
    assert labels["regime"].dtype.kind == "i" and labels["regime"].min() >= -1


def test_model_json_contract(fitted) -> None:
    _, out = fitted
    model = json.loads((out / "model.json").read_text())
    assert model["format"] == "modemap-model" and model["version"] == 1
    assert model["states"] == ["x"] and model["inputs"] == [] and model["form"] == "continuous"
    assert len(model["regimes"]) == 2
    for regime in model["regimes"]:
        assert {"id", "samples", "terms", "coefficients", "equilibria"} <= set(regime)
        assert len(regime["coefficients"]["x"]) == len(regime["terms"])
        for eq in regime["equilibria"]:
            assert set(eq) >= {"point", "eigenvalues", "stability", "inside"}
            assert all(len(pair) == 2 for pair in eq["eigenvalues"])
    for guard in model["guards"]:
        assert {"from", "to", "terms", "weights", "offset"} <= set(guard)
        assert len(guard["weights"]) == len(guard["terms"])


def test_report_is_readable(fitted) -> None:
    _, out = fitted
    report = (out / "report.md").read_text()
    assert "not a safety analysis" in report
    assert "x < 2.0" in report and "x > 8.0" in report


def test_simulate_rereads_the_model(fitted, tmp_path, capsys) -> None:
    data, out = fitted
    sim = tmp_path / "sim.csv"
    code = main(
        ["simulate", str(out / "model.json"), str(data), "--time", "t", "--run", "run",
         "--out", str(sim)]
    )  # fmt: skip
    assert code == 0
    table = pd.read_csv(sim)
    assert list(table.columns) == ["run", "t", "x", "regime"]
    source = pd.read_csv(data)
    assert len(table) == len(source)
    # the relay stays between its two thresholds (2 and 8) when re-simulated
    assert table["x"].between(1.9, 8.1).all()


def test_simulate_with_initial_state(fitted, tmp_path) -> None:
    _, out = fitted
    grid = pd.DataFrame({"t": [0.0, 0.5, 1.0, 1.5, 2.0, 2.5, 3.0, 3.5]})
    grid.to_csv(tmp_path / "grid.csv", index=False)
    sim = tmp_path / "sim.csv"
    args = ["simulate", str(out / "model.json"), str(tmp_path / "grid.csv"), "--out", str(sim)]
    assert main([*args, "--initial", "x=5", "--regime", "1"]) in (0,)
    assert pd.read_csv(sim)["x"].iloc[0] == pytest.approx(5.0)
    assert main([*args, "--initial", "y=5"]) == 2


def test_failed_fit_leaves_earlier_results(fitted, tmp_path, capsys) -> None:
    data, out = fitted
    before = {p.name: p.read_bytes() for p in out.iterdir()}
    code = main(["fit", str(data), "--time", "t", "--states", "nope", "--out", str(out)])
    err = capsys.readouterr().err
    assert code == 2
    assert err.startswith("modemap: error:") and err.count("\n") == 1 and "Traceback" not in err
    assert "nope" in err
    assert {p.name: p.read_bytes() for p in out.iterdir()} == before


def test_failed_fit_writes_no_model(fitted, tmp_path, capsys) -> None:
    data, _ = fitted
    out = tmp_path / "new"
    assert main(["fit", str(data), *COLUMNS, "--regimes", "many", "--out", str(out)]) == 2
    assert "--regimes" in capsys.readouterr().err
    assert not (out / "model.json").exists()


def test_extra_candidate_terms_reach_the_model(tmp_path) -> None:
    data = tmp_path / "relay.csv"
    relay_frame(n_runs=2, duration=12.0).to_csv(data, index=False)
    out = tmp_path / "res"
    args = ["fit", str(data), *COLUMNS, "--degree", "1", "--term", "exp(-x)", "--out", str(out)]
    assert main([*args, "--regimes", "2"]) == 0
    model = json.loads((out / "model.json").read_text())
    assert all("exp(-x)" in r["terms"] for r in model["regimes"])
    # the relay needs no such term: the sparse fit leaves it out
    for r in model["regimes"]:
        assert r["coefficients"]["x"][r["terms"].index("exp(-x)")] == 0.0
    assert main([*args[:-2], "--term", "exp(-q)", "--out", str(tmp_path / "bad")]) == 2


def test_final_fit_option_reaches_the_fit(tmp_path) -> None:
    data = tmp_path / "relay.csv"
    relay_frame(n_runs=2, duration=12.0).to_csv(data, index=False)
    for choice in ("derivative", "integral"):
        out = tmp_path / choice
        args = ["fit", str(data), *COLUMNS, "--regimes", "2", "--final-fit", choice]
        assert main([*args, "--out", str(out)]) == 0
        model = json.loads((out / "model.json").read_text())
        assert model["metadata"]["options"]["final_fit"] == choice
    with pytest.raises(SystemExit) as info:  # argparse's usage error
        main(["fit", str(data), *COLUMNS, "--final-fit", "twice", "--out", str(tmp_path / "x")])
    assert info.value.code == 2


def test_no_refit_keeps_the_training_model(tmp_path) -> None:
    # with --no-refit the model written is the one the training runs gave (its regimes hold
    # fewer samples than the data); by default it is refitted on every run
    data = tmp_path / "relay.csv"
    relay_frame(n_runs=2, duration=12.0).to_csv(data, index=False)
    samples = {}
    for extra in ([], ["--no-refit"]):
        out = tmp_path / ("kept" if extra else "refit")
        args = ["fit", str(data), *COLUMNS, "--regimes", "2", *extra, "--out", str(out)]
        assert main(args) == 0
        model = json.loads((out / "model.json").read_text())
        assert model["metadata"]["options"]["refit"] is not bool(extra)
        samples[bool(extra)] = sum(r["samples"] for r in model["regimes"])
    assert samples[True] < samples[False]


def test_output_folder_that_would_lose_data_is_refused_before_the_fit(tmp_path, capsys) -> None:
    # nothing on disk lost: an empty --out, or a folder whose labels.csv is the input itself
    folder = tmp_path / "logs"
    folder.mkdir()
    data = folder / "labels.csv"
    relay_frame(n_runs=2, duration=12.0).to_csv(data, index=False)
    before = data.read_bytes()
    for out in ("", str(folder)):
        assert main(["fit", str(data), *COLUMNS, "--out", out]) == 2
        err = capsys.readouterr().err
        assert err.count("\n") == 1 and "Traceback" not in err
    assert "would be overwritten" in err and "labels.csv" in err
    assert data.read_bytes() == before
    assert sorted(p.name for p in folder.iterdir()) == ["labels.csv"]


def test_fit_json_summary_matches_the_model_file(fitted, tmp_path, capsys) -> None:
    data, _ = fitted
    out = tmp_path / "json_result"
    argv = ["fit", str(data), *COLUMNS, "--seed", "1", "--out", str(out), "--json"]
    assert main([*argv, "--quiet"]) == 0
    captured = capsys.readouterr()
    summary = json.loads(captured.out)  # stdout is nothing but the JSON document
    model = json.loads((out / "model.json").read_text())
    assert summary["n_regimes"] == len(model["regimes"]) == 2
    for key in ("regimes", "guards", "guard_kind", "selection", "validation", "states", "form"):
        assert summary[key] == model[key], key
    chosen = [row for row in model["selection"] if row["chosen"]]
    assert len(chosen) == 1 and summary["degree"] == chosen[0]["degree"]
    assert sorted(Path(p).name for p in summary["files"]) == [
        "labels.csv",
        "model.json",
        "report.md",
    ]
    assert summary["validation"]  # held-out figures are present
    assert captured.err == ""  # --quiet: nothing on stderr; progress never goes to stdout
