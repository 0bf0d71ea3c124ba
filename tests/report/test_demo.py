"""The demo and the example scenarios (robustgmm/demo.py).

- The committed inputs under examples/ are exactly what the simulators write.
- Simulation with known truth: the base model of each example recovers the true
  parameters within sampling error (the process is stated in robustgmm/demo.py).
- The committed demo output under reports/demo is what `run_demo` produces today:
  the CSV results agree to 1e-8 and the verdicts are the same.
"""
from __future__ import annotations

import json
from pathlib import Path

import numpy as np
import pandas as pd
import pytest

from robustgmm import demo
from robustgmm.core import fit
from robustgmm.data import load_panel
from robustgmm.modelfile import read_model

ROOT = Path(__file__).resolve().parents[2]
EXAMPLES = ROOT / "examples"
COMMITTED = ROOT / "reports" / "demo"


def _same_files(written: Path, committed: Path, names):
    for name in names:
        assert (written / name).read_bytes() == (committed / name).read_bytes(), name


def test_demo_inputs_match_the_committed_copies(tmp_path):
    demo.write_inputs(tmp_path)
    _same_files(tmp_path, EXAMPLES / "demo",
                [demo.DEMO.data_name, demo.DEMO.model_name, demo.TRUTH_NAME])


@pytest.mark.parametrize("name", sorted(demo.EXAMPLES))
def test_example_inputs_match_the_committed_copies(tmp_path, name):
    scenario = demo.EXAMPLES[name]
    scenario.write(tmp_path)
    _same_files(tmp_path, EXAMPLES / name,
                [scenario.data_name, scenario.model_name, demo.TRUTH_NAME])


def test_simulation_is_deterministic_and_reproducible():
    a = demo.simulate_bakeries(demo.SEED)
    b = demo.simulate_bakeries(demo.SEED)
    pd.testing.assert_frame_equal(a, b)
    assert demo.simulate_bakeries(demo.SEED + 1)["orders"].iloc[0] != a["orders"].iloc[0]
    assert list(a.columns) == ["bakery", "year", "orders", "staff_hours", "flour_price"]
    assert a.groupby("bakery").size().eq(10).all() and a["bakery"].nunique() == 400


def test_orchards_has_gaps_and_regions():
    frame = demo.simulate_orchards(demo.ORCHARDS.seed)
    counts = frame.groupby("coop").size()
    assert counts.min() < 10  # unbalanced, with gaps
    assert set(frame["region"]) == {"coast", "valley", "highland"}
    # a gap: some coop misses a year between two observed ones
    gaps = frame.groupby("coop")["year"].apply(lambda y: (np.diff(np.sort(y)) > 1).any())
    assert gaps.any()


# Simulation with known truth. Each base model is consistent under the stated
# process; with N = 250-300 units the estimate should lie within 4 standard errors
# of the truth (a failure would mean a broken simulator, model file or estimator,
# or a 1-in-15,000 draw under normality).
@pytest.mark.parametrize("name,terms", [
    ("clinics", ["wait_days[t-1]", "nurses[t]", "outbreak[t]"]),
    # irrigation[t] is heterogeneous across regions (0 in the highland), so only the
    # homogeneous coefficients have a single true value to recover
    ("orchards", ["harvest[t-1]", "frost_days[t]"]),
])
def test_examples_recover_the_truth(name, terms):
    scenario = demo.EXAMPLES[name]
    spec = read_model(EXAMPLES / name / scenario.model_name)
    result = fit(spec, load_panel(spec))
    truth = json.loads((EXAMPLES / name / demo.TRUTH_NAME).read_text())["parameters"]
    for term in terms:
        t = result.term(term)
        assert abs(t.estimate - truth[term]) < 4 * t.std_error, (term, t.estimate, truth[term])


def test_clinics_recovers_the_long_run_effect_of_staffing():
    # Simulation with known truth: the long-run multiplier of an autoregressive
    # distributed-lag model, sum of the regressor's coefficients over 1 - the sum of
    # the AR coefficients (docs/method.md), is -0.25 / (1 - 0.6) = -0.625 in the
    # clinics process. Same 4-SE band as above, with the delta-method SE.
    scenario = demo.EXAMPLES["clinics"]
    spec = read_model(EXAMPLES / "clinics" / scenario.model_name)
    assert "nurses[long-run]" in spec.focus
    result = fit(spec, load_panel(spec))
    truth = json.loads((EXAMPLES / "clinics" / demo.TRUTH_NAME).read_text())["parameters"]
    true_long_run = truth["nurses[t]"] / (1 - truth["wait_days[t-1]"])
    t = result.term("nurses[long-run]")
    assert np.isfinite(t.std_error) and t.std_error > 0
    assert abs(t.estimate - true_long_run) < 4 * t.std_error, (t.estimate, true_long_run)


