"""Fragility rules and verdicts: is each focus term's conclusion robust or fragile?

Every rule has an id, a plain description, its source, the threshold it uses (a
field of :class:`robustgmm.spec.Thresholds`, ``[audit.thresholds]`` in the model
file, or the audit's ``alpha``) and its effect. The catalogue :data:`RULES` is
written into ``verdict.json`` so that a reader sees exactly what was applied.

Variant diagnostics (checked for every ``ok`` variant):

* ``hansen_rejects`` — Hansen J p-value < ``hansen_reject`` (0.05): the
  overidentifying restrictions are rejected (Hansen 1982; Arellano & Bond 1991).
  The variant is **not acceptable**.
* ``ar2_rejects`` — Arellano–Bond AR(2) p-value < ``ar2_reject`` (0.05): second-order
  serial correlation in the differenced residuals, so the levels dated ``t-2`` are
  not valid instruments (Arellano & Bond 1991; common practice). **Not acceptable.**
* ``difference_hansen_level_rejects`` — the difference-in-Hansen test of the
  level-equation instruments of system GMM, p < ``difference_hansen_reject`` (0.05):
  the extra moment conditions of system GMM are rejected (Blundell & Bond 1998;
  Roodman 2009). **Not acceptable.**
* ``hansen_p_high`` — Hansen p ≥ ``hansen_too_high`` (0.25): with many instruments
  the test loses power and a comfortable p-value is no reassurance (Roodman 2009;
  the 0.25 line is common practice). Caution.
* ``hansen_p_near_one`` — Hansen p ≥ 0.99 (:data:`HANSEN_NEAR_ONE`): the telltale
  sign of instrument proliferation (Roodman 2009). Caution (red flag).
* ``instruments_exceed_units`` — instruments per unit > ``instruments_per_unit``
  (1.0): too many instruments overfit the endogenous variables and weaken the
  Hansen test (common practice; Roodman 2009). Caution.

A variant is *acceptable* when it estimated (status ``ok``) and none of the three
rejection rules fired (a missing test does not fire).

Term rules (for each focus term, over the acceptable variants):

* ``sign_change`` — the estimate is positive in some acceptable variants and
  negative in others (the specification-curve view of Simonsohn, Simmons & Nelson
  2020). **Fragile.**
* ``significance_flip`` — the share of acceptable variants that reach the base
  model's conclusion about significance at ``alpha`` (significant with the base's
  sign when the base is significant, not significant when it is not) is below
  ``significant_share`` (0.9; a robustgmm default, not a published number). **Fragile.**
* ``spread`` — some acceptable variant lies more than ``spread_in_se`` (2) base
  standard errors from the base estimate (a robustgmm default). Caution: the size of
  the effect depends on the specification even if its sign and significance hold.
* ``ar_outside_band`` — for an autoregressive term: the base estimate lies outside
  the [within, pooled OLS] band of its own sample (Bond, Hoeffler & Temple 2001;
  Bond 2002). Caution: a GMM estimate below the within estimate suggests weak
  instruments (difference GMM with persistent series; Blundell & Bond 1998), one
  above OLS suggests invalid ones.
* ``base_not_ok`` — the base model could not be estimated. **Inconclusive.**
* ``base_not_acceptable`` — the base model fails its own specification tests
  (a rejection rule above). **Inconclusive.**
* ``too_few_acceptable`` — fewer than :data:`MIN_ACCEPTABLE` (2) acceptable variants
  with an estimate of the term. **Inconclusive.**

How rules combine into a verdict (the same order is applied to every term):

1. **fragile** if ``sign_change`` or ``significance_flip`` fires (the qualitative
   conclusion changes among diagnostically acceptable variants; needs at least
   :data:`MIN_ACCEPTABLE` of them);
2. otherwise **inconclusive** if ``base_not_ok``, ``base_not_acceptable`` or
   ``too_few_acceptable`` fires (there is not enough acceptable evidence to call the
   conclusion robust);
3. otherwise **robust**. Caution rules never change the verdict; they are listed
   with their figures beside it.

Model-level flags summarise the variant diagnostics (how many variants, which ones,
the base model's value) and the failed variants. None of this is proof that the
instruments are valid: that rests on economic reasoning about the model.
"""
from __future__ import annotations

import math
from dataclasses import asdict, dataclass
from typing import Mapping

import numpy as np
import pandas as pd

from ..options import LEVEL_GROUP  # noqa: F401  (read here, written by the core)
from ..spec import Spec, Thresholds

