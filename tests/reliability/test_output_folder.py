"""Issue 12, items 5-9 and 13: writes where robustgmm must not write, one audit per
folder, a folder that always holds one complete audit, clear errors.

Fast cases run in-process (``cli.main``); the kill-at-every-phase test runs the
command in a subprocess and is marked slow. Data are simulated (known process).
"""
from __future__ import annotations

import errno
import json
import os
import signal
import socket
import subprocess
import sys
import time
from pathlib import Path

import pandas as pd
import pytest

from robustgmm import cli, output
from robustgmm.audit import audit, write_audit

from helpers_audit import make_spec
from helpers_reliability import harness_env, install_harness, output_files, write_model

VOLATILE = ("report.html", "report.md")  # hold the run's timings (see output_files)


def _main(args, capsys):
    code = cli.main([str(a) for a in args])
    out, err = capsys.readouterr()
    return code, out, err


def _one_error(code, err, *fragments):
    assert code == cli.EXIT_INPUT, err
    lines = err.strip().splitlines()
    assert len(lines) == 1 and lines[0].startswith("robustgmm: error: "), err
    assert all(f in lines[0] for f in fragments), err


@pytest.fixture
def no_report(monkeypatch):
    monkeypatch.setattr(cli, "_report_builder", lambda: None)


# ---------------------------------------------------------------------------
# item 5: --json writes only regular files; '-' is standard output
# ---------------------------------------------------------------------------
def test_json_dash_writes_the_json_to_standard_output(tmp_path, capsys):
    model = write_model(tmp_path, {"steps": [1, 2]})
    code, out, err = _main(["fit", model, "--json", "-"], capsys)
    assert code == 0, err
    data = json.loads(out)  # the JSON alone, nothing else on stdout
    assert "terms" in data and not (tmp_path / "-").exists()


@pytest.mark.parametrize("kind", ["symlink", "fifo", "device"])
def test_json_never_replaces_what_is_not_a_regular_file(tmp_path, capsys, kind):
    model = write_model(tmp_path, {"steps": [1, 2]})
    target = tmp_path / "target.json"
    if kind == "symlink":
        (tmp_path / "elsewhere.json").write_text("keep")
        target.symlink_to(tmp_path / "elsewhere.json")
    elif kind == "fifo":
        os.mkfifo(target)
    else:
        target = Path("/dev/null")
    code, _, err = _main(["fit", model, "--json", target], capsys)
    _one_error(code, err, str(target), "not a regular file", "--json -")
    if kind == "symlink":
        assert target.is_symlink() and (tmp_path / "elsewhere.json").read_text() == "keep"
    elif kind == "fifo":
        assert target.is_fifo()
    else:
        assert target.is_char_device()


def test_atomic_writer_refuses_a_symlink(tmp_path):
    from robustgmm.atomic import NotRegularFileError, atomic_write_text
    (tmp_path / "real").write_text("keep")
    (tmp_path / "link").symlink_to(tmp_path / "real")
    with pytest.raises(NotRegularFileError):
        atomic_write_text(tmp_path / "link", "new")
    assert (tmp_path / "real").read_text() == "keep" and (tmp_path / "link").is_symlink()


# ---------------------------------------------------------------------------
# item 6: outputs never overwrite inputs or another audit's cache
# ---------------------------------------------------------------------------
def test_json_over_the_data_or_model_file_is_refused(tmp_path, capsys):
    model = write_model(tmp_path, {"steps": [1, 2]})
    before = {p: p.read_bytes() for p in (model, tmp_path / "panel.csv")}
    for target, label in ((tmp_path / "panel.csv", "data file"), (model, "model file")):
        code, _, err = _main(["fit", model, "--json", target], capsys)
        _one_error(code, err, "would overwrite the " + label)
    assert {p: p.read_bytes() for p in before} == before


