"""Every reported statistic has its stated distribution; every reported coefficient is
identified (issue 10). Sources beside each check; Monte Carlo checks are slow tests
whose tolerance follows from the number of replications (binomial 3-sigma for
rejection rates, the standard error of a standard deviation for SE ratios)."""
from __future__ import annotations

import dataclasses
import json
import math
import os
import warnings

import numpy as np
import pytest

from helpers_core import numeric_windmeijer_d, sim_panel, sim_spec
from robustgmm.core import GMMProblem, fit, invalid_reason
from robustgmm.core import diagnostics
from robustgmm.core.linalg import identified_columns, independent_columns
from robustgmm.core.problem import efficient_gmm
from robustgmm.data import panel_from_frame
from robustgmm.errors import InputError, RankConditionError, UnderidentifiedError
from robustgmm.simulate import PanelProcess, simulate_panel
from robustgmm.spec import Regressor


def _reps(default):
    return int(os.environ.get("ROBUSTGMM_MC_REPS", default))


def _binomial_band(reps, level=0.05):
    """3-sigma band of a rejection rate over ``reps`` replications at ``level``."""
    return 3.0 * math.sqrt(level * (1 - level) / reps)


def _panel_with(n, T, seed, process=PanelProcess(), **columns):
    df = simulate_panel(n, T, process, seed=seed)
    rng = np.random.default_rng(seed + 99)
    for name, make in columns.items():
        df[name] = make(df, rng)
    return panel_from_frame(df, "unit", "period", ["y", "x", "w", *columns])


# ---------------------------------------------------------------------------
# 1. identification by rank; degrees of freedom from ranks; no negative statistics
# ---------------------------------------------------------------------------
def test_identified_columns_is_a_rank_scan_free_of_units():
    """rank(Z'X) = K is the identification condition (Hansen 1982; Hayashi 2000,
    section 3.2): a column in the span of earlier ones is not identified, whatever
    the units of the rows and columns."""
    rng = np.random.default_rng(0)
    m = rng.normal(size=(6, 4))
    m[:, 2] = 2.0 * m[:, 0] - m[:, 1]
    for row, col in [(np.ones(6), np.ones(4)),
                     (10.0 ** rng.integers(-6, 8, 6), 10.0 ** rng.integers(-6, 8, 4))]:
        cross = m / row[:, None] / col[None, :]  # the same matrix in other units
        ok = identified_columns(cross, row, np.ones(4))
        assert ok.tolist() == [True, True, False, True]
    m[:, 3] = 0.0
    assert identified_columns(m, np.ones(6), np.ones(4)).tolist() == [True, True, False, False]


def _scan_by_least_squares(gram, rtol=1e-9):
    """The column scan by its definition: each column's residual after projection on
    the columns kept so far, one least-squares solve per column."""
    d = np.diag(gram)
    scale = np.where(d > 0, 1.0 / np.sqrt(np.where(d > 0, d, 1.0)), 0.0)
    unit = gram * scale[:, None] * scale[None, :]
    kept, smallest, noise = [], 1.0, 100.0 * np.finfo(float).eps
    for j in range(len(gram)):
        if not scale[j] > 0:
            continue
        resid = 1.0
        if kept:
            cross = unit[kept, j]
            resid = 1.0 - cross @ np.linalg.lstsq(unit[np.ix_(kept, kept)], cross, rcond=None)[0]
        if resid > max(rtol, noise / smallest):  # the rounding floor of the docstring
            kept.append(j)
            smallest = min(smallest, resid)
    return kept


def test_independent_columns_keep_what_the_least_squares_scan_keeps():
    """The scan reads residuals from a running inverse while it is well conditioned:
    the columns kept are those of the definition (one least-squares solve per column)
    on Gram matrices with exact dependencies, zero columns, near dependencies on either
    side of the cut and columns in wildly different units."""
    rng = np.random.default_rng(7)
    for trial in range(200):
        n, k = 60, int(rng.integers(2, 25))
        x = rng.normal(size=(n, k)) * 10.0 ** rng.integers(-4, 5, k)
        for _ in range(int(rng.integers(0, 4))):  # exact and near dependencies
            j, a, b = rng.integers(0, k, 3)
            x[:, j] = 2.0 * x[:, a] - x[:, b] + rng.choice([0.0, 1e-7, 1e-5, 1e-3, 0.05]) \
                * rng.normal(size=n) * np.abs(x[:, a]).mean()
        if rng.random() < 0.2:
            x[:, rng.integers(0, k)] = 0.0
        gram = x.T @ x
        assert independent_columns(gram).tolist() == _scan_by_least_squares(gram), trial


