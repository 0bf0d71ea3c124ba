"""The numbers every document shares, computed once from the audit files.

Each document (HTML, Markdown, LaTeX, referee paragraph) prints these same figures,
so that they can never disagree with each other or with ``estimates.csv``.
"""
from __future__ import annotations

import json
import math
from dataclasses import dataclass
from typing import Any

import numpy as np
import pandas as pd

from ..options import LABELS, Steps, Transform
from .labels import band_arrays, setting_name, value_text
from .inputs import AuditFolder, Rule

# (setting column, value as written in variants.csv) -> words; the option labels
# come from the one label table (robustgmm.options.LABELS)
VALUE_WORDS = {
    **{("transform", m.value): LABELS[m] for m in Transform},
    **{("steps", str(m.value)): LABELS[m] for m in Steps},
    ("time_effects", "True"): "with",
    ("time_effects", "False"): "without",
}

SETTING_PHRASES = {
    "equations": "the equations",
    "transform": "the transform",
    "steps": "the weighting",
    "form": "the instrument form",
    "first_lag": "the first instrument lag",
    "last_lag": "the last instrument lag",
    "time_effects": "time effects",
    "errors": "the standard errors",
    "sample": "the sample",
}


def fmt(x, digits: int = 3) -> str:
    """A number as printed in every document: fixed ``digits`` decimals, small
    non-zero numbers in three significant digits, NaN as 'n/a'."""
    if x is None:
        return "n/a"
    try:
        x = float(x)
    except (TypeError, ValueError):
        return str(x)
    if math.isnan(x):
        return "n/a"
    if math.isinf(x):
        return "inf" if x > 0 else "-inf"
    if x != 0 and abs(x) < 0.5 * 10 ** (-digits):
        return f"{x:.{digits - 1}e}"
    out = f"{x:.{digits}f}"
    return "0." + "0" * digits if out in ("-0." + "0" * digits,) else out


def fmt_p(p) -> str:
    """A p-value: three decimals, '<0.001' below that."""
    try:
        p = float(p)
    except (TypeError, ValueError):
        return "n/a"
    if math.isnan(p):
        return "n/a"
    return "<0.001" if p < 0.001 else f"{p:.3f}"


def fmt_int(x) -> str:
    try:
        x = float(x)
    except (TypeError, ValueError):
        return str(x)
    return "n/a" if math.isnan(x) else f"{int(round(x))}"


def value_word(column: str, value) -> str:
    text = value_text(value)
    return VALUE_WORDS.get((column, text), text)


def setting_phrase(column: str) -> str:
    """'the role of leverage' for a role column; the table above otherwise."""
    if column in SETTING_PHRASES:
        return SETTING_PHRASES[column]
    if "role" in column.lower():
        name = column
        for token in ("roles", "role"):
            name = name.replace(token, "")
        name = name.strip(":_.- []")
        return f"the role of {name}" if name else "the regressor roles"
    return setting_name(column)


@dataclass(frozen=True)
class TermSummary:
    """One focus term. ``n``, ``low`` ... ``n_negative`` describe the *judged*
    variants: the acceptable ones (estimated and passing their specification tests)
    when the audit marks them, else every estimated variant. ``n_ok``, ``ok_low`` and
    ``ok_high`` describe every estimated variant."""

    term: str
    verdict: str
    n: int
    low: float
    high: float
    median: float
    base_estimate: float
    base_std_error: float
    base_p_value: float
    n_significant: int
    n_positive: int
    n_negative: int
    fired: tuple[Rule, ...]
    truth: float | None
    n_ok: int = 0
    ok_low: float = float("nan")
    ok_high: float = float("nan")
    passed: tuple[str, ...] = ()

    @property
    def sign_stable(self) -> bool:
        return self.n_positive == self.n or self.n_negative == self.n

    @property
    def share_significant(self) -> float:
        return self.n_significant / self.n if self.n else float("nan")


@dataclass(frozen=True)
class BandSummary:
    term: str
    fe: float
    ols: float
    n_inside: int
    n: int


@dataclass(frozen=True)
class AuditSummary:
    n_variants: int
    n_ok: int
    n_acceptable: int
    has_acceptable: bool
    n_failed: int
    n_skipped: int
    varied: tuple[tuple[str, tuple[Any, ...]], ...]
    terms: tuple[TermSummary, ...]
    bands: tuple[BandSummary, ...]
    hansen_low: float
    hansen_high: float
    n_hansen_reject: int
    n_hansen_high: int
    n_ar2_reject: int
    n_ar2: int
    instruments_low: float
    instruments_high: float
    units_low: float
    units_high: float
    n_too_many_instruments: int
    alpha: float
    model_flags: tuple[Rule, ...]

    def term(self, label: str) -> TermSummary:
        for t in self.terms:
            if t.term == label:
                return t
        raise KeyError(label)


def _count(mask) -> int:
    return int(np.count_nonzero(np.asarray(mask, bool)))