def test_audit_whose_data_file_has_an_output_name_is_refused(tmp_path, capsys):
    """The data file named bounds.csv in the --out folder (with --force)."""
    project = tmp_path / "project"
    model = write_model(project, {"steps": [1, 2]})
    (project / "panel.csv").rename(project / "bounds.csv")
    model.write_text(model.read_text().replace('"panel.csv"', '"bounds.csv"'))
    before = (project / "bounds.csv").read_bytes()
    code, _, err = _main(["audit", model, "--out", project, "--force"], capsys)
    _one_error(code, err, "bounds.csv", "would overwrite the data file")
    assert (project / "bounds.csv").read_bytes() == before
    assert not (project / "manifest.json").exists()


def test_outputs_inside_another_audits_cache_are_refused(tmp_path, capsys, no_report):
    model = write_model(tmp_path / "project", {"steps": [1, 2]})
    out = tmp_path / "out"
    code, _, err = _main(["audit", model, "--out", out, "--jobs", "1"], capsys)
    assert code == 0, err
    entries = sorted((out / ".cache").iterdir())
    code, _, err = _main(["audit", model, "--out", out / ".cache" / "sub"], capsys)
    _one_error(code, err, "inside the cache of another audit")
    code, _, err = _main(["fit", model, "--json", out / ".cache" / "x.json"], capsys)
    _one_error(code, err, "inside the cache of an audit")
    assert sorted((out / ".cache").iterdir()) == entries


# ---------------------------------------------------------------------------
# item 7: an audit owns its folder and removes its own stale files
# ---------------------------------------------------------------------------
def test_figures_of_an_earlier_audit_with_other_terms_are_removed(tmp_path, capsys,
                                                                 monkeypatch):
    monkeypatch.setattr(cli, "_report_builder", lambda: _small_report)
    project = tmp_path / "project"
    model = write_model(project, {"steps": [1, 2]})
    out = tmp_path / "out"
    code, _, err = _main(["audit", model, "--out", out, "--jobs", "1"], capsys)
    assert code == 0, err
    (out / "notes.txt").write_text("mine")  # the user's own file in the folder
    (out / "figures" / "my_sketch.png").write_bytes(b"mine")
    first = {p.name for p in (out / "figures").iterdir()}
    assert any("w_t" in n for n in first)
    # the second audit drops regressor w: its figures must go
    text = model.read_text()
    start = text.index('[[model.regressors]]\nname = "w"')
    end = text.index("\n\n", start) if "\n\n" in text[start:] else len(text)
    model.write_text(text[:start] + text[end:])
    code, _, err = _main(["audit", model, "--out", out, "--jobs", "1"], capsys)
    assert code == 0, err
    second = {p.name for p in (out / "figures").iterdir()}
    assert not any("w_t" in n for n in second), second
    assert "my_sketch.png" in second and (out / "notes.txt").read_text() == "mine"
    recorded = set(output.recorded_files(out))
    on_disk = {str(p.relative_to(out)) for p in out.rglob("*") if p.is_file()
               and not str(p.relative_to(out)).startswith(".")}
    assert on_disk - recorded == {"notes.txt", "figures/my_sketch.png"}


def test_recorded_names_outside_the_folder_are_never_removed(tmp_path):
    victim = tmp_path / "victim.txt"
    victim.write_text("keep")
    out = tmp_path / "out"
    out.mkdir()
    (out / "link.txt").symlink_to(victim)
    removed = output.remove_stale(out, ["../victim.txt", str(victim), "link.txt",
                                        ".cache/x.json"], [])
    assert removed == [] and victim.read_text() == "keep" and (out / "link.txt").is_symlink()


