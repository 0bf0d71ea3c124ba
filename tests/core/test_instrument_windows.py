"""Per-variable instrument windows and forms (``[model] instrument_lags``,
``[[model.regressors]] instrument_lags`` / ``instrument_form``), the grid dimension
``[audit.vary.instrument_lags]`` and external GMM-style instruments
(``[[instruments.gmm]]``).

Checks:
- exact equivalences: when the outcome is the only GMM-style variable, its own window
  ``[2, 3]`` is the global ``last_lag = 3`` (same instrument set, same estimates);
  an own window equal to the global one changes nothing;
- instrument counts and difference-in-Hansen groups follow each variable's window
  and form (collapsed: one column per lag, Roodman 2009);
- known truth (robustgmm.simulate, x endogenous with beta = 1): the estimate with an
  external instrument z (lagged levels of a noisy copy of x, valid from lag 2 by the
  same argument as x's own levels, Arellano & Bond 1991) recovers beta within 4 SE.
"""
from __future__ import annotations

import dataclasses

import numpy as np
import pytest

from helpers_audit import model_dict
from robustgmm import core
from robustgmm.audit import audit, grid
from robustgmm.core.design import Design
from robustgmm.data import load_panel
from robustgmm.errors import InputError
from robustgmm.modelfile import spec_from_dict, spec_to_dict
from robustgmm.simulate import PanelProcess, simulate_panel

PROCESS = PanelProcess(rho=0.5, beta=1.0, theta=0.4)


@pytest.fixture
def folder(tmp_path):
    frame = simulate_panel(400, 7, PROCESS, seed=8)
    rng = np.random.default_rng(81)
    frame["z"] = frame["x"] + rng.normal(0, 1, len(frame))
    frame.to_csv(tmp_path / "panel.csv", index=False)
    return tmp_path


def _spec(folder, x_role="endogenous", x=None, vary=None, **sections):
    d = model_dict(vary, **sections)
    d["model"]["regressors"][0]["role"] = x_role
    d["model"]["regressors"][0].update(x or {})
    return spec_from_dict(d, base_dir=folder, source="m.toml")


def _fit(spec):
    return core.fit(spec, load_panel(spec))


def _groups(spec):
    design = Design(spec, load_panel(spec))
    out = {}
    for c in design.z_columns:
        out.setdefault(c.group, []).append(c.description)
    return out


def test_own_outcome_window_is_the_global_window_when_it_is_the_only_one(folder):
    own = _spec(folder, x_role="exogenous", model={"instrument_lags": [2, 3]})
    ref = _spec(folder, x_role="exogenous", instruments={"last_lag": 3})
    a, b = _fit(own), _fit(ref)
    assert a.counts.instruments == b.counts.instruments
    np.testing.assert_allclose([t.estimate for t in a.terms], [t.estimate for t in b.terms],
                               rtol=1e-9, atol=1e-12)
    np.testing.assert_allclose([t.std_error for t in a.terms], [t.std_error for t in b.terms],
                               rtol=1e-9, atol=1e-12)


def test_an_own_window_equal_to_the_global_one_changes_nothing(folder):
    own = _spec(folder, x={"instrument_lags": [2, 4], "instrument_form": "per-period"},
                instruments={"last_lag": 4})
    ref = _spec(folder, instruments={"last_lag": 4})
    a, b = _fit(own), _fit(ref)
    np.testing.assert_allclose([t.estimate for t in a.terms], [t.estimate for t in b.terms],
                               rtol=1e-9, atol=1e-12)
    assert grid.settings_hash(own) != grid.settings_hash(ref)  # written differently


