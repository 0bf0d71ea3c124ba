"""Where the variants run: joblib backends, BLAS threads, worker limits and lost
workers.

* **Backends**: loky (processes) by default; any joblib backend the caller activates
  (e.g. ``joblib.parallel_config("dask")``) or names is used as it is.
* **BLAS threads**: :data:`BLAS_THREADS` per estimation in this process and every
  worker, so that results do not depend on the number of workers.
* **Limits** (:func:`worker_count`): never more workers than tasks or cores, nor
  more than the available memory holds at the estimated footprint of one worker.
* **Worker memory**: a loky worker that grows by more than 300 MB after its first
  task is taken for a leak and replaced by a new process (imports again); the
  runner's workers allow the memory a worker may use (:func:`worker_footprint_mb`)
  and keep freed memory for their next estimation (:mod:`robustgmm.allocator`).
* **Parent death**: each worker watches the process that started it and exits when
  it is gone (killed with SIGKILL, out of memory), instead of computing on.
* **Temporary files**: arrays joblib memory-maps for the workers go into a folder
  of this run (``robustgmm-memmap-<pid>-*`` in joblib's usual place), removed on every
  exit path; folders left by runs that died are removed at the next start.
* **Lost workers** (:func:`run_surviving_worker_deaths`): a worker that dies stops the
  joblib map; the groups that were running are retried alone once, then recorded
  lost; the groups not started are sent again.
"""
from __future__ import annotations

import contextlib
import os
import shutil
import tempfile
import threading
import time
from dataclasses import dataclass
from pathlib import Path
from typing import Callable, Sequence

import joblib

#: BLAS threads per variant estimation, everywhere (this process, loky workers, dask
#: workers). OpenBLAS sums in a different order with a different thread count, which
#: moves results in the 14th digit; one fixed count makes an audit bit-identical
#: whatever ``jobs`` is. Parallelism comes from running variants side by side.
BLAS_THREADS = 1
#: Rough cost of starting loky workers (process start and imports of numpy, scipy and
#: the package; 1–5 s measured on a loaded 2-core machine). Workers start only when
#: the time they would save exceeds it (:func:`robustgmm.audit.cost.repays_workers`).
WORKER_STARTUP_SECONDS = 2.0
#: Memory of an idle worker (Python, numpy, scipy, pandas and the package imported;
#: about 150 MB measured with ps on this machine), before its estimation's arrays.
WORKER_BASE_MB = 150
#: How often a worker checks that the process that started it is alive.
PARENT_POLL_SECONDS = 1.0
MEMMAP_PREFIX = "robustgmm-memmap-"


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


def _is_dask(backend_obj) -> bool:
    return any(t.__name__ == "DaskDistributedBackend" for t in type(backend_obj).__mro__)


def _default_is_loky() -> bool:
    """True unless the caller activated another joblib backend (e.g. dask)."""
    return _is_loky(joblib.parallel.get_active_backend()[0])


@contextlib.contextmanager
def _backend_context(backend: str | None, shared: Sequence = ()):
    """The joblib configuration of a run.

    ``backend=None`` keeps whatever backend the caller activated (e.g. dask through
    ``joblib.parallel_config``) and otherwise uses loky. With loky, BLAS threads per
    worker are capped at :data:`BLAS_THREADS` (joblib sets the usual thread-count
    environment variables in the worker processes), so workers never oversubscribe
    the cores. With ``backend="dask"`` the objects in ``shared`` (the panels) are
    scattered to every worker once when the block starts; joblib's dask backend then
    sends each task a reference to them instead of a copy (it matches arguments by
    identity).
    """
    client = None
    if backend is None:
        active, _ = joblib.parallel.get_active_backend()
        backend = "loky" if _is_loky(active) else None
        if _is_dask(active):  # the caller's dask client, with the repairs below
            backend, client = "dask", active.client
    if backend is None:
        yield _backend_name(joblib.parallel.get_active_backend()[0])
    elif backend == "loky":
        with joblib.parallel_config(backend="loky", inner_max_num_threads=BLAS_THREADS):
            yield "loky"
    elif backend == "dask":
        from .cluster import WORKER_WAIT_SECONDS, dask_backend, share_with_workers
        # workers lost all at once (restarted by their nannies, or a batch queue
        # replacing them) get time to come back before joblib gives up
        with joblib.parallel_config(backend=dask_backend(), client=client,
                                    wait_for_workers_timeout=WORKER_WAIT_SECONDS):
            share_with_workers(joblib.parallel.get_active_backend()[0],
                               [obj for obj in shared if not isinstance(obj, str)])
            yield backend
    else:
        with joblib.parallel_config(backend=backend):
            yield backend


