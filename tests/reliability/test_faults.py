"""Faults (issue 6): a worker process killed mid-audit, an interrupt (SIGINT) mid-audit,
a write that fails midway, a corrupted cache entry.

What must hold every time: the audit completes or stops cleanly, no finished result
is lost, nothing half-written is left behind, and a rerun recomputes only what is
missing. Data are simulated (robustgmm.simulate, known process); expected results
are those of an undisturbed run of the same audit.
"""
from __future__ import annotations

import errno
import json
import os
import signal
import subprocess
import time
from pathlib import Path

import pandas as pd
import pytest

from robustgmm import cli, core, paths, atomic as io
from robustgmm.audit import grid, runner
from robustgmm.audit import audit, write_audit

from helpers_audit import (CountingFamily, CountingFit, KillWorker, is_fod_collapsed_two_step,
                           make_spec, outcome_text, run_each)
from helpers_reliability import (count_estimations, groups_started, harness_env,
                                 install_harness, kill_started_worker, output_files,
                                 robustgmm_command, tree, write_model)

VARY = {"transform": ["fd", "fod"], "steps": [1, 2], "form": ["per-period", "collapsed"]}
CONTRACT = ("variants.csv", "estimates.csv", "bounds.csv", "verdict.json")


def assert_equals_undisturbed_run(out, model, harness, clean):
    """The contract files in ``out`` equal those of an audit run without faults."""
    proc = subprocess.run(robustgmm_command("audit", model, "--out", clean, "--jobs", "1"),
                          env=harness_env(harness), capture_output=True, text=True, timeout=600)
    assert proc.returncode == 0, proc.stderr
    got, fresh = output_files(out), output_files(clean)
    for name in CONTRACT:
        assert got[name] == fresh[name], name


@pytest.fixture
def planned(tmp_path):
    spec = make_spec(tmp_path, VARY)
    panels = grid.load_panels(spec)
    return spec, panels, grid.plan(spec, panels)


def _no_temporaries(folder: Path) -> list[Path]:
    return [p for p in Path(folder).rglob("*") if p.name.endswith(".tmp")]


# ---------------------------------------------------------------------------
# (a) a worker process killed mid-audit
# ---------------------------------------------------------------------------
def test_worker_killed_twice_fails_only_its_variant(planned, tmp_path):
    """A variant whose worker is SIGKILLed on every attempt: tried twice, recorded as
    failed with the reason; every other variant is estimated exactly as undisturbed."""
    spec, panels, variants = planned
    killer = KillWorker(tmp_path / "kills", is_fod_collapsed_two_step, times=99)
    cache_dir = tmp_path / "cache"
    out, stats = run_each(killer, variants, panels, jobs=2, cache_dir=cache_dir,
                          start_workers=True)
    assert killer.kills() == 2  # the first attempt and one retry, no more
    assert list(out) == [v.id for v in variants]  # nothing missing, plan order
    lost = [v.id for v in variants if is_fod_collapsed_two_step(v.spec)]
    assert len(lost) == 1
    assert out[lost[0]].status == runner.FAILED and out[lost[0]].reason == runner.LOST_REASON
    assert "died twice" in out[lost[0]].reason
    assert stats.failed == 1 and stats.extra["lost"] == 1 and stats.extra["worker_deaths"] == 2
    fresh, _ = run_each(core.fit, variants, panels, jobs=1)
    others = [v.id for v in variants if v.id not in lost]
    assert outcome_text({k: out[k] for k in others}) == outcome_text({k: fresh[k] for k in others})
    # the lost variant is not cached: a rerun (healthy now) estimates it and nothing else
    assert len(list(cache_dir.glob("*.json"))) == len(variants) - 1
    fit = CountingFit()
    again, stats = run_each(fit, variants, panels, jobs=1, cache_dir=cache_dir)
    assert fit.calls == 1 and stats.cached == len(variants) - 1
    assert outcome_text(again) == outcome_text(fresh)
    assert not _no_temporaries(cache_dir)


