"""Runner: cache hit/miss/corruption, resume after an interrupt, failure isolation,
determinism across jobs, joblib backends, progress bar (robustgmm.audit.runner)."""
from __future__ import annotations

import dataclasses
import json
import os

import pytest

from robustgmm import core
from robustgmm.audit import grid, runner
from robustgmm.audit.grid import canonical_json as canonical
from robustgmm.errors import EstimationError
from robustgmm.spec import SampleFilter

from helpers_audit import CountingFamily, CountingFit, make_spec, outcome_text, run_each

VARY = {"transform": ["fd", "fod"], "steps": [1, 2], "form": ["per-period", "collapsed"]}


@pytest.fixture
def planned(tmp_path):
    spec = make_spec(tmp_path, VARY)
    panels = grid.load_panels(spec)
    return spec, panels, grid.plan(spec, panels)


def _count(monkeypatch, **kw):
    counter = CountingFamily(**kw)
    monkeypatch.setattr(core, "fit_family", counter)
    return counter


def test_cache_rerun_computes_nothing_and_detects_corruption(planned, tmp_path, monkeypatch):
    spec, panels, variants = planned
    cache_dir = tmp_path / "cache"
    counter = _count(monkeypatch)
    first, stats = runner.run_variants(variants, panels, jobs=1, cache_dir=cache_dir)
    # share groups differ only in steps: 4 groups of 2 (transform x form)
    assert counter.specs == stats.computed == len(variants) == 8 and counter.groups == 4
    assert stats.cached == 0 and stats.failed == 0 and stats.extra["groups"] == 4
    assert len(list(cache_dir.glob("*.json"))) == 8

    counter = _count(monkeypatch)
    again, stats = runner.run_variants(variants, panels, jobs=1, cache_dir=cache_dir)
    assert counter.specs == 0 and stats.cached == 8 and stats.computed == 0
    assert outcome_text(again) == outcome_text(first)  # bit-identical through the cache
    assert all(o.cached for o in again.values())

    # a flipped digit in one entry and a truncated one in another group: both groups
    # are estimated again (whole), only the two damaged entries are replaced
    entries = {json.loads(f.read_text())["variant"]: f for f in cache_dir.glob("*.json")}
    by_group = {}
    for v in variants:
        by_group.setdefault(core.share_key(v.spec), []).append(v.id)
    g1, g2 = list(by_group.values())[:2]
    entry = json.loads(entries[g1[0]].read_text())
    next(iter(entry["payload"]["fit"]["terms"].values()))["estimate"] += 1e-9
    entries[g1[0]].write_text(json.dumps(entry))
    entries[g2[1]].write_text(entries[g2[1]].read_text()[:50])
    counter = _count(monkeypatch)
    third, stats = runner.run_variants(variants, panels, jobs=1, cache_dir=cache_dir)
    assert counter.groups == 2 and counter.specs == 4
    assert stats.corrupted == 2 and stats.computed == 2 and stats.cached == 6
    assert outcome_text(third) == outcome_text(first)


def test_cache_key_changes_with_data_and_settings(planned):
    spec, panels, variants = planned
    a, b = variants[0].spec, variants[1].spec
    assert runner.Cache.key("h1", a) != runner.Cache.key("h2", a)
    assert runner.Cache.key("h1", a) != runner.Cache.key("h1", b)
    assert runner.Cache.key("h1", a) == runner.Cache.key(
        "h1", dataclasses.replace(a, source="renamed.toml", alpha=0.01))


def test_interrupted_run_resumes_where_it_stopped(planned, tmp_path, monkeypatch):
    spec, panels, variants = planned
    cache_dir = tmp_path / "cache"
    _count(monkeypatch, interrupt_at_group=3)  # Ctrl-C during the third group
    with pytest.raises(KeyboardInterrupt):
        runner.run_variants(variants, panels, jobs=1, cache_dir=cache_dir)
    assert len(list(cache_dir.glob("*.json"))) == 4  # two finished groups were kept
    counter = _count(monkeypatch)
    resumed, stats = runner.run_variants(variants, panels, jobs=1, cache_dir=cache_dir)
    assert counter.specs == stats.computed == 4 and stats.cached == 4
    monkeypatch.undo()
    fresh, _ = runner.run_variants(variants, panels, jobs=1, cache_dir=None)
    assert outcome_text(resumed) == outcome_text(fresh)


