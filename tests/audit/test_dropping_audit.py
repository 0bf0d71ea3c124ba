"""Dropping units in the audit (issue 16): the model-file keys, the tables, the rule
``few_units_flip`` and the files.

Known truth by construction (robustgmm.simulate), as in tests/core/test_core_dropping.py:

* planted: 395 units without any effect of x and 5 units (ids 396-400) with an
  extreme, almost noiseless x-y relation; the pooled estimate is significant only
  because of them, so the set that reverses the sign of x[t] is exactly those 5;
* clean: every unit has the same effect (beta = 1, 400 units); nothing about x[t] is
  overturned by dropping 1% of the units (4 units).
"""
from __future__ import annotations

import json
import subprocess
import sys
from pathlib import Path

import numpy as np
import pandas as pd
import pytest

from helpers_core import planted_frame
from robustgmm import contract
from robustgmm.audit import audit, write_audit
from robustgmm.errors import InputError
from robustgmm.modelfile import spec_from_dict

PLANTED = {"396", "397", "398", "399", "400"}


def write_planted(folder: Path, n=400, n_planted=5, periods=8, seed=1, beta_rest=0.0) -> None:
    frame = planted_frame(n, n_planted, periods, seed, beta_rest, unit="shop", period="year")
    frame.to_csv(folder / "panel.csv", index=False)


def model(**audit_keys) -> dict:
    audit_keys.setdefault("vary", {"steps": [1, 2]})
    return {"data": {"file": "panel.csv", "unit": "shop", "period": "year"},
            "model": {"outcome": "y", "regressors": [{"name": "x"}, {"name": "w"}]},
            "method": {"equations": "difference", "steps": 1},
            "instruments": {"form": "collapsed"},
            "labels": {"x[t]": "staff hours", "shop": "bakeries"},
            "audit": {"focus": ["x[t]"], **audit_keys}}


@pytest.fixture(scope="module")
def planted(tmp_path_factory):
    folder = tmp_path_factory.mktemp("planted")
    write_planted(folder)
    spec = spec_from_dict(model(influence="all", thresholds={"flip_share": 0.02}),
                          base_dir=folder)
    result = audit(spec, jobs=1)
    write_audit(result, folder / "out")
    return folder, result


def test_the_planted_units_are_named_exactly(planted):
    _, result = planted
    inf = result.dropping.influence
    base = result.verdict["base_variant"]
    row = inf[(inf["variant"] == base) & (inf["term"] == "x[t]") & (inf["target"] == "sign")]
    assert len(row) == 1 and bool(row["reached"].iloc[0])
    assert set(row["dropped_units"].iloc[0].split()) == PLANTED
    assert int(row["units_dropped"].iloc[0]) == 5 and row["share_dropped"].iloc[0] == 5 / 400
    assert row["estimate"].iloc[0] <= 0  # the exact refit, not the approximation
    # the most influential units of the base model: the planted ones lead
    top = result.dropping.units
    top = top[top["term"] == "x[t]"]
    assert len(top) == 20 and list(top["rank"]) == list(range(1, 21))
    assert len(PLANTED & set(top["unit"].iloc[:8])) >= 4
    assert np.isclose(top["share_of_data"].iloc[0], 7 / (400 * 7))


def test_the_rule_fires_and_the_sentence_names_the_units(planted):
    _, result = planted
    t = result.verdict["terms"]["x[t]"]
    fired = {r["id"]: r for r in t["rules"]}
    assert "few_units_flip" in fired and fired["few_units_flip"]["effect"] == "fragile"
    fig = fired["few_units_flip"]["figures"]
    assert fig["scope"] == "base" and fig["units_dropped"] <= 8 and fig["units"] == 400
    assert set(fig["dropped_units"]) <= PLANTED
    assert t["verdict"] == "fragile"
    k = fig["units_dropped"]
    assert (f"dropping {k} of 400 bakeries ({100 * k / 400:.1f}%) makes it insignificant in "
            "the base model") in t["reason"]
    # the other estimated variant was analysed too ("all") and flips as well
    assert t["figures"]["dropping"]["variants_analysed"] == 1
    assert len(t["figures"]["dropping"]["variants_flipped"]) == 1