def test_example_models_use_the_features_they_show():
    clinics = read_model(EXAMPLES / "clinics" / "clinics.toml")
    assert clinics.transform == "fod"
    assert {r.name: r.role for r in clinics.regressors}["nurses"] == "predetermined"
    orchards = read_model(EXAMPLES / "orchards" / "orchards.toml")
    assert [s.name for s in orchards.vary.samples] == ["without highland", "from 2013",
                                                       "by region"]
    assert orchards.vary.samples[0].exclude_column == "region"
    assert orchards.vary.samples[2].split == "region"
    assert clinics.vary.outcome_lags == ((1,), (1, 2))
    assert clinics.vary.lags == (("nurses", ((0,), (0, 1))),)


# -- the committed demo output ------------------------------------------------

def _compare_csv(new: Path, old: Path, keys):
    a = pd.read_csv(new).sort_values(keys, kind="mergesort").reset_index(drop=True)
    b = pd.read_csv(old).sort_values(keys, kind="mergesort").reset_index(drop=True)
    assert list(a.columns) == list(b.columns), new.name
    assert len(a) == len(b), new.name
    for col in a.columns:
        if pd.api.types.is_numeric_dtype(a[col]) and pd.api.types.is_numeric_dtype(b[col]):
            np.testing.assert_allclose(a[col].to_numpy(float), b[col].to_numpy(float),
                                       rtol=0, atol=1e-8, equal_nan=True,
                                       err_msg=f"{new.name}: {col}")
        else:
            assert a[col].astype(str).tolist() == b[col].astype(str).tolist(), (new.name, col)


def test_demo_regenerates_the_committed_output(tmp_path, monkeypatch):
    monkeypatch.chdir(tmp_path)
    out = demo.run_demo(jobs=2)  # default folder: reports/demo under the current directory
    assert out == Path("reports/demo")
    out = tmp_path / out
    _compare_csv(out / "variants.csv", COMMITTED / "variants.csv", ["variant"])
    _compare_csv(out / "estimates.csv", COMMITTED / "estimates.csv", ["variant", "term"])
    _compare_csv(out / "bounds.csv", COMMITTED / "bounds.csv", ["variant", "term"])
    # the small Monte Carlo: a replication depends only on (seed, rep), not on the jobs
    _compare_csv(out / "simulation.csv", COMMITTED / "simulation.csv", ["variant", "term"])
    new = json.loads((out / "verdict.json").read_text())
    old = json.loads((COMMITTED / "verdict.json").read_text())
    assert {t: v["verdict"] for t, v in new["terms"].items()} == \
        {t: v["verdict"] for t, v in old["terms"].items()}
    for name in ("report.html", "report.md", "table.tex", "referee.txt", "truth.json"):
        assert (out / name).is_file(), name
    # the ownership record lists every file of the demo's audit, the report included,
    # so that a rerun replaces them (and removes the stale ones) like an audit's
    recorded = set(json.loads((out / ".robustgmm-output").read_text())["files"])
    written = {p.relative_to(out).as_posix() for p in out.rglob("*")
               if p.is_file() and p.parts[len(out.parts)] not in ("inputs", ".robustgmm-output")}
    assert written == recorded
    manifest = json.loads((out / "manifest.json").read_text())
    assert manifest["model_file"] == "inputs/norland_bakeries.toml"
    assert not any(str(tmp_path) in str(v) for v in manifest.values())


def test_committed_demo_shows_a_robust_and_a_fragile_conclusion():
    verdict = json.loads((COMMITTED / "verdict.json").read_text())
    verdicts = {t: v["verdict"] for t, v in verdict["terms"].items()}
    assert verdicts["orders[t-1]"] == "robust"
    assert verdicts["flour_price[t]"] == "robust"
    assert verdicts["staff_hours[t]"] == "fragile"
    md = (COMMITTED / "report.md").read_text()
    assert "## Known truth" in md
    # the demo's small Monte Carlo gives the report its simulation section
    assert "## How these estimators behave at this sample size" in md
    manifest = json.loads((COMMITTED / "manifest.json").read_text())
    assert manifest["simulation"]["reps"] == demo.DEMO_REPS
    truth = json.loads((COMMITTED / "truth.json").read_text())["parameters"]
    assert truth == demo.DEMO_TRUTH
    for fig in ("spec_curve_staff_hours_t", "hansen_drift", "ar_band_orders_t-1", "diagnostics"):
        for ext in ("png", "svg", "pdf"):
            assert (COMMITTED / "figures" / f"{fig}.{ext}").is_file()


