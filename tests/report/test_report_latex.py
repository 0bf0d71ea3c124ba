"""table.tex is paste-ready: it compiles without overflow, names terms by the model
file's [labels], can carry significance stars, states its standard errors and test
rows, and marks the columns that fail their own tests.

Before: the demo's table.tex compiled with "Overfull \\hbox (63.8pt)", its two
panels had different widths, terms were in typewriter with no way to label them,
there were no stars, no difference-in-Hansen row, no word on the standard errors and
nothing marked a failing column. The compile test runs pdflatex on a minimal article
(skipped where pdflatex is not installed; .ci/run installs a small TeX set).
"""
from __future__ import annotations

import json
import re
import shutil
import subprocess
from pathlib import Path

import pytest

from helpers_audit import model_dict, write_panel
from report_fixture import FRAGILE, ROBUST
from robustgmm.audit import audit as run_audit, write_audit
from robustgmm.modelfile import spec_from_dict
from robustgmm.report import build_report, read_audit_folder
from robustgmm.report.latex import render_latex, stars

ROOT = Path(__file__).resolve().parents[2]
PDFLATEX = shutil.which("pdflatex")
PDFFONTS = shutil.which("pdffonts")
ARTICLE = ("\\documentclass{article}\n\\usepackage{booktabs}\n\\usepackage{tabularx}\n"
           "\\begin{document}\n\\input{table.tex}\n\\end{document}\n")


def _with_report_keys(folder: Path, labels=None, stars_on=False) -> Path:
    manifest = json.loads((folder / "manifest.json").read_text())
    spec = manifest.setdefault("spec", {})
    if labels:
        spec["labels"] = labels
    if stars_on:
        spec["report"] = {"stars": True}
    (folder / "manifest.json").write_text(json.dumps(manifest))
    return folder


def compile_log(tex: str, tmp: Path) -> str:
    tmp.mkdir(parents=True, exist_ok=True)
    (tmp / "table.tex").write_text(tex, encoding="utf-8")
    (tmp / "doc.tex").write_text(ARTICLE)
    run = subprocess.run([PDFLATEX, "-interaction=nonstopmode", "-halt-on-error", "doc.tex"],
                         cwd=tmp, capture_output=True, text=True, timeout=180)
    log = (tmp / "doc.log").read_text(errors="replace")
    assert run.returncode == 0, log[-2000:]
    return log


@pytest.mark.skipif(PDFLATEX is None, reason="pdflatex is not installed")
@pytest.mark.parametrize("case", ["demo", "many", "three_hundred", "labelled", "tall"])
def test_table_compiles_without_overflow(tmp_path, writable_folder, case):
    if case == "demo":
        tex = (ROOT / "reports" / "demo" / "table.tex").read_text()
    else:
        folder = writable_folder("main" if case == "labelled" else case)
        if case == "tall":  # four focus terms with stars: two floats, each fits the page
            _with_report_keys(folder, stars_on=True)
        if case == "labelled":
            _with_report_keys(folder, {ROBUST: "Leverage of the firm (book value)",
                                       FRAGILE: "Wage bill & bonus, 100% of $ paid"},
                              stars_on=True)
        tex = render_latex(read_audit_folder(folder))
    log = compile_log(tex, tmp_path / "tex")
    assert "Overfull \\hbox" not in log, re.findall(r"Overfull \\hbox.*", log)
    # a float taller than the page is placed alone and runs into the footer: the
    # 192-variant table with four focus terms did ("Float too large for page by 55pt")
    assert "Float too large" not in log, re.findall(r"Float too large.*", log)
    if PDFFONTS:  # text-mode < and dagger once pulled in a bitmap (Type 3) font
        fonts = subprocess.run([PDFFONTS, str(tmp_path / "tex" / "doc.pdf")], check=True,
                               capture_output=True, text=True).stdout
        assert "Type 3" not in fonts, fonts


def test_panels_have_one_width_and_fit_the_text(audit_folder):
    tex = render_latex(read_audit_folder(audit_folder("many")))
    specs = re.findall(r"\\begin\{tabularx\}\{\\textwidth\}(.*)", tex)
    assert len(specs) >= 2 and len(set(specs)) == 1


def test_labels_stars_note_and_failing_columns(writable_folder):
    folder = writable_folder("main")
    plain = render_latex(read_audit_folder(folder))
    assert "$^{*" not in plain  # no stars unless asked
    _with_report_keys(folder, {ROBUST: "Leverage"}, stars_on=True)
    audit = read_audit_folder(folder)
    tex = render_latex(audit)
    assert "Leverage &" in tex and "\\texttt{flour\\_price[t]}" not in tex
    est = audit.estimates.set_index(["variant", "term"])
    p = float(est.loc[(audit.base_variant, ROBUST), "p_value"])
    row = next(line for line in tex.splitlines() if line.startswith("Leverage &"))
    first = row.split("&")[1]
    assert (stars(p) in first) if stars(p) else "$^{" not in first
    assert "$p < 0.10$" in tex and "$p < 0.01$" in tex
    # the note names the tests and the difference-in-Hansen row is there when written
    assert "Hansen \\textit{p}: the \\textit{J} test" in tex and "Sargan" in tex
    if "diff_hansen_level_p" in audit.variants.columns:
        assert "Diff.-in-Hansen $p$ &" in tex
    # a shown column whose variant fails its own tests is marked with a dagger
    failing = audit.variants[(audit.variants["status"] == "ok") & ~audit.variants["acceptable"]]
    shown = re.findall(r"\((\d+)\)(\$\^\{\\dagger\}\$)?", tex)
    if not failing.empty and any(m for _, m in shown):
        assert "does not count toward the verdicts" in tex


def test_stars_follow_the_stated_convention():
    assert stars(0.001) == "***" and stars(0.03) == "**" and stars(0.07) == "*"
    assert stars(0.2) == "" and stars(float("nan")) == ""


def test_labels_from_the_model_file_reach_every_document(tmp_path):
    write_panel(tmp_path, n_units=40, n_periods=6)
    d = model_dict({"form": ["per-period", "collapsed"]})
    d["labels"] = {"x[t]": "Leverage", "y[t-1]": "Lagged outcome"}
    d["report"] = {"stars": True}
    out = tmp_path / "out"
    write_audit(run_audit(spec_from_dict(d, base_dir=tmp_path), jobs=1), out)
    build_report(out, formats=("svg",))
    assert "Leverage &" in (out / "table.tex").read_text()
    html = (out / "report.html").read_text()
    assert "Leverage <code>(x[t])</code>" in html
    md = (out / "report.md").read_text()
    assert "### Leverage (`x[t]`): **" in md  # the verdict heading
    assert "## What drives each estimate" not in md or "### Leverage (`x[t]`)\n" in md
    assert "Lagged outcome (`y[t-1]`)" in md
    referee = " ".join((out / "referee.txt").read_text().split())
    assert "The coefficient on Leverage (x[t]) is" in referee
    assert "The autoregressive coefficient Lagged outcome (y[t-1]) lies" in referee
    fig_titles = []
    from matplotlib.figure import Figure
    from robustgmm.report.figures import plot_specification_curve
    fig = plot_specification_curve(Figure(), read_audit_folder(out), "x[t]")
    fig_titles.append(fig.axes[0].get_title(loc="left"))
    assert fig_titles == ["Specification curve: Leverage (x[t])"]
