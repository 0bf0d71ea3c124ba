"""``robustgmm bench``: speed and scale of the estimation core, as ratios.

Workloads on simulated panels (:mod:`robustgmm.simulate`, a known process),
each reported as a ratio of two timings taken in the same run, so that the figures
mean the same on a fast or a slow machine (issue 5 of the project):

1. **Marginal cost.** Extra time of a two-step system GMM fit (per-period
   instruments, one endogenous regressor, Windmeijer errors, AR tests,
   difference-in-Hansen included) when the units grow from ``N₁`` to ``N₂``
   (T = 10), divided by the extra time of one dense ``Z'Z`` (numpy matmul) of the
   stacked instrument matrix with the same rows and columns. Target ≤ 3 (aim 1).
2. **Scale.** A collapsed two-step system fit (T = 8) run from the data file
   (reading, lags, instruments and the fit all count) in a fresh process per size;
   peak memory from ``resource.getrusage`` (target < 3 GB at N = 200,000; aim
   N = 1,000,000 under 8 GB) and the time ratio when N grows 4× from 50,000
   (target ≤ 4.8).
3. **Audit throughput.** 64 variants (equations × form × 4 last_lag × steps ×
   transform) on N = 2,000, T = 10: shared work (:func:`robustgmm.core.fit_family`
   over :func:`robustgmm.core.share_key` groups) and the audit itself against the
   same variants fitted one by one (target ≤ 0.6), and ``jobs=2`` against
   ``jobs=1`` (target ≤ 0.75 on two cores); the audit without the dropping-units
   analysis (``influence = "none"``), which the one-by-one side does not do.
4. **Reference library.** Our two-step fit against linearmodels ``IVGMM`` with a
   weight clustered by unit on the identical stacked forward-orthogonal-deviations
   problem (target ≤ 0.5). Our time includes building the transformed rows and
   instruments from the panel and every diagnostic; theirs starts from the stacked
   arrays.
5. **Calibrated Monte Carlo** (:func:`simulation`).
6. **Command-line parallelism.** ``robustgmm audit --jobs 2`` against ``--jobs 1``,
   each a fresh process: a 32-variant audit (N = 3,000, T = 9; target ≤ 1.05: small
   audits run in the command's process) and a 200-variant one (N = 5,000, T = 12;
   target ≤ 0.65 and under 60 s). Workloads 3 and 5 start their workers whatever
   the estimate (``start_workers=True``): they measure the parallel speed itself.
7. **Data layer.** Reading, validating and laying out the panel against the fit at
   N = 200,000 for CSV and parquet (target ≤ 0.3), and the command line's marginal
   cost of a fit from N = 4,000 to 16,000 against the dense ``Z'Z`` of the added
   rows (target ≤ 2).
8. **Dropping units.** At N = 5,000 (T = 10, collapsed two-step system GMM): the
   per-unit sums and the influence of every unit on every coefficient against one
   fit (target ≤ 2), and one greedy step (an exact refit without the units dropped
   so far and the influence on the reduced sample) against one fit (target ≤ 0.2);
   and a 48-variant audit (N = 400, T = 10, the grid of workload 5) with the base
   model's dropping-units analysis against the same audit without it (target ≤ 2).

Timings are the best of a few repeats (``time.perf_counter``), interleaved between
the two sides of a ratio so that load from other processes hits both alike. The
``--quick`` mode uses smaller panels so that CI stays fast; its ratios are
dominated by fixed costs and are not the targets. Nothing here is a pass/fail
test: the tests only check that the command runs.
"""
from __future__ import annotations

import contextlib
import dataclasses
import datetime as _dt
import gc
import json
import math
import os
import platform
import resource
import subprocess
import sys
import tempfile
import time
from dataclasses import dataclass
from pathlib import Path
from typing import Callable

import numpy as np

from . import __version__
from .atomic import atomic_write_text

GB = 1024 ** 3


@dataclass(frozen=True)
class Sizes:
    """Workload sizes of one bench mode."""

    name: str
    marginal_units: tuple[int, int] = (4_000, 16_000)
    marginal_periods: int = 10
    scale_units: tuple[int, int] = (50_000, 200_000)
    scale_aim_units: int | None = 1_000_000
    scale_periods: int = 8
    audit_units: int = 2_000
    audit_periods: int = 10
    reference_units: int = 2_000
    reference_periods: int = 10
    repeats: int = 3
    #: the calibrated Monte Carlo (issue 15): a 48-variant grid, R replications
    sim_units: int = 400
    sim_large_units: int = 5_000
    sim_periods: int = 10
    sim_reps: int = 200
    sim_scale_reps: int = 10
    #: the command line's parallelism (issue 17): a small audit (32 variants) and,
    #: when ``cli_large_units`` is set, a 200-variant one
    cli_small_units: int | None = 3_000
    cli_small_periods: int = 9
    cli_large_units: int | None = 5_000
    cli_large_periods: int = 12
    cli_repeats: int = 3
    #: the data layer against the fit, and the command line's marginal cost
    data_units: int = 200_000
    data_periods: int = 8
    cli_marginal_units: tuple[int, int] = (4_000, 16_000)
    #: dropping units (issue 16): influence and one greedy step against one fit
    drop_units: int = 5_000
    drop_periods: int = 10


FULL = Sizes("full")
QUICK = Sizes("quick", marginal_units=(1_000, 4_000), scale_units=(5_000, 20_000),
              scale_aim_units=None, audit_units=500, reference_units=500, repeats=2,
              sim_reps=20, sim_large_units=2_000, cli_small_units=1_000,
              cli_large_units=None, cli_repeats=1, data_units=20_000,
              cli_marginal_units=(1_000, 4_000), drop_units=1_000)
#: For the tests: every workload runs, in seconds.
TINY = Sizes("tiny", marginal_units=(60, 120), marginal_periods=6, scale_units=(80, 160),
             scale_aim_units=None, scale_periods=6, audit_units=60, audit_periods=6,
             reference_units=60, reference_periods=6, repeats=1, sim_units=60,
             sim_large_units=120, sim_periods=6, sim_reps=10, sim_scale_reps=10,
             cli_small_units=None, cli_large_units=None, cli_repeats=1,
             data_units=300, data_periods=6, cli_marginal_units=(60, 120),
             drop_units=60, drop_periods=6)
SIZES = {"full": FULL, "quick": QUICK, "tiny": TINY}
#: Environment variable that picks the sizes (``tiny`` for tests).
SIZES_ENV = "ROBUSTGMM_BENCH_SIZES"
#: BLAS threads for every timing (both sides of each ratio), as audits run their
#: variants (robustgmm.audit.runner.BLAS_THREADS). On a shared machine a multi-threaded
#: BLAS call waits for every one of its threads to be scheduled, which makes
#: thousands of small calls erratic; one thread keeps the ratios repeatable.
BLAS_THREADS_ENV = "ROBUSTGMM_BENCH_BLAS_THREADS"


def blas_threads() -> int:
    try:
        return max(1, int(os.environ.get(BLAS_THREADS_ENV, "1")))
    except ValueError:
        return 1


@contextlib.contextmanager
def _blas_limit(threads: int):
    """Limit BLAS threads in this process (numpy's and scipy's libraries)."""
    try:
        from threadpoolctl import threadpool_limits
    except ImportError:  # a declared dependency; without it the default threads run
        yield
        return
    import scipy.linalg  # noqa: F401  load the BLAS libraries before limiting them
    from . import core  # noqa: F401
    with threadpool_limits(limits=threads, user_api="blas"):
        yield


