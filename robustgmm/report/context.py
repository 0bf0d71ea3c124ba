"""The report's content as plain strings, shared by the HTML and Markdown writers.

Nothing here is escaped: the HTML writer escapes through jinja2's autoescape, the
Markdown writer through its own escaping. Both therefore print identical text.
"""
from __future__ import annotations

import base64
import re
from pathlib import Path

import numpy as np

from .. import __version__
from ..options import Transform, label
from .figures import FigureFile, caption
from ..audit.verdicts import Firing
from ..audit.verdicts import Rule as CatalogueRule
from .inputs import AuditFolder
from .referee import CAUTION, referee_paragraphs
from .labels import setting_name, term_labels
from .sections import anchor, base_model_table, short_provenance, split_variants_table
from .summary import (AuditSummary, fmt, fmt_int, fmt_p, provenance_items, rule_catalogue,
                      rule_figures_text, strength_columns, strength_note, summarize,
                      threshold_text, variants_table)


def link_ids(text: str, ids) -> list[tuple[str, str]]:
    """``text`` in pieces ``(text, anchor)``: each variant id of ``ids`` that the text
    cites becomes a piece with the anchor of its row in the variants table (HTML
    links it), the rest pieces with no anchor."""
    if not ids or not text:
        return [(text, "")]
    pattern = re.compile(r"\b(" + "|".join(re.escape(i) for i in sorted(ids, key=len,
                                                                        reverse=True)) + r")\b")
    out, pos = [], 0
    for m in pattern.finditer(text):
        if m.start() > pos:
            out.append((text[pos:m.start()], ""))
        out.append((m.group(), anchor(m.group())))
        pos = m.end()
    if pos < len(text):
        out.append((text[pos:], ""))
    return out


def _rule(rule: Firing, ids=()) -> dict:
    """A rule that fired, with its figures (variant ids in them linked to their rows)
    and the threshold it used."""
    threshold = ({rule.threshold_name: rule.threshold} if rule.threshold_name
                 and rule.threshold is not None else None)
    figures = rule_figures_text(rule)
    return {"id": rule.id, "description": rule.description, "effect": str(rule.effect),
            "figures": figures, "figures_parts": link_ids(figures, ids), "source": rule.source,
            "threshold": threshold_text(threshold) if threshold else ""}


def _catalogue_rule(rule: CatalogueRule, thresholds) -> dict:
    value = thresholds.get(rule.threshold) if rule.threshold else None
    return {"id": rule.id, "description": rule.description, "effect": str(rule.effect),
            "figures": "", "source": rule.source,
            "threshold": threshold_text({rule.threshold: value}) if rule.threshold else ""}


def _drivers(t) -> list[dict]:
    """The drivers table of a term: setting, value, variants, mean estimate, share
    significant, shift (Young & Holsteen 2017), largest |shift| first."""
    # the setting as the variants table and the figures name it ("last lag"), not
    # the model file's key ("last_lag")
    return [{"setting": setting_name(d.setting), "value": d.value, "variants": d.variants,
             "mean": fmt(d.mean_estimate), "share": fmt(d.share_significant, 2),
             "shift": fmt(d.shift)} for d in t.drivers]


DRIVERS_NOTE = ("For each varied setting and value: the judged variants that use it, their mean "
                "estimate and share significant, and the shift, the change in the estimate "
                "when that setting takes this value instead of the base model's with the other "
                "settings held fixed (least squares of the estimates on the indicators of "
                "every varied setting; Young & Holsteen 2017). The base model's values have "
                "shift 0; the largest shift comes first. In each verdict, the modeling SD is "
                "the spread of the judged estimates, the sampling SD the root mean squared "
                "standard error, and the robustness ratio the mean estimate over the root "
                "of the sum of their squares (Young & Holsteen 2017).")


def _closest(s: AuditSummary) -> dict | None:
    c = s.closest
    if not c or s.base_acceptable:
        return None
    changed = c.get("changed") or {}
    return {"variant": c["variant"], "anchor": anchor(str(c["variant"])),
            "changed": ", ".join(f"{k} = {v}" for k, v in changed.items()) or "nothing",
            "estimates": ", ".join(f"{k} {fmt(v)}" for k, v in (c.get("estimates") or {}).items()),
            "lines": list(c.get("model_file_lines") or [])}


def _title(audit: AuditFolder) -> str:
    outcome = audit.outcome
    return f"Robustness audit: {outcome}" if outcome else "Robustness audit"


def _subtitle(audit: AuditFolder, s: AuditSummary) -> str:
    model = audit.manifest.get("model_file") or audit.manifest.get("model") or ""
    if isinstance(model, dict):
        model = model.get("file") or model.get("path") or ""
    parts = []
    if model:
        parts.append(f"model file {Path(str(model)).name}")
    parts.append(f"{s.n_variants} variants ({s.n_ok} estimated, {s.n_failed} failed, "
                 f"{s.n_skipped} skipped)")
    parts.append(f"base variant {audit.base_variant}")
    return "; ".join(parts)


