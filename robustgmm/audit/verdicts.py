"""Verdict rules: every rule of the audit, evaluated once, here.

:func:`evaluate` takes the variant tables of an audit and returns typed records: the
per-variant columns of ``variants.csv`` (``evidence``, ``acceptable``,
``duplicate_of``, ``flags``) and the :class:`AuditVerdict` written as
``verdict.json``. Every document (terminal summary, report, Markdown, LaTeX, referee
paragraph, figures) reads these results; none of them applies a threshold again.

Each rule has an id, a plain description, its source, the threshold it uses (a field
of :class:`robustgmm.spec.Thresholds`, ``[audit.thresholds]`` in the model file, or
the audit's ``alpha``) and its effect. The catalogue :data:`RULES` is written into
``verdict.json`` with the values used.

Variant rules (every estimated variant):

* ``hansen_rejects`` — Hansen J p < ``hansen_reject`` (0.05): the overidentifying
  restrictions are rejected (Hansen 1982; Arellano & Bond 1991). **Rejected.**
* ``ar2_rejects`` — Arellano–Bond AR(2) p < ``ar2_reject`` (0.05): second-order serial
  correlation in the differenced residuals, so levels dated ``t-2`` are not valid
  instruments (Arellano & Bond 1991; common practice). **Rejected.**
* ``difference_hansen_level_rejects`` — difference-in-Hansen of the level-equation
  instruments of system GMM, p < ``difference_hansen_reject`` (0.05) (Blundell & Bond
  1998; Roodman 2009). **Rejected.**
* ``tests_unavailable`` — no test rejects, but a required test cannot be computed:
  Hansen and AR(2) always, the level-equation difference-in-Hansen in system GMM. An
  exactly identified instrument set (as many instruments as parameters) leaves the
  Hansen test nothing to test; its one- and two-step estimates coincide.
  **Untestable**: shown and counted, but judged only with ``count_untestable = true``.
* ``hansen_p_high`` — Hansen p ≥ ``hansen_too_high`` (0.25) *and* instruments per unit
  ≥ ``instruments_per_unit_warn`` (0.25), or p ≥ 0.99 at any count. Roodman (2009)
  shows the test weakening as instruments approach the number of units; with few
  instruments per unit a p-value above 0.25 is what valid instruments give three
  times in four, so alone it is no warning. The 0.25 lines are common practice and a
  robustgmm default. Caution.
* ``hansen_p_near_one`` — Hansen p ≥ 0.99 (:data:`HANSEN_NEAR_ONE`), the telltale sign
  of instrument proliferation (Roodman 2009). Caution.
* ``instruments_exceed_units`` — instruments per unit > ``instruments_per_unit`` (1.0)
  (common practice; Roodman 2009). Caution.
* ``duplicate_estimate`` — the estimates equal those of an earlier variant to
  :data:`DUPLICATE_TOLERANCE` (one- and two-step when exactly identified; a
  ``last_lag`` deeper than the data). Recorded in ``duplicate_of``; a duplicate casts
  no vote. Information.

Evidence classes (column ``evidence``, :class:`robustgmm.options.Evidence`):
``acceptable`` (estimated, every required test computed and passed), ``untestable``,
``rejected``, ``failed``, ``skipped``. ``acceptable`` (boolean) is
``evidence == "acceptable"``. The *judged* variants of a term are the acceptable ones
(plus the untestable ones with ``count_untestable``) that are not duplicates and
estimate the term.

Term rules (each focus term, over its judged variants):

* ``base_not_ok`` — the base model could not be estimated. **Inconclusive.**
* ``base_not_acceptable`` — the base model fails its own tests (or cannot be tested).
  **Inconclusive**, whatever the variants say: the rules below are anchored on the base
  model, and a base that fails its tests is no anchor. The closest acceptable
  variant is named instead (:func:`closest_acceptable`).
* ``too_few_acceptable`` — fewer than :data:`MIN_ACCEPTABLE` (2) judged variants.
  **Inconclusive.**
* ``sign_change`` — some judged variant is *significant at alpha* with the sign
  opposite to the base estimate (or significant estimates of both signs exist).
  Insignificant opposite signs are counted in the figures, not as fragility (the
  specification curve of Simonsohn, Simmons & Nelson 2020 shows them). **Fragile.**
* ``significance_flip`` — among the informative judged variants, the share reaching
  the base model's conclusion about significance at alpha (significant with the
  base's sign when the base is significant, not significant when it is not) is below
  ``significant_share`` (0.9; a robustgmm default). **Fragile.**
* ``spread`` — some informative judged variant lies more than ``spread_in_se`` (2)
  units of ``sqrt(se_base² + se_variant²)`` from the base estimate. The scale is the
  standard error of the difference of two independent estimates; estimates on the
  same data are positively correlated, so the true standard error of the difference
  is smaller and the rule is conservative (fires less often). A variant is
  *uninformative* when its standard error exceeds ``uninformative_se_ratio`` (3) base
  standard errors; uninformative variants are listed and left out of this rule and of
  ``significance_flip``. Caution.
* ``ar_outside_band`` — for an autoregressive term: the base estimate lies outside the
  [within, pooled OLS] band of its sample (Bond, Hoeffler & Temple 2001; Bond 2002).
  Caution.
* ``ar_near_within`` — the base AR estimate lies within one base standard error of the
  within estimate, or below it: the downward bias of weak instruments (Blundell &
  Bond 1998; Bond, Hoeffler & Temple 2001). Caution.

How the rules combine (the same order for every term):

1. **inconclusive** if ``base_not_ok``, ``base_not_acceptable`` or
   ``too_few_acceptable`` fires (the base-anchored rules are then not evaluated);
2. otherwise **fragile** if ``sign_change`` or ``significance_flip`` fires;
3. otherwise **robust**. Cautions never change the verdict.

What drives each estimate (model influence; Young & Holsteen 2017, Sociological
Methods & Research 46(1), 3–40): for each varied setting and value, the judged
variants with that value, their mean estimate and share significant, and the
*shift*: the least-squares coefficient of that value's indicator in a regression of
the estimate on an intercept and indicators of every varied setting (the base
model's value is the reference, shift 0). Beside it the modeling standard deviation
``sqrt(mean((b_j - mean b)²))``, the sampling standard deviation
``sqrt(mean(se_j²))`` and the robustness ratio ``mean b / sqrt(modeling² +
sampling²)``, as defined by Young & Holsteen (2017).

None of this is proof that the instruments are valid: that rests on economic
reasoning about the model.
"""
from __future__ import annotations

