"""Run the variants of an audit: joblib over variants, on-disk cache, progress bar.

* **Parallel**: one joblib task per share group (below). The default backend is
  loky (processes) with ``jobs`` workers (default: every core, except that an audit
  too small to repay starting worker processes — judged by timing its first group
  against :data:`WORKER_STARTUP_SECONDS` — runs in this process); each worker's BLAS
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
* **Cache**: one JSON file per variant under ``cache_dir``, named by a key that
  hashes the data (the panel's content hash), the variant's canonical estimation
  settings, the package version and its share group's instrument windows. The file stores the result with a sha256 of its
  canonical text; an entry that does not parse or whose checksum does not match is
  treated as missing and recomputed (and counted as corrupted). Entries are written
  atomically by the parent process as soon as each result arrives, so an interrupted
  audit (Ctrl-C, a killed worker) resumes where it stopped (a group with a missing
  member runs whole again) and an unchanged rerun estimates nothing. Variants that fail with :class:`EstimationError` (a property of
  the model and data) are cached as failed; unexpected errors are not cached, so a
  rerun tries them again.
* **Failure isolation**: an exception in a variant marks it ``failed`` with a one-line
  reason; the other variants go on.
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

import contextlib
import hashlib
import json
import math
import os
import shutil
import sys
import tempfile
import time
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any, Callable, Mapping, Sequence

import joblib
import numpy as np

from .. import __version__
from ..errors import EstimationError
from .grid import PLANNED, Variant, canonical_json, canonical_settings, sample_key
from ..atomic import atomic_write_text

CACHE_FORMAT = 1
OK, FAILED = "ok", "failed"
#: BLAS threads per variant estimation, everywhere (this process, loky workers, dask
#: workers). OpenBLAS sums in a different order with a different thread count, which
#: moves results in the 14th digit; one fixed count makes an audit bit-identical
#: whatever ``jobs`` is. Parallelism comes from running variants side by side.
BLAS_THREADS = 1
#: Rough cost of starting loky workers (process start and imports of numpy, scipy and
#: the package; 1–5 s measured on a loaded 2-core machine). With ``jobs=None`` an
#: audit whose estimated sequential time is below this runs in-process.
WORKER_STARTUP_SECONDS = 2.0


# ---------------------------------------------------------------------------
# results of one variant as plain JSON-able records
# ---------------------------------------------------------------------------
def _num(x) -> float | None:
    """A float for a record (NaN stays NaN, written as JSON ``NaN``); None stays None."""
    if x is None:
        return None
    return float(x)


def _test(t) -> dict | None:
    if t is None:
        return None
    out = {"statistic": _num(t.statistic), "p_value": _num(t.p_value),
           "df": None if getattr(t, "df", None) is None else int(t.df)}
    if getattr(t, "reason", None):
        out["reason"] = t.reason  # a test that cannot be computed validly, and why
    return out


def fit_record(result, spec) -> dict:
    """The parts of a :class:`~robustgmm.core.FitResult` an audit keeps, as plain values.

    Adds the sum of the autoregressive coefficients with its standard error
    ``sqrt(1' V 1)`` from the variant's covariance when the outcome has several lags.
    """
    terms = [{"term": t.label, "estimate": _num(t.estimate), "std_error": _num(t.std_error),
              "z": _num(t.z), "p_value": _num(t.p_value)} for t in result.terms]
    counts = result.counts
    record = {
        "terms": terms,
        "std_error_kind": result.std_error_kind,
        "tests": {name: _test(result.tests.get(name)) for name in ("ar1", "ar2", "sargan", "hansen")},
        "difference_hansen": {g: _test(t) for g, t in result.difference_hansen.items()},
        "counts": {k: int(getattr(counts, k)) for k in
                   ("observations", "units", "instruments", "periods", "parameters")
                   if hasattr(counts, k)},
        "warnings": list(result.warnings),
    }
    ar = list(spec.ar_terms())
    labels = [t.label for t in result.terms]
    if len(ar) > 1 and all(a in labels for a in ar):
        idx = [labels.index(a) for a in ar]
        vcov = np.asarray(result.vcov, dtype=float)
        est = float(sum(result.terms[i].estimate for i in idx))
        var = float(vcov[np.ix_(idx, idx)].sum())
        record["ar_sum"] = {"estimate": est, "std_error": math.sqrt(var) if var >= 0 else math.nan}
    return record


def _failure(exc: BaseException) -> dict:
    if isinstance(exc, EstimationError):  # a property of the model and data: cacheable
        return {"status": FAILED, "reason": one_line(exc), "cacheable": True,
                "error_type": type(exc).__name__}
    # a bug or a numerical breakdown: isolate it, and do not cache it
    return {"status": FAILED, "reason": f"{type(exc).__name__}: {one_line(exc)}",
            "cacheable": False, "error_type": type(exc).__name__}


def estimate_group(specs, panel, fit: Callable | None = None,
                   sample: Callable | None = None) -> list[dict]:
    """Estimate a share group of variants and their OLS/within bounds.

    Never raises for a bad variant: each member gets ``{"status", "reason", "fit",
    "bounds", "seconds", "cacheable"}``. By default the group goes to
    :func:`robustgmm.core.fit_family`, which sums the moments once for the group and
    reuses each instrument set's one-step estimate for its two-step siblings. ``fit``
    (tests) replaces it by one call per member; ``sample`` replaces
    :func:`robustgmm.core.estimation_sample`. Bounds are computed once per distinct
    estimation sample and model (members of a share group normally have one).
    """
    from . import bounds as bounds_mod
    from .. import core

    sample = sample or core.estimation_sample
    start = time.perf_counter()
    degenerate = getattr(panel, "degenerate", ())
    if degenerate:  # a column with no information in this sample: not estimable
        reason = "; ".join(degenerate)
        return [{"status": FAILED, "reason": reason, "cacheable": True, "fit": None,
                 "bounds": None, "seconds": 0.0} for _ in specs]
    if fit is None:
        results = core.fit_family(list(specs), panel)
    else:
        results = []
        for spec in specs:
            try:
                results.append(fit(spec, panel))
            except Exception as exc:  # noqa: BLE001 - recorded as the member's failure
                results.append(exc)
    memo: dict = {}
    masks: dict = {}
    out = []
    for spec, res in zip(specs, results):
        if isinstance(res, BaseException):
            out.append({"fit": None, "bounds": None, **_failure(res)})
            continue
        entry = {"status": OK, "reason": "", "fit": None, "bounds": None, "cacheable": True}
        try:
            entry["fit"] = fit_record(res, spec)
        except Exception as exc:  # noqa: BLE001
            out.append({"fit": None, "bounds": None, **_failure(exc)})
            continue
        try:
            # members of a share group differ only in steps, errors and last_lag,
            # none of which moves the estimation sample: build it once
            skey = (spec.outcome, spec.equations, spec.transform, spec.regressor_terms(),
                    spec.extra_instruments)
            if skey not in masks:
                mask = sample(spec, panel)
                masks[skey] = (mask, hashlib.sha256(np.packbits(mask).tobytes()).hexdigest())
            mask, digest = masks[skey]
            key = (digest, mask.shape, spec.time_effects, spec.regressor_terms())
            if key not in memo:
                memo[key] = bounds_mod.ar_bounds(spec, panel, mask).to_dict()
            entry["bounds"] = memo[key]
        except EstimationError as exc:
            entry["bounds"] = {"error": one_line(exc)}
        except Exception as exc:  # noqa: BLE001
            entry["bounds"] = {"error": f"{type(exc).__name__}: {one_line(exc)}"}
        out.append(entry)
    per_variant = (time.perf_counter() - start) / max(len(out), 1)
    for entry in out:
        entry["seconds"] = per_variant
    return out


def estimate_variant(spec, panel, fit: Callable | None = None,
                     sample: Callable | None = None) -> dict:
    """One variant on its own (a share group of one); see :func:`estimate_group`."""
    return estimate_group([spec], panel, fit, sample)[0]


def one_line(exc: BaseException) -> str:
    text = " ".join(str(exc).split())
    return text or type(exc).__name__


# ---------------------------------------------------------------------------
# cache
# ---------------------------------------------------------------------------
class Cache:
    """One checksummed JSON file per variant (see the module docstring)."""

    def __init__(self, directory):
        self.directory = Path(directory)
        self.directory.mkdir(parents=True, exist_ok=True)
        self.corrupted = 0
        self.write_errors = 0

    @staticmethod
    def key(data_hash: str, spec, group: Any = None) -> str:
        """sha256 of the data hash, the canonical settings, the package version and
        ``group``: what else the result depends on (the instrument windows of the
        share group it was estimated with; see :func:`_group_signature`)."""
        text = canonical_json({"format": CACHE_FORMAT, "version": __version__,
                               "data": data_hash, "settings": canonical_settings(spec),
                               "group": group})
        return hashlib.sha256(text.encode()).hexdigest()

    def path(self, key: str) -> Path:
        return self.directory / f"{key}.json"

    def load(self, key: str) -> dict | None:
        path = self.path(key)
        try:
            raw = path.read_bytes()
        except FileNotFoundError:
            return None
        except OSError:  # e.g. a folder in its place
            self.corrupted += 1
            return None
        try:
            entry = json.loads(raw.decode("utf-8"))  # garbage bytes: UnicodeDecodeError
            payload = entry["payload"]
            ok = (entry.get("key") == key and entry.get("format") == CACHE_FORMAT
                  and entry.get("sha256") == _checksum(payload))
        except (ValueError, KeyError, TypeError, AttributeError):
            ok = False
        if not ok:
            self.corrupted += 1  # recomputed and overwritten by the caller
            return None
        return payload

    def store_quietly(self, key: str, variant_id: str, payload: dict) -> bool:
        """:meth:`store`, but a failed write (full disk, read-only folder) is only
        counted: the cache serves resumption, the result itself is not lost."""
        try:
            self.store(key, variant_id, payload)
        except OSError:
            self.write_errors += 1
            return False
        return True

    def store(self, key: str, variant_id: str, payload: dict) -> None:
        entry = {"format": CACHE_FORMAT, "key": key, "version": __version__,
                 "variant": variant_id, "sha256": _checksum(payload), "payload": payload}
        atomic_write_text(self.path(key), json.dumps(entry, allow_nan=True) + "\n")


def _checksum(payload: dict) -> str:
    return hashlib.sha256(canonical_json(payload).encode()).hexdigest()


# ---------------------------------------------------------------------------
# the run
# ---------------------------------------------------------------------------
@dataclass(frozen=True)
class Outcome:
    """What happened to one planned variant."""

    variant: str
    status: str
    reason: str
    fit: dict | None
    bounds: dict | None
    seconds: float
    cached: bool
    #: the exception type of a failure (``UnderidentifiedError``, ...), "" otherwise
    error_type: str = ""


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


def _is_loky(backend_obj) -> bool:
    return type(backend_obj).__name__ == "LokyBackend"


@contextlib.contextmanager
def _blas_limit():
    """Limit BLAS threads in this process for the duration of a run (covers the
    in-process and threading paths; threads share the process-wide setting)."""
    try:
        from threadpoolctl import threadpool_limits
    except ImportError:  # pragma: no cover - a declared dependency
        yield
        return
    from .. import core  # noqa: F401  load numpy's and scipy's BLAS before limiting them
    import scipy.linalg  # noqa: F401
    with threadpool_limits(limits=BLAS_THREADS, user_api="blas"):
        yield


_LIMITED_PIDS: set[int] = set()


def _limit_worker_blas(parent_pid: int) -> None:
    """In a worker process (loky, dask), fix the BLAS threads once for its lifetime.

    Not done in the parent process, where :func:`_blas_limit` already holds (and a
    per-task set/restore would race between threads)."""
    pid = os.getpid()
    if pid == parent_pid or pid in _LIMITED_PIDS:
        return
    try:
        from threadpoolctl import threadpool_limits
    except ImportError:  # pragma: no cover
        return
    from .. import core  # noqa: F401
    import scipy.linalg  # noqa: F401
    threadpool_limits(limits=BLAS_THREADS, user_api="blas")
    _LIMITED_PIDS.add(pid)


def _default_is_loky() -> bool:
    """True unless the caller activated another joblib backend (e.g. dask)."""
    return _is_loky(joblib.parallel.get_active_backend()[0])


@contextlib.contextmanager
def _backend_context(backend: str | None, n_workers: int):
    """The joblib configuration of a run.

    ``backend=None`` keeps whatever backend the caller activated (e.g. dask through
    ``joblib.parallel_config``) and otherwise uses loky. With loky, BLAS threads per
    worker are capped at :data:`BLAS_THREADS` (joblib sets the usual thread-count
    environment variables in the worker processes), so workers never oversubscribe
    the cores.
    """
    if backend is None:
        active, _ = joblib.parallel.get_active_backend()
        backend = "loky" if _is_loky(active) else None
    if backend is None:
        yield _backend_name(joblib.parallel.get_active_backend()[0])
    elif backend == "loky":
        with joblib.parallel_config(backend="loky", inner_max_num_threads=BLAS_THREADS):
            yield "loky"
    else:
        with joblib.parallel_config(backend=backend):
            yield backend


def _backend_name(obj) -> str:
    name = type(obj).__name__
    return name[:-len("Backend")].lower() if name.endswith("Backend") else name


def run_variants(variants: Sequence[Variant], panels: Mapping[str, Any], *,
                 jobs: int | None = None, cache_dir=None, progress: bool | None = False,
                 backend: str | None = None, fit: Callable | None = None,
                 sample: Callable | None = None) -> tuple[dict[str, Outcome], RunStats]:
    """Estimate every planned variant; return ``{variant id: Outcome}`` and run figures.

    ``panels`` maps :func:`robustgmm.grid.sample_key` to the sample's panel.
    ``jobs``: worker count (None: every core, or this process for a small audit;
    -1: every core; 1: this process). ``progress``: a tqdm bar on stderr (None: only
    when stderr is a terminal). ``fit``/``sample``: replacements for the core's
    functions (tests); with ``fit`` every variant is estimated on its own.

    The unit of work is a share group (variants that differ only in steps, errors
    and last_lag; :func:`robustgmm.core.share_key`), estimated together by
    :func:`robustgmm.core.fit_family`. A group runs when any member is missing from
    the cache; it always runs whole, so that its results do not depend on what was
    cached (members already cached keep their cached result, which is identical).
    """
    start = time.perf_counter()
    todo = [v for v in variants if v.status == PLANNED]
    cache, cache_problem = None, None
    if cache_dir is not None:
        try:
            cache = Cache(cache_dir)
        except OSError as exc:  # e.g. a file in its place: run without resuming
            cache_problem = f"{cache_dir}: {exc.strerror or type(exc).__name__}"
    by_key: dict[str, list[Variant]] = {}
    for v in todo:
        key = f"{v.id}" if fit is not None else _share_key(v.spec)
        by_key.setdefault(key, []).append(v)
    groups = sorted(by_key.values(), key=lambda g: (sample_key(g[0].spec.sample),
                                                     min(v.order for v in g)))
    outcomes: dict[str, Outcome] = {}
    keys: dict[str, str] = {}
    pending: list[list[Variant]] = []
    for group in groups:
        signature = None if fit is not None else _group_signature(group)
        panel = panels[sample_key(group[0].spec.sample)]
        missing = False
        for v in group:
            if cache is None:
                missing = True
                continue
            keys[v.id] = cache.key(panel.data_hash, v.spec, signature)
            payload = cache.load(keys[v.id])
            if payload is None:
                missing = True
            else:
                outcomes[v.id] = _outcome(v.id, payload, cached=True)
        if missing:
            pending.append(group)
    # the heaviest groups first, so parallel workers finish close together (the order
    # of results does not depend on it)
    pending.sort(key=lambda g: -_group_weight(g, panels[sample_key(g[0].spec.sample)]))

    n_jobs = -1 if jobs is None else int(jobs)
    if progress is None:
        progress = sys.stderr.isatty()
    bar = None
    if progress:
        from tqdm import tqdm
        bar = tqdm(total=len(todo), initial=len(outcomes), file=sys.stderr,
                   desc="variants", unit="variant", leave=False)
    estimated = 0

    def record(results):
        nonlocal estimated
        for vid, payload in results:
            estimated += 1
            if vid in outcomes:  # cached member of a group that had to run
                continue
            cacheable = payload.pop("cacheable", True)
            if cache is not None and cacheable:
                cache.store_quietly(keys[vid], vid, payload)
            outcomes[vid] = _outcome(vid, payload, cached=False)
            if bar is not None:
                bar.update(1)

    def task(group, marker=None):
        return joblib.delayed(_task)([v.id for v in group], [v.spec for v in group],
                                     panels[sample_key(group[0].spec.sample)], fit, sample,
                                     parent, marker)

    deaths = {"worker_deaths": 0, "retried_alone": 0, "lost": 0}

    def finished(group) -> bool:
        return all(v.id in outcomes for v in group)

    def record_lost(group) -> None:
        for v in group:
            if v.id in outcomes:
                continue
            deaths["lost"] += 1
            outcomes[v.id] = Outcome(variant=v.id, status=FAILED, reason=LOST_REASON, fit=None,
                                     bounds=None, seconds=0.0, cached=False)
            if bar is not None:
                bar.update(1)

    def run_surviving_worker_deaths(groups) -> None:
        """Map ``groups`` over the workers; survive workers that die (module docstring,
        "Lost workers")."""
        markers = Path(tempfile.mkdtemp(prefix="robustgmm-tasks-"))
        try:
            queue = list(range(len(groups)))
            while queue:
                try:
                    for results in _parallel(n_jobs)(task(groups[i], str(markers / f"{i}"))
                                                     for i in queue):
                        record(results)
                    return
                except Exception as exc:  # noqa: BLE001 - only a lost worker is handled
                    if not _worker_died(exc):
                        raise
                    deaths["worker_deaths"] += 1
                unfinished = [i for i in queue if not finished(groups[i])]
                started = [i for i in unfinished if (markers / f"{i}").exists()]
                # without start marks (a remote worker) every unfinished group is a suspect
                suspects = started or unfinished
                for i in suspects:
                    deaths["retried_alone"] += 1
                    try:
                        for results in _parallel(n_jobs)([task(groups[i])]):
                            record(results)
                    except Exception as exc:  # noqa: BLE001
                        if not _worker_died(exc):
                            raise
                        deaths["worker_deaths"] += 1
                        record_lost(groups[i])
                queue = [i for i in unfinished if i not in set(suspects)]
        finally:
            shutil.rmtree(markers, ignore_errors=True)

    backend_used = "in-process"
    n_workers = 1
    parent = os.getpid()
    try:
        if pending and jobs is None and backend is None and _default_is_loky():
            # jobs not set: time the first group here; when the whole audit would
            # take less than starting worker processes costs, stay in this process
            first = pending.pop(0)
            t0 = time.perf_counter()
            with _blas_limit():
                record(_task([v.id for v in first], [v.spec for v in first],
                             panels[sample_key(first[0].spec.sample)], fit, sample, parent))
            per_variant = (time.perf_counter() - t0) / len(first)
            if sum(len(g) for g in pending) * per_variant < WORKER_STARTUP_SECONDS:
                n_jobs = 1
        if pending:
            n_workers = joblib.effective_n_jobs(n_jobs)
            with _backend_context(backend, n_workers) as backend_used, _blas_limit():
                n_workers = joblib.effective_n_jobs(n_jobs)  # as the active backend sees it
                if n_workers == 1:  # in this process: nothing to lose but ourselves
                    for results in _parallel(n_jobs)(task(g) for g in pending):
                        record(results)
                else:
                    run_surviving_worker_deaths(pending)
            if n_workers == 1:
                backend_used = "in-process"
    finally:
        if bar is not None:
            bar.close()
    ordered = {v.id: outcomes[v.id] for v in todo}
    stats = RunStats(
        variants=len(todo),
        computed=sum(1 for o in ordered.values() if not o.cached),
        cached=sum(1 for o in ordered.values() if o.cached),
        corrupted=cache.corrupted if cache else 0,
        failed=sum(1 for o in ordered.values() if o.status == FAILED),
        jobs=n_workers,
        backend=backend_used,
        wall_seconds=time.perf_counter() - start,
        variant_seconds=sum(o.seconds for o in ordered.values() if not o.cached),
        extra={"groups": len(groups), "estimated": estimated,
               "shared": fit is None,
               **({k: v for k, v in deaths.items() if v}),
               **({"cache_write_errors": cache.write_errors}
                  if cache is not None and cache.write_errors else {}),
               **({"cache_unavailable": cache_problem} if cache_problem else {})},
    )
    return ordered, stats


def _group_weight(group, panel) -> float:
    """A rough cost of a share group: members × equations × instrument columns per
    unit (per-period instruments grow with the periods, collapsed ones do not)."""
    spec = group[0].spec
    periods = max(getattr(panel, "n_periods", 1), 1)
    width = periods * periods if spec.form == "per-period" else periods
    return len(group) * (2 if spec.equations == "system" else 1) * width


def _parallel(n_jobs: int) -> joblib.Parallel:
    # results stream back as they finish, so each is cached at once (resume)
    try:
        return joblib.Parallel(n_jobs=n_jobs, return_as="generator_unordered")
    except ValueError:  # a backend without unordered generators
        return joblib.Parallel(n_jobs=n_jobs, return_as="generator")


def _task(ids, specs, panel, fit, sample, parent_pid: int, marker: str | None = None):
    if marker is not None:  # "this group has started" (see run_surviving_worker_deaths)
        try:
            Path(marker).touch()
        except OSError:  # e.g. a remote worker without the parent's folder
            pass
    _limit_worker_blas(parent_pid)
    return list(zip(ids, estimate_group(specs, panel, fit, sample)))


#: Names of the exceptions joblib backends raise when a worker process dies: loky's
#: ``TerminatedWorkerError`` (a ``BrokenProcessPool``) and dask's ``KilledWorker``.
WORKER_DEATHS = ("TerminatedWorkerError", "BrokenProcessPool", "KilledWorker")
LOST_REASON = ("the worker process estimating this variant died twice (killed, crashed or "
               "out of memory); rerun the audit to try it again")


def _worker_died(exc: BaseException) -> bool:
    return any(t.__name__ in WORKER_DEATHS for t in type(exc).__mro__)


def _outcome(vid: str, payload: dict, cached: bool) -> Outcome:
    return Outcome(variant=vid, status=payload["status"], reason=payload["reason"],
                   fit=payload.get("fit"), bounds=payload.get("bounds"),
                   seconds=float(payload.get("seconds", 0.0)), cached=cached,
                   error_type=str(payload.get("error_type", "")))
