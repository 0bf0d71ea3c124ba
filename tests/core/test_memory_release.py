"""A fit's arrays are freed when the fit returns, and the processes robustgmm owns
keep freed memory for the next estimation (robustgmm.allocator).

Reference counting frees an object as soon as its last reference goes, unless it
sits in a reference cycle, which waits for Python's cyclic collector: a cycle
through the moment engine (problem → engine → kept G' arrays → problem) kept every
chunk array of a finished fit alive until the collector ran, so a process running
fit after fit held two or three fits' arrays and took fresh pages for each.
"""
from __future__ import annotations

import dataclasses
import gc
import json
import platform
import subprocess
import sys

import pytest

from helpers_core import sim_panel, sim_spec
from robustgmm import allocator
from robustgmm.core import fit, fit_family


def _unreachable_after(call) -> list:
    """The objects that ``call()`` leaves for the cyclic collector."""
    gc.collect()
    was = gc.isenabled()
    gc.disable()
    gc.set_debug(gc.DEBUG_SAVEALL)
    try:
        call()
        gc.collect()
        found = list(gc.garbage)
    finally:
        gc.set_debug(0)
        gc.garbage.clear()
        if was:
            gc.enable()
    return found


@pytest.mark.parametrize("settings", [
    dict(equations="system", steps=2, form="per-period", time_effects=True),
    dict(equations="difference", steps=1, form="collapsed"),
    dict(equations="system", steps=2, transform="fod", form="collapsed"),
])
def test_a_fit_leaves_no_reference_cycle(settings):
    spec = sim_spec(**settings)
    _, panel = sim_panel(n_units=150, n_periods=7, seed=4)
    fit(spec, panel)  # imports and one-off caches before counting
    left = _unreachable_after(lambda: fit(spec, panel))
    names = sorted({type(o).__qualname__ for o in left})
    assert not left, f"a fit left {len(left)} objects in reference cycles: {names}"


def test_a_family_fit_leaves_no_reference_cycle():
    # siblings share one engine (and its kept G' arrays) through the family
    base = sim_spec(equations="system", steps=2, form="collapsed")
    specs = [base, dataclasses.replace(base, steps=1), dataclasses.replace(base, form="per-period")]
    _, panel = sim_panel(n_units=150, n_periods=7, seed=5)
    fit_family(specs, panel)
    left = _unreachable_after(lambda: fit_family(specs, panel))
    assert not left, f"{len(left)} objects in cycles: {sorted({type(o).__qualname__ for o in left})}"


_FAULTS_CHILD = r"""
import json, resource, sys
import numpy as np
from robustgmm import allocator
tuned = allocator.keep_freed_memory(256 * 2**20) if sys.argv[1] == "keep" else False
def faults():
    return resource.getrusage(resource.RUSAGE_SELF).ru_minflt
def work():
    # a fit's pattern: chunk arrays of a few MB, allocated together, freed together
    arrays = [np.ones(3 * 2**17) for _ in range(40)]  # 40 x 3 MB
    del arrays
work()
f0 = faults()
for _ in range(5):
    work()
print(json.dumps({"tuned": tuned, "faults": faults() - f0}))
"""


def _faults(mode: str) -> dict:
    out = subprocess.run([sys.executable, "-c", _FAULTS_CHILD, mode], capture_output=True,
                         text=True, check=True)
    return json.loads(out.stdout.strip().splitlines()[-1])


@pytest.mark.skipif(not sys.platform.startswith("linux") or platform.libc_ver()[0] != "glibc",
                    reason="the allocator settings exist in glibc only")
def test_kept_memory_is_reused_without_new_pages():
    # 5 rounds of 120 MB: by default glibc returns the freed heap top to the kernel
    # and every round takes its 30,000 pages again; with the settings, none
    default, kept = _faults("default"), _faults("keep")
    assert kept["tuned"] is True
    pages_per_round = 120 * 2**20 // 4096
    assert default["faults"] > 2 * pages_per_round, default
    assert kept["faults"] < pages_per_round // 10, kept


def test_settings_are_skipped_where_glibc_is_absent(monkeypatch):
    monkeypatch.setattr(allocator, "_applied", None)
    monkeypatch.setattr(allocator.platform, "libc_ver", lambda: ("", ""))
    assert allocator.keep_freed_memory() is False
    assert allocator.keep_freed_memory() is False  # decided once per process
