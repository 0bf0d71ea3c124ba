"""Long-run effects Σβ / (1 − Σρ) and their delta-method standard errors
(robustgmm.core.longrun), checked against a finite-difference Jacobian, by simulation
with known truth (the simulated process of robustgmm.simulate: the long-run effect of
x is beta / (1 - rho), of w gamma / (1 - rho)) and through the one record."""
from __future__ import annotations

import math
import os

import numpy as np
import pytest

from helpers_core import sim_panel, sim_spec
from robustgmm.core import fit
from robustgmm.core import longrun
from robustgmm.core.results import FitResult
from robustgmm.simulate import PanelProcess
from robustgmm.spec import Regressor

TRUE = PanelProcess(rho=0.5, beta=1.0, gamma=0.5)


def _reps(default):
    return int(os.environ.get("ROBUSTGMM_MC_REPS", default))


def _two_lag_spec(**kw):
    return sim_spec(outcome_lags=(1, 2),
                    regressors=(Regressor("x", (0, 1), "endogenous"),
                                Regressor("w", (0,), "exogenous")),
                    form="collapsed", **kw)


def test_gradient_matches_finite_differences():
    """The analytic gradient of θ(b) = Σβ/(1 − Σρ) equals central differences
    (step 1e-6, tolerance 1e-7: the error of a central difference is O(h²))."""
    beta = np.array([0.3, 0.2, 0.8, -0.1, 0.4])  # y[t-1], y[t-2], x[t], x[t-1], w[t]
    idx, ar = [2, 3], [0, 1]
    g = longrun.gradient(beta, idx, ar)
    h = 1e-6
    num = np.array([(longrun.value(beta + h * e, idx, ar) - longrun.value(beta - h * e, idx, ar))
                    / (2 * h) for e in np.eye(len(beta))])
    np.testing.assert_allclose(g, num, atol=1e-7)
    assert g[4] == 0.0
    # the closed form at this point: 1/(1-0.5) = 2 and 0.7/(0.5**2) = 2.8
    assert g[2] == pytest.approx(2.0) and g[0] == pytest.approx(2.8)


def test_fit_reports_long_run_with_delta_method_se():
    """On a fit, the long-run estimate is Σβ/(1 − Σρ) of the reported coefficients
    and its standard error is sqrt(g'Vg) with the reported (Windmeijer-corrected)
    covariance; it survives the one record (to_dict / from_dict)."""
    _, panel = sim_panel(600, 8, seed=11, process=TRUE)
    res = fit(_two_lag_spec(), panel)
    assert res.std_error_kind == "windmeijer"
    labels = list(res.labels)
    lr = res.term("x[long-run]")
    b = res.params
    ar = [labels.index("y[t-1]"), labels.index("y[t-2]")]
    idx = [labels.index("x[t]"), labels.index("x[t-1]")]
    assert lr.estimate == pytest.approx(b[idx].sum() / (1 - b[ar].sum()), rel=1e-12)
    g = longrun.gradient(b, idx, ar)
    assert lr.std_error == pytest.approx(math.sqrt(g @ res.vcov @ g), rel=1e-12)
    assert [t.label for t in res.long_run] == ["x[long-run]", "w[long-run]"]
    back = FitResult.from_dict(res.to_dict())
    assert back.long_run == res.long_run
    assert "x[long-run]" in res.to_frame().index


def test_not_defined_when_ar_sum_reaches_one():
    """A unit root or explosive AR part: Σρ ≥ 1 has no steady state; the effect is
    NaN with that reason (never a number)."""
    from robustgmm.spec import Spec

    spec = Spec(unit="u", period="t", outcome="y", outcome_lags=(1,),
                regressors=(Regressor("x", (0,)),))
    terms, warns = longrun.long_run_effects(spec, ["y[t-1]", "x[t]", "const"],
                                            np.array([1.02, 0.5, 0.0]), np.eye(3) * 0.01)
    (t,) = terms
    assert math.isnan(t.estimate) and math.isnan(t.std_error)
    assert "not defined" in t.reason and ">= 1" in t.reason
    assert any("x[long-run]" in w for w in warns)


def test_long_run_recovers_truth_large_n():
    """N = 4,000, T = 8: two-step system GMM is consistent (Blundell & Bond 1998), so
    the long-run effect of x lies within 4 standard errors and 0.1 of
    beta / (1 - rho) = 2 and that of w of gamma / (1 - rho) = 1."""
    _, panel = sim_panel(4000, 8, seed=5, process=TRUE)
    res = fit(sim_spec(form="collapsed"), panel)
    for label, truth in [("x[long-run]", TRUE.beta / (1 - TRUE.rho)),
                         ("w[long-run]", TRUE.gamma / (1 - TRUE.rho))]:
        t = res.term(label)
        assert abs(t.estimate - truth) < 4 * t.std_error, label
        assert abs(t.estimate - truth) < 0.1, label


@pytest.mark.slow
def test_long_run_coverage_and_se_against_spread():
    """Coverage by simulation (known truth, the process of robustgmm.simulate): over
    replications of N = 500, T = 7 two-step system GMM with collapsed instruments and
    Windmeijer-corrected covariance, the 95% interval θ̂ ± 1.96 se covers
    beta/(1 - rho) = 2 in a binomial band around 0.95 (4 binomial sd, lower side
    also allowing 0.03 of small-sample undercoverage of a ratio), and the mean
    delta-method standard error is within 25% of the spread of the estimates."""
    reps = _reps(150)
    spec = sim_spec(form="collapsed", last_lag=4)
    truth = TRUE.beta / (1 - TRUE.rho)
    est, se = [], []
    for r in range(reps):
        _, panel = sim_panel(500, 7, seed=70_000 + r, process=TRUE)
        t = fit(spec, panel).term("x[long-run]")
        est.append(t.estimate)
        se.append(t.std_error)
    est, se = np.array(est), np.array(se)
    cover = np.mean(np.abs(est - truth) <= 1.96 * se)
    band = 4 * math.sqrt(0.05 * 0.95 / reps)
    assert 0.95 - band - 0.03 <= cover <= 0.95 + band, cover
    ratio = se.mean() / est.std(ddof=1)
    assert 0.75 < ratio < 1.25, ratio


def test_fit_summary_shows_long_run_effects():
    from robustgmm.terminal import format_fit_summary

    _, panel = sim_panel(300, 7, seed=2, process=TRUE)
    res = fit(sim_spec(form="collapsed"), panel)
    text = format_fit_summary(sim_spec(form="collapsed"), None, res)
    assert "Long-run effects" in text
    line = next(li for li in text.splitlines() if li.strip().startswith("x[long-run]"))
    assert f"{res.term('x[long-run]').estimate:.4f}" in line
