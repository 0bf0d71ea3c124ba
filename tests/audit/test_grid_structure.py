"""The model-structure dimensions of the grid: the lags of the outcome
(``[audit.vary] outcome_lags``), of each regressor (``[audit.vary.lags]``) and the
regressors left out (``[audit.vary] drop``).

Known truth: an AR(2) panel simulated here (y = 0.5 y[t-1] + 0.3 y[t-2] + x + eta + eps,
x strictly exogenous). Omitting the second lag leaves y[t-2] in the error, so the
differenced residuals are serially correlated at order 2 and the Arellano & Bond
(1991, section 3, the m2 statistic) AR(2) test rejects; with both lags the
coefficients are recovered and the test does not reject.
"""
from __future__ import annotations

import numpy as np
import pandas as pd
import pytest

from helpers_audit import make_spec, model_dict
from robustgmm.audit import audit, grid
from robustgmm.errors import InputError
from robustgmm.modelfile import spec_from_dict, spec_to_dict

RHO1, RHO2, BETA = 0.5, 0.3, 1.0


def ar2_panel(folder, n_units=500, n_periods=9, seed=11, burn_in=40):
    """A mean-stationary AR(2) panel with an exogenous regressor x and an unrelated
    exogenous column w (for drop)."""
    rng = np.random.default_rng(seed)
    eta = rng.normal(0.0, 1.0, n_units)
    x_prev = np.zeros(n_units)
    mean = (eta) / (1.0 - RHO1 - RHO2)
    y1 = mean + rng.normal(0, 1, n_units)
    y2 = mean + rng.normal(0, 1, n_units)
    rows = {k: np.empty((n_units, n_periods)) for k in ("y", "x", "w")}
    for t in range(burn_in + n_periods):
        x = 0.5 * x_prev + rng.normal(0, 1, n_units)
        w = rng.normal(0, 1, n_units)
        y = RHO1 * y1 + RHO2 * y2 + BETA * x + eta + rng.normal(0, 1, n_units)
        y2, y1, x_prev = y1, y, x
        if t >= burn_in:
            k = t - burn_in
            rows["y"][:, k], rows["x"][:, k], rows["w"][:, k] = y, x, w
    frame = pd.DataFrame({"unit": np.repeat(np.arange(1, n_units + 1), n_periods),
                          "period": np.tile(2001 + np.arange(n_periods), n_units),
                          **{k: v.reshape(-1) for k, v in rows.items()}})
    frame.to_csv(folder / "panel.csv", index=False)


def _ar2_spec(folder, vary, x_lags=(0,), **sections):
    d = model_dict(vary, **sections)
    d["model"]["regressors"] = [{"name": "x", "lags": list(x_lags), "role": "exogenous"},
                                {"name": "w", "lags": [0], "role": "exogenous"}]
    d.setdefault("instruments", {}).update({"last_lag": 3, "form": "collapsed"})
    return spec_from_dict(d, base_dir=folder)


# ---------------------------------------------------------------------------
# expansion and stable ids
# ---------------------------------------------------------------------------
def test_lag_and_drop_dimensions_expand_with_the_base_first(tmp_path):
    spec = make_spec(tmp_path, {"outcome_lags": [[1], [1, 2]], "lags": {"x": [[0], [0, 1]]},
                                "drop": [[], ["w"]]})
    variants = grid.expand(spec)
    assert grid.setting_columns(spec) == ["outcome_lags", "lags:x", "drop"]
    assert len(variants) == 8 and variants[0].is_base
    assert variants[0].settings_dict() == {"outcome_lags": "[1]", "lags:x": "[0]", "drop": "[]"}
    for v in variants:
        s = v.settings_dict()
        regs = {r.name: r for r in v.spec.regressors}
        assert str(list(v.spec.outcome_lags)) == s["outcome_lags"]
        assert str(list(regs["x"].lags)) == s["lags:x"]
        assert ("w" in regs) == (s["drop"] == "[]")
        assert regs["x"].role == "endogenous"  # roles untouched
    labels = {v.settings_dict()["outcome_lags"]: v.spec.ar_terms() for v in variants}
    assert labels["[1, 2]"] == ("y[t-1]", "y[t-2]")