@pytest.mark.slow  # restarts worker processes
def test_worker_killed_once_is_retried_and_the_audit_completes(planned, tmp_path):
    spec, panels, variants = planned
    killer = KillWorker(tmp_path / "kills", is_fod_collapsed_two_step, times=1)
    out, stats = run_each(killer, variants, panels, jobs=2, cache_dir=tmp_path / "cache",
                          start_workers=True)
    assert killer.kills() == 1
    assert stats.failed == 0 and stats.extra["worker_deaths"] == 1
    assert "lost" not in stats.extra
    fresh, _ = run_each(core.fit, variants, panels, jobs=1)
    assert outcome_text(out) == outcome_text(fresh)
    assert len(list((tmp_path / "cache").glob("*.json"))) == len(variants)


@pytest.mark.slow  # restarts worker processes
def test_killed_worker_through_the_audit_tables(tmp_path, monkeypatch):
    """The same through audit(): the lost variant is a failed row of variants.csv, the
    verdict counts it, and the files are complete."""
    spec = make_spec(tmp_path, VARY)
    killer = KillWorker(tmp_path / "kills", is_fod_collapsed_two_step, times=99)
    # the killer travels to the worker processes as the runner's estimator
    monkeypatch.setattr(runner, "FIT_EACH", killer)
    result = audit(spec, jobs=2, start_workers=True)
    out = write_audit(result, tmp_path / "out")
    v = pd.read_csv(out / "variants.csv")
    failed = v[v["status"] == "failed"]
    assert len(v) == 8 and len(failed) == 1
    assert failed["reason"].iloc[0] == runner.LOST_REASON
    assert (v["status"] != "failed").sum() == 7
    assert result.manifest["run"]["lost"] == 1
    flags = {f["id"]: f for f in result.verdict["model"]}
    assert flags["variants_failed"]["figures"]["ids"] == list(failed["variant"])


@pytest.mark.slow  # worker processes and two command-line audits, about 25 s
def test_worker_killed_from_outside_during_a_command_line_audit(tmp_path):
    """``robustgmm audit --jobs 2`` while a worker process is SIGKILLed from outside in
    the middle of a share group: the audit completes (exit 0), every variant is
    estimated, the results equal an undisturbed run's."""
    model = write_model(tmp_path / "project", SIGINT_VARY, panel_kw={"n_units": 80,
                                                                   "n_periods": 7})
    harness = install_harness(tmp_path / "harness")
    counter = tmp_path / "count"
    env = harness_env(harness, ROBUSTGMM_TEST_COUNT=counter, ROBUSTGMM_TEST_PACE=0.8)
    out = tmp_path / "out"
    proc = subprocess.Popen(robustgmm_command("audit", model, "--out", out, "--jobs", "2", "--start-workers"),
                            env=env, stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True)
    # the third group to start: its worker sleeps in the pace, mid-group
    _, err = kill_started_worker(proc, counter, 2)
    assert proc.returncode == 0, err
    assert "Traceback" not in err
    manifest = json.loads((out / "manifest.json").read_text())
    assert manifest["run"]["worker_deaths"] == 1 and manifest["run"]["failed"] == 0
    v = pd.read_csv(out / "variants.csv")
    assert len(v) == SIGINT_VARIANTS and (v["status"] == "ok").all()
    assert_equals_undisturbed_run(out, model, harness, tmp_path / "clean")


def test_worker_death_is_recognised_by_exception_type():
    from joblib.externals.loky.process_executor import TerminatedWorkerError
    assert runner._worker_died(TerminatedWorkerError("gone"))
    assert not runner._worker_died(RuntimeError("a bug"))
    assert not runner._worker_died(KeyboardInterrupt())


# ---------------------------------------------------------------------------
# (b) SIGINT mid-audit through the command line
# ---------------------------------------------------------------------------
SIGINT_VARY = {"equations": ["difference", "system"], "transform": ["fd", "fod"],
               "form": ["per-period", "collapsed"], "steps": [1, 2], "last_lag": [2, "all"]}
