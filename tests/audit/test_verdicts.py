"""Verdict rules (robustgmm.audit.verdicts) on constructed results with known answers, and
on simulated panels with a known data-generating process (robustgmm.simulate)."""
from __future__ import annotations

import dataclasses
import json
from math import erfc, sqrt

import numpy as np
import pandas as pd
import pytest

from robustgmm.audit import verdicts
from robustgmm.audit import audit
from robustgmm.simulate import PanelProcess
from robustgmm.spec import Regressor, Spec, Thresholds

from helpers_audit import make_spec

SPEC = Spec(unit="u", period="p", outcome="y", outcome_lags=(1,),
            regressors=(Regressor("x", (0,), "endogenous"),), focus=("y[t-1]", "x[t]"))


def _p(est, se):
    return erfc(abs(est / se) / sqrt(2))


def _results(x_estimates, se=0.1, diag=None, status=None, ar=None):
    """variants/estimates frames; variant 0 is the base. ``diag`` overrides
    diagnostics per variant index: {i: {"hansen_p": ..., ...}}."""
    vrows, erows = [], []
    ar = ar if ar is not None else [0.5] * len(x_estimates)
    for i, est in enumerate(x_estimates):
        vid = f"v{i}"
        row = {"variant": vid, "is_base": i == 0, "status": "ok", "reason": "",
               "hansen_p": 0.4, "ar2_p": 0.5, "diff_hansen_level_p": 0.6,
               "instruments": 30, "units": 100, "instruments_per_unit": 0.3}
        row.update((diag or {}).get(i, {}))
        if status and i in status:
            row.update(status=status[i], reason="weight matrix is singular")
        vrows.append(row)
        if row["status"] != "ok":
            continue
        for term, b, s in (("x[t]", est, se), ("y[t-1]", ar[i], 0.05)):
            erows.append({"variant": vid, "term": term, "estimate": b, "std_error": s,
                          "p_value": _p(b, s)})
    variants = pd.DataFrame(vrows)
    variants["instruments_per_unit"] = variants["instruments"] / variants["units"]
    return variants, pd.DataFrame(erows)


def _fired(verdict, term="x[t]"):
    return {r["id"]: r for r in verdict["terms"][term]["rules"]}


def test_robust_when_every_acceptable_variant_agrees():
    v, e = _results([0.50, 0.52, 0.47, 0.55, 0.49, 0.51])
    out = verdicts.judge(SPEC, v, e)
    x = out["terms"]["x[t]"]
    assert x["verdict"] == "robust" and x["rules"] == []
    assert {"sign_change", "significance_flip", "spread"} <= set(x["passed"])
    assert x["figures"]["share_significant"] == 1.0
    assert x["base"]["estimate"] == 0.5 and x["base"]["significant"]


def test_sign_change_among_acceptable_variants_is_fragile():
    v, e = _results([0.30, 0.25, -0.05, 0.28, 0.31])
    x = verdicts.judge(SPEC, v, e)["terms"]["x[t]"]
    assert x["verdict"] == "fragile"
    figs = _fired({"terms": {"x[t]": x}})["sign_change"]["figures"]
    assert figs["positive"] == 4 and figs["negative"] == 1 and figs["min"] == -0.05


def test_variant_failing_its_tests_does_not_count():
    # the only negative estimate comes from a variant whose AR(2) test rejects, another
    # from one whose level-equation instruments are rejected (Blundell & Bond 1998)
    v, e = _results([0.30, 0.25, -0.40, 0.28, -0.31, 0.29],
                    diag={2: {"ar2_p": 0.01}, 4: {"diff_hansen_level_p": 0.001}})
    out = verdicts.judge(SPEC, v, e)
    x = out["terms"]["x[t]"]
    assert x["verdict"] == "robust"
    assert x["figures"]["variants_acceptable"] == 4 and x["figures"]["variants_ok"] == 6
    flags = {f["id"]: f for f in out["model"]}
    assert flags["ar2_rejects"]["figures"]["ids"] == ["v2"]
    assert flags["difference_hansen_level_rejects"]["figures"]["ids"] == ["v4"]
    assert out["variants"]["acceptable"] == 4


