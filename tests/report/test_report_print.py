"""The demo report printed to PDF loses nothing.

Printing report.html once cut the wide variants table at the page edge: no
"(s.e.)" column survived. Here the committed demo report (reports/demo, which
tests/report/test_demo.py keeps current) is printed with headless Chromium and the
PDF's text, read back with pdftotext, must hold every variant id, every focus-term
estimate column header and every estimate with its standard error, in the row of its
variant. Skipped where Chromium or pdftotext is not installed (.ci/run installs both).
"""
from __future__ import annotations

import shutil
import subprocess
from pathlib import Path

import pytest

from robustgmm.report import read_audit_folder
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


@pytest.fixture(scope="module")
def printed(tmp_path_factory):
    tmp = tmp_path_factory.mktemp("print")
    pdf = tmp / "report.pdf"
    print_to_pdf(DEMO / "report.html", pdf, tmp / "profile")
    return pdf_lines(pdf)


def test_every_variant_id_is_printed(printed):
    audit = read_audit_folder(DEMO)
    text = "\n".join(printed)
    missing = [v for v in audit.variants["variant"] if str(v) not in text]
    assert not missing, f"variant ids not in the printed report: {missing[:10]}"


def test_every_estimate_header_and_standard_error_is_printed(printed):
    audit = read_audit_folder(DEMO)
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


def test_sections_come_in_a_referee_order(printed):
    # section headings are lines of their own; the first line that starts with each
    order = ["Verdict per focus term", "Base model (variant", "Paragraphs for a referee",
             "Figures", "Variants", "Rules, sources and thresholds", "Provenance"]
    def heading(line, h):  # a one-word heading is the whole line
        return line == h if " " not in h else line.startswith(h)

    found = [next((i for i, line in enumerate(printed) if heading(line, h)), -1)
             for h in order]
    assert all(i >= 0 for i in found), dict(zip(order, found))
    assert found == sorted(found), dict(zip(order, found))
