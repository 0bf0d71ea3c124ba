"""The cost estimate that decides whether worker processes start
(robustgmm.audit.cost) and the runner's use of it: small audits stay in this
process whatever ``jobs`` allows and say so; ``start_workers`` starts them anyway."""
from __future__ import annotations

import dataclasses

import pytest

from robustgmm.audit import cost, grid, runner
from robustgmm.core.design import Design
from robustgmm.simulate import simulate_panel
from robustgmm.data import panel_from_frame
from robustgmm.spec import Regressor, Spec

from helpers_audit import make_spec

VARY = {"transform": ["fd", "fod"], "steps": [1, 2], "form": ["per-period", "collapsed"]}


def _spec(**kw):
    base = dict(unit="unit", period="period", outcome="y", outcome_lags=(1,),
                regressors=(Regressor("x", (0,), "endogenous"), Regressor("w", (0,), "exogenous")),
                time_effects=True, equations="system", transform="fd", steps=2,
                errors="robust", first_lag=2, last_lag=None, form="per-period")
    base.update(kw)
    return Spec(**base)


@pytest.mark.parametrize("periods", [7, 11])
@pytest.mark.parametrize("equations", ["difference", "system"])
@pytest.mark.parametrize("form", ["per-period", "collapsed"])
@pytest.mark.parametrize("last_lag", [2, 4, None])
@pytest.mark.parametrize("predetermined", [False, True])
def test_instrument_estimate_equals_the_cores_columns(periods, equations, form, last_lag,
                                                      predetermined):
    # the core's design (robustgmm.core.design.Design.L_all: every instrument column
    # before the redundancy checks) is the reference on balanced panels
    panel = panel_from_frame(simulate_panel(60, periods, seed=3), "unit", "period",
                             ["y", "x", "w"])
    regs = ((Regressor("x", (0, 1), "predetermined"), Regressor("w", (0,), "exogenous"))
            if predetermined else None)
    spec = _spec(equations=equations, form=form, last_lag=last_lag,
                 **({"regressors": regs} if regs else {}))
    assert cost.instrument_estimate(spec, panel.n_periods) == Design(spec, panel).L_all


def test_group_estimate_grows_with_rows_instruments_and_members():
    small = panel_from_frame(simulate_panel(100, 8, seed=1), "unit", "period", ["y", "x", "w"])
    large = panel_from_frame(simulate_panel(400, 8, seed=1), "unit", "period", ["y", "x", "w"])
    est = cost.Estimates()
    spec = _spec()
    one = est.group_seconds([spec], small)
    assert est.group_seconds([spec], large) > one
    assert est.group_seconds([spec, dataclasses.replace(spec, steps=1)], small) > one
    assert est.group_seconds([_spec(form="collapsed")], small) < one
    # a share group is estimated on its widest window
    narrow = dataclasses.replace(spec, last_lag=2)
    assert est.group_seconds([narrow, spec], small) == est.group_seconds([spec, narrow], small)
    assert est.group_seconds([narrow], small) < one


def test_workers_start_only_when_they_save_more_than_their_start_up():
    s = cost.WORKER_STARTUP_SECONDS
    assert not cost.repays_workers(100.0, 1)
    assert not cost.repays_workers(1.9 * s, 2)   # saves 0.95 s of start-up: not worth it
    assert cost.repays_workers(2.1 * s, 2)
    assert cost.repays_workers(1.4 * s, 4)       # 4 workers save three quarters
    assert cost.dispatch_line(0.31, 2, False) == "estimated 0.3 s: running in this process"
    assert cost.dispatch_line(12.34, 2, True) == "estimated 12.3 s: starting 2 worker processes"


@pytest.fixture
def planned(tmp_path):
    spec = make_spec(tmp_path, VARY)
    panels = grid.load_panels(spec)
    return spec, panels, grid.plan(spec, panels)


def test_small_audit_runs_in_process_whatever_jobs_and_says_so(planned):
    _, panels, variants = planned
    lines = []
    _, stats = runner.run_variants(variants, panels, jobs=2, notify=lines.append)
    assert stats.jobs == 1 and stats.backend == "in-process"
    assert len(lines) == 1 and lines[0].endswith(": running in this process"), lines
    # jobs = 1 asks for nothing else: no line
    lines.clear()
    runner.run_variants(variants, panels, jobs=1, notify=lines.append)
    assert lines == []


def test_workers_start_when_the_estimate_repays_them_or_when_asked(planned, monkeypatch):
    _, panels, variants = planned
    one, _ = runner.run_variants(variants, panels, jobs=1)
    lines = []
    monkeypatch.setattr(cost, "PER_FIT", 10.0)  # a (pretend) heavy audit
    heavy, stats = runner.run_variants(variants, panels, jobs=2, notify=lines.append)
    assert stats.jobs == 2 and stats.backend == "loky"
    assert lines and lines[0].endswith(": starting 2 worker processes"), lines
    monkeypatch.setattr(cost, "PER_FIT", 0.0)
    lines.clear()
    forced, stats = runner.run_variants(variants, panels, jobs=2, start_workers=True,
                                        notify=lines.append)
    assert stats.jobs == 2 and stats.backend == "loky" and lines == []
    text = {vid: (o.status, o.fit.to_dict() if o.fit else None) for vid, o in one.items()}
    for other in (heavy, forced):
        assert {vid: (o.status, o.fit.to_dict() if o.fit else None)
                for vid, o in other.items()} == text
