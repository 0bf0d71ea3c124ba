"""The rule catalogue (one Rule per rule: id, level, description, source, threshold, effect), the thresholds in force and the text helpers every other part reads."""
from __future__ import annotations

import math
from dataclasses import asdict, dataclass
from typing import Any, Mapping, Sequence

import numpy as np
import pandas as pd

from ...options import LEVEL_GROUP
from ...options import Effect, Evidence, Verdict
from ..records import (AuditVerdict, BaseEstimate, Driver, Evaluation, Firing, Influence,
                       Rule, TermVerdict, _clean, _num)
from ...spec import Spec, Thresholds


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
    Rule("underidentified", "variant",
         "the Kleibergen-Paap rank test (LM form, unit-clustered) of the whole instrument "
         "set does not reject underidentification at alpha: the instruments may not "
         "identify the model (not evaluated where the statistic is not valid, e.g. too "
         "many instruments for the units)",
         "Kleibergen & Paap (2006); Bazzi & Clemens (2013)", "alpha", Effect.EXCLUDE),
    Rule("weak_instruments", "variant",
         "the smallest Sanderson-Windmeijer conditional F of a GMM-instrumented term "
         "(lagged outcome, endogenous or predetermined regressor) is below the threshold: "
         "weak instruments bias GMM towards OLS-like estimates and distort its tests. A "
         "rule of thumb: no critical values exist for cluster-robust GMM first stages",
         "Sanderson & Windmeijer (2016); Staiger & Stock (1997) rule of thumb, common "
         "practice; Bun & Windmeijer (2010)", "weak_f", Effect.CAUTION),
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
         "Roodman (2009); the 0.99 line is a robustgmm default", "hansen_near_one",
         Effect.CAUTION),
    Rule("instruments_exceed_units", "variant",
         "more instruments per unit than the threshold",
         "common practice; Roodman (2009)", "instruments_per_unit", Effect.CAUTION),
    Rule("unreliable_at_this_size", "variant",
         "in the Monte Carlo calibrated to these data (simulation.csv), the variant's "
         "1 - alpha intervals for a focus term cover the truth less often than min_coverage, "
         "or its mean bias exceeds max_bias_sd simulation standard deviations, each by more "
         "than two Monte Carlo standard errors: at this sample size its estimate or its "
         "inference cannot be trusted, if the model is true",
         "Blundell & Bond (1998); Windmeijer (2005); Bun & Windmeijer (2010); the 0.85 and "
         "0.5 lines are robustgmm defaults", "min_coverage", Effect.CAUTION),
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
    Rule("few_units_flip", "term",
         "dropping at most flip_share of the units (the smallest set found by the additive "
         "approximation and the recursive greedy search, each set refitted exactly) "
         "reverses the sign or the significance at alpha of the base model's conclusion "
         "(fragile); when it happens only in some other acceptable variants analysed "
         "([audit] influence = \"all\"), a caution. For an estimate that is not "
         "significant only gaining significance counts",
         "Broderick, Giordano & Meager (2020); Huang, Burt, Shen, Nguyen & Broderick (2024) "
         "for the greedy search; the 1% line is a robustgmm default", "flip_share",
         Effect.FRAGILE),
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
         "the base model fails its own specification tests (Hansen, AR(2), "
         "difference-in-Hansen of the level equation or the underidentification test) or "
         "cannot be tested; every verdict "
         "is then inconclusive and the closest acceptable variant is named",
         "Arellano & Bond (1991); Blundell & Bond (1998)", None, Effect.INCONCLUSIVE),
    Rule("too_few_acceptable", "term",
         f"fewer than {MIN_ACCEPTABLE} judged variants estimate the term",
         "robustgmm", "min_acceptable", Effect.INCONCLUSIVE),
)
RULE_BY_ID = {r.id: r for r in RULES}
VARIANT_RULES = tuple(r.id for r in RULES if r.level == "variant")
REJECTION_RULES = ("hansen_rejects", "ar2_rejects", "difference_hansen_level_rejects",
                   "underidentified")
BASE_ANCHORED = ("sign_change", "significance_flip", "spread")

COMBINATION = (
    "inconclusive if base_not_ok, base_not_acceptable or too_few_acceptable fires (the "
    "base-anchored rules are then not evaluated); otherwise fragile if sign_change or "
    "significance_flip fires among the judged variants, or if few_units_flip fires in the "
    "base model (in other variants only it is a caution); otherwise robust. Caution rules "
    "are reported beside the verdict and never change it. A variant is acceptable when "
    "it estimated, every required test could be computed, and none of hansen_rejects, "
    "ar2_rejects, difference_hansen_level_rejects and underidentified fired; untestable when no test "
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


#: ``unreliable_at_this_size`` fires only when a simulated rate is beyond its line by
#: more than this many Monte Carlo standard errors, so that noise from a small number
#: of replications does not fire it (about a 2.5% one-sided chance per term at the line).
MC_MARGIN = 2.0


def unreliable_at_this_size(summary: pd.DataFrame | None,
                            thresholds: Mapping[str, Any]) -> dict[str, list[dict]]:
    """``{variant id: [{term, coverage, bias, sd, bias_sd}, ...]}`` for the variants
    whose simulated coverage of a focus term is below ``min_coverage`` or whose
    ``|bias| / sd`` exceeds ``max_bias_sd`` (the rule ``unreliable_at_this_size``;
    ``summary``: the rows of simulation.csv), each by more than :data:`MC_MARGIN`
    Monte Carlo standard errors (``coverage_mc_se``; ``bias_mc_se = sd / sqrt(R)``).
    A rate from no replication fires nothing."""
    out: dict[str, list[dict]] = {}
    if summary is None or len(summary) == 0:
        return out
    lo, hi = float(thresholds["min_coverage"]), float(thresholds["max_bias_sd"])
    for row in summary.to_dict("records"):
        cov, bias, sd, cse, bse = (_num(row.get(k)) for k in (
            "coverage", "bias", "sd", "coverage_mc_se", "bias_mc_se"))
        ok_sd = math.isfinite(bias) and math.isfinite(sd) and sd > 0
        ratio = abs(bias) / sd if ok_sd else math.nan
        low_cover = math.isfinite(cov) and cov + MC_MARGIN * (cse if math.isfinite(cse) else 0.0) < lo
        biased = ok_sd and math.isfinite(bse) and abs(bias) - MC_MARGIN * bse > hi * sd
        if low_cover or biased:
            out.setdefault(str(row["variant"]), []).append(
                {"term": str(row["term"]), "coverage": cov, "bias": bias, "sd": sd,
                 "bias_sd": ratio, "low_coverage": bool(low_cover), "biased": bool(biased)})
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