def test_a_term_no_instrument_moves_raises_naming_it():
    """Four instruments for four parameters, but the extra column is twice the
    exogenous w, so rank(Z'X) = 3: the last term in estimation order, x[t-1], is not
    identified (the order condition holds, the rank condition fails)."""
    panel = _panel_with(300, 6, seed=4, w2=lambda df, rng: 2.0 * df["w"])
    spec = sim_spec(equations="difference", form="collapsed", first_lag=2, last_lag=2,
                    regressors=(Regressor("w", (0,), "exogenous"),
                                Regressor("x", (0, 1), "endogenous")),
                    extra_instruments=("w2",))
    with pytest.raises(RankConditionError, match=r"x\[t-1\] is not identified by the "
                                                 "instruments of this variant"):
        fit(spec, panel)
    assert issubclass(RankConditionError, UnderidentifiedError)
    # in an audit the variant fails with that reason (only the data show it); the
    # order condition, known from the counts, is a skipped combination: by type
    from robustgmm.audit import grid, runner

    with pytest.raises(RankConditionError) as info:
        fit(spec, panel)
    record = runner._failure(info.value, "x")["failure"]
    assert record["error_type"] == "RankConditionError" and record["variant"] == "x"
    assert not grid.is_underidentified(record["error_type"])
    assert grid.is_underidentified(
        runner._failure(UnderidentifiedError("fewer"))["failure"]["error_type"])
    variant = grid.Variant(id="x", order=1, spec=spec, settings=())
    planned = grid._with_counts(variant, panel)
    assert planned.status == grid.PLANNED and "x[t-1] is not identified" in planned.reason


def test_unidentified_period_dummy_is_dropped_with_a_warning(monkeypatch):
    """The reproduction of issue 10, item 1 (N = 500, T = 5, system GMM, first
    differences, two-step, time effects, first_lag = 3, per-period) with the
    transformed-equation time moments left out, as the core did before: the first
    period's dummy has no instrument that moves it. It is dropped with a warning that
    names it, and the Hansen degrees of freedom are rank(W) − rank(Z'X)."""
    from robustgmm.core import problem as problem_mod
    from robustgmm.core.design import TRANSFORMED

    keep = problem_mod.GMMProblem._keep_instruments

    def without_transformed_time(self, zhz):
        keep(self, zhz)
        d = self.design
        d.keep_z = np.asarray([j for j in d.keep_z if not (
            d.z_columns[j].group == "time effects" and d.z_columns[j].equation == TRANSFORMED)],
            dtype=int)

    monkeypatch.setattr(problem_mod.GMMProblem, "_keep_instruments", without_transformed_time)
    _, panel = sim_panel(500, 5, seed=3)
    spec = sim_spec(time_effects=True, first_lag=3, regressors=(Regressor("x", (0,), "endogenous"),))
    res = fit(spec, panel)
    first = f"period[{panel.periods[1]}]"  # the first period with the lagged outcome
    assert first not in res.labels and f"period[{panel.periods[2]}]" in res.labels
    assert any(w.startswith(f"{first} dropped: no instrument of this variant moves it")
               for w in res.warnings)
    assert res.tests["hansen"].df == res.counts.instruments - res.counts.parameters == 8
    assert all(t.std_error > 0 for t in res.terms)
    monkeypatch.undo()
    fixed = fit(spec, panel)  # with every time moment that adds information
    assert first in fixed.labels and not fixed.warnings and fixed.tests["hansen"].df == 8