import math
from dataclasses import asdict, dataclass
from typing import Any, Mapping, Sequence

import numpy as np
import pandas as pd

from ..options import LEVEL_GROUP  # noqa: F401  (read here, written by the core)
from ..options import Effect, Evidence, Verdict
from .records import (AuditVerdict, BaseEstimate, Driver, Evaluation, Firing, Influence,  # noqa: F401
                      Rule, TermVerdict, _clean, _num)
from ..spec import Spec, Thresholds

#: Hansen p-values at or above this count as "p ≈ 1" (Roodman 2009 calls a p-value
#: of 1.000 a telltale sign of too many instruments; 0.99 catches values that round
#: to 1.00 in a table).
HANSEN_NEAR_ONE = 0.99
#: Fewest judged variants needed to call a conclusion robust or fragile.
MIN_ACCEPTABLE = 2
#: Two variants whose estimates differ by at most this (relative to max(1, |b|)) in
#: every term are the same estimation.
DUPLICATE_TOLERANCE = 1e-10

# kept for callers of the old names
FRAGILE, ROBUST, INCONCLUSIVE = Verdict.FRAGILE, Verdict.ROBUST, Verdict.INCONCLUSIVE
EFFECT_FRAGILE, EFFECT_INCONCLUSIVE, EFFECT_CAUTION, EFFECT_EXCLUDE = (
    Effect.FRAGILE, Effect.INCONCLUSIVE, Effect.CAUTION, Effect.EXCLUDE)


# ---------------------------------------------------------------------------
# the catalogue
# ---------------------------------------------------------------------------
RULES: tuple[Rule, ...] = (
    Rule("hansen_rejects", "variant",
         "Hansen J test rejects the overidentifying restrictions (p below the threshold)",
         "Hansen (1982); Arellano & Bond (1991)", "hansen_reject", Effect.EXCLUDE),
    Rule("ar2_rejects", "variant",
         "Arellano-Bond AR(2) test rejects no second-order serial correlation in the "
         "differenced residuals, so lag-2 levels are not valid instruments",
         "Arellano & Bond (1991); common practice", "ar2_reject", Effect.EXCLUDE),
    Rule("difference_hansen_level_rejects", "variant",
         "difference-in-Hansen test rejects the level-equation instruments of system GMM",
         "Blundell & Bond (1998); Roodman (2009)", "difference_hansen_reject", Effect.EXCLUDE),
    Rule("tests_unavailable", "variant",
         "no test rejects, but a required test cannot be computed (Hansen, AR(2), and in "
         "system GMM the level-equation difference-in-Hansen); an exactly identified "
         "instrument set leaves the Hansen test nothing to test",
         "Hansen (1982); robustgmm", "count_untestable", Effect.UNTESTABLE),
    Rule("hansen_p_high", "variant",
         "Hansen p-value at or above the warning line with many instruments per unit "
         "(at or above instruments_per_unit_warn), or about 1 at any count: the test is "
         "weak and a high p-value is no reassurance",
         "Roodman (2009); the 0.25 lines are common practice and a robustgmm default",
         "hansen_too_high", Effect.CAUTION),
    Rule("hansen_p_near_one", "variant",
         "Hansen p-value of about 1, the telltale sign of too many instruments",
         "Roodman (2009)", "hansen_near_one", Effect.CAUTION),
    Rule("instruments_exceed_units", "variant",
         "more instruments per unit than the threshold",
         "common practice; Roodman (2009)", "instruments_per_unit", Effect.CAUTION),
    Rule("duplicate_estimate", "variant",
         "the estimates equal those of an earlier variant (column duplicate_of); it casts "
         "no vote",
         "robustgmm", None, Effect.INFORMATION),
    Rule("sign_change", "term",
         "some judged variant is significant at alpha with the sign opposite to the base "
         "estimate (or significant estimates of both signs exist)",
         "Simonsohn, Simmons & Nelson (2020), specification curve", "alpha", Effect.FRAGILE),
    Rule("significance_flip", "term",
         "too few informative judged variants reach the base model's conclusion about "
         "significance at alpha (same sign and significant, or not significant)",
         "robustgmm default threshold; the idea follows Simonsohn, Simmons & Nelson (2020)",
         "significant_share", Effect.FRAGILE),
    Rule("spread", "term",
         "some informative judged variant lies more than the threshold from the base "
         "estimate, in units of sqrt(se_base^2 + se_variant^2) (conservative: it ignores "
         "the positive correlation of estimates on the same data); variants with a "
         "standard error above uninformative_se_ratio base standard errors are left out",
         "robustgmm default threshold", "spread_in_se", Effect.CAUTION),
    Rule("ar_outside_band", "term",
         "the base model's autoregressive coefficient lies outside the band between the "
         "within (fixed-effects) and pooled OLS estimates on its sample",
         "Bond, Hoeffler & Temple (2001); Bond (2002)", None, Effect.CAUTION),
    Rule("ar_near_within", "term",
         "the base model's autoregressive coefficient lies within one base standard error "
         "of the within estimate, or below it: a sign of weak instruments",
         "Bond, Hoeffler & Temple (2001); Blundell & Bond (1998)", None, Effect.CAUTION),
    Rule("base_not_ok", "term", "the base model could not be estimated",
         "robustgmm", None, Effect.INCONCLUSIVE),
    Rule("base_not_acceptable", "term",
         "the base model fails its own specification tests (Hansen, AR(2) or "
         "difference-in-Hansen of the level equation) or cannot be tested; every verdict "
         "is then inconclusive and the closest acceptable variant is named",
         "Arellano & Bond (1991); Blundell & Bond (1998)", None, Effect.INCONCLUSIVE),
    Rule("too_few_acceptable", "term",
         f"fewer than {MIN_ACCEPTABLE} judged variants estimate the term",
         "robustgmm", "min_acceptable", Effect.INCONCLUSIVE),
)
RULE_BY_ID = {r.id: r for r in RULES}
VARIANT_RULES = tuple(r.id for r in RULES if r.level == "variant")
REJECTION_RULES = ("hansen_rejects", "ar2_rejects", "difference_hansen_level_rejects")
BASE_ANCHORED = ("sign_change", "significance_flip", "spread")

