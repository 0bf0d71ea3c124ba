"""Tables laid out for reading and printing: the base model, the variants in four
narrow tables, a short provenance.

The variants table of an audit has one column per setting, per test and per focus
term: 20 to 30 columns, more than a printed page holds. It is split into four
tables that share the variant id (settings; tests and counts; instrument strength;
estimates), each
narrow enough for an A4 page in portrait, so nothing is cut off when a report is
printed and nothing needs horizontal scrolling on screen. The cells are the ones of
:func:`robustgmm.report.summary.variants_table`; nothing is recomputed here.
"""
from __future__ import annotations

import math
import re

from ..options import CovarianceKind, label
from .inputs import AuditFolder
from .summary import fmt, fmt_int, fmt_p

# Manifest keys shown in the report's provenance (the rest, e.g. the settings and
# the grid, are shown elsewhere in the report or kept in manifest.json).
PROVENANCE_KEYS = ("version", "created_utc", "model_file", "data_file", "data_hash",
                   "base_variant")
PROVENANCE_PREFIXES = ("environment.",)


def anchor(variant: str) -> str:
    """The HTML id of a variant's row: ``variant-<id>`` with only safe characters."""
    return "variant-" + re.sub(r"[^A-Za-z0-9_.-]", "_", str(variant))


def split_variants_table(headers, rows, n_settings: int, n_terms: int,
                         n_strength: int = 0, strength_note: str = "") -> list[dict]:
    """Up to four tables from the one variants table: ``settings`` (id, settings,
    status, reason), ``tests`` (id, counts, test p-values, evidence, flags),
    ``strength`` (id and the ``n_strength`` instrument-strength columns, captioned by
    ``strength_note``) and ``estimates`` (id, one column per focus term). Each is a
    dict with ``key``, ``title``, ``note``, ``headers`` and ``rows`` of ``(is_base,
    status, anchor, cells)``; the first table carries the row anchors, the others
    link to them."""
    status_end = 1 + n_settings + 2
    estimates_start = len(headers) - n_terms
    strength_start = estimates_start - n_strength
    spans = (("settings", "Settings, status and reason", range(1, status_end), ""),
             ("tests", "Counts and specification tests", range(status_end, strength_start), ""),
             ("strength", "Instrument strength", range(strength_start, estimates_start),
              strength_note),
             ("estimates", "Estimates of the focus terms (standard errors in parentheses)",
              range(estimates_start, len(headers)), ""))
    out = []
    for key, title, span, note in spans:
        if not span:
            continue
        cols = [0] + list(span)
        out.append({
            "key": key, "title": title, "note": note, "headers": [headers[i] for i in cols],
            "rows": [(base, status, anchor(cells[0].sort), [cells[i] for i in cols])
                     for base, status, cells in rows],
        })
    return out


def base_model_table(audit: AuditFolder) -> dict:
    """Every term of the base model (estimate, s.e., z, p), its specification tests
    and its counts, as read from estimates.csv and variants.csv."""
    base = audit.base_variant
    est = audit.estimates[audit.estimates["variant"] == base]
    terms = [{"term": str(r["term"]), "estimate": fmt(r["estimate"]),
              "std_error": fmt(r["std_error"]),
              "z": fmt(r["z"], 2) if "z" in est.columns else "",
              "p": fmt_p(r["p_value"])} for _, r in est.iterrows()]
    row = audit.base_row()

    def value(col, f):
        return f(row[col]) if col in row.index else "n/a"

    def df_text(col):
        if col not in row.index:
            return ""
        try:
            x = float(row[col])
        except (TypeError, ValueError):
            return ""
        return "" if math.isnan(x) else f"{int(round(x))}"

    tests = [
        ("Over-identification", "Hansen J, robust weight", value("hansen_p", fmt_p),
         df_text("hansen_df")),
        ("Over-identification", "Sargan, homoskedastic errors only", value("sargan_p", fmt_p),
         df_text("sargan_df")),
        ("Serial correlation of the differenced errors", "AR(1)", value("ar1_p", fmt_p), ""),
        ("Serial correlation of the differenced errors", "AR(2)", value("ar2_p", fmt_p), ""),
    ]
    if "diff_hansen_level_p" in row.index:
        tests.append(("Instrument groups (difference-in-Hansen)", "level equation",
                      value("diff_hansen_level_p", fmt_p), df_text("diff_hansen_level_df")))
    counts = [(name, value(col, fmt_int)) for name, col in
              (("observations", "observations"), ("units", "units"),
               ("instruments", "instruments"), ("parameters", "parameters"))
              if col in row.index]
    kind = str(row["std_error_kind"]) if "std_error_kind" in row.index else ""
    try:
        kind = label(CovarianceKind, kind)
    except (ValueError, KeyError):
        pass
    return {"variant": base, "anchor": anchor(base), "terms": terms, "tests": tests, "counts": counts,
            "se_kind": kind if kind and kind != "nan" else ""}


def short_provenance(items) -> list[tuple[str, str]]:
    """The provenance pairs a reader needs (version, time, files, data hash,
    environment); the settings and the grid are already in the report."""
    return [(k, v) for k, v in items
            if k in PROVENANCE_KEYS or k.startswith(PROVENANCE_PREFIXES)]
