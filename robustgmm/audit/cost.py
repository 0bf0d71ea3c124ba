"""What a run will cost, estimated from the plan before anything is estimated, and
whether starting worker processes repays their start-up.

Worker processes cost :data:`robustgmm.audit.parallel.WORKER_STARTUP_SECONDS` to
start (a process, imports of numpy, scipy and the package, the panel sent over),
so a small audit runs faster in this process even when ``jobs`` allows more
workers. The runner therefore estimates the sequential time of the work first
(:func:`group_seconds` summed over the share groups) and starts ``n`` workers only
when the time they save, ``estimate × (1 − 1/n)``, exceeds their start-up
(:func:`repays_workers`); ``jobs`` still caps the workers, and ``start_workers=True``
(``--start-workers``) starts them whatever the estimate (tests, measurements).

The estimate of one share group (members that differ only in steps, errors and
last_lag, estimated together by :func:`robustgmm.core.fit_family`)::

    seconds = (1 + SIBLING_SHARE · (members − 1))
              · (PER_FIT + rows · (PER_ROW + PER_ROW_INSTRUMENT · L))

``rows``: the equation rows (transformed, plus the level rows of system GMM),
counted from the observed outcome cells of each unit less the lags; ``L``: the
instrument columns implied by the instrument windows and form (the order of
magnitude of the core's count, which needs a pass over the data; see
:func:`instrument_estimate`). The constants are least-squares fits to 64 single
two-step and one-step fits (N = 2,000–8,000, T = 9–16, difference and system,
per-period and collapsed, one BLAS thread) on the 2-core development machine
under load from other processes, predictions within about 0.6–1.3 × of the
measured times; siblings of a share group cost about a third of a fit each
(measured on the 8-member groups of the benchmark's audit grid). The estimate is
an order of magnitude to compare with the start-up cost, never a promise: a
faster machine estimates too high and starts workers a little early, where they
also start faster.
"""
from __future__ import annotations

import dataclasses
from typing import Any, Sequence

import numpy as np

from ..options import Equations, Form, parse
from .parallel import WORKER_STARTUP_SECONDS

#: fixed cost of one fit (the small algebra, tests and records), in seconds
PER_FIT = 0.008
#: seconds per equation row of one fit (building its chunk arrays, residuals)
PER_ROW = 0.7e-6
#: seconds per equation row and instrument column (moment sums, the weight)
PER_ROW_INSTRUMENT = 6.5e-9
#: the share of a full fit that each further member of a share group costs
SIBLING_SHARE = 0.35
#: a Monte Carlo replication (drawing its panel, building each sample's panel, then
#: the grid's fits with only the parts it summarises, :class:`robustgmm.core.Parts`)
#: against the audit's fits of the grid (records, bounds, every test): 0.52 and 0.54
#: measured in CPU time on the bench's 48-variant grid at N = 400 and 2,000, T = 10
#: (``robustgmm bench`` workload 5, "one replication / audit estimation time")
REPLICATION_FACTOR = 0.55


def _widest_last(members: Sequence[Any]) -> int | None:
    lasts = [getattr(m, "last_lag", None) for m in members]
    return None if any(v is None for v in lasts) else max(lasts)


def instrument_estimate(spec, n_periods: int) -> int:
    """The instrument columns of ``spec`` on ``n_periods`` periods, estimated from its
    windows: per GMM-style variable (outcome, endogenous and predetermined regressors,
    ``[[instruments.gmm]]``) with a window of ``w`` lags, ``w`` columns collapsed or
    ``Σ_t min(w, lags available at t)`` per period, plus one level-equation column
    per period (collapsed: one) in system GMM; one column per exogenous regressor and
    per period and equation for the time effects. Equal to the core's count
    (:func:`robustgmm.core.design_counts` before its redundancy checks) on the
    benchmark's models, balanced panels with T = 7–16 and windows 2, 2–4 and all."""
    from .grid import window_of
    lags = [max(spec.outcome_lags, default=1)] + [max(r.lags, default=0) for r in spec.regressors]
    m = max(lags)
    n_t = max(n_periods - m - 1, 1)  # transformed-equation periods of a full unit
    system = parse(Equations, spec.equations) == Equations.SYSTEM
    names = [spec.outcome] + [r.name for r in spec.regressors] + [g.name for g in spec.gmm_instruments]
    total = 0
    for name in names:
        window = window_of(spec, name)
        if window is None:  # exogenous: instruments itself
            total += 1
            continue
        first, last = window
        w = n_periods if last is None else max(last - first + 1, 1)
        collapsed = parse(Form, spec.form) == Form.COLLAPSED
        if collapsed:
            total += min(w, n_t + m + 1 - first) if n_t + m + 1 - first > 0 else 1
            total += 1 if system else 0
        else:
            avail = np.arange(1, n_t + 1) + m + 1 - first
            total += int(np.minimum(w, np.maximum(avail, 0)).sum())
            total += n_t if system else 0
    if spec.time_effects:
        total += 2 * n_t + 4 if system else n_t + 1
    total += len(spec.extra_instruments)
    return max(total, 1)


class Estimates:
    """Estimated seconds of share groups on their panels; the rows of each panel's
    units counted once per (panel, outcome, lags)."""

    def __init__(self):
        self._rows: dict = {}

    def _observed_rows(self, panel, outcome: str, m: int) -> int:
        key = (id(panel), outcome, m)
        if key not in self._rows:
            values = getattr(panel, "values", {}).get(outcome)
            if values is None:
                self._rows[key] = 0
            else:
                observed = (~np.isnan(values)).sum(axis=1)
                self._rows[key] = int(np.maximum(observed - m - 1, 0).sum())
        return self._rows[key]

    def group_seconds(self, specs: Sequence[Any], panel) -> float:
        """The estimated sequential seconds of one share group (module docstring)."""
        if not specs or not hasattr(panel, "values"):
            return 0.0
        spec = specs[0]
        m = max([max(spec.outcome_lags, default=1)]
                + [max(r.lags, default=0) for r in spec.regressors])
        rows = self._observed_rows(panel, spec.outcome, m)
        if parse(Equations, spec.equations) == Equations.SYSTEM:
            rows *= 2
        widest = dataclasses.replace(spec, last_lag=_widest_last(specs))
        L = instrument_estimate(widest, getattr(panel, "n_periods", 1))
        one = PER_FIT + rows * (PER_ROW + PER_ROW_INSTRUMENT * L)
        return (1 + SIBLING_SHARE * (len(specs) - 1)) * one

    def total(self, groups: Sequence[Sequence[Any]], panels: Sequence[Any]) -> float:
        return float(sum(self.group_seconds(g, p) for g, p in zip(groups, panels)))


def repays_workers(estimate: float, n_workers: int,
                   startup: float = WORKER_STARTUP_SECONDS) -> bool:
    """True when ``n_workers`` processes save more than they cost to start: the
    sequential ``estimate`` shrinks to ``estimate / n`` on ``n`` workers, so they save
    ``estimate × (1 − 1/n)`` against ``startup``."""
    return n_workers > 1 and estimate * (1 - 1 / n_workers) > startup


def dispatch_line(estimate: float, n_workers: int, start: bool) -> str:
    """The one line the command line prints about where the work runs."""
    shown = f"{estimate:.1f} s" if estimate >= 0.1 else f"{estimate:.2f} s"
    if start:
        return f"estimated {shown}: starting {n_workers} worker processes"
    return f"estimated {shown}: running in this process"