def test_negative_statistics_are_never_reported():
    """A quadratic form is never negative: below −1e-8 relative to its scale it is a
    numerical failure (a warning, no statistic, no p-value); a rounding-sized
    negative value is zero."""
    warns: list = []
    bad = diagnostics.chi2(-93384.0, 3, scale=10.0, warnings=warns, name="difference-in-Hansen (x)")
    assert math.isnan(bad.statistic) and math.isnan(bad.p_value) and "negative" in bad.reason
    assert bad.to_dict()["statistic"] is None and bad.to_dict()["p_value"] is None
    assert warns and "difference-in-Hansen (x): numerical failure" in warns[0]
    tiny = diagnostics.chi2(-1e-12, 3, scale=10.0, warnings=warns)
    assert tiny.statistic == 0.0 and tiny.p_value == 1.0 and tiny.reason is None


# ---------------------------------------------------------------------------
# 2. difference-in-Hansen only where the model without the group is identified
# ---------------------------------------------------------------------------
def test_difference_hansen_group_whose_removal_unidentifies_is_not_testable():
    """C = J(all) − J(without the group) needs the model without the group to be
    identified (Hayashi 2000, section 3.6; Eichenbaum, Hansen & Singleton 1988).
    Difference GMM, collapsed lags 2..2: instruments y lag 2, x lag 2, w and the
    extra z; without the exogenous group (w, z) only two instruments remain for three
    parameters, so that group is not testable; without the lags of y the model is
    exactly identified and C = J(all) with df 1."""
    panel = _panel_with(400, 6, seed=8, z=lambda df, rng: rng.normal(size=len(df)))
    spec = sim_spec(equations="difference", form="collapsed", first_lag=2, last_lag=2,
                    extra_instruments=("z",))
    res = fit(spec, panel)
    exo = res.difference_hansen["exogenous"]
    assert exo.reason.startswith("not testable: without this group the model is not identified")
    assert math.isnan(exo.statistic) and exo.df is None
    out = json.loads(json.dumps(res.to_dict()))["tests"]["difference_hansen"]["exogenous"]
    assert out["statistic"] is None and out["p_value"] is None and out["reason"] == exo.reason
    ly = res.difference_hansen["levels of y"]
    assert ly.df == 1 and ly.statistic == pytest.approx(res.tests["hansen"].statistic, rel=1e-9)


# ---------------------------------------------------------------------------
# 3. time effects in system GMM are all identified
# ---------------------------------------------------------------------------
def test_every_period_dummy_is_identified_in_system_gmm():
    """Issue 10, item 3 reproduction (N = 1000, T = 7, two-step system GMM, first
    differences, time effects): the first transformed row involves the level shock of
    a period without a level row, so its time moment is not implied by the level
    moments and is kept; the implied ones are left out (counted). Every dummy's SE is
    then within a factor 3 of the median dummy SE (before: the first dummy 1.23
    against about 0.05)."""
    _, panel = sim_panel(1000, 7, seed=21)
    res = fit(sim_spec(time_effects=True), panel)
    se = np.array([t.std_error for t in res.terms if t.label.startswith("period[")])
    med = np.median(se)
    assert np.all(se < 3 * med) and np.all(se > med / 3)
    assert res.counts.redundant_instruments > 0
    assert not any("singular" in w for w in res.warnings)
    # exactly one transformed time moment adds information in a balanced panel
    prob = GMMProblem(sim_spec(time_effects=True), panel)
    d = prob.design
    kept_tr = [j for j in d.keep_z if d.z_columns[j].group == "time effects"
               and d.z_columns[j].equation == 0]
    assert len(kept_tr) == 1