#: 32 variants in 8 share groups of 4 (steps x last_lag share their moments)
SIGINT_VARIANTS, SIGINT_GROUP = 32, 4


def _wait_for(condition, timeout=120.0, proc=None):
    deadline = time.monotonic() + timeout
    while time.monotonic() < deadline:
        if condition():
            return True
        if proc is not None and proc.poll() is not None:
            return False
        time.sleep(0.02)
    return False


def _interrupt_and_resume(tmp_path, jobs: int, whole_group: bool):
    model = write_model(tmp_path / "project", SIGINT_VARY, panel_kw={"n_units": 120,
                                                                   "n_periods": 7})
    harness = install_harness(tmp_path / "harness")
    out = tmp_path / "out"
    first = tmp_path / "count-1"
    env = harness_env(harness, ROBUSTGMM_TEST_COUNT=first, ROBUSTGMM_TEST_PACE=0.6)
    proc = subprocess.Popen(robustgmm_command("audit", model, "--out", out, "--jobs", jobs, "--start-workers"),
                            env=env, stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True,
                            start_new_session=True)
    try:
        # each worker has finished a group and its results were cached, and the next
        # groups sleep in their pace: a Ctrl-C now hits the audit mid-run
        started = _wait_for(lambda: groups_started(first) >= 2 * jobs + 1, proc=proc)
        assert started, proc.communicate()
        time.sleep(0.3)
        if whole_group:  # a terminal's Ctrl-C reaches the whole process group
            os.killpg(proc.pid, signal.SIGINT)
        else:
            proc.send_signal(signal.SIGINT)
        _, err = proc.communicate(timeout=120)
    finally:
        if proc.poll() is None:
            os.killpg(proc.pid, signal.SIGKILL)
    assert proc.returncode == cli.EXIT_INTERRUPTED, err
    assert "robustgmm: interrupted" in err and "Traceback" not in err

    cache = out / ".cache"
    before = {p.name: (p.stat().st_mtime_ns, p.read_bytes()) for p in cache.glob("*.json")}
    done = len(before)
    assert SIGINT_GROUP <= done < SIGINT_VARIANTS  # finished groups kept, the audit unfinished
    assert done == count_estimations(first)  # every estimation that returned was cached
    assert not (out / "manifest.json").exists()  # an unfinished audit does not claim completion
    assert not _no_temporaries(out)

    # the same command again: resumes, estimates only what is missing
    second = tmp_path / "count-2"
    proc = subprocess.run(robustgmm_command("audit", model, "--out", out, "--jobs", jobs, "--start-workers"),
                          env=harness_env(harness, ROBUSTGMM_TEST_COUNT=second),
                          capture_output=True, text=True, timeout=600)
    assert proc.returncode == 0, proc.stderr
    assert count_estimations(second) == SIGINT_VARIANTS - done  # none recomputed
    after = {p.name: (p.stat().st_mtime_ns, p.read_bytes()) for p in cache.glob("*.json")}
    assert len(after) == SIGINT_VARIANTS
    assert all(after[name] == before[name] for name in before)  # untouched, not rewritten
    manifest = json.loads((out / "manifest.json").read_text())
    assert manifest["run"]["cached"] == done
    assert manifest["run"]["computed"] == SIGINT_VARIANTS - done

    # and the resumed audit equals an uninterrupted one
    assert_equals_undisturbed_run(out, model, harness, tmp_path / "clean")


@pytest.mark.slow  # two command-line audits and a clean one, about 15 s
def test_sigint_mid_audit_then_rerun_recomputes_nothing_finished(tmp_path):
    _interrupt_and_resume(tmp_path, jobs=1, whole_group=False)


@pytest.mark.slow  # worker processes, about 20 s
def test_ctrl_c_to_the_process_group_with_workers(tmp_path):
    _interrupt_and_resume(tmp_path, jobs=2, whole_group=True)