COMBINATION = (
    "inconclusive if base_not_ok, base_not_acceptable or too_few_acceptable fires (the "
    "base-anchored rules are then not evaluated); otherwise fragile if sign_change or "
    "significance_flip fires among the judged variants; otherwise robust. Caution rules "
    "are reported beside the verdict and never change it. A variant is acceptable when "
    "it estimated, every required test could be computed, and neither hansen_rejects, "
    "ar2_rejects nor difference_hansen_level_rejects fired; untestable when no test "
    "rejects but one cannot be computed. The judged variants are the acceptable ones "
    "(and the untestable ones with count_untestable = true), duplicates left out.")

DISCLAIMER = ("Statistical robustness across specifications is not proof that the "
              "instruments are valid; validity rests on economic reasoning about the model.")


def threshold_values(spec: Spec) -> dict[str, Any]:
    """Every threshold in force, by name (with ``alpha`` and the fixed ones)."""
    t: Thresholds = spec.thresholds
    out: dict[str, Any] = {}
    for k, v in asdict(t).items():
        out[k] = bool(v) if isinstance(v, bool) else float(v)
    out["hansen_near_one"] = HANSEN_NEAR_ONE
    out["min_acceptable"] = MIN_ACCEPTABLE
    out["alpha"] = float(spec.alpha)
    return out


def _fired(rule_id: str, thresholds: Mapping[str, Any], figures: dict) -> Firing:
    rule = RULE_BY_ID[rule_id]
    return Firing(rule.id, rule.description, rule.source, rule.threshold,
                  thresholds.get(rule.threshold) if rule.threshold else None, rule.effect,
                  _clean(figures))


def p_text(p) -> str:
    """A p-value in a sentence: two significant digits, '< 0.0001' below that."""
    p = _num(p)
    if not math.isfinite(p):
        return "n/a"
    if p < 1e-4:
        return "< 0.0001"
    return f"{p:.2g}" if p < 0.1 else f"{p:.2f}"


def value_text(value) -> str:
    """A setting value as written in variants.csv and verdict.json (2.0 -> '2')."""
    if value is None or (isinstance(value, float) and math.isnan(value)):
        return "n/a"
    if isinstance(value, (bool, np.bool_)):
        return "true" if value else "false"
    if isinstance(value, (float, np.floating)) and float(value).is_integer():
        return str(int(value))
    text = str(value)
    return {"True": "true", "False": "false"}.get(text, text)


def _column(variants: pd.DataFrame, name: str) -> np.ndarray:
    if name not in variants:
        return np.full(len(variants), np.nan)
    return pd.to_numeric(variants[name], errors="coerce").to_numpy(dtype=float)


# ---------------------------------------------------------------------------
# variant rules and evidence classes
# ---------------------------------------------------------------------------
def _is_system(variants: pd.DataFrame, spec: Spec) -> np.ndarray:
    if "equations" in variants:
        return variants["equations"].astype(str).eq("system").to_numpy()
    return np.full(len(variants), str(spec.equations) == "system")


