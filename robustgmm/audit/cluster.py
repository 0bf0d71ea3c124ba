"""Run an audit's variants on an existing dask.distributed cluster.

The user names a running scheduler (``--scheduler tcp://HOST:PORT``, else the
``DASK_SCHEDULER_ADDRESS`` environment variable, else ``scheduler = "..."`` under
``[run]`` in the model file; :func:`resolve`). :func:`connect` opens a client
within :data:`CONNECT_SECONDS`, waits for a first worker, checks that every worker
runs the same robustgmm, numpy and scipy as this process (:func:`versions`; the
cache key and bit-identical results depend on them) and makes the client the
default one, so that joblib's dask backend (``backend="dask"`` in the runner) sends
the share groups to the cluster. The runner scatters each sample's panel to the
workers once (``parallel_config(backend="dask", scatter=...)``), results come back
to this process as they finish and are cached here, so an interrupted cluster run
resumes locally or on the cluster.

Every problem is one :class:`~robustgmm.errors.InputError` line naming the address:
dask.distributed not installed, an address that is not one, a scheduler that cannot
be reached, no worker within :data:`WORKER_WAIT_SECONDS`, other package versions
on a worker. Nothing here starts a scheduler or workers.
"""
from __future__ import annotations

import contextlib
import logging
import os
import re
import uuid
from typing import Iterator

from ..errors import InputError

#: The environment variable dask itself reads for the scheduler's address.
SCHEDULER_ENV = "DASK_SCHEDULER_ADDRESS"
#: How long to try to reach the scheduler before giving up (a refused or
#: unroutable address fails within this, never hangs).
CONNECT_SECONDS = 5.0
#: How long to wait for a first worker of a scheduler that has none yet (workers
#: of a batch queue may still be starting).
WORKER_WAIT_SECONDS = 60.0
#: Address schemes of dask.distributed's communication layers.
SCHEMES = ("tcp", "tls", "ucx", "ws", "wss", "inproc")
_ADDRESS = re.compile(r"^(?:(?P<scheme>[a-z]+)://)?(?P<host>\[[0-9a-fA-F:.]+\]|[^:/\s\[\]]+)"
                      r":(?P<port>[0-9]{1,5})/?$")
#: The packages whose versions must agree between this process and every worker.
VERSIONED = ("robustgmm", "numpy", "scipy")


def resolve(command_line: str | None, model_value: str | None,
            model_source: str = "model file") -> tuple[str, str] | None:
    """The scheduler address and where it came from (for messages), or None.

    The command line wins over the environment, the environment over the model file.
    """
    if command_line is not None:
        return check_address(command_line, "--scheduler"), "--scheduler"
    env = os.environ.get(SCHEDULER_ENV)
    if env not in (None, ""):
        return check_address(env, SCHEDULER_ENV), SCHEDULER_ENV
    if model_value is not None:
        where = f"{model_source}: [run] scheduler"
        return check_address(model_value, where), where
    return None


def address_problem(address) -> str | None:
    """Why ``address`` is not a scheduler address (None when it is one)."""
    if not isinstance(address, str) or not address.strip():
        return "must be a scheduler address in quotes, e.g. \"tcp://login1:8786\""
    m = _ADDRESS.match(address.strip())
    if m is None:
        return "is not a scheduler address; use tcp://HOST:PORT, e.g. tcp://login1:8786"
    if m.group("scheme") is not None and m.group("scheme") not in SCHEMES:
        return (f"unknown protocol {m.group('scheme')}://; use one of "
                + ", ".join(f"{s}://" for s in SCHEMES))
    if not 0 < int(m.group("port")) < 65536:
        return f"port {m.group('port')} is not between 1 and 65535"
    return None


def check_address(address: str, where: str) -> str:
    problem = address_problem(address)
    if problem is not None:
        raise InputError(f"{where} = {address!r}: {problem}")
    return address.strip()


def versions() -> dict[str, str]:
    """The versions of :data:`VERSIONED` in this process (run on each worker too)."""
    import numpy
    import scipy
    from .. import __version__
    return {"robustgmm": __version__, "numpy": numpy.__version__, "scipy": scipy.__version__}


def mismatch(here: dict, there: dict) -> str | None:
    """'robustgmm 0.2.0, numpy 2.1.0 there; robustgmm 0.1.0, numpy 2.4.6 here' for
    the packages whose versions differ, None when they agree."""
    differ = [k for k in VERSIONED if here.get(k) != there.get(k)]
    if not differ:
        return None
    return (", ".join(f"{k} {there.get(k, 'not installed')}" for k in differ) + " there; "
            + ", ".join(f"{k} {here.get(k)}" for k in differ) + " here")


def version_error(address: str, worker: str, text: str) -> InputError:
    return InputError(f"{address}: worker {worker} runs other package versions than this "
                      f"process ({text}); every worker needs the same robustgmm, numpy and "
                      "scipy versions (install the same environment on the cluster)")


def _worker_versions() -> dict:  # runs on the workers
    try:
        return versions()
    except ImportError as exc:  # robustgmm (or numpy) missing on the worker
        return {"robustgmm": f"not importable ({exc.name or exc})"}


@contextlib.contextmanager
def _quiet_distributed() -> Iterator[None]:
    """dask.distributed logs connection retries and shutdown chatter on stderr; the
    command line reports problems as one line of its own."""
    loggers = [logging.getLogger(n) for n in ("distributed", "tornado", "asyncio")]
    levels = [lg.level for lg in loggers]
    for lg in loggers:
        lg.setLevel(logging.CRITICAL)
    try:
        yield
    finally:
        for lg, level in zip(loggers, levels):
            lg.setLevel(level)