def test_interrupt_between_groups_keeps_every_finished_group(planned, tmp_path, monkeypatch):
    """In-process version (fast): Ctrl-C during the k-th group, for every k."""
    spec, panels, variants = planned
    for k in range(1, 5):
        cache_dir = tmp_path / f"cache{k}"
        monkeypatch.setattr(core, "fit_family", CountingFamily(interrupt_at_group=k))
        with pytest.raises(KeyboardInterrupt):
            runner.run_variants(variants, panels, jobs=1, cache_dir=cache_dir)
        kept = len(list(cache_dir.glob("*.json")))
        assert kept == 2 * (k - 1)  # groups of two (steps 1 and 2)
        counter = CountingFamily()
        monkeypatch.setattr(core, "fit_family", counter)
        _, stats = runner.run_variants(variants, panels, jobs=1, cache_dir=cache_dir)
        assert counter.specs == stats.computed == len(variants) - kept
        assert stats.cached == kept
        assert not _no_temporaries(cache_dir)


# ---------------------------------------------------------------------------
# (c) a write that fails midway
# ---------------------------------------------------------------------------
class _FullDisk:
    """``os.fdopen`` stand-in whose file takes ``room`` bytes and then fails with
    ENOSPC, as a full disk does (only for the writer under test)."""

    def __init__(self, real, room=10, fail_on=None):
        self.real, self.room, self.fail_on, self.calls = real, room, fail_on, 0

    def __call__(self, fd, *args, **kw):
        handle = self.real(fd, *args, **kw)
        self.calls += 1
        if self.fail_on is not None and self.calls != self.fail_on:
            return handle
        room = self.room

        class Handle:
            def __enter__(self):
                return self

            def __exit__(self, *exc):
                handle.close()

            def write(self, data):
                handle.write(data[:room])
                handle.flush()
                raise OSError(errno.ENOSPC, os.strerror(errno.ENOSPC))

            def __getattr__(self, name):
                return getattr(handle, name)

        return Handle()


def test_failing_writer_leaves_the_old_file_and_no_temporary(tmp_path, monkeypatch):
    target = tmp_path / "variants.csv"
    target.write_text("old complete content\n")
    monkeypatch.setattr(io.os, "fdopen", _FullDisk(os.fdopen))
    with pytest.raises(OSError) as info:
        io.atomic_write_text(target, "new content " * 1000)
    monkeypatch.undo()
    assert info.value.errno == errno.ENOSPC
    assert target.read_text() == "old complete content\n"
    assert sorted(p.name for p in tmp_path.iterdir()) == ["variants.csv"]
    # a new file that cannot be written is not created at all
    with monkeypatch.context() as m:
        m.setattr(io.os, "fdopen", _FullDisk(os.fdopen))
        with pytest.raises(OSError):
            io.atomic_write_json(tmp_path / "verdict.json", {"x": 1})
    assert sorted(p.name for p in tmp_path.iterdir()) == ["variants.csv"]


def test_failing_rename_leaves_no_temporary(tmp_path, monkeypatch):
    def refuse(src, dst):
        raise OSError(errno.EROFS, os.strerror(errno.EROFS), str(dst))
    monkeypatch.setattr(io.os, "replace", refuse)
    with pytest.raises(OSError):
        io.atomic_write_bytes(tmp_path / "figure.png", b"\x89PNG" * 100)
    assert list(tmp_path.iterdir()) == []