def test_significance_flip_uses_the_share_threshold():
    # base significant (0.3/0.1); 3 of 10 acceptable variants are not (share 0.7 < 0.9)
    ests = [0.30, 0.29, 0.31, 0.28, 0.33, 0.30, 0.32, 0.10, 0.12, 0.09]
    v, e = _results(ests)
    x = verdicts.judge(SPEC, v, e)["terms"]["x[t]"]
    assert x["verdict"] == "fragile"
    flip = _fired({"terms": {"x[t]": x}})["significance_flip"]
    assert flip["figures"]["share_agreeing"] == pytest.approx(0.7)
    assert flip["threshold"] == 0.9 and flip["threshold_name"] == "significant_share"
    lenient = dataclasses.replace(SPEC, thresholds=Thresholds(significant_share=0.6))
    assert verdicts.judge(lenient, v, e)["terms"]["x[t]"]["verdict"] == "robust"


def test_insignificant_base_agreed_by_insignificant_variants_is_robust():
    v, e = _results([0.05, 0.04, 0.06, 0.03, 0.07], se=0.1)
    x = verdicts.judge(SPEC, v, e)["terms"]["x[t]"]
    assert x["verdict"] == "robust" and not x["base"]["significant"]
    assert x["figures"]["share_agreeing_with_base"] == 1.0


def test_spread_is_a_caution_that_keeps_the_verdict():
    v, e = _results([0.50, 0.52, 0.85, 0.49])  # 0.85 is 3.5 base SEs away
    x = verdicts.judge(SPEC, v, e)["terms"]["x[t]"]
    assert x["verdict"] == "robust"
    spread = _fired({"terms": {"x[t]": x}})["spread"]
    assert spread["effect"] == "caution"
    assert spread["figures"]["max_distance_in_se"] == pytest.approx(3.5)
    assert spread["figures"]["variant"] == "v2"


def test_base_failing_its_tests_is_inconclusive_unless_fragile():
    v, e = _results([0.5, 0.52, 0.48, 0.51], diag={0: {"hansen_p": 0.01}})
    x = verdicts.judge(SPEC, v, e)["terms"]["x[t]"]
    assert x["verdict"] == "inconclusive"
    assert _fired({"terms": {"x[t]": x}})["base_not_acceptable"]["figures"]["hansen_p"] == 0.01
    # when the acceptable variants disagree in sign the term is fragile all the same
    v, e = _results([0.5, 0.52, -0.2, 0.51], diag={0: {"hansen_p": 0.01}})
    assert verdicts.judge(SPEC, v, e)["terms"]["x[t]"]["verdict"] == "fragile"


def test_failed_base_and_too_few_variants_are_inconclusive():
    v, e = _results([0.5, 0.52, 0.48], status={0: "failed"})
    out = verdicts.judge(SPEC, v, e)
    x = out["terms"]["x[t]"]
    assert x["verdict"] == "inconclusive" and "base_not_ok" in _fired(out)
    assert {f["id"] for f in out["model"]} >= {"variants_failed"}
    v, e = _results([0.5])  # nothing varied: one acceptable variant
    out = verdicts.judge(SPEC, v, e)
    assert out["terms"]["x[t]"]["verdict"] == "inconclusive"
    assert _fired(out)["too_few_acceptable"]["figures"]["acceptable"] == 1


def test_ar_coefficient_outside_the_ols_fe_band():
    v, e = _results([0.5, 0.5, 0.5], ar=[0.30, 0.45, 0.50])
    bounds = pd.DataFrame({"variant": ["v0", "v1", "v2"], "term": "y[t-1]",
                           "ols": [0.70, 0.70, 0.70], "fe": [0.40, 0.40, 0.40]})
    out = verdicts.judge(SPEC, v, e, bounds)
    rule = _fired(out, "y[t-1]")["ar_outside_band"]
    assert rule["figures"]["position"] == "below"
    assert rule["figures"]["share_acceptable_outside"] == pytest.approx(1 / 3)
    assert "Bond" in rule["source"]
    assert out["terms"]["y[t-1]"]["verdict"] == "robust"  # a caution only
    inside = bounds.assign(fe=0.2)
    out = verdicts.judge(SPEC, v, e, inside)
    assert "ar_outside_band" in out["terms"]["y[t-1]"]["passed"]


