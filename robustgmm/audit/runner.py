"""Run the variants of an audit: joblib over variants, on-disk cache, progress bar.

* **Parallel**: one joblib task per share group (below). The default backend is
  loky (processes) with at most ``jobs`` workers (default: every core), started only
  when the work, estimated from the plan before anything runs
  (:mod:`robustgmm.audit.cost`: rows × instruments per share group), repays their
  start-up (:data:`WORKER_STARTUP_SECONDS`); otherwise the audit runs in this process
  (``start_workers=True`` starts them whatever the estimate); each worker's BLAS
  is limited to :data:`BLAS_THREADS` threads, so workers never oversubscribe the
  cores. Any other joblib backend works the same way: pass ``backend="dask"`` (or
  run the audit inside ``joblib.parallel_config("dask")`` /
  ``parallel_backend("dask")``) with a ``dask.distributed`` client, and the groups
  run on the cluster. Dask is not required otherwise.
* **Determinism**: each share group is estimated whole, from the same inputs and
  with the same number of BLAS threads (:data:`BLAS_THREADS`, set with threadpoolctl
  in this process and in every worker), whatever the number of workers; results
  are returned in plan order, so an audit is bit-identical whatever ``jobs`` is.
* **Panels and shared work**: the panel of each sample is built once by the caller
  and shared by every variant of that sample. One task is one *share group*:
  variants that differ only in steps, errors and last_lag
  (:func:`robustgmm.core.share_key`), estimated together by
  :func:`robustgmm.core.fit_family`, which sums the moment matrices once for the
  group and lets each two-step variant reuse its one-step sibling.
* **Cache**: one JSON file per variant under ``cache_dir``
  (:class:`~robustgmm.audit.cache.Cache`), named by a key that hashes the data (the
  panel's content hash), the variant's canonical estimation settings, the package
  version and its share group's instrument windows. It stores the variant's payload:
  the one record of its fit (:meth:`~robustgmm.core.results.FitResult.to_dict`) and
  its bounds, or its :class:`~robustgmm.core.results.FitFailure`, with a sha256 of
  its canonical text; an entry that does not parse or whose checksum does not match is
  treated as missing and recomputed (and counted as corrupted). Entries are written
  atomically by the parent process as soon as each result arrives, so an interrupted
  audit (Ctrl-C, a killed worker) resumes where it stopped (a group with a missing
  member runs whole again) and an unchanged rerun estimates nothing. Fresh and cached
  results alike are read back through the record, so they are identical. Variants
  that fail with :class:`EstimationError` (a property of the model and data) are
  cached as failed; unexpected errors are not cached, so a rerun tries them again.
* **Failure policy**: a variant that cannot be estimated (:class:`EstimationError`)
  is marked ``failed`` with a one-line reason and the other variants go on; any
  other exception is a bug and stops the run with its traceback, unless
  ``on_error="record"`` (then it too is a failed variant, not cached).
* **Lost workers**: when a worker process dies (killed, crashed, out of memory), joblib
  stops the whole map (``TerminatedWorkerError``). The results received until then are
  kept (and cached). Each task marks its start in a private temporary folder, so the
  groups that were running when the worker died are known: each of them is run once
  more on its own (one task in a fresh worker); a group whose worker dies again is
  recorded ``failed`` with that reason (not cached, so a rerun tries it again). The
  groups that had not started are then submitted again as usual. Every group is thus
  tried at most twice and the audit always completes.
* **Cache writes**: a cache entry that cannot be written (full disk, read-only
  folder) is counted (``cache_write_errors`` in the run figures) and skipped: the
  cache only serves resumption, and the result itself is kept. A cache folder that
  cannot be created at all (a file in its place) leaves the run without a cache
  (``cache_unavailable`` in the run figures).
"""
from __future__ import annotations

import hashlib
import shutil
import sys
import time
from dataclasses import dataclass, field
from typing import TYPE_CHECKING, Any, Callable, Mapping, Sequence

import joblib
import numpy as np

