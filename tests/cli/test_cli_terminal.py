"""What a researcher sees in a terminal: the fit summary's wording, a closed pipe,
--plan without --out, the progress bar (on a terminal only) and the closing line,
fit() on a DataFrame, and the note for a model file that varies nothing.

Data: simulated panels with a known process (robustgmm.simulate via
tests/helpers_audit.py); nothing here reads the reference data.
"""
from __future__ import annotations

import os
import pty
import subprocess
import sys
import tomllib
from pathlib import Path

import pandas as pd
import pytest

from helpers_audit import model_dict, write_panel
from robustgmm.cli import main
from robustgmm.terminal import SARGAN_CONDITION
from robustgmm.core import fit
from robustgmm.data import load_panel
from helpers_toml import dumps_toml
from robustgmm.modelfile import spec_from_dict

ROOT = Path(__file__).resolve().parents[2]


def _project(tmp_path, vary=None, **changes) -> Path:
    write_panel(tmp_path, n_units=60, n_periods=7)
    d = model_dict(vary)
    d["model"].update(changes)
    (tmp_path / "model.toml").write_text(dumps_toml(d))
    return tmp_path / "model.toml"


def _env():
    return {**os.environ, "MPLBACKEND": "Agg",
            "PYTHONPATH": str(ROOT) + os.pathsep + os.environ.get("PYTHONPATH", "")}


def test_first_line_names_the_lags_and_counts_the_regressors(tmp_path, capsys):
    model = _project(tmp_path)
    assert main(["fit", str(model)]) == 0
    first = capsys.readouterr().out.splitlines()[0]
    # before: "y on its lags 1 and 2 regressor(s)"
    assert first == f"Model {model}: y on y[t-1] and 2 regressors (x[t], w[t])"


def test_two_lags_and_one_regressor(tmp_path, capsys):
    model = _project(tmp_path, outcome_lags=[1, 2],
                     regressors=[{"name": "x", "lags": [0], "role": "endogenous"}])
    assert main(["fit", str(model)]) == 0
    first = capsys.readouterr().out.splitlines()[0]
    assert first.endswith(": y on y[t-1], y[t-2] and 1 regressor (x[t])")


def test_test_block_in_our_own_words(tmp_path, capsys):
    model = _project(tmp_path)
    assert main(["fit", str(model)]) == 0
    out = capsys.readouterr().out
    lines = [line.strip() for line in out.splitlines()]
    assert "Over-identification" in lines
    assert any(line.startswith("Hansen J, robust weight ") for line in lines)
    assert any(line.startswith("Sargan, homoskedastic weight ") for line in lines)
    assert "Serial correlation of the differenced errors" in lines
    assert "Instrument groups (difference-in-Hansen)" in lines
    header = lines[lines.index("Instrument groups (difference-in-Hansen)") + 1]
    assert header.split() == ["group", "C", "df", "p"]
    # the earlier parenthetical labels and subgroup heading are gone
    assert "(not robust)" not in out and "excluding each instrument group" not in out


def test_sargan_is_shown_with_its_condition(tmp_path, capsys):
    # difference GMM: Sargan has a number, chi-squared only under homoskedastic errors
    # (Sargan 1958; Arellano & Bond 1991), so the line under it says so
    model = _project(tmp_path)
    d = tomllib.loads(model.read_text())
    d.setdefault("method", {})["equations"] = "difference"
    model.write_text(dumps_toml(d))
    assert main(["fit", str(model)]) == 0
    lines = [line.strip() for line in capsys.readouterr().out.splitlines()]
    sargan = next(i for i, line in enumerate(lines) if line.startswith("Sargan, "))
    assert lines[sargan].split()[-1].replace(".", "").replace("<", "").isdigit()
    assert lines[sargan + 1] == SARGAN_CONDITION


def test_a_closed_pipe_ends_quietly(tmp_path):
    model = _project(tmp_path)
    proc = subprocess.Popen([sys.executable, "-m", "robustgmm", "fit", str(model)],
                            stdout=subprocess.PIPE, stderr=subprocess.PIPE, env=_env())
    proc.stdout.close()  # the reader stops before anything is written (as `| head` does)
    err = proc.stderr.read().decode()
    proc.wait(timeout=300)
    # before: "internal error: BrokenPipeError" and exit 1
    assert proc.returncode == 0, err
    assert err == ""


