"""table.html: the table of table.tex as plain HTML that Word and LibreOffice open.

Checked: it parses, holds nothing a word processor cannot read (no script, no style
sheet, no classes, no external reference), escapes user text, and shows the same
columns, estimates, standard errors, labels, stars and note as table.tex; and, where
LibreOffice is installed (.ci/run installs its Writer), LibreOffice opens it as one
real table per panel, of one width, with every number in its cell.
"""
from __future__ import annotations

import json
import re
import shutil
import subprocess
import zipfile
from html import unescape
from html.parser import HTMLParser

import pytest

from report_fixture import FRAGILE, ROBUST
from robustgmm.report import build_report, read_audit_folder
from robustgmm.report.latex import table_panels
from robustgmm.report.wordtable import render_word_table
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


SOFFICE = next((shutil.which(n) for n in ("soffice", "libreoffice") if shutil.which(n)), None)


@pytest.mark.skipif(SOFFICE is None, reason="LibreOffice is not installed")
def test_libreoffice_opens_the_word_table_as_real_tables(audit_folder, tmp_path):
    # Opened in LibreOffice Writer (its HTML import) and saved as .docx, as a user who
    # pastes the table into a Word document would: one Word table per panel, every
    # row with the label column plus one cell per column, panels of one width, and
    # every shown estimate and standard error in its cell.
    folder = tmp_path / "many"
    shutil.copytree(audit_folder("many"), folder)
    audit = read_audit_folder(folder)
    (folder / "table.html").write_text(render_word_table(audit), encoding="utf-8")
    subprocess.run([SOFFICE, "--headless", f"-env:UserInstallation={(tmp_path / 'lo').as_uri()}",
                    "--infilter=HTML (StarWriter)", "--convert-to", "docx:MS Word 2007 XML",
                    "--outdir", str(tmp_path), str(folder / "table.html")],
                   check=True, capture_output=True, timeout=300)
    xml = zipfile.ZipFile(tmp_path / "table.docx").read("word/document.xml").decode("utf-8")
    tables = re.findall(r"<w:tbl>.*?</w:tbl>", xml, re.S)
    panels, _ = table_panels(audit)
    assert len(tables) == len(panels)
    width = max(len(p) for p in panels)
    widths = []
    est = audit.estimates.set_index(["variant", "term"])
    for table, panel in zip(tables, panels):
        rows = [[unescape("".join(re.findall(r"<w:t(?: [^>]*)?>([^<]*)</w:t>", cell)))
                 for cell in re.findall(r"<w:tc>.*?</w:tc>", row, re.S)]
                for row in re.findall(r"<w:tr[ >].*?</w:tr>", table, re.S)]
        assert all(len(r) == width + 1 for r in rows[:-1]), [len(r) for r in rows]
        widths.append(sum(int(w) for w in re.findall(r'<w:gridCol w:w="(\d+)"', table)))
        for term in audit.focus:
            label = next(i for i, r in enumerate(rows) if r[0] == term)
            for k, (vid, _, _) in enumerate(panel, start=1):
                e = est.loc[(vid, term)]
                assert rows[label][k].startswith(fmt(e["estimate"])), (vid, term, rows[label])
                assert rows[label + 1][k] == f"({fmt(e['std_error'])})", (vid, term)
    assert max(widths) - min(widths) <= 0.01 * max(widths), widths