#: Hansen p-values at or above this count as "p ≈ 1" (Roodman 2009 calls a p-value
#: of 1.000 a telltale sign of too many instruments; 0.99 catches values that round
#: to 1.00 in a table).
HANSEN_NEAR_ONE = 0.99
#: Fewest acceptable variants needed to call a conclusion robust or fragile.
MIN_ACCEPTABLE = 2

FRAGILE, ROBUST, INCONCLUSIVE = "fragile", "robust", "inconclusive"
EFFECT_FRAGILE, EFFECT_INCONCLUSIVE, EFFECT_CAUTION, EFFECT_EXCLUDE = (
    "fragile", "inconclusive", "caution", "variant not acceptable")


@dataclass(frozen=True)
class Rule:
    id: str
    level: str            # "variant" or "term"
    description: str
    source: str
    threshold: str | None  # name of the setting that holds the threshold
    effect: str


RULES: tuple[Rule, ...] = (
    Rule("hansen_rejects", "variant",
         "Hansen J test rejects the overidentifying restrictions (p below the threshold)",
         "Hansen (1982); Arellano & Bond (1991)", "hansen_reject", EFFECT_EXCLUDE),
    Rule("ar2_rejects", "variant",
         "Arellano-Bond AR(2) test rejects no second-order serial correlation in the "
         "differenced residuals, so lag-2 levels are not valid instruments",
         "Arellano & Bond (1991); common practice", "ar2_reject", EFFECT_EXCLUDE),
    Rule("difference_hansen_level_rejects", "variant",
         "difference-in-Hansen test rejects the level-equation instruments of system GMM",
         "Blundell & Bond (1998); Roodman (2009)", "difference_hansen_reject", EFFECT_EXCLUDE),
    Rule("hansen_p_high", "variant",
         "Hansen p-value at or above the warning line: with many instruments the test is "
         "weak and a high p-value is no reassurance",
         "Roodman (2009); the 0.25 line is common practice", "hansen_too_high", EFFECT_CAUTION),
    Rule("hansen_p_near_one", "variant",
         "Hansen p-value of about 1, the telltale sign of too many instruments",
         "Roodman (2009)", "hansen_near_one", EFFECT_CAUTION),
    Rule("instruments_exceed_units", "variant",
         "more instruments per unit than the threshold",
         "common practice; Roodman (2009)", "instruments_per_unit", EFFECT_CAUTION),
    Rule("sign_change", "term",
         "the estimate is positive in some acceptable variants and negative in others",
         "Simonsohn, Simmons & Nelson (2020), specification curve", None, EFFECT_FRAGILE),
    Rule("significance_flip", "term",
         "too few acceptable variants reach the base model's conclusion about "
         "significance at alpha (same sign and significant, or not significant)",
         "robustgmm default threshold; the idea follows Simonsohn, Simmons & Nelson (2020)",
         "significant_share", EFFECT_FRAGILE),
    Rule("spread", "term",
         "some acceptable variant lies more than the threshold number of base-model "
         "standard errors from the base estimate",
         "robustgmm default threshold", "spread_in_se", EFFECT_CAUTION),
    Rule("ar_outside_band", "term",
         "the base model's autoregressive coefficient lies outside the band between the "
         "within (fixed-effects) and pooled OLS estimates on its sample",
         "Bond, Hoeffler & Temple (2001); Bond (2002)", None, EFFECT_CAUTION),
    Rule("base_not_ok", "term", "the base model could not be estimated",
         "robustgmm", None, EFFECT_INCONCLUSIVE),
    Rule("base_not_acceptable", "term",
         "the base model fails its own specification tests (Hansen, AR(2) or "
         "difference-in-Hansen of the level equation)",
         "Arellano & Bond (1991); Blundell & Bond (1998)", None, EFFECT_INCONCLUSIVE),
    Rule("too_few_acceptable", "term",
         f"fewer than {MIN_ACCEPTABLE} acceptable variants estimate the term",
         "robustgmm", "min_acceptable", EFFECT_INCONCLUSIVE),
)
RULE_BY_ID = {r.id: r for r in RULES}

COMBINATION = (
    "fragile if sign_change or significance_flip fires among the diagnostically "
    "acceptable variants; otherwise inconclusive if base_not_ok, base_not_acceptable "
    "or too_few_acceptable fires; otherwise robust. Caution rules are reported beside "
    "the verdict and never change it. A variant is acceptable when it estimated and "
    "neither hansen_rejects, ar2_rejects nor difference_hansen_level_rejects fired.")

DISCLAIMER = ("Statistical robustness across specifications is not proof that the "
              "instruments are valid; validity rests on economic reasoning about the model.")


