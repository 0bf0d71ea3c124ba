"""Cluster runs (robustgmm.audit.cluster, ``audit --scheduler``): where the scheduler
address comes from, one-line errors for bad or unreachable schedulers, and — slow —
real runs on a dask scheduler and two dask workers started here as separate
processes on 127.0.0.1 (the venv's ``dask scheduler`` / ``dask worker`` commands):
outputs byte-identical to a local run, a worker killed mid-run loses nothing, a
group that kills every worker it runs on is recorded failed with the reason, and
other package versions on the workers are refused.

The workers import the test harness of helpers_reliability (sitecustomize on
PYTHONPATH), which paces each share group (so a worker can be killed while it
certainly estimates one) and logs which process estimated it. The scheduler runs with
``allowed-failures = 0``, so that a lost worker's task comes back to robustgmm at
once and robustgmm's own retry (once, alone; then recorded failed) is what is tested;
with dask's default (3) the scheduler first reschedules such tasks itself.
"""
from __future__ import annotations

import json
import os
import shutil
import signal
import socket
import subprocess
import sys
import time
from pathlib import Path

import pytest

from robustgmm import cli
from robustgmm.audit import cluster, grid, runner
from robustgmm.errors import InputError

from helpers_audit import run_each
from helpers_reliability import (harness_env, install_harness, kill_started_worker,
                                 output_files, run_cli, started_pids, write_model)

VARY = {"equations": ["difference", "system"], "transform": ["fd", "fod"], "steps": [1, 2],
        "form": ["per-period", "collapsed"]}  # 16 variants in 8 share groups
PANEL = {"n_units": 60, "n_periods": 7, "seed": 8}
HERE = Path(__file__).resolve().parent


# ---------------------------------------------------------------------------
# where the address comes from; bad and unreachable addresses (no cluster)
# ---------------------------------------------------------------------------
@pytest.mark.parametrize("address", ["tcp://127.0.0.1:8786", "login1:8786", "tls://node-3.lab:443",
                                     "tcp://[::1]:8786", " tcp://h:1 "])
def test_valid_addresses(address):
    assert cluster.address_problem(address) is None


@pytest.mark.parametrize("address, fragment", [
    ("", "must be a scheduler address"), (8786, "must be a scheduler address"),
    ("login1", "use tcp://HOST:PORT"), ("tcp://login1", "use tcp://HOST:PORT"),
    ("http://h:8786", "unknown protocol http://"), ("tcp://h:0", "port 0"),
    ("tcp://h:99999", "port 99999"), ("tcp://h:8786/x", "use tcp://HOST:PORT")])
def test_invalid_addresses(address, fragment):
    assert fragment in cluster.address_problem(address)


def test_command_line_wins_over_environment_over_model_file(monkeypatch):
    monkeypatch.setenv(cluster.SCHEDULER_ENV, "tcp://env:1")
    assert cluster.resolve("tcp://cli:1", "tcp://file:1") == ("tcp://cli:1", "--scheduler")
    assert cluster.resolve(None, "tcp://file:1") == ("tcp://env:1", cluster.SCHEDULER_ENV)
    monkeypatch.delenv(cluster.SCHEDULER_ENV)
    assert cluster.resolve(None, "tcp://file:1", "m.toml") == ("tcp://file:1",
                                                                "m.toml: [run] scheduler")
    assert cluster.resolve(None, None) is None
    monkeypatch.setenv(cluster.SCHEDULER_ENV, "nonsense")
    with pytest.raises(InputError, match="DASK_SCHEDULER_ADDRESS = 'nonsense': is not a sch"):
        cluster.resolve(None, None)


def test_run_section_of_the_model_file(tmp_path):
    from robustgmm.modelfile import read_model, read_run
    model = write_model(tmp_path, VARY, panel_kw=PANEL)
    text = model.read_text()
    assert read_run(model).scheduler is None
    model.write_text(text + '\n[run]\nscheduler = "tcp://login1:8786"\n')
    read_model(model)  # [run] is a known section and changes nothing in the spec
    assert read_run(model).scheduler == "tcp://login1:8786"
    model.write_text(text + '\n[run]\nscheduler = "login1"\nworkers = 3\n')
    with pytest.raises(InputError) as err:
        read_model(model)
    assert sorted(err.value.problems) == sorted([
        f'{model}: [run] workers: unknown key; valid keys: scheduler',
        f'{model}: [run] scheduler = "login1": is not a scheduler address; use '
        "tcp://HOST:PORT, e.g. tcp://login1:8786"])