# ---------------------------------------------------------------------------
# small helpers
# ---------------------------------------------------------------------------
def _spec(**kw):
    from .simulate import panel_spec
    return panel_spec(**kw)


def _panel(n_units: int, n_periods: int, seed: int = 1):
    from .data import panel_from_frame
    from .simulate import simulate_panel
    df = simulate_panel(n_units, n_periods, seed=seed)
    return panel_from_frame(df, "unit", "period", ["y", "x", "w"])


def _best(fn: Callable[[], object]) -> float:
    start = time.perf_counter()
    fn()
    return time.perf_counter() - start


def _machine() -> dict:
    cpu = platform.processor() or platform.machine()
    try:
        with open("/proc/cpuinfo", encoding="utf-8") as fh:
            for line in fh:
                if line.startswith("model name"):
                    cpu = line.split(":", 1)[1].strip()
                    break
    except OSError:
        pass
    try:
        load = os.getloadavg()
    except OSError:
        load = (math.nan, math.nan, math.nan)
    try:
        with open("/proc/meminfo", encoding="utf-8") as fh:
            mem = int(fh.readline().split()[1]) * 1024
    except (OSError, ValueError, IndexError):
        mem = None
    return {"cpu": cpu, "cores": os.cpu_count(), "memory": mem, "load": load,
            "platform": platform.platform(), "python": platform.python_version()}


def _versions() -> dict:
    import numpy
    import pandas
    import scipy
    out = {"robustgmm": __version__, "numpy": numpy.__version__, "scipy": scipy.__version__,
           "pandas": pandas.__version__}
    try:
        import linearmodels
        out["linearmodels"] = linearmodels.__version__
    except ImportError:
        out["linearmodels"] = "not installed"
    try:
        import joblib
        out["joblib"] = joblib.__version__
    except ImportError:
        pass
    return out


@dataclass
class Outcome:
    """One workload's figures and ratios (printed and written to bench.md)."""

    title: str
    rows: list = dataclasses.field(default_factory=list)      # (figure, value) pairs
    ratios: list = dataclasses.field(default_factory=list)    # (name, ratio, limit, aim)
    notes: list = dataclasses.field(default_factory=list)


def _fmt_s(x: float) -> str:
    return f"{x:.3f} s" if x >= 0.01 else f"{x * 1000:.2f} ms"


# ---------------------------------------------------------------------------
# 1. marginal cost against a dense Z'Z
# ---------------------------------------------------------------------------
def marginal_cost(sizes: Sizes, echo=print) -> Outcome:
    from .core import fit
    from .core.dense import dense_rows
    out = Outcome("1. Marginal cost against one dense Z'Z")
    spec = _spec(equations="system", form="per-period", steps=2, time_effects=True)
    n1, n2 = sizes.marginal_units
    T = sizes.marginal_periods
    panels = {n: _panel(n, T, seed=11) for n in (n1, n2)}
    dense = {n: dense_rows(spec, panels[n])[2] for n in (n1, n2)}
    fit(spec, panels[n1])  # warm up imports and caches
    t_fit = {n: math.inf for n in (n1, n2)}
    t_zz = {n: math.inf for n in (n1, n2)}
    for _ in range(2 * sizes.repeats):  # cheap and noisy: more repeats
        for n in (n1, n2):
            t_fit[n] = min(t_fit[n], _best(lambda: fit(spec, panels[n])))
            z = dense[n]
            t_zz[n] = min(t_zz[n], _best(lambda: z.T @ z))
    res = fit(spec, panels[n2])
    rows2, L = dense[n2].shape
    out.rows += [
        ("model", f"two-step system GMM, per-period instruments, y[t-1], x endogenous, "
                  f"w exogenous, time effects; T = {T}; {L} instruments"),
        (f"fit, N = {n1:,}", _fmt_s(t_fit[n1])),
        (f"fit, N = {n2:,}", _fmt_s(t_fit[n2])),
        (f"dense Z'Z, N = {n1:,} ({dense[n1].shape[0]:,} × {L})", _fmt_s(t_zz[n1])),
        (f"dense Z'Z, N = {n2:,} ({rows2:,} × {L})", _fmt_s(t_zz[n2])),
        ("extra fit time", _fmt_s(t_fit[n2] - t_fit[n1])),
        ("extra Z'Z time", _fmt_s(t_zz[n2] - t_zz[n1])),
    ]
    extra_zz = t_zz[n2] - t_zz[n1]
    extra_fit = t_fit[n2] - t_fit[n1]
    if extra_zz > 0 and extra_fit > 0:
        ratio = extra_fit / extra_zz
    else:  # tiny workloads: the differences drown in timer noise
        ratio = math.nan
        out.notes.append("a time difference was not positive (below timer noise): "
                         "ratio not measured")
    out.ratios.append(("extra fit time / extra dense Z'Z time", ratio, 3.0, 1.0))
    out.notes.append(f"std. error kind {res.std_error_kind}; AR(2) and difference-in-Hansen "
                     "included in the fit time")
    del dense
    gc.collect()
    return out


# ---------------------------------------------------------------------------
# 2. scale: a fresh process per size, from the data file
# ---------------------------------------------------------------------------
def _peak_rss() -> tuple[int, int | None]:
    """(``ru_maxrss`` of this process in bytes, ``VmHWM`` from /proc when available).

    ``ru_maxrss`` also counts the resident size of the process that launched this
    one at the moment it did (Linux keeps the high-water mark across ``exec``), so
    the launcher stays small; ``VmHWM`` is the high-water mark of this process's
    own memory map and is shown beside it."""
    maxrss = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss * 1024
    hwm = None
    try:
        with open("/proc/self/status", encoding="utf-8") as fh:
            for line in fh:
                if line.startswith("VmHWM:"):
                    hwm = int(line.split()[1]) * 1024
    except (OSError, ValueError, IndexError):
        pass
    return maxrss, hwm


def _scale_child(path: str, n_periods: int, threads: int) -> dict:
    """Run in a fresh interpreter: read the file, lay out the panel, fit; report
    the phase times and the peak resident memory of this process."""
    with _blas_limit(threads):
        from .core import fit
        from .data import load_panel
        base_rss, base_hwm = _peak_rss()
        spec = dataclasses.replace(_spec(form="collapsed", equations="system", steps=2),
                                   data_file=Path(path), source=path)
        t0 = time.perf_counter()
        panel = load_panel(spec)
        t1 = time.perf_counter()
        res = fit(spec, panel)
        t2 = time.perf_counter()
    peak, hwm = _peak_rss()
    return {"read_seconds": t1 - t0, "fit_seconds": t2 - t1, "total_seconds": t2 - t0,
            "peak_rss": peak, "peak_hwm": hwm, "import_rss": base_hwm or base_rss,
            "units": res.counts.units, "instruments": res.counts.instruments,
            "estimate": res.term("y[t-1]").estimate}