def threshold_values(spec: Spec) -> dict[str, float]:
    t: Thresholds = spec.thresholds
    out = {k: float(v) for k, v in asdict(t).items()}
    out["hansen_near_one"] = HANSEN_NEAR_ONE
    out["min_acceptable"] = MIN_ACCEPTABLE
    out["alpha"] = float(spec.alpha)
    return out


def _fired(rule_id: str, thresholds: Mapping[str, float], figures: dict) -> dict:
    rule = RULE_BY_ID[rule_id]
    return {"id": rule.id, "description": rule.description, "source": rule.source,
            "threshold": thresholds.get(rule.threshold) if rule.threshold else None,
            "threshold_name": rule.threshold, "effect": rule.effect,
            "figures": _clean(figures)}


def _clean(obj):
    """Plain JSON values: numpy scalars to Python, NaN to None."""
    if isinstance(obj, dict):
        return {k: _clean(v) for k, v in obj.items()}
    if isinstance(obj, (list, tuple)):
        return [_clean(v) for v in obj]
    if isinstance(obj, (bool, np.bool_)):
        return bool(obj)
    if isinstance(obj, (int, np.integer)):
        return int(obj)
    if isinstance(obj, (float, np.floating)):
        x = float(obj)
        return x if math.isfinite(x) else None
    return obj


# ---------------------------------------------------------------------------
# variant diagnostics
# ---------------------------------------------------------------------------
def variant_flags(variants: pd.DataFrame, thresholds: Mapping[str, float]) -> pd.DataFrame:
    """One boolean column per variant rule (False where the test is missing) and
    ``acceptable``; rows follow ``variants``.

    Needs the columns ``status``, ``hansen_p``, ``ar2_p``, ``diff_hansen_level_p``,
    ``instruments``, ``units``.
    """
    ok = variants["status"].eq("ok").to_numpy()

    def col(name):
        if name not in variants:
            return np.full(len(variants), np.nan)
        return pd.to_numeric(variants[name], errors="coerce").to_numpy(dtype=float)

    hansen, ar2, dh = col("hansen_p"), col("ar2_p"), col("diff_hansen_level_p")
    instr, units = col("instruments"), col("units")
    with np.errstate(invalid="ignore", divide="ignore"):
        per_unit = np.where(units > 0, instr / units, np.nan)
        flags = pd.DataFrame({
            "hansen_rejects": ok & (hansen < thresholds["hansen_reject"]),
            "ar2_rejects": ok & (ar2 < thresholds["ar2_reject"]),
            "difference_hansen_level_rejects": ok & (dh < thresholds["difference_hansen_reject"]),
            "hansen_p_high": ok & (hansen >= thresholds["hansen_too_high"]),
            "hansen_p_near_one": ok & (hansen >= thresholds["hansen_near_one"]),
            "instruments_exceed_units": ok & (per_unit > thresholds["instruments_per_unit"]),
        }, index=variants.index)
    rejected = (flags["hansen_rejects"] | flags["ar2_rejects"]
                | flags["difference_hansen_level_rejects"])
    flags["acceptable"] = ok & ~rejected.to_numpy()
    return flags


def _flag_list(flags: pd.DataFrame, variants: pd.DataFrame) -> pd.Series:
    names = [r.id for r in RULES if r.level == "variant"]
    return flags[names].apply(lambda row: ";".join(n for n in names if row[n]), axis=1)


# ---------------------------------------------------------------------------
# the verdict
# ---------------------------------------------------------------------------
def judge(spec: Spec, variants: pd.DataFrame, estimates: pd.DataFrame,
          bounds: pd.DataFrame | None = None) -> dict:
    """The verdict document (``verdict.json``).

    ``variants``: one row per variant (``variant``, ``is_base``, ``status``,
    ``reason`` and the diagnostics columns of :func:`variant_flags`);
    ``estimates``: ``variant``, ``term``, ``estimate``, ``std_error``, ``p_value``;
    ``bounds``: ``variant``, ``term``, ``ols``, ``fe`` (for the AR band rule).
    """
    th = threshold_values(spec)
    alpha = float(spec.alpha)
    flags = variant_flags(variants, th)
    ids = variants["variant"].astype(str).to_numpy()
    is_base = variants["is_base"].astype(bool).to_numpy()
    base_id = str(ids[is_base][0]) if is_base.any() else None
    base_pos = int(np.flatnonzero(is_base)[0]) if is_base.any() else None
    base_ok = base_pos is not None and variants["status"].iloc[base_pos] == "ok"
    base_acceptable = base_ok and bool(flags["acceptable"].iloc[base_pos])
    acceptable_ids = set(ids[flags["acceptable"].to_numpy()])
    ok_ids = set(ids[variants["status"].eq("ok").to_numpy()])

    terms_out = {}
    for term in spec.focus_terms():
        terms_out[term] = _judge_term(term, spec, estimates, bounds, base_id, base_ok,
                                      base_acceptable, acceptable_ids, ok_ids, alpha, th,
                                      variants, base_pos)
    model = _model_flags(variants, flags, th, base_pos, ids)
    counts = variants["status"].value_counts().to_dict()
    return _clean({
        "alpha": alpha,
        "base_variant": base_id,
        "thresholds": th,
        "combination": COMBINATION,
        "disclaimer": DISCLAIMER,
        "variants": {"total": int(len(variants)), "ok": int(counts.get("ok", 0)),
                     "failed": int(counts.get("failed", 0)),
                     "skipped": int(counts.get("skipped", 0)),
                     "acceptable": int(len(acceptable_ids))},
        "terms": terms_out,
        "model": model,
        "rules": [asdict(r) | {"threshold_value": th.get(r.threshold) if r.threshold else None}
                  for r in RULES],
    })