def _refused_port() -> int:
    """A port on 127.0.0.1 where nothing listens (bound, then released)."""
    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        return s.getsockname()[1]


def test_unreachable_scheduler_is_one_line_exit_2(tmp_path, capsys, monkeypatch):
    pytest.importorskip("distributed")
    monkeypatch.setattr(cluster, "CONNECT_SECONDS", 1.0)
    model = write_model(tmp_path / "p", VARY, panel_kw=PANEL)
    address = f"tcp://127.0.0.1:{_refused_port()}"
    out = tmp_path / "out"
    code = cli.main(["audit", str(model), "--out", str(out), "--scheduler", address])
    err = capsys.readouterr().err.strip().splitlines()
    assert code == 2
    assert len(err) == 1 and err[0].startswith(f"robustgmm: error: --scheduler {address}: "
                                               "cannot reach the dask scheduler")
    assert not out.exists()  # nothing written before the cluster answered


def test_simulate_with_unreachable_scheduler_is_one_line_exit_2(tmp_path, capsys,
                                                                 monkeypatch):
    pytest.importorskip("distributed")
    monkeypatch.setattr(cluster, "CONNECT_SECONDS", 1.0)
    model = write_model(tmp_path / "p", VARY, panel_kw=PANEL)
    address = f"tcp://127.0.0.1:{_refused_port()}"
    out = tmp_path / "out"
    code = cli.main(["simulate", str(model), "--out", str(out), "--reps", "10",
                     "--scheduler", address])
    err = capsys.readouterr().err.strip().splitlines()
    assert code == 2
    assert len(err) == 1 and err[0].startswith(f"robustgmm: error: --scheduler {address}: "
                                               "cannot reach the dask scheduler")
    assert not out.exists()  # nothing written before the cluster answered


def test_model_file_scheduler_is_used_and_named(tmp_path, capsys, monkeypatch):
    pytest.importorskip("distributed")
    monkeypatch.setattr(cluster, "CONNECT_SECONDS", 1.0)
    monkeypatch.delenv(cluster.SCHEDULER_ENV, raising=False)
    model = write_model(tmp_path / "p", VARY, panel_kw=PANEL)
    address = f"tcp://127.0.0.1:{_refused_port()}"
    model.write_text(model.read_text() + f'\n[run]\nscheduler = "{address}"\n')
    code = cli.main(["audit", str(model), "--out", str(tmp_path / "out")])
    err = capsys.readouterr().err.strip().splitlines()
    assert code == 2 and len(err) == 1
    assert err[0].startswith(f"robustgmm: error: {model}: [run] scheduler {address}: cannot reach")


def test_bad_scheduler_value_is_one_line_exit_2(tmp_path, capsys, monkeypatch):
    model = write_model(tmp_path / "p", VARY, panel_kw=PANEL)
    code = cli.main(["audit", str(model), "--out", str(tmp_path / "o"), "--scheduler", "h"])
    err = capsys.readouterr().err.strip().splitlines()
    assert code == 2 and err == ["robustgmm: error: --scheduler = 'h': is not a scheduler "
                                 "address; use tcp://HOST:PORT, e.g. tcp://login1:8786"]
    monkeypatch.setenv(cluster.SCHEDULER_ENV, "tcp://h:70000")
    code = cli.main(["audit", str(model), "--out", str(tmp_path / "o")])
    err = capsys.readouterr().err.strip().splitlines()
    assert code == 2 and err == ["robustgmm: error: DASK_SCHEDULER_ADDRESS = 'tcp://h:70000': "
                                 "port 70000 is not between 1 and 65535"]


# ---------------------------------------------------------------------------
# a real cluster: one scheduler and two workers, separate processes
# ---------------------------------------------------------------------------
def _dask_command() -> str:
    found = Path(sys.executable).with_name("dask")
    return str(found) if found.exists() else (shutil.which("dask") or "dask")


