"""Variant grid: expansion, stable ids, skip rules, plan table (robustgmm.audit.grid)."""
from __future__ import annotations

import dataclasses

import numpy as np
import pandas as pd
import pytest

from helpers_audit import model_dict
from robustgmm import core
from robustgmm.audit import grid
from robustgmm.errors import InputError
from robustgmm.modelfile import spec_from_dict
from robustgmm.simulate import PanelProcess, simulate_panel
from robustgmm.spec import SampleFilter, Vary


def _spec(tmp_path, vary=None, n_units=40, n_periods=6, **sections):
    path = tmp_path / "panel.csv"
    if not path.exists():
        frame = simulate_panel(n_units, n_periods, PanelProcess(), seed=3)
        frame["late"] = np.where(frame["period"] >= frame["period"].min() + 3, 1.0, frame["x"])
        frame.to_csv(path, index=False)
    return spec_from_dict(model_dict(vary, **sections), base_dir=tmp_path)


def test_product_with_base_first_and_marked(tmp_path):
    spec = _spec(tmp_path, {"transform": ["fd", "fod"], "steps": [1, 2],
                            "form": ["per-period", "collapsed"]})
    variants = grid.expand(spec)
    # base (system, fd, 2, per-period) is one of the 8 product members: 8 in total
    assert len(variants) == 8
    assert variants[0].is_base and variants[0].spec == spec
    assert sum(v.is_base for v in variants) == 1
    assert [v.order for v in variants] == list(range(1, 9))
    combos = {(v.spec.transform, v.spec.steps, v.spec.form) for v in variants}
    assert len(combos) == 8
    assert [c for c, _ in variants[0].settings] == ["transform", "steps", "form"]


def test_base_added_when_outside_the_listed_values(tmp_path):
    spec = _spec(tmp_path, {"last_lag": [2, 3]})  # base last_lag = all
    variants = grid.expand(spec)
    assert len(variants) == 3
    assert variants[0].is_base and variants[0].settings_dict() == {"last_lag": "all"}
    assert [v.settings_dict()["last_lag"] for v in variants[1:]] == [2, 3]


def test_ids_are_stable_and_independent_of_the_grid(tmp_path):
    small = _spec(tmp_path, {"steps": [1, 2]})
    large = _spec(tmp_path, {"steps": [1, 2], "form": ["per-period", "collapsed"]})
    ids_small = {v.spec.steps: v.id for v in grid.expand(small)}
    ids_large = {(v.spec.steps, v.spec.form): v.id for v in grid.expand(large)}
    assert ids_small[1] == ids_large[(1, "per-period")]
    assert ids_small[2] == ids_large[(2, "per-period")]
    assert [v.id for v in grid.expand(small)] == [v.id for v in grid.expand(small)]
    assert all(len(v.id) == grid.ID_LENGTH for v in grid.expand(large))
    # display-only fields do not change the id
    renamed = dataclasses.replace(small, source="elsewhere.toml", alpha=0.1, focus=("x[t]",))
    assert grid.expand(renamed)[0].id == grid.expand(small)[0].id


def test_roles_and_samples_dimensions(tmp_path):
    late = SampleFilter(name="late", period_from=2003)
    spec = _spec(tmp_path, {"roles": {"x": ["endogenous", "predetermined", "exogenous"]}})
    spec = dataclasses.replace(spec, vary=dataclasses.replace(spec.vary, samples=(late,)))
    variants = grid.expand(spec)
    assert len(variants) == 6
    assert grid.setting_columns(spec) == ["role:x", "sample"]
    for v in variants:
        roles = {r.name: r.role for r in v.spec.regressors}
        assert roles["x"] == v.settings_dict()["role:x"]
        assert roles["w"] == "exogenous"  # untouched
        assert v.settings_dict()["sample"] == v.spec.sample.name
    assert {v.spec.sample.name for v in variants} == {"full sample", "late"}


def test_unknown_regressor_in_roles_is_an_input_error(tmp_path):
    spec = _spec(tmp_path)
    spec = dataclasses.replace(spec, vary=Vary(roles=(("nope", ("exogenous",)),)))
    with pytest.raises(InputError, match="nope"):
        grid.expand(spec)


def test_empty_lag_window_is_skipped_with_reason(tmp_path):
    spec = _spec(tmp_path, {"first_lag": [2, 3, 4], "last_lag": [3, "all"]})
    variants = grid.expand(spec)
    by = {(v.spec.first_lag, v.spec.last_lag): v for v in variants}
    assert len(variants) == 6  # the base (2, all) is one of the product members
    assert by[(4, 3)].status == grid.SKIPPED
    assert "last_lag = 3 is below first_lag = 4" in by[(4, 3)].reason
    assert all(v.status == grid.PLANNED for k, v in by.items() if k != (4, 3))


