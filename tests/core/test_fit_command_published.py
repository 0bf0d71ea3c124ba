"""End to end: model files written here for Arellano & Bond (1991), Review of Economic
Studies 58(2), Table 4 columns (a1) and (a2), run through the ``robustgmm fit --json``
command in a separate process. Published values: see test_core_published.py (the
issue's values and those recalled from memory of the paper)."""
from __future__ import annotations

import json
import subprocess
import sys
from pathlib import Path

import numpy as np
import pandas as pd
import pytest

from test_core_published import A1, A2, DATA

MODEL = """
[data]
file = "uk_logs.csv"
unit = "firm"
period = "year"

[model]
outcome = "n"
outcome_lags = [1, 2]
time_effects = true

[[model.regressors]]
name = "w"
lags = [0, 1]
role = "exogenous"

[[model.regressors]]
name = "k"
lags = [0, 1, 2]
role = "exogenous"

[[model.regressors]]
name = "ys"
lags = [0, 1, 2]
role = "exogenous"

[method]
equations = "difference"
transform = "fd"
steps = {steps}
errors = "robust"

[instruments]
first_lag = 2
last_lag = "all"
form = "per-period"
"""


@pytest.fixture(scope="module")
def workdir(tmp_path_factory):
    d = tmp_path_factory.mktemp("table4")
    df = pd.read_csv(DATA)
    out = pd.DataFrame({"firm": df.firm, "year": df.year, "n": np.log(df.emp),
                        "w": np.log(df.wage), "k": np.log(df.capital), "ys": np.log(df.output)})
    out.to_csv(d / "uk_logs.csv", index=False)
    return d


def run_fit(workdir, steps):
    model = workdir / f"a{steps}.toml"
    model.write_text(MODEL.format(steps=steps))
    out = workdir / f"a{steps}.json"
    proc = subprocess.run([sys.executable, "-m", "robustgmm", "fit", str(model), "--json", str(out)],
                          capture_output=True, text=True, timeout=120)
    assert proc.returncode == 0, proc.stderr
    assert "n[t-1]" in proc.stdout
    return json.loads(out.read_text())


def test_fit_json_reproduces_table4_a1(workdir):
    res = run_fit(workdir, 1)
    for label, (est, se) in A1.items():
        assert res["terms"][label]["estimate"] == pytest.approx(est, abs=0.0015), label
    assert res["terms"]["n[t-1]"]["std_error"] == pytest.approx(0.145, abs=0.0006)
    assert res["tests"]["ar1"]["statistic"] == pytest.approx(-3.600, abs=0.0015)
    assert res["tests"]["ar2"]["statistic"] == pytest.approx(-0.516, abs=0.0015)
    assert res["tests"]["sargan"]["statistic"] == pytest.approx(65.8, abs=0.05)
    assert res["tests"]["sargan"]["df"] == 25
    assert res["counts"]["observations"] == 611
    assert res["counts"]["units"] == 140
    assert res["counts"]["instruments"] == 41
    assert res["std_error_kind"] == "cluster-robust"


def test_fit_json_reproduces_table4_a2(workdir):
    res = run_fit(workdir, 2)
    for label, est in A2.items():
        assert res["terms"][label]["estimate"] == pytest.approx(est, abs=0.0015), label
    assert res["tests"]["hansen"]["statistic"] == pytest.approx(31.4, abs=0.05)
    assert res["tests"]["hansen"]["df"] == 25
    assert res["std_error_kind"] == "windmeijer"
    assert set(res["tests"]) >= {"ar1", "ar2", "sargan", "hansen", "difference_hansen"}
