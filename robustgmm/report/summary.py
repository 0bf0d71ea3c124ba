"""The numbers every document shares, computed once from the audit files.

Each document (HTML, Markdown, LaTeX, referee paragraph) prints these same figures,
so that they can never disagree with each other or with ``estimates.csv``.
"""
from __future__ import annotations

import json
import math
from dataclasses import dataclass, field
from typing import Any, Mapping

import numpy as np
import pandas as pd

from ..options import LABELS, Steps, Transform
from .labels import band_arrays, setting_name, term_labels, value_text
from ..audit.verdicts import Driver, Firing, Influence, TermVerdict
from ..audit.verdicts import Rule as CatalogueRule
from ..options import Effect
from .inputs import AuditFolder

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
    "outcome_lags": "the lags of the outcome",
    "drop": "the regressors left out",
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
    if column.startswith("lags:"):
        return f"the lags of {column[5:]}"
    if column.startswith("instrument_lags:"):
        return f"the instrument window of {column[len('instrument_lags:'):]}"
    if "role" in column.lower():
        name = column
        for token in ("roles", "role"):
            name = name.replace(token, "")
        name = name.strip(":_.- []")
        return f"the role of {name}" if name else "the regressor roles"
    return setting_name(column)


@dataclass(frozen=True)
class TermSummary:
    """One focus term, as the verdict module judged it (verdict.json). ``n``, ``low``
    ... ``n_negative`` describe the *judged* variants (acceptable, not duplicates;
    plus the untestable ones with ``count_untestable``); ``n_ok``, ``ok_low`` and
    ``ok_high`` every estimated variant. Nothing here is recomputed."""

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
    fired: tuple[Firing, ...]
    truth: float | None
    n_ok: int = 0
    ok_low: float = float("nan")
    ok_high: float = float("nan")
    passed: tuple[str, ...] = ()
    reason: str = ""
    n_untestable: int = 0
    n_duplicates: int = 0
    n_insignificant_opposite: int = 0
    uninformative: tuple[str, ...] = ()
    drivers: tuple[Driver, ...] = ()
    key_driver: Mapping[str, Any] | None = None
    influence: Influence | None = None
    not_evaluated: tuple[str, ...] = ()
    #: the model file's ``[labels]`` text for the term ("" when it has none)
    label: str = ""

    @property
    def named(self) -> str:
        """How running text names the term: 'Leverage (x[t])', or the term itself."""
        return f"{self.label} ({self.term})" if self.label else self.term

    @property
    def sign_stable(self) -> bool:
        return self.n_positive == self.n or self.n_negative == self.n

    @property
    def share_significant(self) -> float:
        return self.n_significant / self.n if self.n else float("nan")

    @property
    def decisive(self) -> tuple[Firing, ...]:
        return tuple(r for r in self.fired if r.effect in (Effect.FRAGILE, Effect.INCONCLUSIVE))

    @property
    def cautions(self) -> tuple[Firing, ...]:
        return tuple(r for r in self.fired if r.effect == Effect.CAUTION)


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
    model_flags: tuple[Firing, ...]
    n_untestable: int = 0
    n_rejected: int = 0
    n_duplicates: int = 0
    n_judged: int = 0
    count_untestable: bool = False
    base_acceptable: bool = True
    base_statement: str = ""
    closest: Mapping[str, Any] | None = None
    thresholds: Mapping[str, Any] = field(default_factory=dict)
    rule_counts: Mapping[str, int] = field(default_factory=dict)
    #: the model file's ``[labels]`` (term -> text)
    labels: Mapping[str, str] = field(default_factory=dict)

    def named(self, term: str) -> str:
        """'Leverage (x[t])' for a labelled term, else the term itself."""
        text = self.labels.get(term)
        return f"{text} ({term})" if text else term

    def term(self, label: str) -> TermSummary:
        for t in self.terms:
            if t.term == label:
                return t
        raise KeyError(label)


def _count(mask) -> int:
    return int(np.count_nonzero(np.asarray(mask, bool)))


def _f(x) -> float:
    return float("nan") if x is None else float(x)


def _term_summary(tv: TermVerdict, audit: AuditFolder) -> TermSummary:
    f = tv.figures
    b = tv.base
    return TermSummary(
        term=tv.term, verdict=str(tv.verdict), n=int(f.get("judged", 0)),
        low=_f(f.get("min")), high=_f(f.get("max")), median=_f(f.get("median")),
        base_estimate=b.estimate if b else float("nan"),
        base_std_error=b.std_error if b else float("nan"),
        base_p_value=b.p_value if b else float("nan"),
        n_significant=int(f.get("significant", 0)), n_positive=int(f.get("positive", 0)),
        n_negative=int(f.get("negative", 0)), fired=tv.rules,
        truth=audit.truth_value(tv.term), n_ok=int(f.get("variants_ok", 0)),
        ok_low=_f(f.get("ok_min")), ok_high=_f(f.get("ok_max")), passed=tv.passed,
        reason=tv.reason, n_untestable=int(f.get("untestable", 0)),
        n_duplicates=int(f.get("duplicates", 0)),
        n_insignificant_opposite=int(f.get("insignificant_opposite", 0)),
        uninformative=tuple(f.get("uninformative_ids") or ()), drivers=tv.drivers,
        key_driver=tv.key_driver, influence=tv.influence, not_evaluated=tv.not_evaluated,
        label=term_labels(audit).get(tv.term, ""))


