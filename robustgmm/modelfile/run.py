"""The model file's ``[run]`` section: where an audit runs, not what it estimates.

``[run] scheduler = "tcp://HOST:PORT"`` names a running dask.distributed scheduler
(:mod:`robustgmm.audit.cluster`); ``--scheduler`` and the ``DASK_SCHEDULER_ADDRESS``
environment variable win over it. Nothing here is part of the :class:`~robustgmm.spec.Spec`:
where variants are estimated never changes their results, their cache key or the
audit's files. The schema lists the section (so its keys are checked like every
other section's); :func:`check_run` checks the values while the model file is read,
:func:`read_run` returns them to the command line.
"""
from __future__ import annotations

from dataclasses import dataclass

from .checks import MISSING


@dataclass(frozen=True)
class RunSettings:
    """``[run]`` of a model file (None: not given)."""

    scheduler: str | None = None


def _scheduler_problem(value) -> str | None:
    from ..audit.cluster import address_problem
    return address_problem(value)


def check_run(table: dict, reader) -> RunSettings:
    """Check ``[run]`` (a parsed table) into ``reader``'s problems; the valid part."""
    value = table.get("scheduler", MISSING)
    if value is MISSING:
        return RunSettings()
    problem = _scheduler_problem(value)
    if problem is not None:
        reader.add("[run] scheduler", problem, value, ("run", "scheduler"))
        return RunSettings()
    return RunSettings(scheduler=value.strip())


def read_run(path) -> RunSettings:
    """The ``[run]`` settings of the model file at ``path`` (which
    :func:`robustgmm.modelfile.read_model` has read; a bad value raises its line)."""
    from .schema import read_section
    return read_section(path, "run", check_run)
