"""table.tex: a booktabs table of the focus terms for a paper's appendix.

Columns: the base model, then every estimated variant that departs from the base in
exactly one setting ("one dimension at a time"), grouped into panels of at most
``per_panel`` columns with the base repeated as column (1) of each panel. Rows: each
focus term's estimate with its standard error underneath, then diagnostics
(instruments, units, observations, Hansen, AR(1) and AR(2) p-values).

The file is a ``table`` environment to ``\\input`` into a document that loads
``booktabs`` and ``tabularx``; all user text is escaped for LaTeX. Terms are named by
the model file's ``[labels]`` when it has them; ``[report] stars = true`` adds
significance stars. A table taller than a page (many focus terms or columns)
continues in a second ``table`` float with the same number and "(continued)" in its
caption (:func:`float_breaks`); a test row that is n/a in every shown column (Sargan
when every column is system GMM) is left out, and so is its line in the note.
"""
from __future__ import annotations

import math
import re

import pandas as pd

from ..options import LABELS, CovarianceKind, Equations, Steps, Transform
from ..options import label as option_label
from .labels import report_option, term_labels, value_text
from .inputs import AuditFolder
from .summary import (STRENGTH_ROWS, AuditSummary, fmt, fmt_int, fmt_p, setting_phrase,
                      summarize)

# "$" becomes a math-mode dollar (\ensuremath, so no bare "$" reaches the file): the
# text-mode \$ comes from the text-companion font, which a small TeX installation
# (no cm-super) can only draw as a bitmap (Type 3) font.
_LATEX_SPECIAL = {
    "\\": r"\textbackslash{}", "&": r"\&", "%": r"\%", "$": r"\ensuremath{\$}", "#": r"\#",
    "_": r"\_", "{": r"\{", "}": r"\}", "~": r"\textasciitilde{}",
    "^": r"\textasciicircum{}", "<": r"\textless{}", ">": r"\textgreater{}",
}
_LATEX_RE = re.compile("|".join(re.escape(k) for k in _LATEX_SPECIAL))


def tex(text) -> str:
    """Escape LaTeX's special characters in user text."""
    return _LATEX_RE.sub(lambda m: _LATEX_SPECIAL[m.group()], str(text))


def tex_breakable(text, long: int = 16) -> str:
    """``tex(text)`` that may break inside a long word.

    A term such as ``staff_hours_per_worker[t-1]`` cannot hyphenate, so a token
    longer than ``long`` characters (about what the column holds) that is not a plain
    word (those hyphenate by themselves) may break
    after ``_``, ``.`` or ``-`` and before ``[`` or ``(``; a piece still longer than
    that may break between any two characters. Short tokens are left as they are, so
    an ordinary table stays clean to edit."""
    def piece(chunk: str) -> str:
        if len(chunk) <= long:
            return tex(chunk)
        return "\\allowbreak{}".join(tex(ch) for ch in chunk)

    out = []
    for token in re.split(r"(\s+)", str(text)):
        # plain words hyphenate by themselves; only identifiers need break points
        if len(token) <= long or token.isspace() or token.rstrip(".,;:").isalpha():
            out.append(tex(token))
            continue
        parts = [p for p in re.split(r"(?<=[_.\-])|(?=[\[(])", token) if p]
        out.append("\\allowbreak{}".join(piece(p) for p in parts))
    return "".join(out)


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


#: Significance stars, when ``[report] stars = true``: the usual economics
#: convention (common practice): * p < 0.10, ** p < 0.05, *** p < 0.01.
STARS = ((0.01, "***"), (0.05, "**"), (0.10, "*"))

#: Lines of a float (in \\small rows) that fit a page of a standard article with
#: room to spare: the default 10pt article holds about 46, the 12pt one fewer.
FLOAT_LINES = 40


#: Characters of the note's LaTeX source per line of the table: at an article's
#: default width a footnotesize line of the note takes about 98 source characters
#: (measured: the demo's note, 1,867 characters, set in 19 lines) and is about 0.86
#: of a small-type table row.
NOTE_CHARACTERS_PER_LINE = 110


def note_lines(note: str) -> int:
    """The table lines the note takes (:func:`float_breaks`)."""
    return 1 + math.ceil(len(note) / NOTE_CHARACTERS_PER_LINE)