@pytest.mark.parametrize("fail_on", [1, 2, 3, 4, 5])
def test_write_audit_failing_midway(tmp_path, monkeypatch, fail_on):
    """A rerun into the folder of an earlier audit whose k-th file write hits a full
    disk: no half-written or temporary file, and the folder still holds the earlier
    audit, complete, with its manifest (issue 12, item 9: the new audit is written
    into a staging folder and swapped in only when complete)."""
    spec = make_spec(tmp_path, {"steps": [1, 2]})
    result = audit(spec, jobs=1)
    out = write_audit(result, tmp_path / "out")
    old = {name: (out / name).read_bytes() for name in (*CONTRACT, "manifest.json")}
    other = audit(make_spec(tmp_path, {"steps": [1, 2], "form": ["per-period", "collapsed"]}),
                  jobs=1)
    writer = _FullDisk(os.fdopen, room=5, fail_on=fail_on)
    monkeypatch.setattr(io.os, "fdopen", writer)
    with pytest.raises(OSError):
        write_audit(other, out)
    monkeypatch.undo()
    assert writer.calls == fail_on
    assert not _no_temporaries(out)
    assert not list(out.glob(".robustgmm-staging-*")) and not (out / ".robustgmm-lock").exists()
    for name, data in old.items():  # the earlier audit, untouched
        assert (out / name).read_bytes() == data, name
    write_audit(other, out)  # and room again: the folder holds the new audit
    assert len(pd.read_csv(out / "variants.csv")) == len(other.variants)


def test_command_line_full_disk_is_one_line_and_leaves_no_temporary(tmp_path, monkeypatch,
                                                                    capsys):
    model = write_model(tmp_path / "project", {"steps": [1, 2]})
    out = tmp_path / "out"
    writer = _FullDisk(os.fdopen, room=5, fail_on=3)  # the marker, the cache, ... fails
    monkeypatch.setattr(io.os, "fdopen", writer)
    code = cli.main(["audit", str(model), "--out", str(out), "--jobs", "1", "--no-cache"])
    monkeypatch.undo()
    err = capsys.readouterr().err
    assert code == cli.EXIT_INPUT, err
    lines = err.strip().splitlines()
    assert len(lines) == 1 and lines[0].startswith(f"robustgmm: error: {out}: cannot write")
    assert "No space left on device" in lines[0] and "Traceback" not in err
    assert not _no_temporaries(out) and not (out / "manifest.json").exists()


def test_cache_write_failure_does_not_lose_the_result(planned, tmp_path, monkeypatch):
    spec, panels, variants = planned
    cache_dir = tmp_path / "cache"

    def full(self, key, variant_id, payload):
        raise OSError(errno.ENOSPC, os.strerror(errno.ENOSPC))
    monkeypatch.setattr(runner.Cache, "store", full)
    out, stats = runner.run_variants(variants, panels, jobs=1, cache_dir=cache_dir)
    monkeypatch.undo()
    assert stats.failed == 0 and stats.extra["cache_write_errors"] == len(variants)
    fresh, _ = runner.run_variants(variants, panels, jobs=1)
    assert outcome_text(out) == outcome_text(fresh)
    assert list(cache_dir.iterdir()) == []


# ---------------------------------------------------------------------------
# (d) corrupted cache entries
# ---------------------------------------------------------------------------
def _damage(entries: dict[str, Path], ids: list[str]) -> None:
    """Six kinds of damage, one per entry."""
    a, b, c, d, e, f = (entries[i] for i in ids)
    text_a, text_b = a.read_text(), b.read_text()
    a.write_text(text_b)  # two entries swapped: valid checksums, wrong keys
    b.write_text(text_a)
    c.write_bytes(b"")  # emptied
    d.write_bytes(os.urandom(200))  # garbage
    entry = json.loads(e.read_text())
    list(entry["payload"]["fit"]["terms"].values())[1]["std_error"] *= 1.5  # a changed figure
    e.write_text(json.dumps(entry))
    entry = json.loads(f.read_text())
    entry["format"] = runner.CACHE_FORMAT + 1  # a future format
    f.write_text(json.dumps(entry))


def test_corrupted_entries_are_detected_and_recomputed(planned, tmp_path, monkeypatch):
    spec, panels, variants = planned
    cache_dir = tmp_path / "cache"
    first, _ = runner.run_variants(variants, panels, jobs=1, cache_dir=cache_dir)
    entries = {json.loads(p.read_text())["variant"]: p for p in cache_dir.glob("*.json")}
    ids = [v.id for v in variants][:6]
    _damage(entries, ids)
    counter = CountingFamily()
    monkeypatch.setattr(core, "fit_family", counter)
    again, stats = runner.run_variants(variants, panels, jobs=1, cache_dir=cache_dir)
    assert stats.corrupted == 6 and stats.computed == 6 and stats.cached == 2
    assert outcome_text(again) == outcome_text(first)
    # repaired: the next run trusts every entry
    counter = CountingFamily()
    monkeypatch.setattr(core, "fit_family", counter)
    _, stats = runner.run_variants(variants, panels, jobs=1, cache_dir=cache_dir)
    assert counter.specs == 0 and stats.cached == 8 and stats.corrupted == 0