def variant_flags(variants: pd.DataFrame, thresholds: Mapping[str, Any],
                  spec: Spec | None = None) -> pd.DataFrame:
    """One boolean column per variant rule (a missing test does not fire) plus
    ``evidence`` and ``acceptable``; rows follow ``variants``. ``duplicate_estimate``
    is filled by :func:`evaluate` (it needs the estimates)."""
    status = variants["status"].astype(str).to_numpy()
    ok = status == "ok"
    hansen, ar2, dh = (_column(variants, c) for c in ("hansen_p", "ar2_p", "diff_hansen_level_p"))
    instr, units = _column(variants, "instruments"), _column(variants, "units")
    system = _is_system(variants, spec) if spec is not None else np.isfinite(dh)
    with np.errstate(invalid="ignore", divide="ignore"):
        per_unit = np.where(units > 0, instr / units, np.nan)
        near_one = hansen >= thresholds["hansen_near_one"]
        flags = pd.DataFrame({
            "hansen_rejects": ok & (hansen < thresholds["hansen_reject"]),
            "ar2_rejects": ok & (ar2 < thresholds["ar2_reject"]),
            "difference_hansen_level_rejects": ok & (dh < thresholds["difference_hansen_reject"]),
            "hansen_p_high": ok & (((hansen >= thresholds["hansen_too_high"])
                                    & (per_unit >= thresholds["instruments_per_unit_warn"]))
                                   | near_one),
            "hansen_p_near_one": ok & near_one,
            "instruments_exceed_units": ok & (per_unit > thresholds["instruments_per_unit"]),
        }, index=variants.index)
    rejected = flags[list(REJECTION_RULES)].any(axis=1).to_numpy()
    missing = ~np.isfinite(hansen) | ~np.isfinite(ar2) | (system & ~np.isfinite(dh))
    flags["tests_unavailable"] = ok & ~rejected & missing
    flags["duplicate_estimate"] = False
    flags = flags[list(VARIANT_RULES)]
    evidence = np.where(status == "failed", Evidence.FAILED.value, Evidence.SKIPPED.value)
    evidence = np.where(ok & rejected, Evidence.REJECTED.value, evidence)
    evidence = np.where(ok & ~rejected & missing, Evidence.UNTESTABLE.value, evidence)
    evidence = np.where(ok & ~rejected & ~missing, Evidence.ACCEPTABLE.value, evidence)
    flags["evidence"] = evidence
    flags["acceptable"] = evidence == Evidence.ACCEPTABLE.value
    return flags


def find_duplicates(variants: pd.DataFrame, estimates: pd.DataFrame,
                    tol: float = DUPLICATE_TOLERANCE) -> dict[str, str]:
    """``{variant: first earlier variant with the same estimates}`` among the ok
    variants, in the order of ``variants``: the same terms, every estimate equal to
    ``tol`` relative to max(1, |b|)."""
    ok_ids = variants.loc[variants["status"].astype(str).eq("ok"), "variant"].astype(str)
    if estimates.empty or ok_ids.empty:
        return {}
    est = estimates.assign(variant=estimates["variant"].astype(str))
    wide = est.pivot_table(index="variant", columns="term", values="estimate", aggfunc="first")
    wide = wide.reindex([i for i in ok_ids if i in wide.index])
    out: dict[str, str] = {}
    reps: list[tuple[str, np.ndarray, np.ndarray]] = []  # (id, values, finite mask)
    for vid, row in zip(wide.index, wide.to_numpy(dtype=float)):
        finite = np.isfinite(row)
        twin = None
        for rid, rvals, rfin in reps:
            if np.array_equal(rfin, finite) and finite.any() and np.all(
                    np.abs(rvals[finite] - row[finite])
                    <= tol * np.maximum(1.0, np.abs(row[finite]))):
                twin = rid
                break
        if twin is None:
            reps.append((vid, row, finite))
        else:
            out[vid] = twin
    return out


# ---------------------------------------------------------------------------
# the evaluation
# ---------------------------------------------------------------------------
def evaluate(spec: Spec, variants: pd.DataFrame, estimates: pd.DataFrame,
             bounds: pd.DataFrame | None = None) -> Evaluation:
    """Every rule, once: the variant columns and the verdict.

    ``variants``: one row per variant (``variant``, ``is_base``, ``status``, ``reason``,
    the varied settings and the diagnostics ``hansen_p``, ``ar2_p``,
    ``diff_hansen_level_p``, ``instruments``, ``units``; ``duplicate_of`` when the plan
    found a duplicate); ``estimates``: ``variant``, ``term``, ``estimate``,
    ``std_error``, ``p_value``; ``bounds``: ``variant``, ``term``, ``ols``, ``fe``.
    """
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
    terms = tuple(_judge_term(term, ctx) for term in spec.focus_terms())
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
    verdict = AuditVerdict(
        alpha=alpha, base_variant=base_id, base_acceptable=base_acceptable,
        base_evidence=base_evidence, base_statement=statement, closest_acceptable=closest,
        thresholds=th, variants=counts, diagnostics=_diagnostics(variants, flags, th),
        terms=terms, model=_model_flags(variants, flags, th, base_pos, ids),
        rules=RULES, combination=COMBINATION, disclaimer=DISCLAIMER)
    return Evaluation(columns=columns, verdict=verdict)


def judge(spec: Spec, variants: pd.DataFrame, estimates: pd.DataFrame,
          bounds: pd.DataFrame | None = None) -> dict:
    """The verdict document (``verdict.json``) as plain JSON values."""
    return evaluate(spec, variants, estimates, bounds).verdict.to_dict()


def variant_columns(variants: pd.DataFrame, spec: Spec, estimates: pd.DataFrame | None = None
                    ) -> pd.DataFrame:
    """``evidence``, ``acceptable``, ``duplicate_of`` and ``flags`` per variant."""
    est = estimates if estimates is not None else pd.DataFrame(
        columns=["variant", "term", "estimate", "std_error", "p_value"])
    return evaluate(spec, variants, est).columns


def _setting_columns(spec: Spec) -> list[str]:
    from .grid import setting_columns  # the grid names the varied-setting columns
    return setting_columns(spec)


@dataclass
class _Context:
    spec: Spec
    th: Mapping[str, Any]
    alpha: float
    variants: pd.DataFrame
    flags: pd.DataFrame
    estimates: pd.DataFrame
    bounds: pd.DataFrame | None
    base_id: str | None
    base_pos: int | None
    base_ok: bool
    base_acceptable: bool
    statement: str
    judged_ids: set
    ok_ids: set
    settings: list
    evidence: dict
    duplicate_of: dict


