"""Names and texts shared by the report's numbers layer and its figures.

The summary (numbers), the documents and the figures all print a settings column,
a setting value or a term the same way; these helpers live here so that the numbers
layer never imports the drawing layer. ``band_arrays`` looks up the within-OLS band
each plotted variant is compared with (bounds.csv), for the figure and the summary.
"""
from __future__ import annotations

import hashlib
import re

import numpy as np
import pandas as pd

from .inputs import AuditFolder

SETTING_NAMES = {
    "equations": "equations",
    "transform": "transform",
    "steps": "steps",
    "form": "instrument form",
    "first_lag": "first lag",
    "last_lag": "last lag",
    "time_effects": "time effects",
    "errors": "errors",
    "sample": "sample",
}


def setting_name(column: str) -> str:
    """A readable name for a settings column (role columns keep their own name)."""
    return SETTING_NAMES.get(column, column.replace("_", " "))


def value_text(value) -> str:
    """A setting value as text: integers without a trailing .0, NaN as 'n/a'."""
    if value is None or (isinstance(value, float) and np.isnan(value)):
        return "n/a"
    if isinstance(value, (float, np.floating)) and float(value).is_integer():
        return str(int(value))
    return str(value)


SLUG_MAX = 60  # characters of a term in a file name; longer ones end in a hash


def slug(term: str) -> str:
    """A file-name-safe form of a term label: ``cash[t-1]`` -> ``cash_t-1``.

    A long label (a 312-character column name would exceed the 255-byte limit of
    most file systems) is cut to its first characters plus a stable hash of the
    whole label, so that two long labels with the same start still differ."""
    out = re.sub(r"[^A-Za-z0-9.\-]+", "_", term).strip("_.") or "term"
    if len(out) > SLUG_MAX:
        digest = hashlib.sha256(term.encode("utf-8")).hexdigest()[:10]
        out = f"{out[:SLUG_MAX - 11].rstrip('_.')}_{digest}"
    return out


def mathtext_safe(text) -> str:
    """``text`` as matplotlib should print it, never as mathtext.

    matplotlib reads a pair of ``$`` as the start and end of a formula (so
    ``sales_$m_vs_$bn`` fails to parse and ``fp$\\frac{1}{2}$`` prints a fraction);
    an escaped ``\\$`` is a literal dollar sign. Every user text that reaches a
    figure goes through here."""
    return str(text).replace("$", r"\$")


def band_arrays(audit: AuditFolder, term: str, frame: pd.DataFrame):
    """Lower/upper band per plotted variant: per-variant rows of bounds.csv when the
    audit writes them, else the single band of the base sample."""
    rows = audit.bounds_for(term)
    if rows.empty:
        return None
    if "variant" in rows.columns:
        merged = frame[["variant"]].merge(rows[["variant", "fe", "ols"]], on="variant", how="left")
        if merged["fe"].notna().all():
            return merged["fe"].to_numpy(float), merged["ols"].to_numpy(float)
    if "sample" in rows.columns and "sample" in frame.columns:
        merged = frame[["sample"]].astype(str).merge(
            rows[["sample", "fe", "ols"]].astype({"sample": str}), on="sample", how="left")
        if merged["fe"].notna().all() and len(merged) == len(frame):
            return merged["fe"].to_numpy(float), merged["ols"].to_numpy(float)
    fe, ols = audit.band(term)
    return np.full(len(frame), fe), np.full(len(frame), ols)



def term_labels(audit: AuditFolder) -> dict[str, str]:
    """Display labels of terms from the model file's ``[labels]`` table (kept in
    manifest.json under ``spec``); a term without one is shown as its own label."""
    spec = audit.manifest.get("spec") if isinstance(audit.manifest, dict) else None
    labels = spec.get("labels") if isinstance(spec, dict) else None
    return {str(k): str(v) for k, v in labels.items()} if isinstance(labels, dict) else {}


def term_text(audit: AuditFolder, term: str) -> str:
    """How every document names ``term``: its ``[labels]`` text, else the term."""
    return term_labels(audit).get(term, term)


def report_option(audit: AuditFolder, key: str, default=None):
    """A ``[report]`` option of the model file (kept in manifest.json under ``spec``)."""
    spec = audit.manifest.get("spec") if isinstance(audit.manifest, dict) else None
    report = spec.get("report") if isinstance(spec, dict) else None
    return report.get(key, default) if isinstance(report, dict) else default
