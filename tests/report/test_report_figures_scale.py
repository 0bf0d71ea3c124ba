"""Every figure stays readable from 3 to 300 variants.

Each figure of the report is drawn (at the size the report uses) for 3, 48 and 300
variants of real audit folders (tests/report_fixture.py: "three", "forty_eight",
"three_hundred"; the last has skipped variants too), and checked the way
a reader would look at it: one mark per variant, a legend that names what is drawn
(with the counts of each lane), and no text (title, tick label, axis label, legend,
lane heading) lying on a plotting area or on another text — matplotlib's own window
extents of the drawn texts decide. Then the axis rules: zero only when near the
data, long intervals clipped and said so, the Hansen x range fitted to the variants,
and SVG tooltips naming the variant of every mark.
"""
from __future__ import annotations

import itertools
import re

import numpy as np
import pandas as pd
import pytest
from matplotlib.backends.backend_agg import FigureCanvasAgg
from matplotlib.collections import PathCollection
from matplotlib.figure import Figure
from matplotlib.text import Text

from helpers_audit import model_dict, write_panel
from report_fixture import FRAGILE
from robustgmm.audit import audit as run_audit, write_audit
from robustgmm.modelfile import spec_from_dict
from robustgmm.report import build_report, read_audit_folder
from robustgmm.report.figures import (draw_figures, plot_hansen_drift, plot_specification_curve,
                                      render_figures)
from robustgmm.report.figures import common as figures_common
from robustgmm.report.figures.common import value_limits


SIZES = {"three": 3, "forty_eight": 48, "three_hundred": 300}


@pytest.fixture(params=list(SIZES))
def drawn(request, audit_folder):
    audit = read_audit_folder(audit_folder(request.param))
    assert len(audit.variants) == SIZES[request.param]
    return audit, draw_figures(audit)


def _marks(fig):
    return [c for ax in fig.axes for c in ax.collections if isinstance(c, PathCollection)
            and (c.get_gid() or "").startswith("robustgmm-marks")]


def _texts(fig, renderer):
    """Visible, non-empty texts with their window extents."""
    out = []
    for t in fig.findobj(Text):
        if t.get_visible() and t.get_text().strip() and t.get_alpha() != 0:
            out.append((t, t.get_window_extent(renderer)))
    return out


def _inside_annotation(text, fig):
    # texts an axes draws on purpose inside its data area (e.g. the note where the
    # instruments = units line lies, "no data"): their anchor is inside the axes
    return any(text in ax.texts and ax.get_window_extent().contains(
        *text.get_window_extent().get_points().mean(axis=0)) for ax in fig.axes)


def test_one_mark_per_variant_and_a_legend(drawn):
    audit, figures = drawn
    for name, _, kind, term, fig in figures:
        if kind == "diagnostics":
            image = fig.axes[0].get_images()[0]
            assert image.get_array().shape[1] == len(audit.variants), name
        else:
            ok = audit.ok_variants
            if kind == "hansen_drift":  # variants that report a Hansen test
                expected = int(np.isfinite(ok["hansen_p"].to_numpy(float)).sum())
            else:
                expected = len(audit.term_estimates(term)) if term else len(ok)
            assert sum(len(m.get_offsets()) for m in _marks(fig)) == expected, name
        legends = [ax.get_legend() for ax in fig.axes if ax.get_legend() is not None]
        assert legends, f"{name} has no legend"
        labels = [t.get_text() for lg in legends for t in lg.get_texts()]
        if kind == "spec_curve":
            frame = audit.term_estimates(term)
            lanes = figures_common.lane_codes(frame)
            if len(set(lanes.tolist())) > 1:
                assert f"acceptable ({int((lanes == 0).sum())})" in labels, labels
                for code, word in ((1, "untestable"), (2, "fails a specification test")):
                    if (lanes == code).any():
                        assert f"{word} ({int((lanes == code).sum())})" in labels, labels
            assert "base model" in labels


def test_no_text_overlaps_a_plotting_area_or_another_text(drawn):
    audit, figures = drawn
    for name, _, kind, _, fig in figures:
        FigureCanvasAgg(fig)
        fig.canvas.draw()
        renderer = fig.canvas.get_renderer()
        areas = [ax.get_window_extent(renderer) for ax in fig.axes]
        texts = [(t, b) for t, b in _texts(fig, renderer) if not _inside_annotation(t, fig)]
        for t, box in texts:
            for area in areas:
                overlap = (min(box.x1, area.x1) - max(box.x0, area.x0),
                           min(box.y1, area.y1) - max(box.y0, area.y0))
                assert not (overlap[0] > 1 and overlap[1] > 1), \
                    f"{name}: text {t.get_text()!r} lies on a plotting area"
        for (t, a), (u, b) in itertools.combinations(texts, 2):
            overlap = (min(a.x1, b.x1) - max(a.x0, b.x0), min(a.y1, b.y1) - max(a.y0, b.y0))
            assert not (overlap[0] > 1 and overlap[1] > 1), \
                f"{name}: texts {t.get_text()!r} and {u.get_text()!r} overlap"


