"""Shared builders for the reliability tests (faults, determinism, safety).

Data come from :mod:`robustgmm.simulate` (a known data-generating process); nothing
here touches the reference data set.

The subprocess harness: a ``sitecustomize.py`` written into a temporary folder and put
on ``PYTHONPATH`` is imported at start-up by the ``robustgmm`` command *and by every
worker process it starts* (loky workers inherit the environment). Driven by
environment variables, it

* counts estimations: ``ROBUSTGMM_TEST_COUNT=<file>`` appends ``start N PID`` /
  ``done N`` (N = variants in the share group, PID = the process estimating it)
  around every ``core.fit_family`` call;
* paces them: ``ROBUSTGMM_TEST_PACE=<seconds>`` sleeps at the start of each group, so
  that a signal can be sent while the audit is certainly mid-run;
* forbids the network: ``ROBUSTGMM_TEST_NONET=<file>`` installs an audit hook
  (PEP 578) that logs and refuses every internet socket connection, send and name
  look-up.
"""
from __future__ import annotations

import json
import os
import re
import subprocess
import sys
from pathlib import Path

from helpers_toml import spec_to_toml
from robustgmm.modelfile import spec_from_dict

from helpers_audit import model_dict, write_panel

HARNESS = r'''
import os, sys, time

_count = os.environ.get("ROBUSTGMM_TEST_COUNT")
if _count:
    from robustgmm import core as _core
    _real = _core.fit_family
    _pace = float(os.environ.get("ROBUSTGMM_TEST_PACE", "0"))

    def _note(text):
        with open(_count, "a") as handle:  # O_APPEND: one line per write, from any process
            handle.write(text + "\n")

    def fit_family(specs, panel, **kw):
        _note(f"start {len(specs)} {os.getpid()}")
        time.sleep(_pace)
        out = _real(specs, panel, **kw)
        _note(f"done {len(specs)}")
        return out

    _core.fit_family = fit_family

_nonet = os.environ.get("ROBUSTGMM_TEST_NONET")
if _nonet:
    import socket as _socket
    _INET = (_socket.AF_INET, _socket.AF_INET6)
    _LOOKUPS = ("socket.getaddrinfo", "socket.gethostbyname", "socket.gethostbyaddr",
                "socket.gethostbyname_ex", "socket.getnameinfo", "urllib.Request")

    def _refuse(event, args):
        culprit = None
        if event in _LOOKUPS:
            culprit = args
        elif event in ("socket.connect", "socket.sendto", "socket.sendmsg"):
            if getattr(args[0], "family", None) in _INET:
                culprit = args[1:]
        if culprit is not None:
            with open(_nonet, "a") as handle:
                handle.write(f"{os.getpid()} {event} {culprit!r}\n")
            raise PermissionError(f"network access refused by the test: {event}")

    sys.addaudithook(_refuse)
'''


def install_harness(folder: Path) -> Path:
    folder = Path(folder)
    folder.mkdir(parents=True, exist_ok=True)
    (folder / "sitecustomize.py").write_text(HARNESS)
    return folder


def harness_env(harness: Path, **variables) -> dict:
    env = dict(os.environ, MPLBACKEND="Agg")
    env.pop("ROBUSTGMM_DEBUG", None)
    env["PYTHONPATH"] = os.pathsep.join(filter(None, [str(harness), env.get("PYTHONPATH")]))
    env.update({k: str(v) for k, v in variables.items()})
    return env


def write_model(folder: Path, vary=None, panel_kw=None, name="model.toml", **sections) -> Path:
    """A model file (with its simulated panel.csv beside it) in ``folder``."""
    folder = Path(folder)
    folder.mkdir(parents=True, exist_ok=True)
    if not (folder / "panel.csv").exists():
        write_panel(folder, **(panel_kw or {}))
    spec = spec_from_dict(model_dict(vary, **sections), base_dir=folder)
    text = spec_to_toml(spec).replace(str(folder / "panel.csv"), "panel.csv")
    path = folder / name
    path.write_text(text)
    return path


