"""Per-term evaluation: the base-anchored rules, the reason sentence, the drivers and the influence figures."""
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
from .rules import BASE_ANCHORED, FRAGILE, INCONCLUSIVE, MIN_ACCEPTABLE, ROBUST, _fired, value_text
from .context import _Context
from .dropping import evaluate_term as few_units_flip, flip_phrase, unit_noun


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
    # variants whose lag structure or controls leave the term out do not estimate it:
    # they are not counted for it (neither for nor against)
    figures["without_term"] = int(len(c.judged_ids - set(by_id.index)))
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

    # -- dropping a few units (the base model, and the variants analysed)
    firing, outcome, dropping = few_units_flip(term, base, c)
    if dropping:
        figures["dropping"] = dropping
    if firing is not None:
        fired.append(firing)
    elif outcome == "passed":
        passed.append("few_units_flip")
    else:
        not_evaluated.append("few_units_flip")

    drivers = _drivers(acc, sig, c) if len(acc) >= MIN_ACCEPTABLE else ()
    influence = _influence(b, se) if len(b) >= MIN_ACCEPTABLE else None
    if any(f.effect == Effect.INCONCLUSIVE for f in fired):
        verdict = Verdict.INCONCLUSIVE
    elif any(f.effect == Effect.FRAGILE for f in fired):
        verdict = Verdict.FRAGILE
    else:
        verdict = Verdict.ROBUST
    reason = _reason(term, verdict, base, figures, fired, c)
    if figures["without_term"]:
        k = figures["without_term"]
        reason += (f" (counted over the variants that estimate the term; {k} acceptable "
                   f"variant{'s' if k != 1 else ''} leave{'s' if k == 1 else ''} it out)")
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
    if "few_units_flip" in ids and ids["few_units_flip"].effect == Effect.FRAGILE:
        f = ids["few_units_flip"].figures
        # the term is not named: the reason belongs to it, and user text stays out
        parts.append(flip_phrase(f, None, unit_noun(c.spec)) + " in the base model")
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
