"""Replications of the whole grid in a calibrated world (issue 15).

For replication ``r`` the worker rebuilds the simulated panel from ``(seed, r)``
alone (:meth:`~robustgmm.montecarlo.calibrate.World.arrays`), copies it into the real
data's frame (same units, calendar, other columns and each model column's own
missing cells), builds the panel of every sample of the audit and estimates every
planned variant with the audit's own estimation of a share group
(:func:`robustgmm.audit.runner.estimate_group`, which uses the core's shared-work
families), computing only the parts of each fit it keeps (:class:`robustgmm.core.Parts`:
no instrument-strength statistics, only the level group's difference-in-Hansen; the
parts computed equal a full fit's bit for bit) and reading them from the fit itself
(never its JSON record, whose round trip they equal). A replication returns, per
variant, its status, each focus term's estimate and standard error, and the p-values
of Hansen, AR(2) and the level difference-in-Hansen: a few numbers, never a panel.

**Summary** (one row per variant × focus term, :func:`summarise`), over the ``R_ok``
replications in which the variant was estimated, with ``b`` the truth, ``b_r`` the
estimates, ``s_r`` their standard errors and ``z = Φ⁻¹(1 − alpha/2)``:

* ``bias = mean(b_r) − b``, ``relative_bias = bias / |b|`` (empty when ``b = 0``),
  ``sd`` the simulation standard deviation (ddof 1), ``rmse = sqrt(mean((b_r − b)²))``;
* ``se_ratio = mean(s_r) / sd`` (below 1: reported errors too small; Windmeijer 2005);
* ``coverage``: share of replications with ``|b_r − b| ≤ z s_r`` (the 1 − alpha
  interval contains the truth); ``size``: share with ``|b_r − b| / s_r > z``, the
  rejection rate of the true null ``H0: term = b`` at alpha (so ``size = 1 −
  coverage``; both are listed because readers look for either);
* Monte Carlo standard errors ``sd / sqrt(R_ok)`` of the mean and
  ``sqrt(c (1 − c) / R_ok)`` of the coverage (binomial);
* per variant, the rejection rates at alpha of Hansen, AR(2) and the level
  difference-in-Hansen over the replications where the test was computed: all three
  nulls are true in the simulated world, so each rate is the test's size.

**Determinism**: a replication depends only on ``(seed, r)``, the world and the
grid, and runs with the runner's fixed BLAS thread count, so results do not depend
on ``jobs`` or on which replications came from the cache; the summary reads them in
replication order.

**Cache and resume**: each finished replication is stored as one checksummed entry of
the audit cache (:class:`robustgmm.audit.cache.Cache`, key = the world, the grid,
the seed, the replication and the versions), written by the process that computed
it as soon as it is done: a killed run resumes without recomputing finished
replications.

**Parallel**: replications are sent to the audit's workers in blocks
(:mod:`robustgmm.audit.parallel`: backends, BLAS threads, worker limits, lost
workers; a block whose worker dies is retried alone once, then its replications
are recorded lost).
"""
from __future__ import annotations

import hashlib
import math
import os
import sys
import time
from dataclasses import dataclass, field
from typing import Any, Mapping, Sequence

import numpy as np
import pandas as pd

from ..errors import EstimationError, InputError
from ..options import Role
from .calibrate import World, calibrate, fit_summary, recalibrate

#: Replications below this give rates too noisy to read (a binomial standard error
#: above 0.05 at a 0.5 rate needs fewer than 100; 10 is the floor we accept).
MIN_REPS = 10
DEFAULT_REPS = 200
#: Version of a cached replication's record (raise when its layout changes).
REP_FORMAT = 2
#: Replications per worker task at most (tasks carry the world and the frame once).
MAX_BLOCK = 25
#: Tasks per worker at least (blocks permitting): the last block of a run leaves the
#: other workers idle, and on a shared machine a worker that gets less of a core
#: hands its later blocks to the others. Blocks of 4 replications instead of 13 (100
#: replications of the bench's grid on 2 workers, about 0.1 s each) cut the wall time
#: by 2-45% in three alternating runs at the same CPU time; a task's own cost
#: (pickling the world, the frame and the grid) is below a millisecond.
BLOCKS_PER_WORKER = 16
LOST = "lost"