class Cluster:
    """A dask scheduler and workers started by this test (each in its own process
    group, ended by its id at the end)."""

    def __init__(self, folder: Path, env: dict):
        self.folder, self.env, self.procs = folder, env, []
        info = folder / "scheduler.json"
        self.logs = []
        self._start("scheduler", "--host", "127.0.0.1", "--port", "0", "--no-dashboard",
                    "--scheduler-file", str(info),
                    env=dict(env, DASK_DISTRIBUTED__SCHEDULER__ALLOWED_FAILURES="0"))
        deadline = time.monotonic() + 120
        while not info.exists() and time.monotonic() < deadline:
            self._check_alive()
            time.sleep(0.2)
        time.sleep(0.2)  # the file is written in one go, but give it a moment
        self.address = json.loads(info.read_text())["address"]
        for i in range(2):
            self._start("worker", self.address, "--nthreads", "1", "--memory-limit", "1GB",
                        "--no-dashboard", "--host", "127.0.0.1", "--name", f"w{i}", env=env)
        self.wait_for_workers(2)

    def _start(self, *args, env):
        log = open(self.folder / f"{args[0]}-{len(self.procs)}.log", "w")
        self.logs.append(log)
        self.procs.append(subprocess.Popen([_dask_command(), *args], env=env, stdout=log,
                                           stderr=subprocess.STDOUT, start_new_session=True))

    def _check_alive(self):
        for p in self.procs:
            if p.poll() is not None:
                raise RuntimeError(f"{p.args[:2]} exited with {p.returncode}: "
                                   + (self.folder / "scheduler-0.log").read_text()[-2000:])

    def wait_for_workers(self, n: int, timeout: float = 180):
        from distributed import Client
        with Client(self.address, timeout=30) as client:
            client.wait_for_workers(n, timeout=timeout)

    def close(self):
        for p in reversed(self.procs):
            if p.poll() is None:
                with_group = os.getpgid(p.pid) == p.pid
                (os.killpg if with_group else os.kill)(p.pid, signal.SIGTERM)
        for p in self.procs:
            try:
                p.wait(timeout=20)
            except subprocess.TimeoutExpired:
                os.killpg(p.pid, signal.SIGKILL)
                p.wait()
        for log in self.logs:
            log.close()


@pytest.fixture(scope="module")
def harness(tmp_path_factory):
    return install_harness(tmp_path_factory.mktemp("harness"))


@pytest.fixture(scope="module")
def counter(tmp_path_factory):
    return tmp_path_factory.mktemp("count") / "estimations.log"


@pytest.fixture(scope="module")
def dask_cluster(tmp_path_factory, harness, counter):
    pytest.importorskip("distributed")
    env = harness_env(harness, ROBUSTGMM_TEST_COUNT=counter, ROBUSTGMM_TEST_PACE="0.5")
    # the workers import this checkout of robustgmm and this folder's test doubles
    root = Path(cluster.__file__).resolve().parents[2]
    env["PYTHONPATH"] = os.pathsep.join([env["PYTHONPATH"], str(root), str(HERE.parent),
                                         str(HERE)])
    c = Cluster(tmp_path_factory.mktemp("cluster"), env)
    try:
        yield c
    finally:
        c.close()


@pytest.fixture(scope="module")
def project(tmp_path_factory):
    return write_model(tmp_path_factory.mktemp("project"), VARY, panel_kw=PANEL)


@pytest.fixture(scope="module")
def local_files(project, tmp_path_factory):
    """The local run every cluster run is compared with (in this process, one job)."""
    out = tmp_path_factory.mktemp("local") / "out"
    assert cli.main(["audit", str(project), "--out", str(out), "--jobs", "1"]) == 0
    return output_files(out)


def _cluster_env(harness, **extra):
    env = harness_env(harness, **extra)
    env.pop(cluster.SCHEDULER_ENV, None)
    return env


@pytest.mark.slow  # a scheduler, two workers and two command-line audits
def test_cluster_run_is_byte_identical_to_a_local_run(dask_cluster, project, local_files,
                                                      harness, counter, tmp_path):
    out = tmp_path / "out"
    before = len(started_pids(counter))
    proc = run_cli("audit", project, "--out", out, "--scheduler", dask_cluster.address,
                   env=_cluster_env(harness))
    assert proc.returncode == 0, proc.stderr
    assert output_files(out) == local_files
    manifest = json.loads((out / "manifest.json").read_text())
    assert manifest["run"]["backend"] == "dask" and manifest["run"]["computed"] == 16
    # estimated on the workers (the harness logs the process of each share group), on both
    pids = set(started_pids(counter)[before:])
    assert len(pids) == 2 and os.getpid() not in pids
    # the client cached every result: a run without the cluster estimates nothing
    from robustgmm.modelfile import read_model
    spec = read_model(project)
    panels = grid.load_panels(spec)
    outcomes, stats = runner.run_variants(grid.plan(spec, panels, counts=False), panels,
                                          jobs=1, cache_dir=out / ".cache")
    assert stats.computed == 0 and stats.cached == 16