def test_cache_entry_replaced_by_a_folder(planned, tmp_path):
    """An entry that cannot even be read or replaced: counted as corrupted, the
    variant is estimated, the failed cache write is counted, the audit goes on."""
    spec, panels, variants = planned
    cache_dir = tmp_path / "cache"
    runner.run_variants(variants, panels, jobs=1, cache_dir=cache_dir)
    victim = sorted(cache_dir.glob("*.json"))[0]
    victim.unlink()
    victim.mkdir()
    (victim / "inside").write_text("x")
    out, stats = runner.run_variants(variants, panels, jobs=1, cache_dir=cache_dir)
    assert stats.corrupted == 1 and stats.failed == 0
    assert stats.extra["cache_write_errors"] == 1
    assert all(o.status == runner.OK for o in out.values())
    assert not _no_temporaries(cache_dir)


def test_cache_folder_that_cannot_exist_runs_without_cache(tmp_path, capsys, monkeypatch):
    model = write_model(tmp_path / "project", {"steps": [1, 2]})
    out = tmp_path / "out"
    out.mkdir()
    (out / paths.OUTPUT_MARKER).write_text("{}")
    (out / ".cache").write_text("a file where the cache folder belongs")
    monkeypatch.setattr(cli, "_report_builder", lambda: None)
    code = cli.main(["audit", str(model), "--out", str(out), "--jobs", "1"])
    err = capsys.readouterr().err
    assert code == 0, err
    assert "ran without a cache" in err and len(err.strip().splitlines()) == 1
    manifest = json.loads((out / "manifest.json").read_text())
    assert manifest["run"]["computed"] == 2 and "cache_unavailable" in manifest["run"]
    assert (out / ".cache").read_text() == "a file where the cache folder belongs"


@pytest.mark.slow  # two command-line audits with their reports, about 14 s
def test_corrupted_entry_through_the_command_line(tmp_path):
    """A damaged cache file in an audit folder: the rerun recomputes that variant's
    group (and only it) and writes the same outputs."""
    model = write_model(tmp_path / "project", VARY)
    harness = install_harness(tmp_path / "harness")
    out = tmp_path / "out"
    env = harness_env(harness, ROBUSTGMM_TEST_COUNT=tmp_path / "count-1")
    proc = subprocess.run(robustgmm_command("audit", model, "--out", out, "--jobs", "1"),
                          env=env, capture_output=True, text=True, timeout=600)
    assert proc.returncode == 0, proc.stderr
    first = output_files(out)
    victim = sorted((out / ".cache").glob("*.json"))[3]
    victim.write_text(victim.read_text().replace('"estimate": ', '"estimate": 1', 1))
    snapshot = tree(out / ".cache")
    env = harness_env(harness, ROBUSTGMM_TEST_COUNT=tmp_path / "count-2")
    proc = subprocess.run(robustgmm_command("audit", model, "--out", out, "--jobs", "1"),
                          env=env, capture_output=True, text=True, timeout=600)
    assert proc.returncode == 0, proc.stderr
    assert count_estimations(tmp_path / "count-2") == 2  # the victim's share group
    manifest = json.loads((out / "manifest.json").read_text())
    assert manifest["run"]["corrupted"] == 1 and manifest["run"]["computed"] == 1
    changed = [p for p, st in tree(out / ".cache").items() if snapshot.get(p) != st]
    assert changed == [str(victim)]
    second = output_files(out)
    for name in CONTRACT:
        assert second[name] == first[name], name
