"""Dropping units in the audit: which small set of units would overturn a conclusion.

For the base model (``[audit] influence = "base"``, the default) and, with ``"all"``,
for every judged (acceptable, not duplicate) variant, each focus term gets the three
searches of :mod:`robustgmm.core.dropping` (targets ``sign``, ``significance``,
``opposite_significant``; additive approximation, then the recursive greedy search
of Huang, Burt, Shen, Nguyen & Broderick 2024, every step an exact refit), stopped at
``[audit] max_drop_share`` of the units (Broderick, Giordano & Meager 2020). The
answers are tables of the audit folder (:mod:`robustgmm.contract`):

* ``influence.csv``: per variant × term × target the set found, its exact refit and
  whether it reaches the target ("not reached within the share" is an answer);
* ``influence_units.csv``: the 20 most influential units of the base model per term
  (first-order influence, in base standard errors, and their share of the data);
* ``influence_path.csv``: the estimate along every greedy path (the report's figure);
* ``periods.csv``: leave-one-period-out refits of the same models, each calendar
  period removed in turn (a structured sample filter: the period's rows are
  missing, so its lags are missing too and nothing is borrowed across the gap).

A long-run effect is searched like a coefficient (its influence is the chain rule
through :mod:`robustgmm.core.longrun`, its refits the long-run formula on each
refit, :meth:`robustgmm.core.influence.UnitSums.term_influence`); one whose base
estimate is not defined (no steady state) is listed in ``not_searched``. A model whose
moment problem cannot be rebuilt or solved on a reduced sample (an
:class:`~robustgmm.errors.EstimationError` or a singular matrix) is recorded in
``failures`` (manifest.json ``influence``, the report) and never stops the audit. The rule that reads the tables,
``few_units_flip``, is evaluated in :mod:`robustgmm.audit.verdicts.dropping`.

Cost: one moment problem per analysed model (about one fit), then per greedy step
one exact refit and the influence on the reduced sample (:mod:`robustgmm.core.dropping`);
the steps are shared between the targets of a term. Each analysed model is one task
per focus term and one for its leave-one-period-out refits (:func:`tasks_of`), run
like the audit's variants (:func:`analyse`: workers only when the estimated work
repays their start-up, the same tables whatever ``jobs``).
"""
from __future__ import annotations

from dataclasses import dataclass, field, replace
from typing import Any, Mapping, Sequence

import numpy as np
import pandas as pd

from .. import contract
from ..errors import EstimationError
from ..options import DropTarget, InfluenceScope, parse
from ..spec import Spec

#: Units listed per focus term in influence_units.csv.
TOP_UNITS = 20


@dataclass(frozen=True)
class DroppingTables:
    """The dropping-units tables of one audit (frames in the contract's columns)."""

    influence: pd.DataFrame
    units: pd.DataFrame
    path: pd.DataFrame
    periods: pd.DataFrame
    #: variant id -> why its analysis could not run
    failures: Mapping[str, str] = field(default_factory=dict)
    run: Mapping[str, Any] = field(default_factory=dict)
    #: how the analyses ran (``jobs``, ``backend``, lost workers): run figures that
    #: differ with ``jobs`` while the tables do not
    dispatch: Mapping[str, Any] = field(default_factory=dict)

    def frames(self) -> tuple[pd.DataFrame, ...]:
        """The frames in the order of :data:`robustgmm.contract.DROPPING_TABLES`."""
        return (self.influence, self.units, self.path, self.periods)


def scope_ids(spec: Spec, base_id: str | None, base_ok: bool,
              judged: Sequence[str]) -> list[str]:
    """The variants analysed: none, the base model (when it estimated), or the base
    model and every judged variant (plan order, base first)."""
    scope = parse(InfluenceScope, spec.influence)
    if scope == InfluenceScope.NONE:
        return []
    out = [base_id] if (base_ok and base_id is not None) else []
    if scope == InfluenceScope.ALL:
        out += [i for i in judged if i != base_id]
    return out


#: A greedy step (an exact refit and the influence on the reduced sample) as a share
#: of one fit: the benchmark's "one greedy step / one fit" (workload 8; 0.17 measured
#: in CPU time at N = 5,000), rounded up to its target.
GREEDY_STEP_SHARE = 0.2
#: Why a variant's analysis has no result when its worker died twice.
LOST = "the worker process analysing this variant died twice; rerun the audit to try it again"


