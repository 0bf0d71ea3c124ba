"""The audit end to end (robustgmm.audit): contract files, determinism across jobs,
cache reuse, failed and skipped variants, the command line on a 24-variant model."""
from __future__ import annotations


import json
import os
import subprocess
import sys
from pathlib import Path

import numpy as np
import pandas as pd
import pytest

from robustgmm import __version__, core
from robustgmm.audit import grid
from robustgmm.audit import runner
from robustgmm.audit import audit, default_cache_dir, plan_frame, write_audit
from robustgmm.audit.bounds import ar_bounds
from helpers_toml import spec_to_toml

from helpers_audit import CountingFamily, CountingFit, make_spec, write_panel

FILES = ("variants.csv", "estimates.csv", "bounds.csv", "verdict.json")
VARY = {"equations": ["difference", "system"], "steps": [1, 2],
        "last_lag": [2, 3, 9, "all"]}  # 9 reaches past the 6-period panel


@pytest.fixture
def spec(tmp_path):
    return make_spec(tmp_path, VARY, model={"outcome_lags": [1, 2]})


def test_contract_tables_and_files(spec, tmp_path):
    result = audit(spec, jobs=1)
    out = write_audit(result, tmp_path / "out", model_file="model.toml")
    for name in FILES + ("manifest.json",):
        assert (out / name).is_file()
    assert not list(out.glob(".*.tmp"))  # atomic writes leave no temporaries

    variants = pd.read_csv(out / "variants.csv")
    required = ["variant", "status", "reason", "instruments", "units", "observations",
                "hansen_p", "sargan_p", "ar1_p", "ar2_p"]
    assert set(required) <= set(variants.columns)
    assert {"equations", "steps", "last_lag"} <= set(variants.columns)
    assert variants["is_base"].iloc[0] and variants["is_base"].sum() == 1
    assert len(variants) == 16 and variants["variant"].is_unique
    # last_lag 9 on a 6-period panel is the "all" window: skipped as a twin
    skipped = variants[variants["status"] == "skipped"]
    assert len(skipped) == 4 and skipped["reason"].str.contains("same estimation as").all()
    assert (variants.loc[variants["status"] == "ok", "acceptable"].notna()).all()

    estimates = pd.read_csv(out / "estimates.csv")
    assert list(estimates.columns[:3]) == ["variant", "term", "estimate"]
    assert {"std_error", "p_value"} <= set(estimates.columns)
    ok_ids = set(variants.loc[variants["status"] == "ok", "variant"])
    assert set(estimates["variant"]) == ok_ids
    # files round-trip exactly (repr-exact floats)
    np.testing.assert_array_equal(estimates["estimate"].to_numpy(),
                                  result.estimates["estimate"].to_numpy())

    bounds = pd.read_csv(out / "bounds.csv")
    assert {"term", "ols", "fe", "ols_std_error", "fe_std_error", "variant"} <= set(bounds)
    base_rows = bounds[bounds["is_base"]]
    assert list(base_rows["term"]) == ["y[t-1]", "y[t-2]", "sum(y[t-1], y[t-2])"]
    assert bounds.index[bounds["is_base"]].tolist() == [0, 1, 2]  # base rows first
    # the base rows are the bounds on the base model's estimation sample
    panel = grid.load_panels(spec)[grid.sample_key(spec.sample)]
    direct = ar_bounds(spec, panel, core.estimation_sample(spec, panel))
    assert base_rows["ols"].iloc[0] == pytest.approx(direct.term("y[t-1]").ols, rel=1e-12)
    assert base_rows["fe"].iloc[2] == pytest.approx(direct.term("sum(y[t-1], y[t-2])").fe,
                                                    rel=1e-12)
    # in_bounds in variants.csv is the persistence (sum) check of each variant
    ok = variants[variants["status"] == "ok"]
    lo = np.minimum(ok["ar_ols"], ok["ar_fe"])
    hi = np.maximum(ok["ar_ols"], ok["ar_fe"])
    expected = (ok["ar_coefficient"] >= lo) & (ok["ar_coefficient"] <= hi)
    assert (ok["in_bounds"].astype(bool) == expected).all()
    assert (ok["ar_term"] == "sum(y[t-1], y[t-2])").all()

    verdict = json.loads((out / "verdict.json").read_text())
    assert set(verdict["terms"]) == {"y[t-1]", "y[t-2]", "x[t]", "w[t]"}
    for term in verdict["terms"].values():
        assert term["verdict"] in ("robust", "fragile", "inconclusive")
    manifest = json.loads((out / "manifest.json").read_text())
    assert manifest["version"] == __version__
    assert manifest["model_file"] == "model.toml"
    assert manifest["data_hash"] == panel.data_hash
    assert manifest["base_variant"] == variants["variant"].iloc[0]
    assert manifest["vary"] == ["equations", "steps", "last_lag"]
    assert manifest["counts"]["skipped"] == 4
    assert manifest["timings"]["total_seconds"] > 0
    assert "not proof" in manifest["disclaimer"]


