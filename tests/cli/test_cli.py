"""Command line: exit codes, one-line messages, the fit summary and JSON.

Exit codes (README "Outputs") and the JSON layout (docs/formats.md) are our own formats.
The fitted data is an invented AR(1) panel with an exogenous regressor
(known truth rho = 0.5, beta = 1.0); the summary checks only that the numbers shown
are the numbers of the result, and the estimate is checked loosely against the truth.
"""
from __future__ import annotations

import json
import os
import subprocess
import sys
from pathlib import Path

import numpy as np
import pandas as pd
import pytest

from robustgmm import cli, paths
from robustgmm.cli import main
from robustgmm.simulate import PanelProcess, simulate_panel

MODEL = """\
[data]
file = "panel.csv"
unit = "id"
period = "year"

[model]
outcome = "y"
outcome_lags = [1]

[[model.regressors]]
name = "x"
lags = [0]
role = "exogenous"

[method]
equations = "system"
steps = 2

[instruments]
form = "collapsed"
last_lag = 3
"""


def simulate(n=200, periods=8, rho=0.5, beta=1.0, seed=1):
    """y_it = rho y_i,t-1 + beta x_it + a_i + e_it with x exogenous (robustgmm.simulate,
    started at its stationary mean)."""
    process = PanelProcess(rho=rho, beta=beta, gamma=0.0, tau=0.0, theta=0.0)
    frame = simulate_panel(n, periods, process, seed=seed, first_period=2000)
    return frame.drop(columns="w").rename(columns={"unit": "id", "period": "year"})


@pytest.fixture
def project(tmp_path):
    simulate().to_csv(tmp_path / "panel.csv", index=False)
    (tmp_path / "model.toml").write_text(MODEL)
    return tmp_path


def run(args, capsys):
    code = main([str(a) for a in args])
    out, err = capsys.readouterr()
    return code, out, err


def assert_clean_error(code, err, *fragments):
    assert code == 2
    assert "Traceback" not in err
    lines = err.strip().splitlines()
    assert lines and all(line.startswith("robustgmm: error: ") for line in lines), err
    for f in fragments:
        assert f in err, err


# -- fit -------------------------------------------------------------------------
def test_fit_prints_summary_and_writes_contract_json(project, capsys):
    out_json = project / "res" / "fit.json"
    code, out, err = run(["fit", project / "model.toml", "--json", out_json], capsys)
    assert code == 0, err
    data = json.loads(out_json.read_text())
    assert set(data) >= {"terms", "std_error_kind", "tests", "counts"}
    assert set(data["tests"]) >= {"ar1", "ar2", "sargan", "hansen", "difference_hansen"}
    assert set(data["counts"]) >= {"observations", "units", "instruments", "periods"}
    rho = data["terms"]["y[t-1]"]
    # known truth 0.5; 200 units, a loose band (about 4 standard errors)
    assert abs(rho["estimate"] - 0.5) < 4 * rho["std_error"] + 0.02
    # the summary shows the result's own numbers
    assert f"{rho['estimate']:.4f}" in out and f"{rho['std_error']:.4f}" in out
    assert f"{data['counts']['units']} units" in out
    assert "AR(2)" in out and "Hansen" in out and "Sargan" in out
    assert "does not prove the instruments valid" in out
    assert "period dummies not shown" in out and "period[2005]" not in out
    assert not list((project / "res").glob(".*.tmp"))   # atomic write left no temp file


def test_fit_all_terms_lists_dummies(project, capsys):
    code, out, _ = run(["fit", project / "model.toml", "--all-terms"], capsys)
    assert code == 0 and "period[2005]" in out