def summarize(audit: AuditFolder) -> AuditSummary:
    """The shared numbers: every count that depends on a rule or threshold comes from
    verdict.json (the verdict module evaluated it once); only plain facts (ranges,
    which settings vary, the within-OLS band) are read from the CSV files."""
    v = audit.variants
    ok = audit.ok_variants
    verdict = audit.verdict
    counts = verdict.variants
    diag = verdict.diagnostics
    rule_counts = dict(diag.get("rule_counts") or {})
    # what the estimated variants vary (values used only by skipped or failed
    # variants are not part of the evidence)
    varied = tuple((col, tuple(pd.unique(ok[col]))) for col in audit.setting_columns
                   if ok[col].map(value_text).nunique() > 1)
    terms = tuple(_term_summary(tv, audit) for tv in audit.term_verdicts)
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

    def rng(key):
        d = diag.get(key) or {}
        return _f(d.get("min")), _f(d.get("max")), int(d.get("available", 0))

    hansen, ar2, inst, units = rng("hansen_p"), rng("ar2_p"), rng("instruments"), rng("units")
    return AuditSummary(
        n_variants=int(counts.get("total", len(v))), n_ok=int(counts.get("ok", len(ok))),
        n_acceptable=int(counts.get("acceptable", 0)), has_acceptable=True,
        n_failed=int(counts.get("failed", 0)), n_skipped=int(counts.get("skipped", 0)),
        varied=varied, terms=terms, bands=tuple(bands),
        hansen_low=hansen[0], hansen_high=hansen[1],
        n_hansen_reject=int(rule_counts.get("hansen_rejects", 0)),
        n_hansen_high=int(rule_counts.get("hansen_p_high", 0)),
        n_ar2_reject=int(rule_counts.get("ar2_rejects", 0)), n_ar2=ar2[2],
        instruments_low=inst[0], instruments_high=inst[1],
        units_low=units[0], units_high=units[1],
        n_too_many_instruments=int(rule_counts.get("instruments_exceed_units", 0)),
        alpha=verdict.alpha, model_flags=verdict.model,
        n_untestable=int(counts.get("untestable", 0)), n_rejected=int(counts.get("rejected", 0)),
        n_duplicates=int(counts.get("duplicates", 0)), n_judged=int(counts.get("judged", 0)),
        count_untestable=bool(counts.get("count_untestable", False)),
        base_acceptable=verdict.base_acceptable, base_statement=verdict.base_statement,
        closest=verdict.closest_acceptable, thresholds=dict(verdict.thresholds),
        rule_counts=rule_counts, labels=term_labels(audit))


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


def rule_figures_text(rule: Firing) -> str:
    """The figures of a fired rule as 'key = value' pairs."""
    items = []
    for key, value in rule.figures.items():
        items.append(f"{key.replace('_', ' ')} = {figure_value(value)}")
    return "; ".join(items)


#: Records of a mapping shown in a rule's figures (e.g. the simulated figures of each
#: unreliable variant): each is a line's worth of numbers, so fewer than the ids of a list.
RECORDS_SHOWN = 3


def _is_record(value) -> bool:
    return isinstance(value, dict) or (isinstance(value, (list, tuple)) and bool(value)
                                        and all(isinstance(v, dict) for v in value))


def figure_value(value, limit: int = 8) -> str:
    """One figure of a rule as text; long lists (e.g. variant ids) are cut at ``limit``
    items and mappings of records (e.g. the simulated figures of each unreliable
    variant) at :data:`RECORDS_SHOWN`, with the total stated (verdict.json keeps them
    all); a nested record is put in parentheses so that its 'key = value' pairs do not
    run into the next one."""
    if value is None:
        return "n/a"
    if isinstance(value, bool):
        return "yes" if value else "no"
    if isinstance(value, float):
        return fmt(value)
    if isinstance(value, (list, tuple)):
        if not value:  # "uninformative ids = " with nothing after it reads as a cut
            return "none"
        items = [_nested(x, limit) for x in value[:limit]]
        more = f", … ({len(value)} in all)" if len(value) > limit else ""
        return ", ".join(items) + more
    if isinstance(value, dict):
        shown = RECORDS_SHOWN if any(_is_record(v) for v in value.values()) else limit
        items = [f"{k} = {_nested(v, limit)}" for k, v in list(value.items())[:shown]]
        more = f"; … ({len(value)} in all)" if len(value) > shown else ""
        return "; ".join(items) + more
    return str(value)


def _nested(value, limit: int) -> str:
    text = figure_value(value, limit)
    return f"({text})" if isinstance(value, dict) else text


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