def _read_child(path: str, warm: str, threads: int) -> dict:
    """Run in a fresh interpreter, as a command runs: read, validate and lay out the
    file once (:func:`robustgmm.data.load_panel`), then fit once; the two times. The
    readers' imports are done first, on the small file ``warm`` of the same format
    (start-up, the same at any N, is not the data layer's cost)."""
    with _blas_limit(threads):
        from .core import fit
        from .data import load_panel
        base = _spec(form="collapsed", equations="system", steps=2)
        load_panel(dataclasses.replace(base, data_file=Path(warm), source=warm))
        spec = dataclasses.replace(base, data_file=Path(path), source=path)
        t0 = time.perf_counter()
        panel = load_panel(spec)
        t1 = time.perf_counter()
        res = fit(base, panel)
        t2 = time.perf_counter()
    return {"read_seconds": t1 - t0, "fit_seconds": t2 - t1,
            "instruments": res.counts.instruments}


def _write_data(path: str, n_units: int, n_periods: int) -> dict:
    from .simulate import simulate_panel
    simulate_panel(n_units, n_periods, seed=5).to_parquet(path, index=False)
    return {"path": path}


def _child(*args: str) -> dict:
    """Run ``python -m robustgmm.bench ARGS`` in a fresh interpreter; its last line of
    output is JSON."""
    cmd = [sys.executable, "-m", "robustgmm.bench", *args]
    env = dict(os.environ)
    src = str(Path(__file__).resolve().parent.parent)
    env["PYTHONPATH"] = src + (os.pathsep + env["PYTHONPATH"] if env.get("PYTHONPATH") else "")
    proc = subprocess.run(cmd, capture_output=True, text=True, env=env)
    if proc.returncode != 0:
        tail = (proc.stderr.strip().splitlines() or ["no message"])[-1]
        raise RuntimeError(f"bench step {args[0]} failed: {tail}")
    return json.loads(proc.stdout.strip().splitlines()[-1])


def scale(sizes: Sizes, echo=print) -> Outcome:
    """Runs :func:`_scale_workload` in a fresh, small process: the peak memory that
    ``getrusage`` reports for a child includes its launcher's size (see
    :func:`_peak_rss`), and this process has held the other workloads' arrays."""
    data = _child("--scale-workload", json.dumps(dataclasses.asdict(sizes)))
    out = Outcome(data["title"], [tuple(r) for r in data["rows"]],
                  [tuple(r) for r in data["ratios"]], list(data["notes"]))
    for line in data.get("log", []):
        echo(line)
    return out


def _scale_workload(sizes: Sizes) -> dict:
    out = Outcome("2. Scale: collapsed two-step system fit from the data file")
    T = sizes.scale_periods
    n1, n2 = sizes.scale_units
    aim = sizes.scale_aim_units
    todo = [n1, n2] + ([aim] if aim else [])
    threads = blas_threads()
    results: dict = {}
    log = []
    with tempfile.TemporaryDirectory(prefix="robustgmm-bench-") as tmp:
        paths = {n: Path(tmp) / f"panel_{n}.parquet" for n in todo}
        for n in (n1, n2):
            # written by another process, so that this launcher stays small
            _child("--write-data", str(paths[n]), str(n), str(T))
        # the two sizes of the ratio alternate, so that load from other processes
        # falls on both alike; the best run of each counts
        for _ in range(max(1, sizes.repeats)):
            for n in (n1, n2):
                r = _child("--scale-child", str(paths[n]), str(T), str(threads))
                if n not in results or r["total_seconds"] < results[n]["total_seconds"]:
                    results[n] = r
        for n in (n1, n2):
            paths[n].unlink()
        if aim:
            _child("--write-data", str(paths[aim]), str(aim), str(T))
            results[aim] = _child("--scale-child", str(paths[aim]), str(T), str(threads))
            paths[aim].unlink()
    for n in todo:
        log.append(f"  scale N = {n:,}: {results[n]['total_seconds']:.2f} s, "
                   f"peak {results[n]['peak_rss'] / GB:.2f} GB")
    for n in todo:
        r = results[n]
        hwm = (f", own high-water mark {r['peak_hwm'] / GB:.2f} GB" if r.get("peak_hwm") else "")
        out.rows.append((f"N = {n:,}, T = {T} ({r['instruments']} instruments)",
                         f"read+layout {r['read_seconds']:.2f} s, fit {r['fit_seconds']:.2f} s, "
                         f"total {r['total_seconds']:.2f} s; peak memory (getrusage) "
                         f"{r['peak_rss'] / GB:.2f} GB{hwm}; after imports "
                         f"{r['import_rss'] / GB:.2f} GB"))
    ratio = results[n2]["total_seconds"] / results[n1]["total_seconds"]
    out.ratios.append((f"time(N = {n2:,}) / time(N = {n1:,})", ratio, 4.8 * (n2 / n1) / 4, None))
    out.ratios.append((f"peak memory at N = {n2:,} / 3 GB", results[n2]["peak_rss"] / (3 * GB),
                       1.0, None))
    if sizes.scale_aim_units:
        n3 = sizes.scale_aim_units
        out.ratios.append((f"peak memory at N = {n3:,} / 8 GB (aim)",
                           results[n3]["peak_rss"] / (8 * GB), 1.0, None))
    from .core.engine import DEFAULT_MEMORY_MB, MEMORY_ENV
    budget = os.environ.get(MEMORY_ENV) or DEFAULT_MEMORY_MB
    out.notes.append(f"data written as parquet; every run in a fresh interpreter, best of "
                     f"{max(1, sizes.repeats)} alternating runs per size (one run for the aim); "
                     f"memory budget of the core {budget} MB ({MEMORY_ENV})")
    return {"title": out.title, "rows": out.rows, "ratios": out.ratios, "notes": out.notes,
            "log": log}


# ---------------------------------------------------------------------------
# 3. audit throughput
# ---------------------------------------------------------------------------
AUDIT_VARY = dict(equations=("difference", "system"), form=("per-period", "collapsed"),
                  last_lag=(2, 3, 4, None), steps=(1, 2), transform=("fd", "fod"))


def audit_specs(base) -> list:
    """The 64 variant specs of the throughput workload (base settings replaced)."""
    import itertools
    keys = list(AUDIT_VARY)
    return [dataclasses.replace(base, **dict(zip(keys, combo)))
            for combo in itertools.product(*(AUDIT_VARY[k] for k in keys))]