def test_the_files_have_the_contract_columns(planted):
    folder, result = planted
    out = folder / "out"
    manifest = json.loads((out / "manifest.json").read_text())
    assert manifest["format_version"] == contract.FORMAT_VERSION
    for table in contract.DROPPING_TABLES:
        assert table.file in manifest["files"]
        problems: list = []
        frame = contract.read_table(table, out / table.file, (), problems)
        assert problems == [] and list(frame.columns) == table.names()
    inf = pd.read_csv(out / "influence.csv", dtype={"dropped_units": str})
    assert list(inf.columns) == ["variant", "term", "target", "units_dropped",
                                 "share_dropped", "reached", "estimate", "std_error",
                                 "p_value", "dropped_units"]
    assert set(inf["target"]) == {"sign", "significance", "opposite_significant"}
    assert inf["variant"].nunique() == 2  # influence = "all": base and the other variant
    path = pd.read_csv(out / "influence_path.csv")
    assert (path.groupby(["variant", "term", "target"])["dropped"].min() == 0).all()
    periods = pd.read_csv(out / "periods.csv")
    assert sorted(periods["period"].unique()) == list(range(2001, 2009))


def test_the_report_says_it_and_draws_the_path(planted):
    from robustgmm.report import build_report
    folder, result = planted
    out = folder / "out"
    build_report(out, formats=("png",))
    fig = next(r for r in result.verdict["terms"]["x[t]"]["rules"]
               if r["id"] == "few_units_flip")["figures"]
    k = fig["units_dropped"]
    referee = " ".join((out / "referee.txt").read_text().split())
    assert (f"Dropping {k} of 400 bakeries ({100 * k / 400:.1f}%) makes the effect of staff "
            "hours insignificant") in referee
    assert "not which sample is right" in referee
    assert (out / "figures" / "dropping_x_t.png").is_file()
    html = (out / "report.html").read_text()
    assert "Does a handful of units drive the result?" in html and 'id="fig-dropping_x_t"' in html
    md = (out / "report.md").read_text()
    assert "## Does a handful of units drive the result?" in md
    assert "| sign reversed | yes | 5 of 400 bakeries (1.2%) |" in md


def test_only_variants_flipping_is_a_caution(planted):
    # the same tables with the base model's sets moved beyond flip_share: the other
    # analysed variant still flips, so the rule fires as a caution and the verdict no
    # longer rests on it
    from robustgmm.audit import verdicts
    folder, result = planted
    inf = result.dropping.influence.copy()
    base = inf["variant"] == result.verdict["base_variant"]
    inf.loc[base, "reached"] = False
    ev = verdicts.evaluate(result.spec, result.variants, result.estimates, result.bounds,
                           influence=inf).verdict
    t = ev.term("x[t]")
    firing = next(f for f in t.rules if f.id == "few_units_flip")
    assert str(firing.effect) == "caution" and firing.figures["scope"] == "variants"
    assert "in the base model" not in t.reason  # the reason no longer quotes the base set


def test_the_audit_verdict_is_the_one_evaluation_of_every_rule(planted):
    """The audit classifies the variants once (to name the judged variants the
    analysis covers) and concludes the terms once with the influence tables: the
    same verdict as evaluating every rule at once on the finished tables, and the
    judged variants are the ones analysed."""
    import json
    from robustgmm.audit import verdicts
    _, result = planted
    whole = verdicts.evaluate(result.spec, result.variants, result.estimates, result.bounds,
                              influence=result.dropping.influence)
    assert (json.dumps(whole.verdict.to_dict(), sort_keys=True, default=str)
            == json.dumps(result.verdict, sort_keys=True, default=str))
    classified = verdicts.classify(result.spec, result.variants, result.estimates,
                                   result.bounds)
    analysed = result.dropping.run["variants"]  # influence = "all": base, then judged
    assert analysed[0] == result.verdict["base_variant"] and len(analysed) >= 2
    assert set(analysed) == set(classified.judged) | {analysed[0]}


def test_a_listed_dropping_file_that_is_missing_is_one_line(planted, tmp_path):
    import shutil
    from robustgmm.report import read_audit_folder
    folder, _ = planted
    copy = tmp_path / "copy"
    shutil.copytree(folder / "out", copy)
    (copy / "influence_path.csv").unlink()
    with pytest.raises(InputError) as info:
        read_audit_folder(copy)
    assert len(info.value.problems) == 1
    assert "influence_path.csv: file missing" in info.value.problems[0]


def test_a_clean_panel_reaches_nothing_within_one_percent(tmp_path):
    write_planted(tmp_path, n_planted=0, beta_rest=1.0, seed=4)
    spec = spec_from_dict(model(max_drop_share=0.01, vary={}), base_dir=tmp_path)
    result = audit(spec, jobs=1)
    inf = result.dropping.influence
    assert len(inf) == 3 and not inf["reached"].any()
    assert (inf["units_dropped"] == 4).all()
    t = result.verdict["terms"]["x[t]"]
    assert "few_units_flip" in t["passed"]