def _judge_term(term, spec, estimates, bounds, base_id, base_ok, base_acceptable,
                acceptable_ids, ok_ids, alpha, th, variants, base_pos) -> dict:
    est = estimates[estimates["term"] == term]
    est = est[est["variant"].astype(str).isin(ok_ids)]
    est = est[np.isfinite(pd.to_numeric(est["estimate"], errors="coerce"))]
    by_id = est.set_index(est["variant"].astype(str))
    fired: list[dict] = []
    passed: list[str] = []
    base = None
    if base_ok and base_id in by_id.index:
        row = by_id.loc[base_id]
        base = {"estimate": float(row["estimate"]), "std_error": float(row["std_error"]),
                "p_value": float(row["p_value"]),
                "significant": bool(float(row["p_value"]) < alpha)}
    acc = by_id[by_id.index.isin(acceptable_ids)]
    b = acc["estimate"].to_numpy(dtype=float)
    p = acc["p_value"].to_numpy(dtype=float)
    figures = {"variants_ok": int(len(by_id)), "variants_acceptable": int(len(acc)),
               "min": float(b.min()) if len(b) else None,
               "max": float(b.max()) if len(b) else None,
               "median": float(np.median(b)) if len(b) else None}

    # -- inconclusive conditions
    if base is None:
        reason = (variants["reason"].iloc[base_pos] if base_pos is not None else "no base")
        fired.append(_fired("base_not_ok", th, {"reason": reason}))
    else:
        passed.append("base_not_ok")
        if not base_acceptable:
            row = variants.iloc[base_pos]
            fired.append(_fired("base_not_acceptable", th, {
                "hansen_p": row.get("hansen_p"), "ar2_p": row.get("ar2_p"),
                "diff_hansen_level_p": row.get("diff_hansen_level_p")}))
        else:
            passed.append("base_not_acceptable")
    enough = len(acc) >= MIN_ACCEPTABLE
    if not enough:
        fired.append(_fired("too_few_acceptable", th, {"acceptable": int(len(acc)),
                                                       "ok": int(len(by_id))}))
    else:
        passed.append("too_few_acceptable")

    # -- fragility over the acceptable variants
    if enough:
        pos, neg = int((b > 0).sum()), int((b < 0).sum())
        sig = np.isfinite(p) & (p < alpha)
        fig = {"positive": pos, "negative": neg,
               "significant_positive": int((sig & (b > 0)).sum()),
               "significant_negative": int((sig & (b < 0)).sum()),
               "min": float(b.min()), "max": float(b.max())}
        figures.update(share_positive=pos / len(b))
        (fired.append(_fired("sign_change", th, fig)) if pos and neg else passed.append("sign_change"))
        share_sig = float(sig.mean())
        figures["share_significant"] = share_sig
        if base is not None:
            if base["significant"]:
                agree = sig & (np.sign(b) == np.sign(base["estimate"]))
            else:
                agree = ~sig
            share_agree = float(agree.mean())
            figures["share_agreeing_with_base"] = share_agree
            fig = {"base_significant": base["significant"], "share_significant": share_sig,
                   "share_agreeing": share_agree, "acceptable": int(len(b)),
                   "alpha": alpha}
            if share_agree < th["significant_share"]:
                fired.append(_fired("significance_flip", th, fig))
            else:
                passed.append("significance_flip")

    # -- cautions
    if base is not None and len(b):
        se = base["std_error"]
        if se > 0 and np.isfinite(se):
            dev = np.abs(b - base["estimate"]) / se
            worst = int(np.argmax(dev))
            fig = {"max_distance_in_se": float(dev[worst]), "variant": str(acc.index[worst]),
                   "estimate": float(b[worst]), "base_estimate": base["estimate"],
                   "base_std_error": se}
            figures["max_distance_in_base_se"] = float(dev[worst])
            (fired.append(_fired("spread", th, fig)) if dev[worst] > th["spread_in_se"]
             else passed.append("spread"))
    if term in spec.ar_terms() and base is not None and bounds is not None and len(bounds):
        rows = bounds[(bounds["variant"].astype(str) == base_id) & (bounds["term"] == term)]
        if len(rows) and np.isfinite(rows[["ols", "fe"]].to_numpy(dtype=float)).all():
            ols, fe = float(rows["ols"].iloc[0]), float(rows["fe"].iloc[0])
            lo, hi = min(ols, fe), max(ols, fe)
            inside = lo <= base["estimate"] <= hi
            outside_share = _share_outside(bounds, term, acc)
            fig = {"base_estimate": base["estimate"], "ols": ols, "fe": fe,
                   "position": "inside" if inside else ("below" if base["estimate"] < lo else "above"),
                   "share_acceptable_outside": outside_share}
            figures["base_in_band"] = inside
            (passed.append("ar_outside_band") if inside
             else fired.append(_fired("ar_outside_band", th, fig)))

    if any(f["effect"] == EFFECT_FRAGILE for f in fired):
        verdict = FRAGILE
    elif any(f["effect"] == EFFECT_INCONCLUSIVE for f in fired):
        verdict = INCONCLUSIVE
    else:
        verdict = ROBUST
    return {"verdict": verdict, "summary": _summary(term, verdict, base, figures, fired),
            "base": base, "figures": figures, "rules": fired, "passed": passed}


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