def robustgmm_command(*args) -> list[str]:
    return [sys.executable, "-m", "robustgmm", *map(str, args)]


def run_cli(*args, env=None, timeout=600, cwd=None) -> subprocess.CompletedProcess:
    return subprocess.run(robustgmm_command(*args), capture_output=True, text=True,
                          env=env or harness_env(Path("/nonexistent")), timeout=timeout,
                          cwd=cwd)


def count_estimations(counter: Path) -> int:
    """Variants estimated (finished share groups) according to the harness counter."""
    if not counter.exists():
        return 0
    return sum(int(line.split()[1]) for line in counter.read_text().splitlines()
               if line.startswith("done "))


def started_pids(counter: Path) -> list[int]:
    """The processes that started a share group, in order."""
    if not counter.exists():
        return []
    return [int(line.split()[2]) for line in counter.read_text().splitlines()
            if line.startswith("start ")]


def kill_started_worker(proc, counter: Path, index: int, timeout: float = 300.0):
    """Wait until ``index + 1`` processes have started a share group for the run
    ``proc`` (the harness's ``counter``), SIGKILL the one at ``index`` (it is then in
    its group's paced start) and wait for ``proc`` to end; return its (stdout,
    stderr). ``proc`` is killed if anything goes wrong on the way."""
    import signal
    import time
    try:
        deadline = time.monotonic() + timeout
        while len(started_pids(counter)) <= index:
            assert proc.poll() is None, proc.communicate()
            assert time.monotonic() < deadline, "no worker started the group in time"
            time.sleep(0.02)
        victim = started_pids(counter)[index]
        assert victim != proc.pid
        os.kill(victim, signal.SIGKILL)
        return proc.communicate(timeout=timeout)
    finally:
        if proc.poll() is None:
            proc.kill()


def groups_started(counter: Path) -> int:
    if not counter.exists():
        return 0
    return sum(1 for line in counter.read_text().splitlines() if line.startswith("start "))


#: Manifest entries that describe the run rather than its results (timings, the
#: clock, worker counts, cache hits), left out when outputs are compared.
VOLATILE_MANIFEST = ("timings", "created_utc", "run")
#: Lines of report.html / report.md that show those entries (e.g. ``run.wall_seconds``).
VOLATILE_LINE = re.compile(rb"created_utc|created\\_utc|\b(run|timings)\.[a-z\\_]+")


def output_files(out: Path, *, skip=(".cache",)) -> dict[str, bytes]:
    """Every file of an output folder (relative path -> bytes), the cache excluded;
    manifest.json without its volatile entries."""
    out = Path(out)
    files = {}
    for path in sorted(out.rglob("*")):
        rel = path.relative_to(out)
        if not path.is_file() or rel.parts[0] in skip or rel.parts[0].startswith(".robustgmm-"):
            continue  # robustgmm's bookkeeping (ownership record, lock) is not output
        data = path.read_bytes()
        if rel.name == "manifest.json":
            manifest = json.loads(data)
            for key in VOLATILE_MANIFEST:
                manifest.pop(key, None)
            data = json.dumps(manifest, sort_keys=True).encode()
        elif rel.suffix in (".html", ".md"):  # the report's copy of the manifest
            data = b"\n".join(line for line in data.split(b"\n")
                              if not VOLATILE_LINE.search(line))
        files[str(rel)] = data
    return files


def tree(folder: Path) -> dict[str, tuple[int, int, bytes]]:
    """Every file (or link) under ``folder`` with its size, mtime and content (to see
    what changed); folders themselves are left out."""
    out = {}
    for path in Path(folder).rglob("*"):
        if path.is_dir() and not path.is_symlink():
            continue
        st = path.lstat()
        data = path.read_bytes() if path.is_file() else b""
        out[str(path)] = (st.st_size, st.st_mtime_ns, data)
    return out