def summarize(audit: AuditFolder) -> AuditSummary:
    v = audit.variants
    ok = audit.ok_variants
    # what the estimated variants vary (values used only by skipped or failed
    # variants are not part of the evidence)
    varied = tuple((col, tuple(pd.unique(ok[col]))) for col in audit.setting_columns
                   if ok[col].map(value_text).nunique() > 1)
    terms = []
    for tv in audit.term_verdicts:
        every = audit.term_estimates(tv.term)
        frame = every[every["acceptable"]]
        est = frame["estimate"].to_numpy(float)
        p = frame["p_value"].to_numpy(float)
        all_est = every["estimate"].to_numpy(float)
        base = every[every["variant"] == audit.base_variant]
        b = base.iloc[0] if not base.empty else None
        passed = tv.details.get("passed", ())
        terms.append(TermSummary(
            term=tv.term, verdict=tv.verdict, n=len(frame),
            low=float(est.min()) if est.size else float("nan"),
            high=float(est.max()) if est.size else float("nan"),
            median=float(np.median(est)) if est.size else float("nan"),
            base_estimate=float(b["estimate"]) if b is not None else float("nan"),
            base_std_error=float(b["std_error"]) if b is not None else float("nan"),
            base_p_value=float(b["p_value"]) if b is not None else float("nan"),
            n_significant=_count(p < audit.alpha),
            n_positive=_count(est > 0), n_negative=_count(est < 0),
            fired=tv.fired, truth=audit.truth_value(tv.term),
            n_ok=len(every),
            ok_low=float(all_est.min()) if all_est.size else float("nan"),
            ok_high=float(all_est.max()) if all_est.size else float("nan"),
            passed=tuple(str(x) for x in passed) if isinstance(passed, (list, tuple)) else ()))
    bands = []
    for term in audit.ar_terms:
        band = audit.band(term)
        frame = audit.term_estimates(term)
        if band is None or frame.empty:
            continue
        # per-variant bands when bounds.csv has them (each variant's own sample)
        fe, ols = band_arrays(audit, term, frame)
        lo, hi = np.minimum(fe, ols), np.maximum(fe, ols)
        est = frame["estimate"].to_numpy(float)
        n_inside = _count((est >= lo) & (est <= hi))
        bands.append(BandSummary(term, band[0], band[1], n_inside, len(frame)))
    hansen = ok["hansen_p"].to_numpy(float)
    hansen_f = hansen[np.isfinite(hansen)]
    ar2 = ok["ar2_p"].to_numpy(float)
    ar2_f = ar2[np.isfinite(ar2)]
    inst = ok["instruments"].to_numpy(float)
    units = ok["units"].to_numpy(float)
    t = audit.thresholds

    def lohi(a):
        a = a[np.isfinite(a)]
        return (float(a.min()), float(a.max())) if a.size else (float("nan"), float("nan"))

    return AuditSummary(
        n_variants=len(v), n_ok=len(ok), n_acceptable=_count(v["acceptable"]),
        has_acceptable=audit.has_acceptable, n_failed=_count(v["status"] == "failed"),
        n_skipped=_count(v["status"] == "skipped"), varied=varied, terms=tuple(terms),
        bands=tuple(bands),
        hansen_low=lohi(hansen)[0], hansen_high=lohi(hansen)[1],
        n_hansen_reject=_count(hansen_f < t["hansen_reject"]),
        n_hansen_high=_count(hansen_f >= t["hansen_too_high"]),
        n_ar2_reject=_count(ar2_f < t["ar2_reject"]), n_ar2=int(ar2_f.size),
        instruments_low=lohi(inst)[0], instruments_high=lohi(inst)[1],
        units_low=lohi(units)[0], units_high=lohi(units)[1],
        n_too_many_instruments=_count(inst > units * t["instruments_per_unit"]),
        alpha=audit.alpha, model_flags=audit.model_flags)


def varied_text(summary: AuditSummary) -> str:
    """'the equations (difference, system), the transform (first differences, ...)
    and the last instrument lag (2, 3, all)'."""
    parts = [f"{setting_phrase(col)} ({', '.join(value_word(col, x) for x in values)})"
             for col, values in summary.varied]
    if not parts:
        return ""
    if len(parts) == 1:
        return parts[0]
    return ", ".join(parts[:-1]) + " and " + parts[-1]


def rule_figures_text(rule: Rule) -> str:
    """The figures of a fired rule as 'key = value' pairs."""
    items = []
    for key, value in rule.figures.items():
        items.append(f"{key.replace('_', ' ')} = {figure_value(value)}")
    return "; ".join(items)


def figure_value(value, limit: int = 8) -> str:
    """One figure of a rule as text; long lists (e.g. variant ids) are cut at
    ``limit`` items with the total stated."""
    if value is None:
        return "n/a"
    if isinstance(value, bool):
        return "yes" if value else "no"
    if isinstance(value, float):
        return fmt(value)
    if isinstance(value, (list, tuple)):
        items = [figure_value(x, limit) for x in value[:limit]]
        more = f", … ({len(value)} in all)" if len(value) > limit else ""
        return ", ".join(items) + more
    if isinstance(value, dict):
        return "; ".join(f"{k} = {figure_value(v, limit)}" for k, v in value.items())
    return str(value)


