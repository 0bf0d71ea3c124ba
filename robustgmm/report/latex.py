"""table.tex: a booktabs table of the focus terms for a paper's appendix.

Columns: the base model, then every estimated variant that departs from the base in
exactly one setting ("one dimension at a time"), grouped into panels of at most
``per_panel`` columns with the base repeated as column (1) of each panel. Rows: each
focus term's estimate with its standard error underneath, then diagnostics
(instruments, units, observations, Hansen, AR(1) and AR(2) p-values).

The file is a ``table`` environment to ``\\input`` into a document that loads
``booktabs``; all user text is escaped for LaTeX.
"""
from __future__ import annotations

import re

import pandas as pd

from ..options import LABELS, Equations, Steps, Transform
from .labels import value_text
from .inputs import AuditFolder
from .summary import AuditSummary, fmt, fmt_int, fmt_p, setting_phrase, summarize

_LATEX_SPECIAL = {
    "\\": r"\textbackslash{}", "&": r"\&", "%": r"\%", "$": r"\$", "#": r"\#",
    "_": r"\_", "{": r"\{", "}": r"\}", "~": r"\textasciitilde{}",
    "^": r"\textasciicircum{}", "<": r"\textless{}", ">": r"\textgreater{}",
}
_LATEX_RE = re.compile("|".join(re.escape(k) for k in _LATEX_SPECIAL))


def tex(text) -> str:
    """Escape LaTeX's special characters in user text."""
    return _LATEX_RE.sub(lambda m: _LATEX_SPECIAL[m.group()], str(text))


def num(text: str) -> str:
    """A formatted number for a table cell, with a true minus sign."""
    if text.startswith("-"):
        return "$-$" + text[1:]
    if text.startswith("<"):
        return r"$<$" + text[1:]
    return text


def departure_label(column: str, value) -> str:
    """A short column header for a one-setting departure from the base."""
    v = value_text(value)
    words = {  # the option labels (robustgmm.options.LABELS), one shortened for a header
        **{("equations", m.value): LABELS[m] for m in Equations},
        **{("transform", m.value): LABELS[m] for m in Transform},
        ("transform", "fod"): "orth. deviations",
        **{("steps", str(m.value)): LABELS[m] for m in Steps},
        ("time_effects", "True"): "time effects", ("time_effects", "False"): "no time effects",
    }
    if (column, v) in words:
        return words[(column, v)]
    if column == "form":
        return f"{v} instr."
    if column in ("first_lag", "last_lag"):
        return f"{column.split('_')[0]} lag {v}"
    if column == "errors":
        return f"{v} s.e."
    if column == "sample":
        return v
    phrase = setting_phrase(column)
    if phrase.startswith("the role of "):
        return f"{phrase[len('the role of '):]}: {v}"
    return f"{column}: {v}"


def one_at_a_time(audit: AuditFolder) -> list[tuple[str, tuple[str, ...], tuple]]:
    """[(variant, changed settings, new values)] for the base (no changes) and every
    estimated variant that differs from it in exactly one setting.

    When no estimated variant differs in exactly one setting (e.g. the base uses a
    value no other variant shares), the closest variants are taken instead: those
    with the fewest changed settings."""
    v = audit.variants
    base = audit.base_row()
    cols = [c for c in audit.setting_columns if c in v.columns]
    order = {c: i for i, c in enumerate(cols)}
    found = []
    for _, row in v.iterrows():
        if row["variant"] == audit.base_variant or row["status"] != "ok":
            continue
        diff = tuple(c for c in cols if value_text(row[c]) != value_text(base[c]))
        if not diff:
            continue
        rank = tuple((order[c], [value_text(x) for x in pd.unique(v[c])].index(
            value_text(row[c]))) for c in diff)
        found.append((len(diff), rank, row["variant"], diff, tuple(row[c] for c in diff)))
    out = [(audit.base_variant, (), ())]
    if found:
        closest = min(f[0] for f in found)
        chosen = sorted(f for f in found if f[0] == closest)
        out += [(vid, diff, values) for _, _, vid, diff, values in chosen]
    return out


