"""Figures of the audit report, drawn from audit folders made by the real writer
(tests/report_fixture.py).

Checks: each plot function works for 1, 2 and 192 variants, returns what it was
given, and contains the artists it promises (one mark per estimated variant, the
reference lines at the audit's thresholds, the base model marked, the choice panel
with one row per setting value); nothing goes through pyplot's global state.
"""
from __future__ import annotations

import sys

import matplotlib
import numpy as np
import pytest
from matplotlib.collections import LineCollection, PathCollection
from matplotlib.figure import Figure
from matplotlib.image import AxesImage

from report_fixture import AR, FRAGILE, ROBUST, TRUTH
from robustgmm.report import figures
import robustgmm.report.figures.common  # noqa: F401  (figures.common in the tests)
from robustgmm.report.inputs import read_audit_folder

matplotlib.use("Agg")


@pytest.fixture(params=["one", "two", "many"])
def audit(request, audit_folder):
    return read_audit_folder(audit_folder(request.param))


def _n_ok(audit, term):
    return len(audit.term_estimates(term))


def _scatter_points(ax):
    return [c for c in ax.collections if isinstance(c, PathCollection)]


def _marks(ax):
    """The one scatter of variant marks (it carries the SVG tooltips)."""
    found = [c for c in _scatter_points(ax) if (c.get_gid() or "").startswith("robustgmm-marks")]
    assert len(found) == 1
    return found[0]


def test_no_pyplot_imported_by_report():
    # importing and drawing must not pull in pyplot (global figure manager)
    import subprocess
    code = ("import sys; import robustgmm.report as r; "
            "from robustgmm.report import figures; "
            "print('matplotlib.pyplot' in sys.modules)")
    out = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, check=True)
    assert out.stdout.strip() == "False"


def test_specification_curve(audit):
    n = _n_ok(audit, FRAGILE)
    fig = Figure()
    assert figures.plot_specification_curve(fig, audit, FRAGILE) is fig
    ax, ax_choice = fig.axes
    # confidence intervals: one vertical segment per estimated variant
    segs = [c for c in ax.collections if isinstance(c, LineCollection)]
    assert len(segs) == 1 and len(segs[0].get_segments()) == n
    points = _marks(ax)
    base = _scatter_points(ax)[_scatter_points(ax).index(points) + 1]
    assert len(points.get_offsets()) == n
    # the estimates are drawn in lanes (acceptable first), sorted within each lane
    y = np.asarray(points.get_offsets())[:, 1]
    lanes = figures.common.lane_positions(audit.term_estimates(FRAGILE))[2]
    assert np.all(np.diff(lanes) >= 0)
    for lane in set(lanes.tolist()):
        assert np.all(np.diff(y[lanes == lane]) >= 0)
    # the base model is ringed at its own estimate
    frame = audit.term_estimates(FRAGILE)
    base_est = frame.loc[frame["variant"] == audit.base_variant, "estimate"].iloc[0]
    assert np.asarray(base.get_offsets())[0, 1] == pytest.approx(base_est)
    # zero line and true value line
    hlines = [tuple(line.get_ydata()) for line in ax.get_lines()]
    assert (0.0, 0.0) in hlines and (TRUTH[FRAGILE], TRUTH[FRAGILE]) in hlines
    # choice panel: one y tick per (setting, value) pair
    # (only settings that vary among the variants drawn, each value once)
    frame = audit.term_estimates(FRAGILE)
    varied = [c for c in audit.setting_columns if frame[c].astype(str).nunique() > 1]
    expected_rows = sum(frame[c].astype(str).nunique() for c in (varied or audit.setting_columns))
    assert len(ax_choice.get_yticks()) == expected_rows
    # per-variant tick labels only up to the limit
    labels = [t.get_text() for t in ax_choice.get_xticklabels()]
    if n <= figures.MAX_TICK_LABELS:
        assert audit.base_variant in labels
    else:
        assert labels == []


def test_hansen_drift(audit):
    ax = Figure().add_subplot()
    assert figures.plot_hansen_drift(ax, audit) is ax
    ok = audit.ok_variants
    n_points = sum(len(c.get_offsets()) for c in _scatter_points(ax)[:-1])
    # one point per estimated variant with a Hansen test (none when exactly identified)
    assert n_points == int(ok["hansen_p"].notna().sum()) > 0
    ys = {line.get_ydata()[0] for line in ax.get_lines() if line.get_ydata()[0] == line.get_ydata()[1]}
    assert {0.05, 0.25} <= ys
    xs = {line.get_xdata()[0] for line in ax.get_lines() if line.get_xdata()[0] == line.get_xdata()[1]}
    # instruments = units: a line when it is inside the x range, else a note
    units = float(ok["units"].max())
    left, right = ax.get_xlim()
    if left <= units <= right:
        assert units in xs
    else:
        assert units not in xs
        assert any(f"instruments = units at {units:g}" in t.get_text() for t in ax.texts)
        assert ok["instruments"].max() <= right and ok["instruments"].min() >= left
    legend = [t.get_text() for t in ax.get_legend().get_texts()]
    if "equations" in audit.setting_columns:
        assert any("difference" in t for t in legend) and any("system" in t for t in legend)
    assert "base model" in legend