def test_plan_needs_no_out_folder(tmp_path, capsys):
    model = _project(tmp_path, vary=None)
    (tmp_path / "model.toml").write_text(dumps_toml(model_dict({"form": ["per-period",
                                                                        "collapsed"]})))
    assert main(["audit", str(model), "--plan"]) == 0
    out = capsys.readouterr().out
    assert "planned" in out
    assert sorted(p.name for p in tmp_path.iterdir()) == ["model.toml", "panel.csv"]
    code = main(["audit", str(model)])
    err = capsys.readouterr().err
    assert code == 2 and err.count("\n") == 1 and "--out" in err and "--plan" in err


def _audit_streams(model, out, tty: bool) -> tuple[str, str]:
    cmd = [sys.executable, "-m", "robustgmm", "audit", str(model), "--out", str(out),
           "--jobs", "1", "--no-cache"]
    if not tty:
        proc = subprocess.run(cmd, capture_output=True, text=True, env=_env(), timeout=600)
        assert proc.returncode == 0, proc.stderr
        return proc.stdout, proc.stderr
    # stderr on a pseudo-terminal (which reports a size of 0 x 0, as some do)
    master, slave = pty.openpty()
    proc = subprocess.Popen(cmd, stdout=subprocess.PIPE, stderr=slave, env=_env())
    os.close(slave)
    chunks = []
    while True:
        try:
            data = os.read(master, 4096)
        except OSError:
            break
        if not data:
            break
        chunks.append(data)
    stdout = proc.stdout.read().decode()
    proc.wait(timeout=600)
    os.close(master)
    assert proc.returncode == 0
    return stdout, b"".join(chunks).decode(errors="replace")


def test_progress_bar_only_on_a_terminal_and_a_closing_line_always(tmp_path):
    vary = {"form": ["per-period", "collapsed"], "steps": [1, 2], "last_lag": [2, 3, "all"]}
    model = _project(tmp_path, vary=vary)
    n = 12
    out, piped = _audit_streams(model, tmp_path / "a", tty=False)
    assert "variants:" not in piped and "%|" not in piped
    assert f"{n} variants in " in out.splitlines()[-1]
    out, on_tty = _audit_streams(model, tmp_path / "b", tty=True)
    assert f"/{n} [" in on_tty and "variants:" in on_tty  # done / total [elapsed<left]
    assert f"{n} variants in " in out.splitlines()[-1]


def test_fit_takes_a_dataframe(tmp_path):
    write_panel(tmp_path, n_units=60, n_periods=7)
    spec = spec_from_dict(model_dict(), base_dir=tmp_path)
    frame = pd.read_csv(tmp_path / "panel.csv")
    from_frame = fit(spec, frame)
    from_file = fit(spec, load_panel(spec))
    assert from_frame.to_frame().equals(from_file.to_frame())


def test_an_audit_that_varies_nothing_says_so(tmp_path, capsys):
    model = _project(tmp_path, vary=None)
    assert main(["audit", str(model), "--plan"]) == 0
    err = capsys.readouterr().err
    assert "has no [audit.vary], so nothing was varied" in err
    assert "  [audit.vary]\n" in err
    assert '  equations = ["system", "difference"]' in err
    assert '  form = ["per-period", "collapsed"]' in err


def test_the_closing_line_counts_as_variants_csv_does(tmp_path, capsys):
    # One combination is not identified (first lag 3 with last lag 3 leaves fewer
    # instruments than parameters); variants.csv records it as skipped, and the
    # closing line once called every planned variant "estimated" and such a variant
    # "failed". Now its counts are those of the table.
    write_panel(tmp_path, n_units=60, n_periods=7)
    d = model_dict({"equations": ["difference", "system"], "first_lag": [2, 3],
                    "last_lag": [3, "all"]})
    d["model"]["outcome_lags"] = [1, 2]
    for reg in d["model"]["regressors"]:
        reg["lags"] = [0, 1]
    d["instruments"] = {"form": "collapsed", "last_lag": 3}
    (tmp_path / "model.toml").write_text(dumps_toml(d))
    assert main(["audit", str(tmp_path / "model.toml"), "--out", str(tmp_path / "out")]) == 0
    last = capsys.readouterr().out.strip().splitlines()[-1]
    status = pd.read_csv(tmp_path / "out" / "variants.csv")["status"].value_counts()
    assert status.get("skipped", 0) >= 1
    assert last.startswith(f"{int(status.sum())} variants in ")
    assert (f": {status.get('ok', 0)} estimated (0 from the cache), "
            f"{status.get('skipped', 0)} skipped, {status.get('failed', 0)} failed") in last