def _base_statement(variants, flags, base_pos, th) -> str:
    """The sentence every document opens with when the base model is no anchor."""
    if base_pos is None:
        return "The audit has no base model."
    row = variants.iloc[base_pos]
    if row["status"] != "ok":
        reason = str(row.get("reason") or "").strip()
        return ("The base model could not be estimated" + (f" ({reason})" if reason else "")
                + ".")
    ev = flags["evidence"].iloc[base_pos]
    if ev == Evidence.REJECTED.value:
        parts = []
        if flags["hansen_rejects"].iloc[base_pos]:
            parts.append(f"Hansen p = {p_text(row.get('hansen_p'))}")
        if flags["ar2_rejects"].iloc[base_pos]:
            parts.append(f"AR(2) p = {p_text(row.get('ar2_p'))}")
        if flags["difference_hansen_level_rejects"].iloc[base_pos]:
            parts.append("level-equation difference-in-Hansen p = "
                         f"{p_text(row.get('diff_hansen_level_p'))}")
        return f"The base model fails its own tests ({', '.join(parts)})."
    if ev == Evidence.UNTESTABLE.value and not th["count_untestable"]:
        return ("The base model cannot be tested: " + _missing_tests(row) + " cannot be "
                "computed (an exactly identified instrument set leaves nothing to test).")
    return ""


def _missing_tests(row) -> str:
    names = []
    if not math.isfinite(_num(row.get("hansen_p"))):
        names.append("the Hansen test")
    if not math.isfinite(_num(row.get("ar2_p"))):
        names.append("the AR(2) test")
    if str(row.get("equations", "system")) == "system" and not math.isfinite(
            _num(row.get("diff_hansen_level_p"))):
        names.append("the level-equation difference-in-Hansen test")
    return " and ".join(names) if names else "a required test"


# model-file place of each varied setting (for the lines that make a variant the base)
_SECTION = {"equations": "method", "transform": "method", "steps": "method",
            "errors": "method", "form": "instruments", "first_lag": "instruments",
            "last_lag": "instruments", "time_effects": "model"}


def _toml_value(setting: str, value: str) -> str:
    if setting in ("first_lag",) or (setting in ("last_lag", "steps") and value.isdigit()):
        return value
    if setting == "time_effects":
        return value.lower()
    return f'"{value}"'


def model_file_lines(changed: Mapping[str, str]) -> list[str]:
    """The model-file lines that make a variant's settings the base model's."""
    out = []
    for setting, value in changed.items():
        if setting in _SECTION:
            out.append(f"[{_SECTION[setting]}] {setting} = {_toml_value(setting, value)}")
        elif setting.startswith("role:"):
            out.append(f'[[model.regressors]] name = "{setting[5:]}": role = "{value}"')
        elif setting == "sample":
            out.append(f'[sample] the restrictions of the sample "{value}" '
                       "(from [[audit.vary.sample]])")
        else:
            out.append(f"{setting} = {value}")
    return out


def closest_acceptable(variants, flags, estimates, spec, base_pos, settings,
                       judged_classes) -> dict | None:
    """The acceptable variant with the fewest settings changed from the base model
    (ties: fewest instruments, then plan order), with its estimates of the focus terms
    and the model-file lines that would make it the base."""
    ok = np.isin(flags["evidence"].to_numpy(), list(judged_classes)) & (
        flags["duplicate_of"].to_numpy() == "")
    if not ok.any():
        return None
    base = variants.iloc[base_pos]
    cand = []
    for pos in np.flatnonzero(ok):
        row = variants.iloc[pos]
        changed = {c: value_text(row[c]) for c in settings
                   if value_text(row[c]) != value_text(base[c])}
        inst = _num(row.get("instruments"))
        cand.append((len(changed), inst if math.isfinite(inst) else math.inf, pos, changed))
    n, _, pos, changed = min(cand, key=lambda c: (c[0], c[1], c[2]))
    vid = str(variants["variant"].iloc[pos])
    est = estimates[estimates["variant"].astype(str) == vid]
    focus = spec.focus_terms()
    return _clean({"variant": vid, "changed": changed, "settings_changed": n,
                   "instruments": variants.iloc[pos].get("instruments"),
                   "estimates": {t: float(e) for t, e in zip(est["term"], est["estimate"])
                                 if t in focus},
                   "std_errors": {t: float(e) for t, e in zip(est["term"], est["std_error"])
                                  if t in focus},
                   "model_file_lines": model_file_lines(changed)})


