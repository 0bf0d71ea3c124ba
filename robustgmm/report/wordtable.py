"""table.html: the table of table.tex as a plain HTML table that Word and LibreOffice
open (File > Open, or copy and paste) as an editable table.

Why HTML and not .docx: a .docx writer (python-docx) would add a compiled XML
library as a dependency for one file, while both word processors read a plain HTML
table directly. So this file holds nothing they cannot read: no script, no classes
or style sheet, only inline styles they understand (Times New Roman, borders above
and below the header and the body, centred number columns), one ``<table>`` per
panel, and the same numbers, labels, stars, marks and note as table.tex (the panels
and marks come from :mod:`.latex`, the numbers from :mod:`.summary`).
"""
from __future__ import annotations

from html import escape

from .inputs import AuditFolder
from .labels import report_option, term_labels
from .latex import (departure_label, diagnostic_rows, estimate_cells, fails, se_note,
                    shown_diagnostic_rows, table_panels)
from .summary import STRENGTH_ROWS, AuditSummary, summarize

FONT = "font-family:'Times New Roman',serif;font-size:10pt"
RULE = "border-top:1px solid #000"
THICK = "border-top:1.5px solid #000"
CELL = "padding:1pt 6pt"
TABLE_PX, LABEL_PX = 640, 160  # table and label-column widths (a quarter, as in table.tex)


def _td(text: str, *, left=False, style="") -> str:
    align = "left" if left else "center"
    return f'<td style="{CELL};text-align:{align};{style}">{text}</td>'


def render_word_table(audit: AuditFolder, summary: AuditSummary | None = None, *,
                      per_panel: int = 5) -> str:
    s = summary or summarize(audit)
    panels, change_text = table_panels(audit, per_panel)
    width = max(len(p) for p in panels)
    est = audit.estimates.set_index(["variant", "term"])
    vrow = audit.variants.set_index("variant")
    names = term_labels(audit)
    use_stars = bool(report_option(audit, "stars", False))
    has_diff = "diff_hansen_level_p" in vrow.columns
    diag = diagnostic_rows(has_diff, "p", vrow.columns)
    shown = [vid for panel in panels for vid, _, _ in panel]
    # as in table.tex: a strength row that is n/a in every column says nothing
    strength = {c for c, _, _ in STRENGTH_ROWS}
    kept = shown_diagnostic_rows([r for r in diag if r[1] in strength], vrow, shown)
    diag = [r for r in diag if r[1] not in strength or r in kept]

    def cells(vid, term):
        return estimate_cells(est, vid, term, use_stars, escape, lambda m: f"<sup>{m}</sup>")

    out = ['<!DOCTYPE html>', '<html lang="en"><head><meta charset="utf-8">',
           '<title>Robustness of the estimates to one change at a time</title></head>',
           f'<body style="{FONT}">',
           '<p style="font-weight:bold">Robustness of the estimates to one change at a time</p>']
    number, failing = 1, []
    for panel in panels:
        pad = [""] * (width - len(panel))
        nums = ["(1)"] + [f"({number + 1 + i})" for i in range(len(panel) - 1)]
        number += len(panel) - 1
        for vid, _, _ in panel:
            if vid in vrow.index and fails(vrow.loc[vid]) and vid not in failing:
                failing.append(vid)
        marks = ["<sup>&#8224;</sup>" if vid in failing else "" for vid, _, _ in panel]
        heads = ["base"] + [escape(", ".join(departure_label(c, x) for c, x in zip(cols, vals)))
                            for _, cols, vals in panel[1:]]
        # fixed widths in HTML attributes (the word processors ignore CSS widths), the
        # same for every panel, so the panels line up as in table.tex
        out.append(f'<table width="{TABLE_PX}" style="border-collapse:collapse;{FONT};'
                   f'margin-bottom:8pt">' + f'<col width="{LABEL_PX}">' + "".join(
                       f'<col width="{(TABLE_PX - LABEL_PX) // width}">' for _ in range(width)))
        out.append("<tr>" + _td("", left=True, style=THICK) + "".join(
            _td(n + m, style=THICK) for n, m in zip(nums + pad, marks + pad)) + "</tr>")
        out.append("<tr>" + _td("", left=True) + "".join(_td(h) for h in heads + pad) + "</tr>")
        first = True
        for term in audit.focus:
            pair = [cells(vid, term) for vid, _, _ in panel]
            style = RULE if first else ""
            first = False
            out.append("<tr>" + _td(escape(names.get(term, term)), left=True, style=style)
                       + "".join(_td(a, style=style) for a, _ in pair)
                       + "".join(_td("", style=style) for _ in pad) + "</tr>")
            out.append("<tr>" + _td("", left=True) + "".join(_td(b) for _, b in pair)
                       + "".join(_td("") for _ in pad) + "</tr>")
        for k, (label, col, f) in enumerate(diag):
            style = RULE if k == 0 else ""
            out.append("<tr>" + _td(escape(label), left=True, style=style) + "".join(
                _td(escape(f(vrow.loc[vid, col])), style=style) for vid, _, _ in panel)
                + "".join(_td("", style=style) for _ in pad) + "</tr>")
        out.append(f'<tr><td colspan="{width + 1}" style="{THICK}"></td></tr>')
        out.append("</table>")
    # which columns use which kind, as in table.tex (not "(Windmeijer-corrected,
    # cluster-robust (by unit))", which leaves the reader to guess)
    note = [se_note(audit, [vid for panel in panels for vid, _, _ in panel]),
            f"Column (1) is the base model (variant {audit.base_variant}); each other column "
            f"changes {change_text}.",
            "Hansen p: the J test of the over-identifying restrictions with the robust weight "
            "(Hansen 1982); Sargan p: the same restrictions with the homoskedastic weight "
            "(Sargan 1958), valid only if the errors are homoskedastic and n/a in system "
            "GMM; AR(1), AR(2) p: tests for first- and second-order serial "
            "correlation of the differenced errors (Arellano & Bond 1991), of which AR(2) "
            "must not reject" + ("; difference-in-Hansen p: validity of the level-equation "
                                 "instruments of system GMM (Blundell & Bond 1998)"
                                 if has_diff else "")
            + "".join("; " + n for c, _, n in STRENGTH_ROWS if n and c in {r[1] for r in diag})
            + "."]
    if use_stars:
        note.append("* p < 0.10, ** p < 0.05, *** p < 0.01.")
    if failing:
        note.append("\u2020 The variant fails one of its own specification tests (Hansen, "
                    "AR(2) or difference-in-Hansen at the audit's level) and does not count "
                    "toward the verdicts.")
    judged = (f"judged on the {s.n_acceptable} of {s.n_ok} estimated variants that pass "
              f"their specification tests" if s.has_acceptable
              else f"across all {s.n_ok} estimated variants")
    note.append(f"Verdicts ({judged}): " + "; ".join(
        f"{names.get(t.term, t.term)} {t.verdict}" for t in s.terms) + ".")
    note.append("Statistical robustness does not establish instrument validity, which rests "
                "on economic reasoning.")
    out.append(f'<p style="{FONT};font-size:9pt">' + escape(" ".join(note)) + "</p>")
    out += ["</body></html>", ""]
    return "\n".join(out)