@pytest.mark.parametrize("transform", ["fd", "fod"])
def test_time_functionals_give_the_time_moments(transform):
    """Design.time_functionals writes each time-effect moment g_ij as Σ_p A_i[p, j] e_ip
    of the level residuals: first differences and forward orthogonal deviations
    (Arellano & Bover 1995) are linear in the levels. Checked against the kernel's
    per-unit moments at random coefficients on an unbalanced panel."""
    from robustgmm.core.moments import prepare, residual_rows, unit_moments_t

    df = simulate_panel(80, 7, seed=6)
    df = df[~((df["unit"] % 4 == 0) & (df["period"].isin([2001, 2004])))]
    panel = panel_from_frame(df, "unit", "period", ["y", "x", "w"])
    prob = GMMProblem(sim_spec(time_effects=True, transform=transform), panel)
    eng = prob.engine
    pc = prepare(eng.design.chunk(0, panel.n_units), eng.layout)
    beta_all = np.random.default_rng(1).normal(size=len(eng.design.x_labels_all))
    cols = eng.time_cols
    gt = unit_moments_t(pc, eng.layout, residual_rows(pc, beta_all), eng.layout.scatter_rows(cols))
    chunk = eng.design.chunk(0, panel.n_units)
    e_lev = np.where(chunk.complete, chunk.ylev - chunk.xlev @ beta_all, 0.0)
    A = eng.design.time_functionals(pc.x[0], pc.x[1], chunk.complete, cols)
    np.testing.assert_allclose(np.einsum("npj,np->jn", A, e_lev), gt, rtol=1e-10, atol=1e-10)


@pytest.mark.parametrize("transform", ["fd", "fod"])
def test_time_gram_over_patterns_is_the_sum_over_units(transform):
    """Design.time_gram sums A'A over the distinct patterns of complete periods,
    weighted by their counts: the same as the unit-by-unit sum of the time
    functionals (exactly for first differences, whose entries are whole numbers), on
    an unbalanced panel with several patterns."""
    from robustgmm.core.moments import prepare

    df = simulate_panel(90, 7, seed=6)
    df = df[~((df["unit"] % 4 == 0) & (df["period"].isin([2001, 2004])))]
    df = df[~((df["unit"] % 5 == 0) & (df["period"] == 2006))]
    panel = panel_from_frame(df, "unit", "period", ["y", "x", "w"])
    prob = GMMProblem(sim_spec(time_effects=True, transform=transform), panel)
    eng = prob.engine
    chunk = eng.design.chunk(0, panel.n_units)
    pc = prepare(chunk, eng.layout)
    cols = eng.time_cols
    A = eng.design.time_functionals(pc.x[0], pc.x[1], chunk.complete, cols)
    A2 = A.reshape(-1, len(cols))
    unit_by_unit = A2.T @ A2
    gram = eng.design.time_gram(cols)
    if transform == "fd":
        np.testing.assert_array_equal(gram, unit_by_unit)
    else:
        np.testing.assert_allclose(gram, unit_by_unit, rtol=1e-12, atol=1e-12)
    np.testing.assert_array_equal(eng.time_gram(), gram)


def test_redundant_time_moments_follow_attrition():
    """With units that enter late, the transformed time moments of their first rows
    involve level shocks without level rows too: more of them are kept than in the
    balanced panel, and the robust weight stays non-singular."""
    df = simulate_panel(600, 7, seed=5)
    late = df["unit"] % 3 == 0
    df = df[~(late & (df["period"] < df["period"].min() + 2))]
    panel = panel_from_frame(df, "unit", "period", ["y", "x", "w"])
    prob = GMMProblem(sim_spec(time_effects=True), panel)
    d = prob.design
    kept_tr = [j for j in d.keep_z if d.z_columns[j].group == "time effects"
               and d.z_columns[j].equation == 0]
    assert len(kept_tr) == 2
    res = fit(sim_spec(time_effects=True), panel)
    assert not any("singular" in w for w in res.warnings)


@pytest.mark.slow
def test_windmeijer_se_of_rho_tracks_spread_in_system_gmm_with_time_effects():
    """Monte Carlo (issue 10, item 3): N = 1000, T = 7, two-step system GMM with time
    effects; the mean Windmeijer (2005) SE of ρ is within 15% of the simulation
    spread, allowing the Monte Carlo error of a standard deviation,
    spread/sqrt(2·reps), three times. Before the fix: 0.0200 against 0.0155 (+29%)."""
    reps = _reps(200)
    spec = sim_spec(time_effects=True)
    est, se = [], []
    for r in range(reps):
        _, panel = sim_panel(1000, 7, seed=7000 + r)
        t = fit(spec, panel).term("y[t-1]")
        est.append(t.estimate)
        se.append(t.std_error)
    spread = np.std(est, ddof=1)
    allowance = 0.15 * spread + 3 * spread / math.sqrt(2 * reps)
    assert abs(np.mean(se) - spread) < allowance


