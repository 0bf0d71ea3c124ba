"""The smallest set of units that overturns a conclusion (issue 16, item 2).

Known truth by construction (simulated panels, robustgmm.simulate):

* planted: 395 units without any effect of x and 5 units with an extreme, almost
  noiseless x–y relation; the pooled estimate is significant only because of the 5.
  The search must drop exactly those 5 to reverse the sign, and only planted units
  to lose significance;
* clean: every unit has the same effect; nothing is reached within 1% of the units;
* exhaustive: on N = 40 units (collapsed difference GMM, three instruments) every
  subset of at most 2 units is refitted; the greedy search finds a set of the
  minimal size, one of the minimal sets;
* every reported set is refitted by a full re-estimation on the reduced panel
  (robustgmm.core.fit), which must reach the target.
"""
from __future__ import annotations

import itertools

import pytest

from helpers_core import planted_frame, sim_spec
from robustgmm.core import fit
from robustgmm.core.dropping import Search, max_drop_for, smallest_sets
from robustgmm.core.influence import unit_sums
from robustgmm.data import panel_from_frame
from robustgmm.options import DropTarget
from robustgmm.spec import Regressor
from test_core_influence import reduced_panel

EXOG = (Regressor("x", (0,), "exogenous"), Regressor("w", (0,), "exogenous"))


def planted_panel(n=400, n_planted=5, periods=8, seed=1, beta_rest=0.0):
    """``n - n_planted`` units with effect ``beta_rest``, then the planted units:
    effect 1, x with standard deviation 5, shocks and unit effects of sd 0.1."""
    df = planted_frame(n, n_planted, periods, seed, beta_rest)
    return panel_from_frame(df, "unit", "period", ["y", "x", "w"])


SPEC = dict(steps=1, equations="difference", form="collapsed", regressors=EXOG)


def _achieves(res, refit_term, base_term, alpha):
    b, p = refit_term.estimate, refit_term.p_value
    s0 = 1.0 if base_term.estimate >= 0 else -1.0
    match res.target:
        case DropTarget.SIGN:
            return s0 * b <= 0
        case DropTarget.SIGNIFICANCE:
            return (p >= alpha) if base_term.p_value < alpha else (p < alpha)
        case DropTarget.OPPOSITE_SIGNIFICANT:
            return s0 * b < 0 and p < alpha


def _check_reported_sets(spec, panel, results, alpha=0.05):
    def by_label(f):  # coefficients and long-run effects
        return {t.label: t for t in f.terms + f.long_run}
    base = by_label(fit(spec, panel))
    for res in results:
        if not res.reached:
            continue
        terms = by_label(fit(spec, reduced_panel(panel, list(res.dropped))))
        assert _achieves(res, terms[res.term], base[res.term], alpha), res
        assert abs(terms[res.term].estimate - res.estimate) <= 1e-10 * abs(res.estimate) + 1e-12


def test_planted_units_are_found():
    panel = planted_panel()
    spec = sim_spec(**SPEC)
    us = unit_sums(spec, panel)
    base = us.refit([])
    k = us.labels.index("x[t]")
    planted = set(range(395, 400))
    assert base.p_value[k] < 0.05  # the planted units make x significant
    assert us.refit(sorted(planted)).p_value[k] > 0.1  # absent in the rest
    res = {r.target: r for r in smallest_sets(us, ["x[t]"], 0.05)}
    assert res[DropTarget.SIGN].reached and set(res[DropTarget.SIGN].dropped) == planted
    sig = res[DropTarget.SIGNIFICANCE]
    assert sig.reached and set(sig.dropped) <= planted
    _check_reported_sets(spec, panel, res.values())


def test_clean_panel_reaches_nothing_within_one_percent():
    panel = planted_panel(n_planted=0, beta_rest=1.0, seed=4)
    spec = sim_spec(**SPEC)
    us = unit_sums(spec, panel)
    results = smallest_sets(us, ["x[t]"], 0.05, max_drop_share=0.01)
    assert results and all(not r.reached for r in results)
    assert all(len(r.dropped) == max_drop_for(400, 0.01) == 4 for r in results)


def test_greedy_matches_exhaustive_search_on_a_small_panel():
    # 38 units without effect, 2 planted: minimal sets of size <= 2 exist
    panel = planted_panel(n=40, n_planted=2, periods=6, seed=7)
    spec = sim_spec(**SPEC)
    us = unit_sums(spec, panel)
    k = us.labels.index("x[t]")
    search = Search(us, 0.05, max_drop_share=0.05)  # max_drop = 2
    assert search.max_drop == 2
    b0, p0 = search.base.beta[k], search.base.p_value[k]
    subsets = [(i,) for i in range(40)] + list(itertools.combinations(range(40), 2))
    refits = {s: us.refit(list(s)) for s in subsets}
    compared = 0
    for target in DropTarget:
        res = search.run(k, target)

        def hits(r, target=target):
            b, p = r.beta[k], r.p_value[k]
            s0 = 1.0 if b0 >= 0 else -1.0
            return {DropTarget.SIGN: s0 * b <= 0,
                    DropTarget.SIGNIFICANCE: (p >= 0.05) if p0 < 0.05 else (p < 0.05),
                    DropTarget.OPPOSITE_SIGNIFICANT: s0 * b < 0 and p < 0.05}[target]
        sizes = [len(s) for s in subsets if hits(refits[s])]
        if not sizes:
            assert not res.reached
            continue
        smallest = min(sizes)
        minimal = {frozenset(s) for s in subsets if len(s) == smallest and hits(refits[s])}
        assert res.reached and len(res.dropped) == smallest, (target, res.dropped, minimal)
        assert frozenset(res.dropped) in minimal
        compared += 1
    assert compared >= 2  # the planted case has minimal sets for at least two targets
    _check_reported_sets(spec, panel, [search.run(k, t) for t in DropTarget])


@pytest.mark.parametrize("steps", [2, "iterated"])
def test_two_step_and_iterated_sets_are_exact(steps):
    panel = planted_panel(n=200, seed=3)
    spec = sim_spec(**{**SPEC, "steps": steps})
    results = smallest_sets(unit_sums(spec, panel), ["x[t]", "y[t-1]"], 0.05)
    assert any(r.reached for r in results)
    _check_reported_sets(spec, panel, results)


@pytest.mark.parametrize("steps", [1, 2])
def test_long_run_effects_are_searched_and_their_sets_are_exact(steps):
    """A long-run effect is a focus term like a coefficient: in the planted panel the
    long-run effect of x is carried by the 5 planted units (known truth), so its
    significance is lost by dropping planted units only; every reported set's
    estimate, refitted by a full re-estimation of the reduced panel, reaches the
    target."""
    panel = planted_panel(n=200, seed=3)
    spec = sim_spec(**{**SPEC, "steps": steps})
    us = unit_sums(spec, panel)
    base = us.refit([]).term("x[long-run]")
    assert base[3] < 0.05  # significant because of the planted units
    results = smallest_sets(us, ["x[long-run]"], 0.05)
    res = {r.target: r for r in results}
    assert all(r.term == "x[long-run]" for r in results)
    planted = set(range(195, 200))
    sig = res[DropTarget.SIGNIFICANCE]
    assert sig.reached and set(sig.dropped) <= planted
    _check_reported_sets(spec, panel, results)