def evidence_counts(s: AuditSummary) -> str:
    """'48 estimated: 25 acceptable, 8 untestable, 15 rejected by their tests; 6
    duplicates merged' (+ failed and skipped), as the terminal prints it."""
    text = (f"{s.n_ok} estimated: {s.n_acceptable} acceptable, {s.n_untestable} untestable, "
            f"{s.n_rejected} rejected by their tests")
    if s.n_duplicates:
        text += f"; {s.n_duplicates} duplicate{'s' if s.n_duplicates != 1 else ''} merged"
    extra = []
    if s.n_failed:
        extra.append(f"{s.n_failed} failed")
    if s.n_skipped:
        extra.append(f"{s.n_skipped} skipped")
    return text + (f" ({', '.join(extra)})" if extra else "")


def _counts(s: AuditSummary) -> str:
    judged = "acceptable and untestable" if s.count_untestable else "acceptable"
    return (f"{s.n_variants} variants. {evidence_counts(s)}. Column \"evidence\" gives each "
            f"variant's class; the verdicts are judged on the {judged} variants that are "
            f"not duplicates (column \"duplicate_of\"). The base model is marked. Transform "
            f"{Transform.FD}: {label(Transform, Transform.FD)}; {Transform.FOD}: "
            f"{label(Transform, Transform.FOD)} (Arellano & Bover 1995). Sargan p is "
            f"valid only if the errors are homoskedastic (it is not robust to "
            f"heteroskedasticity, and n/a in system GMM, whose one-step weight is not "
            f"optimal even then); Hansen p is the robust test.")


def _truth_rows(s: AuditSummary) -> list[dict]:
    rows = []
    for t in s.terms:
        if t.truth is None:
            continue
        inside = "n/a" if t.n == 0 else ("yes" if t.low <= t.truth <= t.high else "no")
        rows.append({"term": t.term, "label": t.label, "truth": fmt(t.truth), "base": fmt(t.base_estimate),
                     "low": fmt(t.low), "high": fmt(t.high), "inside": inside})
    return rows


def _bounds_table(audit: AuditFolder) -> tuple[list[str], list[list[str]], str]:
    """The bounds of the base sample (one row per AR term) and, when bounds.csv
    holds one row per variant, a note on how far they move across variants."""
    frame = audit.bounds
    note = ""
    if "variant" in frame.columns and frame["variant"].nunique() > 1:
        base = frame[frame["variant"] == audit.base_variant]
        parts = []
        for term, rows in frame.groupby("term", sort=False):
            if fmt(rows["fe"].min()) == fmt(rows["fe"].max()) and \
                    fmt(rows["ols"].min()) == fmt(rows["ols"].max()):
                continue
            parts.append(f"{term}: within from {fmt(rows['fe'].min())} to {fmt(rows['fe'].max())}, "
                         f"pooled OLS from {fmt(rows['ols'].min())} to {fmt(rows['ols'].max())}")
        note = "bounds.csv holds the bounds on every variant's own estimation sample"
        note += ("; across variants: " + "; ".join(parts) + ". The table shows the base model's."
                 if parts else "; they are the same for every variant.")
        frame = base if not base.empty else frame.drop_duplicates("term")
    preferred = [c for c in ("term", "fe", "fe_std_error", "ols", "ols_std_error", "gmm",
                             "in_bounds", "observations", "units") if c in frame.columns]
    headers = preferred + [c for c in frame.columns
                           if c not in preferred and c not in ("variant", "is_base")]
    names = {"fe": "within (FE)", "fe_std_error": "within s.e.", "ols": "pooled OLS",
             "ols_std_error": "OLS s.e.", "gmm": "GMM (base)", "in_bounds": "GMM inside band"}
    rows = []
    for _, r in frame.iterrows():
        row = []
        for col in headers:
            value = r[col]
            if isinstance(value, (bool, np.bool_)):  # not Python's True/False in a report
                row.append("yes" if value else "no")
            elif isinstance(value, (float, np.floating)) and col in ("observations", "units"):
                row.append(fmt_int(value))
            elif isinstance(value, (float, np.floating)):
                row.append(fmt(value))
            else:
                row.append(str(value))
        rows.append(row)
    return [names.get(h, h) for h in headers], rows, note


