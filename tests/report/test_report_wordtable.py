"""table.html: the table of table.tex as plain HTML that Word and LibreOffice open.

Checked: it parses, holds nothing a word processor cannot read (no script, no style
sheet, no classes, no external reference), escapes user text, and shows the same
columns, estimates, standard errors, labels, stars and note as table.tex.
"""
from __future__ import annotations

import json
from html.parser import HTMLParser

from report_fixture import FRAGILE, ROBUST
from robustgmm.report import build_report, read_audit_folder
from robustgmm.report.latex import table_panels
from robustgmm.report.summary import fmt


class _Parse(HTMLParser):
    def __init__(self):
        super().__init__()
        self.tags, self.text = [], []

    def handle_starttag(self, tag, attrs):
        self.tags.append((tag, dict(attrs)))

    def handle_data(self, data):
        self.text.append(data)


def test_word_table_is_plain_and_complete(writable_folder):
    folder = writable_folder("main")
    manifest = json.loads((folder / "manifest.json").read_text())
    manifest["spec"]["labels"] = {ROBUST: "Flour price"}
    manifest["spec"]["report"] = {"stars": True}
    (folder / "manifest.json").write_text(json.dumps(manifest))
    build_report(folder, formats=("png",))
    html = (folder / "table.html").read_text(encoding="utf-8")
    parsed = _Parse()
    parsed.feed(html)
    tags = {t for t, _ in parsed.tags}
    assert "table" in tags and not tags & {"script", "style", "link", "img", "iframe"}
    assert not any("class" in a or "href" in a or "src" in a for _, a in parsed.tags)
    text = " ".join(parsed.text)
    assert "<script>" not in html.replace("&lt;script&gt;", "")  # user markup escaped
    assert FRAGILE in text and "Flour price" in text and ROBUST not in text.split("Verdicts")[0]
    audit = read_audit_folder(folder)
    panels, _ = table_panels(audit)
    est = audit.estimates.set_index(["variant", "term"])
    for panel in panels:
        for vid, _, _ in panel:
            e = est.loc[(vid, FRAGILE)]
            assert fmt(e["estimate"]) in text and f"({fmt(e['std_error'])})" in text
    assert "Standard errors in parentheses" in text and "Hansen p" in text
    assert "* p < 0.10" in text
    assert "does not establish instrument validity" in text