def audit_throughput(sizes: Sizes, echo=print) -> Outcome:
    from . import core
    out = Outcome("3. Audit throughput: 64 variants")
    N, T = sizes.audit_units, sizes.audit_periods
    panel = _panel(N, T, seed=21)
    base = _spec()
    specs = audit_specs(base)
    core.fit(specs[0], panel)  # warm-up
    from .audit import audit as run_audit
    t_single = math.inf
    t_family = math.inf
    for _ in range(sizes.repeats):
        t_single = min(t_single, _best(lambda: [_try_fit(core.fit, s, panel) for s in specs]))
        t_family = min(t_family, _best(lambda: _fit_grouped(core, specs, panel)))
    out.rows.append(("variants", f"{len(specs)} on N = {N:,}, T = {T}"))
    out.rows.append(("sum of one-by-one fits", _fmt_s(t_single)))
    groups = len({core.share_key(s) for s in specs})
    out.rows.append((f"shared work (fit_family over {groups} share_key groups)",
                     _fmt_s(t_family)))
    out.ratios.append(("core shared work / one by one", t_family / t_single, 0.6, None))
    # the variants' throughput: the one-by-one side fits the variants only, so the
    # audit runs without the dropping-units searches (their cost is workload 8's and
    # part of workload 6's command-line audits)
    spec = dataclasses.replace(_audit_base_spec(base), influence="none")
    with tempfile.TemporaryDirectory(prefix="robustgmm-bench-") as tmp:
        from .simulate import simulate_panel
        path = Path(tmp) / "panel.parquet"
        simulate_panel(N, T, seed=21).to_parquet(path, index=False)
        spec = dataclasses.replace(spec, data_file=path, source=str(path))
        runs = {1: [], 2: []}
        phases = {1: {}, 2: {}}  # manifest timings of each side's best run (informative)
        for _ in range(max(2, sizes.repeats)):
            for jobs in (1, 2):
                t0 = time.perf_counter()
                res = run_audit(spec, jobs=jobs, cache_dir=None, progress=False,
                                start_workers=True)
                runs[jobs].append(time.perf_counter() - t0)
                if len(runs[jobs]) > 1 and runs[jobs][-1] == min(runs[jobs][1:]):
                    phases[jobs] = res.manifest["timings"]
        t_jobs = {j: min(r[1:]) for j, r in runs.items()}
    out.rows.append(("audit, jobs = 1 (no cache)", _fmt_s(t_jobs[1])))
    out.rows.append(("audit, jobs = 2 (no cache; worker processes already started)",
                     _fmt_s(t_jobs[2])))
    out.rows.append(("audit, jobs = 2, first call (includes starting the workers)",
                     _fmt_s(runs[2][0])))
    out.rows.append(("of which estimating the variants, jobs = 1 / 2 (manifest run_seconds)",
                     f"{_fmt_s(phases[1].get('run_seconds', math.nan))} / "
                     f"{_fmt_s(phases[2].get('run_seconds', math.nan))}"))
    out.ratios.append(("audit (jobs = 1) / one-by-one fits", t_jobs[1] / t_single, 0.6, None))
    out.ratios.append(("audit jobs = 2 / jobs = 1", t_jobs[2] / t_jobs[1], 0.75, None))
    out.notes.append("the audit also reads the data file, plans the grid and estimates the "
                     "OLS/within bounds of every variant; the one-by-one sum is fits only")
    out.notes.append("the audit runs with [audit] influence = \"none\": the one-by-one side "
                     "has no dropping-units searches (workload 8 measures them)")
    return out


def _audit_base_spec(base):
    from .spec import Vary
    vary = Vary(**{k: tuple(v) for k, v in AUDIT_VARY.items()})
    return dataclasses.replace(base, vary=vary)


def _try_fit(fit, spec, panel):
    try:
        return fit(spec, panel)
    except Exception as exc:  # a failing variant is part of an audit
        return exc


def _fit_grouped(core, specs, panel):
    groups: dict = {}
    for s in specs:
        groups.setdefault(core.share_key(s), []).append(s)
    return [core.fit_family(g, panel) for g in groups.values()]


# ---------------------------------------------------------------------------
# 4. against linearmodels IVGMM
# ---------------------------------------------------------------------------
def reference(sizes: Sizes, echo=print) -> Outcome:
    from .core import fit
    from .core.dense import dense_rows
    out = Outcome("4. Against linearmodels IVGMM (clustered weight), identical FOD problem")
    try:
        from linearmodels.iv import IVGMM
    except ImportError:
        out.notes.append("linearmodels is not installed (it comes with the test extra): "
                         "not measured")
        return out
    N, T = sizes.reference_units, sizes.reference_periods
    panel = _panel(N, T, seed=31)
    spec = _spec(equations="difference", transform="fod", steps=2, form="per-period",
                 time_effects=True)
    y, X, Z, unit, _ = dense_rows(spec, panel, level=False)

    def theirs():
        return IVGMM(y, None, X, Z, weight_type="clustered", clusters=unit).fit(
            cov_type="clustered", clusters=unit)

    ref = theirs()
    ours = fit(spec, panel)
    t_ours = t_ref = math.inf
    for _ in range(sizes.repeats):
        t_ref = min(t_ref, _best(theirs))
        t_ours = min(t_ours, _best(lambda: fit(spec, panel)))
    diff = float(np.max(np.abs(np.asarray(ref.params) - ours.params)))
    out.rows += [
        ("problem", f"difference GMM, FOD, per-period, time effects; N = {N:,}, T = {T}; "
                    f"{Z.shape[0]:,} rows × {Z.shape[1]} instruments, {X.shape[1]} regressors"),
        ("linearmodels IVGMM (model + fit)", _fmt_s(t_ref)),
        ("robustgmm fit (from the panel, all diagnostics)", _fmt_s(t_ours)),
        ("largest coefficient difference", f"{diff:.1e}"),
        ("Hansen J: ours / linearmodels", f"{ours.tests['hansen'].statistic:.6f} / "
                                           f"{float(ref.j_stat.stat):.6f}"),
    ]
    out.ratios.append(("robustgmm / linearmodels", t_ours / t_ref, 0.5, None))
    return out


# ---------------------------------------------------------------------------
# the report
#: The grid of the Monte Carlo workload: 2 x 2 x 2 x 2 x 3 = 48 variants.
SIM_VARY = dict(equations=("difference", "system"), transform=("fd", "fod"), steps=(1, 2),
                form=("per-period", "collapsed"), last_lag=(3, 4, None))


