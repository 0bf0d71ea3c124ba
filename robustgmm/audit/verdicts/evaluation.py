"""The evaluation: every rule, once, into the variant columns and the verdict record."""
from __future__ import annotations

import math
from dataclasses import asdict, dataclass, replace
from typing import Any, Mapping, Sequence

import numpy as np
import pandas as pd

from ...options import LEVEL_GROUP
from ...options import Effect, Evidence, Verdict
from ..records import (AuditVerdict, BaseEstimate, Driver, Evaluation, Firing, Influence,
                       Rule, TermVerdict, _clean, _num)
from ...spec import Spec, Thresholds
from .rules import (COMBINATION, DISCLAIMER, RULES, VARIANT_RULES, threshold_values,
                    unreliable_at_this_size)
from .flags import find_duplicates, variant_flags
from .context import _Context
from .base import _base_statement, closest_acceptable
from .terms import _judge_term
from .caution import _diagnostics, _model_flags


# ---------------------------------------------------------------------------
# the evaluation
# ---------------------------------------------------------------------------
@dataclass(frozen=True)
class Classified:
    """The variant-level part of the evaluation (:func:`classify`): each variant's
    evidence, duplicates and flags, the judged variants, the base model and every
    verdict field but the focus terms. :func:`conclude` adds the terms' verdicts, so
    the audit can name the judged variants to the dropping-units analysis before the
    term rules read its tables, each rule still evaluated once."""

    ctx: _Context
    columns: pd.DataFrame
    #: the judged variants (acceptable, not duplicates; plan order)
    judged: tuple[str, ...]
    #: the :class:`AuditVerdict` fields other than ``terms``
    verdict_fields: Mapping[str, Any]


def evaluate(spec: Spec, variants: pd.DataFrame, estimates: pd.DataFrame,
             bounds: pd.DataFrame | None = None,
             simulation: pd.DataFrame | None = None,
             influence: pd.DataFrame | None = None) -> Evaluation:
    """Every rule, once: the variant columns and the verdict.

    ``variants``: one row per variant (``variant``, ``is_base``, ``status``, ``reason``,
    the varied settings and the diagnostics ``hansen_p``, ``ar2_p``,
    ``diff_hansen_level_p``, ``instruments``, ``units``; ``duplicate_of`` when the plan
    found a duplicate); ``estimates``: ``variant``, ``term``, ``estimate``,
    ``std_error``, ``p_value``; ``bounds``: ``variant``, ``term``, ``ols``, ``fe``;
    ``simulation``: the rows of simulation.csv, when the audit ran a Monte Carlo
    (the rule ``unreliable_at_this_size``); ``influence``: the rows of influence.csv,
    when the audit ran the dropping-units analysis (the rule ``few_units_flip``).
    The same as :func:`conclude` of :func:`classify`.
    """
    return conclude(classify(spec, variants, estimates, bounds, simulation), influence)