from ..errors import EstimationError
from . import cost, parallel
from .cache import CACHE_FORMAT, Cache  # noqa: F401  (re-exported)
from .grid import PLANNED, Variant, sample_key
from .parallel import (BLAS_THREADS, LOST_REASON, WORKER_DEATHS,  # noqa: F401  (re-exported)
                       WORKER_STARTUP_SECONDS, _worker_died)

if TYPE_CHECKING:  # the core is imported when a variant is estimated, not before
    from ..core.results import FitFailure, FitResult

OK, FAILED = "ok", "failed"
#: ``error_type`` of a variant whose worker process died twice
LOST_ERROR_TYPE = "LostWorker"


# ---------------------------------------------------------------------------
# the payload of one variant: what a task returns and the cache stores
# ---------------------------------------------------------------------------
# An estimated variant: {"status": "ok", "fit": FitResult.to_dict(), "bounds":
# Bounds.to_dict() or {"error": reason}, "seconds": s}; a failed one: {"status":
# "failed", "failure": FitFailure.to_dict(), "seconds": s}. A task adds "cacheable"
# (False for what a rerun should try again), which the parent removes before storing.

def _failure(exc: BaseException, variant: str = "") -> dict:
    """The payload of a variant that failed with ``exc``."""
    from ..core.results import FitFailure
    if isinstance(exc, EstimationError):  # a property of the model and data: cacheable
        failure = FitFailure.from_exception(exc, variant)
        return {"status": FAILED, "failure": failure.to_dict(), "cacheable": True}
    # a bug or a numerical breakdown: isolate it, and do not cache it
    failure = FitFailure.from_exception(exc, variant, name_type=True)
    return {"status": FAILED, "failure": failure.to_dict(), "cacheable": False}


#: Failure policies (``on_error``) for an exception that is not an
#: :class:`EstimationError`: "raise" (default: a bug stops the audit with its
#: traceback) or "record" (the variant is recorded failed with the exception's type
#: and message, not cached, and the audit goes on).
ON_ERROR = ("raise", "record")


def check_on_error(on_error: str) -> str:
    if on_error not in ON_ERROR:
        raise ValueError(f"on_error must be one of {', '.join(ON_ERROR)}, not {on_error!r}")
    return on_error


def _unexpected(exc: BaseException, on_error: str, variant: str) -> dict:
    """An exception that is not an EstimationError: raised again (its traceback
    kept) under ``on_error="raise"``, a non-cacheable failure payload otherwise."""
    if on_error == "raise" and not isinstance(exc, EstimationError):
        raise exc
    return _failure(exc, variant)


class _BoundsOnce:
    """The OLS/within bounds of a share group's members, computed once per distinct
    estimation sample and model (members normally share one)."""

    def __init__(self, panel, sample: Callable, on_error: str):
        self.panel, self.sample, self.on_error = panel, sample, on_error
        self.masks: dict = {}
        self.memo: dict = {}

    def __call__(self, spec) -> dict:
        """``Bounds.to_dict()``, or ``{"error": reason}`` when they cannot be computed
        (the reason without the "bounds:" prefix the tables add)."""
        from . import bounds as bounds_mod
        try:
            # members of a share group differ only in steps, errors and last_lag,
            # none of which moves the estimation sample: build it once
            skey = (spec.outcome, spec.equations, spec.transform, spec.regressor_terms(),
                    spec.extra_instruments)
            if skey not in self.masks:
                mask = self.sample(spec, self.panel)
                self.masks[skey] = (mask, hashlib.sha256(np.packbits(mask).tobytes()).hexdigest())
            mask, digest = self.masks[skey]
            key = (digest, mask.shape, spec.time_effects, spec.regressor_terms())
            if key not in self.memo:
                self.memo[key] = bounds_mod.ar_bounds(spec, self.panel, mask).to_dict()
            return self.memo[key]
        except EstimationError as exc:
            return {"error": one_line(exc)}
        except Exception as exc:  # noqa: BLE001
            if self.on_error == "raise":
                raise
            return {"error": f"{type(exc).__name__}: {one_line(exc)}"}


