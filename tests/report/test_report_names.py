"""Column names a researcher really has: dollar signs and very long names.

A name with ``$`` signs once crashed the report (matplotlib read it as a formula)
and ``fp$\\frac{1}{2}$`` printed a fraction in every figure title; a 312-character
column name made the figure file name too long for the file system. Each is checked
on a real (small) audit of a simulated panel, end to end through build_report.
"""
from __future__ import annotations

import io

import pytest
from matplotlib.figure import Figure

from helpers_audit import model_dict, write_panel
from robustgmm.audit import audit, write_audit
from robustgmm.modelfile import spec_from_dict
from robustgmm.report import build_report, read_audit_folder
from robustgmm.report.figures import mathtext_safe, plot_specification_curve, slug

DOLLAR = "sales_$m_vs_$bn"
FRACTION = r"fp$\frac{1}{2}$"
LONG = "x" * 40 + "_" + "very_long_column_name_" * 12 + "end"


def _audit_with_regressor(folder, name):
    path = write_panel(folder, n_units=40, n_periods=6)
    frame = __import__("pandas").read_csv(path).rename(columns={"w": name})
    frame.to_csv(path, index=False)
    d = model_dict({"form": ["per-period", "collapsed"]})
    d["model"]["regressors"][1]["name"] = name
    spec = spec_from_dict(d, base_dir=folder)
    out = folder / "out"
    write_audit(audit(spec, jobs=1), out)
    return out


@pytest.mark.parametrize("name", [DOLLAR, FRACTION], ids=["dollars", "fraction"])
def test_dollar_signs_are_text_not_math(tmp_path, name):
    out = _audit_with_regressor(tmp_path, name)
    paths = build_report(out, formats=("png", "svg"))
    assert (out / "report.html").exists() and paths
    # The figure title prints the name literally: matplotlib's own parser says the
    # escaped text is not math, and the title keeps both dollar signs.
    folder = read_audit_folder(out)
    fig = Figure()
    plot_specification_curve(fig, folder, f"{name}[t]")
    title = fig.axes[0]._left_title  # the figures put titles on the left
    shown, is_math = title._preprocess_math(title.get_text())
    assert not is_math and shown == f"Specification curve: {name}[t]"
    fig.savefig(io.BytesIO(), format="png")  # draws without a parse error


def test_mathtext_safe_escapes_every_dollar():
    assert mathtext_safe("a$b$c") == r"a\$b\$c"
    assert mathtext_safe("plain") == "plain"


def test_long_names_get_short_stable_file_names(tmp_path):
    term = f"{LONG}[t]"
    assert len(LONG) > 300
    name = slug(term)
    assert len(name) <= 60 and name == slug(term)
    # two long names with the same start still differ
    assert slug(term) != slug(LONG + "_other[t]")
    out = _audit_with_regressor(tmp_path, LONG)
    paths = build_report(out, formats=("png",))
    figure_names = [p.name for p in paths if p.parent.name == "figures"]
    assert figure_names and max(len(n) for n in figure_names) < 80