def simulation(sizes: Sizes, echo=print) -> Outcome:
    """The calibrated Monte Carlo (robustgmm.montecarlo): one replication of a
    48-variant grid against the estimation time of one audit of the same model on
    the real data (manifest variant_seconds; the two alternate, best of the repeats),
    R replications with jobs 1 and 2 (in two alternating halves), the CPU time per
    replication of each, and the cost per replication from N = sim_units to
    sim_large_units."""
    from .audit import audit as run_audit
    from .montecarlo import simulate
    from .simulate import simulate_panel
    from .spec import Vary
    out = Outcome("5. Calibrated Monte Carlo: 48 variants")
    N, T, R = sizes.sim_units, sizes.sim_periods, sizes.sim_reps
    spec0 = dataclasses.replace(_spec(form="collapsed", last_lag=4),
                                vary=Vary(**{k: tuple(v) for k, v in SIM_VARY.items()}))
    with tempfile.TemporaryDirectory(prefix="robustgmm-bench-") as tmp:
        def spec_for(n):
            path = Path(tmp) / f"panel{n}.parquet"
            simulate_panel(n, T, seed=31).to_parquet(path, index=False)
            return dataclasses.replace(spec0, data_file=path, source=str(path))
        spec = spec_for(N)
        # one replication against one audit, side by side: audit and a short run of
        # replications (in this process) alternate, best of the repeats each, so a
        # change in the machine's load between them does not enter the ratio
        t_audits, per_reps = [], []
        for _ in range(max(1, sizes.repeats)):
            audited = run_audit(spec, jobs=1, cache_dir=None, progress=False)
            t_audits.append(audited.manifest["run"]["variant_seconds"])
            t0 = time.perf_counter()
            simulate(spec, reps=sizes.sim_scale_reps, seed=2, jobs=1, cache_dir=None,
                     progress=False)
            per_reps.append((time.perf_counter() - t0) / sizes.sim_scale_reps)
        t_audit, per_rep_small = min(t_audits), min(per_reps)
        n_var = audited.manifest["run"]["variants"]
        # jobs 1 against jobs 2: R replications each, run as two halves in the order
        # 1, 2, 1, 2 (each half starts its workers), so both see the same load drift
        t_sim, cpu_sum, parent_cpu = {1: 0.0, 2: 0.0}, {1: 0.0, 2: 0.0}, {1: 0.0, 2: 0.0}
        from .montecarlo.replicate import MIN_REPS
        halves = (R // 2, R - R // 2) if R >= 2 * MIN_REPS else (R,)
        for h, reps in enumerate(halves):
            for jobs in (1, 2):
                t0, c0 = time.perf_counter(), time.process_time()
                run = simulate(spec, reps=reps, seed=1 + h, jobs=jobs, cache_dir=None,
                               progress=False, start_workers=True).run
                t_sim[jobs] += time.perf_counter() - t0
                parent_cpu[jobs] += time.process_time() - c0
                cpu_sum[jobs] += run.get("cpu_seconds", math.nan)
        cpu = {j: cpu_sum[j] / R for j in (1, 2)}
        per_rep = per_rep_small
        big = spec_for(sizes.sim_large_units)
        t0 = time.perf_counter()
        simulate(big, reps=sizes.sim_scale_reps, seed=1, jobs=1, cache_dir=None, progress=False)
        per_rep_big = (time.perf_counter() - t0) / sizes.sim_scale_reps
    out.rows.append(("grid", f"{n_var} variants on N = {N:,}, T = {T}"))
    out.rows.append(("audit estimation time (sum of the variants' fits, jobs = 1; best of "
                     f"{len(t_audits)})", _fmt_s(t_audit)))
    out.rows.append((f"one replication, jobs = 1 (runs of {sizes.sim_scale_reps} alternating "
                     f"with the audits; best of {len(per_reps)})", _fmt_s(per_rep)))
    runs = f"{len(halves)} run{'s' if len(halves) > 1 else ''}"
    out.rows.append((f"{R} replications, jobs = 1 ({runs})", _fmt_s(t_sim[1])))
    out.rows.append((f"{R} replications, jobs = 2 ({runs}, alternating with jobs = 1; "
                     "each starts its workers)", _fmt_s(t_sim[2])))
    # CPU time per replication (summed in the processes that ran them): equal for
    # jobs 1 and 2 when parallel running adds no work, whatever the load; CPU time
    # over (wall time x jobs) says how much of a core each process got
    for jobs in (1, 2):
        out.rows.append((f"CPU time per replication, jobs = {jobs} (share of a core each "
                         f"process got: {cpu[jobs] * R / (jobs * t_sim[jobs]):.0%})"
                         if t_sim[jobs] > 0 else f"CPU time per replication, jobs = {jobs}",
                         _fmt_s(cpu[jobs])))
    # informative: what the parent process spends besides the replications with
    # workers (calibration, the plan, dispatching, the summary; its share of the
    # parallel run's cost)
    out.rows.append(("CPU time of the parent process, jobs = 2 (calibration, dispatch, "
                     f"summary; {len(halves)} run{'s' if len(halves) > 1 else ''})",
                     _fmt_s(parent_cpu[2])))
    out.rows.append((f"one replication at N = {sizes.sim_large_units:,} "
                     f"({sizes.sim_scale_reps} replications)", _fmt_s(per_rep_big)))
    out.ratios.append(("one replication / audit estimation time", per_rep / t_audit, 1.25, None))
    out.ratios.append(("replications jobs = 2 / jobs = 1", t_sim[2] / t_sim[1], 0.6, None))
    growth = (per_rep_big / per_rep_small) / (sizes.sim_large_units / N)
    out.ratios.append((f"cost per replication N = {sizes.sim_large_units:,} / N = {N:,}, "
                       "over the growth in N", growth, 1.0, None))
    if R == 200:
        out.ratios.append(("200 replications with jobs = 2 / 60 s", t_sim[2] / 60.0, 1.0, None))
    out.notes.append("a replication draws its panel in the worker, builds each sample's "
                     "panel and estimates every share group (without the OLS/within "
                     "bounds); the audit figure is the fits alone")
    out.notes.append("the jobs ratio needs two free cores: on a machine loaded by other "
                     "processes each worker gets less than a core (the shares above), "
                     "so compare the CPU times per replication for the cost of running "
                     "in parallel")
    return out


# ---------------------------------------------------------------------------
# 6. the command line's parallelism (issue 17)
# ---------------------------------------------------------------------------
#: The small audit: 2 x 2 x 2 x 2 x 2 = 32 variants.
CLI_SMALL_VARY = {"equations": ["difference", "system"], "form": ["per-period", "collapsed"],
                  "transform": ["fd", "fod"], "steps": [1, 2], "last_lag": [3, "all"]}
#: The large audit: 2 x 2 x 2 x 5 = 40 share groups of 5 windows = 200 variants.
CLI_LARGE_VARY = {"equations": ["difference", "system"], "form": ["per-period", "collapsed"],
                  "transform": ["fd", "fod"], "last_lag": [2, 3, 4, 6, "all"]}
CLI_LARGE_LAGS = {"x": [[0], [0, 1], [1], [0, 1, 2], [1, 2]]}


def _toml_value(v) -> str:
    if isinstance(v, str):
        return json.dumps(v)
    if isinstance(v, list):
        return "[" + ", ".join(_toml_value(x) for x in v) + "]"
    return str(v).lower() if isinstance(v, bool) else str(v)


def _model_file(folder: Path, data: Path, vary: dict | None = None,
                lags: dict | None = None, form: str = "per-period") -> Path:
    """A model file of the bench's model (:func:`_spec`) on ``data``."""
    lines = ["[data]", f"file = {json.dumps(data.name)}", 'unit = "unit"', 'period = "period"',
             "[model]", 'outcome = "y"', "outcome_lags = [1]", "time_effects = true",
             "[[model.regressors]]", 'name = "x"', "lags = [0]", 'role = "endogenous"',
             "[[model.regressors]]", 'name = "w"', "lags = [0]", 'role = "exogenous"',
             "[method]", 'equations = "system"', 'transform = "fd"', "steps = 2",
             "[instruments]", "first_lag = 2", f"form = {json.dumps(form)}"]
    if vary:
        lines.append("[audit.vary]")
        lines += [f"{k} = {_toml_value(v)}" for k, v in vary.items()]
    if lags:
        lines.append("[audit.vary.lags]")
        lines += [f"{k} = {_toml_value(v)}" for k, v in lags.items()]
    path = folder / f"model_{data.stem}_{len(vary or {})}_{len(lags or {})}.toml"
    path.write_text("\n".join(lines) + "\n", encoding="utf-8")
    return path


def _cli_env() -> dict:
    env = dict(os.environ)
    src = str(Path(__file__).resolve().parent.parent)
    env["PYTHONPATH"] = src + (os.pathsep + env["PYTHONPATH"] if env.get("PYTHONPATH") else "")
    threads = str(blas_threads())  # the fit command: the bench's BLAS threads
    for name in ("OPENBLAS_NUM_THREADS", "OMP_NUM_THREADS", "MKL_NUM_THREADS"):
        env[name] = threads
    return env


def _cli_seconds(*args) -> tuple[float, str]:
    """Wall time of ``python -m robustgmm ARGS`` (a fresh process, as a user runs it)
    and its standard error."""
    t0 = time.perf_counter()
    proc = subprocess.run([sys.executable, "-m", "robustgmm", *map(str, args)],
                          capture_output=True, text=True, env=_cli_env())
    seconds = time.perf_counter() - t0
    if proc.returncode != 0:
        tail = (proc.stderr.strip().splitlines() or ["no message"])[-1]
        raise RuntimeError(f"robustgmm {args[0]} failed: {tail}")
    return seconds, proc.stderr


def _command_child(args: list[str], threads: int) -> dict:
    """Run in a fresh interpreter: import what the command imports, then time the
    command itself (:func:`robustgmm.cli.main`: its checks, reading the data, the
    estimation, the summary; standard output discarded), wall and CPU time. The
    interpreter's start-up and the imports, the same at any N, vary by ±0.2 s from
    process to process on a shared machine, more than the difference measured."""
    import io
    with _blas_limit(threads):
        from . import cli, core, data, modelfile  # noqa: F401
        try:
            import pyarrow.csv  # noqa: F401  (the CSV reader's engine)
        except ImportError:
            pass
        sink = io.StringIO()
        c0, t0 = time.process_time(), time.perf_counter()
        with contextlib.redirect_stdout(sink):
            code = cli.main(list(args))
        wall, cpu = time.perf_counter() - t0, time.process_time() - c0
    if code != 0:
        raise RuntimeError(f"robustgmm {args[0]} exited with {code}")
    return {"seconds": wall, "cpu_seconds": cpu}


def _where_line(stderr: str) -> str:
    for line in stderr.splitlines():
        if "estimated" in line and ("in this process" in line or "worker processes" in line):
            return line.removeprefix("robustgmm: ")
    return "no estimate printed"


def cli_parallel(sizes: Sizes, echo=print) -> Outcome:
    """``robustgmm audit --jobs 2`` against ``--jobs 1`` through the command line (a
    fresh process each, the report included, no cache), the two alternating and the
    best of each counted: a small audit (parallelism must not cost time: ≤ 1.05) and
    a 200-variant one (≤ 0.65, and under 60 s)."""
    from .simulate import simulate_panel
    out = Outcome("6. Command line: parallel workers against one process")
    cases = [("small", sizes.cli_small_units, sizes.cli_small_periods, CLI_SMALL_VARY, None,
              1.05)] if sizes.cli_small_units else []
    if not cases:  # the tests' sizes: each run would be mostly the report's fixed cost
        out.notes.append("not run at these sizes")
        return out
    if sizes.cli_large_units:
        cases.append(("large", sizes.cli_large_units, sizes.cli_large_periods, CLI_LARGE_VARY,
                      CLI_LARGE_LAGS, 0.65))
    with tempfile.TemporaryDirectory(prefix="robustgmm-bench-") as tmp:
        tmp = Path(tmp)
        for name, N, T, vary, lags, limit in cases:
            data = tmp / f"{name}.parquet"
            simulate_panel(N, T, seed=41).to_parquet(data, index=False)
            model = _model_file(tmp, data, vary, lags)
            best = {1: math.inf, 2: math.inf}
            estimation = {1: math.inf, 2: math.inf}  # the manifest's run_seconds
            influence = {1: math.inf, 2: math.inf}  # its influence_seconds (informative)
            where = {}
            n_variants = None
            for _ in range(max(1, sizes.cli_repeats)):
                for jobs in (1, 2):
                    folder = tmp / f"out_{name}_{jobs}"
                    seconds, err = _cli_seconds("audit", model, "--out", folder, "--jobs", jobs,
                                                "--no-cache", "--force")
                    best[jobs] = min(best[jobs], seconds)
                    where[jobs] = _where_line(err)
                    manifest = json.loads((folder / "manifest.json").read_text())
                    n_variants = manifest["run"]["variants"]
                    estimation[jobs] = min(estimation[jobs],
                                           manifest["timings"]["run_seconds"])
                    influence[jobs] = min(influence[jobs],
                                          manifest["timings"].get("influence_seconds", 0.0))
            out.rows.append((f"{name} audit: {n_variants} variants, N = {N:,}, T = {T}",
                             f"--jobs 1 {_fmt_s(best[1])}, --jobs 2 {_fmt_s(best[2])} "
                             f"(--jobs 2 said: {where[2]}); of which estimating the "
                             f"variants beside the base model's dropping units "
                             f"{_fmt_s(estimation[1])} and {_fmt_s(estimation[2])}, the "
                             f"rest of the dropping units {_fmt_s(influence[1])} and "
                             f"{_fmt_s(influence[2])}"))
            out.ratios.append((f"{name} audit ({n_variants} variants) --jobs 2 / --jobs 1",
                               best[2] / best[1], limit, None))
            if name == "large":
                out.ratios.append(("200-variant audit with --jobs 2 / 60 s", best[2] / 60.0,
                                   1.0, None))
    out.notes.append(f"each run a fresh `robustgmm audit ... --no-cache` process (reading, "
                     f"estimating, the report), best of {max(1, sizes.cli_repeats)} "
                     "alternating runs per side")
    return out


# ---------------------------------------------------------------------------
# 7. the data layer against the fit (issue 17)
# ---------------------------------------------------------------------------
def data_layer(sizes: Sizes, echo=print) -> Outcome:
    """Reading, validating and laying out the panel (:func:`robustgmm.data.load_panel`)
    against the fit it feeds, each once in a fresh process as a command runs them
    (:func:`_read_child`), for CSV and parquet (target ≤ 0.3); and the command line's
    marginal cost: the extra time of ``robustgmm fit`` (a fresh process, timed from the
    command's start, reading the CSV file included: :func:`_command_child`) from N₁ to
    N₂ units against the extra time of the dense ``Z'Z`` of the added rows (target ≤ 2)."""
    from .core.dense import dense_rows
    from .simulate import simulate_panel
    out = Outcome("7. Data layer: reading, validating and laying out against the fit")
    N, T = sizes.data_units, sizes.data_periods
    with tempfile.TemporaryDirectory(prefix="robustgmm-bench-") as tmp:
        tmp = Path(tmp)
        frame = simulate_panel(N, T, seed=51)
        paths = {".csv": tmp / "panel.csv", ".parquet": tmp / "panel.parquet"}
        warm = {".csv": tmp / "warm.csv", ".parquet": tmp / "warm.parquet"}
        small = frame[frame["unit"].isin(frame["unit"].unique()[:50])]
        frame.to_csv(paths[".csv"], index=False)
        frame.to_parquet(paths[".parquet"], index=False)
        small.to_csv(warm[".csv"], index=False)
        small.to_parquet(warm[".parquet"], index=False)
        del frame, small
        t_read = {k: math.inf for k in paths}
        t_fit = {k: math.inf for k in paths}
        for _ in range(max(2, sizes.repeats)):
            for k in paths:  # alternating, a fresh process each
                timed = _child("--read-child", str(paths[k]), str(warm[k]), str(blas_threads()))
                t_read[k] = min(t_read[k], timed["read_seconds"])
                t_fit[k] = min(t_fit[k], timed["fit_seconds"])
        out.rows.append(("model", f"collapsed two-step system GMM, N = {N:,}, T = {T}, "
                                  f"{timed['instruments']} instruments"))
        for k in paths:
            out.rows.append((f"{k[1:]} file: read + validate + layout; fit",
                             f"{_fmt_s(t_read[k])}; {_fmt_s(t_fit[k])}"))
            out.ratios.append((f"read + validate + layout ({k[1:]}) / fit, N = {N:,}",
                               t_read[k] / t_fit[k], 0.3, None))

        # the command line's marginal cost of a fit
        n1, n2 = sizes.cli_marginal_units
        Tm = sizes.marginal_periods
        spec = _spec(equations="system", form="per-period", steps=2, time_effects=True)
        models, dense = {}, {}
        for n in (n1, n2):
            data = tmp / f"fit{n}.csv"
            simulate_panel(n, Tm, seed=11).to_csv(data, index=False)
            models[n] = _model_file(tmp, data)
            dense[n] = dense_rows(spec, _panel(n, Tm, seed=11))[2]
        t_cli = {n: math.inf for n in (n1, n2)}
        cpu_cli = {n: math.inf for n in (n1, n2)}
        t_zz = {n: math.inf for n in (n1, n2)}
        cpu_zz = {n: math.inf for n in (n1, n2)}
        # a fresh process per run, the command timed after the imports (_command_child):
        # whole process times differ by ±0.2 s between runs, and best-of-6 ratios of
        # the same code ranged from 0.7 to 5.6
        cli_runs = 2 * max(2, sizes.repeats)
        for _ in range(cli_runs):
            for n in (n1, n2):
                timed = _child("--command-child", str(blas_threads()), "fit", str(models[n]))
                t_cli[n] = min(t_cli[n], timed["seconds"])
                cpu_cli[n] = min(cpu_cli[n], timed["cpu_seconds"])
                z = dense[n]
                for _ in range(3):
                    c0 = time.process_time()
                    t_zz[n] = min(t_zz[n], _best(lambda: z.T @ z))
                    cpu_zz[n] = min(cpu_zz[n], time.process_time() - c0)
        L = dense[n2].shape[1]
        extra_cli, extra_zz = t_cli[n2] - t_cli[n1], t_zz[n2] - t_zz[n1]
        out.rows.append((f"robustgmm fit (CSV, T = {Tm}, per-period system, {L} instruments)",
                         f"N = {n1:,} {_fmt_s(t_cli[n1])}, N = {n2:,} {_fmt_s(t_cli[n2])}"))
        out.rows.append((f"dense Z'Z", f"N = {n1:,} {_fmt_s(t_zz[n1])}, "
                                       f"N = {n2:,} {_fmt_s(t_zz[n2])}"))
        ratio = extra_cli / extra_zz if extra_cli > 0 and extra_zz > 0 else math.nan
        if not np.isfinite(ratio):
            out.notes.append("a time difference was not positive (below timer noise): "
                             "ratio not measured")
        out.ratios.append(("command-line extra fit time / extra dense Z'Z time", ratio, 2.0,
                           None))
        extra_cpu, extra_zz_cpu = cpu_cli[n2] - cpu_cli[n1], cpu_zz[n2] - cpu_zz[n1]
        if extra_cpu > 0 and extra_zz_cpu > 0:
            # CPU time leaves out the time the process waited for a core, the largest
            # noise in the wall-clock difference on a shared machine
            out.notes.append(f"in CPU time: robustgmm fit N = {n1:,} {_fmt_s(cpu_cli[n1])}, "
                             f"N = {n2:,} {_fmt_s(cpu_cli[n2])}; extra fit / extra dense Z'Z "
                             f"{extra_cpu / extra_zz_cpu:.2f}")
        del dense
    out.notes.append("reading and the fit timed as a command runs them: once each in a "
                     "fresh process (the readers' imports done first on a 50-unit file), "
                     f"best of {max(2, sizes.repeats)} processes per format, alternating; "
                     "`robustgmm fit` in a fresh process per run, timed from the command's "
                     "start once the interpreter has started and imported the package "
                     "(start-up and imports, the same at any N, would cancel in the "
                     "difference but add ±0.2 s of noise), best of "
                     f"{2 * max(2, sizes.repeats)} runs per size, alternating")
    gc.collect()
    return out


# ---------------------------------------------------------------------------
# 8. dropping units (issue 16)
# ---------------------------------------------------------------------------
def dropping(sizes: Sizes, echo=print) -> Outcome:
    """The dropping-units analysis (robustgmm.core.influence, robustgmm.core.dropping)
    against one fit of the same model: the per-unit sums and the influence of every
    unit on every coefficient (targets: at most 2 fits), and one greedy step — an
    exact refit without one more unit and the influence on the reduced sample
    (target: at most 0.2 fits)."""
    from .core import fit, unit_sums
    out = Outcome("8. Dropping units: influence and one greedy step against one fit")
    N, T = sizes.drop_units, sizes.drop_periods
    spec = _spec(form="collapsed", last_lag=4, steps=2)
    panel = _panel(N, T, seed=41)
    fit(spec, panel)  # warm up
    wall = {"fit": math.inf, "infl": math.inf, "step": math.inf}
    cpu = dict(wall)

    def timed(name, fn):
        # wall and CPU time of one call, the best of the repeats kept for each: the
        # machine may be shared, and CPU time does not count waiting for a core
        w0, c0 = time.perf_counter(), time.process_time()
        fn()
        wall[name] = min(wall[name], time.perf_counter() - w0)
        cpu[name] = min(cpu[name], time.process_time() - c0)

    for rep in range(sizes.repeats):
        timed("fit", lambda: fit(spec, panel))
        holder = {}

        def influence():
            sums = holder["sums"] = unit_sums(spec, panel)
            sums.state(())
        timed("infl", influence)
        sums = holder["sums"]
        timed("step", lambda: sums.state((rep + 1, rep + 7)))
    t_fit, t_infl, t_step = wall["fit"], wall["infl"], wall["step"]
    out.rows += [
        ("model", f"two-step system GMM, collapsed instruments (lags 2-4), y[t-1], x "
                  f"endogenous, w exogenous, time effects; N = {N:,}, T = {T}"),
        ("one fit", _fmt_s(t_fit)),
        ("per-unit sums + influence of every unit on every coefficient", _fmt_s(t_infl)),
        ("one greedy step (exact refit without two units + influence)", _fmt_s(t_step)),
        ("CPU time: one fit / influence / one greedy step",
         " / ".join(_fmt_s(cpu[k]) for k in ("fit", "infl", "step"))),
    ]
    out.ratios.append(("influence / one fit", t_infl / t_fit, 2.0, None))
    out.ratios.append(("one greedy step / one fit", t_step / t_fit, 0.2, None))
    # issue 16: a 48-variant audit (the Monte Carlo workload's grid) with the default
    # dropping-units analysis of the base model against the same audit without it
    from .audit import audit as run_audit
    from .simulate import simulate_panel
    from .spec import Vary
    n_a, t_a = sizes.sim_units, sizes.sim_periods
    grid_spec = dataclasses.replace(_spec(form="collapsed", last_lag=4),
                                    vary=Vary(**{k: tuple(v) for k, v in SIM_VARY.items()}))
    audits = {"base": math.inf, "none": math.inf}
    with tempfile.TemporaryDirectory(prefix="robustgmm-bench-") as tmp:
        path = Path(tmp) / "panel.parquet"
        simulate_panel(n_a, t_a, seed=43).to_parquet(path, index=False)
        grid_spec = dataclasses.replace(grid_spec, data_file=path, source=str(path))
        for _ in range(max(2, sizes.repeats)):
            for scope in ("base", "none"):
                w0 = time.perf_counter()
                run_audit(dataclasses.replace(grid_spec, influence=scope), jobs=1,
                          cache_dir=None, progress=False)
                audits[scope] = min(audits[scope], time.perf_counter() - w0)
    out.rows.append((f"48-variant audit, N = {n_a:,}, T = {t_a}, jobs = 1: with the base "
                     "model's dropping units / without", f"{_fmt_s(audits['base'])} / "
                     f"{_fmt_s(audits['none'])}"))
    out.ratios.append(("48-variant audit with dropping units / without",
                       audits["base"] / audits["none"], 2.0, None))
    out.notes.append(f"in CPU time: influence / one fit {cpu['infl'] / cpu['fit']:.2f}, "
                     f"one greedy step / one fit {cpu['step'] / cpu['fit']:.3f}")
    out.notes.append("the influence figure includes building the moment problem (one "
                     "first pass) and the exact refit at the full sample")
    return out


# ---------------------------------------------------------------------------
WORKLOADS = (marginal_cost, scale, audit_throughput, reference, simulation, cli_parallel,
             data_layer, dropping)


def run(quick: bool = False, out_dir=None, *, sizes: Sizes | None = None,
        echo: Callable[[str], None] = print, only=None) -> Path:
    """Run every workload (or those numbered in ``only``, from 1), print the ratios and
    write ``bench.md`` into ``out_dir`` (default ``reports/``). Returns the path of the
    written file."""
    if sizes is None:
        sizes = SIZES.get(os.environ.get(SIZES_ENV, ""), QUICK if quick else FULL)
    out_dir = Path("reports") if out_dir is None else Path(out_dir)
    start_machine = _machine()
    started = _dt.datetime.now().astimezone()
    threads = blas_threads()
    echo(f"robustgmm bench ({sizes.name} sizes) on {start_machine['cores']} cores, "
         f"{threads} BLAS thread{'s' if threads > 1 else ''} per process")
    outcomes = []
    chosen = WORKLOADS if not only else [WORKLOADS[k - 1] for k in sorted(set(only))]
    for workload in chosen:
        t0 = time.perf_counter()
        try:
            with _blas_limit(threads):
                res = workload(sizes, echo)
        except Exception as exc:  # report the failure, keep the other workloads
            res = Outcome(workload.__name__)
            res.notes.append(f"failed: {type(exc).__name__}: {' '.join(str(exc).split())}")
        try:  # the machine may be shared: the load beside the figures it moved
            load = ", one-minute load average %.2f at its end" % os.getloadavg()[0]
        except OSError:
            load = ""
        res.notes.append(f"workload ran in {time.perf_counter() - t0:.1f} s{load}")
        outcomes.append(res)
        _echo_outcome(res, echo)
    end_machine = _machine()
    text = _markdown(sizes, outcomes, start_machine, end_machine, started, threads,
                     partial=bool(only))
    path = out_dir / "bench.md"
    atomic_write_text(path, text)
    echo(f"wrote {path}")
    return path


def _verdict(ratio, limit) -> str:
    if ratio is None or not np.isfinite(ratio):
        return "not measured"
    return "holds" if ratio <= limit else "misses"


def _echo_outcome(res: Outcome, echo) -> None:
    echo(res.title)
    for name, value in res.rows:
        echo(f"  {name}: {value}")
    for name, ratio, limit, aim in res.ratios:
        echo(f"  ratio {name} = {ratio:.3f} (target ≤ {limit:g}"
             + (f", aim {aim:g}" if aim is not None else "") + f"): {_verdict(ratio, limit)}")
    for note in res.notes:
        echo(f"  note: {note}")


def _markdown(sizes, outcomes, m0, m1, started, threads, partial=False) -> str:
    v = _versions()
    lines = ["# robustgmm benchmark", "",
             f"Generated by `robustgmm bench{' --quick' if sizes.name == 'quick' else ''}` "
             f"({sizes.name} sizes) on {started:%Y-%m-%d %H:%M %Z}. Every timing runs with "
             f"{threads} BLAS thread{'s' if threads > 1 else ''} per process (as the audit "
             f"runs its variants; set {BLAS_THREADS_ENV} to change), so both sides of a "
             "ratio get the same share of the machine; parallelism is measured by the "
             "audit's `jobs`.", ""]
    busy = max(m0["load"][0], m1["load"][0])
    if np.isfinite(busy) and busy > 0.5:
        lines += [f"**Shared machine.** The one-minute load average was {m0['load'][0]:.2f} "
                  f"at the start and {m1['load'][0]:.2f} at the end on {m0['cores']} cores: "
                  "other processes were running, so absolute times are noisy. Each ratio "
                  "compares timings taken side by side (best of repeats, interleaved).", ""]
    if partial:
        lines += ["**Partial run**: only the workloads below ran (`--workloads`).", ""]
    if sizes.name != "full":
        lines += ["These are not the full-size workloads: fixed costs dominate small panels, "
                  "so the ratios below are not the targets of the full run.", ""]
    lines += ["## Machine", "",
              f"- CPU: {m0['cpu']}, {m0['cores']} logical cores"
              + (f", {m0['memory'] / GB:.1f} GB memory" if m0['memory'] else ""),
              f"- {m0['platform']}, Python {m0['python']}",
              "- " + ", ".join(f"{k} {val}" for k, val in v.items()), "",
              "## Ratios", "", "| workload | ratio | value | target | result |", "|---|---|---|---|---|"]
    for res in outcomes:
        for name, ratio, limit, aim in res.ratios:
            tgt = f"≤ {limit:g}" + (f" (aim {aim:g})" if aim is not None else "")
            lines.append(f"| {res.title.split('.')[0]} | {name} | {ratio:.3f} | {tgt} | "
                         f"{_verdict(ratio, limit)} |")
    lines.append("")
    for res in outcomes:
        lines += [f"## {res.title}", ""]
        for name, value in res.rows:
            lines.append(f"- {name}: {value}")
        for note in res.notes:
            lines.append(f"- note: {note}")
        lines.append("")
    return "\n".join(lines)


def _main(argv: list[str]) -> int:
    # a child runs as the command line runs its estimations
    from .allocator import keep_freed_memory
    keep_freed_memory()
    if len(argv) == 4 and argv[0] == "--scale-child":
        print(json.dumps(_scale_child(argv[1], int(argv[2]), int(argv[3]))))
        return 0
    if len(argv) == 2 and argv[0] == "--scale-workload":
        raw = json.loads(argv[1])
        sizes = Sizes(**{k: tuple(v) if isinstance(v, list) else v for k, v in raw.items()})
        with _blas_limit(blas_threads()):
            print(json.dumps(_scale_workload(sizes)))
        return 0
    if len(argv) >= 3 and argv[0] == "--command-child":
        print(json.dumps(_command_child(argv[2:], int(argv[1]))))
        return 0
    if len(argv) == 4 and argv[0] == "--read-child":
        print(json.dumps(_read_child(argv[1], argv[2], int(argv[3]))))
        return 0
    if len(argv) == 4 and argv[0] == "--write-data":
        print(json.dumps(_write_data(argv[1], int(argv[2]), int(argv[3]))))
        return 0
    print("usage: robustgmm bench [--quick] [--out DIR] [--workloads LIST]", file=sys.stderr)
    return 2


if __name__ == "__main__":
    sys.exit(_main(sys.argv[1:]))