def test_diagnostics_matrix_shows_the_underidentified_demo_variants_failing():
    # the demo has variants rejected only by the Kleibergen-Paap rank test; the
    # diagnostics figure must not show them as a column of green
    from robustgmm.report import figures
    from robustgmm.report.inputs import read_audit_folder
    audit = read_audit_folder(COMMITTED)
    table = figures.diagnostics_table(audit)
    flags = audit.variants.set_index("variant")["flags"].fillna("").str.split(";")
    under = [vid for vid, ids in flags.items() if "underidentified" in ids]
    assert under
    row = table["identified (KP), not weak (SW F)"]
    assert (row[under] == figures.FAIL).all()
    assert (table.drop(index=under) != figures.FAIL).all().all()


def test_referee_paragraph_names_the_test_that_rejects_the_demo_variants():
    # the demo's rejected variants pass Hansen, AR(2) and difference-in-Hansen and fail
    # only the underidentification test: the paragraph must name that test
    from robustgmm.report.inputs import read_audit_folder
    from robustgmm.report.referee import referee_paragraph
    audit = read_audit_folder(COMMITTED)
    v = audit.variants
    rejected = v[(v["status"] == "ok") & ~v["acceptable"].astype(bool)]
    assert len(rejected) and rejected["flags"].str.contains("underidentified").all()
    assert (rejected["hansen_p"] > 0.05).all() and (rejected["ar2_p"] > 0.05).all()
    flat = referee_paragraph(audit)
    assert f"and {len(rejected)} are rejected by their tests" in flat
    assert "Kleibergen-Paap rank test rejecting underidentification at the 5% level" in flat


def test_referee_paragraph_says_each_count_once():
    # a robust term significant with one sign in every specification: the verdict's
    # reason would repeat the counts; a fragile term keeps its reason (the threshold)
    from robustgmm.report.inputs import read_audit_folder
    from robustgmm.report.referee import referee_paragraph
    audit = read_audit_folder(COMMITTED)
    flat = referee_paragraph(audit)
    assert "Significant at 5% with the base model's sign in all" not in flat
    assert "(the threshold share is 0.9)" in flat
    assert flat.count("is robust across the 42 acceptable specifications") == 2


def test_drivers_tables_name_settings_in_words():
    # the demo varies last_lag: its drivers rows say "last lag", as the variants
    # table's header does, not the model file's key
    from robustgmm.report.context import _drivers
    from robustgmm.report.inputs import read_audit_folder
    from robustgmm.report.summary import summarize
    s = summarize(read_audit_folder(COMMITTED))
    names = {row["setting"] for t in s.terms for row in _drivers(t)}
    assert "last lag" in names and "instrument form" in names
    assert not any("_" in n for n in names), names


def test_word_table_says_which_columns_use_which_standard_errors():
    # the demo's table mixes Windmeijer-corrected and one-step cluster-robust errors:
    # the Word table says which column has which, as table.tex does
    from robustgmm.report.inputs import read_audit_folder
    from robustgmm.report.latex import render_latex
    from robustgmm.report.wordtable import render_word_table
    audit = read_audit_folder(COMMITTED)
    tex = " ".join(render_latex(audit).split())
    word = " ".join(render_word_table(audit).split())
    assert "Standard errors in parentheses: Windmeijer-corrected in (1), " in tex
    assert "Standard errors in parentheses: Windmeijer-corrected in (1), " in word
    assert "cluster-robust (by unit) in (4)" in word


def test_referee_paragraph_reports_the_weak_instrument_caution():
    # the demo's base model has a Sanderson-Windmeijer F below 10 (verdict.json): the
    # paragraph a referee reads must say so, with the count and the base model's F
    from robustgmm.report.inputs import read_audit_folder
    from robustgmm.report.referee import referee_paragraph
    audit = read_audit_folder(COMMITTED)
    weak = next(r for r in audit.verdict.model if r.id == "weak_instruments")
    f = weak.figures
    assert f["base"]
    flat = referee_paragraph(audit)
    assert (f"below 10 in {f['variants']} of the {f['of_available']} specifications where "
            f"it is valid, the base model among them (F = {f['base_value']:.2f})") in flat