def task_seconds(v, panel, key, max_drop_share: float, estimates=None) -> float:
    """The estimated seconds of one task (:func:`tasks_of`), in fits of the variant
    (:meth:`cost.Estimates.group_seconds`): a term's searches one fit for the moment
    problem and the per-unit sums plus at most ``3 · max_drop`` greedy steps of
    :data:`GREEDY_STEP_SHARE` of a fit each (its greedy path of at most ``max_drop``
    steps per target: an upper bound, as a search stops when it reaches its target
    and the targets share their steps); the leave-one-period-out refits one fit per
    period."""
    from . import cost
    estimates = cost.Estimates() if estimates is None else estimates
    fit = estimates.group_seconds([v.spec], panel)
    if key[1] == PERIODS:
        return fit * getattr(panel, "n_periods", 0)
    steps = 3 * int(max_drop_share * getattr(panel, "n_units", 0))
    return fit * (1 + GREEDY_STEP_SHARE * steps)


#: The kinds of task of a variant's analysis (:func:`tasks_of`).
TERM, PERIODS = "term", "periods"


def tasks_of(vid: str, focus: Sequence[str]) -> list[tuple[str, str, str]]:
    """The tasks of variant ``vid``'s analysis: ``(vid, "term", term)`` per focus term
    (its three targets in one task: they follow the same greedy path, the unit of
    largest helpful first-order change, whose refits the task's
    :class:`~robustgmm.core.DropSearch` shares) and ``(vid, "periods", "")``, the
    leave-one-period-out refits. The searches of different terms share no path, so
    they run side by side; each task builds its own per-unit sums (about one fit)."""
    return [(vid, TERM, t) for t in focus] + [(vid, PERIODS, "")]


def work(spec: Spec, planned, panels: Mapping[str, Any], ids: Sequence[str],
         done: dict, parent=None, deaths: dict | None = None):
    """The tasks of the analyses of the variants ``ids`` (:func:`tasks_of`) as one kind
    of work of a run (:class:`robustgmm.audit.parallel.Work`); their results go into
    ``done`` (task key → rows, or ``{"failure": reason}``) as they arrive; tasks whose
    worker died twice count in ``deaths["lost"]`` when given. The audit
    runs the base model's analysis as work alongside its variants
    (:func:`robustgmm.audit.runner.run_variants`): it needs only the base model's
    specification, and it is the longest single task of most audits."""
    from . import cost, parallel
    from .grid import sample_key
    by_id = {v.id: v for v in planned}
    focus = list(spec.focus_terms())
    args = (float(spec.alpha), float(spec.max_drop_share))
    panel_of = {vid: panels[sample_key(by_id[vid].spec.sample)] for vid in ids}
    parent = parallel.Parent.here() if parent is None and ids else parent

    def record(results):
        for key, out in results:
            done[key] = out

    def lost(group):
        for key in group:
            if key not in done and deaths is not None:
                deaths["lost"] += 1
            done.setdefault(key, {"failure": LOST})

    def delayed(group, marker=None):
        import joblib
        v = by_id[group[0][0]]
        return joblib.delayed(_task)(v.id, v.spec, v.is_base, panel_of[v.id], group[0][1],
                                     group[0][2], focus, *args, parent, marker)

    groups = [[k] for vid in ids for k in tasks_of(vid, focus)]
    est = cost.Estimates()
    seconds = [task_seconds(by_id[g[0][0]], panel_of[g[0][0]], g[0], args[1], est)
               for g in groups]
    return parallel.Work(groups, delayed, record, lambda g: g[0] in done, lost, seconds,
                         panel=max(panel_of.values(), key=lambda p: getattr(p, "n_units", 0))
                         if ids else None)