@dataclass(frozen=True)
class Simulation:
    """The Monte Carlo of one grid: ``summary`` (simulation.csv without the varied
    settings' display), ``calibration`` (calibration.json), ``run`` (figures)."""

    summary: pd.DataFrame
    calibration: Mapping[str, Any]
    run: Mapping[str, Any]
    settings: tuple[str, ...] = ()
    records: Sequence[dict] = field(default=(), repr=False, compare=False)

    def frame(self) -> pd.DataFrame:
        """simulation.csv: the summary in the contract's column order."""
        from .. import contract
        return contract.frame_in_order(contract.SIMULATION, self.summary, self.settings)

    def write(self, stage) -> list[str]:
        """Write simulation.csv and calibration.json (atomically) into ``stage``;
        return their names. Both are identical whatever the jobs count and the cache
        (the run figures go into the manifest)."""
        from pathlib import Path
        from .. import contract
        from ..atomic import atomic_write_csv, atomic_write_json
        stage = Path(stage)
        atomic_write_csv(stage / contract.SIMULATION.file, self.frame())
        atomic_write_json(stage / contract.CALIBRATION_FILE, dict(self.calibration))
        return list(contract.SIMULATION_FILES)


# ---------------------------------------------------------------------------
# the world of a model
# ---------------------------------------------------------------------------
def truth_of(spec, fit_result) -> dict[str, float]:
    """The true value of every term of the model in the calibrated world: the base
    model's coefficient on each outcome lag and each regressor lag (the world contains
    every term of the base model, :mod:`robustgmm.montecarlo.calibrate`)."""
    est = {t.label: float(t.estimate) for t in fit_result.terms}
    return {label: est.get(label, 0.0) for _, _, label in spec.regressor_terms()}


def long_run_truth(spec, truth: Mapping[str, float]) -> dict[str, float]:
    """``NAME[long-run]`` of each regressor in the world: the sum of its
    coefficients over one minus the sum of the autoregressive ones
    (:mod:`robustgmm.core.longrun`); NaN when the sum of the latter is 1."""
    from ..spec import long_run_label, term_label
    rho = sum(truth.get(term_label(spec.outcome, lag), 0.0) for lag in spec.outcome_lags)
    out = {}
    for reg in spec.regressors:
        b = sum(truth.get(term_label(reg.name, lag), 0.0) for lag in reg.lags)
        out[long_run_label(reg.name)] = b / (1.0 - rho) if rho != 1.0 else math.nan
    return out


def build_world(spec, frame: pd.DataFrame, base_panel, *, truth: Mapping[str, float] | None = None,
                initial: str = "stationary", heteroskedastic: bool = False,
                ) -> tuple[World, dict[str, float], str]:
    """Calibrate the world of ``spec`` on the data ``frame``. The truth of every term
    is ``truth``'s value where it names the term (``[simulate.truth]``), else the base
    model's estimate (``core.fit`` on ``base_panel``, fitted only when a term is not
    given). Returns the world, the truth of every term and of each long-run effect,
    and where the truth came from. Raises :class:`InputError` when the base model is
    needed and cannot be estimated."""
    from .. import core
    from ..options import Initial
    if initial not in [m.value for m in Initial]:
        raise InputError(f"simulate: initial must be 'stationary' or 'data', not {initial!r}")
    known = [label for _, _, label in spec.regressor_terms()]
    given = {} if truth is None else dict(truth)
    bad = [k for k in given if k not in known]
    if bad:
        raise InputError(f"{spec.source}: [simulate.truth] {bad[0]!r}: not a term of the model "
                         f"(terms: {', '.join(known)})")
    given = {k: float(v) for k, v in given.items()}
    if all(label in given for label in known):
        terms, source = given, "given"
    else:
        try:
            base = core.fit(spec, base_panel)
        except EstimationError as exc:
            raise InputError(f"{spec.source}: simulate: the base model cannot be estimated "
                             f"on the data, so there is no world to calibrate "
                             f"({' '.join(str(exc).split())})") from None
        terms = {**truth_of(spec, base), **given}
        source = ("base model estimate" if not given else
                  f"given for {', '.join(given)}; base model estimate for the other terms")
    kinds = {reg.name: str(Role(reg.role).value) for reg in spec.regressors}
    world = calibrate(frame, unit=spec.unit, period=spec.period, outcome=spec.outcome,
                      regressors=kinds, truth=terms, outcome_lags=spec.outcome_lags,
                      lags={reg.name: reg.lags for reg in spec.regressors},
                      time_effects=spec.time_effects, heteroskedastic=heteroskedastic,
                      initial=initial)
    return world, {**terms, **long_run_truth(spec, terms)}, source