#: The seam of the fault and resumption tests, never set by the package: a callable
#: ``(spec, panel) -> FitResult`` that estimates every variant on its own in place of
#: :func:`robustgmm.core.fit_family` (it can count calls, raise, or kill its worker).
#: :func:`run_variants` reads it once when it starts and sends it with each task, so
#: it reaches worker processes, which monkeypatching the core in this process does
#: not. Tests set it with ``monkeypatch.setattr(runner, "FIT_EACH", ...)``.
FIT_EACH: Callable | None = None


def _fits(specs, panel, fit: Callable | None, parts=None) -> list:
    """The group's results (an exception in place of a member that raised): one
    :func:`robustgmm.core.fit_family` call (computing ``parts``, None: every part), or
    ``fit`` member by member (:data:`FIT_EACH`)."""
    from .. import core
    if fit is None:
        if parts is None:
            return core.fit_family(list(specs), panel)
        return core.fit_family(list(specs), panel, parts=parts)
    results = []
    for spec in specs:
        try:
            results.append(fit(spec, panel))
        except Exception as exc:  # noqa: BLE001 - judged by the policy
            results.append(exc)
    return results


def estimate_group(specs, panel, fit: Callable | None = None, on_error: str = "raise",
                   ids: Sequence[str] | None = None, bounds: bool = True,
                   parts=None, records: bool = True) -> list[dict]:
    """Estimate a share group of variants and their OLS/within bounds; one payload
    per member (the comment above :func:`_failure`).

    A variant that cannot be estimated (:class:`EstimationError` and its subclasses,
    e.g. :class:`~robustgmm.errors.UnderidentifiedError`) gets a failure payload; any
    other exception is a bug and is raised, unless ``on_error="record"`` (see
    :data:`ON_ERROR`). By default the group goes to
    :func:`robustgmm.core.fit_family`, which sums the moments once for the group and
    reuses each instrument set's one-step estimate for its two-step siblings. ``fit``
    (:data:`FIT_EACH`, tests) replaces it by one call per member. ``ids``: the variant
    ids, named in the
    failure records. ``bounds=False`` leaves the bounds out (``bounds`` None: the
    Monte Carlo needs only the fits). ``parts``: the optional parts of each fit
    (:class:`robustgmm.core.Parts`; None: every part). ``records=False`` puts the
    :class:`~robustgmm.core.results.FitResult` itself under ``"result"`` in place of
    its record under ``"fit"`` (the Monte Carlo, which keeps a few numbers of each
    fit and never stores or ships the fit; an audit's payloads are records).
    """
    from .. import core

    ids = list(ids) if ids is not None else [""] * len(specs)
    start = time.perf_counter()
    degenerate = getattr(panel, "degenerate", ())
    if degenerate:  # a column with no information in this sample: not estimable
        exc = EstimationError("; ".join(degenerate))
        out = [_failure(exc, vid) for vid in ids]
    else:
        of = (_BoundsOnce(panel, core.estimation_sample, on_error) if bounds
              else (lambda spec: None))
        out = []
        for vid, spec, res in zip(ids, specs, _fits(specs, panel, fit, parts)):
            if isinstance(res, BaseException):
                out.append(_unexpected(res, on_error, vid))
            elif not records:
                out.append({"status": OK, "result": res, "bounds": of(spec),
                            "cacheable": True})
            else:
                try:
                    record = res.to_dict()
                except Exception as exc:  # noqa: BLE001
                    out.append(_unexpected(exc, on_error, vid))
                    continue
                out.append({"status": OK, "fit": record, "bounds": of(spec),
                            "cacheable": True})
    per_variant = (time.perf_counter() - start) / max(len(out), 1)
    for entry in out:
        entry["seconds"] = 0.0 if degenerate else per_variant
    return out


def one_line(exc: BaseException) -> str:
    text = " ".join(str(exc).split())
    return text or type(exc).__name__


