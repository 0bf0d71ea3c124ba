"""Replications of the grid in the calibrated world (issue 15): the summary formulas
against hand computations, determinism across jobs and the cache, resume after an
interruption (counting replications), bad input. The data come from
robustgmm.simulate (a known process); nothing here reads the reference data."""
import math

import numpy as np
import pandas as pd
import pytest

from robustgmm.errors import InputError
from robustgmm.montecarlo import replicate as rp
from tests.helpers_audit import make_spec

VARY = {"equations": ["difference", "system"], "steps": [1, 2]}


@pytest.fixture
def spec(tmp_path):
    return make_spec(tmp_path, vary=VARY, panel_kw={"n_units": 60, "n_periods": 6},
                     instruments={"form": "collapsed"})


def test_summary_formulas_by_hand():
    """bias, sd, RMSE, coverage, size, se_ratio and the test rejection rates of
    three replications computed by hand."""
    class V:  # a planned variant, as the summary sees it
        id, order, is_base = "v1", 0, True
    est, se = [0.4, 0.6, 0.9], [0.1, 0.1, 0.1]
    recs = [{"rep": r, "variants": {"v1": {"status": "ok", "terms": {"a": [e, s]},
                                             "hansen": p, "ar2": 0.5, "dh_level": None}}}
            for r, (e, s, p) in enumerate(zip(est, se, [0.01, 0.2, 0.03]))]
    row = rp.summarise(recs, [V], ["a"], {"a": 0.5}, 0.05).iloc[0]
    err = np.array(est) - 0.5
    assert row["bias"] == pytest.approx(err.mean())
    assert row["relative_bias"] == pytest.approx(err.mean() / 0.5)
    assert row["sd"] == pytest.approx(np.std(est, ddof=1))
    assert row["rmse"] == pytest.approx(math.sqrt(np.mean(err ** 2)))
    # |err| = 0.1, 0.1, 0.4 against 1.96 * 0.1: two of three intervals cover
    assert row["coverage"] == pytest.approx(2 / 3) and row["size"] == pytest.approx(1 / 3)
    assert row["se_ratio"] == pytest.approx(0.1 / np.std(est, ddof=1))
    assert row["hansen_rejection"] == pytest.approx(2 / 3)
    assert row["ar2_rejection"] == 0.0 and math.isnan(row["diff_hansen_level_rejection"])
    assert row["reps_ok"] == 3 and row["median"] == pytest.approx(0.6)


def test_small_simulation_runs_in_process_whatever_jobs_and_says_so(spec):
    # ten replications of a 4-variant grid on 60 units: far below the workers'
    # start-up (robustgmm.audit.cost), so --jobs 2 stays in this process
    lines = []
    sim = rp.simulate(spec, reps=10, seed=5, jobs=2, notify=lines.append)
    assert sim.run["jobs"] == 1 and sim.run["backend"] == "in-process"
    assert len(lines) == 1 and lines[0].endswith(": running in this process"), lines


def test_deterministic_across_jobs_and_cache(spec, tmp_path):
    one = rp.simulate(spec, reps=10, seed=5, jobs=1)
    two = rp.simulate(spec, reps=10, seed=5, jobs=2, cache_dir=tmp_path / "c",
                      start_workers=True)
    again = rp.simulate(spec, reps=10, seed=5, jobs=1, cache_dir=tmp_path / "c")
    assert two.run["computed"] == 10 and again.run["cached"] == 10 and again.run["computed"] == 0
    pd.testing.assert_frame_equal(one.summary, two.summary)
    pd.testing.assert_frame_equal(one.summary, again.summary)
    other = rp.simulate(spec, reps=10, seed=6, jobs=1)
    assert not one.summary["mean"].equals(other.summary["mean"])
    # every planned variant and focus term has a row; the truth is the base estimate
    assert len(one.summary) == 4 * 3
    assert (one.summary["reps_ok"] == 10).all()
    assert set(one.calibration["truth"]) == {"y[t-1]", "x[t]", "w[t]"}


def _blas_threads() -> set[int]:
    from threadpoolctl import threadpool_info
    return {p["num_threads"] for p in threadpool_info() if p["user_api"] == "blas"}


def test_same_simulation_whatever_the_callers_blas_threads(spec):
    """The calibration's base-model fit ran at the calling process's BLAS thread
    count (the cores, or OMP_NUM_THREADS / OPENBLAS_NUM_THREADS), so a simulation's
    truth moved in the 14th digit with it: a cluster run whose client process had
    OPENBLAS_NUM_THREADS=1 in its environment differed from a local one. Every step
    runs at robustgmm.audit.parallel.BLAS_THREADS, and the caller's setting is
    restored afterwards."""
    from threadpoolctl import threadpool_limits
    runs = {}
    for threads in (1, 2):
        with threadpool_limits(limits=threads, user_api="blas"):
            assert _blas_threads() == {threads}  # the caller's setting really differs
            sim = rp.simulate(spec, reps=10, seed=5, jobs=1)
            assert _blas_threads() == {threads}  # and is the same after the call
        runs[threads] = sim
    assert runs[1].calibration == runs[2].calibration
    pd.testing.assert_frame_equal(runs[1].summary, runs[2].summary)


