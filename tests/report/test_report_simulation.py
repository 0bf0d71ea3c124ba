"""The report section "How these estimators behave at this sample size" and the caution
rule unreliable_at_this_size (issue 15). The rule is checked on hand-made summaries
(its lines and the Monte Carlo margin); the section on a real audit folder written
with a simulation (data from robustgmm.simulate, a known process)."""
from __future__ import annotations

import math

import pandas as pd
import pytest

from robustgmm.audit import audit, write_audit
from robustgmm.audit.verdicts.rules import MC_MARGIN, unreliable_at_this_size
from robustgmm.report import build_report
from tests.helpers_audit import make_spec

TH = {"min_coverage": 0.85, "max_bias_sd": 0.5}


def _row(vid, coverage, bias, sd, reps):
    return {"variant": vid, "term": "a", "coverage": coverage, "bias": bias, "sd": sd,
            "coverage_mc_se": math.sqrt(coverage * (1 - coverage) / reps),
            "bias_mc_se": sd / math.sqrt(reps)}


def test_rule_lines_and_monte_carlo_margin():
    rows = pd.DataFrame([
        _row("low", 0.70, 0.0, 1.0, 400),     # coverage 0.70 + 2 * 0.023 < 0.85: fires
        _row("noisy", 0.80, 0.0, 1.0, 20),    # 0.80 + 2 * 0.089 > 0.85: noise, not fired
        _row("biased", 0.95, 0.8, 1.0, 400),  # 0.8 - 2 * 0.05 > 0.5 SD: fires
        _row("edge", 0.95, 0.55, 1.0, 100),   # 0.55 - 2 * 0.1 < 0.5: not beyond MC error
        _row("fine", 0.95, 0.05, 1.0, 400),
    ])
    hit = unreliable_at_this_size(rows, TH)
    assert set(hit) == {"low", "biased"}
    assert hit["low"][0]["low_coverage"] and not hit["low"][0]["biased"]
    assert hit["biased"][0]["bias_sd"] == pytest.approx(0.8)
    assert MC_MARGIN == 2.0
    assert unreliable_at_this_size(None, TH) == {}
    # the lines are thresholds: moving them moves the result
    assert set(unreliable_at_this_size(rows, {"min_coverage": 0.5, "max_bias_sd": 0.5})) == {"biased"}


@pytest.fixture(scope="module")
def folder(tmp_path_factory):
    tmp = tmp_path_factory.mktemp("simreport")
    spec = make_spec(tmp, vary={"equations": ["difference", "system"], "steps": [1, 2]},
                     panel_kw={"n_units": 60, "n_periods": 6}, instruments={"form": "collapsed"})
    result = audit(spec, jobs=1, simulate=10, seed=4)
    out = write_audit(result, tmp / "out", report=build_report)
    return out, result


def test_section_in_every_document(folder):
    out, result = folder
    sim = pd.read_csv(out / "simulation.csv")
    html = (out / "report.html").read_text()
    assert "How these estimators behave at this sample size" in html
    assert "unreliable_at_this_size" in html and "not that it is" in html
    md = (out / "report.md").read_text()
    assert "## How these estimators behave at this sample size" in md
    for term in result.spec.focus_terms():
        slug = term.replace("[", "_").replace("]", "")
        assert (out / "figures" / f"sim_bias_{slug}.png").is_file()
        assert (out / "figures" / f"sim_coverage_{slug}.svg").is_file()
    # the simulated world: each parameter from calibration.json beside its value
    # re-estimated on a simulated panel
    import json
    params = json.loads((out / "calibration.json").read_text())["world"]["parameters"]
    world = md.split("### The simulated world", 1)[1].split("\n### ", 1)[0]
    row = [line for line in world.splitlines() if line.startswith("| sigma2\\_eps |")]
    assert row and f"{params['sigma2_eps']['value']:.3g}" in row[0]
    assert f"{params['sigma2_eps']['simulated']:.3g}" in row[0]
    assert "The simulated world" in html and "<code>x.ar1</code>" in html
    # the Markdown table of the AR term is ranked by RMSE, base marked
    section = md.split("### y[t-1]", 1)[1].split("\n### ", 1)[0]
    ids = [line.split("|")[2].strip().split(" ")[0].strip("*") for line in section.splitlines()
           if line.startswith("| ") and line[2].isdigit()]
    rows = sim[sim["term"] == "y[t-1]"].sort_values("rmse", kind="mergesort")
    assert ids == rows["variant"].astype(str).tolist()
    # the referee sentence quotes the base model's simulated bias and coverage
    base = rows[rows["is_base"]].iloc[0]
    referee = " ".join((out / "referee.txt").read_text().split())
    assert f"by {abs(base['bias']):.2g} on average" in referee
    assert f"cover the truth {100 * base['coverage']:.0f}% of the time" in referee
    assert "60 units and 6 periods" in referee
    # ... and says how noisy a coverage from 10 panels is: 2 * sqrt(0.95 * 0.05 / 10)
    assert "With 10 panels a coverage is known to within about 14 percentage points" in referee