def test_a_long_run_focus_term_is_searched(tmp_path):
    """A long-run effect as a focus term gets its three searches and its most
    influential units like a coefficient (robustgmm.core.dropping; the exactness of
    its refits against full re-estimation is checked in tests/core). Known truth:
    in the planted panel the long-run effect of x is significant because of the 5
    planted units only, so its significance is lost by dropping planted units."""
    write_planted(tmp_path)
    spec = spec_from_dict(model(vary={}, focus=["x[t]", "x[long-run]"]), base_dir=tmp_path)
    result = audit(spec, jobs=1)
    inf = result.dropping.influence
    lr = inf[inf["term"] == "x[long-run]"]
    assert sorted(lr["target"]) == sorted(["sign", "significance", "opposite_significant"])
    assert result.dropping.run["not_searched"] == []
    sig = lr[lr["target"] == "significance"].iloc[0]
    assert bool(sig["reached"]) and set(sig["dropped_units"].split()) <= PLANTED
    top = result.dropping.units
    top = top[top["term"] == "x[long-run]"]
    assert len(top) == 20 and len(PLANTED & set(top["unit"].iloc[:8])) >= 4
    est = result.estimates
    base = est[(est["variant"] == result.verdict["base_variant"])
               & (est["term"] == "x[long-run]")]["std_error"].iloc[0]
    assert np.allclose(top["change_in_se"], -top["influence"] / base, rtol=1e-12)


def test_every_variant_analysed_in_workers_gives_the_same_bytes(tmp_path):
    """``influence = "all"`` runs one task per variant through the audit's parallel
    machinery (robustgmm.audit.parallel): two worker processes and this process give
    byte-identical tables (fixed BLAS threads, tables assembled in plan order)."""
    write_planted(tmp_path, n=150)
    spec = spec_from_dict(model(influence="all", vary={"steps": [1, 2],
                                                       "errors": ["robust", "conventional"]}),
                          base_dir=tmp_path)
    one = audit(spec, jobs=1)
    two = audit(spec, jobs=2, start_workers=True)
    assert one.dropping.dispatch == {"jobs": 1, "backend": "in-process"}
    assert two.dropping.dispatch == {"jobs": 2, "backend": "loky"}
    assert two.manifest["run"]["influence_jobs"] == 2
    assert len(one.dropping.run["variants"]) >= 2  # several variants analysed
    a, b = write_audit(one, tmp_path / "one"), write_audit(two, tmp_path / "two")
    for table in contract.DROPPING_TABLES:
        assert (a / table.file).read_bytes() == (b / table.file).read_bytes(), table.file
    # the cost rule of robustgmm.audit.cost: this small analysis (well under the
    # workers' start-up) stays in this process when workers are only allowed
    heard: list[str] = []
    small = audit(spec, jobs=2, notify=heard.append)
    assert small.dropping.dispatch["jobs"] == 1
    assert any(line.startswith("dropping units: estimated") and "in this process" in line
               for line in heard)


@pytest.mark.parametrize("scope", ["base", "all"])
def test_terms_and_periods_as_separate_tasks_give_the_same_bytes(tmp_path, scope):
    """A model's analysis is one task per focus term and one for its
    leave-one-period-out refits (robustgmm.audit.dropping.tasks_of), each task with
    its own search: on two workers (the tasks finishing in any order) the tables are
    byte-identical to one process, rows in plan, term and target order."""
    write_planted(tmp_path, n=150)
    spec = spec_from_dict(model(influence=scope, vary={"steps": [1, 2]},
                                focus=["x[t]", "w[t]"]), base_dir=tmp_path)
    one = audit(spec, jobs=1)
    two = audit(spec, jobs=2, start_workers=True)
    assert one.dropping.dispatch["jobs"] == 1 and two.dropping.dispatch["jobs"] == 2
    inf = one.dropping.influence
    n_variants = len(one.dropping.run["variants"])
    assert n_variants == (1 if scope == "base" else 2)
    assert list(inf["term"]) == n_variants * (3 * ["x[t]"] + 3 * ["w[t]"])
    assert list(inf["target"]) == 2 * n_variants * ["sign", "significance",
                                                    "opposite_significant"]
    assert list(one.dropping.units["term"]) == 20 * ["x[t]"] + 20 * ["w[t]"]
    a, b = write_audit(one, tmp_path / "one"), write_audit(two, tmp_path / "two")
    for table in contract.DROPPING_TABLES:
        assert (a / table.file).read_bytes() == (b / table.file).read_bytes(), table.file