def test_base_and_other_ids_do_not_move_when_structure_is_varied(tmp_path):
    plain = make_spec(tmp_path, {"steps": [1, 2]})
    varied = make_spec(tmp_path, {"steps": [1, 2], "outcome_lags": [[1], [1, 2]],
                                  "lags": {"x": [[0], [0, 1]]}, "drop": [[], ["w"]]})
    none = make_spec(tmp_path)
    ids_plain = {v.spec.steps: v.id for v in grid.expand(plain)}
    ids_varied = {(v.spec.steps, v.settings_dict()["outcome_lags"],
                   v.settings_dict()["lags:x"], v.settings_dict()["drop"]): v.id
                  for v in grid.expand(varied)}
    assert grid.expand(none)[0].id == grid.expand(varied)[0].id == ids_plain[2]
    assert ids_varied[(1, "[1]", "[0]", "[]")] == ids_plain[1]
    assert len(set(ids_varied.values())) == 16
    # the id is the id of the same model written as the base
    two = make_spec(tmp_path, model={"outcome_lags": [1, 2]})
    assert grid.expand(two)[0].id == ids_varied[(2, "[1, 2]", "[0]", "[]")]


def test_dropping_and_a_varied_role_of_the_dropped_regressor_gives_one_variant(tmp_path):
    spec = make_spec(tmp_path, {"drop": [[], ["x"]], "roles": {"x": ["endogenous", "exogenous"]}},
                     audit={"focus": ["w[t]"]})
    variants = grid.expand(spec)
    # without x its role does not matter: 3 distinct estimations, not 4
    assert len(variants) == 3
    assert sum(v.settings_dict()["drop"] == '["x"]' for v in variants) == 1


# ---------------------------------------------------------------------------
# model file: reading, round trip, one-line errors naming the key
# ---------------------------------------------------------------------------
def test_model_file_round_trip(tmp_path):
    spec = make_spec(tmp_path, {"outcome_lags": [[1], [1, 2]], "lags": {"x": [[0], [0, 1]]},
                                "drop": [[], ["w"]]})
    assert spec.vary.outcome_lags == ((1,), (1, 2))
    assert spec.vary.lags == (("x", ((0,), (0, 1))),)
    assert spec.vary.drop == ((), ("w",))
    assert spec_from_dict(spec_to_dict(spec), source=spec.source) == spec


@pytest.mark.parametrize("vary, audit_section, needle", [
    ({"lags": {"z": [[0]]}}, {}, "[audit.vary.lags] z: is not a regressor"),
    ({"lags": {"y": [[0]]}}, {}, "[audit.vary.lags] y: is the outcome"),
    ({"lags": {"x": [[0], [-1]]}}, {}, "[audit.vary.lags] x = [[0], [-1]]: [-1] is not valid"),
    ({"outcome_lags": [[1], [0, 1]]}, {}, "[audit.vary] outcome_lags = [[1], [0, 1]]: [0, 1] is not valid"),
    ({"outcome_lags": [[1], [1]]}, {}, "[1] is listed twice"),
    ({"drop": [[], ["married"]]}, {}, '[audit.vary] drop = [[], ["married"]]: "married" is not a regressor'),
    ({"drop": [["x"]]}, {"focus": ["x[t]"]}, '"x" holds the focus term x[t]; a focus term cannot be dropped'),
    ({"drop": [[], ["x"]]}, {"focus": ["x[long-run]"]},
     '"x" holds the focus term x[long-run]; a focus term cannot be dropped'),
    ({"drop": ["x"]}, {}, '[audit.vary] drop = ["x"]: "x" is not valid'),
])
def test_bad_structure_keys_are_one_line_errors(tmp_path, vary, audit_section, needle):
    (tmp_path / "panel.csv").write_text("unit,period,y,x,w\n")
    with pytest.raises(InputError) as err:
        spec_from_dict(model_dict(vary, audit=audit_section), base_dir=tmp_path, source="m.toml")
    lines = err.value.problems
    assert len(lines) == 1 and "\n" not in lines[0], lines
    assert lines[0].startswith("m.toml: ") and needle in lines[0], lines