# ---------------------------------------------------------------------------
# item 8: one folder, one audit (lock with pid and host, stale locks)
# ---------------------------------------------------------------------------
def test_second_audit_into_a_locked_folder_exits_2_naming_the_holder(tmp_path, capsys):
    model = write_model(tmp_path / "project", {"steps": [1, 2]})
    out = tmp_path / "out"
    out.mkdir()
    holder = subprocess.Popen([sys.executable, "-c", "import time; time.sleep(60)"])
    try:
        (out / output.LOCK).write_text(json.dumps({
            "pid": holder.pid, "started": output._start_time(holder.pid),
            "host": socket.gethostname(), "command": "audit", "since_utc": "2026-01-01T00:00:00"}))
        (out / output.MARKER).write_text("{}")
        code, _, err = _main(["audit", model, "--out", out, "--jobs", "1"], capsys)
        _one_error(code, err, str(out), f"pid {holder.pid} on {socket.gethostname()}")
        assert not (out / "manifest.json").exists()
    finally:
        holder.kill()
        holder.wait()


def test_a_stale_lock_of_a_dead_process_is_taken_over(tmp_path, capsys, no_report):
    model = write_model(tmp_path / "project", {"steps": [1, 2]})
    out = tmp_path / "out"
    out.mkdir()
    dead = subprocess.Popen([sys.executable, "-c", "pass"])
    dead.wait()
    (out / output.LOCK).write_text(json.dumps({"pid": dead.pid, "host": socket.gethostname(),
                                               "command": "audit"}))
    (out / output.MARKER).write_text("{}")
    code, _, err = _main(["audit", model, "--out", out, "--jobs", "1"], capsys)
    assert code == 0, err
    assert (out / "manifest.json").is_file() and not (out / output.LOCK).exists()


def test_a_reused_pid_does_not_keep_a_lock(tmp_path):
    """The lock records the holder's start time: a live process with that pid but a
    different start time is another process, so the lock is stale."""
    (tmp_path / output.LOCK).write_text(json.dumps({
        "pid": os.getpid(), "started": "1", "host": socket.gethostname()}))
    lock = output.FolderLock(tmp_path)
    assert lock._stale(lock._read())
    with lock:
        assert json.loads((tmp_path / output.LOCK).read_text())["pid"] == os.getpid()
    assert not (tmp_path / output.LOCK).exists()


def test_a_lock_from_another_host_is_never_taken_over(tmp_path):
    (tmp_path / output.LOCK).write_text(json.dumps({"pid": 1, "host": "elsewhere.example"}))
    with pytest.raises(cli.InputError, match="on elsewhere.example"):
        with output.FolderLock(tmp_path):
            pass
    assert (tmp_path / output.LOCK).exists()


@pytest.mark.slow  # two command-line audits started at once, about 15 s
def test_two_audits_started_at_once_one_wins_one_exits_2(tmp_path):
    model = write_model(tmp_path / "project", {"steps": [1, 2], "form": ["per-period",
                                                                      "collapsed"]})
    out = tmp_path / "out"
    harness = install_harness(tmp_path / "harness")
    env = harness_env(harness, ROBUSTGMM_TEST_COUNT=tmp_path / "count", ROBUSTGMM_TEST_PACE=1)
    procs = [subprocess.Popen([sys.executable, "-m", "robustgmm", "audit", str(model), "--out",
                               str(out), "--jobs", "1"], env=env, stdout=subprocess.PIPE,
                              stderr=subprocess.PIPE, text=True) for _ in range(2)]
    results = [p.communicate(timeout=600) for p in procs]
    codes = sorted(p.returncode for p in procs)
    assert codes == [0, 2], results
    err = next(e for p, (_, e) in zip(procs, results) if p.returncode == 2)
    assert "is writing into this folder" in err and len(err.strip().splitlines()) == 1
    assert not (out / output.LOCK).exists()


# ---------------------------------------------------------------------------
# item 9: a folder with a manifest always holds one complete audit
# ---------------------------------------------------------------------------
def _audits(tmp_path):
    a = audit(make_spec(tmp_path, {"steps": [1, 2]}), jobs=1)
    b = audit(make_spec(tmp_path, {"steps": [1, 2], "form": ["per-period", "collapsed"]}), jobs=1)
    return a, b