#: The instrument-strength columns of variants.csv the report's tables show:
#: (column, header, how a value is written). What each one is, with its source,
#: is :func:`strength_note`.
STRENGTH_COLUMNS = (
    ("underid_p", "underid. p (KP), all instruments", fmt_p),
    ("underid_p_transformed", "underid. p (KP), transformed eq.", fmt_p),
    ("underid_p_level", "underid. p (KP), level eq.", fmt_p),
    ("rk_f", "KP rk Wald F", lambda x: fmt(x, 2)),
    ("weak_f_min", "min. cond. F (SW)", lambda x: fmt(x, 2)),
    ("weak_f_term", "term of min. F", None),
)


def strength_columns(variants: pd.DataFrame) -> list[tuple[str, str, Any]]:
    """The :data:`STRENGTH_COLUMNS` present in ``variants`` with a value in some row
    (the level equation's test exists only in system GMM)."""
    return [c for c in STRENGTH_COLUMNS
            if c[0] in variants.columns and variants[c[0]].notna().any()]


def strength_note(thresholds: Mapping[str, Any]) -> str:
    """What the instrument-strength columns are, their sources, and what they cannot
    say: the caption of every table that shows them (one text for all documents)."""
    weak_f = thresholds.get("weak_f")
    line = f"{weak_f:g}" if isinstance(weak_f, (int, float)) else "the weak_f threshold"
    return (
        "underid. p (KP): p-value of the Kleibergen & Paap (2006) rank test (LM form, "
        "unit-clustered) of the null that the instruments do not identify the "
        "coefficients (underidentification); a small p rejects it. It is computed for "
        "all instruments and, in system GMM, for the transformed- and level-equation "
        "instruments separately; a variant whose test on all instruments does not reject "
        "at alpha is not acceptable (rule underidentified). n/a where the chi-squared "
        "approximation is not valid (too many instruments for the units, or a singular "
        "covariance; the reason is in unavailable_tests of variants.csv). KP rk Wald F: "
        "the Wald form divided by its degrees of freedom, a measure of strength without "
        "critical values here. min. cond. F (SW): the smallest Sanderson & Windmeijer "
        "(2016) conditional first-stage F over the lagged outcome and the endogenous or "
        "predetermined terms (which term: the next column), computed with the "
        "cluster-robust weight (our extension of their homoskedastic statistic). No "
        "single critical value for weak-instrument size distortion applies to GMM with "
        "many instruments and clustered errors (the Stock & Yogo tables assume "
        "homoskedastic two-stage least squares); the rule weak_instruments marks F below "
        f"{line} only as the rule of thumb of Staiger & Stock (1997), common practice.")


#: The instrument-strength rows of the journal tables (table.tex, table.html), each
#: with what its note says: (variants.csv column, row label, note).
STRENGTH_ROWS = (
    ("underid_p", "Underid. {p} (KP)",
     "underid. p (KP): the Kleibergen & Paap (2006) rank test (LM form, unit-clustered) "
     "of underidentification of all instruments, n/a where its chi-squared "
     "approximation is not valid (too many instruments for the units)"),
    ("underid_p_transformed", "Underid. {p}, transformed eq.",
     "underid. p, transformed eq. and level eq.: the same test on one equation's "
     "instruments (system GMM)"),
    ("underid_p_level", "Underid. {p}, level eq.", ""),
    ("weak_f_min", "Min. cond. F (SW)",
     "min. cond. F (SW): the smallest Sanderson & Windmeijer (2016) conditional "
     "first-stage F of the lagged outcome and the endogenous or predetermined terms, "
     "with the cluster-robust weight; no single critical value for weak-instrument "
     "size distortion applies to GMM with many instruments (F < 10 is a rule of thumb, "
     "Staiger & Stock 1997, common practice)"),
)


def variants_table(audit: AuditFolder) -> tuple[list[str], list[tuple[bool, str, list[Cell]]]]:
    """Headers and rows ``(is_base, status, cells)`` of the variants table: id,
    settings, status and reason, counts, test p-values, evidence and flags, the
    instrument-strength columns (:func:`strength_columns`), then each focus term's
    estimate with its standard error."""
    v = audit.variants
    settings = list(audit.setting_columns)
    extra = [c for c in ("evidence", "duplicate_of", "flags") if c in v.columns]
    strength = strength_columns(v)
    headers = (["variant"] + [setting_name(c) for c in settings]
               + ["status", "reason", "instruments", "units", "observations",
                  "Hansen p", "Sargan p", "AR(1) p", "AR(2) p"]
               + (["diff-in-Hansen (levels) p"] if "diff_hansen_level_p" in v.columns else [])
               + extra + [h for _, h, _ in strength] + [f"{t} (s.e.)" for t in audit.focus])
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
            text = "" if pd.isna(r[c]) else str(r[c]).replace(";", ", ")
            cells.append(Cell(text, text))
        for c, _, f in strength:
            if f is None:
                text = "" if pd.isna(r[c]) else str(r[c])
                cells.append(Cell(text, text))
            else:
                cells.append(Cell(f(r[c]), _num(r[c])))
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


def rule_catalogue(audit: AuditFolder) -> list[CatalogueRule]:
    """Every rule the audit applies: the catalogue in verdict.json."""
    return list(audit.rule_catalogue)


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