def test_counts_and_groups_follow_each_variable(folder):
    spec = _spec(folder, x={"instrument_lags": [3, 3], "instrument_form": "collapsed"},
                 model={"instrument_lags": [2, 3]})
    g = _groups(spec)
    assert g["levels of x"] == ["x lag 3"]  # collapsed, one lag
    # the outcome: per-period, lags 2-3 on each transformed row (periods 3..7 of 7)
    assert all(" for period " in d for d in g["levels of y"])
    lags = sorted({d.split(" for ")[0] for d in g["levels of y"]})
    assert lags == ["y lag 2", "y lag 3"]
    # system GMM: the level equation uses the difference dated first - 1 of each window
    level = g["level equation"]
    assert "difference of x lag 2" in level  # collapsed: one column, x's first lag is 3
    assert any(d.startswith("difference of y lag 1 for period") for d in level)
    fit = _fit(spec)
    assert {"levels of x", "levels of y"} <= set(fit.difference_hansen)


def test_predetermined_window_is_used_as_given(folder):
    spec = _spec(folder, x_role="predetermined",
                 x={"instrument_lags": [1, 2], "instrument_form": "collapsed"})
    assert _groups(spec)["levels of x"] == ["x lag 1", "x lag 2"]


def test_external_gmm_instrument_recovers_the_truth(folder):
    spec = _spec(folder, instruments={"last_lag": 3, "form": "collapsed",
                                      "gmm": [{"name": "z", "lags": [2, 4]}]})
    assert spec.gmm_instruments[0].lags == (2, 4)
    assert "z" in spec.used_columns()
    g = _groups(spec)
    assert g["levels of z"] == ["z lag 2", "z lag 3", "z lag 4"]
    fit = _fit(spec)
    without = _fit(dataclasses.replace(spec, gmm_instruments=()))
    assert fit.counts.instruments == without.counts.instruments + 3 + 1  # + level difference
    t = fit.term("x[t]")
    assert abs(t.estimate - PROCESS.beta) < 4 * t.std_error, (t.estimate, t.std_error)
    assert "levels of z" in fit.difference_hansen
    assert spec_from_dict(spec_to_dict(spec), source=spec.source) == spec


def test_vary_instrument_lags_in_the_grid(folder):
    spec = _spec(folder, vary={"instrument_lags": {"x": [[2, 3], [2, "all"]],
                                                   "y": [[2, 4]]}})
    variants = grid.expand(spec)
    assert grid.setting_columns(spec) == ["instrument_lags:x", "instrument_lags:y"]
    assert variants[0].settings_dict() == {"instrument_lags:x": '[2, "all"]',
                                           "instrument_lags:y": '[2, "all"]'}
    # [2, "all"] is x's global window: that member is the base setting for x
    assert len(variants) == 1 + 2
    assert variants[0].id == grid.expand(_spec(folder))[0].id
    own = {v.settings_dict()["instrument_lags:x"]: v.spec for v in variants[1:]}
    assert own["[2, 3]"].regressors[0].instrument_lags == (2, 3)
    assert own["[2, 3]"].outcome_instrument_lags == (2, 4)
    assert own['[2, "all"]'].regressors[0].instrument_lags is None
    result = audit(spec, jobs=1)
    assert (result.variants["status"] == "ok").all()
    inst = result.variants.set_index("variant")["instruments"]
    assert inst.iloc[1] < inst.iloc[0]  # a shorter window, fewer instruments


def test_a_base_window_equal_to_the_global_one_is_not_planned_twice(folder):
    # the base writes the outcome's window [2, 4] although the global window is 2-4;
    # the grid member with the base's settings stores it as no own window. Same
    # estimation, so the plan holds it once (it was once planned and fitted twice,
    # caught only afterwards as a duplicate); the base keeps its written id.
    spec = _spec(folder, model={"instrument_lags": [2, 4]}, instruments={"last_lag": 4},
                 vary={"instrument_lags": {"x": [[2, 3], [2, 4]]}})
    variants = grid.expand(spec)
    assert [v.settings_dict()["instrument_lags:x"] for v in variants] == ["[2, 4]", "[2, 3]"]
    assert variants[0].is_base and variants[0].id == grid.settings_hash(spec)[:8]
    assert variants[1].spec.regressors[0].instrument_lags == (2, 3)