def test_identical_outputs_whatever_jobs_and_through_the_cache(spec, tmp_path, monkeypatch):
    one = write_audit(audit(spec, jobs=1), tmp_path / "one")
    two = write_audit(audit(spec, jobs=2, start_workers=True), tmp_path / "two")
    cache = tmp_path / "cache"
    write_audit(audit(spec, jobs=2, cache_dir=cache, start_workers=True), tmp_path / "warm")
    counter = CountingFamily()
    monkeypatch.setattr(core, "fit_family", counter)
    rerun = audit(spec, jobs=1, cache_dir=cache)
    cached = write_audit(rerun, tmp_path / "cached")
    assert counter.specs == 0 and rerun.manifest["run"]["computed"] == 0
    assert rerun.manifest["run"]["cached"] == 12
    for name in FILES:
        text = (one / name).read_bytes()
        assert (two / name).read_bytes() == text, name
        assert (cached / name).read_bytes() == text, name


def test_failed_variants_are_reported_and_the_audit_completes(spec, monkeypatch):
    def fails(s):
        return s.equations == "difference" and s.steps == 1 and s.last_lag == 3
    from robustgmm.errors import EstimationError
    fit = CountingFit(fail=[(fails, EstimationError("the weight matrix is singular"))])
    monkeypatch.setattr(runner, "FIT_EACH", fit)
    result = audit(spec, jobs=1)
    v = result.variants
    failed = v[v["status"] == "failed"]
    assert len(failed) == 1 and failed["reason"].iloc[0] == "the weight matrix is singular"
    assert failed["variant"].iloc[0] not in set(result.estimates["variant"])
    assert failed["hansen_p"].isna().all()
    flags = {f["id"]: f for f in result.verdict["model"]}
    assert flags["variants_failed"]["figures"]["ids"] == list(failed["variant"])


def test_plan_frame_is_reexported_and_matches_the_audit(spec):
    frame = plan_frame(spec)
    result = audit(spec, jobs=1)
    assert list(frame["variant"]) == list(result.variants["variant"])
    assert list(frame["status"].replace("planned", "ok")) == list(result.variants["status"])
    planned = frame["status"] == "planned"
    np.testing.assert_array_equal(frame.loc[planned, "instruments"].to_numpy(),
                                  result.variants.loc[planned, "instruments"].to_numpy())
    assert default_cache_dir("x") == Path("x") / ".cache"


@pytest.mark.slow
def test_command_line_on_a_24_variant_model(tmp_path):
    """The issue's acceptance check: a model file with 24 variants on simulated data,
    ``robustgmm audit --jobs 2`` gives complete outputs identical to ``--jobs 1``."""
    write_panel(tmp_path, n_units=80, n_periods=7, seed=11)
    spec = make_spec(tmp_path, {"equations": ["difference", "system"], "transform": ["fd", "fod"],
                                "form": ["per-period", "collapsed"], "last_lag": [2, 3, "all"]})
    assert len(grid.expand(spec)) == 24
    model = tmp_path / "model.toml"
    text = spec_to_toml(spec).replace(str(tmp_path / "panel.csv"), "panel.csv")
    model.write_text(text)
    env = dict(os.environ, MPLBACKEND="Agg")
    outs = {}
    for jobs in (1, 2):
        out = tmp_path / f"out{jobs}"
        proc = subprocess.run([sys.executable, "-m", "robustgmm", "audit", str(model),
                               "--out", str(out), "--jobs", str(jobs), "--start-workers"],
                              capture_output=True, text=True, env=env, timeout=600)
        assert proc.returncode == 0, proc.stderr
        outs[jobs] = out
    variants = pd.read_csv(outs[2] / "variants.csv")
    assert len(variants) == 24 and (variants["status"] == "ok").all()
    assert len(pd.read_csv(outs[2] / "estimates.csv")) >= 24 * 3
    for name in FILES:
        assert (outs[1] / name).read_bytes() == (outs[2] / name).read_bytes(), name


