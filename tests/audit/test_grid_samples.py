"""Subgroup samples: ``keep = {column, values}`` and ``split = "column"`` in
``[[audit.vary.sample]]``, with the ``min_units`` guard.

Known truth: a panel from :func:`robustgmm.simulate.simulate_arrays` where the
coefficient on x is 1.0 for the units of sector "A" and 0.0 for sector "B" (a
time-invariant column); sector "C" has 20 units, fewer than the default
``min_units = 50``. Each subgroup's estimate must recover its own sector's value.
"""
from __future__ import annotations

import numpy as np
import pandas as pd
import pytest

from helpers_audit import model_dict
from robustgmm.audit import audit, grid
from robustgmm.errors import InputError
from robustgmm.modelfile import spec_from_dict, spec_to_dict
from robustgmm.simulate import PanelProcess, long_frame, simulate_arrays
from robustgmm.spec import SampleFilter

SECTORS = {"A": (250, 1.0), "B": (250, 0.0), "C": (20, 1.0)}


def sector_panel(folder, seed=4, n_periods=7):
    rng = np.random.default_rng(seed)
    sector = np.concatenate([[s] * n for s, (n, _) in SECTORS.items()])
    beta = np.concatenate([[b] * n for _, (n, b) in SECTORS.items()])
    arrays = simulate_arrays(rng, len(sector), n_periods, PanelProcess(theta=0.0), beta=beta)
    frame = long_frame(np.arange(1, len(sector) + 1), 2001 + np.arange(n_periods), arrays,
                       unit="unit", period="period")
    frame["sector"] = np.repeat(sector, n_periods)
    frame["shifting"] = np.where(frame["period"] > 2003, "late", frame["sector"])
    frame.to_csv(folder / "panel.csv", index=False)


def _spec(folder, samples, base_sample=None, **kw):
    d = model_dict({"steps": [2]}, instruments={"last_lag": 3, "form": "collapsed"},
                   audit={"focus": ["x[t]"]})
    d["model"]["regressors"][0]["role"] = "exogenous"  # theta = 0: x is exogenous
    d["audit"]["vary"]["sample"] = samples
    if base_sample is not None:
        d["sample"] = base_sample
    return spec_from_dict(d, base_dir=folder, **kw)


def test_split_gives_one_subgroup_per_value_and_skips_small_ones(tmp_path):
    sector_panel(tmp_path)
    spec = _spec(tmp_path, [{"name": "by sector", "split": "sector"}])
    resolved = grid.resolve_splits(spec)
    assert [s.name for s in resolved.vary.samples] == [
        "by sector: sector = A", "by sector: sector = B", "by sector: sector = C"]
    assert all(s.keep_column == "sector" and s.split is None for s in resolved.vary.samples)
    result = audit(spec, jobs=1)
    v = result.variants.set_index("sample")
    assert v.loc["by sector: sector = C", "status"] == "skipped"
    assert "has 20 units, fewer than min_units = 50" in v.loc["by sector: sector = C", "reason"]
    est = result.estimates[result.estimates["term"] == "x[t]"].merge(
        result.variants[["variant", "sample", "units"]], on="variant").set_index("sample")
    for name, truth in (("by sector: sector = A", 1.0), ("by sector: sector = B", 0.0)):
        b, se = est.loc[name, "estimate"], est.loc[name, "std_error"]
        assert abs(b - truth) < 4 * se, (name, b, se)  # 4 SE: a 1-in-15,000 miss
        assert est.loc[name, "units"] == 250
    full = est.loc["full sample"]
    assert 0.2 < full["estimate"] < 0.9  # the pooled estimate mixes 1.0 and 0.0


def test_keep_subgroup_and_min_units(tmp_path):
    sector_panel(tmp_path)
    spec = _spec(tmp_path, [{"name": "A only", "keep": {"column": "sector", "values": ["A"]}},
                            {"name": "C only", "keep": {"column": "sector", "values": ["C"]},
                             "min_units": 10}])
    assert spec.vary.samples[0].keep_values == ("A",)
    assert spec.vary.samples[1].min_units == 10
    assert spec_from_dict(spec_to_dict(spec), source=spec.source) == spec
    result = audit(spec, jobs=1)
    v = result.variants.set_index("sample")
    assert v.loc["A only", "units"] == 250 and v.loc["C only", "units"] == 20
    assert (v["status"] == "ok").all()
    # a keep sample and the split subgroup of the same value are the same variant
    both = _spec(tmp_path, [{"name": "A only", "keep": {"column": "sector", "values": ["A"]}},
                            {"name": "by sector", "split": "sector"}])
    ids = [v.id for v in grid.expand(grid.resolve_splits(both))]
    assert len(ids) == 1 + 3  # base, A (once), B, C


def test_a_base_sample_without_keep_keeps_its_id(tmp_path):
    sector_panel(tmp_path)
    plain = grid.expand(_spec(tmp_path, [{"name": "late", "period_from": 2003}]))
    assert grid.sample_key(SampleFilter(name="x")) == grid.sample_key(SampleFilter())
    assert "keep_column" not in grid.sample_key(plain[1].spec.sample)
    with_split = grid.expand(grid.resolve_splits(
        _spec(tmp_path, [{"name": "late", "period_from": 2003}, {"split": "sector"}])))
    assert [v.id for v in with_split[:2]] == [v.id for v in plain]


@pytest.mark.parametrize("samples, start, needle", [
    ([{"split": "shifting"}], "m.toml: [[audit.vary.sample]] #1 (by shifting) split",
     "split = 'shifting': the column varies within units"),
    ([{"split": "nope"}], "", "column 'nope' not found; it is named in m.toml"),
])
def test_bad_split_columns_are_one_line_errors(tmp_path, samples, start, needle):
    sector_panel(tmp_path)
    spec = _spec(tmp_path, samples, source="m.toml")
    with pytest.raises(InputError) as err:
        audit(spec, jobs=1)
    assert len(err.value.problems) == 1 and needle in err.value.problems[0]
    assert err.value.problems[0].startswith(start)


@pytest.mark.parametrize("samples, base, needle", [
    ([{"name": "a"}], {"split": "sector"}, '[sample] split = "sector": splits only a varied sample'),
    ([{"keep": {"column": "sector"}}], None, "keep values: is missing (required)"),
    ([{"keep": {"column": "sector", "values": []}}], None, "must list at least one value"),
    ([{"keep": "sector"}], None, 'keep = "sector": must be a table'),
    ([{"split": "sector", "min_units": 0}], None, "min_units = 0: must be a whole number"),
])
def test_bad_sample_keys_are_one_line_errors(tmp_path, samples, base, needle):
    (tmp_path / "panel.csv").write_text("unit,period,y,x,w\n")
    with pytest.raises(InputError) as err:
        _spec(tmp_path, samples, base_sample=base, source="m.toml")
    assert len(err.value.problems) == 1, err.value.problems
    assert needle in err.value.problems[0], err.value.problems


def test_keep_value_absent_from_the_data_skips_the_variant(tmp_path):
    sector_panel(tmp_path)
    spec = _spec(tmp_path, [{"name": "Z", "keep": {"column": "sector", "values": ["Z"]}}])
    result = audit(spec, jobs=1)
    row = result.variants.set_index("sample").loc["Z"]
    assert row["status"] == "skipped" and "none of the kept values 'Z'" in row["reason"]
