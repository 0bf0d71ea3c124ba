"""Issue 12, items 10, 11 and 15: no process, memory map or temporary folder left
after a kill; never more workers than tasks, cores or memory; a cache that
recomputes after an upgrade.

Kill tests run the command in a subprocess with the shared harness (a paced
estimation, so that the signal arrives mid-run) and are marked slow. After each,
the test looks for leftovers: processes whose parent was the killed run, memory-map
folders of the run and task-marker folders.
"""
from __future__ import annotations

import os
import signal
import subprocess
import tempfile
import time
from pathlib import Path

import pytest

from robustgmm.audit import cache as cache_mod, grid, parallel, runner

from helpers_audit import CountingFit, make_spec, run_each
from helpers_reliability import (harness_env, install_harness, robustgmm_command,
                                 started_pids, write_model)


# ---------------------------------------------------------------------------
# item 15: the cache key covers everything a result depends on
# ---------------------------------------------------------------------------
@pytest.fixture
def planned(tmp_path):
    spec = make_spec(tmp_path, {"steps": [1, 2]})
    panels = grid.load_panels(spec)
    return spec, panels, grid.plan(spec, panels)


@pytest.mark.parametrize("library", ["robustgmm", "numpy", "scipy"])
def test_an_upgrade_of_the_package_or_a_library_recomputes(planned, tmp_path, monkeypatch,
                                                           library):
    spec, panels, variants = planned
    cache_dir = tmp_path / "cache"
    run_each(CountingFit(), variants, panels, jobs=1, cache_dir=cache_dir)
    fit = CountingFit()
    _, stats = run_each(fit, variants, panels, jobs=1, cache_dir=cache_dir)
    assert fit.calls == 0 and stats.cached  # the warm rerun is served by the cache
    real = cache_mod.environment()
    monkeypatch.setattr(cache_mod, "environment", lambda: {**real, library: real[library] + ".1"})
    fit = CountingFit()
    _, stats = run_each(fit, variants, panels, jobs=1, cache_dir=cache_dir)
    assert stats.cached == 0 and fit.calls == len([v for v in variants if v.status == "planned"])


def test_each_entry_carries_what_it_was_computed_from(planned, tmp_path):
    import json
    spec, panels, variants = planned
    runner.run_variants(variants, panels, jobs=1, cache_dir=tmp_path / "cache")
    entries = [json.loads(p.read_text()) for p in (tmp_path / "cache").glob("*.json")]
    assert entries and all(e["environment"] == cache_mod.environment() for e in entries)
    assert all(e["format"] == cache_mod.CACHE_FORMAT for e in entries)


def test_cache_key_includes_data_settings_and_versions(planned):
    spec, panels, variants = planned
    a = variants[0].spec
    base = cache_mod.Cache.key("h1", a)
    assert base != cache_mod.Cache.key("h2", a)
    assert base != cache_mod.Cache.key("h1", variants[1].spec)


# ---------------------------------------------------------------------------
# item 11: never more workers than tasks or cores; memory
# ---------------------------------------------------------------------------
def test_workers_never_outnumber_tasks_or_cores(monkeypatch):
    import joblib
    monkeypatch.setattr(parallel, "available_memory_mb", lambda: None)
    cores = joblib.cpu_count()
    n, note = parallel.worker_count(64, 1)
    assert n == 1 and "1 task to run" in note and "instead of 64" in note
    n, note = parallel.worker_count(999, 500)
    assert n == cores and f"{cores} cores" in note
    n, note = parallel.worker_count(-1, 500)
    assert n == cores and note is None  # "every core" asked: nothing to say


def test_workers_are_capped_by_free_memory(monkeypatch):
    monkeypatch.setattr(parallel, "available_memory_mb", lambda: 1000.0)
    monkeypatch.setattr(parallel, "worker_footprint_mb", lambda panel: 400.0)
    monkeypatch.setattr(parallel.joblib, "cpu_count", lambda: 16)
    n, note = parallel.worker_count(8, 100)
    assert n == 2 and "1000 MB of free memory at about 400 MB per worker" in note


def test_jobs_64_for_one_task_runs_in_process_and_says_so(tmp_path, capsys, monkeypatch):
    from robustgmm import cli
    monkeypatch.setattr(cli, "_report_builder", lambda: None)
    # one share group and no dropping-units analysis (whose tasks would run in the
    # same pool): one task
    model = write_model(tmp_path / "project", {"steps": [1, 2]}, audit={"influence": "none"})
    code = cli.main(["audit", str(model), "--out", str(tmp_path / "out"), "--jobs", "64",
                     "--no-cache"])
    err = capsys.readouterr().err
    assert code == 0, err
    assert "robustgmm: note: 1 worker instead of 64: 1 task to run" in err, err
    import json
    run = json.loads((tmp_path / "out" / "manifest.json").read_text())["run"]
    assert run["jobs"] == 1 and run["backend"] == "in-process"