def test_svg_marks_carry_the_variant_and_its_settings(audit_folder, tmp_path):
    audit = read_audit_folder(audit_folder("forty_eight"))
    made = render_figures(audit, tmp_path / "figures", formats=("svg",))
    spec = next(f for f in made if f.kind == "spec_curve" and f.term == FRAGILE)
    svg = spec.paths[0].read_text()
    titles = re.findall(r"<title>(.*?)</title>", svg)
    frame = audit.term_estimates(FRAGILE)
    assert len(titles) == len(frame)
    for vid in frame["variant"]:
        assert any(t.startswith(f"variant {vid}") for t in titles), vid
    # the text is escaped for XML (the term names hold markup) and the file parses
    import xml.etree.ElementTree as ET
    ET.fromstring(svg)
    assert all("equations" in t and "last lag" in t for t in titles)
    # the diagnostics matrix: one tooltip per column (variant), with the state of
    # each check, so a variant a rule cites is found there too
    diag = next(f for f in made if f.kind == "diagnostics").paths[0].read_text()
    ET.fromstring(diag)
    tips = re.findall(r"<title>(.*?)</title>", diag)
    assert len(tips) == len(audit.variants)
    assert tips[0].startswith(f"variant {audit.base_variant} (base): ")
    assert {t.split(":")[0].split()[1] for t in tips} == set(audit.variants["variant"])
    assert all("Hansen does not reject: " in t and "last lag" in t for t in tips)


def test_zero_only_when_near_the_data():
    est = np.array([10.0, 10.5, 11.0])
    lo, hi = value_limits(est, est - 0.2, est + 0.2)
    assert lo > 5.0  # a curve far from zero is not flattened to show zero
    est = np.array([0.2, 0.5, 1.0])
    lo, hi = value_limits(est, est - 0.1, est + 0.1)
    assert lo <= 0.0 <= hi  # zero within the range plus a margin is shown


def test_two_huge_intervals_are_clipped_and_said_so(writable_folder):
    folder = writable_folder("forty_eight")
    est = pd.read_csv(folder / "estimates.csv")
    rows = est.index[est["term"] == FRAGILE][:2]
    est.loc[rows, "std_error"] = 100.0
    est.to_csv(folder / "estimates.csv", index=False)
    audit = read_audit_folder(folder)
    fig = plot_specification_curve(Figure(), audit, FRAGILE)
    ax = fig.axes[0]
    y0, y1 = ax.get_ylim()
    frame = audit.term_estimates(FRAGILE)
    others = frame[frame["std_error"] < 100]
    assert y1 - y0 < 10 * float((others["estimate"] + 2 * others["std_error"]).max()
                                - (others["estimate"] - 2 * others["std_error"]).min())
    labels = [t.get_text() for t in ax.get_legend().get_texts()]
    assert any(t.startswith("interval clipped at the axis (") for t in labels), labels


def test_hansen_range_fits_the_variants(audit_folder):
    audit = read_audit_folder(audit_folder("forty_eight"))
    ax = plot_hansen_drift(Figure().add_subplot(), audit)
    left, right = ax.get_xlim()
    counts = audit.ok_variants["instruments"].to_numpy(float)
    assert left <= counts.min() and counts.max() <= right
    units = float(audit.base_row()["units"])
    assert units > 1.2 * counts.max()  # the units line would lie far to the right
    assert right < 1.2 * counts.max()  # and does not stretch the axis


def test_two_outcome_lags_plot_the_sum_against_its_band(tmp_path):
    path = write_panel(tmp_path, n_units=60, n_periods=8)
    assert path.exists()
    d = model_dict({"form": ["per-period", "collapsed"], "steps": [1, 2]})
    d["model"]["outcome_lags"] = [1, 2]
    out = tmp_path / "out"
    write_audit(run_audit(spec_from_dict(d, base_dir=tmp_path), jobs=1), out)
    paths = build_report(out, formats=("png",))
    assert any(p.name == "ar_sum.png" for p in paths)
    audit = read_audit_folder(out)
    fig = next(f for _, _, kind, _, f in draw_figures(audit) if kind == "ar_sum")
    marks = _marks(fig)
    assert sum(len(m.get_offsets()) for m in marks) == len(audit.ok_variants)
    sums = np.sort(pd.to_numeric(audit.ok_variants["ar_coefficient"]).to_numpy(float))
    np.testing.assert_allclose(np.sort(marks[0].get_offsets()[:, 1]), sums)
    assert "sum(" in fig.axes[0].get_title(loc="left")