# ---------------------------------------------------------------------------
# the run
# ---------------------------------------------------------------------------
@dataclass(frozen=True)
class Outcome:
    """What happened to one planned variant: its fit (the one record,
    :class:`~robustgmm.core.results.FitResult`) and bounds, or its failure."""

    variant: str
    status: str
    fit: FitResult | None
    bounds: dict | None
    seconds: float
    cached: bool
    failure: FitFailure | None = None

    @property
    def reason(self) -> str:
        """Why the variant failed ("" when estimated)."""
        return "" if self.failure is None else self.failure.reason

    @property
    def error_type(self) -> str:
        """The exception type of a failure (``UnderidentifiedError``, ...), "" otherwise."""
        return "" if self.failure is None else self.failure.error_type


@dataclass(frozen=True)
class RunStats:
    """Figures of one run (for the manifest and the benchmark)."""

    variants: int
    computed: int
    cached: int
    corrupted: int
    failed: int
    jobs: int
    backend: str
    wall_seconds: float
    variant_seconds: float  # sum of the per-variant estimation times (workers' clocks)
    extra: Mapping[str, Any] = field(default_factory=dict)

    def to_dict(self) -> dict:
        out = {k: getattr(self, k) for k in ("variants", "computed", "cached", "corrupted",
                                             "failed", "jobs", "backend", "wall_seconds",
                                             "variant_seconds")}
        out["variants_per_second"] = (self.computed / self.wall_seconds
                                      if self.computed and self.wall_seconds > 0 else None)
        out.update(self.extra)
        return out


def _share_key(spec) -> str:
    """Variants with the same key are estimated together by ``core.fit_family``
    (they differ at most in steps, errors and last_lag)."""
    from .. import core
    return core.share_key(spec)


def _group_signature(members: Sequence[Variant]) -> list:
    """The instrument windows of a share group. Members that differ in last_lag are
    estimated from the moments of the widest window, which changes the order of
    floating-point sums (results agree to rounding, not bit for bit); the cache key
    records the windows so that a cached result always equals a fresh one."""
    return sorted({"all" if v.spec.last_lag is None else str(v.spec.last_lag) for v in members})


def run_variants(variants: Sequence[Variant], panels: Mapping[str, Any], *,
                 jobs: int | None = None, cache_dir=None, progress: bool | None = False,
                 backend: str | None = None, on_error: str = "raise",
                 start_workers: bool = False,
                 notify: Callable[[str], None] | None = None,
                 alongside: Sequence[parallel.Work] = (),
                 ) -> tuple[dict[str, Outcome], RunStats]:
    """Estimate every planned variant; return ``{variant id: Outcome}`` and run figures.

    ``panels`` maps :func:`robustgmm.grid.sample_key` to the sample's panel.
    ``jobs``: the most workers (None or -1: every core; 1: this process). Local
    worker processes start only when the estimated work repays their start-up
    (:mod:`robustgmm.audit.cost`); ``start_workers=True`` starts them whatever the
    estimate. ``notify`` receives the one line saying which it chose (when more
    than one worker was allowed). ``progress``: a tqdm bar on stderr (None: only
    when stderr is a terminal).

    The unit of work is a share group (variants that differ only in steps, errors
    and last_lag; :func:`robustgmm.core.share_key`), estimated together by
    :func:`robustgmm.core.fit_family`. A group runs when any member is missing from
    the cache; it always runs whole, so that its results do not depend on what was
    cached (members already cached keep their cached result, which is identical).

    ``alongside``: other work (:class:`robustgmm.audit.parallel.Work`, e.g. the base
    model's dropping-units analysis) run in the same pool as the groups, the longest
    tasks first whatever their kind; its results go where it says. The run's figures
    (workers, worker deaths) cover it too.
    """
    check_on_error(on_error)
    start = time.perf_counter()
    fit = FIT_EACH  # read once: the tasks carry it to the workers
    todo = [v for v in variants if v.status == PLANNED]
    cache, cache_problem = _open_cache(cache_dir)
    groups = _share_groups(todo, shared=fit is None)
    outcomes = _Outcomes(cache)
    pending = [g for g in groups
               if outcomes.look_up(g, _panel_of(g, panels), shared=fit is None)]
    # the dispatch runs the heaviest groups first, so parallel workers finish close
    # together (the order of results does not depend on it)
    estimates = cost.Estimates()
    seconds = [estimates.group_seconds([v.spec for v in g], _panel_of(g, panels))
               for g in pending]
    tasks = _Tasks(panels, fit, on_error, parallel.Parent.here())
    variants_work = parallel.Work(
        pending, tasks.delayed, outcomes.record, outcomes.finished, outcomes.record_lost,
        seconds, panel=_panel_of(pending[0], panels) if pending else None)
    outcomes.bar = _progress_bar(progress, total=len(todo), initial=len(outcomes.by_id))
    try:
        # the panels go to a dask cluster once, not with every task
        n_workers, backend_used, capped = parallel.dispatch(
            [variants_work, *alongside], outcomes.deaths, jobs=jobs, backend=backend,
            shared=list(panels.values()), start_workers=start_workers, notify=notify)
    finally:
        parallel.remove_memmaps()  # every exit path: done, interrupted, a bug
        outcomes.close()
    ordered = {v.id: outcomes.by_id[v.id] for v in todo}
    extra = {"groups": len(groups), "estimated": outcomes.estimated, "shared": fit is None,
             **{k: v for k, v in outcomes.deaths.items() if v},
             **({"cache_write_errors": cache.write_errors}
                if cache is not None and cache.write_errors else {}),
             **({"cache_unavailable": cache_problem} if cache_problem else {}),
             **({"workers_capped": capped} if capped else {})}
    return ordered, _run_stats(ordered, cache, n_workers, backend_used,
                               time.perf_counter() - start, extra)