@contextlib.contextmanager
def connect(address: str, where: str = "--scheduler",
            connect_seconds: float = CONNECT_SECONDS,
            worker_seconds: float = WORKER_WAIT_SECONDS) -> Iterator[object]:
    """A client of the scheduler at ``address``, the default client while the block
    runs (see the module docstring); closed on every exit path."""
    try:
        from distributed import Client
    except ImportError:
        raise InputError(f"{where} {address}: running on a cluster needs dask.distributed, "
                         "which is not installed: pip install 'robustgmm[dask]'") from None
    with _quiet_distributed():
        try:
            client = Client(address, timeout=connect_seconds, set_as_default=True)
        except Exception as exc:  # noqa: BLE001 - OSError, TimeoutError, ...: one line
            reason = " ".join(str(exc).split()) or type(exc).__name__
            if isinstance(exc, (OSError, TimeoutError)):
                raise InputError(f"{where} {address}: cannot reach the dask scheduler "
                                 f"({reason}); check the address and that the scheduler is "
                                 "running") from None
            raise InputError(f"{where} {address}: what answers there is not a dask scheduler "
                             f"of this dask version ({type(exc).__name__}: {reason})") from None
        try:
            try:
                client.wait_for_workers(1, timeout=worker_seconds)
            except Exception:  # noqa: BLE001 - a timeout
                raise InputError(f"{address}: the dask scheduler has no workers (waited "
                                 f"{worker_seconds:.0f} s); start workers that connect to "
                                 "it") from None
            here = versions()
            try:
                answers = client.run(_worker_versions)
            except Exception as exc:  # noqa: BLE001 - e.g. robustgmm not importable there
                reason = " ".join(str(exc).split()) or type(exc).__name__
                raise InputError(f"{address}: the workers could not run robustgmm's version "
                                 f"check ({type(exc).__name__}: {reason}); install the same "
                                 "robustgmm, numpy and scipy on every worker") from None
            for worker, there in sorted(answers.items()):
                text = mismatch(here, there)
                if text is not None:
                    raise version_error(address, worker, text)
            yield client
        finally:
            with contextlib.suppress(Exception):
                client.close(timeout=connect_seconds)


#: The joblib backend name of :func:`dask_backend` (registered on first use).
BACKEND_NAME = "robustgmm-dask"


def dask_backend() -> str:
    """Register (once) and name joblib's dask backend with one repair.

    joblib 1.6's dask backend reports a task that dask itself fails (a worker lost
    while running it: ``KilledWorker``; a cancelled task) only to the future of the
    task, not to the map's completion callback, so ``Parallel`` waits for it forever
    and a lost worker hangs the audit. The subclass passes the failure to the callback
    too, which makes joblib raise it, as it does for a task that raised; the runner
    then retries the groups that were running (:func:`robustgmm.audit.parallel.
    run_surviving_worker_deaths`). Also, the work always goes to the cluster, even
    to a single worker thread (joblib would run a one-thread map in this process)."""
    import joblib
    from joblib._dask import DaskDistributedBackend
    from joblib.parallel import BACKENDS

    if BACKEND_NAME in BACKENDS:
        return BACKEND_NAME

    class DaskBackend(DaskDistributedBackend):
        def effective_n_jobs(self, n_jobs):
            # joblib runs a map in the calling process when this is 1: a cluster of
            # one worker thread (or one left after losing the others) still gets
            # the work; only jobs = 1 (which joblib answers before asking) stays here
            return max(super().effective_n_jobs(n_jobs), 2)

        def submit(self, func, callback=None):
            future = super().submit(func, callback)

            def failed(f):
                exc = f.exception()
                if exc is not None and callback is not None:
                    callback(exc)  # raised again by joblib's result retrieval
            future.add_done_callback(failed)
            return future

    joblib.register_parallel_backend(BACKEND_NAME, DaskBackend)
    return BACKEND_NAME


def _hold(obj):  # runs on a worker: its output is the shared object
    return obj


def share_with_workers(backend, objects) -> None:
    """Send each of ``objects`` (the panels) to the cluster once, as the output of a
    task, and have joblib's dask ``backend`` pass that future to every task that
    takes the object as an argument (joblib matches arguments by identity in its
    ``data_futures``), instead of a copy per task.

    A task output rather than ``client.scatter``: dask drops the extra copies of
    scattered data (its memory manager keeps one) and cannot recover scattered data
    whose last holder dies, which stops every task that needs it; a task's output is
    recomputed from the task (kept by the scheduler) when its holder is lost. Workers
    fetch the object from each other when they first need it."""
    if not objects or not hasattr(backend, "data_futures"):
        return  # not joblib's dask backend: joblib then copies the objects per task
    client = backend.client
    futures = {id(obj): client.submit(_hold, obj, pure=False,
                                      key=f"robustgmm-panel-{uuid.uuid4().hex}")
               for obj in objects}
    backend._scatter = list(objects)  # keeps the objects (and so their ids) alive
    backend.data_futures = futures


def check_worker_versions(expected: dict | None) -> None:
    """In a task: refuse to estimate on a worker whose versions differ from the
    client's (a worker that joined after :func:`connect` checked the others)."""
    if not expected:
        return
    # seen from the client, which prints the message: "there" is this worker
    text = mismatch(expected, versions())
    if text is not None:
        worker = "?"
        with contextlib.suppress(Exception):
            from distributed import get_worker
            worker = get_worker().address
        raise version_error("the cluster", worker, text)


def in_dask_worker() -> bool:
    """True inside a dask.distributed worker (its tasks must not watch the client's
    process id: the client may run on another machine)."""
    import sys
    if "distributed" not in sys.modules:
        return False
    try:
        from distributed import get_worker
        get_worker()
        return True
    except Exception:  # noqa: BLE001 - ValueError outside a worker
        return False
