"""Keep freed memory in the process for the next estimation (glibc only).

A fit allocates its chunk arrays (tens of MB at a time) and frees them when it
ends. By default glibc's ``free`` gives the top of the heap back to the kernel as
soon as more than a few tens of MB lie free there, so the next fit in the same
process (the next variant in a worker, the next replication, the next refit of a
dropping-units search) asks the kernel for the same pages again and pays a page
fault for each 4 KB page it touches. Measured on the development machine (2-core
VM, collapsed two-step system GMM, N = 200,000, T = 8): about 126,000 faults per
fit, 0.3–1.2 s of system time on a 1.3 s fit; with the settings below the second
and later fits take no faults and run in 1.3–1.4 s instead of 1.8–2.4 s.

:func:`keep_freed_memory` sets, with ``mallopt`` (glibc's documented tuning
interface, ``man 3 mallopt``):

* ``M_TRIM_THRESHOLD`` to the core's memory budget of one estimation
  (:func:`robustgmm.core.engine.memory_budget`): free memory at the top of the
  heap is returned to the kernel only beyond that;
* ``M_MMAP_THRESHOLD`` to 32 MB, the largest value glibc's own adaptive threshold
  reaches (setting the first fixes the second, so it is set explicitly): blocks
  above it are mapped and returned when freed, and numpy asks the kernel for huge
  pages for them, which fault cheaply.

The process then keeps up to one estimation's budget of freed memory: the memory
its peak needed anyway. It is set in the processes robustgmm owns (the command
line, its loky workers), never in a program that imports robustgmm as a library
and never in a dask worker, which manages its own memory. Elsewhere (macOS,
Windows, musl) it does nothing.
"""
from __future__ import annotations

import ctypes
import ctypes.util
import platform
import sys

M_TRIM_THRESHOLD = -1  # glibc <malloc.h>
M_MMAP_THRESHOLD = -3
#: glibc's largest adaptive mmap threshold on 64-bit systems (DEFAULT_MMAP_THRESHOLD_MAX)
MMAP_THRESHOLD_BYTES = 32 * 2**20

_applied: bool | None = None


def keep_freed_memory(trim_bytes: int | None = None) -> bool:
    """Set glibc's trim and mmap thresholds for this process (module docstring);
    True when they were set (now or by an earlier call), False where glibc's
    ``mallopt`` is not available. ``trim_bytes``: free memory kept at the top of
    the heap (default: the core's memory budget, ``ROBUSTGMM_MEMORY_MB``)."""
    global _applied
    if _applied is not None:
        return _applied
    _applied = False
    if not sys.platform.startswith("linux") or platform.libc_ver()[0] != "glibc":
        return False
    if trim_bytes is None:
        from .core.engine import memory_budget
        try:
            trim_bytes = memory_budget()
        except ValueError:  # an invalid setting is reported by the command that reads it
            return False
    try:
        libc = ctypes.CDLL(ctypes.util.find_library("c") or "libc.so.6")
        mallopt = libc.mallopt
    except (OSError, AttributeError):
        return False
    mallopt.argtypes, mallopt.restype = (ctypes.c_int, ctypes.c_int), ctypes.c_int
    trim = int(min(max(trim_bytes, MMAP_THRESHOLD_BYTES), 2**31 - 1))
    _applied = bool(mallopt(M_TRIM_THRESHOLD, trim)) and bool(
        mallopt(M_MMAP_THRESHOLD, MMAP_THRESHOLD_BYTES))
    return _applied