def test_fit_time_invariant_regressor_in_difference_gmm_is_dropped_with_a_note(project, capsys):
    """Issue 13: difference GMM cannot estimate a term constant within every unit; the
    fit drops it with a one-line warning naming it instead of failing."""
    df = pd.read_csv(project / "panel.csv")
    df["z"] = df["id"] * 1.0          # constant within every unit
    df.to_csv(project / "panel.csv", index=False)
    text = MODEL.replace('name = "x"', 'name = "z"').replace("[method]", "[method]\n")
    (project / "model.toml").write_text(text.replace('equations = "system"', 'equations = "difference"'))
    code, out, err = run(["fit", project / "model.toml"], capsys)
    assert code == 0, err
    assert "z[t] dropped: it does not vary within units" in out


def test_python_dash_m_and_version():
    env = {**os.environ, "MPLBACKEND": "Agg"}
    proc = subprocess.run([sys.executable, "-m", "robustgmm", "--version"],
                          capture_output=True, text=True, env=env)
    assert proc.returncode == 0 and proc.stdout.startswith("robustgmm ")
    proc = subprocess.run([sys.executable, "-m", "robustgmm", "fit", "no/such/model.toml"],
                          capture_output=True, text=True, env=env)
    assert proc.returncode == 2
    assert proc.stderr == "robustgmm: error: no/such/model.toml: model file not found\n"


# -- command-line errors --------------------------------------------------------------
def test_help_is_exit_0(capsys):
    code, out, _ = run(["--help"], capsys)
    assert code == 0 and "audit" in out


@pytest.mark.parametrize("args,fragment", [
    ([], "required: COMMAND"),
    (["estimate", "m.toml"], "invalid choice: 'estimate'"),
    (["fit"], "MODEL.toml"),
    (["fit", "m.toml", "--jsn", "x.json"], "unrecognized arguments: --jsn"),
    (["audit", "m.toml"], "--out"),
    (["audit", "m.toml", "--out", "d", "--jobs", "0"],
     "argument --jobs: must be a positive whole number, or -1 for every core (got '0')"),
    (["audit", "m.toml", "--out", "d", "--jobs", "two"], "argument --jobs: must be a positive whole number, or -1 for every core (got 'two')"),
    (["audit", "m.toml", "--out", "d", "--jobs", "-3"], "(got '-3')"),
    (["demo", "--jobs", "1.5"], "(got '1.5')"),
])
def test_usage_errors_are_one_line(args, fragment, capsys):
    code, out, err = run(args, capsys)
    assert_clean_error(code, err, fragment)
    assert len(err.strip().splitlines()) == 1


def test_audit_refuses_foreign_non_empty_folder(project, capsys):
    out = project / "mine"
    out.mkdir()
    (out / "thesis.docx").write_text("precious")
    code, _, err = run(["audit", project / "model.toml", "--out", out], capsys)
    assert_clean_error(code, err, str(out), "not empty", "--force")
    assert sorted(p.name for p in out.iterdir()) == ["thesis.docx"]


def test_audit_output_folder_that_is_a_file_or_below_a_file(project, capsys):
    target = project / "panel.csv"
    code, _, err = run(["audit", project / "model.toml", "--out", target], capsys)
    assert_clean_error(code, err, "must be a folder")
    code, _, err = run(["audit", project / "model.toml", "--out", target / "sub"], capsys)
    assert_clean_error(code, err, f"{target / 'sub'}: cannot create the --out folder")


@pytest.mark.skipif(hasattr(os, "geteuid") and os.geteuid() == 0,
                    reason="root can write into read-only folders")
def test_audit_read_only_folder(project, capsys):
    out = project / "ro"
    out.mkdir()
    out.chmod(0o500)
    try:
        code, _, err = run(["audit", project / "model.toml", "--out", out], capsys)
    finally:
        out.chmod(0o700)
    assert_clean_error(code, err, "cannot write into the --out folder")


def test_report_needs_an_audit_folder(tmp_path, capsys):
    code, _, err = run(["report", tmp_path / "nothing"], capsys)
    assert_clean_error(code, err, "no such folder")
    code, _, err = run(["report", tmp_path], capsys)
    assert_clean_error(code, err, "manifest.json missing")