def classify(spec: Spec, variants: pd.DataFrame, estimates: pd.DataFrame,
             bounds: pd.DataFrame | None = None,
             simulation: pd.DataFrame | None = None) -> Classified:
    """The variant-level rules (arguments as in :func:`evaluate`)."""
    th = threshold_values(spec)
    alpha = float(spec.alpha)
    variants = variants.reset_index(drop=True)
    flags = variant_flags(variants, th, spec)
    ids = variants["variant"].astype(str).to_numpy()
    planned_dup = (variants["duplicate_of"].astype(object).fillna("").astype(str).to_numpy()
                   if "duplicate_of" in variants else np.full(len(variants), ""))
    dups = find_duplicates(variants, estimates)
    duplicate_of = np.array([dups.get(i, planned_dup[k] if planned_dup[k] != "nan" else "")
                             for k, i in enumerate(ids)], dtype=object)
    flags["duplicate_estimate"] = np.array([i in dups for i in ids])
    unreliable = unreliable_at_this_size(simulation, th)
    flags["unreliable_at_this_size"] = np.array([i in unreliable for i in ids])
    flags["duplicate_of"] = duplicate_of
    flag_text = flags[list(VARIANT_RULES)].apply(
        lambda row: ";".join(n for n in VARIANT_RULES if row[n]), axis=1)
    columns = pd.DataFrame({"evidence": flags["evidence"], "acceptable": flags["acceptable"],
                            "duplicate_of": duplicate_of, "flags": flag_text},
                           index=variants.index)

    judged_classes = {Evidence.ACCEPTABLE.value}
    if th["count_untestable"]:
        judged_classes.add(Evidence.UNTESTABLE.value)
    evidence = flags["evidence"].to_numpy()
    not_dup = duplicate_of == ""
    judged_ids = set(ids[np.isin(evidence, list(judged_classes)) & not_dup])
    ok_ids = set(ids[variants["status"].astype(str).eq("ok").to_numpy()])

    is_base = variants["is_base"].astype(bool).to_numpy()
    base_pos = int(np.flatnonzero(is_base)[0]) if is_base.any() else None
    base_id = str(ids[base_pos]) if base_pos is not None else None
    base_ok = base_pos is not None and variants["status"].iloc[base_pos] == "ok"
    base_evidence = str(evidence[base_pos]) if base_pos is not None else None
    base_acceptable = bool(base_ok and base_evidence in judged_classes)
    statement = _base_statement(variants, flags, base_pos, th)
    settings = [c for c in _setting_columns(spec) if c in variants.columns]
    closest = (None if base_acceptable or base_pos is None else
               closest_acceptable(variants, flags, estimates, spec, base_pos, settings,
                                  judged_classes))
    ctx = _Context(spec=spec, th=th, alpha=alpha, variants=variants, flags=flags,
                   estimates=estimates, bounds=bounds, base_id=base_id, base_pos=base_pos,
                   base_ok=base_ok, base_acceptable=base_acceptable, statement=statement,
                   judged_ids=judged_ids, ok_ids=ok_ids, settings=settings,
                   evidence=dict(zip(ids, evidence)), duplicate_of=dict(zip(ids, duplicate_of)))
    counts = {
        "total": int(len(variants)),
        "ok": int(variants["status"].astype(str).eq("ok").sum()),
        "failed": int((evidence == Evidence.FAILED.value).sum()),
        "skipped": int((evidence == Evidence.SKIPPED.value).sum()),
        "acceptable": int((evidence == Evidence.ACCEPTABLE.value).sum()),
        "untestable": int((evidence == Evidence.UNTESTABLE.value).sum()),
        "rejected": int((evidence == Evidence.REJECTED.value).sum()),
        "duplicates": int(sum(1 for k, d in enumerate(duplicate_of)
                              if d and variants["status"].iloc[k] == "ok")),
        "judged": int(len(judged_ids)),
        "count_untestable": bool(th["count_untestable"]),
    }
    fields = dict(
        alpha=alpha, base_variant=base_id, base_acceptable=base_acceptable,
        base_evidence=base_evidence, base_statement=statement, closest_acceptable=closest,
        thresholds=th, variants=counts, diagnostics=_diagnostics(variants, flags, th),
        model=_model_flags(variants, flags, th, base_pos, ids, unreliable),
        rules=RULES, combination=COMBINATION, disclaimer=DISCLAIMER)
    return Classified(ctx=ctx, columns=columns,
                      judged=tuple(i for i in ids if i in judged_ids), verdict_fields=fields)


def conclude(classified: Classified, influence: pd.DataFrame | None = None) -> Evaluation:
    """The focus terms' verdicts on top of :func:`classify` (``influence``: the rows of
    influence.csv for the rule ``few_units_flip``, None without the analysis)."""
    ctx = replace(classified.ctx, influence=influence)
    terms = tuple(_judge_term(term, ctx) for term in ctx.spec.focus_terms())
    verdict = AuditVerdict(terms=terms, **classified.verdict_fields)
    return Evaluation(columns=classified.columns, verdict=verdict, judged=classified.judged)


def judge(spec: Spec, variants: pd.DataFrame, estimates: pd.DataFrame,
          bounds: pd.DataFrame | None = None, influence: pd.DataFrame | None = None) -> dict:
    """The verdict document (``verdict.json``) as plain JSON values."""
    return evaluate(spec, variants, estimates, bounds, influence=influence).verdict.to_dict()


def variant_columns(variants: pd.DataFrame, spec: Spec, estimates: pd.DataFrame | None = None
                    ) -> pd.DataFrame:
    """``evidence``, ``acceptable``, ``duplicate_of`` and ``flags`` per variant."""
    est = estimates if estimates is not None else pd.DataFrame(
        columns=["variant", "term", "estimate", "std_error", "p_value"])
    return evaluate(spec, variants, est).columns


def _setting_columns(spec: Spec) -> list[str]:
    from ..grid import setting_columns  # the grid names the varied-setting columns
    return setting_columns(spec)