def _snapshot(folder: Path) -> dict:
    return {k: v for k, v in output_files(folder).items() if not k.startswith(".")}


def _small_report(folder: Path) -> list[Path]:
    """A stand-in for the report (the real one draws figures for seconds): documents
    and one figure per focus term, all derived from the folder's files."""
    from robustgmm.atomic import atomic_write_text
    variants = pd.read_csv(folder / "variants.csv")
    terms = json.loads((folder / "verdict.json").read_text())["terms"]
    paths = [atomic_write_text(folder / "report.html", f"{len(variants)} variants\n")]
    for term in terms:
        name = "".join(c if c.isalnum() else "_" for c in term)
        paths.append(atomic_write_text(folder / "figures" / f"spec_curve_{name}.svg", term))
    return paths


def test_failure_at_every_rename_leaves_one_complete_audit(tmp_path, monkeypatch):
    """Audit B written over audit A, failing at the k-th rename of the swap, for
    every k: whenever the folder has a manifest, it holds exactly A or exactly B."""
    build_report = _small_report
    a, b = _audits(tmp_path)
    ref_a = _snapshot(write_audit(a, tmp_path / "A", report=build_report))
    ref_b = _snapshot(write_audit(b, tmp_path / "B", report=build_report))
    total = len(ref_b)
    real_replace = os.replace
    for k in range(1, total + 1):
        out = tmp_path / f"run{k}"
        write_audit(a, out, report=build_report)
        calls = {"n": 0}

        def replace(src, dst, _k=k, _calls=calls):
            if ".robustgmm-staging-" in str(src) and ".robustgmm-staging-" not in str(dst):
                _calls["n"] += 1
                if _calls["n"] == _k:
                    raise OSError(errno.EIO, "simulated failure", str(dst))
            return real_replace(src, dst)

        monkeypatch.setattr(output.os, "replace", replace)
        with pytest.raises(OSError):
            write_audit(b, out, report=build_report)
        monkeypatch.undo()
        got = _snapshot(out)
        if (out / "manifest.json").exists():
            assert got == ref_a or got == ref_b, k
        else:
            assert k > 0  # mid-swap: no manifest claims the folder
        assert not list(out.glob(".robustgmm-staging-*")) and not (out / output.LOCK).exists()
        write_audit(b, out, report=build_report)  # a rerun completes it
        assert _snapshot(out) == ref_b, k


KILLER = r'''
import os, signal
_at = os.environ.get("ROBUSTGMM_TEST_KILL_AT")
if _at:
    _phase, _n = _at.split(":")
    _n = int(_n)
    _count = {"n": 0}
    _real = os.replace

    def replace(src, dst):
        staging = ".robustgmm-staging-"
        into_stage = staging in str(dst)
        if (_phase == "stage" and into_stage) or (_phase == "swap" and staging in str(src)
                                                 and not into_stage):
            _count["n"] += 1
            if _count["n"] == _n:
                os.kill(os.getpid(), signal.SIGKILL)
        return _real(src, dst)

    os.replace = replace
'''


@pytest.mark.slow  # one command-line audit per kill point, about 8 s each
@pytest.mark.parametrize("at", ["stage:1", "stage:5", "stage:12", "swap:1", "swap:10",
                                "swap:last"])