@pytest.mark.slow  # a scheduler, two workers and two command-line simulations
def test_cluster_simulation_is_byte_identical_to_a_local_one(dask_cluster, project, harness,
                                                             tmp_path):
    local, remote = tmp_path / "local", tmp_path / "remote"
    assert cli.main(["simulate", str(project), "--out", str(local), "--reps", "10",
                     "--jobs", "1"]) == 0
    proc = run_cli("simulate", project, "--out", remote, "--reps", "10",
                   "--scheduler", dask_cluster.address, env=_cluster_env(harness))
    assert proc.returncode == 0, proc.stderr
    manifest = json.loads((remote / "manifest.json").read_text())
    assert manifest["run"]["backend"] == "dask"
    assert output_files(remote) == output_files(local)


@pytest.mark.slow  # kills a worker while it estimates; its group runs again elsewhere
def test_worker_killed_mid_run_loses_nothing(dask_cluster, project, local_files, harness,
                                             counter, tmp_path):
    dask_cluster.wait_for_workers(2)
    out = tmp_path / "out"
    before = len(started_pids(counter))
    # the address from the environment this time
    env = dict(_cluster_env(harness), **{cluster.SCHEDULER_ENV: dask_cluster.address})
    proc = subprocess.Popen(cli_command("audit", project, "--out", out),
                            env=env, stdout=subprocess.PIPE,
                            stderr=subprocess.PIPE, text=True)
    _, stderr = kill_started_worker(proc, counter, before)
    assert proc.returncode == 0, stderr
    run = json.loads((out / "manifest.json").read_text())["run"]
    assert run["worker_deaths"] >= 1 and run["retried_alone"] >= 1 and "lost" not in run
    assert run["computed"] == 16 and run["failed"] == 0
    assert output_files(out) == local_files
    assert len(started_pids(counter)) - before > 8  # the killed group was started again


class KillsItsWorker:
    """A test double of the estimator: the variant with ``steps = 1``, difference
    GMM, first differences and per-period instruments ends the dask worker process
    that estimates it (as a crash or the out-of-memory killer would); the others are
    estimated as usual."""

    def __call__(self, spec, panel):
        from robustgmm import core
        if (spec.steps == 1 and spec.equations == "difference" and spec.transform == "fd"
                and spec.form == "per-period" and cluster.in_dask_worker()):
            os._exit(1)
        return core.fit(spec, panel)


@pytest.mark.slow  # two worker deaths and restarts by their nannies
def test_group_that_kills_every_worker_is_recorded_failed(dask_cluster, project, local_files):
    from robustgmm.modelfile import read_model
    dask_cluster.wait_for_workers(2)
    spec = read_model(project)
    panels = grid.load_panels(spec)
    variants = grid.plan(spec, panels, counts=False)
    with cluster.connect(dask_cluster.address):
        outcomes, stats = run_each(KillsItsWorker(), variants, panels, backend="dask")
    lost = [o for o in outcomes.values() if o.status == runner.FAILED]
    assert len(lost) == 1 and lost[0].reason == runner.LOST_REASON
    assert stats.extra["lost"] == 1 and stats.extra["worker_deaths"] == 2
    assert sum(o.status == runner.OK for o in outcomes.values()) == 15


@pytest.mark.slow
def test_other_versions_on_the_workers_are_refused(dask_cluster, project, monkeypatch):
    from distributed import Client
    from robustgmm.modelfile import read_model
    dask_cluster.wait_for_workers(1)
    real = cluster.versions()
    monkeypatch.setattr(cluster, "versions", lambda: dict(real, robustgmm="0.0.1"))
    with pytest.raises(InputError) as err:
        with cluster.connect(dask_cluster.address):
            pass
    (line,) = err.value.problems
    assert line.startswith(f"{dask_cluster.address}: worker tcp://127.0.0.1:")
    assert f"(robustgmm {real['robustgmm']} there; robustgmm 0.0.1 here)" in line
    # a worker that joins after the check: each task checks its worker again
    spec = read_model(project)
    panels = grid.load_panels(spec)
    variants = grid.plan(spec, panels, counts=False)
    with Client(dask_cluster.address, timeout=30, set_as_default=True):
        with pytest.raises(InputError, match=rf"robustgmm {real['robustgmm']} there; "
                                             "robustgmm 0.0.1 here"):
            runner.run_variants(variants[:4], panels, backend="dask")


def cli_command(*args):
    return [sys.executable, "-m", "robustgmm", *map(str, args)]