def test_plan_skips_impossible_variants_with_reasons(tmp_path):
    # 6 periods: the deepest lag is 5
    spec = _spec(tmp_path, {"first_lag": [2, 6], "last_lag": [5, 9, "all"]})
    planned = grid.plan(spec, grid.load_panels(spec))
    by = {(v.spec.first_lag, v.spec.last_lag): v for v in planned}
    assert by[(6, None)].status == grid.SKIPPED
    assert "first_lag = 6 reaches past the panel" in by[(6, None)].reason
    assert "last_lag = 5 is below first_lag = 6" in by[(6, 5)].reason
    # without predetermined regressors last_lag 5 (= P - 1) and 9 are the "all" window;
    # the base (all) stands and the twins are skipped as duplicates
    base = planned[0]
    assert base.is_base and base.spec.last_lag is None and base.status == grid.PLANNED
    for last in (5, 9):
        v = by[(2, last)]
        assert v.status == grid.SKIPPED and f"same estimation as variant {base.id}" in v.reason
        assert core.count_instruments(v.spec, grid.load_panels(spec)[
            grid.sample_key(v.spec.sample)]) == base.instruments  # really the same set


def test_predetermined_window_makes_last_lag_p_minus_1_distinct(tmp_path):
    spec = _spec(tmp_path, {"last_lag": [5, 6]}, )
    spec = dataclasses.replace(spec, regressors=tuple(
        dataclasses.replace(r, role="predetermined") if r.name == "x" else r
        for r in spec.regressors))
    panels = grid.load_panels(spec)
    planned = {v.spec.last_lag: v for v in grid.plan(spec, panels)}
    # predetermined x uses lags up to last_lag - 1, so 5 differs from "all" and 6 does not
    assert planned[5].status == grid.PLANNED
    assert planned[6].status == grid.SKIPPED
    panel = panels[grid.sample_key(spec.sample)]
    assert core.count_instruments(planned[5].spec, panel) < planned[None].instruments
    assert core.count_instruments(planned[6].spec, panel) == planned[None].instruments


def test_fewer_instruments_than_parameters_is_skipped_with_counts(tmp_path):
    spec = _spec(tmp_path, {"last_lag": [2, "all"]},
                 model={"outcome_lags": [1, 2], "time_effects": False,
                        "regressors": [{"name": "x", "lags": [0, 1], "role": "endogenous"}]},
                 method={"equations": "difference"},
                 instruments={"form": "collapsed"})
    planned = {v.spec.last_lag: v for v in grid.plan(spec, grid.load_panels(spec))}
    # collapsed window of one lag: y lag 2 and x lag 2 instrument 4 coefficients
    assert planned[2].status == grid.SKIPPED
    assert "fewer instruments (2) than parameters (4)" in planned[2].reason
    assert planned[None].status == grid.PLANNED


def test_sample_that_leaves_no_data_skips_its_variants(tmp_path):
    spec = _spec(tmp_path, {"steps": [1, 2]})
    gone = SampleFilter(name="future", period_from=2100)
    spec = dataclasses.replace(spec, vary=dataclasses.replace(spec.vary, samples=(gone,)))
    planned = grid.plan(spec, grid.load_panels(spec))
    future = [v for v in planned if v.spec.sample.name == "future"]
    assert len(future) == 2
    assert all(v.status == grid.SKIPPED and "sample 'future'" in v.reason for v in future)
    assert all(v.status == grid.PLANNED for v in planned if v.spec.sample.name != "future")


def test_plan_frame_counts_match_the_core(tmp_path):
    spec = _spec(tmp_path, {"equations": ["difference", "system"],
                            "form": ["per-period", "collapsed"]})
    frame = grid.plan_frame(spec)
    assert list(frame.columns[:5]) == ["variant", "order", "is_base", "equations", "form"]
    assert {"status", "reason", "instruments", "instruments_per_unit", "units"} <= set(frame)
    assert frame["is_base"].sum() == 1 and bool(frame["is_base"].iloc[0])
    panel = grid.load_panels(spec)[grid.sample_key(spec.sample)]
    for v in grid.expand(spec):
        row = frame.set_index("variant").loc[v.id]
        assert row["instruments"] == core.count_instruments(v.spec, panel)
        mask = core.estimation_sample(v.spec, panel)
        assert row["units"] == mask.any(axis=1).sum()
        assert row["instruments_per_unit"] == pytest.approx(row["instruments"] / row["units"])
    # collapsed uses fewer instruments than per-period, system more than difference
    f = frame.set_index(["equations", "form"])["instruments"]
    assert f[("difference", "collapsed")] < f[("difference", "per-period")]
    assert f[("difference", "per-period")] < f[("system", "per-period")]


def test_plan_frame_uses_a_given_panel(tmp_path, monkeypatch):
    spec = _spec(tmp_path, {"steps": [1, 2]})
    panel = grid.load_panels(spec)[grid.sample_key(spec.sample)]
    from robustgmm import data

    def boom(*a, **k):
        raise AssertionError("the data file must not be read again")
    monkeypatch.setattr(data, "read_frame", boom)
    frame = grid.plan_frame(spec, panel)
    assert len(frame) == 2 and (frame["status"] == "planned").all()