# ---------------------------------------------------------------------------
# item 10: memory maps and worker processes after the end of a run
# ---------------------------------------------------------------------------
def test_stale_memory_maps_of_dead_runs_are_removed():
    dead = subprocess.Popen(["true"])
    dead.wait()
    root = parallel._memmap_root()
    stale = Path(tempfile.mkdtemp(prefix=f"{parallel.MEMMAP_PREFIX}{dead.pid}-", dir=root))
    (stale / "panel.pkl").write_bytes(b"x" * 100)
    live = Path(tempfile.mkdtemp(prefix=f"{parallel.MEMMAP_PREFIX}{os.getpid()}-", dir=root))
    try:
        removed = parallel.remove_stale_memmaps()
        assert stale in removed and not stale.exists() and live.exists()
    finally:
        import shutil
        shutil.rmtree(live, ignore_errors=True)


def _children_of(pid: int) -> list[int]:
    out = []
    for stat in Path("/proc").glob("[0-9]*/stat"):
        try:
            text = stat.read_text()
        except OSError:
            continue
        fields = text[text.rindex(")") + 2:].split()
        if int(fields[1]) == pid:
            out.append(int(stat.parent.name))
    return out


def _alive(pid: int) -> bool:
    try:
        text = Path(f"/proc/{pid}/stat").read_text()
    except OSError:
        return False
    return text[text.rindex(")") + 2:].split()[0] != "Z"


def _leftovers(pid: int) -> list[Path]:
    roots = {parallel._memmap_root(), Path(tempfile.gettempdir())}
    return [p for r in roots for p in r.glob(f"{parallel.MEMMAP_PREFIX}{pid}-*")]


def _wait(condition, timeout=120.0, proc=None) -> bool:
    end = time.monotonic() + timeout
    while time.monotonic() < end:
        if condition():
            return True
        if proc is not None and proc.poll() is not None:
            return condition()
        time.sleep(0.1)
    return False


@pytest.mark.slow  # worker processes, about 15 s
@pytest.mark.parametrize("sig", [signal.SIGKILL, signal.SIGTERM])
def test_killing_the_main_process_leaves_no_worker_and_no_temporary(tmp_path, sig):
    """``audit --jobs 2`` killed mid-run: the workers exit within a few seconds (their
    watchdog sees the parent gone, or the interrupt stops them), no memory-map
    folder of the run is left, and after SIGTERM one line is printed and the
    finished variants are kept (a rerun resumes)."""
    model = write_model(tmp_path / "project",
                        {"transform": ["fd", "fod"], "form": ["per-period", "collapsed"],
                         "steps": [1, 2]}, panel_kw={"n_units": 400, "n_periods": 7})
    harness = install_harness(tmp_path / "harness")
    counter = tmp_path / "count"
    env = harness_env(harness, ROBUSTGMM_TEST_COUNT=counter, ROBUSTGMM_TEST_PACE=3)
    out = tmp_path / "out"
    proc = subprocess.Popen(robustgmm_command("audit", model, "--out", out, "--jobs", "2", "--start-workers"),
                            env=env, stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True,
                            start_new_session=True)
    workers = []
    try:
        assert _wait(lambda: len(set(started_pids(counter)) - {proc.pid}) >= 2, proc=proc), \
            proc.communicate()
        workers = sorted(set(started_pids(counter)) - {proc.pid})
        os.kill(proc.pid, sig)
        _, err = proc.communicate(timeout=120)
    finally:
        if proc.poll() is None:
            proc.kill()
            proc.wait()
    # every worker gone within a few watchdog periods
    assert _wait(lambda: not any(_alive(w) for w in workers), timeout=30), \
        [w for w in workers if _alive(w)]
    assert _wait(lambda: not _leftovers(proc.pid), timeout=10) or sig == signal.SIGKILL
    if sig == signal.SIGTERM:
        assert proc.returncode == 143, err
        lines = err.strip().splitlines()
        assert lines == ["robustgmm: terminated (SIGTERM); finished variants are kept in the "
                         "cache and a rerun resumes"], err
        assert not _leftovers(proc.pid)
    else:
        # SIGKILL runs no cleanup: the next run removes what the dead one left
        subprocess.run(robustgmm_command("audit", model, "--out", out, "--jobs", "2", "--start-workers"),
                       env=harness_env(harness), check=True, capture_output=True, timeout=600)
        assert not _leftovers(proc.pid)
    assert not (out / ".robustgmm-lock").exists() or sig == signal.SIGKILL


# ---------------------------------------------------------------------------
# item 12: a very large grid needs --yes
# ---------------------------------------------------------------------------
def test_a_very_large_grid_needs_yes(tmp_path, capsys, monkeypatch):
    from robustgmm import cli
    model = write_model(tmp_path / "project", {"steps": [1, 2], "form": ["per-period",
                                                                       "collapsed"]})
    monkeypatch.setattr(cli, "LARGE_GRID", 3)  # 4 variants: "large" for this test
    for extra in ([], ["--plan"]):
        code = cli.main(["audit", str(model), "--out", str(tmp_path / "out"), *extra])
        err = capsys.readouterr().err
        assert code == cli.EXIT_INPUT, err
        lines = err.strip().splitlines()
        assert len(lines) == 1 and "makes 4 variants (more than 3)" in lines[0], err
        assert "add --yes" in lines[0]
        if not extra:
            assert "about " in lines[0]  # the estimated time
    assert not (tmp_path / "out").exists()
    code = cli.main(["audit", str(model), "--out", str(tmp_path / "out"), "--plan", "--yes"])
    assert code == 0