def test_json_path_that_is_a_folder(project, capsys):
    code, _, err = run(["fit", project / "model.toml", "--json", project], capsys)
    assert_clean_error(code, err, "--json must name a file")


def test_data_file_passed_as_model(project, capsys):
    code, _, err = run(["fit", project / "panel.csv"], capsys)
    assert_clean_error(code, err, "this is a data file")


# -- internal errors and interrupts -----------------------------------------------------
def test_internal_error_is_one_line_exit_1(project, capsys, monkeypatch):
    def boom(*a, **k):
        raise RuntimeError("unexpected\nstate")
    monkeypatch.setattr("robustgmm.data.load_panel", boom)
    monkeypatch.delenv(cli.DEBUG_ENV, raising=False)
    code, _, err = run(["fit", project / "model.toml"], capsys)
    assert code == 1 and "Traceback" not in err
    assert err == ("robustgmm: internal error: RuntimeError: unexpected state "
                   f"(set {cli.DEBUG_ENV}=1 to see the traceback)\n")
    monkeypatch.setenv(cli.DEBUG_ENV, "1")
    code, _, err = run(["fit", project / "model.toml"], capsys)
    assert code == 1 and "Traceback" in err


def test_keyboard_interrupt_is_130(project, capsys, monkeypatch):
    def stop(*a, **k):
        raise KeyboardInterrupt
    monkeypatch.setattr("robustgmm.data.load_panel", stop)
    code, _, err = run(["fit", project / "model.toml"], capsys)
    assert code == 130 and err == "robustgmm: interrupted\n"


# -- audit plumbing (audit module stubbed: this tests the CLI's wiring only) ----------------
class _FakeResult:
    def __init__(self, verdicts):
        self.variants = pd.DataFrame({"status": ["ok", "ok", "failed"]})
        # the smallest verdict document the verdict module could write
        self.verdict = {"alpha": 0.05, "base_acceptable": True,
                        "variants": {"ok": 2, "acceptable": 2, "failed": 1},
                        "terms": {k: {"verdict": v, "reason": f"{v} for a reason"}
                                  for k, v in verdicts.items()}}


@pytest.fixture
def fake_audit(monkeypatch):
    import types
    # the command line reads submodules of the package (the grid's checks, the cluster
    # backend) before the audit runs: the fake package keeps the real one's path and
    # submodules, whatever ran before this test, and replaces only the audit itself
    import robustgmm.audit.cluster  # noqa: F401
    import robustgmm.audit.grid  # noqa: F401
    real = sys.modules["robustgmm.audit"]  # (robustgmm.audit the attribute is the function)
    calls = {}
    mod = types.ModuleType("robustgmm.audit")
    mod.__path__ = real.__path__
    mod.__dict__.update({k: v for k, v in vars(real).items() if isinstance(v, types.ModuleType)})

    def audit(spec, *, jobs=None, cache_dir=None, progress=None, start_workers=False,
              notify=None):
        calls["audit"] = dict(jobs=jobs, cache_dir=cache_dir, progress=progress,
                              start_workers=start_workers)
        return _FakeResult(calls.get("verdicts", {"y[t-1]": "robust"}))

    def write_audit(result, out_dir, model_file=None, report=None):
        calls["write"] = (Path(out_dir), model_file)
        if report is not None:
            calls.setdefault("report", report(Path(out_dir)))
        (Path(out_dir) / "manifest.json").write_text("{}")

    mod.audit, mod.write_audit = audit, write_audit
    monkeypatch.setitem(sys.modules, "robustgmm.audit", mod)
    # 'from . import audit' takes the package attribute when the real module was
    # imported earlier in the session (e.g. by tests/test_audit.py)
    import robustgmm
    monkeypatch.setattr(robustgmm, "audit", mod, raising=False)
    monkeypatch.setattr(cli, "_report_builder", lambda: lambda out: out)
    return calls


