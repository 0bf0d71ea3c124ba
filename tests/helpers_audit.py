"""Shared builders for the audit-pipeline tests (grid, runner, verdicts, audit).

Data come from :mod:`robustgmm.simulate` (a known data-generating process); nothing
here touches the reference data set.
"""
from __future__ import annotations

import json
from pathlib import Path

import numpy as np

from robustgmm import core
from robustgmm.audit.grid import canonical_json
from robustgmm.modelfile import spec_from_dict
from robustgmm.simulate import PanelProcess, simulate_panel


def write_panel(folder: Path, n_units=40, n_periods=6, process=PanelProcess(), seed=3,
                name="panel.csv") -> Path:
    """A simulated panel; column ``late`` equals 1 from the fourth period on (so it
    has no variation within units in a sample that starts there)."""
    frame = simulate_panel(n_units, n_periods, process, seed=seed)
    start = frame["period"].min()
    frame["late"] = np.where(frame["period"] >= start + 3, 1.0, frame["x"])
    path = Path(folder) / name
    frame.to_csv(path, index=False)
    return path


def write_frame(frame, path: Path) -> Path:
    """Write ``frame`` in the format its file ending names (csv, parquet, dta, xlsx),
    without the index."""
    path = Path(path)
    if path.suffix == ".parquet":
        frame.to_parquet(path, index=False)
    elif path.suffix == ".dta":
        frame.to_stata(path, write_index=False)
    elif path.suffix == ".xlsx":
        frame.to_excel(path, index=False)
    else:
        frame.to_csv(path, index=False)
    return path


def model_dict(vary=None, **sections) -> dict:
    d = {
        "data": {"file": "panel.csv", "unit": "unit", "period": "period"},
        "model": {"outcome": "y", "outcome_lags": [1],
                  "regressors": [{"name": "x", "lags": [0], "role": "endogenous"},
                                 {"name": "w", "lags": [0], "role": "exogenous"}]},
    }
    for key, value in sections.items():
        d.setdefault(key, {}).update(value)
    if vary is not None:
        d.setdefault("audit", {})["vary"] = vary
    return d


def make_spec(folder: Path, vary=None, panel_kw=None, **sections):
    folder = Path(folder)
    if not (folder / "panel.csv").exists():
        write_panel(folder, **(panel_kw or {}))
    return spec_from_dict(model_dict(vary, **sections), base_dir=folder)


class CountingFit:
    """A wrapper around the core's fit that counts estimations (test double).

    ``interrupt_at``: raise KeyboardInterrupt on that call (1-based), as Ctrl-C
    would; ``fail``: {variant settings predicate: exception} to raise instead of
    estimating.
    """

    def __init__(self, interrupt_at=None, fail=None):
        self.calls = 0
        self.interrupt_at = interrupt_at
        self.fail = fail or []

    def __call__(self, spec, panel):
        self.calls += 1
        if self.interrupt_at is not None and self.calls == self.interrupt_at:
            raise KeyboardInterrupt
        for predicate, exc in self.fail:
            if predicate(spec):
                raise exc
        return core.fit(spec, panel)


def run_each(fit, variants, panels, **kw):
    """``runner.run_variants`` with every variant estimated on its own by ``fit``
    (``spec, panel -> FitResult``): the runner's test seam ``FIT_EACH``, which the
    tasks carry to worker processes, set for this one run."""
    from unittest import mock
    from robustgmm.audit import runner
    with mock.patch.object(runner, "FIT_EACH", fit):
        return runner.run_variants(variants, panels, **kw)


def outcome_text(outcomes) -> str:
    """Outcomes as canonical JSON without timings (for exact comparisons)."""
    return canonical_json({vid: {"status": o.status, "reason": o.reason,
                                 "fit": None if o.fit is None else o.fit.to_dict(),
                                 "bounds": o.bounds} for vid, o in outcomes.items()})


def read_json(path) -> dict:
    return json.loads(Path(path).read_text())


class KillWorker:
    """Test double: the first ``times`` estimations of a matching variant kill their
    worker process with SIGKILL (as the out-of-memory killer would); later calls
    estimate normally. The count lives in the file ``marker`` (one byte per kill),
    so it is shared by every worker process."""

    def __init__(self, marker, predicate, times=1):
        self.marker = Path(marker)
        self.predicate = predicate
        self.times = times

    def kills(self) -> int:
        return len(self.marker.read_bytes()) if self.marker.exists() else 0

    def __call__(self, spec, panel):
        import os
        import signal
        if self.predicate(spec) and self.kills() < self.times:
            with open(self.marker, "ab") as handle:
                handle.write(b"x")
            os.kill(os.getpid(), signal.SIGKILL)
        return core.fit(spec, panel)


def is_fod_collapsed_two_step(spec) -> bool:
    return spec.transform == "fod" and spec.form == "collapsed" and spec.steps == 2


class CountingFamily:
    """Wraps ``core.fit_family`` (install with monkeypatch, in-process runs): counts
    groups and estimated specs; can raise KeyboardInterrupt on the k-th group (as
    Ctrl-C would) and replace members' results by exceptions (``fail``: list of
    (predicate on the spec, exception))."""

    def __init__(self, interrupt_at_group=None, fail=None):
        self.real = core.fit_family
        self.groups = 0
        self.specs = 0
        self.interrupt_at_group = interrupt_at_group
        self.fail = fail or []

    def __call__(self, specs, panel, **kw):
        self.groups += 1
        if self.interrupt_at_group is not None and self.groups == self.interrupt_at_group:
            raise KeyboardInterrupt
        self.specs += len(specs)
        results = self.real(specs, panel, **kw)
        for i, spec in enumerate(specs):
            for predicate, exc in self.fail:
                if predicate(spec):
                    results[i] = exc
        return results