def _panel_of(group: Sequence[Variant], panels: Mapping[str, Any]):
    """The panel a share group is estimated on (its members share the sample)."""
    return panels[sample_key(group[0].spec.sample)]


def _open_cache(cache_dir) -> tuple[Cache | None, str | None]:
    """The cache of a run and, when its folder cannot be made (a file in its place),
    no cache and one line saying why: the run goes on without resuming."""
    if cache_dir is None:
        return None, None
    try:
        return Cache(cache_dir), None
    except OSError as exc:
        return None, f"{cache_dir}: {exc.strerror or type(exc).__name__}"


def _share_groups(todo: Sequence[Variant], shared: bool) -> list[list[Variant]]:
    """The units of work: share groups (:func:`_share_key`), or one variant each when
    not ``shared``; ordered by sample, then by the plan position of their first member."""
    by_key: dict[str, list[Variant]] = {}
    for v in todo:
        by_key.setdefault(_share_key(v.spec) if shared else v.id, []).append(v)
    return sorted(by_key.values(), key=lambda g: (sample_key(g[0].spec.sample),
                                                   min(v.order for v in g)))


def _progress_bar(progress: bool | None, total: int, initial: int):
    """A tqdm bar on stderr, or None (``progress`` None: only on a terminal)."""
    if progress is None:
        progress = sys.stderr.isatty()
    if not progress:
        return None
    from tqdm import tqdm
    # A terminal that reports a size of 0 x 0 (a pseudo-terminal without a size)
    # makes tqdm hide its bar (no row left on the screen): fall back to 80 x 24.
    size = shutil.get_terminal_size((80, 24))
    return tqdm(total=total, initial=initial, file=sys.stderr, desc="variants",
                unit="variant", leave=False, ncols=min(size.columns or 80, 100),
                nrows=size.lines or 24)