def simulated_frame(world: World, template: pd.DataFrame, seed: int, rep: int,
                    columns: Sequence[str]) -> pd.DataFrame:
    """The real ``template`` frame with each model column replaced by replication
    ``rep``'s values, its missing cells kept missing (so gaps, attrition and every
    column's own missing values are copied exactly)."""
    arr = world.arrays(seed, rep, masked=False)
    iu = np.searchsorted(world.units, template[world.unit].to_numpy())
    ip = np.searchsorted(world.periods, template[world.period].to_numpy())
    out = template.copy()
    for col in columns:
        real = template[col].to_numpy(float)
        out[col] = np.where(np.isfinite(real), arr[col][iu, ip], np.nan)
    return out


# ---------------------------------------------------------------------------
# one replication (runs in a worker)
# ---------------------------------------------------------------------------
def _num(x) -> float:
    """A number as the fit's record reads it back: NaN for any non-finite value
    (:mod:`robustgmm.core.results`), so a replication equals one read from a record."""
    x = float(x)
    return x if math.isfinite(x) else math.nan


def _p(test) -> float | None:
    return None if test is None else _num(test.p_value)


def replicate(world: World, template: pd.DataFrame, variants, seed: int, rep: int,
              focus: Sequence[str], level_group: str) -> dict:
    """Estimate every planned variant on replication ``rep``; return its record
    ``{"rep", "variants": {id: {"status", "terms": {term: [estimate, se]},
    "hansen", "ar2", "dh_level"}}}`` (module docstring)."""
    from .. import core, data
    from ..audit import runner
    from ..audit.grid import sample_key
    # a replication keeps a few numbers of each fit: no instrument-strength
    # statistics, and only the level group's difference-in-Hansen
    parts = core.Parts(strength=False, difference_hansen=(level_group,))
    spec0 = variants[0].spec
    frame = simulated_frame(world, template, seed, rep, (spec0.outcome,) + world.regressors)
    panels: dict[str, Any] = {}
    groups: dict[tuple, list] = {}
    for v in variants:
        key = sample_key(v.spec.sample)
        if key not in panels:
            try:
                panels[key] = data.build_panel(frame, v.spec, sample=v.spec.sample)
            except InputError as exc:  # this draw leaves the sample without data
                panels[key] = "; ".join(exc.problems)
        groups.setdefault((key, core.share_key(v.spec)), []).append(v)
    out: dict[str, dict] = {}
    for (key, _), members in groups.items():
        panel = panels[key]
        if isinstance(panel, str):
            for v in members:
                out[v.id] = {"status": runner.FAILED, "reason": panel}
            continue
        for v, entry in zip(members, runner.estimate_group([m.spec for m in members], panel,
                                                                bounds=False, parts=parts,
                                                                records=False)):
            if entry["status"] != runner.OK:
                out[v.id] = {"status": entry["status"], "reason": entry["failure"]["reason"]}
                continue
            fit = entry["result"]
            terms = {t.label: [_num(t.estimate), _num(t.std_error)]
                     for t in fit.terms + fit.long_run if t.label in focus}
            out[v.id] = {"status": runner.OK, "terms": terms,
                         "hansen": _p(fit.tests.get("hansen")),
                         "ar2": _p(fit.tests.get("ar2")),
                         "dh_level": _p(fit.difference_hansen.get(level_group))}
    return {"rep": int(rep), "variants": {v.id: out[v.id] for v in variants}}