def analyse(spec: Spec, planned, panels: Mapping[str, Any], ids: Sequence[str],
            estimates: pd.DataFrame | None = None, *, jobs: int | None = 1,
            backend: str | None = None, start_workers: bool = False,
            notify=None, done: Mapping | None = None,
            earlier: Mapping[str, Any] | None = None) -> DroppingTables:
    """The dropping-units tables of the variants ``ids`` (module docstring).

    One task per variant and focus term and one per variant's leave-one-period-out
    refits (:func:`tasks_of`), run like the audit's variants
    (:mod:`robustgmm.audit.runner`): local worker processes (at most ``jobs``) only
    when the estimated work (:func:`task_seconds`) repays their start-up
    (:func:`robustgmm.audit.cost.repays_workers`), or always with ``start_workers``;
    any other joblib ``backend`` as asked; the panels go to a dask cluster once. Each
    task runs with :data:`robustgmm.audit.parallel.BLAS_THREADS` BLAS threads, its
    refits do not depend on which refits its search holds
    (:class:`robustgmm.core.DropSearch`), and the tables are assembled in the order of
    ``ids``, terms and targets, so they are identical whatever ``jobs`` is.

    ``done``: results of tasks that already ran (the base model's analysis, run
    alongside the variants by :func:`work`), with ``earlier``, how that run went
    (``{"jobs": ..., "backend": ...}``); only the other tasks run here."""
    from . import parallel
    focus = list(spec.focus_terms())
    done = dict(done or {})
    keys = {vid: tasks_of(vid, focus) for vid in ids}
    todo = [vid for vid in ids if not all(k in done for k in keys[vid])]
    deaths = {"worker_deaths": 0, "retried_alone": 0, "lost": 0}
    try:
        n_workers, backend_used, _ = parallel.dispatch(
            [work(spec, planned, panels, todo, done, deaths=deaths)], deaths, jobs=jobs,
            backend=backend,
            shared=list(panels.values()), start_workers=start_workers, notify=notify,
            what="dropping units: ")
    finally:
        parallel.remove_memmaps()
    if earlier is not None and (not todo or earlier.get("jobs", 1) > n_workers):
        # where the analyses ran: the run with the most workers
        n_workers, backend_used = earlier["jobs"], earlier["backend"]
    rows, unit_rows, path_rows, period_rows = [], [], [], []
    failures: dict[str, str] = {}
    for vid in ids:  # plan order, then term order, whatever order the tasks finished in
        outs = [done[k] for k in keys[vid]]
        failed = [o["failure"] for o in outs if "failure" in o]
        if failed:  # the first failing term's reason, as one search of the terms would
            failures[vid] = failed[0]
            continue
        for out in outs:
            rows += out.get("rows", [])
            unit_rows += out.get("units", [])
            path_rows += out.get("path", [])
            period_rows += out.get("periods", [])
    frames = (pd.DataFrame(r, columns=t.names()) for r, t in zip(
        (rows, unit_rows, path_rows, period_rows), contract.DROPPING_TABLES))
    influence, units, path, periods = frames
    influence["reached"] = influence["reached"].astype("boolean")
    for frame, cols in ((influence, ("units_dropped",)), (units, ("rank", "observations")),
                        (path, ("dropped",)), (periods, ("period",))):
        for col in cols:
            frame[col] = frame[col].astype("Int64")
    run = {"scope": str(spec.influence), "max_drop_share": float(spec.max_drop_share),
           "variants": list(ids), "failures": dict(failures),
           "not_searched": [t for t in focus if not (influence["term"] == t).any()]}
    dispatch = {"jobs": n_workers, "backend": backend_used,
                **{k: v for k, v in deaths.items() if v}}
    return DroppingTables(influence, units, path, periods, failures, run, dispatch)


def _task(vid, vspec, is_base, panel, kind, term, focus, alpha, max_drop_share, parent,
          marker=None) -> list:
    """One task of :func:`tasks_of`, in this process or a worker:
    ``[((vid, kind, term), rows of the tables)]`` or ``[(key, {"failure": reason})]``."""
    from . import parallel
    parallel.task_started(marker, parent)
    if kind == PERIODS:
        out = {"periods": _periods(vid, vspec, panel, focus)}
    else:
        out = analyse_term(vid, vspec, is_base, panel, term, alpha, max_drop_share)
    return [((vid, kind, term), out)]