def _backend_name(obj) -> str:
    name = type(obj).__name__
    return name[:-len("Backend")].lower() if name.endswith("Backend") else name


def _parallel(n_jobs: int) -> joblib.Parallel:
    # results stream back as they finish, so each is cached at once (resume);
    # memory-mapped arrays go into this run's own folder (see memmap_folder)
    kw = {"temp_folder": str(memmap_folder())} if _default_is_loky() and n_jobs != 1 else {}
    # joblib's dask backend never reports a failed task to an unordered generator
    # (joblib 1.6: the error skips the completion callback, so the map waits
    # forever): in plan order there, heaviest groups first as everywhere
    order = "generator" if _is_dask(joblib.parallel.get_active_backend()[0]) \
        else "generator_unordered"
    try:
        return joblib.Parallel(n_jobs=n_jobs, return_as=order, **kw)
    except ValueError:  # a backend without unordered generators
        return joblib.Parallel(n_jobs=n_jobs, return_as="generator", **kw)


#: Names of the exceptions joblib backends raise when a worker process dies: loky's
#: ``TerminatedWorkerError`` (a ``BrokenProcessPool``) and dask's ``KilledWorker``.
WORKER_DEATHS = ("TerminatedWorkerError", "BrokenProcessPool", "KilledWorker")
LOST_REASON = ("the worker process estimating this variant died twice (killed, crashed or "
               "out of memory); rerun the audit to try it again")


def _worker_died(exc: BaseException) -> bool:
    return any(t.__name__ in WORKER_DEATHS for t in type(exc).__mro__)


# ---------------------------------------------------------------------------
# limits
# ---------------------------------------------------------------------------
def available_memory_mb() -> float | None:
    """Memory available to new processes: the cgroup limit minus its usage when one
    is set (containers), else the kernel's MemAvailable; None when unknown."""
    for limit_file, usage_file in (("/sys/fs/cgroup/memory.max", "/sys/fs/cgroup/memory.current"),
                                   ("/sys/fs/cgroup/memory/memory.limit_in_bytes",
                                    "/sys/fs/cgroup/memory/memory.usage_in_bytes")):
        try:
            limit = Path(limit_file).read_text().strip()
            usage = int(Path(usage_file).read_text().strip())
        except (OSError, ValueError):
            continue
        if limit.isdigit() and int(limit) < 2**60:
            return (int(limit) - usage) / 2**20
    try:
        for line in Path("/proc/meminfo").read_text().splitlines():
            if line.startswith("MemAvailable:"):
                return int(line.split()[1]) / 1024
    except (OSError, ValueError, IndexError):
        pass
    return None


def worker_footprint_mb(panel) -> float:
    """Estimated memory of one worker: :data:`WORKER_BASE_MB` plus its copy of the
    panel and the core's memory budget for one estimation."""
    from ..core.engine import memory_budget
    panel_mb = sum(getattr(a, "nbytes", 0) for a in getattr(panel, "values", {}).values()) / 2**20
    try:
        budget = memory_budget() / 2**20
    except ValueError:
        budget = 1024.0
    return WORKER_BASE_MB + panel_mb + budget