# ---------------------------------------------------------------------------
# 4. Sargan and conventional one-step errors only where they are valid
# ---------------------------------------------------------------------------
def test_sargan_is_reported_only_in_difference_gmm():
    """The one-step weight diag(H, I) of system GMM is not proportional to the
    covariance of the stacked errors (the level errors contain η_i), so the one-step
    Sargan is not χ² there (measured 27.7% rejections at 5%); in difference GMM
    (H for first differences, the identity for deviations) it is (Sargan 1958;
    Arellano & Bond 1991)."""
    _, panel = sim_panel(300, 6, seed=2)
    for transform in ("fd", "fod"):
        diff = fit(sim_spec(equations="difference", transform=transform), panel)
        assert diff.tests["sargan"].reason is None and diff.tests["sargan"].df > 0
        sys_ = fit(sim_spec(equations="system", transform=transform), panel)
        sargan = sys_.tests["sargan"]
        assert math.isnan(sargan.statistic) and sargan.reason.startswith("not available in system GMM")
        assert sys_.to_dict()["tests"]["sargan"]["statistic"] is None


def test_conventional_one_step_system_errors_are_an_input_error():
    _, panel = sim_panel(100, 6, seed=2)
    spec = sim_spec(equations="system", steps=1, errors="conventional")
    with pytest.raises(InputError) as info:
        fit(spec, panel)
    assert len(info.value.problems) == 1 and "\n" not in info.value.problems[0]
    assert "conventional" in info.value.problems[0] and "system" in info.value.problems[0]
    # the other conventional combinations stay valid
    for kw in (dict(equations="difference", steps=1), dict(equations="system", steps=2)):
        assert not invalid_reason(sim_spec(errors="conventional", **kw))


def test_fit_command_exits_2_with_one_line_for_invalid_settings(tmp_path, capsys):
    from robustgmm.cli import main

    simulate_panel(120, 6, seed=3).to_csv(tmp_path / "panel.csv", index=False)
    for method, words in [('steps = 1\nerrors = "conventional"', "conventional"),
                          ('steps = 2\n[instruments]\nfirst_lag = 1', "first_lag = 1")]:
        (tmp_path / "model.toml").write_text(
            '[data]\nfile = "panel.csv"\nunit = "unit"\nperiod = "period"\n'
            '[model]\noutcome = "y"\n[[model.regressors]]\nname = "w"\n'
            f'[method]\n{method}\n')
        assert main(["fit", str(tmp_path / "model.toml")]) == 2
        err = capsys.readouterr().err.strip().splitlines()
        assert len(err) == 1 and words in err[0] and "Traceback" not in err[0]


def test_an_invalid_base_model_is_bad_input_for_the_audit(tmp_path):
    from helpers_audit import make_spec
    from robustgmm.audit import audit, grid

    for section in ({"instruments": {"first_lag": 1}},
                    {"method": {"steps": 1, "errors": "conventional", "equations": "system"}}):
        spec = make_spec(tmp_path, None, **section)
        for run in (grid.plan_frame, audit):
            with pytest.raises(InputError) as info:
                run(spec)
            assert len(info.value.problems) == 1 and "the base model" in info.value.problems[0]


def test_grid_skips_the_invalid_combinations_with_their_reason():
    from robustgmm.audit import grid

    spec = sim_spec(equations="system")
    spec = dataclasses.replace(spec, vary=dataclasses.replace(
        spec.vary, steps=(1, 2), errors=("robust", "conventional"), first_lag=(1, 2)))
    variants = grid.expand(spec)
    for v in variants:
        reason = invalid_reason(v.spec)
        assert (v.status == grid.SKIPPED) == bool(reason)
        if reason:
            assert v.reason == reason
    assert any(v.spec.first_lag == 1 and v.status == grid.SKIPPED for v in variants)
    assert any(v.spec.steps == 1 and v.spec.errors == "conventional" and v.spec.first_lag == 2
               and v.status == grid.SKIPPED for v in variants)