def threshold_text(value) -> str:
    if value is None or value == "" or (isinstance(value, float) and math.isnan(value)):
        return "—"
    if isinstance(value, dict):
        return "; ".join(f"{k} = {threshold_text(v)}" for k, v in value.items())
    if isinstance(value, float):
        return f"{value:g}"
    if isinstance(value, bool):
        return str(value).lower()
    return str(value)


# ---------------------------------------------------------------------------
# tables shared by the HTML and Markdown reports

@dataclass(frozen=True)
class Cell:
    text: str
    sort: Any = None  # raw value for sorting (numbers stay numbers)


def variants_table(audit: AuditFolder) -> tuple[list[str], list[tuple[bool, str, list[Cell]]]]:
    """Headers and rows ``(is_base, status, cells)`` of the variants table: id,
    settings, status and reason, counts, test p-values, then each focus term's
    estimate with its standard error."""
    v = audit.variants
    settings = list(audit.setting_columns)
    extra = [c for c in ("acceptable", "flags") if c == "acceptable" and audit.has_acceptable
             or c in v.columns and c != "acceptable"]
    headers = (["variant"] + [setting_name(c) for c in settings]
               + ["status", "reason", "instruments", "units", "observations",
                  "Hansen p", "Sargan p", "AR(1) p", "AR(2) p"]
               + (["diff-in-Hansen (levels) p"] if "diff_hansen_level_p" in v.columns else [])
               + extra + [f"{t} (s.e.)" for t in audit.focus])
    est = audit.estimates.set_index(["variant", "term"])
    rows = []
    for _, r in v.iterrows():
        cells = [Cell(r["variant"] + (" (base)" if r["variant"] == audit.base_variant else ""),
                      r["variant"])]
        cells += [Cell(value_text(r[c]), value_text(r[c])) for c in settings]
        cells += [Cell(r["status"], r["status"]), Cell(r["reason"], r["reason"])]
        cells += [Cell(fmt_int(r[c]), _num(r[c])) for c in ("instruments", "units", "observations")]
        cells += [Cell(fmt_p(r[c]), _num(r[c])) for c in ("hansen_p", "sargan_p", "ar1_p", "ar2_p")]
        if "diff_hansen_level_p" in v.columns:
            cells.append(Cell(fmt_p(r["diff_hansen_level_p"]), _num(r["diff_hansen_level_p"])))
        for c in extra:
            if c == "acceptable":
                text = ("yes" if r[c] else "no") if r["status"] == "ok" else ""
                cells.append(Cell(text, text))
            else:
                text = "" if pd.isna(r[c]) else str(r[c]).replace(";", ", ")
                cells.append(Cell(text, text))
        for term in audit.focus:
            key = (r["variant"], term)
            if key in est.index:
                e = est.loc[key]
                if isinstance(e, pd.DataFrame):
                    e = e.iloc[0]
                cells.append(Cell(f"{fmt(e['estimate'])} ({fmt(e['std_error'])})",
                                  _num(e["estimate"])))
            else:
                cells.append(Cell("", None))
        rows.append((r["variant"] == audit.base_variant, r["status"], cells))
    return headers, rows


def _num(x):
    try:
        x = float(x)
    except (TypeError, ValueError):
        return None
    return None if math.isnan(x) else x


def rule_catalogue(audit: AuditFolder) -> list[Rule]:
    """Every rule the audit applies: the catalogue in verdict.json when it has one,
    else every rule mentioned in it (fired or not), once per id."""
    seen: dict[str, Rule] = {}
    for rule in audit.rule_catalogue:
        seen.setdefault(rule.id, rule)
    for tv in audit.term_verdicts:
        for rule in tv.rules:
            if rule.id not in seen or (not seen[rule.id].source and rule.source):
                seen[rule.id] = rule
    for rule in audit.model_flags:
        if rule.id not in seen or (not seen[rule.id].source and rule.source):
            seen[rule.id] = rule
    return list(seen.values())


def provenance_items(manifest, prefix: str = "") -> list[tuple[str, str]]:
    """The manifest flattened to ``(dotted key, text)`` pairs, in file order."""
    out: list[tuple[str, str]] = []
    if isinstance(manifest, dict):
        for key, value in manifest.items():
            name = f"{prefix}{key}"
            if isinstance(value, dict) and value:
                out.extend(provenance_items(value, name + "."))
            elif isinstance(value, float):
                out.append((name, f"{value:g}"))
            elif isinstance(value, (list, tuple)):
                out.append((name, ", ".join(str(x) for x in value) if all(
                    not isinstance(x, (dict, list)) for x in value) else
                    json.dumps(value)))
            else:
                out.append((name, "" if value is None else str(value)))
    return out