def _block_task(world, template, variants, seed, reps, focus, level_group, cache_dir,
                world_key, parent_pid, marker=None):
    from ..audit import parallel
    parallel.task_started(marker, parent_pid)
    cache = _open_cache(cache_dir)
    results = []
    for rep in reps:
        c0 = time.process_time()
        rec = replicate(world, template, variants, seed, rep, focus, level_group)
        # this process's CPU time for the replication: with the wall time it says how
        # much of a core a worker got (the run figure cpu_seconds; never in the summary)
        rec["cpu_seconds"] = time.process_time() - c0
        if cache is not None:  # at once, so a killed run keeps it
            cache.store_quietly(_rep_key(cache, world_key, seed, rep), f"replication {rep}", rec)
        results.append(rec)
    return results


# ---------------------------------------------------------------------------
# cache
# ---------------------------------------------------------------------------
def _open_cache(cache_dir):
    if cache_dir is None:
        return None
    from ..audit.cache import Cache
    try:
        return Cache(os.path.join(str(cache_dir), "simulation"))
    except OSError:
        return None


def world_key(world: World, template: pd.DataFrame, variants, focus, alpha) -> str:
    """Hash of what every replication depends on besides ``(seed, rep)``: the
    world's parameters and mask, the data frame copied into, the planned variants'
    canonical settings and the focus terms."""
    from ..audit.grid import canonical_json, canonical_settings
    from ..data.panel import hash_frame
    h = hashlib.sha256()
    h.update(canonical_json({"format": REP_FORMAT, "world": world.to_dict(),
                             "variants": [[v.id, canonical_settings(v.spec)] for v in variants],
                             "focus": list(focus), "alpha": alpha}).encode())
    h.update(world.fingerprint())
    h.update(hash_frame(template, world.unit, world.period,
                        [c for c in template.columns if c not in (world.unit, world.period)]).encode())
    return h.hexdigest()


def _rep_key(cache, wkey: str, seed: int, rep: int) -> str:
    """sha256 of the cache format, the versions (:func:`robustgmm.audit.cache.environment`),
    the world key, the seed and the replication."""
    from ..audit.cache import CACHE_FORMAT, environment
    from ..audit.grid import canonical_json
    text = canonical_json({"format": CACHE_FORMAT, "replication_format": REP_FORMAT,
                           "environment": environment(), "world": wkey,
                           "seed": int(seed), "rep": int(rep)})
    return hashlib.sha256(text.encode()).hexdigest()


# ---------------------------------------------------------------------------
# the run
# ---------------------------------------------------------------------------
def check_reps(reps, seed) -> tuple[int, int]:
    """``(reps, seed)`` as integers, or :class:`InputError` with one line each."""
    problems = []
    if isinstance(reps, bool) or not isinstance(reps, (int, np.integer)):
        problems.append(f"--reps: {reps!r} is not a whole number of replications")
    elif reps < MIN_REPS:
        problems.append(f"--reps: {reps} replications are too few; use at least {MIN_REPS} "
                        f"(a rate from {MIN_REPS - 1} has a Monte Carlo standard error up "
                        f"to sqrt(0.25 / {MIN_REPS - 1}) = {math.sqrt(0.25 / (MIN_REPS - 1)):.2f})")
    if isinstance(seed, bool) or not isinstance(seed, (int, np.integer)) or seed < 0:
        problems.append(f"--seed: {seed!r} is not a non-negative whole number")
    if problems:
        raise InputError(problems)
    return int(reps), int(seed)