def numerical_warnings(audit: AuditFolder, limit: int = 25) -> list[dict]:
    """Warnings the estimation recorded (singular weights, dropped columns, too many
    instruments), grouped by text: how many variants, and which (first few ids)."""
    frame = audit.variants
    if "warnings" not in frame.columns:
        return []
    seen: dict[str, list[str]] = {}
    for variant, text in zip(frame["variant"], frame["warnings"]):
        if not isinstance(text, str) or not text.strip():
            continue
        for warning in (w.strip() for w in text.split(" | ")):
            if warning:
                seen.setdefault(warning, []).append(str(variant))
    out = []
    for warning, ids in sorted(seen.items(), key=lambda kv: (-len(kv[1]), kv[0]))[:limit]:
        shown = ", ".join(ids[:6]) + (f" and {len(ids) - 6} more" if len(ids) > 6 else "")
        out.append({"text": warning, "n": len(ids), "variants": shown})
    return out


def build_context(audit: AuditFolder, figures: list[FigureFile],
                  summary: AuditSummary | None = None, *, inline_png: bool = True) -> dict:
    s = summary or summarize(audit)
    ids = [str(v) for v in audit.variants["variant"]]
    terms = []
    for t in s.terms:
        terms.append({
            "term": t.term, "label": t.label, "verdict": t.verdict, "base": fmt(t.base_estimate),
            "base_se": fmt(t.base_std_error), "base_p": fmt_p(t.base_p_value),
            "low": fmt(t.low), "high": fmt(t.high), "median": fmt(t.median), "n": t.n,
            "n_positive": t.n_positive, "n_negative": t.n_negative,
            "n_significant": t.n_significant,
            "n_ok": t.n_ok, "ok_low": fmt(t.ok_low), "ok_high": fmt(t.ok_high),
            "judged": "acceptable or untestable" if s.count_untestable else "acceptable",
            "passed": ", ".join(t.passed),
            "not_evaluated": ", ".join(t.not_evaluated),
            "reason": t.reason,
            "n_untestable": t.n_untestable, "n_duplicates": t.n_duplicates,
            "drivers": _drivers(t),
            "influence": None if t.influence is None else {
                "modeling": fmt(t.influence.modeling_sd),
                "sampling": fmt(t.influence.sampling_sd),
                "ratio": fmt(t.influence.robustness_ratio, 2)},
            "truth": fmt(t.truth) if t.truth is not None else None,
            "rules": [_rule(r, ids) for r in t.fired],
        })
    figs = []
    for f in figures:
        figs.append({
            "name": f.name, "title": f.title, "kind": f.kind, "caption": caption(f.kind, f.term),
            "data": base64.b64encode(f.png).decode("ascii") if inline_png else "",
            "files": ", ".join(f"figures/{p.name}" for p in f.paths),
            "png": f"figures/{f.name}.png",
        })
    headers, rows = variants_table(audit)
    bounds_headers, bounds_rows, bounds_note = _bounds_table(audit)
    truth_note = ""
    if audit.truth:
        truth_note = str(audit.truth.get("description") or audit.truth.get("note") or "")
    return {
        "title": _title(audit),
        "subtitle": _subtitle(audit, s),
        "caution": CAUTION,
        "alpha": f"{audit.alpha:g}",
        "terms": terms,
        "flags": [_rule(r, ids) for r in s.model_flags],
        "referee": referee_paragraphs(audit, s),
        "base_statement": "" if s.base_acceptable else s.base_statement,
        "closest": _closest(s),
        "evidence": evidence_counts(s),
        "truth": _truth_rows(s),
        "truth_note": truth_note,
        "figures": figs,
        "counts": _counts(s),
        "headers": headers,
        "rows": rows,
        "variant_tables": split_variants_table(
            headers, rows, len(audit.setting_columns), len(audit.focus),
            len(strength_columns(audit.variants)), strength_note(audit.verdict.thresholds)),
        "strength_note": (strength_note(audit.verdict.thresholds)
                          if strength_columns(audit.variants) else ""),
        "base_table": base_model_table(audit),
        "term_names": term_labels(audit),
        "drivers_note": DRIVERS_NOTE,
        "bounds_headers": bounds_headers,
        "bounds_rows": bounds_rows,
        "bounds_note": bounds_note,
        "numerical_warnings": numerical_warnings(audit),
        "catalogue": [_catalogue_rule(r, audit.verdict.thresholds)
                      for r in rule_catalogue(audit)],
        "combination": audit.verdict.combination,
        "thresholds": "; ".join(f"{k} = {threshold_text(v)}"
                                for k, v in audit.verdict.thresholds.items()),
        "provenance": provenance_items(dict(audit.manifest)),
        "provenance_short": short_provenance(provenance_items(dict(audit.manifest))),
        "version": __version__,
        "fmt_int": fmt_int,
        # Filled by build_report when the folder holds simulation.csv (report.simulation);
        # present here so every caller of build_context can render the templates.
        "simulation": None,
        "dropping": None,  # filled by build_report when the folder holds influence.csv
    }