def _summary(term, verdict, base, figures, fired) -> str:
    n = figures["variants_acceptable"]
    if base is None:
        return f"{term}: inconclusive — the base model could not be estimated."
    sig = "significant" if base["significant"] else "not significant"
    text = (f"{term}: base estimate {base['estimate']:.4g} (SE {base['std_error']:.3g}, "
            f"{sig}); {n} acceptable variant{'s' if n != 1 else ''}")
    if figures.get("min") is not None and n:
        text += f", estimates from {figures['min']:.4g} to {figures['max']:.4g}"
    ids = [f["id"] for f in fired]
    text += f" — {verdict}"
    if ids:
        text += " (" + ", ".join(ids) + ")"
    return text + "."


def _model_flags(variants, flags, th, base_pos, ids) -> list[dict]:
    out = []
    ok = variants["status"].eq("ok").to_numpy()
    n_ok = int(ok.sum())
    value_col = {"hansen_rejects": "hansen_p", "ar2_rejects": "ar2_p",
                 "difference_hansen_level_rejects": "diff_hansen_level_p",
                 "hansen_p_high": "hansen_p", "hansen_p_near_one": "hansen_p",
                 "instruments_exceed_units": "instruments_per_unit"}
    for rule in RULES:
        if rule.level != "variant":
            continue
        hit = flags[rule.id].to_numpy()
        if not hit.any():
            continue
        col = value_col[rule.id]
        vals = pd.to_numeric(variants[col], errors="coerce") if col in variants else None
        fig = {"variants": int(hit.sum()), "of_ok": n_ok, "share": hit.sum() / n_ok if n_ok else None,
               "ids": [str(i) for i in ids[hit]],
               "base": bool(hit[base_pos]) if base_pos is not None else None}
        if vals is not None:
            fig["base_value"] = vals.iloc[base_pos] if base_pos is not None else None
            fig["range"] = [vals[hit].min(), vals[hit].max()]
        out.append(_fired(rule.id, th, fig))
    failed = variants["status"].eq("failed").to_numpy()
    if failed.any():
        out.append({"id": "variants_failed", "description": "variants that could not be estimated",
                    "source": "robustgmm", "threshold": None, "threshold_name": None,
                    "effect": "information",
                    "figures": _clean({"variants": int(failed.sum()),
                                       "ids": [str(i) for i in ids[failed]],
                                       "reasons": sorted(set(variants["reason"][failed].astype(str)))})})
    return out


def variant_columns(variants: pd.DataFrame, spec: Spec) -> pd.DataFrame:
    """``acceptable`` and ``flags`` (';'-joined variant rules that fired) per variant."""
    flags = variant_flags(variants, threshold_values(spec))
    return pd.DataFrame({"acceptable": flags["acceptable"].astype(bool),
                         "flags": _flag_list(flags, variants)}, index=variants.index)