class _Outcomes:
    """The outcomes of one run as they arrive — from the cache, from estimations
    (each stored in the cache at once, so an interrupted run resumes), or lost with
    their worker — and the progress bar they advance."""

    def __init__(self, cache: Cache | None):
        self.cache = cache
        self.by_id: dict[str, Outcome] = {}
        self.keys: dict[str, str] = {}
        self.bar = None
        self.estimated = 0  # members estimated, cached ones of a rerun group included
        self.deaths = {"worker_deaths": 0, "retried_alone": 0, "lost": 0}

    def look_up(self, group: Sequence[Variant], panel, shared: bool) -> bool:
        """Take the cached members of ``group``; True when any member is missing."""
        if self.cache is None:
            return True
        signature = _group_signature(group) if shared else None
        missing = False
        for v in group:
            self.keys[v.id] = self.cache.key(panel.data_hash, v.spec, signature)
            payload = self.cache.load(self.keys[v.id])
            if payload is None:
                missing = True
            else:
                self.by_id[v.id] = _outcome(v.id, payload, cached=True)
        return missing

    def record(self, results) -> None:
        """Keep the ``(variant id, payload)`` results of one task."""
        for vid, payload in results:
            self.estimated += 1
            if vid in self.by_id:  # cached member of a group that had to run
                continue
            cacheable = payload.pop("cacheable", True)
            if self.cache is not None and cacheable:
                self.cache.store_quietly(self.keys[vid], vid, payload)
            self.by_id[vid] = _outcome(vid, payload, cached=False)
            self._advance()

    def finished(self, group: Sequence[Variant]) -> bool:
        return all(v.id in self.by_id for v in group)

    def record_lost(self, group: Sequence[Variant]) -> None:
        """The members of a group whose worker died twice: failed, not cached."""
        for v in group:
            if v.id in self.by_id:
                continue
            self.deaths["lost"] += 1
            self.by_id[v.id] = Outcome(variant=v.id, status=FAILED, fit=None, bounds=None,
                                       seconds=0.0, cached=False,
                                       failure=_lost(v.id))
            self._advance()

    def _advance(self) -> None:
        if self.bar is not None:
            self.bar.update(1)

    def close(self) -> None:
        if self.bar is not None:
            self.bar.close()


@dataclass(frozen=True)
class _Tasks:
    """The tasks of one run: a share group with its panel and the run's options,
    either run here (:meth:`run`) or sent to joblib (:meth:`delayed`)."""

    panels: Mapping[str, Any]
    fit: Callable | None
    on_error: str
    parent: Any  # the run's process: workers watch it, dask workers check its versions

    def _args(self, group, marker):
        return ([v.id for v in group], [v.spec for v in group], _panel_of(group, self.panels),
                self.fit, self.parent, marker, self.on_error)

    def run(self, group) -> list:
        return _task(*self._args(group, None))

    def delayed(self, group, marker: str | None = None):
        return joblib.delayed(_task)(*self._args(group, marker))


def _run_stats(ordered: Mapping[str, Outcome], cache: Cache | None, n_workers: int,
               backend_used: str, wall_seconds: float, extra: dict) -> RunStats:
    return RunStats(
        variants=len(ordered),
        computed=sum(1 for o in ordered.values() if not o.cached),
        cached=sum(1 for o in ordered.values() if o.cached),
        corrupted=cache.corrupted if cache else 0,
        failed=sum(1 for o in ordered.values() if o.status == FAILED),
        jobs=n_workers,
        backend=backend_used,
        wall_seconds=wall_seconds,
        variant_seconds=sum(o.seconds for o in ordered.values() if not o.cached),
        extra=extra,
    )


def _task(ids, specs, panel, fit, parent_pid: int, marker: str | None = None,
          on_error: str = "raise"):
    parallel.task_started(marker, parent_pid)
    return list(zip(ids, estimate_group(specs, panel, fit, on_error, ids)))


def _lost(vid: str) -> "FitFailure":
    from ..core.results import FitFailure
    return FitFailure(vid, LOST_ERROR_TYPE, LOST_REASON)


def _outcome(vid: str, payload: dict, cached: bool) -> Outcome:
    """The outcome of a payload; fresh and cached results both come through the
    record (``FitResult.from_dict``), so they are identical."""
    from ..core.results import FitFailure, FitResult
    ok = payload["status"] == OK
    return Outcome(variant=vid, status=payload["status"],
                   fit=FitResult.from_dict(payload["fit"]) if ok else None,
                   bounds=payload.get("bounds") if ok else None,
                   seconds=float(payload.get("seconds", 0.0)), cached=cached,
                   failure=None if ok else FitFailure.from_dict(payload["failure"]))