def _judge_term(term: str, c: _Context) -> TermVerdict:
    th, alpha = c.th, c.alpha
    est = c.estimates[c.estimates["term"] == term]
    est = est[est["variant"].astype(str).isin(c.ok_ids)]
    est = est[np.isfinite(pd.to_numeric(est["estimate"], errors="coerce"))]
    by_id = est.set_index(est["variant"].astype(str))
    fired: list[Firing] = []
    passed: list[str] = []
    not_evaluated: list[str] = []
    base = None
    if c.base_ok and c.base_id in by_id.index:
        row = by_id.loc[c.base_id]
        base = BaseEstimate(float(row["estimate"]), float(row["std_error"]),
                            float(row["p_value"]), bool(float(row["p_value"]) < alpha))
    acc = by_id[by_id.index.isin(c.judged_ids)]
    b = acc["estimate"].to_numpy(dtype=float)
    se = acc["std_error"].to_numpy(dtype=float)
    p = acc["p_value"].to_numpy(dtype=float)
    sig = np.isfinite(p) & (p < alpha)
    all_b = by_id["estimate"].to_numpy(dtype=float)
    ev = np.array([c.evidence.get(i, "") for i in by_id.index], dtype=object)
    dup = np.array([bool(c.duplicate_of.get(i, "")) for i in by_id.index], dtype=bool)
    figures: dict[str, Any] = {
        "variants_ok": int(len(by_id)), "judged": int(len(acc)),
        "variants_acceptable": int(len(acc)),
        "untestable": int(((ev == Evidence.UNTESTABLE.value) & ~dup).sum()),
        "rejected": int((ev == Evidence.REJECTED.value).sum()),
        "duplicates": int(dup.sum()),
        "positive": int((b > 0).sum()), "negative": int((b < 0).sum()),
        "significant": int(sig.sum()),
        "significant_positive": int((sig & (b > 0)).sum()),
        "significant_negative": int((sig & (b < 0)).sum()),
        "share_significant": float(sig.mean()) if len(b) else None,
        "min": float(b.min()) if len(b) else None, "max": float(b.max()) if len(b) else None,
        "median": float(np.median(b)) if len(b) else None,
        "ok_min": float(all_b.min()) if len(all_b) else None,
        "ok_max": float(all_b.max()) if len(all_b) else None,
    }
    informative = np.ones(len(b), bool)
    if base is not None and base.std_error > 0 and math.isfinite(base.std_error):
        informative = ~(se > th["uninformative_se_ratio"] * base.std_error)
    figures["informative"] = int(informative.sum())
    figures["uninformative_ids"] = [str(i) for i in acc.index[~informative]]

    # -- inconclusive conditions (checked first; a failing base is no anchor)
    if base is None:
        reason = (str(c.variants["reason"].iloc[c.base_pos]) if c.base_pos is not None
                  else "no base")
        fired.append(_fired("base_not_ok", th, {"reason": reason}))
    else:
        passed.append("base_not_ok")
        if not c.base_acceptable:
            row = c.variants.iloc[c.base_pos]
            fired.append(_fired("base_not_acceptable", th, {
                "evidence": c.flags["evidence"].iloc[c.base_pos],
                "hansen_p": row.get("hansen_p"), "ar2_p": row.get("ar2_p"),
                "diff_hansen_level_p": row.get("diff_hansen_level_p")}))
        else:
            passed.append("base_not_acceptable")
    enough = len(acc) >= MIN_ACCEPTABLE
    if not enough:
        fired.append(_fired("too_few_acceptable", th, {"judged": int(len(acc)),
                                                       "acceptable": int(len(acc)),
                                                       "ok": int(len(by_id))}))
    else:
        passed.append("too_few_acceptable")
    anchored = base is not None and c.base_acceptable and enough

    # -- fragility over the judged variants
    if anchored:
        base_sign = np.sign(base.estimate)
        opposite = (np.sign(b) == -base_sign) if base_sign != 0 else np.zeros(len(b), bool)
        sig_opposite = sig & opposite
        both = bool((sig & (b > 0)).any() and (sig & (b < 0)).any())
        fig = {"significant_opposite": int(sig_opposite.sum()),
               "insignificant_opposite": int((~sig & opposite).sum()),
               "significant_positive": figures["significant_positive"],
               "significant_negative": figures["significant_negative"],
               "judged": int(len(b)), "alpha": alpha,
               "ids": [str(i) for i in acc.index[sig_opposite]]}
        figures["insignificant_opposite"] = fig["insignificant_opposite"]
        figures["significant_opposite"] = fig["significant_opposite"]
        (fired.append(_fired("sign_change", th, fig)) if (sig_opposite.any() or both)
         else passed.append("sign_change"))
        inf_sig, inf_b = sig[informative], b[informative]
        if len(inf_b):
            agree = (inf_sig & (np.sign(inf_b) == base_sign)) if base.significant else ~inf_sig
            share_agree = float(agree.mean())
            figures["share_agreeing_with_base"] = share_agree
            fig = {"base_significant": base.significant,
                   "share_significant": float(inf_sig.mean()),
                   "share_agreeing": share_agree, "agreeing": int(agree.sum()),
                   "informative": int(len(inf_b)), "alpha": alpha}
            (fired.append(_fired("significance_flip", th, fig))
             if share_agree < th["significant_share"] else passed.append("significance_flip"))
        else:
            not_evaluated.append("significance_flip")
        if base.std_error > 0 and math.isfinite(base.std_error) and informative.any():
            with np.errstate(invalid="ignore"):
                dev = np.abs(b - base.estimate) / np.sqrt(base.std_error ** 2 + se ** 2)
            dev = np.where(informative & np.isfinite(dev), dev, -np.inf)
            worst = int(np.argmax(dev))
            fig = {"max_distance": float(dev[worst]), "variant": str(acc.index[worst]),
                   "estimate": float(b[worst]), "std_error": float(se[worst]),
                   "base_estimate": base.estimate, "base_std_error": base.std_error,
                   "uninformative_ids": figures["uninformative_ids"]}
            figures["max_distance"] = float(dev[worst])
            (fired.append(_fired("spread", th, fig)) if dev[worst] > th["spread_in_se"]
             else passed.append("spread"))
        else:
            not_evaluated.append("spread")
    else:
        not_evaluated.extend(BASE_ANCHORED)

    # -- the AR coefficient against the within-OLS band (a property of the base)
    if term in c.spec.ar_terms() and base is not None and c.bounds is not None and len(c.bounds):
        rows = c.bounds[(c.bounds["variant"].astype(str) == c.base_id)
                        & (c.bounds["term"] == term)]
        if len(rows) and np.isfinite(rows[["ols", "fe"]].to_numpy(dtype=float)).all():
            ols, fe = float(rows["ols"].iloc[0]), float(rows["fe"].iloc[0])
            lo, hi = min(ols, fe), max(ols, fe)
            inside = lo <= base.estimate <= hi
            fig = {"base_estimate": base.estimate, "ols": ols, "fe": fe,
                   "position": "inside" if inside else ("below" if base.estimate < lo else "above"),
                   "share_acceptable_outside": _share_outside(c.bounds, term, acc)}
            figures["base_in_band"] = inside
            (passed.append("ar_outside_band") if inside
             else fired.append(_fired("ar_outside_band", th, fig)))
            near = base.estimate < fe + base.std_error
            fig = {"base_estimate": base.estimate, "base_std_error": base.std_error, "fe": fe,
                   "distance_in_se": (base.estimate - fe) / base.std_error
                   if base.std_error > 0 else None}
            (fired.append(_fired("ar_near_within", th, fig)) if near
             else passed.append("ar_near_within"))

    drivers = _drivers(acc, sig, c) if len(acc) >= MIN_ACCEPTABLE else ()
    influence = _influence(b, se) if len(b) >= MIN_ACCEPTABLE else None
    if any(f.effect == Effect.INCONCLUSIVE for f in fired):
        verdict = Verdict.INCONCLUSIVE
    elif any(f.effect == Effect.FRAGILE for f in fired):
        verdict = Verdict.FRAGILE
    else:
        verdict = Verdict.ROBUST
    reason = _reason(term, verdict, base, figures, fired, c)
    key = _key_driver(drivers)
    return TermVerdict(term=term, verdict=verdict, reason=reason,
                       summary=f"{term}: {verdict} — {reason}", base=base, figures=figures,
                       rules=tuple(fired), passed=tuple(passed),
                       not_evaluated=tuple(not_evaluated), drivers=drivers, key_driver=key,
                       influence=influence)