def test_sigkill_at_each_phase_leaves_one_complete_audit(tmp_path, at):
    """SIGKILL (no cleanup runs) while writing tables into the staging folder, while
    building the report there, and at the first, a middle and the last rename of the
    swap (the manifest): the folder holds A, or no manifest; a rerun then completes
    B, removing the dead run's lock and staging folder."""
    project = tmp_path / "project"
    model_a = write_model(project, {"steps": [1, 2]}, name="a.toml")
    model_b = write_model(project, {"steps": [1, 2], "form": ["per-period", "collapsed"]},
                          name="b.toml")
    harness = install_harness(tmp_path / "harness")
    (harness / "sitecustomize.py").write_text((harness / "sitecustomize.py").read_text() + KILLER)
    ref = {}
    for name, model in (("A", model_a), ("B", model_b)):
        proc = subprocess.run([sys.executable, "-m", "robustgmm", "audit", str(model), "--out",
                               str(tmp_path / name), "--jobs", "1"], env=harness_env(harness),
                              capture_output=True, text=True, timeout=600)
        assert proc.returncode == 0, proc.stderr
        ref[name] = _snapshot(tmp_path / name)
    out = tmp_path / "out"
    subprocess.run([sys.executable, "-m", "robustgmm", "audit", str(model_a), "--out", str(out),
                    "--jobs", "1"], env=harness_env(harness), check=True, capture_output=True)
    n = len(ref["B"]) if at == "swap:last" else int(at.split(":")[1])
    env = harness_env(harness, ROBUSTGMM_TEST_KILL_AT=f"{at.split(':')[0]}:{n}")
    proc = subprocess.run([sys.executable, "-m", "robustgmm", "audit", str(model_b), "--out",
                           str(out), "--jobs", "1"], env=env, capture_output=True, text=True,
                          timeout=600)
    assert proc.returncode == -signal.SIGKILL, proc.stderr
    got = _snapshot(out)
    if (out / "manifest.json").exists():
        assert got == ref["A"] or got == ref["B"]
    if at.startswith("stage"):
        assert got == ref["A"]  # nothing of B reached the folder
    proc = subprocess.run([sys.executable, "-m", "robustgmm", "audit", str(model_b), "--out",
                           str(out), "--jobs", "1"], env=harness_env(harness),
                          capture_output=True, text=True, timeout=600)
    assert proc.returncode == 0, proc.stderr
    assert _snapshot(out) == ref["B"]
    assert not list(out.glob(".robustgmm-staging-*")) and not (out / output.LOCK).exists()


# ---------------------------------------------------------------------------
# item 13: clear one-line errors
# ---------------------------------------------------------------------------
@pytest.mark.parametrize("value", ["abc", "0", "-5", "nan"])
def test_bad_memory_budget_is_one_line(tmp_path, capsys, monkeypatch, value):
    model = write_model(tmp_path, {"steps": [1, 2]})
    monkeypatch.setenv("ROBUSTGMM_MEMORY_MB", value)
    code, _, err = _main(["fit", model], capsys)
    _one_error(code, err, f"ROBUSTGMM_MEMORY_MB = {value!r}", "positive number of megabytes")


@pytest.mark.parametrize("command", ["audit", "fit", "report"])
def test_a_300_character_name_is_one_line(tmp_path, capsys, command):
    model = write_model(tmp_path, {"steps": [1, 2]})
    long = tmp_path / ("a" * 300)
    argv = {"audit": ["audit", model, "--out", long], "fit": ["fit", model, "--json", long],
            "report": ["report", long]}[command]
    code, _, err = _main(argv, capsys)
    _one_error(code, err, "300 bytes", "at most 255")


def test_report_on_a_read_only_folder_is_one_line(tmp_path, capsys, monkeypatch, no_report):
    """As root a chmod does not stop writes, so the read-only file system is simulated
    at the rename that every atomic write ends with."""
    model = write_model(tmp_path / "project", {"steps": [1, 2]})
    out = tmp_path / "out"
    code, _, err = _main(["audit", model, "--out", out, "--jobs", "1"], capsys)
    assert code == 0, err
    from robustgmm import atomic

    def refuse(src, dst):
        raise OSError(errno.EROFS, os.strerror(errno.EROFS), str(dst))
    monkeypatch.setattr(atomic.os, "replace", refuse)
    code, _, err = _main(["report", out], capsys)
    _one_error(code, err, str(out), "cannot write", "Read-only file system")
    monkeypatch.undo()
    assert not (out / output.LOCK).exists()
