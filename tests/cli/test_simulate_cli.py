"""`robustgmm simulate` and `robustgmm audit --simulate` (issue 15): the files through
the contract, identical output for --jobs 1 and 2, resume from the cache, bad input
as one line with exit 2. Data: robustgmm.simulate (a known process)."""
from __future__ import annotations

import json

import pandas as pd
import pytest

from robustgmm import contract
from robustgmm.cli import main
from tests.helpers_audit import model_dict, write_panel
from tests.helpers_toml import dumps_toml as toml_dumps


@pytest.fixture
def model(tmp_path):
    write_panel(tmp_path, n_units=50, n_periods=6)
    d = model_dict({"equations": ["difference", "system"]},
                   instruments={"form": "collapsed"})
    path = tmp_path / "model.toml"
    path.write_text(toml_dumps(d))
    return path


def _run(capsys, *argv):
    code = main([str(a) for a in argv])
    out, err = capsys.readouterr()
    return code, out, err


def test_simulate_writes_the_contract_files(model, tmp_path, capsys):
    out = tmp_path / "sim"
    code, text, err = _run(capsys, "simulate", model, "--out", out, "--reps", 10, "--jobs", 1)
    assert code == 0, err
    assert "10 replications" in text and "base model, y[t-1]: bias" in text
    frame = pd.read_csv(out / "simulation.csv")
    assert list(frame.columns) == contract.SIMULATION.names(["equations"])
    assert len(frame) == 2 * 3 and (frame["reps"] == 10).all()
    cal = json.loads((out / "calibration.json").read_text())
    assert tuple(cal) == contract.CALIBRATION_KEYS
    assert cal["world"]["parameters"]["sigma2_eps"]["method"]
    manifest = json.loads((out / "manifest.json").read_text())
    assert manifest["command"] == "simulate" and manifest["run"]["computed"] == 10
    # a rerun reads every replication from the cache; --jobs 2 writes the same bytes
    first = (out / "simulation.csv").read_bytes()
    code, text, _ = _run(capsys, "simulate", model, "--out", out, "--reps", 10, "--jobs", 2, "--start-workers", "--start-workers")
    assert code == 0 and "10 from the cache" in text
    assert (out / "simulation.csv").read_bytes() == first
    other = tmp_path / "sim2"
    assert _run(capsys, "simulate", model, "--out", other, "--reps", 10, "--jobs", 2, "--start-workers",
                "--no-cache")[0] == 0
    assert (other / "simulation.csv").read_bytes() == first


def test_audit_with_simulation(model, tmp_path, capsys):
    out = tmp_path / "audit"
    code, _, err = _run(capsys, "audit", model, "--out", out, "--simulate", 10, "--seed", 3,
                        "--jobs", 1)
    assert code == 0, err
    manifest = json.loads((out / "manifest.json").read_text())
    assert set(contract.SIMULATION_FILES) <= set(manifest["files"])
    assert manifest["simulation"]["reps"] == 10
    sim = pd.read_csv(out / "simulation.csv")
    variants = pd.read_csv(out / "variants.csv")
    assert set(sim["variant"]) == set(variants.loc[variants["status"] == "ok", "variant"])
    # rebuilding the report keeps the Monte Carlo's files (it used to remove them as
    # documents it had not written) and its section
    dropping = [f for f in contract.DROPPING_FILES if f in manifest["files"]]
    assert dropping  # [audit] influence = "base" by default
    assert _run(capsys, "report", out)[0] == 0
    assert (out / "simulation.csv").is_file() and (out / "calibration.json").is_file()
    # ... and the dropping-units files (the same removal hit them)
    assert all((out / f).is_file() for f in dropping)
    assert "How these estimators behave" in (out / "report.md").read_text()
    # a later audit without --simulate removes the stale simulation files
    assert _run(capsys, "audit", model, "--out", out, "--jobs", 1)[0] == 0
    assert not (out / "simulation.csv").exists() and not (out / "calibration.json").exists()