def analyse_term(vid, vspec, is_base, panel, term, alpha, max_drop_share) -> dict:
    """The rows of the dropping tables for one focus term of one variant (``rows``,
    ``path``, and for the base model ``units``; none when the model has no such
    term or its base estimate is not defined), or ``{"failure": reason}`` when its
    moment problem cannot be solved on a reduced sample."""
    from .. import core
    rows, unit_rows, path_rows = [], [], []
    try:
        sums = core.unit_sums(vspec, panel)
        search = core.DropSearch(sums, alpha, max_drop_share)
        terms = searchable_terms(search, [term])
        for term in terms:
            for target in DropTarget:
                res = search.run(term, target)
                rows.append(_result_row(vid, res, panel))
                path_rows.extend({"variant": vid, "term": term, "target": str(target),
                                  "dropped": p.dropped, "estimate": p.estimate,
                                  "std_error": p.std_error, "p_value": p.p_value}
                                 for p in res.path)
        if is_base:
            unit_rows.extend(_top_units(search, terms, panel))
    except (EstimationError, np.linalg.LinAlgError) as exc:
        # a reduced sample the moment problem cannot solve is a property of the
        # data, like a failing variant: recorded, and the audit goes on
        return {"failure": f"{type(exc).__name__}: " + " ".join(str(exc).split())}
    return {"rows": rows, "units": unit_rows, "path": path_rows}


def searchable_terms(search, focus) -> list[str]:
    """The focus terms the model has (coefficients and long-run effects) whose base
    estimate is defined (a long-run effect without a steady state is not)."""
    import math
    return [t for t in focus if t in search.sums.term_labels
            and math.isfinite(search.base.term(t)[0])]


def _result_row(vid: str, res, panel) -> dict:
    ids = " ".join(str(u) for u in np.asarray(panel.units)[list(res.dropped)])
    return {"variant": vid, "term": res.term, "target": str(res.target),
            "units_dropped": len(res.dropped), "share_dropped": res.share,
            "reached": bool(res.reached), "estimate": res.estimate,
            "std_error": res.std_error, "p_value": res.p_value, "dropped_units": ids}


def _top_units(search, terms, panel) -> list[dict]:
    """The :data:`TOP_UNITS` units with the largest |first-order change| per term."""
    sums, base, infl = search.sums, search.base, search.base_influence
    obs = (np.asarray(sums.rows, dtype=float) if sums.rows is not None
           else np.asarray(sums.n_t, dtype=float))
    total = float(obs.sum())
    units = np.asarray(panel.units)
    out = []
    for term in terms:
        d = sums.term_influence(term, base, infl)
        size = np.where(sums.active & np.isfinite(d), np.abs(d), -1.0)
        order = np.argsort(-size, kind="stable")[:TOP_UNITS]
        se = base.term(term)[1]
        for rank, i in enumerate(order[size[order] >= 0], start=1):
            out.append({"term": term, "rank": rank, "unit": str(units[i]),
                        "influence": float(d[i]),
                        "change_in_se": -float(d[i]) / se if se > 0 else np.nan,
                        "observations": int(obs[i]),
                        "share_of_data": float(obs[i]) / total if total > 0 else np.nan})
    return out


def without_period(panel, position: int):
    """``panel`` with calendar period ``position`` removed: every value of that period
    missing (so the lags that reach it are missing as well, as for any gap)."""
    values = {}
    for name, arr in panel.values.items():
        a = np.array(arr, dtype=float, copy=True)
        a[:, position] = np.nan
        values[name] = a
    return replace(panel, values=values, data_hash=f"{panel.data_hash}-without-{position}")


def _periods(vid, vspec, panel, focus) -> list[dict]:
    """Leave-one-period-out refits of variant ``vid`` (one :func:`core.fit` each)."""
    from .. import core
    out = []
    for pos, period in enumerate(np.asarray(panel.periods)):
        try:
            fit = core.fit(vspec, without_period(panel, pos))
        except EstimationError as exc:
            reason = " ".join(str(exc).split())
            out.extend({"variant": vid, "period": int(period), "term": t,
                        "estimate": np.nan, "std_error": np.nan, "p_value": np.nan,
                        "reason": reason} for t in focus)
            continue
        terms = {t.label: t for t in fit.terms + fit.long_run}
        for t in focus:
            est = terms.get(t)
            if est is None:
                continue
            out.append({"variant": vid, "period": int(period), "term": t,
                        "estimate": est.estimate, "std_error": est.std_error,
                        "p_value": est.p_value, "reason": ""})
    return out