def test_rule_reaches_the_verdict(folder):
    out, result = folder
    hit = unreliable_at_this_size(result.simulation.summary,
                                  {**TH, **{k: result.verdict["thresholds"][k] for k in TH}})
    flags = result.variants.set_index("variant")["flags"].fillna("")
    for vid in flags.index:
        assert ("unreliable_at_this_size" in flags[vid]) == (vid in hit), vid
    assert result.verdict["thresholds"]["min_coverage"] == 0.85
    assert result.verdict["thresholds"]["max_bias_sd"] == 0.5
    assert any(r["id"] == "unreliable_at_this_size" for r in result.verdict["rules"])


def test_rebuilt_report_without_simulation_has_no_section(folder, tmp_path):
    out, result = folder
    plain = write_audit(dataclasses_replace(result), tmp_path / "plain", report=build_report)
    assert "How these estimators behave" not in (plain / "report.html").read_text()
    assert not (plain / "simulation.csv").exists()


def dataclasses_replace(result):
    import dataclasses
    return dataclasses.replace(result, simulation=None)


def test_section_stands_where_the_html_has_it(folder):
    # after the figures and before the variants table in both documents, and never
    # after the closing caution and rebuild line
    out, _ = folder
    md = (out / "report.md").read_text()
    at = md.index("## How these estimators behave at this sample size")
    assert md.index("## Figures") < at < md.index("## Variants")
    assert at < md.index("**What this report does not show.**")
    html = (out / "report.html").read_text()
    at = html.index("How these estimators behave at this sample size")
    assert html.index(">Figures<") < at < html.index(">Variants<")


def test_every_column_is_explained_with_the_monte_carlo_error(folder):
    # the fixture runs 10 replications: one Monte Carlo standard error of a 95%
    # coverage is sqrt(0.95 * 0.05 / 10) = 6.9 points (binomial proportion)
    out, _ = folder
    for name in ("report.md", "report.html"):
        text = " ".join((out / name).read_text().split()).replace("\\_", "_")
        for col in ("bias, ", "SD, ", "RMSE, ", "coverage, ", "size, ", "SE ratio, ",
                    "replications, "):
            assert col + "the " in text, (name, col)
        assert "about 6.9 points with 10 panels" in text, name


def test_coverage_bars_stay_within_zero_and_one():
    """A coverage is a share: its two-SE bar stops at 0 and 1 (a coverage of 0.97 from
    20 panels has a binomial SE of 0.038, so an unclipped bar would reach 1.05)."""
    from matplotlib.figure import Figure
    from robustgmm.report.simulation import SimulationFolder, plot_coverage
    rows = pd.DataFrame([
        {"variant": v, "term": "a", "coverage": c, "order": i, "is_base": i == 0,
         "coverage_mc_se": math.sqrt(c * (1 - c) / 20)}
        for i, (v, c) in enumerate([("v1", 0.97), ("v2", 0.03), ("v3", 0.5)])])
    ax = Figure().add_subplot()
    plot_coverage(ax, SimulationFolder(rows, {"alpha": 0.05}), "a")
    segments = ax.collections[0].get_segments()
    lows = sorted(float(s[:, 1].min()) for s in segments)
    highs = sorted(float(s[:, 1].max()) for s in segments)
    assert min(lows) == pytest.approx(0.0) and max(highs) == pytest.approx(1.0)
    # the middle bar is untouched: 0.5 +- 2 * 0.112
    assert 0.5 - 2 * math.sqrt(0.25 / 20) == pytest.approx(lows[1])
    assert 0.5 + 2 * math.sqrt(0.25 / 20) == pytest.approx(highs[1])