def _share_outside(bounds: pd.DataFrame, term: str, acc: pd.DataFrame) -> float | None:
    rows = bounds[(bounds["term"] == term) & bounds["variant"].astype(str).isin(acc.index)]
    if rows.empty:
        return None
    band = rows.set_index(rows["variant"].astype(str))[["ols", "fe"]].astype(float)
    est = acc["estimate"].astype(float).reindex(band.index)
    lo, hi = band.min(axis=1), band.max(axis=1)
    valid = np.isfinite(est) & np.isfinite(lo) & np.isfinite(hi)
    if not valid.any():
        return None
    return float(((est < lo) | (est > hi))[valid].mean())


def _of(k: int, n: int) -> str:
    return f"all {n}" if n and k == n else f"{k} of {n}"


def _reason(term, verdict, base, figures, fired, c: _Context) -> str:
    """Why the verdict is what it is, in one clause (printed by every document)."""
    ids = {f.id: f for f in fired}
    n = figures["judged"]
    if "base_not_ok" in ids:
        return c.statement.rstrip(".") if c.statement else "the base model could not be estimated"
    if "base_not_acceptable" in ids:
        return c.statement.rstrip(".")
    if "too_few_acceptable" in ids:
        return (f"only {n} variant{'s' if n != 1 else ''} that pass{'es' if n == 1 else ''} "
                f"its tests estimate{'s' if n == 1 else ''} the term (at least "
                f"{MIN_ACCEPTABLE} needed)")
    pct = f"{100 * c.alpha:g}%"
    parts = []
    if "sign_change" in ids:
        f = ids["sign_change"].figures
        parts.append(f"{f['significant_opposite']} of {n} acceptable variants are significant "
                     f"at {pct} with the opposite sign"
                     if f["significant_opposite"] else
                     f"significant estimates of both signs ({f['significant_positive']} "
                     f"positive, {f['significant_negative']} negative of {n})")
    if "significance_flip" in ids:
        f = ids["significance_flip"].figures
        what = ("significant at {pct} with its sign" if f["base_significant"]
                else "not significant at {pct}").format(pct=pct)
        parts.append(f"only {f['agreeing']} of {f['informative']} informative acceptable "
                     f"variants agree with the base model that it is {what} (the "
                     f"threshold share is {c.th['significant_share']:g})")
    if parts:
        return "; ".join(parts)
    agree = figures.get("share_agreeing_with_base")
    k = int(round(agree * figures["informative"])) if agree is not None else 0
    of = _of(k, figures["informative"])
    if base.significant:
        return (f"significant at {pct} with the base model's sign in {of} informative "
                f"acceptable variants; none significant with the opposite sign")
    return (f"not significant at {pct}, as in the base model, in {of} informative "
            f"acceptable variants; none significant with the opposite sign")


def _key_driver(drivers: Sequence[Driver]) -> dict | None:
    """The setting the conclusion depends on most: the one whose values differ most in
    their share of significant estimates; when significance does not vary, the one
    with the largest |shift|."""
    if not drivers:
        return None
    by_setting: dict[str, list[Driver]] = {}
    for d in drivers:
        by_setting.setdefault(d.setting, []).append(d)
    def sig_range(ds):
        s = [d.share_significant for d in ds if math.isfinite(d.share_significant)]
        return max(s) - min(s) if s else 0.0
    def shift_size(ds):
        return max((abs(d.shift) for d in ds if d.shift is not None), default=0.0)
    setting, ds = max(by_setting.items(), key=lambda kv: (sig_range(kv[1]), shift_size(kv[1])))
    ranged = sig_range(ds)
    basis = "significance" if ranged > 0 else "shift"
    order = sorted(ds, key=lambda d: -d.share_significant) if basis == "significance" else \
        sorted(ds, key=lambda d: -(d.shift or 0.0))
    return {"setting": setting, "basis": basis, "share_significant_range": ranged,
            "values": [{"value": d.value, "variants": d.variants, "significant": d.significant,
                        "mean_estimate": d.mean_estimate, "shift": d.shift} for d in order]}