def test_max_variants_caps_the_grid_in_one_line(tmp_path, capsys, monkeypatch):
    # [audit] max_variants: the grid is counted without estimating anything (the
    # core's fit is replaced by a trap) and a larger one is an error naming the key
    # and the count, with or without --yes, for the audit, its plan and the API
    from robustgmm import cli, core
    from robustgmm.audit import audit
    from robustgmm.errors import InputError
    from robustgmm.modelfile import read_model

    vary = {"steps": [1, 2], "form": ["per-period", "collapsed"]}  # 4 variants
    model = write_model(tmp_path / "project", vary, audit={"max_variants": 3})
    spy = []
    monkeypatch.setattr(core, "fit_family", lambda *a, **k: spy.append(1))
    monkeypatch.setattr(core, "fit", lambda *a, **k: spy.append(1))
    for extra in ([], ["--plan"], ["--yes"]):
        code = cli.main(["audit", str(model), "--out", str(tmp_path / "out"), *extra])
        lines = capsys.readouterr().err.strip().splitlines()
        assert code == cli.EXIT_INPUT and len(lines) == 1, lines
        assert "makes 4 variants, more than [audit] max_variants = 3" in lines[0]
    assert not spy and not (tmp_path / "out").exists()
    with pytest.raises(InputError, match=r"max_variants = 3"):
        audit(read_model(model))
    assert not spy
    monkeypatch.undo()
    # a cap at or above the count runs without --yes, even above the default size
    monkeypatch.setattr(cli, "LARGE_GRID", 3)
    model = write_model(tmp_path / "project", vary, name="cap4.toml", audit={"max_variants": 4})
    assert cli.main(["audit", str(model), "--plan"]) == 0
    assert read_model(model).max_variants == 4


def test_max_variants_must_be_a_whole_number(tmp_path, capsys):
    from robustgmm import cli
    for bad in ("0", "2.5", '"many"'):
        folder = tmp_path / bad.strip('"').replace(".", "_")
        model = write_model(folder, {"steps": [1, 2]})
        model.write_text(model.read_text().replace("[audit]\n", f"[audit]\nmax_variants = {bad}\n", 1))
        assert "max_variants" in model.read_text()
        code = cli.main(["audit", str(model), "--plan"])
        lines = capsys.readouterr().err.strip().splitlines()
        assert code == cli.EXIT_INPUT and len(lines) == 1, lines
        assert f"[audit] max_variants = {bad}" in lines[0], lines


def test_the_plan_estimates_nothing(tmp_path, capsys, monkeypatch):
    # item 12: counting instruments for --plan must not estimate anything (a 61,920
    # variant grid would otherwise take hours to plan): every estimator is a trap
    # (the count itself is the first pass of moment sums and the rank decisions)
    from robustgmm import cli, core
    from robustgmm.core import family

    def trap(*a, **k):
        raise AssertionError("--plan estimated a model")

    for target, name in ((core, "fit"), (core, "fit_family"), (family, "_one_step_stage"),
                         (family, "_solution_stage")):
        monkeypatch.setattr(target, name, trap)
    model = write_model(tmp_path / "project", {"steps": [1, 2], "form": ["per-period", "collapsed"],
                                               "equations": ["difference", "system"]})
    assert cli.main(["audit", str(model), "--plan"]) == 0
    out = capsys.readouterr().out
    assert "8 planned" in out, out


_HELD = []


def _task_holding(mb: int, pause: float, parent: int) -> int:
    """In a worker: set it up as the runner does, keep ``mb`` MB resident (as numpy's
    freed arrays stay in the allocator's arenas) and return the worker's pid."""
    import numpy as np
    parallel.in_worker(parent)
    if mb:
        block = np.ones(mb * 2**20 // 8)
        _HELD.append(block)
    time.sleep(pause)
    return os.getpid()


def test_a_worker_holding_its_memory_budget_is_not_restarted():
    """loky ends a worker whose resident memory grew by more than 300 MB since its
    first task (a leak heuristic) and starts a new process; a worker may use the
    core's memory budget (parallel.worker_footprint_mb), so the runner's workers allow
    that much: the same process runs on after growing by 400 MB (loky's check runs
    after a task, at most once a second)."""
    from joblib.externals.loky import get_reusable_executor
    executor = get_reusable_executor(max_workers=1, reuse=False, timeout=60)
    try:
        parent = os.getpid()
        first = executor.submit(_task_holding, 0, 0.0, parent).result()
        executor.submit(_task_holding, 400, 1.2, parent).result()
        executor.submit(_task_holding, 0, 1.2, parent).result()  # the check runs after it
        last = executor.submit(_task_holding, 0, 0.0, parent).result()
        assert last == first
    finally:
        executor.shutdown(kill_workers=True)