def test_resume_after_interruption(spec, tmp_path, monkeypatch):
    """Interrupted at the eighth replication, the rerun computes only the
    replications not finished."""
    real = rp.replicate
    calls = []

    def flaky(world, template, variants, seed, rep, *a):
        calls.append(rep)
        if len(calls) == 8:
            raise KeyboardInterrupt
        return real(world, template, variants, seed, rep, *a)

    monkeypatch.setattr(rp, "replicate", flaky)
    with pytest.raises(KeyboardInterrupt):
        rp.simulate(spec, reps=12, seed=2, jobs=1, cache_dir=tmp_path / "c")
    monkeypatch.setattr(rp, "replicate", real)
    resumed = rp.simulate(spec, reps=12, seed=2, jobs=1, cache_dir=tmp_path / "c")
    assert resumed.run["cached"] == 7 and resumed.run["computed"] == 5
    fresh = rp.simulate(spec, reps=12, seed=2, jobs=1)
    pd.testing.assert_frame_equal(resumed.summary, fresh.summary)


@pytest.mark.parametrize("reps, seed, word", [(9, 0, "--reps: 9"), (20, "x", "--seed: 'x'"),
                                              (20, 1.5, "--seed: 1.5"), ("ten", 0, "--reps")])
def test_bad_reps_and_seed(spec, reps, seed, word):
    with pytest.raises(InputError) as err:
        rp.simulate(spec, reps=reps, seed=seed)
    assert len(err.value.problems) == 1 and err.value.problems[0].startswith(word)
    assert "\n" not in err.value.problems[0]


def test_base_model_not_estimable(tmp_path):
    """A regressor that copies another (z = 2x): the base model cannot be estimated,
    so there is no world to calibrate (one line)."""
    from tests.helpers_audit import model_dict, write_panel
    from robustgmm.modelfile import spec_from_dict
    path = write_panel(tmp_path, n_units=30, n_periods=6)
    frame = pd.read_csv(path)
    frame.assign(z=2 * frame["x"]).to_csv(path, index=False)
    d = model_dict()
    d["model"]["regressors"].append({"name": "z", "lags": [0], "role": "endogenous"})
    spec = spec_from_dict(d, base_dir=tmp_path)
    with pytest.raises(InputError) as err:
        rp.simulate(spec, reps=10)
    assert len(err.value.problems) == 1
    assert "base model cannot be estimated" in err.value.problems[0]


def test_estimate_group_without_bounds_gives_the_same_fits(spec):
    """The replications skip the OLS/within bounds (runner.estimate_group(bounds=False));
    the fits are those of the audit's own call."""
    from robustgmm import core
    from robustgmm.audit import runner
    from robustgmm.data import load_panel
    panel = load_panel(spec)
    specs = [spec, __import__("dataclasses").replace(spec, steps=1)]
    assert core.share_key(specs[0]) == core.share_key(specs[1])
    full = runner.estimate_group(specs, panel)
    lean = runner.estimate_group(specs, panel, bounds=False)
    assert all(e["bounds"] is None for e in lean) and all(e["bounds"] for e in full)
    assert [e["fit"] for e in lean] == [e["fit"] for e in full]


def test_lean_parts_equal_the_full_fit_bit_for_bit(spec):
    """The replications compute only what they summarise (core.Parts: no
    instrument-strength statistics, only the level group's difference-in-Hansen) and
    keep the FitResult instead of its record: every number they read equals the full
    fit's record read back, exactly (self-consistency: the parts left out ride on
    their own sums)."""
    import dataclasses
    from robustgmm import core
    from robustgmm.audit import runner
    from robustgmm.core.results import FitResult
    from robustgmm.data import load_panel
    from robustgmm.options import LEVEL_GROUP
    panel = load_panel(spec)
    specs = [dataclasses.replace(spec, equations="system", steps=s, last_lag=lag)
             for s in (1, 2) for lag in (3, None)]
    parts = core.Parts(strength=False, difference_hansen=(LEVEL_GROUP,))
    full = runner.estimate_group(specs, panel, bounds=False)
    lean = runner.estimate_group(specs, panel, bounds=False, parts=parts, records=False)
    for f, e in zip(full, lean):
        a, b = FitResult.from_dict(f["fit"]), e["result"]
        assert "fit" not in e and isinstance(b, FitResult)
        assert b.strength == {} and a.strength  # the full fit has them
        assert list(b.difference_hansen) == [LEVEL_GROUP] and len(a.difference_hansen) > 1
        assert b.difference_hansen[LEVEL_GROUP] == a.difference_hansen[LEVEL_GROUP]
        assert [(t.label, t.estimate, t.std_error) for t in b.terms + b.long_run] == \
            [(t.label, t.estimate, t.std_error) for t in a.terms + a.long_run]
        assert b.tests == a.tests
        np.testing.assert_array_equal(b.vcov, a.vcov)
    # and a difference-GMM fit, which has no level group, computes no such test
    diff = dataclasses.replace(spec, equations="difference")
    e, = runner.estimate_group([diff], panel, bounds=False, parts=parts, records=False)
    assert e["result"].difference_hansen == {}


def test_too_few_reps_message_states_the_binomial_error():
    # a rate's Monte Carlo standard error is sqrt(p (1 - p) / R), at most sqrt(0.25 / R)
    import math
    from robustgmm.errors import InputError
    from robustgmm.montecarlo.replicate import MIN_REPS, check_reps
    with pytest.raises(InputError) as err:
        check_reps(MIN_REPS - 1, 0)
    text = str(err.value)
    assert f"{math.sqrt(0.25 / (MIN_REPS - 1)):.2f}" in text and "\n" not in text