def run_replications(world: World, template: pd.DataFrame, variants, *, reps: int, seed: int,
                     focus: Sequence[str], level_group: str, alpha: float,
                     jobs: int | None = None, cache_dir=None, progress: bool | None = False,
                     backend: str | None = None, panels=None, start_workers: bool = False,
                     notify=None) -> tuple[list[dict], dict]:
    """Run replications ``0 .. reps-1`` (cached ones read back); return their records
    in replication order and the run figures.

    Local worker processes start only when the replications' estimated time (each
    one the grid's share groups on panels like ``panels``, the data's samples;
    :mod:`robustgmm.audit.cost`) repays their start-up, or always with
    ``start_workers``; ``notify(line)`` hears which was chosen."""
    import joblib

    from ..audit import parallel

    start = time.perf_counter()
    variants = list(variants)
    wkey = world_key(world, template, variants, focus, alpha)
    cache = _open_cache(cache_dir)
    records: dict[int, dict] = {}
    if cache is not None:
        for rep in range(reps):
            rec = cache.load(_rep_key(cache, wkey, seed, rep))
            if rec is not None:
                records[rep] = rec
    cached = len(records)
    todo = [r for r in range(reps) if r not in records]
    if progress is None:
        progress = sys.stderr.isatty()
    bar = None
    if progress:
        import shutil
        from tqdm import tqdm
        size = shutil.get_terminal_size((80, 24))
        bar = tqdm(total=reps, initial=cached, file=sys.stderr, desc="replications",
                   unit="rep", leave=False, ncols=min(size.columns or 80, 100))

    def record(results):
        for rec in results:
            records[int(rec["rep"])] = rec
            if bar is not None:
                bar.update(1)

    n_jobs = -1 if jobs is None else int(jobs)
    parent = os.getpid()
    deaths = {"worker_deaths": 0, "retried_alone": 0, "lost": 0}
    n_workers, capped, backend_used = 1, None, "in-process"
    try:
        if todo and panels is not None and backend is None and not start_workers \
                and parallel._default_is_loky():
            n_jobs = _local_jobs(n_jobs, len(todo), variants, panels, notify)
        if todo:
            with parallel._backend_context(backend) as backend_used, parallel._blas_limit():
                n_workers, capped = parallel.worker_count(n_jobs, len(todo))
                size = max(1, min(MAX_BLOCK, math.ceil(len(todo) / (BLOCKS_PER_WORKER * n_workers))))
                blocks = [todo[i:i + size] for i in range(0, len(todo), size)]
                args = (world, template, variants, seed)
                tail = (focus, level_group, cache_dir, wkey, parent)
                if n_workers == 1:
                    backend_used = "in-process"
                    for block in blocks:
                        record(_block_task(*args, block, *tail))
                else:
                    def task(block, marker=None):
                        return joblib.delayed(_block_task)(*args, block, *tail, marker)

                    def lost(block):
                        for rep in block:
                            if rep not in records:
                                deaths["lost"] += 1
                                records[rep] = {"rep": rep, "variants": {
                                    v.id: {"status": LOST, "reason": parallel.LOST_REASON}
                                    for v in variants}}

                    parallel.run_surviving_worker_deaths(
                        blocks, task, record, lambda b: all(r in records for r in b), lost,
                        n_workers, deaths)
    finally:
        parallel.remove_memmaps()
        if bar is not None:
            bar.close()
    ordered = [records[r] for r in range(reps)]
    cpu = sum(float(records[r].get("cpu_seconds", 0.0)) for r in todo)
    run = {"reps": reps, "seed": seed, "computed": len(todo), "cached": cached,
           "jobs": n_workers, "backend": backend_used,
           "wall_seconds": time.perf_counter() - start, "cpu_seconds": cpu,
           **{k: v for k, v in deaths.items() if v},
           **({"workers_capped": capped} if capped else {}),
           **({"cache_write_errors": cache.write_errors} if cache is not None
              and cache.write_errors else {})}
    return ordered, run


def _local_jobs(n_jobs: int, n_reps: int, variants, panels, notify) -> int:
    """``n_jobs``, or 1 when the ``n_reps`` replications' estimated time does not
    repay starting local workers (:mod:`robustgmm.audit.cost`)."""
    from ..audit import cost, parallel, runner
    allowed, _ = parallel.worker_count(n_jobs, n_reps)
    if allowed <= 1:
        return n_jobs
    estimates = cost.Estimates()
    one = cost.REPLICATION_FACTOR * sum(
        estimates.group_seconds([v.spec for v in g], runner._panel_of(g, panels))
        for g in runner._share_groups(variants, shared=True))
    start = cost.repays_workers(one * n_reps, allowed)
    if notify is not None:
        notify(cost.dispatch_line(one * n_reps, allowed, start))
    return n_jobs if start else 1


