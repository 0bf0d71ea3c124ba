"""Determinism (issue 6): the same inputs give the same outputs, byte for byte —
whatever the number of jobs, on a rerun, with or without the cache, in a fresh process
(another string-hash seed) and whatever the row (and column) order of the data file.

Compared: every CSV and JSON output, and in the command-line test every file of the
output folder (report, table, figures); only the manifest's run figures (timings,
clock, worker count, cache hits) may differ. Data are simulated (robustgmm.simulate)
with gaps and missing values, so that the calendar and sample logic are exercised.
"""
from __future__ import annotations

import json
from pathlib import Path

import numpy as np
import pandas as pd
import pytest

from robustgmm import cli
from robustgmm.audit import audit, write_audit
from robustgmm.modelfile import read_model

from helpers_audit import model_dict, write_panel
from helpers_reliability import harness_env, install_harness, output_files, run_cli, write_model

VARY = {"equations": ["difference", "system"], "transform": ["fd", "fod"], "steps": [1, 2],
        "form": ["per-period", "collapsed"], "last_lag": [3, "all"],
        "roles": {"x": ["endogenous", "predetermined"]},
        "sample": [{"name": "from 2003", "period_from": 2003},
                   {"name": "without units 3 and 5", "exclude": {"column": "unit", "values": [3, 5]}}]}


def _messy_project(folder: Path) -> Path:
    """A model with 64+ variants on a panel with a gap and missing values."""
    folder.mkdir(parents=True, exist_ok=True)
    path = write_panel(folder, n_units=70, n_periods=8, seed=21)
    frame = pd.read_csv(path)
    rng = np.random.default_rng(4)
    frame.loc[rng.choice(len(frame), 25, replace=False), "x"] = np.nan  # missing values
    frame = frame.drop(index=frame.index[(frame["unit"] % 9 == 0) & (frame["period"] == 2004)])
    frame.to_csv(path, index=False)  # units 9, 18, ... have a gap in 2004
    return write_model(folder, VARY)


def _shuffled_copy(project: Path, folder: Path) -> Path:
    """The same project with the data file's rows and columns in another order."""
    folder.mkdir(parents=True, exist_ok=True)
    frame = pd.read_csv(project / "panel.csv")
    frame = frame.sample(frac=1.0, random_state=7)
    frame = frame[list(reversed(frame.columns))]
    frame.to_csv(folder / "panel.csv", index=False)
    model = folder / "model.toml"
    model.write_text((project / "model.toml").read_text())
    return model


def _same_files(a: dict, b: dict, what: str, paths=()) -> None:
    assert sorted(a) == sorted(b), what
    for name in a:
        x, y = a[name], b[name]
        for old, new in paths:  # folder names that legitimately differ (manifest only)
            y = y.replace(new.encode(), old.encode())
            # as Markdown shows them
            y = y.replace(new.replace("_", "\\_").encode(), old.replace("_", "\\_").encode())
        assert x == y, f"{what}: {name} differs"


@pytest.fixture(scope="module")
def project(tmp_path_factory):
    return _messy_project(tmp_path_factory.mktemp("project"))


def test_model_exercises_the_hard_paths(project):
    spec = read_model(project)
    result = audit(spec, jobs=1)
    v = result.variants
    assert len(v) >= 64 and (v["status"] == "ok").sum() >= 48
    assert "sample" in v.columns and "role:x" in v.columns
    assert result.manifest["data_hash"] != result.manifest["sample_hashes"]["from 2003"]


def _audit_files(spec, runs: dict, folder: Path):
    files, figures = {}, {}
    for name, kw in runs.items():
        result = audit(spec, **kw)
        out = write_audit(result, folder / name, model_file="model.toml")
        files[name] = output_files(out)
        figures[name] = result.manifest["run"]
    return files, figures


def test_identical_across_jobs_and_cache(project, tmp_path):
    spec = read_model(project)
    files, run = _audit_files(spec, {
        "jobs1": dict(jobs=1),
        "jobs2-cold-cache": dict(jobs=2, cache_dir=tmp_path / "cache", start_workers=True),
        "jobs1-warm-cache": dict(jobs=1, cache_dir=tmp_path / "cache"),
    }, tmp_path)
    reference = files["jobs1"]
    assert set(reference) == {"variants.csv", "estimates.csv", "bounds.csv", "verdict.json",
                              "manifest.json", "influence.csv", "influence_units.csv",
                              "influence_path.csv", "periods.csv"}
    for name in files:
        _same_files(reference, files[name], name)
    # the runs really differed in how they ran
    assert run["jobs2-cold-cache"]["jobs"] == 2 and run["jobs2-cold-cache"]["backend"] == "loky"
    assert run["jobs2-cold-cache"]["cached"] == 0
    assert run["jobs1-warm-cache"]["computed"] == 0
    assert run["jobs1-warm-cache"]["cached"] == run["jobs1"]["computed"] > 0