def test_default_focus_leaves_out_the_dropped_regressors(tmp_path):
    spec = make_spec(tmp_path, {"drop": [[], ["w"]]})
    assert spec.focus_terms() == ("y[t-1]", "x[t]")


# ---------------------------------------------------------------------------
# estimation on known truth and the verdict's counting
# ---------------------------------------------------------------------------
def test_second_outcome_lag_recovers_the_ar2_truth_and_passes_ar2(tmp_path):
    ar2_panel(tmp_path)
    spec = _ar2_spec(tmp_path, {"outcome_lags": [[1], [1, 2]]}, audit={"focus": ["x[t]"]})
    result = audit(spec, jobs=1)
    v = result.variants.set_index("outcome_lags")
    assert set(v["status"]) == {"ok"}
    # AR(1) on AR(2) data: the m2 test rejects (Arellano & Bond 1991); AR(2) model: it does not
    assert v.loc["[1]", "ar2_p"] < 0.01
    assert v.loc["[1, 2]", "ar2_p"] > 0.05
    est = result.estimates.merge(result.variants[["variant", "outcome_lags"]], on="variant")
    two = est[est["outcome_lags"] == "[1, 2]"].set_index("term")
    for term, truth in (("y[t-1]", RHO1), ("y[t-2]", RHO2), ("x[t]", BETA)):
        b, se = two.loc[term, "estimate"], two.loc[term, "std_error"]
        assert abs(b - truth) < 3 * se, (term, b, se)
    one = est[est["outcome_lags"] == "[1]"].set_index("term")
    assert "y[t-2]" not in one.index
    # the AR-sum bound of each variant is its own lags' sum
    sums = result.bounds[result.bounds["term"].str.startswith("sum(")]
    assert list(sums["term"]) == ["sum(y[t-1], y[t-2])"]
    assert np.isfinite(sums["gmm"]).all()
    assert abs(float(sums["gmm"].iloc[0]) - (RHO1 + RHO2)) < 0.15


def test_verdict_counts_only_variants_that_estimate_the_term(tmp_path):
    ar2_panel(tmp_path, n_units=300)
    d_vary = {"lags": {"x": [[0, 1], [0]]}, "steps": [1, 2]}
    spec = _ar2_spec(tmp_path, d_vary, x_lags=(0, 1), model={"outcome_lags": [1, 2]},
                     audit={"focus": ["x[t-1]", "x[t]"]})
    result = audit(spec, jobs=1)
    terms = result.verdict["terms"]
    judged_all = terms["x[t]"]["figures"]["judged"]
    lag1 = terms["x[t-1]"]["figures"]
    with_lag = result.variants[result.variants["lags:x"] == "[0, 1]"]
    judged_with = int(with_lag["acceptable"].sum())
    assert lag1["judged"] == judged_with
    assert lag1["without_term"] == judged_all - judged_with > 0
    assert terms["x[t]"]["figures"]["without_term"] == 0
    assert "leave it out" in terms["x[t-1]"]["reason"]
    assert "leave it out" not in terms["x[t]"]["reason"]
    # x[t-1] has true coefficient 0: the variants that estimate it agree it is small
    est = result.estimates[result.estimates["term"] == "x[t-1]"]
    assert (np.abs(est["estimate"]) < 3 * est["std_error"]).all()


def test_a_term_only_some_variants_have_can_be_labelled(tmp_path):
    spec = make_spec(tmp_path, {"outcome_lags": [[1], [1, 2]], "lags": {"x": [[0], [0, 1]]}},
                     labels={"y[t-2]": "Orders two years back", "x[t-1]": "Lagged x"})
    assert dict(spec.labels)["y[t-2]"] == "Orders two years back"
    with pytest.raises(InputError, match=r"\[labels\] y\[t-3\]: is not a term of the model"):
        make_spec(tmp_path, {"outcome_lags": [[1], [1, 2]]}, labels={"y[t-3]": "no"})
