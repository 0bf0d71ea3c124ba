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
one exact refit and one influence pass (:mod:`robustgmm.core.dropping`); the steps
are shared between the terms and targets of a model.
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


def analyse(spec: Spec, planned, panels: Mapping[str, Any], ids: Sequence[str],
            estimates: pd.DataFrame | None = None) -> DroppingTables:
    """The dropping-units tables of the variants ``ids`` (module docstring)."""
    from .. import core
    from .grid import sample_key
    by_id = {v.id: v for v in planned}
    alpha = float(spec.alpha)
    focus = list(spec.focus_terms())
    rows, unit_rows, path_rows, period_rows = [], [], [], []
    failures: dict[str, str] = {}
    for vid in ids:
        v = by_id[vid]
        panel = panels[sample_key(v.spec.sample)]
        try:
            sums = core.unit_sums(v.spec, panel)
            search = core.DropSearch(sums, alpha, spec.max_drop_share)
            terms = searchable_terms(search, focus)
            for term in terms:
                for target in DropTarget:
                    res = search.run(term, target)
                    rows.append(_result_row(vid, res, panel))
                    path_rows.extend({"variant": vid, "term": term, "target": str(target),
                                      "dropped": p.dropped, "estimate": p.estimate,
                                      "std_error": p.std_error, "p_value": p.p_value}
                                     for p in res.path)
            if v.is_base:
                unit_rows.extend(_top_units(search, terms, panel))
        except (EstimationError, np.linalg.LinAlgError) as exc:
            # a reduced sample the moment problem cannot solve is a property of the
            # data, like a failing variant: recorded, and the audit goes on
            failures[vid] = f"{type(exc).__name__}: " + " ".join(str(exc).split())
            continue
        period_rows.extend(_periods(v, panel, focus))
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
    return DroppingTables(influence, units, path, periods, failures, run)


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


def _periods(v, panel, focus) -> list[dict]:
    """Leave-one-period-out refits of variant ``v`` (one :func:`core.fit` each)."""
    from .. import core
    out = []
    for pos, period in enumerate(np.asarray(panel.periods)):
        try:
            fit = core.fit(v.spec, without_period(panel, pos))
        except EstimationError as exc:
            reason = " ".join(str(exc).split())
            out.extend({"variant": v.id, "period": int(period), "term": t,
                        "estimate": np.nan, "std_error": np.nan, "p_value": np.nan,
                        "reason": reason} for t in focus)
            continue
        terms = {t.label: t for t in fit.terms + fit.long_run}
        for t in focus:
            est = terms.get(t)
            if est is None:
                continue
            out.append({"variant": v.id, "period": int(period), "term": t,
                        "estimate": est.estimate, "std_error": est.std_error,
                        "p_value": est.p_value, "reason": ""})
    return out