@pytest.mark.parametrize("kw, needle", [
    ({"x_role": "exogenous", "x": {"instrument_lags": [2, 3]}},
     "[[model.regressors]] #1 (x) instrument_lags: x is exogenous (it instruments itself)"),
    ({"x": {"instrument_lags": [3, 2]}},
     "instrument_lags = [3, 2]: the last lag must be a whole number of at least 3"),
    ({"x": {"instrument_form": "colapsed"}}, 'instrument_form = "colapsed": must be'),
    ({"vary": {"instrument_lags": {"w": [[2, 3]]}}},
     "[audit.vary.instrument_lags] w: w is exogenous (it instruments itself)"),
    ({"vary": {"instrument_lags": {"q": [[2, 3]]}}},
     "[audit.vary.instrument_lags] q: is not the outcome, a GMM-style regressor"),
    ({"instruments": {"gmm": [{"name": "x"}]}}, "[[instruments.gmm]] #1 (x) name = \"x\": is a model variable"),
    ({"instruments": {"gmm": [{"name": "z", "lag": [2, 3]}]}}, "[[instruments.gmm]] #1 (z) lag: unknown key"),
    ({"instruments": {"gmm": {"name": "z"}}}, "[instruments] gmm = {name = \"z\"}: must be a list"),
])
def test_bad_window_keys_are_one_line_errors(tmp_path, kw, needle):
    (tmp_path / "panel.csv").write_text("unit,period,y,x,w,z\n")
    with pytest.raises(InputError) as err:
        _spec(tmp_path, **kw)
    assert len(err.value.problems) == 1, err.value.problems
    assert err.value.problems[0].startswith("m.toml: ") and needle in err.value.problems[0], \
        err.value.problems


def test_an_own_window_from_lag_1_for_the_outcome_is_refused(folder):
    spec = _spec(folder, model={"instrument_lags": [1, 3]})
    with pytest.raises(InputError, match="y: instrument_lags starts at lag 1"):
        _fit(spec)
    with pytest.raises(InputError, match="the base model: y: instrument_lags starts at lag 1"):
        audit(spec, jobs=1)
    # a varied window from lag 1 of an endogenous regressor is a skipped variant
    spec = _spec(folder, vary={"instrument_lags": {"x": [[1, 3]]}})
    v = grid.expand(spec)[1]
    assert v.status == "skipped" and "x: instrument_lags starts at lag 1" in v.reason


def test_the_fit_summary_names_own_windows_and_external_instruments(folder):
    from robustgmm.terminal import own_windows_text
    spec = _spec(folder, x={"instrument_lags": [3, "all"], "instrument_form": "collapsed"},
                 model={"instrument_lags": [2, 4]}, instruments={"gmm": [{"name": "z"}]})
    assert own_windows_text(spec) == (" (y: lags 2-4; x: lags 3-all, collapsed; "
                                      "external z)")
    assert own_windows_text(_spec(folder)) == ""


def test_every_new_key_reads_from_a_toml_model_file(folder):
    from helpers_toml import spec_to_toml
    from robustgmm.modelfile import read_model
    spec = _spec(folder, x={"instrument_lags": [3, "all"], "instrument_form": "collapsed"},
                 model={"instrument_lags": [2, 4], "instrument_form": "per-period"},
                 instruments={"gmm": [{"name": "z", "lags": [2, 3], "form": "collapsed"}]},
                 vary={"outcome_lags": [[1], [1, 2]], "drop": [[], ["w"]],
                       "lags": {"x": [[0], [0, 1]]},
                       "instrument_lags": {"x": [[2, 3], [3, "all"]], "z": [[2, 4]]},
                       "sample": [{"name": "low", "keep": {"column": "unit",
                                                           "values": [1, 2, 3]},
                                   "min_units": 2}]})
    path = folder / "all.toml"
    path.write_text(spec_to_toml(spec))
    back = read_model(path)
    assert dataclasses.replace(back, source=spec.source) == spec
