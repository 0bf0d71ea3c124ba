"""The report's content as plain strings, shared by the HTML and Markdown writers.

Nothing here is escaped: the HTML writer escapes through jinja2's autoescape, the
Markdown writer through its own escaping. Both therefore print identical text.
"""
from __future__ import annotations

import base64
from pathlib import Path

from .. import __version__
from .figures import FigureFile, caption
from .inputs import AuditFolder, Rule
from .referee import CAUTION, referee_paragraph
from .summary import (AuditSummary, fmt, fmt_int, fmt_p, provenance_items, rule_catalogue,
                      rule_figures_text, summarize, threshold_text, variants_table)


def _rule(rule: Rule) -> dict:
    return {"id": rule.id, "description": rule.description,
            "figures": rule_figures_text(rule), "source": rule.source,
            "threshold": threshold_text(rule.threshold) if rule.threshold not in (None, "") else ""}


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


def _counts(s: AuditSummary) -> str:
    return (f"{s.n_variants} variants: {s.n_ok} estimated, {s.n_failed} failed, "
            f"{s.n_skipped} skipped as impossible. The base model is marked.")


def _truth_rows(s: AuditSummary) -> list[dict]:
    rows = []
    for t in s.terms:
        if t.truth is None:
            continue
        inside = "n/a" if t.n == 0 else ("yes" if t.low <= t.truth <= t.high else "no")
        rows.append({"term": t.term, "truth": fmt(t.truth), "base": fmt(t.base_estimate),
                     "low": fmt(t.low), "high": fmt(t.high), "inside": inside})
    return rows


def _bounds_table(audit: AuditFolder) -> tuple[list[str], list[list[str]]]:
    frame = audit.bounds
    headers = list(frame.columns)
    rows = []
    for _, r in frame.iterrows():
        row = []
        for col in headers:
            value = r[col]
            row.append(fmt(value) if isinstance(value, float) else str(value))
        rows.append(row)
    return headers, rows


def build_context(audit: AuditFolder, figures: list[FigureFile],
                  summary: AuditSummary | None = None, *, inline_png: bool = True) -> dict:
    s = summary or summarize(audit)
    terms = []
    for t in s.terms:
        terms.append({
            "term": t.term, "verdict": t.verdict, "base": fmt(t.base_estimate),
            "base_se": fmt(t.base_std_error), "base_p": fmt_p(t.base_p_value),
            "low": fmt(t.low), "high": fmt(t.high), "median": fmt(t.median), "n": t.n,
            "n_positive": t.n_positive, "n_negative": t.n_negative,
            "n_significant": t.n_significant,
            "truth": fmt(t.truth) if t.truth is not None else None,
            "rules": [_rule(r) for r in t.fired],
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
    bounds_headers, bounds_rows = _bounds_table(audit)
    truth_note = ""
    if audit.truth:
        truth_note = str(audit.truth.get("description") or audit.truth.get("note") or "")
    return {
        "title": _title(audit),
        "subtitle": _subtitle(audit, s),
        "caution": CAUTION,
        "alpha": f"{audit.alpha:g}",
        "terms": terms,
        "flags": [_rule(r) for r in s.model_flags],
        "referee": referee_paragraph(audit, s),
        "truth": _truth_rows(s),
        "truth_note": truth_note,
        "figures": figs,
        "counts": _counts(s),
        "headers": headers,
        "rows": rows,
        "bounds_headers": bounds_headers,
        "bounds_rows": bounds_rows,
        "catalogue": [_rule(r) for r in rule_catalogue(audit)],
        "provenance": provenance_items(dict(audit.manifest)),
        "version": __version__,
        "fmt_int": fmt_int,
    }