@pytest.mark.parametrize("args, start", [
    (["--reps", "9"], "--reps: 9 replications are too few"),
    (["--reps", "ten"], "argument --reps: must be a whole number"),
    (["--seed", "1.5"], "argument --seed: must be a whole number"),
    (["--seed", "-1"], "--seed: -1 is not a non-negative whole number"),
])
def test_bad_simulate_input(model, tmp_path, capsys, args, start):
    code, _, err = _run(capsys, "simulate", model, "--out", tmp_path / "s", "--reps", 10, *args)
    assert code == 2
    lines = err.strip().splitlines()
    assert len(lines) == 1 and lines[0].startswith("robustgmm: error: " + start), lines
    assert "Traceback" not in err


def test_audit_simulate_bad_reps_before_estimating(model, tmp_path, capsys):
    code, _, err = _run(capsys, "audit", model, "--out", tmp_path / "a", "--simulate", 3)
    assert code == 2 and err.count("\n") == 1 and "--reps: 3 replications" in err
    assert not (tmp_path / "a" / "variants.csv").exists()


def test_base_model_not_estimable_is_one_line(tmp_path, capsys):
    path = write_panel(tmp_path, n_units=30, n_periods=6)
    frame = pd.read_csv(path)
    frame.assign(z=2 * frame["x"]).to_csv(path, index=False)
    d = model_dict()
    d["model"]["regressors"].append({"name": "z", "lags": [0], "role": "endogenous"})
    (tmp_path / "model.toml").write_text(toml_dumps(d))
    code, _, err = _run(capsys, "simulate", tmp_path / "model.toml", "--out", tmp_path / "s",
                        "--reps", 10)
    assert code == 2 and err.count("\n") == 1
    assert "base model cannot be estimated" in err


def test_simulate_section_of_the_model_file(tmp_path, capsys):
    """``[simulate]``: a given truth replaces the base estimate for its term (the others
    keep theirs), heteroskedastic = true copies the unit scales, initial = "data";
    ``--initial`` wins over the file. A truth naming no term of the model is one line."""
    write_panel(tmp_path, n_units=50, n_periods=6)
    d = model_dict({"equations": ["difference", "system"]}, instruments={"form": "collapsed"})
    d["model"]["regressors"][0]["lags"] = [0, 1]
    d["simulate"] = {"truth": {"x[t-1]": 0.25}, "heteroskedastic": True, "initial": "data"}
    path = tmp_path / "model.toml"
    path.write_text(toml_dumps(d))
    out = tmp_path / "sim"
    code, _, err = _run(capsys, "simulate", path, "--out", out, "--reps", 10, "--jobs", 1,
                        "--initial", "stationary")
    assert code == 0, err
    cal = json.loads((out / "calibration.json").read_text())
    assert cal["truth"]["x[t-1]"] == 0.25
    assert cal["truth_source"].startswith("given for x[t-1]; base model estimate")
    world = cal["world"]
    assert world["heteroskedastic"] and world["initial"] == "stationary"
    p = world["parameters"]
    assert p["x[t-1]"]["value"] == 0.25 and "simulated" in p["x[t-1]"]
    assert len(p["time_effects"]["value"]) == 6 and len(p["x.time_effects"]["simulated"]) == 6
    assert len(cal["fit"]["real"]["y"]["period_means"]) == 6
    sim = pd.read_csv(out / "simulation.csv")
    assert (sim.loc[sim["term"] == "x[t-1]", "true_value"] == 0.25).all()
    d["simulate"] = {"truth": {"q[t]": 1.0}}
    path.write_text(toml_dumps(d))
    code, _, err = _run(capsys, "simulate", path, "--out", tmp_path / "s2", "--reps", 10)
    assert code == 2 and err.count("\n") == 1, err
    assert "[simulate.truth] 'q[t]': not a term of the model" in err