def test_interrupt_with_a_per_variant_estimator(planned, tmp_path):
    spec, panels, variants = planned
    cache_dir = tmp_path / "cache"
    with pytest.raises(KeyboardInterrupt):
        run_each(CountingFit(interrupt_at=4), variants, panels, jobs=1, cache_dir=cache_dir)
    assert len(list(cache_dir.glob("*.json"))) == 3
    fit = CountingFit()
    resumed, stats = run_each(fit, variants, panels, jobs=1, cache_dir=cache_dir)
    assert fit.calls == stats.computed == 5 and stats.cached == 3


def test_shared_work_gives_the_results_of_separate_fits(tmp_path):
    # steps and errors siblings are exact; last_lag siblings agree to rounding
    spec = make_spec(tmp_path, {"steps": [1, 2], "errors": ["robust", "conventional"],
                                "last_lag": [2, 3, "all"]})
    panels = grid.load_panels(spec)
    variants = grid.plan(spec, panels)
    shared, stats = runner.run_variants(variants, panels, jobs=1)
    # 12 combinations; the 3 with one-step conventional errors are skipped in system
    # GMM (invalid by construction, robustgmm.core.invalid_reason)
    assert sum(v.status == grid.SKIPPED for v in variants) == 3
    assert stats.extra == {"groups": 1, "estimated": 9, "shared": True}
    alone, _ = run_each(core.fit, variants, panels, jobs=1)
    for v in variants:
        if v.status == grid.SKIPPED:
            assert v.id not in shared and v.id not in alone
            continue
        a, b = shared[v.id].fit, alone[v.id].fit
        assert a.labels == b.labels
        for ta, tb in zip(a.terms, b.terms):
            assert ta.estimate == pytest.approx(tb.estimate, rel=1e-9, abs=1e-12)
            assert ta.std_error == pytest.approx(tb.std_error, rel=1e-9, abs=1e-12)
        assert a.tests["hansen"].p_value == pytest.approx(
            b.tests["hansen"].p_value, rel=1e-8, abs=1e-12)
        assert shared[v.id].bounds == alone[v.id].bounds
    same_window = [v for v in variants if v.spec.last_lag is None and v.status != grid.SKIPPED]
    only, _ = runner.run_variants(same_window, panels, jobs=1)
    for v in same_window:  # a group of one window: bit-identical to separate fits
        assert canonical(only[v.id].fit.to_dict()) == canonical(alone[v.id].fit.to_dict())


def test_a_failing_member_of_a_share_group_is_isolated(planned, monkeypatch):
    spec, panels, variants = planned
    _count(monkeypatch, fail=[(lambda s: s.steps == 1 and s.form == "collapsed",
                               EstimationError("the weight matrix is singular"))])
    out, stats = runner.run_variants(variants, panels, jobs=1)
    failed = [o for o in out.values() if o.status == runner.FAILED]
    assert len(failed) == 2 and {o.reason for o in failed} == {"the weight matrix is singular"}
    assert sum(o.status == runner.OK for o in out.values()) == 6