@pytest.mark.slow
def test_sargan_size_in_difference_gmm_and_conventional_se():
    """Monte Carlo (issue 10, item 4): valid instruments, homoskedastic shocks,
    N = 500, T = 6. Difference GMM's one-step Sargan rejects at 5% within the binomial
    3-sigma band; its conventional one-step SE of ρ is within 15% of the spread
    (plus three Monte Carlo errors of a standard deviation)."""
    reps = _reps(200)
    spec = sim_spec(equations="difference", steps=1, errors="conventional", form="collapsed")
    rejections, est, se = 0, [], []
    for r in range(reps):
        _, panel = sim_panel(500, 6, seed=9100 + r)
        res = fit(spec, panel)
        rejections += res.tests["sargan"].p_value < 0.05
        est.append(res.term("y[t-1]").estimate)
        se.append(res.term("y[t-1]").std_error)
    assert abs(rejections / reps - 0.05) < _binomial_band(reps)
    spread = np.std(est, ddof=1)
    assert abs(np.mean(se) - spread) < 0.15 * spread + 3 * spread / math.sqrt(2 * reps)


# ---------------------------------------------------------------------------
# 5. the Hansen J of a one-step fit is the minimised efficient criterion
# ---------------------------------------------------------------------------
def test_one_step_hansen_is_the_efficient_criterion():
    """Hansen (1982): J is the minimised criterion of the efficient estimator; for a
    one-step fit, the efficient estimator with weight S(b₁)⁻¹, i.e. the J(all) of
    the difference-in-Hansen and the two-step sibling's J."""
    _, panel = sim_panel(300, 6, seed=12, process=PanelProcess(hetero=1.0))
    one = fit(sim_spec(steps=1), panel)
    two = fit(sim_spec(steps=2), panel)
    assert one.tests["hansen"].statistic == pytest.approx(two.tests["hansen"].statistic, rel=1e-10)
    prob = GMMProblem(sim_spec(steps=1), panel)
    S, _ = prob.unit_moments_at(one.params)
    W, rank = prob.weight_from(S)
    b, _ = efficient_gmm(prob.zx, prob.zy, W)
    assert one.tests["hansen"].statistic == pytest.approx(
        diagnostics.criterion(prob.zx, prob.zy, W, b), rel=1e-10)
    assert one.tests["hansen"].df == rank - prob.K


@pytest.mark.slow
def test_one_step_hansen_size_in_system_gmm():
    """Monte Carlo (issue 10, item 5): system GMM, one-step, N = 500, T = 6,
    collapsed instruments, valid moments: the one-step J rejects at 5% within the
    binomial 3-sigma band (before: 8.0%, the one-step estimate in the efficient
    weight; the two-step J rejected 5.7%)."""
    reps = _reps(200)
    spec = sim_spec(equations="system", steps=1, form="collapsed")
    rejections = 0
    for r in range(reps):
        _, panel = sim_panel(500, 6, seed=9500 + r)
        rejections += fit(spec, panel).tests["hansen"].p_value < 0.05
    assert abs(rejections / reps - 0.05) < _binomial_band(reps)


# ---------------------------------------------------------------------------
# 6. lag windows invalid by construction; the predetermined window
# ---------------------------------------------------------------------------
def test_first_lag_one_is_an_input_error():
    """y[t-1] contains ε_{t−1}, part of Δε_t: an instrument for the transformed
    equation from lag 2 on (Arellano & Bond 1991)."""
    _, panel = sim_panel(100, 6, seed=2)
    with pytest.raises(InputError) as info:
        fit(sim_spec(first_lag=1), panel)
    assert len(info.value.problems) == 1 and "first_lag = 1 is invalid" in info.value.problems[0]