def test_audit_wiring_and_fail_on_fragile(project, capsys, fake_audit):
    out = project / "audit"
    code, stdout, err = run(["audit", project / "model.toml", "--out", out, "--jobs", "2"], capsys)
    assert code == 0, err
    assert fake_audit["audit"] == {"jobs": 2, "cache_dir": out / ".cache", "progress": False,
                                   "start_workers": False}
    assert fake_audit["write"][0] == out and fake_audit["report"] == out
    assert "y[t-1]: robust — robust for a reason" in stdout
    assert "2 estimated: 2 acceptable, 0 untestable, 0 rejected by their tests (1 failed)" in stdout
    fake_audit["verdicts"] = {"y[t-1]": "fragile", "x[t]": "robust"}
    code, stdout, _ = run(["audit", project / "model.toml", "--out", out, "--no-cache"], capsys)
    assert code == 0 and fake_audit["audit"]["cache_dir"] is None   # rerun into our own folder
    code, stdout, _ = run(["audit", project / "model.toml", "--out", out, "--fail-on-fragile"], capsys)
    assert code == 3 and "Fragile: y[t-1]" in stdout


def test_interrupted_audit_folder_can_be_reused(project, capsys, fake_audit):
    # an interrupted run leaves the marker and a cache but no manifest.json; the
    # command line's checks know the marker by the word the writer uses
    from robustgmm.output import LOCK, MARKER, STAGING_PREFIX
    assert paths.OUTPUT_MARKER == MARKER
    assert (paths.OUTPUT_LOCK, paths.OUTPUT_STAGING_PREFIX) == (LOCK, STAGING_PREFIX)
    out = project / "audit"
    out.mkdir()
    (out / paths.OUTPUT_MARKER).write_text("{}")
    (out / ".cache").mkdir()
    code, _, err = run(["audit", project / "model.toml", "--out", out], capsys)
    assert code == 0, err


def test_force_writes_into_foreign_folder(project, capsys, fake_audit):
    out = project / "mine"
    out.mkdir()
    (out / "notes.txt").write_text("x")
    code, _, err = run(["audit", project / "model.toml", "--out", out, "--force"], capsys)
    assert code == 0, err
    assert (out / "notes.txt").read_text() == "x"


def test_fit_reports_rows_dropped_for_missing_values(project, capsys):
    df = pd.read_csv(project / "panel.csv")
    df.loc[[3, 40], "x"] = np.nan
    df.to_csv(project / "panel.csv", index=False)
    code, out, err = run(["fit", project / "model.toml"], capsys)
    assert code == 0, err
    assert "Rows with a missing value in a used column: 2" in out


def test_demo_prints_the_verdicts_and_where_to_read_them(tmp_path, capsys):
    # the quick start's first command: the terminal says what the audit concluded
    # (read from verdict.json, as after `robustgmm audit`) and where the report is
    out = tmp_path / "demo"
    code, printed, err = run(["demo", "--out", out], capsys)
    assert code == 0, err
    verdict = json.loads((out / "verdict.json").read_text(encoding="utf-8"))
    for term, v in verdict["terms"].items():
        assert f"  {term}: {v['verdict']} — " in printed
    assert f"Open {out / 'report.html'}" in printed and "truth.json" in printed


def test_a_folder_another_audit_is_just_starting_to_use_counts_as_ours(tmp_path):
    # two audits started at once into a new folder: the first has created it and is
    # writing its marker (robustgmm.atomic's temporary file, renamed a moment later);
    # the second must not call the folder foreign but go on to the lock, which stops
    # one of them with "is writing into this folder"
    out = tmp_path / "out"
    out.mkdir()
    (out / "..robustgmm-output.k2j3h4.tmp").write_text("{")
    assert paths.check_output_folder(str(out), force=False) == out
    # a user's file beside it, or a temporary file that is not the marker's, is foreign
    other = tmp_path / "other"
    other.mkdir()
    (other / ".thesis.docx.k2j3h4.tmp").write_text("draft")
    with pytest.raises(cli.InputError, match="holds no robustgmm output"):
        paths.check_output_folder(str(other), force=False)