def test_model_flags_for_proliferation():
    v, e = _results([0.5, 0.5, 0.5, 0.5],
                    diag={1: {"hansen_p": 0.999, "instruments": 150},
                          2: {"hansen_p": 0.3}, 3: {"hansen_p": 0.1}})
    out = verdicts.judge(SPEC, v, e)
    flags = {f["id"]: f for f in out["model"]}
    assert flags["hansen_p_near_one"]["figures"]["ids"] == ["v1"]
    assert flags["hansen_p_high"]["figures"]["variants"] == 3  # 0.4, 0.999 and 0.3, not 0.1
    assert flags["instruments_exceed_units"]["figures"]["ids"] == ["v1"]
    assert flags["instruments_exceed_units"]["threshold"] == 1.0
    assert "hansen_rejects" not in flags  # only rules that fired are listed


def test_verdict_document_is_plain_json_with_sources():
    v, e = _results([0.5, np.nan, 0.4], diag={1: {"hansen_p": np.nan}})
    out = verdicts.judge(SPEC, v, e)
    text = json.dumps(out, allow_nan=False)  # no NaN leaks into verdict.json
    assert "not proof" in json.loads(text)["disclaimer"]
    ids = {r["id"] for r in out["rules"]}
    assert ids == {r.id for r in verdicts.RULES}
    for rule in out["rules"]:
        assert rule["source"] and rule["description"] and rule["effect"]
        if rule["threshold"]:
            assert rule["threshold_value"] is not None
    assert "fragile if sign_change or significance_flip" in out["combination"]


# ---------------------------------------------------------------------------
# simulated panels with known truth, through the real estimator
# ---------------------------------------------------------------------------
def test_simulated_robust_coefficient(tmp_path):
    # y = 0.5 y[t-1] + 1.0 x + 0.5 w + eta + eps; x endogenous (theta = 0.4) and
    # treated as such in every variant: the conclusion "x raises y" should survive
    spec = make_spec(tmp_path, {"transform": ["fd", "fod"], "equations": ["difference", "system"],
                                "form": ["per-period", "collapsed"]},
                     audit={"focus": ["x[t]"]},
                     panel_kw={"n_units": 150, "n_periods": 7, "seed": 1,
                               "process": PanelProcess(rho=0.5, beta=1.0, theta=0.4)})
    result = audit(spec, jobs=1)
    x = result.verdict["terms"]["x[t]"]
    assert x["verdict"] == "robust", x["summary"]
    assert x["figures"]["min"] > 0.5 and x["figures"]["share_significant"] == 1.0


def test_simulated_sign_that_depends_on_the_instrument_set(tmp_path):
    # true effect of x is -0.3, and x is strongly endogenous (theta = 1). Treating x as
    # exogenous (it instruments itself) biases its coefficient upwards past zero;
    # in difference GMM the Hansen test does not catch it. The audit must call it fragile.
    spec = make_spec(tmp_path, {"roles": {"x": ["endogenous", "exogenous"]},
                                "transform": ["fd", "fod"],
                                "equations": ["difference", "system"], "last_lag": [3, "all"]},
                     instruments={"form": "collapsed"}, audit={"focus": ["x[t]"]},
                     panel_kw={"n_units": 150, "n_periods": 7, "seed": 1,
                               "process": PanelProcess(rho=0.5, beta=-0.3, theta=1.0)})
    result = audit(spec, jobs=1)
    est = result.estimates[result.estimates["term"] == "x[t]"].merge(
        result.variants[["variant", "role:x", "acceptable"]], on="variant")
    endo = est[est["role:x"] == "endogenous"]["estimate"]
    exo = est[est["role:x"] == "exogenous"]["estimate"]
    assert (endo < 0).all() and (exo > 0).all()  # the sign follows the instrument set
    assert est[est["role:x"] == "exogenous"]["acceptable"].any()  # tests miss some
    x = result.verdict["terms"]["x[t]"]
    assert x["verdict"] == "fragile"
    assert {"sign_change", "significance_flip"} <= {r["id"] for r in x["rules"]}