def test_ar_band(audit):
    ax = Figure().add_subplot()
    assert figures.plot_ar_band(ax, audit, AR) is ax
    n = _n_ok(audit, AR)
    assert len(_scatter_points(ax)[0].get_offsets()) == n
    # the band between the within and OLS values is drawn
    polys = [c for c in ax.collections if c.__class__.__name__ == "FillBetweenPolyCollection"
             or c.__class__.__name__ == "PolyCollection"]
    assert polys
    ys = np.concatenate([p.get_paths()[0].vertices[:, 1] for p in polys])
    base = audit.bounds[audit.bounds["is_base"] & (audit.bounds["term"] == AR)].iloc[0]
    assert ys.min() == pytest.approx(base["fe"]) and ys.max() == pytest.approx(base["ols"])


def test_diagnostics_matrix(audit):
    ax = Figure().add_subplot()
    assert figures.plot_diagnostics_matrix(ax, audit) is ax
    images = [c for c in ax.get_children() if isinstance(c, AxesImage)]
    assert len(images) == 1
    table = figures.diagnostics_table(audit)
    assert images[0].get_array().shape == (table.shape[1], len(audit.variants))
    assert [t.get_text() for t in ax.get_yticklabels()] == list(table.columns)


def test_diagnostics_table_states(audit_folder):
    audit = read_audit_folder(audit_folder("main"))
    table = figures.diagnostics_table(audit)
    v = audit.variants.set_index("variant")
    for vid, row in table.iterrows():
        if v.loc[vid, "status"] != "ok":
            assert (row == figures.NOT_ESTIMATED).all()
            continue
        # the states are the rules the verdict module wrote into "flags"
        fired = str(v.loc[vid, "flags"]).split(";")
        assert row["Hansen does not reject"] == (figures.FAIL if "hansen_rejects" in fired
                                                 else figures.PASS)
        assert row["Hansen p not suspiciously high"] == (
            figures.WARN if "hansen_p_high" in fired else figures.PASS)
        assert ("hansen_rejects" in fired) == (v.loc[vid, "hansen_p"] < 0.05)
        # a variant rejected only for underidentification must not show a green column
        ident = row["identified (KP), not weak (SW F)"]
        if not np.isfinite(v.loc[vid, "underid_p"]):
            assert np.isnan(ident)
        else:
            assert ident == (figures.FAIL if "underidentified" in fired else
                             figures.WARN if "weak_instruments" in fired else figures.PASS)


def test_render_figures_writes_every_format(tmp_path, audit_folder):
    audit = read_audit_folder(audit_folder("main"))
    made = figures.render_figures(audit, tmp_path / "a" / "figures")
    kinds = [f.kind for f in made]
    assert kinds.count("spec_curve") == len(audit.focus)
    assert kinds.count("ar_band") == 1 and "hansen_drift" in kinds and "diagnostics" in kinds
    for f in made:
        assert f.png.startswith(b"\x89PNG")
        assert {p.suffix for p in f.paths} == {".png", ".svg", ".pdf"}
        assert all(p.exists() and p.stat().st_size > 0 for p in f.paths)
    # deterministic: a second rendering writes the same bytes
    again = figures.render_figures(audit, tmp_path / "b")
    for f, g in zip(made, again):
        for p, q in zip(f.paths, g.paths):
            assert p.read_bytes() == q.read_bytes(), p.name


def test_slug_is_file_safe_and_unique_names(tmp_path, audit_folder):
    assert figures.slug("cash[t-1]") == "cash_t-1"
    assert figures.slug("<b>") == "b"
    audit = read_audit_folder(audit_folder("slug"))
    # "flour_price[t]" and "flour_price_[t]" share a slug; the file names must still differ
    assert len({figures.slug(t) for t in audit.focus}) < len(audit.focus)
    names = [f.name for f in figures.render_figures(audit, tmp_path / "a" / "figures",
                                                    formats=("png",))]
    assert len(names) == len(set(names))
    assert ROBUST in audit.focus


def test_variants_failing_a_test_are_drawn_hollow(audit_folder):
    audit = read_audit_folder(audit_folder("main"))
    frame = figures.common.lane_positions(audit.term_estimates(FRAGILE))[0]
    assert not frame["acceptable"].all() and frame["acceptable"].any()
    fig = figures.plot_specification_curve(Figure(), audit, FRAGILE)
    points = _marks(fig.axes[0])
    alpha = points.get_facecolors()[:, 3]
    np.testing.assert_array_equal(alpha > 0, frame["acceptable"].to_numpy())
    legend = [t.get_text() for t in fig.axes[0].get_legend().get_texts()]
    n_bad = int((~frame["acceptable"]).sum())
    assert f"fails a specification test ({n_bad})" in legend
    assert f"acceptable ({len(frame) - n_bad})" in legend