@pytest.mark.parametrize("first,last", [(2, None), (2, 2), (3, 4)])
def test_predetermined_window_boundary(first, last):
    """Predetermined x: E[x_s ε_t] = 0 for s ≤ t, so x lagged 1 instruments Δε_t and
    Δx_t (lag 0) the level equation (Arellano & Bond 1991; Blundell & Bond 1998): the
    window is max(first_lag − 1, 1) .. max(last_lag − 1, 1), the level-equation
    difference is dated max(first_lag − 2, 0) back, never lag 0 or a lead."""
    _, panel = sim_panel(100, 7, seed=2)
    spec = sim_spec(first_lag=first, last_lag=last,
                    regressors=(Regressor("x", (0,), "predetermined"),))
    d = GMMProblem(spec, panel).design
    lags = sorted({int(c.description.split(" lag ")[1].split()[0]) for c in d.z_columns
                   if c.group == "levels of x"})
    assert lags[0] == max(first - 1, 1)
    if last is not None:
        assert lags[-1] == max(last - 1, 1)
    diffs = {c.description.split(" for ")[0] for c in d.z_columns
             if c.group == "level equation" and " x " in f" {c.description} "}
    assert diffs == {f"difference of x lag {max(first - 2, 0)}"}
    y_lags = sorted({int(c.description.split(" lag ")[1].split()[0]) for c in d.z_columns
                     if c.group == "levels of y"})
    assert y_lags[0] == first


# ---------------------------------------------------------------------------
# 7. the pseudo-inverse case: D is the derivative of the two-step map
# ---------------------------------------------------------------------------
def test_windmeijer_d_is_the_derivative_with_a_singular_weight():
    """More instruments than units: S is singular and the weight is the generalised
    inverse d (d S d)⁺ d with a fixed scale d. Windmeijer's D, with the derivative of
    the pseudo-inverse at constant rank (Golub & Pereyra 1973), equals a central
    finite difference of the two-step map (before: off by 93% of max|D|)."""
    _, panel = sim_panel(30, 8, seed=11, process=PanelProcess(hetero=1.0))
    spec = sim_spec(steps=2, time_effects=False)
    with warnings.catch_warnings():  # the core filters numpy warnings locally, if at all
        warnings.simplefilter("error", RuntimeWarning)
        res = fit(spec, panel)
    assert res.counts.instruments > res.counts.units
    assert any("singular" in w for w in res.warnings)
    D = res.diagnostics["windmeijer_d"]
    numeric = numeric_windmeijer_d(spec, panel, res.diagnostics["beta_one_step"], 1e-6)
    assert np.max(np.abs(D - numeric)) < 1e-4 * np.max(np.abs(numeric))


@pytest.mark.parametrize("level", [0.0, 2_000.0, 20_000.0])
@pytest.mark.parametrize("seed", range(5))
def test_the_column_scan_drops_an_exactly_dependent_dummy_beside_a_calendar_trend(level, seed):
    # A calendar-year trend beside the constant keeps only about var(t)/level² of its
    # norm, so the Gram matrix's rounding error (normal equations square the
    # condition number; Golub & Van Loan 2013, section 5.3.8) reaches the size of the
    # scan's tolerance. The last period dummy is an exact linear function of the
    # constant, the trend and the other dummies (sum of dummies = constant) and must
    # be dropped whatever the level of the years and the order of the sums; every
    # other column stays.
    from robustgmm.core.linalg import independent_columns
    rng = np.random.default_rng(seed)
    periods = np.repeat(np.arange(7.0), 300)
    rng.shuffle(periods)
    x = rng.normal(size=periods.size)
    dummies = (periods[:, None] == np.arange(1, 7)).astype(float)
    cols = np.column_stack([x, np.ones_like(x), level + periods, dummies])
    kept = independent_columns(cols.T @ cols)
    # x, constant, trend and 5 of the 6 dummies: the 6 dummies with the constant span
    # the trend, so exactly one column (the last dummy) is dependent
    assert kept.tolist() == list(range(cols.shape[1] - 1))
    # a genuinely independent last column (a second regressor) is kept
    extra = np.column_stack([cols[:, :-1], rng.normal(size=x.size)])
    assert independent_columns(extra.T @ extra).tolist() == list(range(extra.shape[1]))