def test_order_condition_is_a_skip_in_the_audit_too(tmp_path):
    spec = make_spec(tmp_path, {"last_lag": [2, "all"]},
                     model={"outcome_lags": [1, 2], "time_effects": False,
                            "regressors": [{"name": "x", "lags": [0, 1], "role": "endogenous"}]},
                     method={"equations": "difference"}, instruments={"form": "collapsed"})
    v = audit(spec, jobs=1).variants.set_index("last_lag")
    assert v.loc[2, "status"] == "skipped"
    assert v.loc[2, "reason"].startswith("fewer instruments (2) than parameters (4)")
    assert v.loc["all", "status"] == "ok"
    assert plan_frame(spec).set_index("last_lag").loc[2, "reason"] == v.loc[2, "reason"]


# ---------------------------------------------------------------------------
# the failure policy (issue 9): a bug is not a failing variant
# ---------------------------------------------------------------------------
def _type_error_everywhere(monkeypatch):
    from robustgmm import core

    def broken(specs, panel, **kw):
        return [TypeError("unsupported operand type(s) for +: 'int' and 'str'") for _ in specs]
    monkeypatch.setattr(core, "fit_family", broken)


def test_a_bug_in_every_variant_raises_with_its_traceback(spec, monkeypatch):
    _type_error_everywhere(monkeypatch)
    with pytest.raises(TypeError, match="unsupported operand") as info:
        audit(spec, jobs=1)
    assert info.traceback  # the original exception, not a summary


def test_on_error_record_keeps_going_and_names_the_error_type(spec, monkeypatch):
    _type_error_everywhere(monkeypatch)
    result = audit(spec, jobs=1, on_error="record")
    v = result.variants
    ran = v[v["status"] != "skipped"]
    assert len(ran) and (ran["status"] == "failed").all()
    assert ran["reason"].str.startswith("TypeError: unsupported operand").all()


def test_estimation_errors_are_recorded_under_either_policy(spec, monkeypatch):
    from robustgmm import core
    from robustgmm.errors import UnderidentifiedError

    def underidentified(specs, panel, **kw):
        return [UnderidentifiedError("fewer instruments (2) than parameters (3)") for _ in specs]
    monkeypatch.setattr(core, "fit_family", underidentified)
    for policy in ("raise", "record"):
        v = audit(spec, jobs=1, on_error=policy).variants
        assert (v["status"] != "ok").all()


def test_unknown_policy_is_refused(spec):
    with pytest.raises(ValueError, match="on_error must be one of raise, record"):
        audit(spec, jobs=1, on_error="ignore")


def test_command_line_bug_is_exit_1_with_an_internal_error_line(tmp_path, monkeypatch, capsys):
    from helpers_reliability import write_model
    from robustgmm import cli
    model = write_model(tmp_path / "project", {"steps": [1, 2]})
    _type_error_everywhere(monkeypatch)
    code = cli.main(["audit", str(model), "--out", str(tmp_path / "out"), "--jobs", "1"])
    err = capsys.readouterr().err
    assert code == cli.EXIT_INTERNAL, err
    lines = err.strip().splitlines()
    assert len(lines) == 1 and lines[0].startswith("robustgmm: internal error: TypeError: "), err
    assert not (tmp_path / "out" / "manifest.json").exists()


def test_test_degrees_of_freedom_in_variants_csv(tmp_path):
    """Every chi-squared test in variants.csv carries its degrees of freedom. The
    difference-in-Hansen (C) statistic of a group of moment conditions has as many
    degrees of freedom as the group has conditions (Hayashi 2000, sec. 3.6); with
    collapsed instruments the level equation has one per GMM-style variable, here y
    and the endogenous x (Roodman 2009, collapsed level instruments Delta y[t-1],
    Delta x[t-1]). Sargan and Hansen test the same moment conditions, so their dfs
    agree: instruments - parameters (Arellano & Bond 1991)."""
    spec = make_spec(tmp_path, vary={"equations": ["difference", "system"]},
                     panel_kw={"n_units": 80, "n_periods": 6}, instruments={"form": "collapsed"})
    out = write_audit(audit(spec, jobs=1), tmp_path / "out")
    v = pd.read_csv(out / "variants.csv").set_index("equations")
    dif, sys_ = v.loc["difference"], v.loc["system"]
    assert sys_["diff_hansen_level_df"] == 2 < sys_["hansen_df"]
    assert pd.isna(dif["diff_hansen_level_df"]) and pd.isna(sys_["sargan_df"])
    assert dif["sargan_df"] == dif["hansen_df"] == dif["instruments"] - dif["parameters"]