def worker_count(n_jobs: int, n_tasks: int, panel=None) -> tuple[int, str | None]:
    """The workers to start and, when fewer than asked, one line saying why.

    Never more than the tasks or (for processes on this machine) the cores, and no
    more than the available memory holds at :func:`worker_footprint_mb` each."""
    wanted = joblib.effective_n_jobs(n_jobs)
    n = min(wanted, max(n_tasks, 1))
    reasons = []
    if n < wanted:
        reasons.append(f"{n_tasks} task{'s' if n_tasks != 1 else ''} to run")
    if _default_is_loky():
        cores = joblib.cpu_count()
        if n > cores:
            n = cores
            reasons.append(f"{cores} cores")
        free = available_memory_mb()
        if free is not None and n > 1:
            per = worker_footprint_mb(panel)
            fits = max(int(free // per), 1)
            if fits < n:
                n = fits
                reasons.append(f"{free:.0f} MB of free memory at about {per:.0f} MB per worker")
    if n < wanted and n_jobs != -1:
        return n, f"{n} worker{'s' if n != 1 else ''} instead of {wanted}: " + "; ".join(reasons)
    return n, None


# ---------------------------------------------------------------------------
# inside a worker: BLAS threads, parent watchdog
# ---------------------------------------------------------------------------
_WATCHED: set[int] = set()


@dataclass(frozen=True)
class Parent:
    """The process that runs an audit, as its tasks see it: its id (a worker on this
    machine watches it) and its package versions (a dask worker checks its own
    against them, :func:`robustgmm.audit.cluster.check_worker_versions`)."""

    pid: int
    versions: tuple = ()

    @classmethod
    def here(cls) -> "Parent":
        from .cluster import versions
        return cls(os.getpid(), tuple(sorted(versions().items())))


def in_worker(parent: "int | Parent") -> None:
    """Set up this process once when it runs a task for ``parent``: BLAS threads and
    a watchdog that ends the worker when the parent is gone. In a dask worker: the
    version check instead of the watchdog (the parent may run on another machine,
    where its process id means nothing, and the cluster outlives it)."""
    parent_pid = parent if isinstance(parent, int) else parent.pid
    pid = os.getpid()
    if pid == parent_pid:
        return
    from . import cluster
    if cluster.in_dask_worker():
        cluster.check_worker_versions(dict(getattr(parent, "versions", ())))
        _limit_worker_blas(parent_pid)
        return
    _limit_worker_blas(parent_pid)
    if pid in _WATCHED:
        return
    _WATCHED.add(pid)
    from ..allocator import keep_freed_memory
    keep_freed_memory()  # a worker runs estimation after estimation
    _allow_worker_memory()
    threading.Thread(target=_watch_parent, args=(parent_pid,), daemon=True,
                     name="robustgmm-parent-watchdog").start()


def _allow_worker_memory() -> None:
    """Raise loky's leak check in this worker to the memory a worker may use.

    A loky worker measures its resident memory after its first task and exits
    ("memory leak detected") when it has grown by more than 300 MB since; the
    executor then starts a new process, which imports everything again. A worker's
    memory is bounded instead by :func:`worker_footprint_mb` (the core's budget per
    estimation, ``ROBUSTGMM_MEMORY_MB``), and memory freed by numpy stays resident in
    the allocator's arenas: a large audit (200 variants at N = 5,000, T = 12)
    restarted a worker mid-run this way, paying its start-up again. A loky without
    the setting (another version) keeps its own check."""
    try:
        from joblib.externals.loky import process_executor
    except ImportError:  # pragma: no cover - joblib without loky
        return
    limit = int(worker_footprint_mb(None) * 2**20)
    if getattr(process_executor, "_MAX_MEMORY_LEAK_SIZE", None) is not None:
        process_executor._MAX_MEMORY_LEAK_SIZE = max(process_executor._MAX_MEMORY_LEAK_SIZE,
                                                     limit)


def _watch_parent(parent_pid: int) -> None:
    """Exit this worker as soon as ``parent_pid`` no longer runs (SIGKILL, out of
    memory): its results would have nowhere to go. Polls, since a loky worker is not
    always the parent's direct child (so a parent-death signal does not apply)."""
    while True:
        time.sleep(PARENT_POLL_SECONDS)
        try:
            os.kill(parent_pid, 0)
        except ProcessLookupError:
            os._exit(1)
        except PermissionError:
            pass
        if os.getppid() == 1 and parent_pid != 1:  # re-parented to init: the tree is gone
            os._exit(1)


# ---------------------------------------------------------------------------
# temporary memory-mapped files
# ---------------------------------------------------------------------------
_MEMMAP: dict[int, Path] = {}


def _memmap_root() -> Path:
    shm = Path("/dev/shm")
    return shm if shm.is_dir() and os.access(shm, os.W_OK) else Path(tempfile.gettempdir())


def memmap_folder() -> Path:
    """This process's folder for joblib's memory-mapped arrays (created on first use;
    stale folders of dead runs are removed then)."""
    pid = os.getpid()
    if pid not in _MEMMAP:
        remove_stale_memmaps()
        _MEMMAP[pid] = Path(tempfile.mkdtemp(prefix=f"{MEMMAP_PREFIX}{pid}-", dir=_memmap_root()))
    return _MEMMAP[pid]


def remove_memmaps() -> None:
    """Remove this process's memory-map folder (every exit path calls it)."""
    folder = _MEMMAP.pop(os.getpid(), None)
    if folder is not None:
        shutil.rmtree(folder, ignore_errors=True)


def remove_stale_memmaps() -> list[Path]:
    """Folders of robustgmm runs whose process no longer exists."""
    removed = []
    for root in {_memmap_root(), Path(tempfile.gettempdir())}:
        for path in root.glob(MEMMAP_PREFIX + "*"):
            try:
                pid = int(path.name[len(MEMMAP_PREFIX):].split("-")[0])
            except ValueError:
                continue
            try:
                os.kill(pid, 0)
                continue  # alive
            except ProcessLookupError:
                pass
            except PermissionError:
                continue
            shutil.rmtree(path, ignore_errors=True)
            removed.append(path)
    return removed


def task_started(marker: str | None, parent) -> None:
    """What every task does first, in this process or a worker: leave the "this task
    has started" mark of :func:`run_surviving_worker_deaths` (none on a remote worker
    without the parent's folder) and set the worker up (:func:`in_worker`)."""
    if marker is not None:
        try:
            open(marker, "a").close()
        except OSError:
            pass
    in_worker(parent)


@dataclass(frozen=True)
class Work:
    """The tasks of one kind in a run and where their results go: the variants' share
    groups (:mod:`robustgmm.audit.runner`) or the dropping-units analyses
    (:mod:`robustgmm.audit.dropping`). :func:`dispatch` runs several kinds in one
    pool, so that a worker free of one kind takes tasks of the other."""

    groups: Sequence
    #: ``delayed(group, marker=None)``: the joblib delayed call of one group
    delayed: Callable
    #: ``record(results)``: keeps the results of one task as they arrive
    record: Callable
    #: ``finished(group)``: whether every member of ``group`` has a result
    finished: Callable
    #: ``lost(group)``: records the members of a group whose worker died twice
    lost: Callable
    #: the estimated sequential seconds of each group (same order as ``groups``)
    seconds: Sequence[float]
    #: the largest panel the tasks use (the worker footprint of :func:`worker_count`)
    panel: object = None


def _tagged(index: int, function: Callable, *args, **kwargs):
    """A task of the ``index``-th :class:`Work` of a :func:`dispatch`, and its result
    tagged with that index. The task's own arguments stay top-level arguments: joblib's
    dask backend replaces a scattered panel by its reference only there."""
    return index, function(*args, **kwargs)


def dispatch(works: Sequence[Work], deaths: dict, *, jobs: int | None, backend: str | None,
             shared: Sequence, start_workers: bool,
             notify: Callable[[str], None] | None, what: str = "") -> tuple[int, str, str | None]:
    """Run the groups of every :class:`Work` in one pool, the longest estimated first
    (whatever their kind, so that no worker is left with a long task at the end; the
    results do not depend on the order); return the workers used, the backend's name
    and why fewer workers ran than asked (None when not).

    With local worker processes (the default loky backend) the workers start only
    when the estimated sequential seconds repay their start-up
    (:func:`robustgmm.audit.cost.repays_workers`; the one-line note, prefixed by
    ``what``, goes to ``notify``), unless ``start_workers``; any other backend
    (threads, a dask cluster, which gets the ``shared`` objects once) is used as
    asked. Never more workers than groups, cores or the free memory holds at the
    largest panel's footprint (:func:`worker_count`); with several, a lost worker's
    groups are retried (:func:`run_surviving_worker_deaths`, counted in ``deaths``)."""
    from . import cost
    tagged = [(k, g, s) for k, w in enumerate(works) for g, s in zip(w.groups, w.seconds)]
    tagged.sort(key=lambda t: -t[2])  # stable: equal estimates keep their order
    groups = [(k, g) for k, g, _ in tagged]
    panels = [w.panel for w in works if w.groups and w.panel is not None]
    panel = max(panels, key=lambda p: getattr(p, "n_units", 0)) if panels else None

    def delayed(item, marker=None):
        function, args, kwargs = works[item[0]].delayed(item[1], marker)
        return _tagged, (item[0], function, *args), kwargs

    def record(result):
        works[result[0]].record(result[1])

    n_jobs = -1 if jobs is None else int(jobs)
    if groups and backend is None and _default_is_loky() and not start_workers:
        allowed, _ = worker_count(n_jobs, len(groups), panel)
        if allowed > 1:
            seconds = float(sum(s for _, _, s in tagged))
            start = cost.repays_workers(seconds, allowed)
            if notify is not None:
                notify(what + cost.dispatch_line(seconds, allowed, start))
            if not start:
                n_jobs = 1
    if not groups:
        return 1, "in-process", None
    with _backend_context(backend, shared) as backend_used, _blas_limit():
        n_workers, capped = worker_count(n_jobs, len(groups), panel)
        if n_workers == 1:  # in this process: nothing to lose but ourselves
            for result in _parallel(1)(delayed(g) for g in groups):
                record(result)
        else:
            run_surviving_worker_deaths(
                groups, delayed, record, lambda item: works[item[0]].finished(item[1]),
                lambda item: works[item[0]].lost(item[1]), n_workers, deaths)
    return n_workers, ("in-process" if n_workers == 1 else backend_used), capped


# ---------------------------------------------------------------------------
# lost workers
# ---------------------------------------------------------------------------
def run_surviving_worker_deaths(groups: Sequence, task: Callable, record: Callable,
                                finished: Callable, record_lost: Callable, n_jobs: int,
                                deaths: dict) -> None:
    """Map ``groups`` over the workers; survive workers that die (module docstring,
    "Lost workers"). ``task(group, marker)`` makes the joblib task (it touches
    ``marker`` when it starts); ``record(results)`` keeps results as they arrive;
    ``finished(group)`` says whether every member has a result; ``record_lost(group)``
    records the members of a group whose worker died twice; ``deaths`` counts
    ``worker_deaths``, ``retried_alone`` and ``lost``."""
    # inside this run's folder, so that a run killed with SIGKILL leaves nothing that
    # the next run's stale-folder cleanup does not remove
    markers = Path(tempfile.mkdtemp(prefix="tasks-", dir=memmap_folder()))
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
        remove_memmaps()
