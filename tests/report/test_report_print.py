"""The demo report and a 192-variant report printed to PDF lose nothing.

Printing report.html once cut the wide variants table at the page edge: no
"(s.e.)" column survived, and in a 192-variant report the table stopped at
"diff-in-Hansen". Here the committed demo report (reports/demo, which
tests/report/test_demo.py keeps current) and the report of the real 192-variant
audit "many" (tests/report_fixture.py, with failed and rejected variants) are
printed with headless Chromium and the PDF's text, read back with pdftotext, must
hold every variant id, every focus-term estimate column header and every estimate
with its standard error, in the row of its variant. On screen (a 1280-pixel window)
no table may need horizontal scrolling. Skipped where Chromium or pdftotext is not
installed (.ci/run installs both).
"""
from __future__ import annotations

import shutil
import subprocess
from pathlib import Path

import pytest

from robustgmm.report import build_report, read_audit_folder
from robustgmm.report.summary import fmt

ROOT = Path(__file__).resolve().parents[2]
DEMO = ROOT / "reports" / "demo"

CHROMIUM = next((shutil.which(n) for n in ("chromium", "chromium-browser", "google-chrome")
                 if shutil.which(n)), None)
PDFTOTEXT = shutil.which("pdftotext")

pytestmark = pytest.mark.skipif(CHROMIUM is None or PDFTOTEXT is None,
                                reason="headless Chromium and pdftotext are not installed")


def print_to_pdf(html: Path, pdf: Path, profile: Path) -> None:
    """Print ``html`` to ``pdf`` as a reader's browser would (A4, no header/footer)."""
    subprocess.run([CHROMIUM, "--headless", "--no-sandbox", "--disable-gpu",
                    "--disable-quic", "--no-first-run", "--disable-background-networking",
                    "--disable-component-update", "--disable-sync",
                    f"--user-data-dir={profile}", "--no-pdf-header-footer",
                    f"--print-to-pdf={pdf}", html.resolve().as_uri()],
                   check=True, capture_output=True, timeout=180)
    assert pdf.exists() and pdf.stat().st_size > 0


def pdf_lines(pdf: Path) -> list[str]:
    out = subprocess.run([PDFTOTEXT, "-layout", str(pdf), "-"], check=True,
                         capture_output=True, text=True, timeout=60)
    return [" ".join(line.split()) for line in out.stdout.splitlines()]


@pytest.fixture(scope="module", params=["demo", "many"])
def report(request, tmp_path_factory, audit_folder):
    """(folder, printed lines) of the demo report or of the 192-variant audit."""
    tmp = tmp_path_factory.mktemp(f"print_{request.param}")
    if request.param == "demo":
        folder = DEMO
    else:
        folder = tmp / "many"
        shutil.copytree(audit_folder("many"), folder)
        build_report(folder, formats=("png",))
    pdf = tmp / "report.pdf"
    print_to_pdf(folder / "report.html", pdf, tmp / "profile")
    return folder, pdf_lines(pdf)


def test_every_variant_id_is_printed(report):
    folder, printed = report
    audit = read_audit_folder(folder)
    text = "\n".join(printed)
    missing = [v for v in audit.variants["variant"] if str(v) not in text]
    assert not missing, f"variant ids not in the printed report: {missing[:10]}"


def test_every_estimate_header_and_standard_error_is_printed(report):
    folder, printed = report
    audit = read_audit_folder(folder)
    text = "\n".join(printed)
    for term in audit.focus:
        assert f"{term} (s.e.)" in text, f"column header of {term} not printed"
    est = audit.estimates.set_index(["variant", "term"])
    missing = []
    for vid in audit.ok_variants["variant"]:
        rows = [line for line in printed if line.startswith(str(vid))]
        cells = [f"{fmt(est.loc[(vid, t), 'estimate'])} ({fmt(est.loc[(vid, t), 'std_error'])})"
                 for t in audit.focus if (vid, t) in est.index]
        if not any(all(c in line for c in cells) for line in rows):
            missing.append(vid)
    assert not missing, f"estimates or standard errors cut off for {missing[:10]}"


def test_sections_come_in_a_referee_order(report):
    # section headings are lines of their own; the first line that starts with each:
    # the base-model table right after the verdicts, what drives each estimate before
    # the figures, provenance last
    _, printed = report
    order = ["Verdict per focus term", "Base model (variant", "What drives each estimate",
             "Paragraphs for a referee", "Figures", "Variants",
             "Rules, sources and thresholds", "Provenance"]
    def heading(line, h):  # a one-word heading is the whole line
        return line == h if " " not in h else line.startswith(h)

    found = [next((i for i, line in enumerate(printed) if heading(line, h)), -1)
             for h in order]
    assert all(i >= 0 for i in found), dict(zip(order, found))
    assert found == sorted(found), dict(zip(order, found))


MEASURE = """<script>
window.addEventListener("load", function () {
  var wide = [];
  document.querySelectorAll(".tablewrap").forEach(function (w) {
    if (w.scrollWidth > w.clientWidth + 1) {
      var t = w.querySelector("table");
      wide.push((t.className || "table") + " " + w.scrollWidth + ">" + w.clientWidth);
    }
  });
  var out = document.createElement("pre"); out.id = "robustgmm-measure";
  out.textContent = JSON.stringify({page: document.documentElement.scrollWidth,
                                    window: window.innerWidth, wide: wide});
  document.body.appendChild(out);
});
</script>"""


def test_no_table_needs_horizontal_scrolling_on_screen(report, tmp_path):
    # the report as a browser lays it out in a 1280-pixel window, measured in the page
    import json
    import re
    folder, _ = report
    page = tmp_path / "measure.html"
    page.write_text((folder / "report.html").read_text(encoding="utf-8").replace(
        "</body>", MEASURE + "</body>"), encoding="utf-8")
    run = subprocess.run([CHROMIUM, "--headless", "--no-sandbox", "--disable-gpu",
                          "--no-first-run", "--disable-background-networking",
                          "--disable-component-update", "--disable-sync",
                          f"--user-data-dir={tmp_path / 'profile'}", "--window-size=1280,900",
                          "--virtual-time-budget=5000", "--dump-dom", page.as_uri()],
                         check=True, capture_output=True, text=True, timeout=180)
    found = re.search(r'<pre id="robustgmm-measure">(.*?)</pre>', run.stdout)
    assert found, run.stdout[-500:]
    measured = json.loads(found.group(1).replace("&gt;", ">"))
    assert measured["page"] <= measured["window"], measured
    assert not measured["wide"], measured["wide"]