def render_latex(audit: AuditFolder, summary: AuditSummary | None = None, *,
                 per_panel: int = 6) -> str:
    s = summary or summarize(audit)
    columns = one_at_a_time(audit)
    base_col, departures = columns[0], columns[1:]
    changes = max((len(cols) for _, cols, _ in departures), default=1)
    change_text = "one setting" if changes == 1 else \
        f"{changes} settings (no estimated variant changes only one)"
    # balanced panels: 6 departures with room for 5 per panel give 3 + 3, not 5 + 1
    room = max(per_panel - 1, 1)
    n_panels = max(1, -(-len(departures) // room))
    step = max(1, -(-len(departures) // n_panels))
    panels = [[base_col] + departures[i:i + step] for i in range(0, len(departures), step)] \
        or [[base_col]]
    est = audit.estimates.set_index(["variant", "term"])
    vrow = audit.variants.set_index("variant")

    def cell_est(vid, term):
        if (vid, term) not in est.index:
            return "", ""
        e = est.loc[(vid, term)]
        if isinstance(e, pd.DataFrame):
            e = e.iloc[0]
        return num(fmt(e["estimate"])), "(" + num(fmt(e["std_error"])) + ")"

    diag_rows = [("Instruments", "instruments", fmt_int), ("Units", "units", fmt_int),
                 ("Observations", "observations", fmt_int), ("Hansen $p$", "hansen_p", fmt_p),
                 ("AR(1) $p$", "ar1_p", fmt_p), ("AR(2) $p$", "ar2_p", fmt_p)]
    lines = [
        "% robustgmm: focus terms across the base model and one-setting departures.",
        "% Requires \\usepackage{booktabs} in the preamble.",
        "\\begin{table}[htbp]",
        "\\centering",
        "\\small",
        "\\caption{Robustness of the estimates to one change at a time}",
        "\\label{tab:robustgmm}",
    ]
    number = 1
    for p, panel in enumerate(panels):
        k = len(panel)
        if p:
            lines.append("\\medskip")
            lines.append("")
        lines.append("\\begin{tabular}{l" + "c" * k + "}")
        lines.append("\\toprule")
        # column numbers: the base is (1) in every panel; departures count on
        nums = ["(1)"] + [f"({number + 1 + i})" for i in range(k - 1)]
        number += k - 1
        lines.append(" & " + " & ".join(nums) + " \\\\")
        heads = ["base"] + [tex(", ".join(departure_label(c, x) for c, x in zip(cols, values)))
                            for _, cols, values in panel[1:]]
        lines.append(" & " + " & ".join(heads) + " \\\\")
        lines.append("\\midrule")
        for term in audit.focus:
            pairs = [cell_est(vid, term) for vid, _, _ in panel]
            lines.append(f"\\texttt{{{tex(term)}}} & " + " & ".join(a for a, _ in pairs) + " \\\\")
            lines.append(" & " + " & ".join(b for _, b in pairs) + " \\\\")
        lines.append("\\midrule")
        for label, col, f in diag_rows:
            cells = [num(f(vrow.loc[vid, col])) for vid, _, _ in panel]
            lines.append(f"{label} & " + " & ".join(cells) + " \\\\")
        lines.append("\\bottomrule")
        lines.append("\\end{tabular}")
    judged = (f"judged on the {s.n_acceptable} of {s.n_ok} estimated variants that pass "
              f"their specification tests" if s.has_acceptable
              else f"across all {s.n_ok} estimated variants")
    verdicts = "; ".join(f"\\texttt{{{tex(t.term)}}} {tex(t.verdict)}" for t in s.terms)
    failed = [row["variant"] for _, row in audit.variants.iterrows()
              if row["status"] != "ok"]
    note = (f"Standard errors in parentheses. Column (1) is the base model (variant "
            f"\\texttt{{{tex(audit.base_variant)}}}); each other column changes {change_text}. "
            f"Verdicts ({judged}): {verdicts}. "
            f"Statistical robustness does not establish instrument validity, which rests "
            f"on economic reasoning.")
    if failed:
        note += f" {len(failed)} variant{'s' if len(failed) != 1 else ''} could not be estimated."
    lines += ["", "\\par\\smallskip",
              "\\begin{minipage}{0.95\\linewidth}\\footnotesize", note, "\\end{minipage}",
              "\\end{table}", ""]
    return "\n".join(lines)