def test_a_failing_variant_is_recorded_and_the_others_go_on(planned, tmp_path):
    spec, panels, variants = planned
    singular = EstimationError("the weight matrix is singular")
    fit = CountingFit(fail=[
        (lambda s: s.transform == "fod" and s.steps == 1 and s.form == "collapsed", singular),
        (lambda s: s.transform == "fod" and s.steps == 2 and s.form == "collapsed",
         ZeroDivisionError("float division by zero")),
    ])
    cache_dir = tmp_path / "cache"
    out, stats = run_each(fit, variants, panels, jobs=1, cache_dir=cache_dir,
                          on_error="record")
    failed = {vid: o for vid, o in out.items() if o.status == runner.FAILED}
    assert len(failed) == 2 and stats.failed == 2
    reasons = sorted(o.reason for o in failed.values())
    assert reasons == ["ZeroDivisionError: float division by zero",
                       "the weight matrix is singular"]
    assert all(o.status == runner.OK and o.fit for vid, o in out.items() if vid not in failed)
    # the estimation failure is cached; the unexpected error is tried again next time
    fit2 = CountingFit()
    again, _ = run_each(fit2, variants, panels, jobs=1, cache_dir=cache_dir)
    assert fit2.calls == 1
    assert sum(o.status == runner.FAILED for o in again.values()) == 1


def test_an_unexpected_error_stops_the_run_by_default(planned):
    """Issue 9: only EstimationError is a failed variant; a ZeroDivisionError is a
    bug and is raised (on_error="record" above records it instead)."""
    spec, panels, variants = planned
    fit = CountingFit(fail=[(lambda s: s.transform == "fod" and s.steps == 2,
                             ZeroDivisionError("float division by zero"))])
    with pytest.raises(ZeroDivisionError, match="float division by zero"):
        run_each(fit, variants, panels, jobs=1)


def test_singular_sample_fails_without_stopping_the_audit(tmp_path):
    # 'late' is 1 from the fourth period on: no variation within units in that sample
    spec = make_spec(tmp_path, {"steps": [1, 2]},
                     model={"regressors": [{"name": "x", "lags": [0], "role": "endogenous"},
                                           {"name": "late", "lags": [0], "role": "exogenous"}]},
                     method={"equations": "difference"}, panel_kw={"n_periods": 8})
    late = SampleFilter(name="late years", period_from=2004)
    spec = dataclasses.replace(spec, vary=dataclasses.replace(spec.vary, samples=(late,)))
    panels = grid.load_panels(spec)
    variants = grid.plan(spec, panels)
    bad = [v for v in variants if v.spec.sample.name == "late years"]
    assert len(bad) == 2 and all(v.status == grid.PLANNED and v.reason.startswith("expected to fail")
                       for v in bad)
    out, stats = runner.run_variants(variants, panels, jobs=1)
    for v in variants:
        o = out[v.id]
        if v.spec.sample.name == "late years":
            # issue 12, item 2: found by the data layer, the column named
            assert o.status == runner.FAILED and o.reason.endswith(
                "regressor 'late' has the same value (1) in every row in sample 'late years'; "
                "it cannot be told apart from the constant: drop it from the model")
        else:
            assert o.status == runner.OK
    assert stats.failed == len(bad)


def test_results_identical_whatever_jobs(planned):
    spec, panels, variants = planned
    one, s1 = runner.run_variants(variants, panels, jobs=1)
    two, s2 = runner.run_variants(variants, panels, jobs=2, start_workers=True)
    assert s1.jobs == 1 and s2.jobs == 2 and s2.backend == "loky"
    assert list(one) == list(two) == [v.id for v in variants]  # plan order
    assert outcome_text(one) == outcome_text(two)


def test_threading_backend_gives_the_same_results(planned):
    spec, panels, variants = planned
    one, _ = runner.run_variants(variants, panels, jobs=1)
    threads, stats = runner.run_variants(variants, panels, jobs=2, backend="threading")
    assert stats.backend == "threading"
    assert outcome_text(threads) == outcome_text(one)


@pytest.fixture
def restored_environ():
    """This process's environment as it was before the test. A LocalCluster's nannies
    run in this process and set their workers' environment in it before spawning them
    (distributed 2026.8: OMP_NUM_THREADS, OPENBLAS_NUM_THREADS and MKL_NUM_THREADS = 1,
    MALLOC_TRIM_THRESHOLD_, PYTHONHASHSEED, __DASK_PARENT_PID), and leave it there:
    every process a later test starts would inherit it."""
    saved = dict(os.environ)
    yield
    for key in set(os.environ) - set(saved):
        del os.environ[key]
    os.environ.update(saved)