def float_breaks(n_panels: int, n_terms: int, n_diag: int, note_lines: int = 9) -> set[int]:
    """The panels that start a new ``table`` float, so that no float is taller than
    :data:`FLOAT_LINES` (a float taller than the page is never placed well). A panel
    takes about 4 lines of headers and rules, two per focus term and one per test
    row; the note under the last panel about ``note_lines``; a caption two."""
    panel = 4 + 2 * n_terms + n_diag
    starts, used = {0}, 2
    for p in range(n_panels):
        need = panel + (note_lines if p == n_panels - 1 else 0)
        if p and used + need > FLOAT_LINES:
            starts.add(p)
            used = 2
        used += need + 1
    return starts


#: What each test row reports, for the table note.
TEST_NOTES = {  # test row column -> what the row reports
    "hansen_p": "Hansen \\textit{p}: the \\textit{J} test of the over-identifying "
                "restrictions with the robust weight (Hansen 1982)",
    "sargan_p": "Sargan \\textit{p}: the same restrictions with the homoskedastic weight "
                "(Sargan 1958), valid only if the errors are homoskedastic and n/a in "
                "system GMM",
    "ar2_p": "AR(1), AR(2) \\textit{p}: tests for first- and second-order serial correlation "
             "of the differenced errors (Arellano \\& Bond 1991), of which AR(2) must not "
             "reject",
    "diff_hansen_level_p": "difference-in-Hansen \\textit{p}: validity of the level-equation "
                           "instruments of system GMM (Blundell \\& Bond 1998)",
}


def stars(p) -> str:
    try:
        p = float(p)
    except (TypeError, ValueError):
        return ""
    for level, mark in STARS:
        if p < level:
            return mark
    return ""


def estimate_cells(est: pd.DataFrame, vid, term, use_stars: bool, text, superscript
                   ) -> tuple[str, str]:
    """The two cells of ``term`` in variant ``vid``: the estimate (with its stars when
    ``use_stars``) and its standard error in parentheses; empty where the variant has
    no such estimate. ``est`` is estimates.csv indexed by (variant, term); ``text``
    escapes a formatted number for the document, ``superscript`` sets the stars."""
    if (vid, term) not in est.index:
        return "", ""
    e = est.loc[(vid, term)]
    if isinstance(e, pd.DataFrame):
        e = e.iloc[0]
    mark = stars(e["p_value"]) if use_stars else ""
    return (text(fmt(e["estimate"])) + (superscript(mark) if mark else ""),
            "(" + text(fmt(e["std_error"])) + ")")


def diagnostic_rows(has_diff: bool, p: str, columns=()) -> list[tuple[str, str, object]]:
    """The rows under the estimates: (label, variants.csv column, formatter); ``p``
    is how the document writes the letter p. The instrument-strength rows
    (:data:`~robustgmm.report.summary.STRENGTH_ROWS`) follow for those of their
    columns in ``columns``."""
    rows = [("Instruments", "instruments", fmt_int), ("Units", "units", fmt_int),
            ("Observations", "observations", fmt_int), (f"Hansen {p}", "hansen_p", fmt_p),
            (f"Sargan {p}", "sargan_p", fmt_p), (f"AR(1) {p}", "ar1_p", fmt_p),
            (f"AR(2) {p}", "ar2_p", fmt_p)]
    if has_diff:
        rows.append((f"Diff.-in-Hansen {p}", "diff_hansen_level_p", fmt_p))
    for col, label, _ in STRENGTH_ROWS:
        if col in columns:
            rows.append((label.format(p=p), col, fmt_p if col.startswith("underid_p")
                         else (lambda x: fmt(x, 2))))
    return rows


def shown_diagnostic_rows(rows, vrow: pd.DataFrame, shown) -> list:
    """The :func:`diagnostic_rows` worth a line for the columns ``shown`` (variant ids
    of ``vrow``): a row n/a in every column says nothing (Sargan in system GMM), and
    the per-equation rank tests only add to the whole system's where some column has
    a level equation (in difference GMM the transformed equation's test is the
    system's)."""
    def says(col, f):
        return any(f(vrow.loc[vid, col]) != "n/a" for vid in shown)
    level = [r for r in rows if r[1] == "underid_p_level"]
    with_level = bool(level) and says(level[0][1], level[0][2])
    return [r for r in rows if says(r[1], r[2])
            and (with_level or r[1] != "underid_p_transformed")]


def fails(row) -> bool:
    """True when the audit marks this estimated variant as failing its own tests
    (read from variants.csv: ``evidence`` when written, else ``acceptable``)."""
    if "evidence" in row.index and isinstance(row["evidence"], str) and row["evidence"]:
        return row["evidence"].strip().lower() not in ("acceptable",)
    if "acceptable" in row.index:
        return not bool(row["acceptable"])
    return False