# ---------------------------------------------------------------------------
# summary
# ---------------------------------------------------------------------------
SUMMARY_STATS = ("true_value", "mean", "median", "bias", "relative_bias", "sd", "rmse",
                 "mean_std_error", "se_ratio", "coverage", "size", "bias_mc_se",
                 "coverage_mc_se", "reps_ok", "reps", "hansen_rejection", "ar2_rejection",
                 "diff_hansen_level_rejection")


def _rate(ps: list, alpha: float) -> float:
    ps = [p for p in ps if p is not None and np.isfinite(p)]
    return float(np.mean(np.array(ps) < alpha)) if ps else math.nan


def summarise(records: Sequence[dict], variants, focus: Sequence[str],
              truth: Mapping[str, float], alpha: float) -> pd.DataFrame:
    """One row per planned variant × focus term (module docstring for the formulas)."""
    from scipy.special import ndtri
    z = float(ndtri(1.0 - alpha / 2.0))
    rows = []
    for v in variants:
        recs = [r["variants"].get(v.id, {}) for r in records]
        ok = [r for r in recs if r.get("status") == "ok"]
        rates = {
            "hansen_rejection": _rate([r.get("hansen") for r in ok], alpha),
            "ar2_rejection": _rate([r.get("ar2") for r in ok], alpha),
            "diff_hansen_level_rejection": _rate([r.get("dh_level") for r in ok], alpha),
        }
        for term in focus:
            b = float(truth.get(term, 0.0))
            pairs = np.array([r["terms"][term] for r in ok if term in r["terms"]
                              and r["terms"][term][0] is not None], dtype=float).reshape(-1, 2)
            pairs = pairs[np.isfinite(pairs[:, 0])]
            est, se = pairs[:, 0], pairs[:, 1]
            n = len(est)
            row = {"variant": v.id, "order": v.order, "is_base": v.is_base, "term": term,
                   "true_value": b, "reps_ok": n, "reps": len(records), **rates}
            if n:
                err = est - b
                sd = float(np.std(est, ddof=1)) if n > 1 else math.nan
                good = np.isfinite(se) & (se > 0)
                cover = np.abs(err[good]) <= z * se[good]
                cov = float(np.mean(cover)) if good.any() else math.nan
                row.update(mean=float(np.mean(est)), median=float(np.median(est)),
                           bias=float(np.mean(err)),
                           relative_bias=float(np.mean(err) / abs(b)) if b != 0 else math.nan,
                           sd=sd, rmse=float(np.sqrt(np.mean(err ** 2))),
                           mean_std_error=float(np.mean(se[good])) if good.any() else math.nan,
                           coverage=cov, size=1.0 - cov if good.any() else math.nan,
                           bias_mc_se=sd / math.sqrt(n) if n > 1 else math.nan,
                           coverage_mc_se=math.sqrt(cov * (1 - cov) / good.sum())
                           if good.any() else math.nan)
                row["se_ratio"] = (row["mean_std_error"] / sd
                                   if n > 1 and sd > 0 else math.nan)
            rows.append(row)
    cols = ["variant", "order", "is_base", "term"] + list(SUMMARY_STATS)
    frame = pd.DataFrame(rows, columns=cols)
    for c in ("reps_ok", "reps", "order"):
        frame[c] = frame[c].astype("Int64")
    return frame