def test_the_base_model_is_analysed_in_the_variants_pool(tmp_path, monkeypatch):
    """The base model's analysis needs only its specification, so the audit runs its
    tasks in the same dispatch as the variants' share groups (the longest tasks first,
    whatever their kind: robustgmm.audit.parallel.dispatch), not after them; its
    tables are the ones the analysis run on its own gives, byte for byte."""
    from robustgmm.audit import dropping, grid, parallel
    write_planted(tmp_path, n=150)
    spec = spec_from_dict(model(influence="base", vary={"steps": [1, 2]},
                                focus=["x[t]", "w[t]"]), base_dir=tmp_path)
    calls: list[list[int]] = []
    real = parallel.dispatch

    def spy(works, *args, **kw):
        calls.append([len(w.groups) for w in works])
        return real(works, *args, **kw)
    monkeypatch.setattr(parallel, "dispatch", spy)
    result = audit(spec, jobs=2, start_workers=True)
    # one share group of two variants beside the base's two term tasks and its
    # periods task; nothing left for the analysis after the variants
    assert calls == [[1, 3], [0]]
    assert result.dropping.dispatch == {"jobs": 2, "backend": "loky"}
    assert result.manifest["run"]["influence_jobs"] == 2
    monkeypatch.setattr(parallel, "dispatch", real)
    panels = grid.load_panels(spec)
    planned = grid.plan(spec, panels, counts=False)
    alone = dropping.analyse(spec, planned, panels, [result.verdict["base_variant"]], jobs=1)
    for ours, theirs, table in zip(result.dropping.frames(), alone.frames(),
                                   contract.DROPPING_TABLES):
        assert len(ours) and ours.to_csv() == theirs.to_csv(), table.file


def test_a_base_model_that_fails_leaves_no_analysis(tmp_path, monkeypatch):
    """The base model's analysis runs beside its estimation; when the estimation fails
    (here made to, through the runner's test seam) the analysis is dropped with it:
    no rows, no variant analysed, and the other variants are audited as usual."""
    from helpers_audit import CountingFit
    from robustgmm.audit import runner
    from robustgmm.errors import EstimationError
    write_planted(tmp_path, n=150)
    spec = spec_from_dict(model(influence="base", vary={"steps": [1, 2]}),
                          base_dir=tmp_path)
    monkeypatch.setattr(runner, "FIT_EACH", CountingFit(
        fail=[(lambda s: s.steps == 1, EstimationError("made to fail"))]))
    result = audit(spec, jobs=1)
    status = dict(zip(result.variants["steps"], result.variants["status"]))
    assert status == {1: runner.FAILED, 2: runner.OK}
    assert result.dropping.run["variants"] == []
    assert all(len(frame) == 0 for frame in result.dropping.frames())


def test_influence_none_writes_no_dropping_files(tmp_path):
    write_planted(tmp_path, n=120, n_planted=0, beta_rest=1.0)
    spec = spec_from_dict(model(influence="none"), base_dir=tmp_path)
    result = audit(spec, jobs=1)
    assert result.dropping is None
    assert "few_units_flip" in result.verdict["terms"]["x[t]"]["not_evaluated"]
    write_audit(result, tmp_path / "out")
    assert not (tmp_path / "out" / "influence.csv").exists()


@pytest.mark.parametrize("keys, expected", [
    ({"influence": "every"}, '[audit] influence = "every": must be "none", "base" or "all"'),
    ({"influence": 1}, "[audit] influence = 1: must be"),
    ({"max_drop_share": 1.2}, "[audit] max_drop_share = 1.2: must be above 0 and below 1"),
    ({"max_drop_share": "5%"}, '[audit] max_drop_share = "5%": must be a number in (0, 1)'),
    ({"thresholds": {"flip_share": -0.01}}, "[audit.thresholds] flip_share = -0.01: must be"),
    ({"max_drop_share": 0.005},
     "[audit.thresholds] flip_share = 0.01: is above [audit] max_drop_share = 0.005"),
])
def test_bad_keys_are_one_line_naming_the_key(keys, expected):
    with pytest.raises(InputError) as info:
        spec_from_dict(model(**keys))
    assert len(info.value.problems) == 1
    assert expected in info.value.problems[0] and "\n" not in info.value.problems[0]


def test_bad_key_on_the_command_line_exits_2(tmp_path):
    write_planted(tmp_path, n=60, n_planted=0)
    text = (tmp_path / "m.toml")
    text.write_text('[data]\nfile = "panel.csv"\nunit = "shop"\nperiod = "year"\n'
                    '[model]\noutcome = "y"\n[audit]\ninfluence = "everything"\n')
    proc = subprocess.run([sys.executable, "-m", "robustgmm", "audit", str(text), "--out",
                           str(tmp_path / "out")], capture_output=True, text=True)
    assert proc.returncode == 2
    lines = proc.stderr.strip().splitlines()
    assert len(lines) == 1 and "[audit] influence" in lines[0] and "Traceback" not in proc.stderr
