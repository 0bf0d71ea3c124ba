"""The instrument-strength statistics are columns of the report's variant tables.

variants.csv holds, per variant, the Kleibergen & Paap (2006) rank test of
underidentification (``underid_p``, per equation, the rank Wald F) and the smallest
Sanderson & Windmeijer (2016) conditional F (``weak_f_min``, ``weak_f_term``). The
report must show them as numbers in every variant's row (HTML, Markdown, table.tex,
table.html), read from the file, with a caption that names each test and its source
and says that no single weak-instrument critical value applies to GMM with many
instruments (the F < 10 line is only the Staiger & Stock 1997 rule of thumb).
Real audit folders of tests/report_fixture.py ("main": difference and system GMM,
so every column has values; "all_failed": no variant estimated).
"""
from __future__ import annotations

import re
from html import unescape

from robustgmm.report import build_report, read_audit_folder
from robustgmm.report.context import build_context
from robustgmm.report.html import render_html
from robustgmm.report.markdown import esc, render_markdown
from robustgmm.report.summary import fmt, fmt_p

HEADERS = {"underid_p": "underid. p (KP), all instruments",
           "underid_p_transformed": "underid. p (KP), transformed eq.",
           "underid_p_level": "underid. p (KP), level eq.",
           "rk_f": "KP rk Wald F", "weak_f_min": "min. cond. F (SW)",
           "weak_f_term": "term of min. F"}


def _expected(row, col):
    if col == "weak_f_term":
        return "" if not isinstance(row[col], str) else row[col]
    return fmt_p(row[col]) if col.endswith("_p") or "_p_" in col else fmt(row[col], 2)


def test_strength_table_holds_every_variants_values(audit_folder):
    audit = read_audit_folder(audit_folder("main"))
    v = audit.variants
    # the fixture must exercise the table: values, n/a and a level equation
    assert v["underid_p"].notna().any() and v["underid_p_level"].notna().any()
    assert v["weak_f_min"].notna().any()
    ctx = build_context(audit, [])
    tables = {t["key"]: t for t in ctx["variant_tables"]}
    assert list(tables) == ["settings", "tests", "strength", "estimates"]
    table = tables["strength"]
    assert table["headers"] == ["variant"] + list(HEADERS.values())
    rows = {cells[0].sort: [c.text for c in cells[1:]] for _, _, _, cells in table["rows"]}
    for _, r in v.iterrows():
        assert rows[r["variant"]] == [_expected(r, c) for c in HEADERS], r["variant"]
    # the strength columns left the tests table
    assert not set(HEADERS.values()) & set(tables["tests"]["headers"])


def test_caption_names_the_tests_their_sources_and_no_critical_value(audit_folder):
    audit = read_audit_folder(audit_folder("main"))
    ctx = build_context(audit, [])
    note = next(t["note"] for t in ctx["variant_tables"] if t["key"] == "strength")
    for words in ("Kleibergen & Paap (2006)", "Sanderson & Windmeijer (2016)",
                  "underidentification", "No single critical value",
                  "many instruments", "Staiger & Stock (1997), common practice",
                  f"below {audit.verdict.thresholds['weak_f']:g}", "unavailable_tests"):
        assert words in note, words
    html = unescape(render_html(ctx))
    assert note in html
    body = html.split('<table class="sortable variants-strength">')[1].split("</table>")[0]
    base = re.search(r'<tr[^>]*class="ok base">(.*?)</tr>', body, re.S).group(1)
    row = audit.base_row()
    assert fmt_p(row["underid_p"]) in base and fmt(row["weak_f_min"], 2) in base
    md = render_markdown(ctx)
    header = next(ln for ln in md.splitlines() if ln.startswith("| variant |"))
    assert " | ".join(esc(h) for h in HEADERS.values()) in header
    base_md = next(ln for ln in md.splitlines() if ln.startswith(f"| **{audit.base_variant}"))
    assert esc(fmt_p(row["underid_p"])) in base_md and fmt(row["weak_f_min"], 2) in base_md
    assert "**Instrument strength.** " in md and "Sanderson & Windmeijer (2016)" in md


def test_journal_tables_have_strength_rows_with_their_notes(writable_folder):
    folder = writable_folder("main")
    build_report(folder, formats=("png",))
    audit = read_audit_folder(folder)
    row = audit.base_row()
    tex = (folder / "table.tex").read_text(encoding="utf-8")
    lines = {ln.split(" & ")[0]: ln for ln in tex.splitlines() if " & " in ln}
    # the base model is column (1) of every panel
    assert lines["Underid. $p$ (KP)"].split(" & ")[1] == fmt_p(row["underid_p"]).replace(
        "<", "$<$")
    assert lines["Min. cond. F (SW)"].split(" & ")[1] == fmt(row["weak_f_min"], 2)
    # the base model is system GMM: each equation's rank test has its row
    for label, col in (("Underid. $p$, transformed eq.", "underid_p_transformed"),
                       ("Underid. $p$, level eq.", "underid_p_level")):
        assert lines[label].split(" & ")[1] == fmt_p(row[col]).replace("<", "$<$"), label
    assert "one equation's instruments" in tex
    assert "Kleibergen \\& Paap (2006)" in tex and "Sanderson \\& Windmeijer (2016)" in tex
    assert "no single critical value" in tex
    word = unescape((folder / "table.html").read_text(encoding="utf-8"))
    assert "Underid. p (KP)" in word and "Min. cond. F (SW)" in word
    assert "Underid. p, level eq." in word and "Underid. p, transformed eq." in word
    assert "Sanderson & Windmeijer (2016)" in word and "no single critical value" in word


def test_per_equation_rank_tests_only_where_a_column_has_a_level_equation(audit_folder):
    """In difference GMM the transformed equation's rank test is the whole system's
    (robustgmm.audit: underid_p_transformed), so a table of difference-GMM columns
    has no per-equation rows; with a system column both appear."""
    from robustgmm.report.latex import diagnostic_rows, shown_diagnostic_rows
    audit = read_audit_folder(audit_folder("main"))
    vrow = audit.variants.set_index("variant")
    ok = vrow[vrow["status"] == "ok"]
    difference = list(ok.index[ok["equations"] == "difference"])
    system = list(ok.index[ok["equations"] == "system"])
    assert difference and system
    rows = diagnostic_rows(True, "p", vrow.columns)

    def columns(shown):
        return [r[1] for r in shown_diagnostic_rows(rows, vrow, shown)]
    assert "underid_p" in columns(difference)
    assert not {"underid_p_transformed", "underid_p_level"} & set(columns(difference))
    assert {"underid_p_transformed", "underid_p_level"} <= set(columns(difference + system))


def test_no_strength_table_when_no_variant_has_the_statistics(audit_folder):
    audit = read_audit_folder(audit_folder("all_failed"))
    assert audit.variants["underid_p"].isna().all()
    ctx = build_context(audit, [])
    assert "strength" not in [t["key"] for t in ctx["variant_tables"]]
    assert ctx["strength_note"] == ""
    assert "Instrument strength" not in render_markdown(ctx)