@pytest.mark.slow  # four worker pools
def test_identical_across_more_jobs_and_reruns(project, tmp_path):
    spec = read_model(project)
    files, run = _audit_files(spec, {
        "jobs1": dict(jobs=1),
        "jobs4-cold-cache": dict(jobs=4, cache_dir=tmp_path / "cache", start_workers=True),
        "jobs2-warm-cache": dict(jobs=2, cache_dir=tmp_path / "cache", start_workers=True),
        "jobs-default": dict(),
        "jobs-all": dict(jobs=-1, start_workers=True),
        "jobs1-rerun": dict(jobs=1),
    }, tmp_path)
    for name in files:
        _same_files(files["jobs1"], files[name], name)
    # never more workers than tasks or cores (issue 12, item 11), and said so
    cold = run["jobs4-cold-cache"]
    import joblib
    expected = min(4, joblib.cpu_count(), cold["groups"])
    assert cold["jobs"] == expected and cold["cached"] == 0
    assert ("workers_capped" in cold) == (expected < 4)
    assert run["jobs2-warm-cache"]["computed"] == 0


def test_identical_whatever_the_row_and_column_order(project, tmp_path):
    shuffled = _shuffled_copy(project.parent, tmp_path / "shuffled")
    a = audit(read_model(project), jobs=1)
    b = audit(read_model(shuffled), jobs=1)
    assert a.manifest["data_hash"] == b.manifest["data_hash"]
    assert a.manifest["sample_hashes"] == b.manifest["sample_hashes"]
    fa = output_files(write_audit(a, tmp_path / "a"))
    fb = output_files(write_audit(b, tmp_path / "b"))
    _same_files(fa, fb, "shuffled rows", paths=[(str(project.parent), str(shuffled.parent))])
    # and the shuffled data reuse the cache of the original: the key is the content
    cache = tmp_path / "cache"
    audit(read_model(project), jobs=1, cache_dir=cache)
    c = audit(read_model(shuffled), jobs=1, cache_dir=cache)
    assert c.manifest["run"]["computed"] == 0
    fc = output_files(write_audit(c, tmp_path / "c"))
    _same_files(fa, fc, "shuffled rows from the cache",
                paths=[(str(project.parent), str(shuffled.parent))])


def test_fit_json_identical_on_rerun_and_row_order(project, tmp_path, capsys):
    shuffled = _shuffled_copy(project.parent, tmp_path / "shuffled")
    outputs = []
    for model, name in ((project, "a.json"), (project, "b.json"), (shuffled, "c.json")):
        code = cli.main(["fit", str(model), "--json", str(tmp_path / name)])
        assert code == 0, capsys.readouterr().err
        outputs.append((tmp_path / name).read_bytes())
    assert outputs[0] == outputs[1] == outputs[2]
    assert json.loads(outputs[0])["terms"]


@pytest.mark.slow  # five command-line audits with their reports, about a minute
def test_command_line_outputs_identical_in_fresh_processes(tmp_path):
    """Every file of the output folder — CSV, JSON, report.html/md, table.tex,
    referee.txt and the figures — across jobs 1/2/4, another PYTHONHASHSEED, --no-cache
    and shuffled data."""
    project = write_model(tmp_path / "project",
                          {"equations": ["difference", "system"], "steps": [1, 2],
                           "form": ["per-period", "collapsed"], "last_lag": [3, "all"]},
                          panel_kw={"n_units": 60, "n_periods": 7, "seed": 8})
    shuffled = _shuffled_copy(project.parent, tmp_path / "shuffled")
    harness = install_harness(tmp_path / "harness")
    runs = {
        "jobs1": (project, ["--jobs", "1"], "0"),
        "jobs2-seed": (project, ["--jobs", "2", "--start-workers"], "12345"),
        "jobs4-no-cache": (project, ["--jobs", "4", "--no-cache", "--start-workers"], "1"),
        "shuffled": (shuffled, ["--jobs", "2", "--start-workers"], "random"),
    }
    files = {}
    for name, (model, args, seed) in runs.items():
        out = tmp_path / f"out-{name}"
        proc = run_cli("audit", model, "--out", out, *args,
                       env=harness_env(harness, PYTHONHASHSEED=seed))
        assert proc.returncode == 0, proc.stderr
        files[name] = output_files(out)
    # a rerun into the same folder, from the cache
    proc = run_cli("audit", project, "--out", tmp_path / "out-jobs1", "--jobs", "1",
                   env=harness_env(harness, PYTHONHASHSEED="99"))
    assert proc.returncode == 0, proc.stderr
    manifest = json.loads((tmp_path / "out-jobs1" / "manifest.json").read_text())
    assert manifest["run"]["computed"] == 0
    files["rerun-cached"] = output_files(tmp_path / "out-jobs1")

    reference = files["jobs1"]
    kinds = {Path(n).suffix for n in reference}
    assert {".csv", ".json", ".html", ".md", ".tex", ".png", ".svg"} <= kinds
    for name in files:
        paths = [(str(project.parent), str(shuffled.parent))] if name == "shuffled" else []
        _same_files(reference, files[name], name, paths=paths)