def _drivers(acc: pd.DataFrame, sig: np.ndarray, c: _Context) -> tuple[Driver, ...]:
    """Model influence (Young & Holsteen 2017) over the judged variants: per setting and
    value the count, mean estimate, share significant, and the least-squares shift of
    the estimate against the base model's value (joint regression on the indicators of
    every varied setting; a difference of means when the indicators are collinear
    among the judged variants)."""
    if not c.settings:
        return ()
    rows = c.variants.set_index(c.variants["variant"].astype(str)).loc[acc.index]
    b = acc["estimate"].to_numpy(float)
    base_row = c.variants.iloc[c.base_pos] if c.base_pos is not None else None
    blocks, names = [np.ones((len(b), 1))], [None]
    per_setting = []
    for col in c.settings:
        vals = np.array([value_text(x) for x in rows[col]])
        levels = list(dict.fromkeys(vals))
        if len(levels) < 2:
            continue
        ref = value_text(base_row[col]) if base_row is not None else levels[0]
        if ref not in levels:
            ref = max(levels, key=lambda v: (vals == v).sum())
        others = [v for v in levels if v != ref]
        blocks.append(np.column_stack([(vals == v).astype(float) for v in others]))
        names.extend((col, v) for v in others)
        per_setting.append((col, vals, levels, ref))
    if not per_setting:
        return ()
    X = np.hstack(blocks)
    coef = None
    if np.linalg.matrix_rank(X) == X.shape[1]:
        coef, *_ = np.linalg.lstsq(X, b, rcond=None)
    shifts = {}
    if coef is not None:
        shifts = {n: float(v) for n, v in zip(names, coef) if n is not None}
    out = []
    for col, vals, levels, ref in per_setting:
        ref_mean = float(b[vals == ref].mean())
        for v in levels:
            m = vals == v
            shift = 0.0 if v == ref else shifts.get((col, v), float(b[m].mean()) - ref_mean)
            out.append(Driver(col, v, int(m.sum()), float(b[m].mean()), float(sig[m].mean()),
                              shift, int(sig[m].sum())))
    return tuple(sorted(out, key=lambda d: (-abs(d.shift or 0.0), d.setting, d.value)))


def _influence(b: np.ndarray, se: np.ndarray) -> Influence:
    """Young & Holsteen (2017): modeling variance mean((b - mean b)²), sampling
    variance mean(se²), robustness ratio mean b / sqrt(their sum)."""
    mean = float(b.mean())
    modeling = float(np.sqrt(np.mean((b - mean) ** 2)))
    sampling = float(np.sqrt(np.mean(se ** 2)))
    total = float(np.hypot(modeling, sampling))
    return Influence(int(len(b)), mean, modeling, sampling, total,
                     mean / total if total > 0 else math.nan)


def _diagnostics(variants, flags, th) -> dict:
    """Ranges and counts of the specification tests over the estimated variants, with
    the number of variants each variant rule fired for (every document reads these)."""
    ok = variants["status"].astype(str).eq("ok").to_numpy()
    out: dict[str, Any] = {}
    for col in ("hansen_p", "ar2_p", "diff_hansen_level_p", "instruments", "units",
                "instruments_per_unit"):
        if col == "instruments_per_unit":
            x = _column(variants, "instruments") / _column(variants, "units")
        else:
            x = _column(variants, col)
        x = x[ok]
        f = x[np.isfinite(x)]
        out[col] = {"available": int(f.size), "min": float(f.min()) if f.size else None,
                    "max": float(f.max()) if f.size else None}
    out["rule_counts"] = {r: int(flags[r].to_numpy()[ok].sum()) for r in VARIANT_RULES}
    out["ok"] = int(ok.sum())
    return out


def _model_flags(variants, flags, th, base_pos, ids) -> tuple[Firing, ...]:
    out = []
    ok = variants["status"].astype(str).eq("ok").to_numpy()
    n_ok = int(ok.sum())
    value_col = {"hansen_rejects": "hansen_p", "ar2_rejects": "ar2_p",
                 "difference_hansen_level_rejects": "diff_hansen_level_p",
                 "hansen_p_high": "hansen_p", "hansen_p_near_one": "hansen_p",
                 "instruments_exceed_units": "instruments_per_unit",
                 "tests_unavailable": None, "duplicate_estimate": None}
    for rule in RULES:
        if rule.level != "variant":
            continue
        hit = flags[rule.id].to_numpy(bool)
        if not hit.any():
            continue
        col = value_col[rule.id]
        fig = {"variants": int(hit.sum()), "of_ok": n_ok,
               "share": hit.sum() / n_ok if n_ok else None,
               "ids": [str(i) for i in ids[hit]],
               "base": bool(hit[base_pos]) if base_pos is not None else None}
        if col is not None:
            vals = (_column(variants, "instruments") / _column(variants, "units")
                    if col == "instruments_per_unit" else _column(variants, col))
            avail = ok & np.isfinite(vals)
            fig["of_available"] = int(avail.sum())
            fig["base_value"] = vals[base_pos] if base_pos is not None else None
            fig["range"] = [float(np.nanmin(vals[hit])), float(np.nanmax(vals[hit]))]
        if rule.id == "duplicate_estimate":
            fig["pairs"] = {str(i): str(d) for i, d in zip(ids[hit], flags["duplicate_of"].to_numpy()[hit])}
        out.append(_fired(rule.id, th, fig))
    failed = variants["status"].astype(str).eq("failed").to_numpy()
    if failed.any():
        out.append(Firing("variants_failed", "variants that could not be estimated", "robustgmm",
                          None, None, Effect.INFORMATION,
                          _clean({"variants": int(failed.sum()),
                                  "ids": [str(i) for i in ids[failed]],
                                  "reasons": sorted(set(variants["reason"][failed].astype(str)))})))
    return tuple(out)