def table_panels(audit: AuditFolder, per_panel: int = 5):
    """The columns of the table in panels: each panel starts with the base model and
    holds at most ``per_panel`` columns; returns (panels, what each departure
    changes). Shared by table.tex and the Word table."""
    columns = one_at_a_time(audit)
    base_col, departures = columns[0], columns[1:]
    changes = max((len(cols) for _, cols, _ in departures), default=1)
    change_text = "one setting" if changes == 1 else \
        f"{changes} settings (no estimated variant changes only one)"
    # balanced panels: 6 departures with room for 4 per panel give 3 + 3, not 4 + 2
    room = max(per_panel - 1, 1)
    n_panels = max(1, -(-len(departures) // room))
    step = max(1, -(-len(departures) // n_panels))
    panels = [[base_col] + departures[i:i + step] for i in range(0, len(departures), step)] \
        or [[base_col]]
    return panels, change_text


def se_kinds(audit: AuditFolder, variants) -> list[str]:
    """The standard-error labels of ``variants`` (each once, in order)."""
    vrow = audit.variants.set_index("variant")
    kinds = []
    for vid in variants:
        kind = str(vrow.loc[vid, "std_error_kind"]) if "std_error_kind" in vrow.columns else ""
        try:
            kind = option_label(CovarianceKind, kind)
        except (ValueError, KeyError):
            continue
        if kind not in kinds:
            kinds.append(kind)
    return kinds


def se_note(audit: AuditFolder, shown, escape=lambda text: text) -> str:
    """'Standard errors in parentheses (kind).', or, when the shown columns mix kinds,
    which columns use which: 'Standard errors in parentheses: Windmeijer-corrected in
    (1), (2); cluster-robust (by unit) in (3).' (shared by table.tex and table.html)."""
    kinds = se_kinds(audit, shown)
    if len(kinds) > 1:  # say which columns use which kind
        numbers = {audit.base_variant: 1}
        for vid in shown:
            numbers.setdefault(vid, len(numbers) + 1)
        by_kind = {k: [] for k in kinds}
        for vid, n in numbers.items():
            kind = se_kinds(audit, [vid])
            if kind:
                by_kind[kind[0]].append(f"({n})")
        return ("Standard errors in parentheses: " + "; ".join(
            f"{escape(k)} in {', '.join(cols)}" for k, cols in by_kind.items() if cols) + ".")
    return (f"Standard errors in parentheses ({escape(kinds[0])})." if kinds
            else "Standard errors in parentheses.")


def render_latex(audit: AuditFolder, summary: AuditSummary | None = None, *,
                 per_panel: int = 5) -> str:
    """The table as LaTeX: one ``tabularx`` per panel, each exactly ``\textwidth``
    wide (so the panels line up and nothing overflows), terms named by their
    ``[labels]`` text, optional significance stars, and a note that states the
    standard errors, the test rows and the columns that fail their own tests."""
    s = summary or summarize(audit)
    panels, change_text = table_panels(audit, per_panel)
    width = max(len(p) for p in panels)  # every panel gets the same columns
    est = audit.estimates.set_index(["variant", "term"])
    vrow = audit.variants.set_index("variant")
    use_stars = bool(report_option(audit, "stars", False))
    names = term_labels(audit)

    def cell_est(vid, term):
        return estimate_cells(est, vid, term, use_stars, num, lambda m: f"$^{{{m}}}$")

    def row_name(term):
        return (tex_breakable(names[term]) if term in names
                else f"\\texttt{{{tex_breakable(term, long=14)}}}")

    has_diff = "diff_hansen_level_p" in vrow.columns
    diag_rows = diagnostic_rows(has_diff, "$p$", vrow.columns)
    shown_ids = [vid for panel in panels for vid, _, _ in panel]
    diag_rows = shown_diagnostic_rows(diag_rows, vrow, shown_ids)
    judged = (f"judged on the {s.n_acceptable} of {s.n_ok} estimated variants that pass "
              f"their specification tests" if s.has_acceptable
              else f"across all {s.n_ok} estimated variants")
    # in the full-width note a term needs no break points
    verdicts = "; ".join(f"{tex(names[t.term]) if t.term in names else chr(92) + 'texttt{' + tex(t.term) + '}'} "
                         f"{tex(t.verdict)}" for t in s.terms)
    failed = [row["variant"] for _, row in audit.variants.iterrows()
              if row["status"] != "ok"]
    se_text = se_note(audit, shown_ids, tex)
    note = (f"{se_text} Column (1) is the base model (variant "
            f"\\texttt{{{tex(audit.base_variant)}}}); each other column changes {change_text}. "
            + "; ".join([TEST_NOTES[c] for c in TEST_NOTES if c in {r[1] for r in diag_rows}]
                        + [tex(n) for c, _, n in STRENGTH_ROWS if n and c in {r[1] for r in diag_rows}])
            + ". ")
    if use_stars:
        # math-mode signs: the text-mode < and dagger come from the text-companion
        # font, which pdflatex renders as a bitmap (Type 3) font
        note += ("$^{*}$ $p < 0.10$, $^{**}$ $p < 0.05$, $^{***}$ $p < 0.01$. ")
    if any(vid in vrow.index and fails(vrow.loc[vid]) for vid in shown_ids):
        note += ("$^{\\dagger}$ The variant fails one of its own specification tests "
                 "(Hansen, AR(2), difference-in-Hansen or the underidentification test at "
                 "the audit's level) and does "
                 "not count toward the verdicts. ")
    note += (f"Verdicts ({judged}): {verdicts}. "
             f"Statistical robustness does not establish instrument validity, which rests "
             f"on economic reasoning.")
    n_failed = sum(1 for _, row in audit.variants.iterrows() if row["status"] == "failed")
    n_skipped = len(failed) - n_failed
    if n_failed:
        note += (f" {n_failed} variant{'s' if n_failed != 1 else ''} could not be estimated "
                 f"(reasons in variants.csv).")
    if n_skipped:
        note += (f" {n_skipped} combination{'s' if n_skipped != 1 else ''} of settings "
                 f"{'was' if n_skipped == 1 else 'were'} skipped (not identified or the same "
                 f"estimation as another; reasons in variants.csv).")
    breaks = float_breaks(len(panels), len(audit.focus), len(diag_rows),
                          note_lines(note))
    lines = [
        "% robustgmm: focus terms across the base model and one-setting departures.",
        "% Requires \\usepackage{booktabs} and \\usepackage{tabularx} in the preamble.",
    ]
    spec_cols = ("{>{\\raggedright\\arraybackslash}p{0.25\\textwidth}"
                 + "*{" + str(width) + "}{>{\\centering\\arraybackslash}X}}")
    number = 1
    failing = []
    for p, panel in enumerate(panels):
        k = len(panel)
        pad = [""] * (width - k)
        if p in breaks:  # a new float: the first holds the caption and label
            if p:
                lines += ["\\end{table}", ""]
            lines += ["\\begin{table}[htbp]", "\\centering", "\\small",
                      "\\setlength{\\tabcolsep}{3pt}"]
            if p:
                lines += ["\\addtocounter{table}{-1}",
                          "\\caption{Robustness of the estimates to one change at a time "
                          "(continued)}"]
            else:
                lines += ["\\caption{Robustness of the estimates to one change at a time}",
                          "\\label{tab:robustgmm}"]
        else:
            lines.append("\\medskip")
            lines.append("")
        lines.append("\\begin{tabularx}{\\textwidth}" + spec_cols)
        lines.append("\\toprule")
        # column numbers: the base is (1) in every panel; departures count on
        nums = ["(1)"] + [f"({number + 1 + i})" for i in range(k - 1)]
        number += k - 1
        marks = []
        for vid, _, _ in panel:
            bad = vid in vrow.index and fails(vrow.loc[vid])
            marks.append("$^{\\dagger}$" if bad else "")
            if bad and vid not in failing:
                failing.append(vid)
        lines.append(" & " + " & ".join(n + m for n, m in zip(nums, marks) ) + "".join(
            " & " for _ in pad) + " \\\\")
        # a number column holds about 9 characters of a header
        heads = ["base"] + [tex_breakable(", ".join(departure_label(c, x)
                                                    for c, x in zip(cols, values)), long=9)
                            for _, cols, values in panel[1:]]
        lines.append(" & " + " & ".join(heads + pad) + " \\\\")
        lines.append("\\midrule")
        for term in audit.focus:
            pairs = [cell_est(vid, term) for vid, _, _ in panel]
            lines.append(f"{row_name(term)} & " + " & ".join([a for a, _ in pairs] + pad)
                         + " \\\\")
            lines.append(" & " + " & ".join([b for _, b in pairs] + pad) + " \\\\")
        lines.append("\\midrule")
        for label, col, f in diag_rows:
            cells = [num(f(vrow.loc[vid, col])) for vid, _, _ in panel]
            lines.append(f"{label} & " + " & ".join(cells + pad) + " \\\\")
        lines.append("\\bottomrule")
        lines.append("\\end{tabularx}")
    lines += ["", "\\par\\smallskip",
              "\\begin{minipage}{\\textwidth}\\footnotesize", note, "\\end{minipage}",
              "\\end{table}", ""]
    return "\n".join(lines)