# ---------------------------------------------------------------------------
# the whole simulation of a spec
# ---------------------------------------------------------------------------
def simulate(spec, *, reps: int = DEFAULT_REPS, seed: int = 0, jobs: int | None = None,
             cache_dir=None, progress: bool | None = False, backend: str | None = None,
             truth: Mapping[str, float] | None = None, initial: str = "stationary",
             heteroskedastic: bool = False, planned=None, panels=None,
             start_workers: bool = False, notify=None) -> Simulation:
    """Calibrate the world of ``spec`` to its data and run ``reps`` replications of
    its whole grid (``planned``/``panels``: an audit's plan and panels, reused).

    ``truth``: term label → true value (``[simulate.truth]``; the other terms take
    the base model's estimate); ``initial``: ``"stationary"`` or ``"data"``;
    ``heteroskedastic``: copy the data's heteroskedasticity across units
    (:mod:`robustgmm.montecarlo.calibrate`).

    Raises :class:`InputError` (one line each) for bad ``reps``/``seed``/``truth``/
    ``initial`` and when the base model is needed and cannot be estimated."""
    from .. import data
    from ..audit import grid, parallel
    from ..options import LEVEL_GROUP

    reps, seed = check_reps(reps, seed)
    grid.check_base(spec)
    # every step at parallel.BLAS_THREADS, whatever the calling process's BLAS threads
    # (its cores, OMP_NUM_THREADS / OPENBLAS_NUM_THREADS; restored after): the truth is
    # the base model's fit, which moved in the 14th digit with them
    with parallel._blas_limit():
        if panels is None:
            panels = grid.load_panels(spec)
        if planned is None:
            planned = grid.plan(spec, panels, counts=False)
        variants = [v for v in planned if v.status == grid.PLANNED]
        frame = data.read_frame(spec)
        base_panel = panels[grid.sample_key(spec.sample)]
        world, truth_terms, truth_source = build_world(spec, frame, base_panel, truth=truth,
                                                       initial=initial,
                                                       heteroskedastic=heteroskedastic)
        focus = tuple(spec.focus_terms())
        records, run = run_replications(world, frame, variants, reps=reps, seed=seed, focus=focus,
                                        level_group=LEVEL_GROUP, alpha=spec.alpha, jobs=jobs,
                                        cache_dir=cache_dir, progress=progress, backend=backend,
                                        panels=panels, start_workers=start_workers,
                                        notify=notify)
        summary = summarise(records, variants, focus, truth_terms, spec.alpha)
        settings = tuple(grid.setting_columns(spec))
        shown = {v.id: v.settings_dict() for v in variants}
        for col in settings:
            summary.insert(summary.columns.get_loc("term"), col,
                           [shown[vid].get(col) for vid in summary["variant"]])
        columns = (spec.outcome,) + world.regressors
        from .. import contract
        first = simulated_frame(world, frame, seed, 0, columns)
        calibration = {
            "format_version": contract.FORMAT_VERSION,
            "seed": seed, "reps": reps, "alpha": spec.alpha,
            "truth": {t: truth_terms[t] for t in focus if t in truth_terms},
            "truth_source": truth_source,
            # each parameter beside the same calibration run on replication 0
            "world": world.to_dict(simulated=recalibrate(world, first)),
            "fit": fit_summary(frame, first, columns, unit=spec.unit, period=spec.period),
            "failed": {v.id: sum(1 for r in records if r["variants"][v.id]["status"] != "ok")
                       for v in variants},
        }
    return Simulation(summary=summary, calibration=calibration, run=run, settings=settings,
                      records=records)


def write_simulation(sim: Simulation, out_dir, *, model_file=None) -> "Path":
    """Write a simulation on its own (``robustgmm simulate``): simulation.csv,
    calibration.json and a manifest.json (provenance and run figures), through a
    staging folder swapped in as one unit (:func:`robustgmm.output.publish`)."""
    import datetime as _dt
    from pathlib import Path

    from .. import __version__, contract
    from .. import output as folder
    from ..atomic import atomic_write_json

    out = Path(out_dir)
    out.mkdir(parents=True, exist_ok=True)

    def write(stage: Path) -> list[str]:
        names = sim.write(stage)
        atomic_write_json(stage / "manifest.json", {
            "package": "robustgmm", "version": __version__,
            "format_version": contract.FORMAT_VERSION, "command": "simulate",
            "created_utc": _dt.datetime.now(_dt.timezone.utc).isoformat(timespec="seconds"),
            "model_file": None if model_file is None else str(model_file),
            "settings": list(sim.settings), "run": dict(sim.run),
            "files": names + ["manifest.json"]})
        return names + ["manifest.json"]

    folder.publish(out, write)
    return out