@pytest.mark.slow
def test_dask_backend_gives_the_same_results(planned, restored_environ):
    distributed = pytest.importorskip("distributed")
    import joblib
    spec, panels, variants = planned
    one, _ = runner.run_variants(variants, panels, jobs=1)
    with distributed.Client(distributed.LocalCluster(n_workers=2, threads_per_worker=1,
                                                     processes=True, dashboard_address=None)):
        by_argument, stats = runner.run_variants(variants, panels, backend="dask")
        assert stats.backend == "dask"
        with joblib.parallel_config(backend="dask"):  # the caller's context is respected
            by_context, stats2 = runner.run_variants(variants, panels)
        assert "dask" in stats2.backend.lower()
    assert outcome_text(by_argument) == outcome_text(one)
    assert outcome_text(by_context) == outcome_text(one)


def test_progress_bar_only_when_asked(planned, capfd):
    spec, panels, variants = planned
    runner.run_variants(variants[:2], panels, jobs=1, progress=False)
    assert capfd.readouterr().err == ""
    runner.run_variants(variants[:2], panels, jobs=1, progress=True)
    captured = capfd.readouterr()
    assert "variants" in captured.err and captured.out == ""


def test_skipped_variants_are_not_run(planned):
    spec, panels, variants = planned
    skipped = dataclasses.replace(variants[1], status=grid.SKIPPED, reason="test")
    fit = CountingFit()
    out, stats = run_each(fit, [variants[0], skipped], panels, jobs=1)
    assert fit.calls == 1 and list(out) == [variants[0].id] and stats.variants == 1


def test_payload_is_the_fit_record_and_the_sum_of_the_lags_is_checked(tmp_path):
    """A variant's payload (what the cache stores) is the fit's one record,
    FitResult.to_dict(); with two outcome lags the bounds cover each lag and their
    sum, and bounds.csv compares the sum with the sum of the GMM estimates."""
    from robustgmm.audit import _tables
    from robustgmm.core.results import FitResult

    spec = make_spec(tmp_path, model={"outcome_lags": [1, 2]})
    panel = grid.load_panels(spec)[grid.sample_key(spec.sample)]
    result = core.fit(spec, panel)
    out = runner.estimate_group([spec], panel)[0]
    assert out["status"] == runner.OK
    assert canonical(out["fit"]) == canonical(result.to_dict())
    assert FitResult.from_dict(json.loads(json.dumps(out["fit"]))).labels == result.labels
    assert [b["term"] for b in out["bounds"]["terms"]] == ["y[t-1]", "y[t-2]",
                                                          "sum(y[t-1], y[t-2])"]
    variants = grid.plan(spec, {grid.sample_key(spec.sample): panel})
    outcomes, _ = runner.run_variants(variants, {grid.sample_key(spec.sample): panel}, jobs=1)
    _, _, bounds = _tables(spec, variants, outcomes)
    row = bounds[(bounds["term"] == "sum(y[t-1], y[t-2])") & bounds["is_base"]].iloc[0]
    i, j = result.labels.index("y[t-1]"), result.labels.index("y[t-2]")
    assert row["gmm"] == pytest.approx(result.params[i] + result.params[j], rel=1e-12)


def test_failures_name_the_variant_and_convert_like_a_fit(planned):
    spec, panels, variants = planned
    fit = CountingFit(fail=[(lambda s: s.transform == "fod",
                             EstimationError("the weight matrix\nis singular"))])
    out, _ = run_each(fit, variants, panels, jobs=1)
    failed = [o for o in out.values() if o.status == runner.FAILED]
    assert len(failed) == 4
    for o in failed:
        assert o.fit is None and o.failure.variant == o.variant
        assert o.reason == "the weight matrix is singular" and o.error_type == "EstimationError"
        frame = o.failure.to_frame()
        assert list(frame.index) == [o.variant] and frame.loc[o.variant, "reason"] == o.reason
